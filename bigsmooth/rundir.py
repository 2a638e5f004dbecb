"""The run directory: manifest, stage states and the run lock.

    <run.dir>/<run-id>/manifest.json    identity (config hash, input fingerprint), stage states,
                                        timings and each stage's summary
    <run.dir>/<run-id>/<stage>/...      each stage's artifacts
    <run.dir>/<run-id>/.lock            fcntl lock held for the whole run

The run id is the first 16 hex digits of sha256(config hash + input hash): the same config and
input give the same run directory, so a second run resumes or (when complete) does nothing.
"""

import contextlib
import errno
import fcntl
import hashlib
import logging
import os
import shutil
import socket
import time

from . import artifacts, atomic, faults, logs
from .errors import LockHeldError, OutputError

log = logging.getLogger("bigsmooth.run")

STAGES = ("scan", "embed", "graph", "order", "solve", "audit", "publish")


def run_id(cfg_hash, input_hash):
    return hashlib.sha256((cfg_hash + ":" + input_hash).encode()).hexdigest()[:16]


class RunDir:
    def __init__(self, path):
        self.path = os.fspath(path)
        self.manifest_path = os.path.join(self.path, artifacts.MANIFEST)

    def exists(self):
        return os.path.exists(self.manifest_path)

    def load(self):
        return atomic.read_json(self.manifest_path)

    def create(self, identity):
        try:
            os.makedirs(self.path, exist_ok=True)
        except OSError as exc:
            raise OutputError(f"cannot create run directory {self.path}: {exc.strerror}") from None
        manifest = {
            **identity,
            "created": _now(),
            "created_ns": time.time_ns(),  # orders runs created within the same second (retention)
            "stages": {s: {"state": "pending"} for s in STAGES},
        }
        self.save(manifest)
        return manifest

    def save(self, manifest):
        try:
            atomic.write_json(self.manifest_path, manifest)
        except OSError as exc:
            raise OutputError(f"cannot write {self.manifest_path}: {exc.strerror}") from None

    def is_done(self, stage):
        return self.load()["stages"][stage]["state"] == "done"

    def summary(self, stage):
        return self.load()["stages"][stage].get("summary", {})

    def all_done(self):
        return all(v["state"] == "done" for v in self.load()["stages"].values())

    @contextlib.contextmanager
    def stage(self, name, identity=None):
        """Mark a stage running, then done (with the summary the body stores and the stage's identity,
        see :mod:`bigsmooth.stages.base`) or failed."""
        m = self.load()
        entry = m["stages"][name]
        entry.update(state="running", started=_now())
        entry.pop("reused_from", None)
        entry.pop("error", None)
        entry.pop("dropped", None)  # computed again: whole again
        self.save(m)
        t0 = time.monotonic()
        record = {}
        logs.CONTEXT["stage"] = name
        try:
            faults.point(f"stage:{name}:start")
            yield record
            faults.point(f"stage:{name}:done")
        except BaseException as exc:
            m = self.load()
            m["stages"][name].update(
                state="failed",
                seconds=round(time.monotonic() - t0, 3),
                error=f"{type(exc).__name__}: {exc}"[:2000],
            )
            with contextlib.suppress(Exception):
                self.save(m)
            logs.CONTEXT["stage"] = None
            raise
        m = self.load()
        m["stages"][name].update(
            state="done",
            finished=_now(),
            seconds=round(time.monotonic() - t0, 3),
            summary=record,
            **({"identity": identity} if identity else {}),
        )
        self.save(m)
        secs = time.monotonic() - t0
        logs.CONTEXT["stage"] = None
        logs.event(
            log,
            "stage_done",
            "stage %s done in %.1f s",
            name,
            secs,
            seconds=round(secs, 3),
            peak_rss_mb=record.get("peak_rss_mb"),
            stage=name,
        )

    def adopt(self, name, source, identity):
        """Take stage ``name``'s outputs from the run directory ``source`` (same identity): its files
        are hard-linked (copied where links are not possible) into a temporary folder that is renamed
        into place, then the stage is marked done with ``reused_from``. Finished stage files are never
        written again (every write replaces a file), so a link shares exactly the finished content.
        Returns False, leaving nothing behind, if the source's files cannot be read."""
        src_manifest = atomic.read_json(os.path.join(source, artifacts.MANIFEST))
        src_dir = os.path.join(source, name)
        dst_dir = os.path.join(self.path, name)
        tmp = os.path.join(self.path, f".adopt-{name}")
        shutil.rmtree(tmp, ignore_errors=True)
        try:
            shutil.copytree(src_dir, tmp, copy_function=_link_or_copy)
        except (OSError, shutil.Error) as exc:
            shutil.rmtree(tmp, ignore_errors=True)
            log.info("stage %s: could not reuse the outputs of %s (%s); computing them", name, source, exc)
            return False
        shutil.rmtree(dst_dir, ignore_errors=True)
        os.rename(tmp, dst_dir)
        atomic.fsync_dir(self.path)
        m = self.load()
        m["stages"][name] = {
            "state": "done",
            "finished": _now(),
            "seconds": 0.0,
            "identity": identity,
            "reused_from": src_manifest["run_id"],
            "summary": src_manifest["stages"][name].get("summary", {}),
        }
        self.save(m)
        return True

    def root(self, name, manifest=None):
        """A declared root (``config``, ``input``, ``output``) as seen from where this run directory
        is now: the manifest records it relative to the folder that holds the run directories."""
        m = manifest or self.load()
        return os.path.normpath(os.path.join(os.path.dirname(os.path.abspath(self.path)), m["roots"][name]))

    def config_path(self, manifest=None):
        """The config file the run was made with."""
        m = manifest or self.load()
        return os.path.join(self.root("config", m), m["config_file"])

    def lock(self):
        """Hold an exclusive fcntl lock on the run for the whole block; fail at once if held."""
        return hold_lock(self.path, f"run {self.path}")


