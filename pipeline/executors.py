"""Where frame tasks run: a dask.distributed cluster, or serially in-process.

- ``local`` (default): a process-based ``LocalCluster`` with one worker per
  core and one thread per worker (the kernels hold the GIL part of the
  time), started and stopped by the run. Its workers keep glibc's own
  malloc thresholds: dask's nanny would set ``MALLOC_TRIM_THRESHOLD_=65536``,
  which also freezes glibc's mmap threshold at 128 KiB, so that every
  frame-sized array becomes a fresh ``mmap`` whose pages are faulted in and
  zeroed again; on the development machine the same kernels then ran 25-45 %
  slower in a worker than in a plain loop (``grainhabit bench throughput``).
  A ``MALLOC_TRIM_THRESHOLD_`` set in the environment is still passed on.
  Its workers also run without dask's statistical profiler (a thread that
  samples the running task's stack 100 times a second for the dashboard,
  which a headless run has not got), and every process of the cluster checks
  its event loop's health and its workers' memory every 0.5 s instead of
  every 20 ms and 100 ms: on 2 busy cores those wake-ups preempted the frame
  task 120-200 times a second (measured as involuntary context switches of
  the task thread, 700-1250 per 6 s against about 100 in a plain process)
  and cost it about 8 % of its speed.
  Its worker processes are forked from the run's own process on Linux
  (``execution.start_method: auto``): each starts with dask, the plugin
  modules and their libraries already imported (the run's plugin host
  imported them), instead of a fresh interpreter importing them all again
  (about 0.3 s of CPU per worker, and a cluster start of 0.4-0.9 s against
  0.1 s). ``grainhabit_prepare_worker`` still runs in every worker. ``spawn``
  (dask's default, and the choice on other systems) starts fresh
  interpreters.
- ``tcp://HOST:PORT``: an existing cluster, e.g. started with
  ``dask scheduler`` and ``dask worker``. Plugin files named in the
  workflow's ``plugins:`` list are shipped with ``Client.upload_file``;
  installed plugins must be installed on the workers too.
- ``serial``: no dask at all, frames one after another in this process
  (for debugging a plugin with a debugger or print statements).

Before the first frame, :meth:`prepare` runs a function once on every worker
(the runner uses it for :func:`grainhabit.task.prepare_worker`: imports and
lookup tables of the plugins, built on all workers at once).

Results are yielded as frames finish, with at most ``max_in_flight`` tasks
submitted at a time, so memory does not grow with the number of frames.
"""

from __future__ import annotations

import logging
import os
from typing import Callable, Iterable, Iterator


#: Values of ``execution.start_method``: how a local cluster starts its worker processes.
START_METHODS = ("auto", "fork", "spawn")


def start_method(choice: str = "auto") -> str:
    """The start method a local cluster uses for ``execution.start_method: choice``.

    ``auto`` is ``fork`` on Linux (the workers inherit the modules the run's
    process has imported) and ``spawn`` elsewhere (macOS does not fork a
    process with threads safely, and Windows cannot fork).
    """
    import sys

    if choice == "auto":
        return "fork" if sys.platform.startswith("linux") else "spawn"
    return choice


class WorkerDied(Exception):
    """The worker process running a frame died (twice: it was retried once)."""


class SerialExecutor:
    """Run tasks one after another in this process."""

    n_workers = 1
    description = "serial (in-process)"
    advice: tuple = ()
    #: The frames run in the calling thread (work beside them would not overlap them).
    in_process = True

    def start(self) -> None:
        pass

    def prepare(self, func: Callable, *args) -> list:
        """Run ``func(*args)`` once in this process; its result in a list."""
        return [func(*args)]

    def map_unordered(self, func: Callable, items: Iterable[tuple]) -> Iterator[tuple]:
        from threadpoolctl import threadpool_limits

        # one BLAS/OpenMP thread, as dask's worker processes have (OMP_NUM_THREADS=1), so that a serial
        # run gives bit-for-bit the results of a cluster run
        with threadpool_limits(limits=1):
            for key, args in items:
                try:
                    yield key, func(*args)
                except Exception as exc:  # func itself never raises for frame problems
                    yield key, exc

    def close(self) -> None:
        pass


