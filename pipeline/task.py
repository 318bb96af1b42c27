"""The per-frame task: read one frame and run the chain on it.

:func:`process_frame` is what the scheduler runs, one call per frame (all
stages of a frame fused into one task). It is pure: same frame and job,
same result; it never raises for a problem of the frame or of a plugin but
returns a failed record naming the step, so one bad frame or plugin never
takes down the run.
"""

from __future__ import annotations

import math
import os
import time
import traceback
from dataclasses import dataclass

import numpy as np

from . import chain_tiles
from .blocks import block_sums
from .executors import keep_freed_memory
from .frame import FrameData, FrameRef
from .manager import worker_host

THUMB_SIDE = 256


@dataclass(frozen=True)
class FrameJob:
    """What a worker needs besides the frame reference (picklable).

    Attributes
    ----------
    steps : tuple of (name, stage, params)
        Per-frame steps in order.
    input_options : dict
        The workflow's validated ``input`` section.
    plugins : tuple of str
        Extra plugin modules / files of the workflow.
    frame_memory : int
        ``execution.frame_memory`` in bytes (0: auto, the worker's memory
        limit); a frame whose estimated working memory exceeds it is
        processed tile by tile (:mod:`grainhabit.chain_tiles`).
    """

    steps: tuple
    input_options: dict
    plugins: tuple = ()
    frame_memory: int = 0


