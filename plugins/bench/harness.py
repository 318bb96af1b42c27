"""Shared helpers of the speed and memory benchmarks (no hooks of its own).

- synthetic frames on disk: fields rendered by :mod:`grainhabit.plugins.synthetic.render` (the
  renderer of ``grainhabit bench accuracy``; invented data), written as TIFF
  with resolution tags by :func:`grainhabit.plugins.synthetic.demo.write_frame`, optionally
  multiplied by cheap variants (mirror/rotate, reflect-padded shifts) so many
  frames with different content hashes and outlines cost few renders;
- a workflow file for such a folder;
- :class:`RunClock`, which times the host's own phases of one
  :func:`grainhabit.runner.run` (listing, cluster start, staging, consolidation,
  summarise, results writing, cluster close) by wrapping the functions the
  runner looks up in its module namespace, and samples the CPU time of the
  worker processes; it changes no behaviour and restores everything on exit;
- :class:`TreeRssSampler`, a thread that sums the resident set size of a
  process and all its descendants (dask nannies and workers) every ~50 ms;
- the machine's load average, printed beside every figure because the
  numbers are only comparable between runs on an equally loaded machine.
"""

from __future__ import annotations

import contextlib
import math
import os
import resource
import threading
import time
from pathlib import Path

import numpy as np

from grainhabit.observe import RunObserver

#: Grains per megapixel of the benchmark fields (default): about 10 grains in
#: a 512 x 512 field, so the work per frame grows with its pixels.
DENSITY_PER_MPX = 40.0
PIXEL_SIZE_NM = 5.0
ECD_NM = 300.0

WORKFLOW_TEMPLATE = """\
# Benchmark workflow written by grainhabit bench (synthetic, invented frames).
version: 1
name: {name}
input:
  paths: ["{data}/**/*.tif"]
  sample: "{{parent}}"
output:
  results: {results}
execution:
  scheduler: {scheduler}
  workers: {workers}
  start_method: {start_method}
"""


def _check_positive(name: str, value, minimum=1) -> int:
    if not isinstance(value, (int, np.integer)) or value < minimum:
        raise ValueError(f"{name} must be an integer >= {minimum}, got {value!r}")
    return int(value)


def grains_for(size_px: int, density_per_mpx: float = DENSITY_PER_MPX) -> int:
    """Grains in a square field of ``size_px`` at a fixed density (at least 1).

    Parameters
    ----------
    size_px : int
        Field side (px).
    density_per_mpx : float
        Grains per 10^6 pixels.

    Returns
    -------
    int
        ``max(1, round(density * size_px**2 / 1e6))``.
    """
    _check_positive("size_px", size_px, 16)
    if not density_per_mpx > 0:
        raise ValueError(f"density_per_mpx must be > 0, got {density_per_mpx!r}")
    return max(1, int(round(density_per_mpx * size_px * size_px / 1e6)))


def render_frames(n: int, size_px: int, *, grains: int | None = None, seed: int = 0,
                  pixel_size_nm: float = PIXEL_SIZE_NM, ecd_nm: float = ECD_NM) -> list[np.ndarray]:
    """Render ``n`` distinct synthetic fields (bright SEM-like contrast, every habit).

    Parameters
    ----------
    n : int
        Number of fields (seeds ``seed .. seed + n - 1``).
    size_px : int
        Side of each square field (px).
    grains : int, optional
        Grains per field; default :func:`grains_for` ``(size_px)``.
    seed : int
    pixel_size_nm, ecd_nm : float
        Pixel size and median grain ECD (nm).

    Returns
    -------
    list of ndarray of uint16, shape (size_px, size_px)
    """
    from grainhabit.plugins.synthetic.render import HABITS, make_field, to_uint16

    _check_positive("n", n)
    g = grains_for(size_px) if grains is None else _check_positive("grains", grains)
    habits = {h: 1.0 for h in HABITS}
    return [to_uint16(make_field(g, (size_px, size_px), pixel_size_nm, habits, ecd_nm, seed=seed + i).image)
            for i in range(n)]


