"""Frames larger than a worker's memory: the whole chain, tile by tile.

A frame task first estimates the frame's working memory from its declared
shape (:func:`estimate_bytes`: :data:`BYTES_PER_PIXEL` per pixel, measured on
the default chain). Where that exceeds the frame budget
(:func:`frame_budget`: ``execution.frame_memory``, else the dask worker's
memory limit), the frame is not read whole. Instead:

1. The reader opens the frame for region reads (hook
   ``grainhabit_open_regions``; the TIFF reader reads a region through a
   memory map or tifffile's zarr store, never the whole frame).
2. Levels pass: every step that has frame-wide quantities (the background's
   level and noise, the polarity, the thresholds) computes them once, from
   a stream of regions and a regular sample of the frame (hook
   ``grainhabit_tile_levels``); a step's answer may carry a ``preview`` of
   its output on a regular grid, which the next step's estimate uses.
3. Tile pass: the frame is cut into square cores with a halo of
   :data:`HALO_PX` px; each tile (core + halo) is read from the file, a
   :class:`~grainhabit.frame.FrameData` of the tile goes through every step
   with the frame's levels in ``meta["tile_levels"]`` (its place in the
   frame in ``meta["tile_window"]``), and the tiles are spread over the
   cluster's workers (:func:`grainhabit.executors.fan_out`).
4. Ownership: a grain belongs to its *cluster* (the connected foreground
   component it was split from; ``meta["clusters"]`` of the segment step,
   else the 8-connected components of the labels). A tile keeps the grains
   of its *safe* clusters (bounding box at least :data:`MARGIN_PX` px from
   every inner edge of the tile) whose first pixel (row-major) lies in its
   core; cores partition the frame, so no grain is kept twice. Every other
   cluster that reaches into a core is processed again in a window of its
   own, grown until the cluster is safe in it (as
   :mod:`grainhabit.plugins.segment.tiling` does for the labels alone).
5. Stitching: the kept grain rows are ordered by their first pixel
   (the raster order an untiled run numbers labels in) and numbered 1..n;
   positions (``centroid_x_nm``, ``centroid_y_nm``, outlines) are moved
   from tile to frame coordinates.

The result equals the untiled one when every step is *local* beyond its
frame-wide levels: what it makes of a cluster depends only on pixels within
:data:`MARGIN_PX` of it. The built-in steps are (tested on a frame run both
ways). A frame that cannot be processed this way either (its reader cannot
read regions, or even the smallest tile exceeds the budget) fails with a
one-line error, and the run goes on.
"""

from __future__ import annotations

import math
import os
import time
from dataclasses import dataclass, field

import numpy as np

from .frame import FrameData, FrameRef

#: Peak working memory of the default chain per pixel of a frame processed whole (bytes): 3.1 GiB for an
#: 8192 x 8192 px frame (``grainhabit bench memory --huge 8192``, largest worker, before chain tiling).
BYTES_PER_PIXEL = 48
#: What a worker process holds besides its frame (interpreter, numpy, scipy, scikit-image, dask): about
#: 0.3-0.4 GiB on the development machine (RSS of an idle, prepared worker).
BASE_BYTES = 400 * 2**20
#: Share of a worker's memory limit a frame may plan to use. dask pauses a worker at 80 % and restarts it at
#: 95 %; with 0.75 a worker of 1 GiB peaked at 886 MiB (87 %) on the tiles of an 8192 px frame (the tile's
#: working set, estimated at 363 MiB, ran about 120 MiB over), so the plan keeps below 60 %.
USABLE_SHARE = 0.6
#: Halo added on every side of a tile core (px); a cluster at least MARGIN_PX from every inner tile edge
#: is processed exactly as in the whole frame.
HALO_PX = 128
MARGIN_PX = 64
#: Smallest tile core (px): below it the halo would dominate the work.
MIN_CORE_PX = 256
#: Cores are multiples of this (even rows: row pairs of the noise estimate stay in one core).
CORE_STEP_PX = 64