@contextlib.contextmanager
def hold_lock(folder, what):
    """An exclusive fcntl lock on ``folder``/.lock for the whole block (released by the kernel if the
    process dies, so a killed run never leaves a stale lock); LockHeldError naming the holder if
    another process has it."""
    try:
        os.makedirs(folder, exist_ok=True)
        fd = os.open(os.path.join(folder, artifacts.LOCK), os.O_RDWR | os.O_CREAT, 0o644)
    except OSError as exc:
        raise OutputError(f"cannot create the lock file in {folder}: {exc.strerror}") from None
    try:
        holder = _try_flock(fd, fcntl.LOCK_EX)
        if holder is not None:
            raise LockHeldError(f"{what} is in use by another bigsmooth process ({holder}); retry later")
        os.ftruncate(fd, 0)
        os.pwrite(fd, f"pid {os.getpid()} on {socket.gethostname()} since {_now()}\n".encode(), 0)
        yield
    finally:
        os.close(fd)


def lock_holder(folder):
    """Who holds ``folder``/.lock ("pid N on HOST since T"), or None when no process holds it (the
    lock is only tried, never kept)."""
    path = os.path.join(folder, artifacts.LOCK)
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        return None
    try:
        holder = _try_flock(fd, fcntl.LOCK_SH)
        if holder is None:
            fcntl.flock(fd, fcntl.LOCK_UN)
        return holder
    finally:
        os.close(fd)


def _try_flock(fd, mode):
    """Take the lock ``mode`` on ``fd`` without waiting: None when taken, else the holder the lock
    file names ("unknown" if it names none)."""
    try:
        fcntl.flock(fd, mode | fcntl.LOCK_NB)
    except OSError as exc:
        if exc.errno not in (errno.EAGAIN, errno.EACCES):
            raise
        return os.pread(fd, 200, 0).decode(errors="replace").strip() or "unknown"
    return None


def relative_roots(run_root, **roots):
    """{name: path relative to ``run_root``} (see :meth:`RunDir.root`)."""
    base = os.path.abspath(run_root)
    return {k: os.path.relpath(os.path.abspath(v), base) for k, v in roots.items()}


def _link_or_copy(src, dst):
    try:
        os.link(src, dst)
    except OSError:
        shutil.copy2(src, dst)
    return dst


def manifests(run_root):
    """[(run directory, its manifest)] of the runs under ``run_root``, by folder name; folders
    without a readable manifest are left out."""
    out = []
    if not os.path.isdir(run_root):
        return out
    for name in sorted(os.listdir(run_root)):
        path = os.path.join(run_root, name)
        try:
            out.append((path, atomic.read_json(os.path.join(path, artifacts.MANIFEST))))
        except (OSError, ValueError):
            continue
    return out


def find_stage(run_root, name, identity, exclude):
    """A finished run directory under ``run_root`` whose stage ``name`` is done with ``identity``
    (newest first), or None."""
    found = []
    for path, m in manifests(run_root):
        if path == exclude:
            continue
        st = m.get("stages", {}).get(name, {})
        if (
            st.get("state") == "done"
            and not st.get("dropped")  # outputs deleted by run.drop_intermediates
            and st.get("identity") == identity
            and os.path.isdir(os.path.join(path, name))
        ):
            found.append((st.get("finished", ""), path))
    return max(found)[1] if found else None


def _now():
    return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())