class DaskExecutor:
    """Run tasks on a dask.distributed cluster (local or remote).

    Parameters
    ----------
    address : str or None
        Scheduler address, or ``None`` for a new local cluster.
    workers : int or "auto"
        Local worker processes (ignored for a remote cluster).
    threads_per_worker : int
        Threads per local worker.
    memory_limit : str
        Per-worker memory limit of a local cluster (dask syntax, "auto").
    upload : list of str
        Plugin ``.py`` files to ship to every worker.
    max_in_flight : int
        Tasks submitted at once; 0 means four per worker thread.
    start_method : {"auto", "fork", "spawn"}
        How a local cluster starts its worker processes (:func:`start_method`).
    """

    #: The frames run in other processes (the caller's process is free while they run).
    in_process = False

    def __init__(self, address=None, workers="auto", threads_per_worker=1, memory_limit="auto",
                 upload=(), max_in_flight=0, dashboard=False, batch=None, start_method="auto"):
        self.address = address
        self.dashboard = dashboard
        self.batch = batch
        self.workers = workers
        self.threads = threads_per_worker
        self.memory_limit = memory_limit
        self.upload = list(upload)
        self.max_in_flight = max_in_flight
        self.start_method = start_method
        self.client = None
        self.cluster = None
        self.n_workers = 0
        self.description = ""
        self.advice: list[str] = []

    def start(self) -> None:
        import dask
        from distributed import Client, LocalCluster

        if self.batch:
            from .hpc import make_cluster

            system, options = self.batch
            self.cluster = make_cluster(system, options, dashboard=self.dashboard)
            jobs = int(options.get("jobs") or 1)
            self.cluster.scale(jobs=jobs)
            self.client = Client(self.cluster)
            per_job = int(options.get("processes") or options["cores"])
            self.n_workers = jobs * per_job
            self.description = f"{system} batch jobs ({jobs} x {per_job} workers)"
        elif self.address:
            self.client = Client(self.address, timeout="20s")
            info = self.client.scheduler_info()
            self.n_workers = max(1, len(info.get("workers", {})))
            self.description = f"cluster {self.address} ({self.n_workers} workers)"
        else:
            n = (os.cpu_count() or 1) if self.workers == "auto" else int(self.workers)
            # a frame whose worker dies is retried once, then reported failed; with worker-saturation 1.0 a
            # worker holds only the frames it is running, so a dying worker takes no innocent frame with it
            if "MALLOC_TRIM_THRESHOLD_" not in os.environ:
                dask.config.set({"distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_": None})
            dask.config.set({"distributed.worker.profile.enabled": False,
                             "distributed.admin.tick.interval": "500ms",
                             "distributed.worker.memory.monitor-interval": "500ms",
                             "distributed.scheduler.allowed-failures": 1,
                             "distributed.scheduler.worker-saturation": 1.0,
                             "distributed.worker.daemon": False})
            # the scheduler's HTTP server (health and metrics routes) always listens; without a dashboard it
            # takes any free port instead of dask's 8787 (a second run warned "Port 8787 is already in use")
            # Ctrl-C reaches the workers too (the terminal signals the whole process group): they ignore it
            # (grainhabit.quiet_worker) and the run shuts them down, instead of each printing its traceback
            dask.config.set({"distributed.worker.preload": ["grainhabit.quiet_worker"],
                             "distributed.worker.multiprocessing-method": start_method(self.start_method)})
            self.cluster = LocalCluster(n_workers=n, threads_per_worker=self.threads, processes=True,
                                        memory_limit=self.memory_limit,
                                        dashboard_address=":8787" if self.dashboard else ":0",
                                        silence_logs=logging.ERROR)
            self.client = Client(self.cluster)
            self.n_workers = n
            self.description = f"local cluster ({n} worker processes x {self.threads} thread)"
        for path in self.upload:
            self.client.upload_file(path)
        if self.address:
            self.advice = worker_advice(self.client.run(_worker_settings))
        if self.dashboard and self.cluster is not None:
            self.advice = list(self.advice) + [f"dask dashboard at {self.cluster.dashboard_link}"]

    def prepare(self, func: Callable, *args) -> list:
        """Run ``func(*args)`` once on every worker, all at once, before any frame is submitted.

        Uses ``Client.run`` (outside dask's task scheduling): the call runs in
        each worker process directly, so a worker that dies while preparing
        gives an error entry instead of a task waiting for it (a task bound
        to a dead worker's address would wait for ever). Workers that join
        the cluster later, or replace a dead one, are not prepared; their
        first frame pays instead.

        Parameters
        ----------
        func : callable
            Run as ``func(*args)``; must not raise for expected problems.

        Returns
        -------
        list
            One result per worker; a worker whose call failed gives a dict
            with ``errors`` naming the exception.
        """
        try:
            answers = self.client.run(func, *args, on_error="return")
        except Exception as exc:  # the cluster itself failed to answer
            return [{"pid": "?", "seconds": float("nan"), "errors": [f"{exc.__class__.__name__}: {exc}"]}]
        return [res if not isinstance(res, BaseException) else
                {"pid": addr, "seconds": float("nan"), "errors": [f"{res.__class__.__name__}: {res}"]}
                for addr, res in answers.items()]

    def map_unordered(self, func: Callable, items: Iterable[tuple]) -> Iterator[tuple]:
        from distributed import as_completed
        from distributed.scheduler import KilledWorker

        limit = self.max_in_flight or max(2, 4 * self.n_workers * self.threads)
        it = iter(items)
        keys = {}
        ac = as_completed()

        def submit_next() -> bool:
            try:
                key, args = next(it)
            except StopIteration:
                return False
            fut = self.client.submit(func, *args, pure=False)
            keys[fut.key] = key
            ac.add(fut)
            return True

        for _ in range(limit):
            if not submit_next():
                break
        for fut in ac:
            key = keys.pop(fut.key)
            try:
                res = fut.result()
            except KilledWorker as exc:
                res = WorkerDied(f"worker process died while processing the frame, twice ({exc.__class__.__name__})")
            except Exception as exc:
                res = exc
            fut.release()
            yield key, res
            submit_next()

    def close(self) -> None:
        if self.client is not None:
            try:
                self.client.close(timeout=10)
            except Exception:
                pass
        if self.cluster is not None:
            try:
                self.cluster.close(timeout=10)
            except Exception:
                pass
        self.client = self.cluster = None


