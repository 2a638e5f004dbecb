"""Executors by name, for the solver's group sweeps (and, next, for other per-partition work).

    serial      no executor: the calls run in order in this process (one worker)
    threads     a thread pool; the compiled kernels release the GIL
    processes   joblib's loky worker processes; np.memmap arguments travel as file handles

Each executor has ``map_calls(fn, calls, order, sizes[, done])``: fn(*call) for every call, results
in the order of ``calls`` whatever the order of completion (``done(j)``, where given, is called as
call j finishes: for progress lines) (partial floating-point results are then
combined by the caller in that fixed order), ``order`` the order in which calls are handed out.
The seam for a distributed engine is the same method: its workers must be handed file handles,
artifact keys and row ranges, never arrays in memory or host-bound handles (which is what
:class:`MapHandle` already does for the process workers).

Also here: where the process workers' scratch vectors live (:func:`work_files`).
"""

import contextlib
import os
from dataclasses import dataclass

import numpy as np

from . import artifacts, atomic

SHM = "/dev/shm"


def _ordered(run, calls, order):
    """Hand ``calls`` to ``run`` (a function of a list of calls) in ``order``; results back in the
    order of ``calls``."""
    done = list(run([calls[j] for j in order]))
    out = [None] * len(calls)
    for j, res in zip(order, done):
        out[j] = res
    return out


class Threads:
    """A thread pool."""

    def __init__(self, workers):
        from concurrent.futures import ThreadPoolExecutor

        self.workers = workers
        self._ex = ThreadPoolExecutor(max_workers=workers, thread_name_prefix="bigsmooth-sweep")

    def map(self, fn, *iterables):
        return self._ex.map(fn, *iterables)

    def map_calls(self, fn, calls, order=None, sizes=None, done=None):
        order = list(range(len(calls))) if order is None else order
        if done is None:
            return _ordered(lambda cs: self._ex.map(fn, *zip(*cs)), calls, order)

        def run(j):
            out = fn(*calls[j])
            done(j)
            return out

        futures = {j: self._ex.submit(run, j) for j in order}
        return [futures[j].result() for j in range(len(calls))]

    def shutdown(self, wait=True):
        self._ex.shutdown(wait=wait)

    def describe(self):
        return f"{self.workers} threads here"


@dataclass(frozen=True)
class MapHandle:
    """A whole-file np.memmap as its file's identity, so a process worker can keep it mapped."""

    path: str
    inode: int
    size: int
    offset: int
    shape: tuple
    dtype: str
    mode: str


def _handle(a):
    """``a`` as a :class:`MapHandle` if it is an np.memmap over a whole file (the .npy data after
    its header), tuples element-wise, anything else as it is."""
    if isinstance(a, tuple):
        return tuple(_handle(x) for x in a)
    if isinstance(a, np.memmap) and a.filename and a.flags.c_contiguous:
        try:
            st = os.stat(a.filename)
        except OSError:
            return a
        if a.offset + a.nbytes == st.st_size:
            return MapHandle(
                a.filename,
                st.st_ino,
                st.st_size,
                int(a.offset),
                tuple(a.shape),
                a.dtype.str,
                "r" if a.mode in ("r", "c") else "r+",
            )
    return a


_MAPPED = {}  # in each worker process: MapHandle -> the open np.memmap
_MAPPED_MAX = 64


def _resolve(a):
    """The worker's side of :func:`_handle`: open a file once per process and keep it mapped, so
    that a task does not map (and page-fault through) the whole system again."""
    if isinstance(a, tuple):
        return tuple(_resolve(x) for x in a)
    if not isinstance(a, MapHandle):
        return a
    m = _MAPPED.get(a)
    if m is None:
        st = os.stat(a.path)  # FileNotFoundError on a host that does not mount the file
        if (st.st_ino, st.st_size) != (a.inode, a.size):
            raise RuntimeError(
                f"{a.path} here is not the file the driver mapped (another inode or size): the "
                "worker must mount the run directory at the same path as the driver"
            )
        # drop files that were replaced or removed (so their pages can go)
        for old in [h for h in _MAPPED if h.path == a.path or not os.path.exists(h.path)]:
            del _MAPPED[old]
        if len(_MAPPED) >= _MAPPED_MAX:
            del _MAPPED[next(iter(_MAPPED))]
        m = _MAPPED[a] = np.memmap(
            a.path, dtype=np.dtype(a.dtype), mode=a.mode, offset=a.offset, shape=a.shape
        )
    return m


def _call_mapped(fn, args):
    return fn(*_resolve(args))


def _call_many(fn, calls):
    return [fn(*c) for c in _resolve(calls)]