def variant(image: np.ndarray, k: int) -> np.ndarray:
    """The ``k``-th cheap variant of a frame: same grains, other pixels.

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
    k : int
        ``k = 0`` is the frame itself; ``k % 8`` picks one of the 8 mirror
        and quarter-turn images of a square, ``k // 8`` shifts the frame by
        ``3 * (k // 8)`` px down and right with reflect padding (no seam in
        the background, unlike a wrap-around roll).

    Returns
    -------
    ndarray, same shape and dtype
    """
    if k < 0:
        raise ValueError(f"k must be >= 0, got {k!r}")
    a = np.asarray(image)
    d, s = k % 8, 3 * (k // 8)
    if a.shape[0] == a.shape[1]:
        a = np.rot90(a, d % 4)
        if d >= 4:
            a = a[:, ::-1]
    elif d:
        a = a[::-1, :] if d % 2 else a[:, ::-1]
        s += d // 2
    if s:
        r, c = a.shape
        s = min(s, r - 1, c - 1)
        a = np.pad(a, ((s, 0), (s, 0)), mode="reflect")[:r, :c]
    return np.ascontiguousarray(a)


def write_frames(folder: str | os.PathLike, images, n: int | None = None, *, start: int = 0,
                 pixel_size_nm: float = PIXEL_SIZE_NM, prefix: str = "field") -> list[Path]:
    """Write ``n`` frames as TIFF, cycling through ``images`` and their variants.

    Frame ``i`` is ``variant(images[i % m], i // m)`` with ``m = len(images)``,
    written as ``<folder>/<prefix>NNNN.tif`` with resolution tags (cm).

    Parameters
    ----------
    folder : path-like
        Created if missing; the folder name becomes the sample name.
    images : sequence of ndarray of uint16
    n : int, optional
        Frames to write (default ``len(images)``).
    start : int
        First frame number (lets several calls fill one folder).
    pixel_size_nm : float

    Returns
    -------
    list of Path
    """
    from grainhabit.plugins.synthetic.demo import write_frame

    images = list(images)
    if not images:
        raise ValueError("images is empty")
    n = len(images) if n is None else _check_positive("n", n)
    folder = Path(folder)
    out = []
    for i in range(start, start + n):
        img = variant(images[i % len(images)], i // len(images))
        path = folder / f"{prefix}{i:04d}.tif"
        write_frame(path, img, pixel_size_nm, "resolution")
        out.append(path)
    return out


def write_workflow(path: str | os.PathLike, data: str | os.PathLike, results: str | os.PathLike, *,
                   workers: int | str = "auto", scheduler: str = "local", name: str = "bench",
                   start_method: str = "auto") -> Path:
    """Write a workflow (default chain) over ``data/**/*.tif`` into ``results``."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(WORKFLOW_TEMPLATE.format(name=name, data=Path(data).resolve().as_posix(),
                                             results=Path(results).resolve().as_posix(),
                                             scheduler=scheduler, workers=workers, start_method=start_method))
    return path


def load_average() -> tuple[float, float, float]:
    """1, 5 and 15 minute load averages (as ``uptime`` prints them)."""
    try:
        return tuple(round(x, 2) for x in os.getloadavg())
    except OSError:
        return (float("nan"),) * 3


def load_text(load=None) -> str:
    """``"load 1.23/1.10/0.90 on 2 cores"``."""
    la = load_average() if load is None else load
    return f"load {la[0]:.2f}/{la[1]:.2f}/{la[2]:.2f} on {os.cpu_count()} cores"


def staged_records(results: str | os.PathLike) -> list[dict]:
    """Frame records (with ``timings``) of every frame staged beside ``results``."""
    from grainhabit.staging import read_staged, staging_dir

    return [read_staged(p)["record"] for p in sorted(staging_dir(results).glob("*.npz"))]


def _tree(proc):
    import psutil

    try:
        return [proc] + proc.children(recursive=True)
    except psutil.Error:
        return []


def descendants_cpu(pid: int | None = None) -> dict[int, tuple[float, float]]:
    """(user, system) CPU seconds of every descendant process of ``pid`` (default: this one)."""
    import psutil

    out = {}
    try:
        kids = psutil.Process(pid).children(recursive=True)
    except psutil.Error:
        return out
    for p in kids:
        try:
            t = p.cpu_times()
            out[p.pid] = (t.user, t.system)
        except psutil.Error:
            pass
    return out


def _own_cpu() -> tuple[float, float]:
    r = resource.getrusage(resource.RUSAGE_SELF)
    return r.ru_utime, r.ru_stime


def _reaped_cpu() -> tuple[float, float]:
    """(user, system) CPU seconds of this process's children that have ended and been waited for."""
    r = resource.getrusage(resource.RUSAGE_CHILDREN)
    return r.ru_utime, r.ru_stime


class _TimedExecutor:
    """Wraps an executor: times start/close, first/last result, CPU of its processes."""

    def __init__(self, inner, clock: "RunClock"):
        self.inner, self.clock = inner, clock

    def __getattr__(self, name):
        return getattr(self.inner, name)

    def start(self):
        t0 = time.perf_counter()
        self.inner.start()
        c = self.clock
        c.add("cluster_start", time.perf_counter() - t0)
        c.marks["processing_start"] = time.perf_counter()
        c.marks["processing_start_wall"] = time.time()
        c.workers = int(getattr(self.inner, "n_workers", 0) or 0)
        c._cpu0 = (descendants_cpu(), _own_cpu(), _reaped_cpu())

    def prepare(self, func, *args):
        t0 = time.perf_counter()
        try:
            return self.inner.prepare(func, *args)
        finally:
            c = self.clock
            c.add("worker_prepare", time.perf_counter() - t0)
            # the frames' span, and the CPU beside it, start once the workers are ready
            c.marks["processing_start"] = time.perf_counter()
            c.marks["processing_start_wall"] = time.time()
            c._cpu0 = (descendants_cpu(), _own_cpu(), _reaped_cpu())

    def map_unordered(self, func, items):
        for key, res in self.inner.map_unordered(func, items):
            now = time.perf_counter()
            m = self.clock.marks
            if "first_result" not in m:
                m["first_result"] = now
                rec = res.get("record", {}) if isinstance(res, dict) else {}
                m["first_task_seconds"] = float(rec.get("seconds", float("nan")))
            m["last_result"] = now
            yield key, res

    def close(self):
        c = self.clock
        c.marks["processing_end"] = time.perf_counter()
        c.marks["processing_end_wall"] = time.time()
        if c._cpu0 is not None:
            kids0, own0, reaped0 = c._cpu0
            kids1 = descendants_cpu()
            user = sum(u - kids0.get(pid, (0.0, 0.0))[0] for pid, (u, _) in kids1.items())
            system = sum(v - kids0.get(pid, (0.0, 0.0))[1] for pid, (_, v) in kids1.items())
            # children that ended meanwhile (the run's early-frame process, grainhabit.early): their whole CPU,
            # that before the clock started too (it processed frames, which the run's CPU per frame holds)
            reaped1 = _reaped_cpu()
            user += reaped1[0] - reaped0[0]
            system += reaped1[1] - reaped0[1]
            own1 = _own_cpu()
            c.cpu.update(workers=user + system, workers_system=system,
                         main=own1[0] + own1[1] - own0[0] - own0[1], main_system=own1[1] - own0[1])
        t0 = time.perf_counter()
        self.inner.close()
        c.add("cluster_close", time.perf_counter() - t0)


class RunClock(RunObserver):
    """Times the host's phases of :func:`grainhabit.runner.run` (a run observer).

    Pass it as ``run(..., observer=clock)``; it uses only the documented
    seam :class:`grainhabit.observe.RunObserver` (phases and the executor).

    Attributes
    ----------
    seconds : dict of str -> float
        ``list``, ``cluster_start``, ``worker_prepare`` (the executor's
        ``prepare`` of every worker: plugin imports and tables), ``stage_write`` (staging each result in
        the main process, overlapped with the workers), ``consolidate``
        (reading the staged frames and building the datasets),
        ``summarise``, ``results_write``, ``report``, ``cluster_close``.
    marks : dict of str -> float
        ``perf_counter`` stamps ``processing_start`` (cluster up and its
        workers prepared),
        ``first_result``, ``last_result``, ``processing_end``, wall-clock
        twins ``*_wall``, and ``first_task_seconds`` (the task time of the
        first result).
    cpu : dict of str -> float
        CPU seconds (user + system) from the workers being prepared to the
        cluster's close:
        ``workers`` (all descendant processes: nannies and workers) and
        ``main``; ``workers_system`` and ``main_system`` the system part.
    workers : int
        Workers the executor reported.
    """

    def __init__(self):
        self.seconds: dict[str, float] = {}
        self.marks: dict[str, float] = {}
        self.cpu: dict[str, float] = {}
        self.workers = 0
        self._cpu0 = None

    def add(self, phase: str, dt: float) -> None:
        self.seconds[phase] = self.seconds.get(phase, 0.0) + dt

    @contextlib.contextmanager
    def phase(self, name: str):
        t0 = time.perf_counter()
        try:
            yield
        finally:
            self.add(name, time.perf_counter() - t0)

    def executor(self, executor):
        return _TimedExecutor(executor, self)

    @property
    def warmup_seconds(self) -> float:
        """Latency of the first result beyond its own task time (NaN if no frame ran).

        The workers are prepared before the first frame (imports, plugin
        host and tables: ``worker_prepare``), so this is mostly one dispatch
        and one result transfer, plus whatever a plugin still does on its
        first call.
        """
        m = self.marks
        if "first_result" not in m:
            return float("nan")
        return m["first_result"] - m["processing_start"] - m["first_task_seconds"]

    @property
    def processing_seconds(self) -> float:
        """From the cluster being up to the last frame staged (NaN if no frame ran)."""
        m = self.marks
        if "processing_start" not in m or "processing_end" not in m:
            return float("nan")
        return m["processing_end"] - m["processing_start"]


class TreeRssSampler:
    """Peak summed RSS of a process and all its descendants, sampled in a thread.

    Parameters
    ----------
    pid : int, optional
        Root process (default: this process).
    interval : float
        Seconds between samples (default 0.05).

    Attributes
    ----------
    peak : int
        Largest sum of RSS over the tree (bytes).
    peak_root : int
        Largest RSS of the root process alone (bytes).
    peak_processes : int
        Processes in the tree at the moment of ``peak``.
    peak_by_pid : dict of int -> int
        Largest RSS sampled of every process of the tree (bytes).
    samples : list of (float, int, int)
        (``time.time()``, tree RSS, root RSS) of every sample.

    Notes
    -----
    RSS counts shared pages (libraries, copy-on-write) once per process, so
    the sum over-states the physical memory a little; it is what a facility
    must budget for if the pages are not actually shared. Short spikes
    between two samples are missed.
    """

    def __init__(self, pid: int | None = None, interval: float = 0.05):
        import psutil

        self.root = psutil.Process(pid)
        self.interval = float(interval)
        self.peak = self.peak_root = self.peak_processes = 0
        self.peak_by_pid: dict[int, int] = {}
        self.samples: list[tuple[float, int, int]] = []
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._loop, name="rss-sampler", daemon=True)

    def sample(self) -> int:
        """Take one sample now; return the tree RSS (bytes)."""
        import psutil

        total = root = 0
        procs = _tree(self.root)
        for p in procs:
            try:
                rss = p.memory_info().rss
            except psutil.Error:
                continue
            total += rss
            if rss > self.peak_by_pid.get(p.pid, 0):
                self.peak_by_pid[p.pid] = rss
            if p.pid == self.root.pid:
                root = rss
        self.samples.append((time.time(), total, root))
        if total > self.peak:
            self.peak, self.peak_processes = total, len(procs)
        self.peak_root = max(self.peak_root, root)
        return total

    def _loop(self) -> None:
        while not self._stop.is_set():
            self.sample()
            self._stop.wait(self.interval)

    def __enter__(self) -> "TreeRssSampler":
        self._thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self._stop.set()
        self._thread.join()

    def peak_between(self, t0: float, t1: float) -> int:
        """Largest tree RSS sampled with ``t0 <= time.time() <= t1`` (0 if none)."""
        return max((s[1] for s in self.samples if t0 <= s[0] <= t1), default=0)


@contextlib.contextmanager
def environment_variable(name: str, value: str):
    """Set the environment variable ``name`` to ``value`` inside the block, as it was after it."""
    old = os.environ.get(name)
    os.environ[name] = value
    try:
        yield
    finally:
        if old is None:
            os.environ.pop(name, None)
        else:
            os.environ[name] = old


@contextlib.contextmanager
def worker_malloc_trim(value: int | None):
    """Give local workers started inside the block ``MALLOC_TRIM_THRESHOLD_=value``.

    The local cluster passes on a ``MALLOC_TRIM_THRESHOLD_`` found in the
    environment (see :mod:`grainhabit.executors`); ``None`` leaves the
    environment as it is (glibc's own thresholds). ``65536`` reproduces
    dask's default.
    """
    if value is None:
        yield
        return
    with environment_variable("MALLOC_TRIM_THRESHOLD_", str(int(value))):
        yield


def without_early_frames():
    """Runs inside the block process every frame on their cluster (``GRAINHABIT_EARLY_FRAME=0``, see
    :mod:`grainhabit.early`): one worker is then one process, as the serial loop it is compared with."""
    return environment_variable("GRAINHABIT_EARLY_FRAME", "0")


def mib(nbytes: float) -> float:
    """Bytes to MiB."""
    return nbytes / 2 ** 20 if nbytes == nbytes else float("nan")


def ratio(a: float, b: float) -> float:
    """``a / b``, NaN when ``b`` is 0 or NaN."""
    return a / b if (b and b == b and not math.isinf(b)) else float("nan")


def write_figures(path: str | os.PathLike | None, figures: dict, out=None) -> None:
    """Write a benchmark's figures as JSON to ``path`` (folders made as needed); nothing if ``path`` is None.

    Numbers numpy cannot give JSON directly are written as floats; with
    ``out``, a line says where the figures went.
    """
    if not path:
        return
    import json

    Path(path).parent.mkdir(parents=True, exist_ok=True)
    Path(path).write_text(json.dumps(figures, indent=2, default=float))
    if out is not None:
        print(f"figures written to {path}", file=out)