def thumbnail(image: np.ndarray, side: int = THUMB_SIDE) -> tuple[np.ndarray, float]:
    """Block-mean downsample so the longest side is at most ``side`` px.

    Returns
    -------
    thumb : ndarray of uint8, shape (r, c)
        Scaled between the 0.5 and 99.5 percentiles.
    factor : float
        Frame pixels per thumbnail pixel.
    """
    raw = np.asarray(image)
    f = max(1, math.ceil(max(raw.shape) / side))
    r, c = (raw.shape[0] // f) * f, (raw.shape[1] // f) * f
    if r == 0 or c == 0:
        small = np.asarray(raw, dtype=np.float32)
        f = 1
    else:
        small = _integer_block_mean(raw, f)
        if small is None:
            img = np.asarray(raw, dtype=np.float32)
            small = img[:r, :c].reshape(r // f, f, c // f, f).mean(axis=(1, 3))
    finite = small[np.isfinite(small)]
    lo, hi = (np.percentile(finite, [0.5, 99.5]) if finite.size else (0.0, 1.0))
    scaled = np.clip((small - lo) / max(hi - lo, 1e-12), 0, 1)
    return (np.nan_to_num(scaled) * 255 + 0.5).astype(np.uint8), float(f)


def _integer_block_mean(raw: np.ndarray, f: int) -> np.ndarray | None:
    """``raw.astype(float32)[:r, :c].reshape(r // f, f, c // f, f).mean(axis=(1, 3))`` of whole numbers, or None.

    A frame of 8/16-bit integers, or of float values that are all whole numbers (what the readers give for
    such files: float32 copies of the stored integers), whose ``f x f`` blocks sum to less than 2**24 in
    magnitude: every partial sum numpy's float32 mean forms is then an integer float32 holds exactly,
    whatever order it adds in, so the block sums are taken in int32 (the blocks' rows, then their
    columns, by strided slices) and divided as numpy's mean divides (``true_divide`` of the float32 sums
    by the count, into them): the same float32 values (tests/test_thumbnail_exact.py). A 2048 px frame's
    thumbnail: 7.3 -> 5.9 ms of CPU from the readers' float32 copy (the check of whole numbers costs a
    part), about 8 -> 2 ms from 16-bit integers. None for other frames (numpy's mean is used).
    """
    r, c = (raw.shape[0] // f) * f, (raw.shape[1] // f) * f
    x = raw[:r, :c]
    if raw.dtype.kind in "iu" and raw.dtype.itemsize <= 2:
        info = np.iinfo(raw.dtype)
        bound = max(abs(int(info.min)), int(info.max))
    elif raw.dtype.kind == "f" and raw.dtype.itemsize <= 8 and x.size:
        with np.errstate(invalid="ignore"):
            whole = x.astype(np.int32)
        # NaN, infinities, fractions and values beyond int32 do not come back from the integers unchanged
        if not np.array_equal(whole.astype(x.dtype), x):
            return None
        x = whole
        bound = max(abs(int(x.min())), abs(int(x.max())))
    else:
        return None
    if f * f * bound >= 1 << 24:
        return None
    ret = block_sums(x, f, np.int32).astype(np.float32)
    return np.true_divide(ret, np.intp(f * f), out=ret, casting="unsafe")


def _check_columns(frame: FrameData) -> None:
    """Every per-grain column must have one row per grain (and outlines, if set, one per grain)."""
    n = frame.n_grains
    bad = [k for k, v in frame.grains.items() if np.ndim(v) != 1 or len(v) != n]
    if bad:
        raise ValueError(f"columns {bad} do not have one row per grain ({n} grains)")
    if frame.outlines and len(frame.outlines) != n:
        raise ValueError(f"{len(frame.outlines)} outlines for {n} grains")


def read_calibrated(host, ref: FrameRef, input_options: dict) -> FrameData:
    """Read one frame with the readers and give it the pixel size the workflow's ``input`` section decides.

    Parameters
    ----------
    host : grainhabit host
    ref : FrameRef
        As a reader listed it.
    input_options : dict
        The workflow's ``input`` section: ``calibration`` (``override``
        replaces the file's own pixel size by ``pixel_size_nm``) and
        ``pixel_size_nm`` (also the fallback for files that state none).

    Returns
    -------
    FrameData
        With a finite ``pixel_size_nm`` (nm per pixel).

    Raises
    ------
    ValueError
        If no reader answers, or neither the file nor the options give a pixel size.
    """
    frame = host.first_answer("grainhabit_read_frame", ref=ref, options=input_options)
    if frame is None:
        raise ValueError(f"no reader plugin for {ref.source} (listed by {ref.reader or '?'})")
    if not isinstance(frame, FrameData):
        raise TypeError(f"reader returned {type(frame).__name__}, expected FrameData")
    fallback = input_options.get("pixel_size_nm")
    if input_options.get("calibration") == "override" and frame.calibration != "workflow":
        # input.calibration: override applies to every reader, also one that does not know the key
        frame = frame.replace(pixel_size_nm=float(fallback), calibration="workflow").with_note(
            f"input.calibration: override: {fallback:g} nm used instead of the file's own")
    if not (frame.pixel_size_nm and np.isfinite(frame.pixel_size_nm)):
        if fallback is None:
            raise ValueError(f"{ref.source}: the file carries no pixel size and input.pixel_size_nm is not set")
        frame = frame.replace(pixel_size_nm=float(fallback), calibration="workflow")
    return frame


def _fail(record: dict, where: str, exc: BaseException) -> dict:
    record["status"] = "failed"
    record["error"] = f"{where}: {exc.__class__.__name__}: {exc}".replace("\n", " ")[:500]
    record["traceback"] = traceback.format_exc()
    return record


def prepare_worker(job: FrameJob) -> dict:
    """Build this process's plugin host and let every plugin get ready (once per process).

    Runs the hook ``grainhabit_prepare_worker`` with the job's per-frame
    steps. A second call in the same process does nothing.

    Parameters
    ----------
    job : FrameJob
        The run's chain and options.

    Returns
    -------
    dict
        ``pid``, ``seconds`` (wall s this call took, 0 if already done) and
        ``errors`` (list of "plugin: Error: message" lines; empty if all went
        well).
    """
    t0 = time.perf_counter()
    key = (tuple(job.plugins), repr(job.steps))
    if key in _PREPARED:
        return {"pid": os.getpid(), "seconds": 0.0, "errors": []}
    try:
        host = worker_host(tuple(job.plugins))
    except Exception as exc:  # the frames will fail with the same error, named per frame
        return {"pid": os.getpid(), "seconds": time.perf_counter() - t0,
                "errors": [f"plugin host: {exc.__class__.__name__}: {exc}"]}
    steps = {name: dict(params) for name, _stage, params in job.steps}
    errors = [f"{name}: {exc.__class__.__name__}: {exc}"
              for name, exc in host.call_every("grainhabit_prepare_worker", steps=steps)]
    _PREPARED.add(key)
    return {"pid": os.getpid(), "seconds": time.perf_counter() - t0, "errors": errors}


#: Jobs (plugins, steps) this process is already prepared for.
_PREPARED: set = set()


def process_frame(ref: FrameRef, sample: str, job: FrameJob) -> dict:
    """Read a frame and run every per-frame step on it.

    Parameters
    ----------
    ref : FrameRef
        Frame to process.
    sample : str
        Its sample name.
    job : FrameJob
        Chain and options.

    Returns
    -------
    dict
        ``record`` (frame record: status, error, pixel size, ``timings`` and
        ``cpu_timings``: wall and CPU seconds of this thread per stage ...),
        ``columns`` (per-grain arrays), ``outline_xy`` (V, 2) float64 nm
        and ``outline_offsets`` (n + 1,) int64, ``thumb`` uint8 image and
        ``traceback`` (text, empty if ok).
    """
    keep_freed_memory()
    host = worker_host(tuple(job.plugins))
    record = {
        "source": ref.source, "sample": sample, "status": "ok", "error": "", "grain_count": 0,
        "pixel_size_nm": float("nan"), "calibration": "", "content_hash": ref.content_hash,
        "rows": 0, "cols": 0, "polarity": "", "notes": "", "qc": "", "seconds": 0.0, "timings": {},
        "cpu_timings": {}, "worker_pid": os.getpid(),
    }
    result = {"record": record, "columns": {}, "outline_xy": np.zeros((0, 2)),
              "outline_offsets": np.zeros(1, dtype=np.int64), "thumb": np.zeros((0, 0), np.uint8),
              "thumb_factor": 1.0, "traceback": ""}
    t_start = time.perf_counter()
    timings, cpu = record["timings"], record["cpu_timings"]  # wall and CPU seconds (this thread) per stage
    budget = chain_tiles.tile_budget(ref, job.frame_memory)
    if budget:
        return chain_tiles.run_by_tiles(ref, sample, job, host, budget, record, result, t_start)
    try:
        t0, c0 = time.perf_counter(), time.thread_time()
        frame = read_calibrated(host, ref, job.input_options).replace(sample=sample)
        record.update(pixel_size_nm=float(frame.pixel_size_nm), calibration=frame.calibration,
                      rows=int(frame.raw.shape[0]), cols=int(frame.raw.shape[1]))
        result["thumb"], result["thumb_factor"] = thumbnail(frame.raw)
        timings["read"] = time.perf_counter() - t0
        cpu["read"] = time.thread_time() - c0
    except Exception as exc:
        _fail(record, "read", exc)
        result["traceback"] = record.pop("traceback")
        record["seconds"] = time.perf_counter() - t_start
        return result

    for name, stage, params in job.steps:
        t0, c0 = time.perf_counter(), time.thread_time()
        try:
            out = host.call_step(name, frame=frame, params=params)
            if not isinstance(out, FrameData):
                raise TypeError(f"returned {type(out).__name__}, expected FrameData")
            _check_columns(out)
            frame = out
        except Exception as exc:
            _fail(record, name, exc)
            result["traceback"] = record.pop("traceback")
            break
        timings[stage] = timings.get(stage, 0.0) + time.perf_counter() - t0
        cpu[stage] = cpu.get(stage, 0.0) + time.thread_time() - c0

    record["notes"] = "; ".join(frame.notes)
    record["qc"] = qc_codes(frame.notes, record["status"] == "ok" and frame.n_grains == 0)
    record["polarity"] = frame.polarity
    if record["status"] == "ok":
        cols = {k: np.asarray(v) for k, v in frame.grains.items()}
        n = frame.n_grains
        bad = [k for k, v in cols.items() if v.ndim != 1 or len(v) != n]
        if bad:
            record.update(status="failed", error=f"columns {bad} do not have one row per grain")
        else:
            result["columns"] = cols
            record["grain_count"] = n
            polys = [np.asarray(p, dtype=np.float64).reshape(-1, 2) for p in frame.outlines]
            if len(polys) == n and n:
                result["outline_xy"] = np.concatenate(polys)
                result["outline_offsets"] = np.concatenate([[0], np.cumsum([len(p) for p in polys])]).astype(np.int64)
    record["seconds"] = time.perf_counter() - t_start
    return result


#: A note whose text after the step name starts with this marks the frame's result as not to be trusted.
QC_MARK = "qc "


def qc_codes(notes, empty: bool) -> str:
    """Quality codes of a frame from its notes.

    A step flags a frame with a note ``"<step>: qc <code>: <why>"``; an ok
    frame without any grain always gets ``no-grains``, so that no empty
    result passes unnoticed.

    Parameters
    ----------
    notes : sequence of str
        The frame's notes.
    empty : bool
        Whether the frame finished ok with 0 grains.

    Returns
    -------
    str
        Codes, comma-separated, in note order; empty if none.
    """
    codes = []
    for note in notes:
        text = note.split(": ", 1)[-1]
        if text.startswith(QC_MARK):
            code = text[len(QC_MARK):].split(":", 1)[0].strip()
            if code and code not in codes:
                codes.append(code)
    if empty and "no-grains" not in codes:
        codes.append("no-grains")
    return ",".join(codes)