class ProcessPool:
    """joblib's loky executor (with its memmap reducers) for the group sweeps. Whole-file memmap
    arguments travel as :class:`MapHandle`: each worker maps a file once and keeps it mapped across
    tasks. (Mapping the system afresh for every task, as the reducers do, cost about 3x the sweep
    itself at 1M rows, measured: 100 ms per sweep against 33 ms with threads.)"""

    def __init__(self, workers):
        from joblib.executor import get_memmapping_executor

        self.workers = workers
        self._ex = get_memmapping_executor(workers)

    def map(self, fn, *iterables):
        calls = [_handle(tuple(args)) for args in zip(*iterables)]
        return self._ex.map(_call_mapped, [fn] * len(calls), calls)

    def map_calls(self, fn, calls, order=None, sizes=None):
        """One task per worker when ``sizes`` is given (every task costs a round trip between
        processes), else one per call; results in the order of ``calls``."""
        order = list(range(len(calls))) if order is None else order
        if sizes is not None:
            return self.map_batched(fn, calls, order, sizes)
        return _ordered(lambda cs: self.map(fn, *zip(*cs)), calls, order)

    def map_batched(self, fn, calls, order, sizes):
        """fn over the calls in one task per worker: calls dealt in ``order``, each to the worker
        with the least work so far (by ``sizes``); results in the order of ``calls``."""
        bins = [[] for _ in range(self.workers)]
        load = [0] * self.workers
        for j in order:
            k = load.index(min(load))
            bins[k].append(j)
            load[k] += sizes[j]
        bins = [b for b in bins if b]
        done = self._ex.map(_call_many, [fn] * len(bins), [_handle(tuple(calls[j] for j in b)) for b in bins])
        out = [None] * len(calls)
        for b, res in zip(bins, done):
            for j, r in zip(b, res):
                out[j] = r
        return out

    def shutdown(self, wait=True):
        self._ex.shutdown(wait=wait)


EXECUTORS = {"threads": Threads, "processes": ProcessPool}

# environment a task takes from the driver: the armed test faults, the compiled-kernel cache
TASK_ENV = ("BIGSMOOTH_FAULT", "NUMBA_CACHE_DIR")


@contextlib.contextmanager
def one_blas_thread():
    """Limit BLAS to one thread in this process (threadpoolctl). The runner holds it around every
    stage and a Dask task around its call: BLAS reductions (dot products, norms) split their sums by
    thread count, so results would otherwise depend on the machine's cores (a job started from a
    process that had started a Dask LocalCluster inherits OPENBLAS_NUM_THREADS=1, and two audit
    figures differed in the last bit). It is also faster for tasks run one per core: on the
    partition searches at 300k rows, 2 tasks with one BLAS thread each took 12.6 s against 18.2 s
    for one task at a time with BLAS on both cores."""
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1, user_api="blas"):
        yield


def _run_task(fn, env, args):
    """A task on a Dask worker: the driver's TASK_ENV for the duration of the call, then fn(*args)
    with one BLAS thread (a worker runs one task per thread)."""
    old = {k: os.environ.get(k) for k in env}
    os.environ.update(env)
    try:
        with one_blas_thread():
            return fn(*args)
    finally:
        for k, v in old.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v


class TaskRerun(RuntimeError):
    """A task that writes in place (not safe to run twice) found it had started before: its worker
    died and the scheduler ran it again. The caller goes back to its last checkpoint."""


def _call_once(folder, name, fault, fn, args):
    """fn(*args) after marking the task ``name`` started (a file created exclusively in
    ``folder``); :class:`TaskRerun` if it had started before. ``fault`` is the fault point fired
    after the mark, before fn writes anything (tests)."""
    from . import faults

    try:
        os.close(os.open(os.path.join(folder, name), os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644))
    except FileExistsError:
        raise TaskRerun(f"task {name} had started before (its worker died)") from None
    faults.point(fault)
    return _call_mapped(fn, args)


def _call_after_fault(fault, fn, args):
    """fn(*args) after the fault point ``fault`` (tests)."""
    from . import faults

    faults.point(fault)
    return _call_mapped(fn, args)


def task_key(fn, call):
    """A deterministic key for a task: the function's name and a hash of its arguments (the run
    root, artifact keys, row ranges), so the same task submitted again is the same task."""
    import hashlib
    import pickle

    try:  # the arguments' full content (numpy's repr elides long arrays)
        text = pickle.dumps((fn.__module__, fn.__qualname__, call), protocol=4)
    except (pickle.PicklingError, TypeError, AttributeError):
        text = repr((fn.__module__, fn.__qualname__, call)).encode()
    digest = hashlib.sha256(text).hexdigest()[:20]
    return f"bigsmooth-{fn.__name__}-{digest}"