class FrameTooLarge(ValueError):
    """A frame that neither fits the budget whole nor can be processed by tiles."""


def estimate_bytes(shape: tuple, dtype: str = "") -> int:
    """Working memory of the chain on a whole frame, from its declared shape and dtype.

    Parameters
    ----------
    shape : tuple of int
        ``(rows, cols)`` or ``(rows, cols, samples)``.
    dtype : str
        Stored dtype name (its item size is added per stored value).

    Returns
    -------
    int
        Bytes: ``rows * cols * BYTES_PER_PIXEL`` plus the stored pixels.
    """
    if len(shape) < 2:
        return 0
    rows, cols = int(shape[0]), int(shape[1])
    samples = int(shape[2]) if len(shape) > 2 else 1
    try:
        item = np.dtype(dtype).itemsize if dtype else 2
    except TypeError:
        item = 2
    return rows * cols * (BYTES_PER_PIXEL + samples * item)


def worker_memory_limit() -> int:
    """Memory limit (bytes) of the dask worker running this code; 0 outside a worker or without a limit."""
    from .executors import in_dask_worker

    worker = in_dask_worker()
    if worker is None:
        return 0
    mm = getattr(worker, "memory_manager", None)
    limit = getattr(mm, "memory_limit", None) if mm is not None else getattr(worker, "memory_limit", None)
    return int(limit or 0)


def tile_budget(ref, frame_memory) -> int:
    """The frame budget (bytes) where a frame must be processed by tiles, else 0.

    ``ref`` is a :class:`~grainhabit.frame.FrameRef` (its declared shape and dtype), ``frame_memory``
    a job's ``frame_memory`` (see :func:`frame_budget`); the frame goes by tiles when its
    :func:`estimate_bytes` exceed a budget that is set.
    """
    budget = frame_budget(frame_memory)
    return budget if budget and estimate_bytes(ref.shape, ref.dtype) > budget else 0