def _worker_settings() -> dict:
    """Settings of this worker process that slow the kernels down (run on each worker)."""
    import dask

    from dask.utils import parse_timedelta

    return {"malloc_trim": os.environ.get("MALLOC_TRIM_THRESHOLD_"),
            "profile": bool(dask.config.get("distributed.worker.profile.enabled", False)),
            "tick_s": parse_timedelta(dask.config.get("distributed.admin.tick.interval", "20ms"))}


def worker_advice(settings: dict) -> list[str]:
    """One warning line per slowing setting found on the workers of a remote cluster.

    Parameters
    ----------
    settings : dict
        Worker address -> :func:`_worker_settings` of that worker.

    Returns
    -------
    list of str
        Empty when no worker has dask's ``MALLOC_TRIM_THRESHOLD_``, its
        statistical profiler on, or an event-loop tick under 0.25 s.
    """
    trim = sorted(a for a, s in settings.items() if s.get("malloc_trim"))
    prof = sorted(a for a, s in settings.items() if s.get("profile"))
    out = []
    if trim:
        out.append(f"{len(trim)} of {len(settings)} workers run with MALLOC_TRIM_THRESHOLD_ set (dask's nanny "
                   "default), which made the kernels 25-45 % slower on our test machine; see DEVELOPERS.md, "
                   "'Keeping workers fast'")
    if prof:
        out.append(f"{len(prof)} of {len(settings)} workers run dask's statistical profiler; "
                   "distributed.worker.profile.enabled: false saves its sampling (DEVELOPERS.md)")
    tick = sorted(a for a, s in settings.items() if s.get("tick_s", 1.0) < 0.25)
    if tick:
        out.append(f"{len(tick)} of {len(settings)} workers check their event loop more often than every "
                   "0.25 s (dask's default 20 ms preempts busy frame tasks); see DEVELOPERS.md")
    return out


def make_executor(execution: dict, upload=()) -> SerialExecutor | DaskExecutor:
    """Executor for a workflow's validated ``execution`` section."""
    sch = execution.get("scheduler", "local")
    if sch == "serial":
        return SerialExecutor()
    from .hpc import BATCH_SYSTEMS

    batch = (sch, dict(execution.get("jobqueue") or {})) if sch in BATCH_SYSTEMS else None
    return DaskExecutor(
        address=None if (sch == "local" or batch) else sch,
        dashboard=bool(execution.get("dashboard", False)),
        batch=batch,
        workers=execution.get("workers", "auto"),
        threads_per_worker=execution.get("threads_per_worker", 1),
        memory_limit=execution.get("memory_limit", "auto"),
        upload=upload,
        max_in_flight=execution.get("max_in_flight", 0),
        start_method=execution.get("start_method", "auto"),
    )


def in_dask_worker():
    """The dask worker running this code, or None outside a worker."""
    import sys

    if "distributed" not in sys.modules:
        return None
    try:
        from distributed import get_worker

        return get_worker()
    except (ImportError, ValueError):
        return None