def _probe(address, timeout):
    """Fail at once when nothing listens at a tcp:// scheduler address (a refused connection), instead
    of retrying until the timeout; other schemes and other errors are left to the client."""
    import socket
    from urllib.parse import urlsplit

    from .errors import EngineUnavailableError

    parts = urlsplit(address)
    if parts.scheme != "tcp" or not parts.hostname or not parts.port:
        return
    try:
        socket.create_connection((parts.hostname, parts.port), timeout=timeout).close()
    except ConnectionRefusedError:
        raise EngineUnavailableError(
            f"cannot reach the Dask scheduler at {address}: connection refused (is the scheduler "
            "running?); nothing was lost: run the job again once the cluster is up and it resumes"
        ) from None
    except OSError:
        return  # the client says more


def _host_identity():
    """This host's boot id (/proc/sys/kernel/random/boot_id, new at every boot of a Linux host and
    shared by its containers), or its name where there is none."""
    import socket

    try:
        with open("/proc/sys/kernel/random/boot_id") as fh:
            return fh.read().strip()
    except OSError:
        return socket.gethostname()


class DaskTasks:
    """Tasks on a dask.distributed cluster (run.engine = "dask").

    A call holds the run root, artifact keys and row ranges; the task reads its inputs from the run
    directory (storage every worker mounts at the same path) and writes its outputs atomically, so a
    task that runs twice (its worker died and the scheduler ran it again) writes the same files.
    Results come back in the order of the calls; the caller combines them in that order."""

    def __init__(self, client, address):
        self.client = client
        self.address = address
        self.batches = 0  # map_calls so far: part of each task's key
        self.once = None  # (folder, fault prefix): tasks write in place, see run_once
        self.fault = None  # fault prefix of tasks that may run twice (see fault_points)

    def run_once(self, folder, fault):
        """Tasks from now on write in place (the solver's group sweeps update its vectors), so a
        task must not run twice: each marks itself started in ``folder`` (emptied here) and one
        that finds its mark raises :class:`TaskRerun`; the fault point ``<fault>:<map number>``
        fires after the mark (tests)."""
        import shutil

        shutil.rmtree(folder, ignore_errors=True)
        os.makedirs(folder)
        self.once = (folder, fault)

    def fault_points(self, fault):
        """Tasks from now on fire the fault point ``<fault>:<map number>`` before their work (tests:
        a task that kills its worker; for tasks that are safe to run twice)."""
        self.fault = fault

    @classmethod
    def connect(cls, address="", timeout=10):
        from .errors import ConfigError, EngineUnavailableError

        address = address or os.environ.get("DASK_SCHEDULER_ADDRESS", "")
        if not address:
            raise ConfigError(
                'run.engine = "dask" needs the scheduler\'s address: set run.dask_scheduler (e.g. '
                '"tcp://10.0.0.5:8786") or the DASK_SCHEDULER_ADDRESS environment variable'
            )
        try:
            from distributed import Client
        except ImportError:
            raise ConfigError(
                'run.engine = "dask" needs dask.distributed: pip install "bigsmooth[dask]"'
            ) from None
        _probe(address, timeout)
        try:
            client = Client(address, timeout=timeout, set_as_default=False)
        except (OSError, TimeoutError) as exc:
            raise EngineUnavailableError(
                f"cannot reach the Dask scheduler at {address} within {timeout} s ({exc}); nothing "
                "was lost: run the job again once the cluster is up and it resumes"
            ) from None
        return cls(client, address)

    def share(self, a):
        """``a`` on the cluster once, for the tasks of the next map (each worker that needs it fetches
        it once, instead of it travelling inside every task); its key is a hash of its content."""
        return self.client.scatter(a, hash=True)

    def on_this_host(self):
        """Whether every worker runs on this host (the same Linux boot id, else the same host
        name): then memory-mapped files in the run directory are shared through one page cache."""
        here = _host_identity()
        found = self.client.run(_host_identity)
        return bool(found) and all(v == here for v in found.values())

    def describe(self):
        workers = self.client.scheduler_info(n_workers=-1).get("workers", {})
        return f"the Dask cluster at {self.address} ({len(workers)} workers)"

    def map_calls(self, fn, calls, order=None, sizes=None, done=None):
        """``done(j)`` (optional) is called here as call j finishes, in completion order (for
        progress only; results still come back in the order of the calls). Arrays that are
        whole-file memory maps travel as :class:`MapHandle` (the solver's group sweeps: a worker
        maps the run directory's files and writes its rows into them, as the process workers do).
        A task's key is the function, its arguments and the number of this map on this executor
        (one stage's executor numbers its maps in the same order in every run, so the keys are
        deterministic, and two maps with equal arguments, such as two sweeps, stay two tasks)."""
        order = list(range(len(calls))) if order is None else order
        env = {k: os.environ[k] for k in TASK_ENV if k in os.environ}
        self.batches += 1
        b = self.batches
        handles = [_handle(tuple(c)) for c in calls]

        def task(j):
            if self.once is None and self.fault is not None:
                return _call_after_fault, (f"{self.fault}:{b}", fn, handles[j])
            if self.once is None:
                return _call_mapped, (fn, handles[j])
            folder, fault = self.once
            return _call_once, (folder, f"{b}-{j}", f"{fault}:{b}", fn, handles[j])

        futures = {
            j: self.client.submit(
                _run_task, task(j)[0], env, task(j)[1], key=task_key(fn, (b, handles[j])), pure=False
            )
            for j in order
        }
        if done is not None:
            from distributed import as_completed

            index = {f.key: j for j, f in futures.items()}
            for f in as_completed(list(futures.values()), loop=self.client.loop):
                if f.status == "finished":
                    done(index[f.key])
        ordered = [futures[j] for j in range(len(calls))]
        if self.once is not None:
            # every task of the map ends (finishes or fails) before the caller may go back to a
            # checkpoint, so that none still writes into the vectors afterwards (exception()
            # waits for the task's end and raises nothing for a failed one)
            for f in ordered:
                f.exception()
        from distributed import KilledWorker

        try:
            results = list(self.client.gather(ordered))
        except KilledWorker as exc:
            from .errors import EngineUnavailableError

            raise EngineUnavailableError(
                f"Dask workers kept dying while running a task ({exc}); the scheduler gave up on it. "
                "Nothing was lost: check the workers' memory and logs, then run the job again and it "
                "resumes"
            ) from None
        if self.once is not None:
            for j in range(len(calls)):
                with contextlib.suppress(OSError):
                    os.unlink(os.path.join(self.once[0], f"{b}-{j}"))
        return results

    def shutdown(self, wait=True):
        self.client.close()