def frame_budget(frame_memory: int = 0) -> int:
    """Bytes one frame task may plan to use; 0 means no limit.

    Parameters
    ----------
    frame_memory : int
        ``execution.frame_memory`` in bytes (0: ``auto``).

    Returns
    -------
    int
        ``frame_memory`` if set; else :data:`USABLE_SHARE` of the dask
        worker's memory limit less :data:`BASE_BYTES`, shared by the
        worker's threads (at least 1 byte where a limit is set); 0 in a
        serial run or a worker without a limit.
    """
    if frame_memory:
        return int(frame_memory)
    limit = worker_memory_limit()
    if not limit:
        return 0
    return max(1, (int(USABLE_SHARE * limit) - BASE_BYTES) // worker_threads())


def worker_threads() -> int:
    """Threads of the dask worker running this code (tasks it may run at once); 1 outside a worker."""
    from .executors import in_dask_worker

    worker = in_dask_worker()
    state = getattr(worker, "state", None)
    return max(1, int(getattr(state, "nthreads", None) or getattr(worker, "nthreads", 1) or 1)) if worker else 1


def plan_core(shape: tuple, budget: int, halo: int = HALO_PX) -> int:
    """Core side (px) of the tiles for a frame, the largest whose tile fits the budget.

    Parameters
    ----------
    shape : tuple of int
        (rows, cols) of the frame.
    budget : int
        Bytes a frame task may use (:func:`frame_budget`).
    halo : int
        Halo in px.

    Returns
    -------
    int
        A multiple of :data:`CORE_STEP_PX`, at least :data:`MIN_CORE_PX`.

    Raises
    ------
    FrameTooLarge
        If a tile of the smallest core does not fit the budget.
    """
    side = int(math.isqrt(max(budget, 0) // BYTES_PER_PIXEL)) - 2 * halo
    core = (side // CORE_STEP_PX) * CORE_STEP_PX
    if core < MIN_CORE_PX:
        need = (MIN_CORE_PX + 2 * halo) ** 2 * BYTES_PER_PIXEL
        raise FrameTooLarge(f"frame of {shape[1]} x {shape[0]} px: even a tile of {MIN_CORE_PX} px needs about "
                            f"{need / 2**20:.0f} MiB, over the frame budget of {budget / 2**20:.0f} MiB "
                            "(raise execution.frame_memory or execution.memory_limit)")
    return min(core, max(CORE_STEP_PX, -(-max(shape[:2]) // CORE_STEP_PX) * CORE_STEP_PX))


def grid(shape: tuple, core: int, halo: int) -> list[tuple[tuple, tuple]]:
    """Cores (partitioning the frame) and windows (core + halo, clipped), as (row slice, col slice) pairs."""
    rows, cols = int(shape[0]), int(shape[1])
    out = []
    for r0 in range(0, rows, core):
        for c0 in range(0, cols, core):
            c = (slice(r0, min(r0 + core, rows)), slice(c0, min(c0 + core, cols)))
            w = (slice(max(r0 - halo, 0), min(r0 + core + halo, rows)),
                 slice(max(c0 - halo, 0), min(c0 + core + halo, cols)))
            out.append((c, w))
    return out


@dataclass
class FrameSample:
    """What a step sees of a frame in the levels pass (see ``grainhabit_tile_levels``).

    Attributes
    ----------
    shape : tuple of int
        (rows, cols) of the whole frame.
    pixel_size_nm : float
    source : RegionSource
        The opened frame.
    core_px : int
        Core side of :meth:`regions` (px).
    preview : ndarray or None
        The previous step's output at every ``preview_step``-th row and
        column of the frame (None before any step gave one).
    preview_step : int
    levels : dict
        The answers of the earlier steps, by step name.
    """

    shape: tuple
    pixel_size_nm: float
    source: object
    core_px: int
    preview: np.ndarray | None = None
    preview_step: int = 1
    levels: dict = field(default_factory=dict)

    def regions(self, halo: int = 0):
        """Yield ``(core, window, raw)`` over the frame: cores partition it, windows add ``halo`` px.

        Cores are multiples of :data:`CORE_STEP_PX` (they start on even
        rows); ``raw`` is float32, read from the file region by region.
        """
        for core, window in grid(self.shape, self.core_px, int(halo)):
            yield core, window, self.source.read(window)


@dataclass(frozen=True)
class TileContext:
    """What a tile task needs (picklable)."""

    job: object
    source: object
    sample: str
    frame_source: str
    pixel_size_nm: float
    calibration: str
    levels: dict
    shape: tuple


def _host_for(job):
    from .manager import worker_host

    return worker_host(tuple(job.plugins))


def run_window(ctx: TileContext, window: tuple) -> FrameData:
    """Read one window of the frame and run every per-frame step on it (with the frame's levels)."""
    raw = ctx.source.read(window)
    frame = FrameData(source=ctx.frame_source, sample=ctx.sample, raw=raw, pixel_size_nm=ctx.pixel_size_nm,
                      calibration=ctx.calibration,
                      meta={"tile_levels": ctx.levels, "tile_window": window, "frame_shape": ctx.shape})
    host = _host_for(ctx.job)
    for name, _stage, params in ctx.job.steps:
        try:
            out = host.call_step(name, frame=frame, params=params)
        except Exception as exc:
            raise StepFailed(name, exc) from exc
        if not isinstance(out, FrameData):
            raise StepFailed(name, TypeError(f"returned {type(out).__name__}, expected FrameData"))
        frame = out
    if frame.labels is None:
        raise StepFailed("tiles", ValueError("a frame processed by tiles needs a segment step (no labels)"))
    return frame


class StepFailed(Exception):
    """A step failed on a tile; ``step`` names it."""

    def __init__(self, step: str, exc: BaseException):
        super().__init__(f"{exc.__class__.__name__}: {exc}")
        self.step = step


def _clusters(frame: FrameData) -> np.ndarray:
    from scipy import ndimage as ndi

    clu = frame.meta.get("clusters")
    if clu is not None and np.shape(clu) == np.shape(frame.labels):
        return np.asarray(clu)
    lab, _ = ndi.label(np.asarray(frame.labels) > 0, structure=np.ones((3, 3), bool))
    return lab


def first_pixels(labels: np.ndarray, n: int | None = None, boxes: list | None = None) -> np.ndarray:
    """Row-major index of the first pixel of every label 1..n (-1 for an absent label).

    Parameters
    ----------
    labels : ndarray of int, shape (rows, cols)
        0 background, positive ids.
    n : int, optional
        Largest id (default ``labels.max()``).
    boxes : list of tuple of slice, optional
        ``scipy.ndimage.find_objects(labels, max_label=n)`` where the caller already has it (the pass
        over the frame is then skipped).

    Returns
    -------
    ndarray of int64, shape (n,)

    Notes
    -----
    The first pixel lies in the top row of the label's bounding box
    (:func:`scipy.ndimage.find_objects`, one pass over the frame); only that
    row of the box is searched, so the cost grows with the pixels and the
    labels' widths, not with pixels times labels (``np.unique`` with
    ``return_index`` sorts every pixel).
    """
    from scipy import ndimage as ndi

    lab = np.asarray(labels)
    n = int(lab.max()) if n is None and lab.size else int(n or 0)
    out = np.full(n, -1, np.int64)
    if n == 0:
        return out
    cols = lab.shape[1]
    for k, box in enumerate(ndi.find_objects(lab, max_label=n) if boxes is None else boxes[:n], start=1):
        if box is None:
            continue
        r, c = box[0].start, box[1]
        row = lab[r, c]
        out[k - 1] = r * cols + c.start + int(np.argmax(row == k))
    return out


def box_is_safe(box, shape: tuple, window: tuple, frame_shape: tuple, margin: int) -> bool:
    """Whether a bounding box (window coordinates) lies at least ``margin`` px from every inner edge.

    Parameters
    ----------
    box : tuple of slice
        From :func:`scipy.ndimage.find_objects`, in window coordinates.
    shape : tuple of int
        The window's shape.
    window : tuple of slice
        The window in frame coordinates (an edge on the frame's border is no inner edge).
    frame_shape : tuple of int
    margin : int
    """
    return ((window[0].start == 0 or box[0].start >= margin)
            and (window[0].stop == frame_shape[0] or shape[0] - box[0].stop >= margin)
            and (window[1].start == 0 or box[1].start >= margin)
            and (window[1].stop == frame_shape[1] or shape[1] - box[1].stop >= margin))


def owned_clusters(clusters: np.ndarray, window: tuple, core: tuple, frame_shape: tuple,
                   margin: int) -> tuple[np.ndarray, np.ndarray]:
    """Which clusters of a tile the tile keeps, and the core pixels of those it cannot settle.

    Parameters
    ----------
    clusters : ndarray of int, shape of the window
        Cluster ids 1..n of the window (0 background).
    window, core : tuple of slice
        The window processed and the core it owns, in frame coordinates.
    frame_shape : tuple of int
    margin : int
        A cluster is safe when its bounding box lies at least this far from every inner edge.

    Returns
    -------
    keep : ndarray of bool, shape (n + 1,)
        Safe clusters whose first pixel (row-major) lies in the core.
    open_pixels : ndarray of int64
        Row-major frame indices of the core pixels of clusters that are not safe.
    """
    from scipy import ndimage as ndi

    shape = clusters.shape
    n_clu = int(clusters.max()) if clusters.size else 0
    boxes = ndi.find_objects(clusters, max_label=n_clu) if n_clu else []
    safe = np.array([b is not None and box_is_safe(b, shape, window, frame_shape, margin) for b in boxes], bool)
    first = first_pixels(clusters, n_clu)
    fr, fc = np.divmod(np.maximum(first, 0), shape[1])
    fr, fc = fr + window[0].start, fc + window[1].start
    in_core = ((first >= 0) & (fr >= core[0].start) & (fr < core[0].stop)
               & (fc >= core[1].start) & (fc < core[1].stop))
    keep = np.zeros(n_clu + 1, bool)
    keep[1:] = safe & in_core
    unsafe = np.zeros(n_clu + 1, bool)
    unsafe[1:] = ~safe & (first >= 0)
    cr = slice(core[0].start - window[0].start, core[0].stop - window[0].start)
    cc = slice(core[1].start - window[1].start, core[1].stop - window[1].start)
    rr, ccol = np.nonzero(unsafe[clusters[cr, cc]])
    open_pixels = (rr + core[0].start).astype(np.int64) * frame_shape[1] + ccol + core[1].start
    return keep, open_pixels


def _grain_rows(frame: FrameData, keep_cluster: np.ndarray, clusters: np.ndarray, window: tuple,
                frame_shape: tuple) -> dict:
    """The grain rows of the kept clusters, in frame coordinates, with their first pixels."""
    labels = np.asarray(frame.labels)
    n_lab = int(labels.max()) if labels.size else 0
    first = first_pixels(labels, n_lab)
    lab_col = np.asarray(frame.grains.get("label", np.arange(1, n_lab + 1)), np.int64)
    f = first[lab_col - 1] if len(lab_col) else np.zeros(0, np.int64)
    fr, fc = np.divmod(np.maximum(f, 0), labels.shape[1])
    cid = clusters[fr, fc] if len(f) else np.zeros(0, np.int64)
    rows = np.flatnonzero((f >= 0) & keep_cluster[cid]) if len(f) else np.zeros(0, np.int64)
    px = float(frame.pixel_size_nm)
    dy, dx = window[0].start * px, window[1].start * px
    cols = {}
    for k, v in frame.grains.items():
        v = np.asarray(v)[rows]
        if k == "centroid_x_nm":
            v = v + dx
        elif k == "centroid_y_nm":
            v = v + dy
        cols[k] = v
    outlines = []
    if frame.outlines and len(frame.outlines) == len(lab_col):
        outlines = [np.asarray(frame.outlines[i], np.float64).reshape(-1, 2) + (dx, dy) for i in rows]
    gfirst = (fr[rows] + window[0].start) * frame_shape[1] + fc[rows] + window[1].start
    return {"columns": cols, "outlines": outlines, "first": gfirst.astype(np.int64), "cluster": cid[rows]}


def run_tile(ctx: TileContext, core: tuple, window: tuple) -> dict:
    """One tile: the chain on core + halo; the grains of the safe clusters starting in the core.

    Returns
    -------
    dict
        ``columns``, ``outlines``, ``first`` (frame index of each kept
        grain's first pixel), ``open`` (frame indices of the core pixels of
        clusters that are not safe in the tile), ``notes``, ``polarity``;
        or ``error`` (step, message) if a step failed.
    """
    try:
        frame = run_window(ctx, window)
    except StepFailed as exc:
        return {"error": (exc.step, str(exc))}
    clusters = _clusters(frame)
    keep, open_px = owned_clusters(clusters, window, core, ctx.shape, MARGIN_PX)
    out = _grain_rows(frame, keep, clusters, window, ctx.shape)
    out.update(open=open_px, notes=tuple(frame.notes), polarity=frame.polarity)
    return out


def resolve_open(ctx: TileContext, pending: np.ndarray, kept_first: set, budget: int) -> tuple[list, int, list]:
    """Process the clusters that were open in their tiles, each in a window where it is safe.

    Parameters
    ----------
    ctx : TileContext
    pending : ndarray of int64
        Frame indices of core pixels of open clusters.
    kept_first : set of int
        First pixels of grains kept already (updated).
    budget : int
        Bytes a window may use.

    Returns
    -------
    parts : list of dict
        Grain rows as :func:`run_tile` gives them.
    unresolved : int
        Open pixels whose cluster was not found again (a step that is not local).
    notes : list of str
    """
    from scipy import ndimage as ndi

    rows_f, cols_f = ctx.shape
    pending = np.unique(pending)
    parts, notes, unresolved = [], [], 0
    while pending.size:
        q = int(pending[0])
        qr, qc = divmod(q, cols_f)
        box = [qr, qr + 1, qc, qc + 1]
        found = None
        while True:
            win = (slice(max(box[0] - HALO_PX, 0), min(box[1] + HALO_PX, rows_f)),
                   slice(max(box[2] - HALO_PX, 0), min(box[3] + HALO_PX, cols_f)))
            area = (win[0].stop - win[0].start) * (win[1].stop - win[1].start)
            if budget and area * BYTES_PER_PIXEL > budget:
                raise FrameTooLarge(f"a cluster of touching grains near x = {qc}, y = {qr} px spans more than a "
                                    f"tile of the frame budget ({budget / 2**20:.0f} MiB) can hold")
            try:
                frame = run_window(ctx, win)
            except StepFailed as exc:
                raise exc
            clusters = _clusters(frame)
            cid = int(clusters[qr - win[0].start, qc - win[1].start])
            if cid == 0:
                break
            cbox = ndi.find_objects((clusters == cid).astype(np.uint8))[0]
            if box_is_safe(cbox, clusters.shape, win, ctx.shape, MARGIN_PX):
                found = (frame, clusters, cid, win)
                break
            box = [min(box[0], cbox[0].start + win[0].start), max(box[1], cbox[0].stop + win[0].start),
                   min(box[2], cbox[1].start + win[1].start), max(box[3], cbox[1].stop + win[1].start)]
        if found is None:
            unresolved += 1
            pending = pending[1:]
            continue
        frame, clusters, cid, win = found
        rr, cc = np.nonzero(clusters == cid)
        members = (rr + win[0].start).astype(np.int64) * cols_f + cc + win[1].start
        pending = pending[~np.isin(pending, members)]
        keep = np.zeros(int(clusters.max()) + 1, bool)
        keep[cid] = True
        part = _grain_rows(frame, keep, clusters, win, ctx.shape)
        new = np.array([int(x) not in kept_first for x in part["first"]], bool)
        if new.any():
            kept_first.update(int(x) for x in part["first"][new])
            part = _select(part, np.flatnonzero(new))
            parts.append(part)
            notes.extend(frame.notes)
    return parts, unresolved, notes


def _select(part: dict, idx: np.ndarray) -> dict:
    return {"columns": {k: np.asarray(v)[idx] for k, v in part["columns"].items()},
            "outlines": [part["outlines"][i] for i in idx] if part["outlines"] else [],
            "first": part["first"][idx], "cluster": part["cluster"][idx]}


def stitch(parts: list) -> tuple[dict, list]:
    """Grain rows of every part, ordered by first pixel and numbered 1..n.

    Returns
    -------
    columns : dict of str -> ndarray
    outlines : list of ndarray, shape (k, 2)
    """
    parts = [p for p in parts if len(p["first"])]
    if not parts:
        return {}, []
    first = np.concatenate([p["first"] for p in parts])
    order = np.argsort(first, kind="stable")
    names = list(parts[0]["columns"])
    cols = {}
    for k in names:
        vals = [np.asarray(p["columns"][k]) for p in parts]
        cols[k] = np.concatenate(vals)[order]
    cols["label"] = np.arange(1, len(order) + 1, dtype=np.int64)
    outlines = []
    if all(len(p["outlines"]) == len(p["first"]) for p in parts):
        flat = [o for p in parts for o in p["outlines"]]
        outlines = [flat[i] for i in order]
    return cols, outlines


def thumbnail_of(source, shape: tuple, side: int = 256) -> tuple[np.ndarray, float]:
    """The frame's thumbnail (as :func:`grainhabit.task.thumbnail`), read in strips of rows."""
    rows, cols = int(shape[0]), int(shape[1])
    f = max(1, math.ceil(max(rows, cols) / side))
    r, c = (rows // f) * f, (cols // f) * f
    if r == 0 or c == 0:
        from .task import thumbnail

        return thumbnail(source.read((slice(0, rows), slice(0, cols))), side)
    strip = max(f, (4_000_000 // max(cols, 1)) // f * f)
    small = np.zeros((r // f, c // f), np.float64)
    for r0 in range(0, r, strip):
        r1 = min(r0 + strip, r)
        block = np.asarray(source.read((slice(r0, r1), slice(0, c))), np.float32)
        small[r0 // f:r1 // f] = block.reshape((r1 - r0) // f, f, c // f, f).mean(axis=(1, 3))
    finite = small[np.isfinite(small)]
    lo, hi = (np.percentile(finite, [0.5, 99.5]) if finite.size else (0.0, 1.0))
    scaled = np.clip((small - lo) / max(hi - lo, 1e-12), 0, 1)
    return (np.nan_to_num(scaled) * 255 + 0.5).astype(np.uint8), float(f)


def _unique_notes(notes, limit: int = 12) -> list[str]:
    out = []
    for n in notes:
        if "qc no-grains" in n or n in out:
            continue  # an empty tile is no empty frame: the host flags a frame without grains itself
        out.append(n)
    if len(out) > limit:
        out = out[:limit] + [f"tiles: {len(out) - limit} more distinct tile notes left out"]
    return out


def process_tiled(ref: FrameRef, sample: str, job, host, budget: int, record: dict, result: dict) -> None:
    """Run the chain on a frame tile by tile; fill ``record`` and ``result`` as :func:`process_frame` does.

    Raises
    ------
    FrameTooLarge
        If the frame cannot be processed by tiles (its reader cannot read
        regions, or the budget holds no tile).
    StepFailed
        If a step failed (on the levels pass or a tile).
    """
    from .executors import fan_out

    timings = record["timings"]
    t0 = time.perf_counter()
    need = estimate_bytes(ref.shape, ref.dtype)
    src = host.first_answer("grainhabit_open_regions", ref=ref, options=job.input_options)
    if src is None:
        raise FrameTooLarge(f"{ref.source}: frame of {ref.shape[1]} x {ref.shape[0]} px needs about "
                            f"{need / 2**30:.1f} GiB, over the frame budget of {budget / 2**30:.2f} GiB, and its "
                            f"reader ({ref.reader or '?'}) cannot read it by regions")
    px, calibration = float(src.pixel_size_nm), src.calibration
    fallback = job.input_options.get("pixel_size_nm")
    notes = list(src.notes)
    if job.input_options.get("calibration") == "override" and calibration != "workflow":
        px, calibration = float(fallback), "workflow"
    if not (px and np.isfinite(px)):
        if fallback is None:
            raise ValueError(f"{ref.source}: the file carries no pixel size and input.pixel_size_nm is not set")
        px, calibration = float(fallback), "workflow"
    shape = tuple(int(x) for x in src.shape)
    core = plan_core(shape, budget)
    record.update(pixel_size_nm=px, calibration=calibration, rows=shape[0], cols=shape[1])
    result["thumb"], result["thumb_factor"] = thumbnail_of(src, shape)
    timings["read"] = time.perf_counter() - t0

    t0 = time.perf_counter()
    fs = FrameSample(shape=shape, pixel_size_nm=px, source=src, core_px=core)
    for name, _stage, params in job.steps:
        try:
            ans = host.first_answer("grainhabit_tile_levels", step=name, sample=fs, params=params)
        except Exception as exc:
            raise StepFailed(name, exc) from exc
        if ans is None:
            continue
        ans = dict(ans)
        if ans.get("preview") is not None:
            fs.preview, fs.preview_step = ans.pop("preview"), int(ans.pop("preview_step", 1))
        notes.extend(f"{name}: {n}" for n in ans.pop("notes", ()))
        fs.levels[name] = ans
    timings["levels"] = time.perf_counter() - t0

    t0 = time.perf_counter()
    ctx = TileContext(job=job, source=src, sample=sample, frame_source=ref.source, pixel_size_nm=px,
                      calibration=calibration, levels=fs.levels, shape=shape)
    del fs
    tiles = grid(shape, core, HALO_PX)
    # on a cluster the tiles go to every worker, one per worker thread; outside one they run one after
    # another, so that no more than one tile's working set is held at a time
    from .executors import in_dask_worker

    outs = fan_out(run_tile, [(ctx, c, w) for c, w in tiles], threads=0 if in_dask_worker() is not None else 1)
    for out in outs:
        if "error" in out:
            step, msg = out["error"]
            raise StepFailed(step, RuntimeError(msg))
    timings["tiles"] = time.perf_counter() - t0

    t0 = time.perf_counter()
    kept_first = {int(x) for o in outs for x in o["first"]}
    pending = np.concatenate([o["open"] for o in outs]) if outs else np.zeros(0, np.int64)
    extra, unresolved, more_notes = resolve_open(ctx, pending, kept_first, budget)
    timings["open_clusters"] = time.perf_counter() - t0
    cols, outlines = stitch(list(outs) + extra)
    notes.extend(_unique_notes([n for o in outs for n in o["notes"]] + more_notes))
    notes.append(f"tiles: frame of {shape[1]} x {shape[0]} px (working memory about {need / 2**30:.1f} GiB, "
                 f"budget {budget / 2**30:.2f} GiB) processed in {len(tiles)} tiles of {core} px + {HALO_PX} px "
                 f"halo; {len(extra)} cluster(s) cut by tile edges processed again")
    if unresolved:
        notes.append(f"tiles: {unresolved} cluster(s) cut by tile edges were not found again")
    polarities = [o.get("polarity", "") for o in outs if o.get("polarity")]
    record["polarity"] = polarities[0] if polarities else ""
    record["_notes"] = notes
    if cols:
        n = len(cols["label"])
        result["columns"] = cols
        record["grain_count"] = n
        if len(outlines) == n and n:
            result["outline_xy"] = np.concatenate(outlines)
            result["outline_offsets"] = np.concatenate([[0], np.cumsum([len(p) for p in outlines])]).astype(np.int64)
    record["worker_pid"] = os.getpid()


def run_by_tiles(ref: FrameRef, sample: str, job, host, budget: int, record: dict, result: dict,
                 t_start: float) -> dict:
    """The frame task of a frame over the budget: :func:`process_tiled`, its failures recorded in one line."""
    from .task import _fail, qc_codes

    try:
        process_tiled(ref, sample, job, host, budget, record, result)
    except StepFailed as exc:
        _fail(record, exc.step, exc)
        record["error"] = f"{exc.step}: {exc}".replace("\n", " ")[:500]
        result["traceback"] = record.pop("traceback")
    except Exception as exc:
        _fail(record, "tiles", exc)
        result["traceback"] = record.pop("traceback")
    notes = record.pop("_notes", [])
    record["notes"] = "; ".join(notes)
    record["qc"] = qc_codes(notes, record["status"] == "ok" and record["grain_count"] == 0)
    if record["status"] != "ok":
        result["columns"] = {}
        record["grain_count"] = 0
    record["seconds"] = time.perf_counter() - t_start
    return result
