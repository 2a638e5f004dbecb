"""Atomic writes: a file is either complete or absent, never partial.

Every write goes to a temporary sibling, is fsync'd, renamed into place with
``os.replace`` and the directory is fsync'd, so a crash never leaves a file
that looks finished.
"""

import contextlib
import json
import mmap
import os
import tempfile

import numpy as np

_UMASK = os.umask(0)
os.umask(_UMASK)


def new_memmap(path, dtype, shape):
    """A new .npy memmap whose disk blocks are reserved up front (posix_fallocate): a full disk
    then fails here with OSError(ENOSPC) instead of killing the process with SIGBUS at the first
    write to a page the file system cannot back."""
    # a new inode: never truncate a file that may be a hard link shared with another run
    with contextlib.suppress(FileNotFoundError):
        os.unlink(path)
    arr = np.lib.format.open_memmap(path, mode="w+", dtype=dtype, shape=shape)
    fd = os.open(path, os.O_RDWR)
    try:
        size = os.fstat(fd).st_size
        if size:
            os.posix_fallocate(fd, 0, size)
    except OSError:
        del arr
        raise
    finally:
        os.close(fd)
    return arr


def release_pages(arr):
    """Drop the pages of a memory-mapped array (np.load(mmap_mode=...), :func:`new_memmap`) from
    this process's resident memory: written pages are flushed to the file first, then
    madvise(MADV_DONTNEED) unmaps them; they stay in the kernel's page cache and the next access
    maps them again, so the array's contents are unchanged. A long pass over large memory maps
    calls this between blocks so that its resident memory holds one block, not every page it
    touched. Returns False (and does nothing) for an array that is not memory-mapped, or where the
    platform has no madvise (then only the memory bound is lost, never data)."""
    base = arr
    while base is not None and not isinstance(base, mmap.mmap):
        base = getattr(base, "base", None)
    if base is None or not hasattr(mmap, "MADV_DONTNEED"):
        return False
    if arr.flags.writeable:
        base.flush()
    base.madvise(mmap.MADV_DONTNEED)
    return True


def fsync_dir(path):
    """fsync a directory so that a rename inside it is durable."""
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


@contextlib.contextmanager
def atomic_path(target):
    """Yield a temporary path beside ``target``; on success rename it into place.

    On an exception the temporary file is removed and ``target`` is untouched.
    """
    target = os.fspath(target)
    parent = os.path.dirname(os.path.abspath(target))
    os.makedirs(parent, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix="." + os.path.basename(target) + ".", suffix=".tmp", dir=parent)
    os.fchmod(fd, 0o666 & ~_UMASK)  # mkstemp makes 0600; a finished file follows the umask like any other
    os.close(fd)
    try:
        yield tmp
        with open(tmp, "rb+") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, target)
        fsync_dir(parent)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise


def write_bytes(target, data):
    with atomic_path(target) as tmp:
        with open(tmp, "wb") as fh:
            fh.write(data)


def write_json(target, obj):
    write_bytes(target, (json.dumps(obj, indent=2, sort_keys=True, default=_json_default) + "\n").encode())


def read_json(path):
    with open(path, "rb") as fh:
        return json.load(fh)


def save_npy(target, array):
    with atomic_path(target) as tmp:
        with open(tmp, "wb") as fh:
            np.save(fh, np.asarray(array), allow_pickle=False)


@contextlib.contextmanager
def open_memmap(target, dtype, shape):
    """Yield a writable .npy memmap on a temporary sibling of ``target``; on success flush it and
    rename it into place (complete or absent, like every other write here)."""
    with atomic_path(target) as tmp:
        arr = new_memmap(tmp, dtype, shape)
        try:
            yield arr
            arr.flush()
        finally:
            del arr


class NpyWriter:
    """Appends rows to a .npy file of a known shape with plain writes (no memory map, so the rows
    written do not stay in the writer's resident memory). Use through :func:`npy_writer`."""

    def __init__(self, fh, dtype, shape):
        self.fh, self.dtype, self.shape, self.rows = fh, np.dtype(dtype), tuple(shape), 0

    def write(self, block):
        block = np.ascontiguousarray(block, dtype=self.dtype)
        if block.shape[1:] != self.shape[1:] or self.rows + len(block) > self.shape[0]:
            raise ValueError(f"block of shape {block.shape} does not fit {self.shape} at row {self.rows}")
        self.fh.write(block.tobytes())
        self.rows += len(block)


@contextlib.contextmanager
def npy_writer(target, dtype, shape):
    """Yield a :class:`NpyWriter` on a temporary sibling of ``target``; when every row has been
    written, rename it into place (complete or absent, like every other write here)."""
    with atomic_path(target) as tmp:
        with open(tmp, "wb") as fh:
            header = {"descr": np.lib.format.dtype_to_descr(np.dtype(dtype)), "fortran_order": False}
            np.lib.format.write_array_header_2_0(fh, {**header, "shape": tuple(shape)})
            out = NpyWriter(fh, dtype, shape)
            yield out
            if out.rows != shape[0]:
                raise ValueError(f"{out.rows} rows written of {shape[0]}: {target}")


def _json_default(obj):
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.floating):
        return float(obj)
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, np.bool_):
        return bool(obj)
    raise TypeError(f"not JSON serialisable: {type(obj).__name__}")