def make_executor(workers, backend):
    """The executor named ``backend`` with ``workers`` workers, or None (serial) for one worker.

    ``threads``: a thread pool (the compiled kernels release the GIL). ``processes``: joblib's loky
    executor (:class:`ProcessPool`): arrays that are np.memmap travel as file references, each
    worker keeps the files mapped, and the workers' writes land in the same files. (joblib.Parallel
    itself costs about 10 ms per call here, measured, against 0.1 ms for a thread pool and 2-4 ms
    for the loky executor; a sweep makes three calls.)
    """
    if workers <= 1:
        return None
    try:
        return EXECUTORS[backend](workers)
    except KeyError:
        raise ValueError(
            f"backend must be one of {', '.join(map(repr, EXECUTORS))}; got {backend!r}"
        ) from None


def shm_key(path):
    """The run directory's name and a hash of its full path (two run roots may hold the same run id)."""
    import hashlib

    path = os.path.abspath(path)
    return f"{os.path.basename(path)}-{hashlib.sha256(path.encode()).hexdigest()[:8]}"


@contextlib.contextmanager
def work_files(n, c, key, fallback, shared_memory=True):
    """The solver's vectors as memory-mapped files for process workers: in shared memory
    (``/dev/shm/bigsmooth-<key>``) when it has room for them twice over, else in ``fallback``.
    New pages of a file on disk cost a block allocation at their first write (measured here on
    ext4 at 1M rows: about 95 ms for the first sweep's four vectors, against 21 ms for the sweep),
    and the vectors are scratch (the checkpoint is written separately), so shared memory is the
    place for them. The shared-memory folder is removed afterwards (and, if a killed run left
    one, before). ``shared_memory=False`` keeps them in ``fallback`` (workers on a Dask cluster
    map the files by their path in the run directory, which every worker mounts; /dev/shm is the
    driver host's own)."""
    import dataclasses
    import shutil

    from .kernels.sweepcg import Work

    need = len(dataclasses.fields(Work)) * n * c * 8
    folder = fallback
    if shared_memory:
        with contextlib.suppress(OSError):
            st = os.statvfs(SHM)
            if st.f_bavail * st.f_frsize >= 2 * need:
                folder = os.path.join(SHM, f"bigsmooth-{key}")
    if folder != fallback:
        shutil.rmtree(folder, ignore_errors=True)
    os.makedirs(folder, exist_ok=True)
    try:
        yield Work.allocate(
            n,
            c,
            lambda name, shape: atomic.new_memmap(artifacts.member_file(folder, name), np.float64, shape),
        )
    finally:
        if folder != fallback:
            shutil.rmtree(folder, ignore_errors=True)