def fan_out(func: Callable, items: list, threads: int = 0) -> list:
    """``[func(*args) for args in items]``, spread over the cluster or the local cores.

    The seam through which one frame task splits its work (tiles of a huge
    frame) over every worker instead of running it all on its own.

    Parameters
    ----------
    func : callable
        Pure, picklable (cloudpickle) and thread-safe.
    items : list of tuple
        Arguments of each call. Large arrays among them are sent to the
        workers once, by scatter.
    threads : int
        Outside a dask worker: threads of a local pool (0: one per core; 1:
        in this thread, one call after another). Inside a dask worker 1
        also keeps the calls in this thread; any other value submits them to
        the cluster.

    Returns
    -------
    list
        The results in the order of ``items``.

    Notes
    -----
    Inside a worker the calls become tasks of the cluster the frame task
    runs on: the frame task leaves the worker's thread pool while it waits
    (``distributed.worker_client``), so its own worker runs calls too, and
    the calls are submitted with a higher priority than the frames still
    queued, so that the frame that waits for them is finished first.
    Serial and local runs use a thread pool (most of scikit-image and
    scipy.ndimage releases the GIL).
    """
    items = [tuple(a) for a in items]
    if not items:
        return []
    worker = in_dask_worker()
    if threads == 1 or len(items) == 1:
        return [func(*a) for a in items]
    if worker is not None:
        from distributed import worker_client

        with worker_client() as client:
            shipped = [tuple(client.scatter(x, direct=True) if _is_large(x) else x for x in a) for a in items]
            futures = [client.submit(func, *a, pure=False, priority=100) for a in shipped]
            return client.gather(futures)
    from concurrent.futures import ThreadPoolExecutor

    n = threads if threads > 0 else (os.cpu_count() or 1)
    with ThreadPoolExecutor(max_workers=min(n, len(items))) as pool:
        return list(pool.map(lambda a: func(*a), items))


def _is_large(x) -> bool:
    return getattr(x, "nbytes", 0) > 1_000_000


def _no_hugepage_advice() -> bool:
    """Stop numpy advising transparent huge pages for its large arrays (see :func:`keep_freed_memory`).

    Returns whether the advice is off; the environment's ``NUMPY_MADVISE_HUGEPAGE``, when set, decides
    instead (numpy read it at import).
    """
    if "NUMPY_MADVISE_HUGEPAGE" in os.environ:
        return os.environ["NUMPY_MADVISE_HUGEPAGE"].strip() in ("0", "")
    try:
        from numpy._core.multiarray import _set_madvise_hugepage
    except ImportError:  # pragma: no cover - another numpy layout
        try:
            from numpy.core.multiarray import _set_madvise_hugepage
        except ImportError:
            return False
    _set_madvise_hugepage(False)
    return True


#: glibc mallopt parameters (malloc.h).
_M_TRIM_THRESHOLD, _M_MMAP_MAX = -1, -4
_HEAP_KEPT: list = []


def keep_freed_memory() -> bool:
    """Make this process reuse freed frame-sized arrays instead of mapping fresh pages (glibc only).

    glibc serves every allocation above its mmap threshold (at most 32 MiB:
    a 2048 x 2048 float64 array and anything larger) with a fresh ``mmap``
    and unmaps it when freed, so each frame-sized temporary is faulted in
    and zeroed again; numpy asks for transparent huge pages on such arrays,
    and where the kernel compacts memory to find them (``defrag: madvise``)
    the faults cost more than the arithmetic. Measured on an 8192 x 8192 px
    frame: flatten-background took 34 s of CPU, 22.5 s of it in the kernel;
    with this setting 12.6 s, 1.2 s in the kernel (0.19 s per megapixel,
    against 0.22 s on a 1024 px frame). Sets ``M_MMAP_MAX = 0`` (every
    allocation from the heap, freed chunks reused) and ``M_TRIM_THRESHOLD``
    to 1 GiB (free memory at the top of the heap is given back above that),
    so a worker keeps about its largest frame's working set between frames.
    Idempotent; does nothing where glibc's ``mallopt`` is missing.

    numpy's advice that its large arrays be backed by transparent huge pages
    (``madvise(MADV_HUGEPAGE)``, numpy's default on Linux) is turned off too,
    unless ``NUMPY_MADVISE_HUGEPAGE`` is set in the environment: the heap
    grows over a worker's first frames, and where the kernel compacts memory
    at the fault to find a huge page for an advised region (``defrag:
    madvise``, this machine's setting) a fault of the grown heap cost about
    80 us; in one array of the segment step 360-630 faults took 25-35 ms.
    Serial loop of the 2048 px benchmark frames, alternated: system CPU
    15-20 -> 4-5 ms per frame, all CPU 0.745-0.756 -> 0.722-0.724 s. The
    values computed are the same; where THP is on for every mapping
    (``enabled: always``) the advice changes nothing.

    Returns
    -------
    bool
        Whether the setting is in force in this process.
    """
    if _HEAP_KEPT:
        return _HEAP_KEPT[0]
    _no_hugepage_advice()
    ok = False
    try:
        import ctypes

        libc = ctypes.CDLL("libc.so.6")
        ok = bool(libc.mallopt(_M_MMAP_MAX, 0)) and bool(libc.mallopt(_M_TRIM_THRESHOLD, 1 << 30))
    except (OSError, AttributeError):
        ok = False
    _HEAP_KEPT.append(ok)
    return ok
