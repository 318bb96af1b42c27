"""Frames from the optional electron-microscopy file library (RosettaSciIO).

RosettaSciIO (``rsciio``, GPL-3.0) reads the makers' own formats: Gatan
DM3/DM4, Velox and other EMD, TIA SER/EMI, Phenom ELID. It is an optional
extra (``pip install grainhabit[all]``); without it the readers of these
formats recognise the file and fail with one line saying what to install.

A file holds one or more *signals*, each an array with named axes that
carry a scale and a unit. The frames of a file are the 2-D images among
them (the last two axes are the image's, any axes before them a stack):
every image of a stack is a frame. Other signals (spectra, line plots,
diffraction patterns in reciprocal units) are skipped, and each frame's
notes say so.
"""

from __future__ import annotations

import importlib
import math
import warnings

import numpy as np

from .calibration import Calibration, make, unit_to_nm

#: The extra that installs the optional readers.
EXTRA = "grainhabit[all]"


def load(module: str, fmt: str):
    """Import ``rsciio.<module>``'s ``file_reader`` or fail with one line.

    Raises
    ------
    ValueError
        ``install grainhabit[all] to read DM3`` (and the like) when the
        optional library is missing.
    """
    try:
        return importlib.import_module(f"rsciio.{module}").file_reader
    except ImportError:
        raise ValueError(f"install {EXTRA} to read {fmt} (the optional reader library is missing)") from None


def read_signals(file_reader, path: str, lazy: bool = True) -> list[dict]:
    """Every signal of a file, lazily (pixels are read only when asked)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            return list(file_reader(path, lazy=lazy))
        except (TypeError, NotImplementedError):  # a reader without the lazy option, or one refusing it
            return list(file_reader(path))


def _signal_axes(sig: dict) -> list[dict]:
    return [ax for ax in sig.get("axes", []) if not ax.get("navigate", False)]


def is_image(sig: dict) -> bool:
    """True for a signal whose last two array axes form an image."""
    data = sig.get("data")
    return data is not None and len(_signal_axes(sig)) == 2 and getattr(data, "ndim", 0) >= 2


def index(signals: list[dict]) -> tuple[list[tuple[int, int, tuple]], list[str]]:
    """The frames of a file's signals.

    Returns
    -------
    frames : list of (signal index, stack index, (rows, cols))
        In file order.
    skipped : list of str
        One description per signal that is not an image, and per single
        image of the same field as an earlier one.

    Notes
    -----
    A scanning microscope records one scan through several detectors at
    once (a Velox file's HAADF, DF and BF images): single images of one
    size and one calibration (the same axes' scales and units) are views of
    one field, and its grains would be counted once per detector. The
    first is the frame; the others are skipped with a note. Images of a
    stack (a series, a recording) are frames each.
    """
    frames, skipped = [], []
    fields = {}  # (shape, axes' scales and units) of single images -> the signal that is that field's frame
    for i, sig in enumerate(signals):
        data = sig.get("data")
        if not is_image(sig):
            dims = len(_signal_axes(sig))
            shape = tuple(getattr(data, "shape", ()))
            skipped.append(f"signal {i} ({dims}-D signal, shape {shape})")
            continue
        shape = tuple(int(x) for x in data.shape)
        if len(shape) == 2:
            field = (shape, tuple((str(ax.get("scale")), str(ax.get("units"))) for ax in _signal_axes(sig)))
            if field in fields:
                skipped.append(f"signal {i} (an image of the same field as signal {fields[field]}: same size "
                               "and scale, another detector; not counted twice)")
                continue
            fields[field] = i
        n = int(np.prod(shape[:-2])) if len(shape) > 2 else 1
        frames.extend((i, k, shape[-2:]) for k in range(n))
    return frames, skipped


def calibration(sig: dict, detail: str) -> tuple[Calibration | None, str]:
    """Pixel size of an image signal from its axes (source ``instrument``).

    Returns
    -------
    cal : Calibration or None
        None when the axes carry no length unit (uncalibrated, or a
        diffraction pattern in reciprocal units).
    note : str
        Why there is none (empty if there is one).
    """
    axes = _signal_axes(sig)
    by_name = {str(ax.get("name", "")).lower(): ax for ax in axes}
    ay, ax_ = (by_name["y"], by_name["x"]) if "x" in by_name and "y" in by_name else (axes[0], axes[1])
    fx, fy = unit_to_nm(ax_.get("units")), unit_to_nm(ay.get("units"))
    if not fx or not fy:
        units = ax_.get("units")
        return None, f"the file's image axes carry no length unit ({units!r}): no specimen scale"
    try:
        sx, sy = float(ax_.get("scale", math.nan)), float(ay.get("scale", math.nan))
    except (TypeError, ValueError):
        return None, "the file's image axes carry no scale"
    cal = make(sx * fx, sy * fy, "instrument", detail)
    return cal, "" if cal else "the file's image scale is not a positive number"


def pixels(sig: dict, stack_index: int) -> np.ndarray:
    """One image of a signal as a numpy array (reads only that image of a lazy stack)."""
    data = sig["data"]
    shape = tuple(data.shape)
    if len(shape) > 2:
        data = data.reshape((-1,) + shape[-2:])[stack_index]
    # a lazy (dask) array is computed here, in this thread: inside a worker of a cluster the default would
    # hand the read to the cluster's scheduler, which cannot ship every reader's graph (Semper's failed)
    arr = np.asarray(data.compute(scheduler="synchronous") if hasattr(data, "compute") else data)
    if arr.dtype.names and all(c in arr.dtype.names for c in "RGB"):  # colour images as records
        arr = np.stack([arr[c] for c in "RGB"], axis=-1)
    return arr


def skipped_note(skipped: list[str]) -> tuple[str, ...]:
    """Note for the frames of a file that also holds signals that are not images."""
    if not skipped:
        return ()
    return (f"the file also holds {len(skipped)} signal(s) that are not 2-D images, skipped: " + "; ".join(skipped),)


def reader_hooks(name: str, module: str, fmt, recognises, detail: str):
    """The two reader hooks of a plugin whose format the optional library reads.

    Parameters
    ----------
    name : str
        The reader plugin's public name (``FrameRef.reader``).
    module : str
        ``rsciio`` sub-module (``"digitalmicrograph"``, ``"emd"``, ...).
    fmt : callable
        ``fmt(path) -> str``: the format's name for messages (``"DM3"``).
    recognises : callable
        ``recognises(path) -> bool``: by suffix and magic bytes, without the
        library (a foreign file is answered with None at once).
    detail : str
        Where the scale comes from, for the frame notes.

    Returns
    -------
    (grainhabit_list_frames, grainhabit_read_frame)
        Hook implementations for the plugin module's namespace.
    """
    from grainhabit import hookimpl

    from .common import check_size, describe, finish, refs_for

    @hookimpl
    def grainhabit_list_frames(path: str, options: dict):
        if not recognises(path):
            return None
        reader = load(module, fmt(path))
        try:
            sigs = read_signals(reader, path)
        except Exception as exc:
            raise ValueError(f"{path}: not a readable {fmt(path)} file ({exc.__class__.__name__}: {exc})") from None
        frames, skipped = index(sigs)
        if not frames:
            raise ValueError(f"{path}: the file holds no 2-D image (only: {'; '.join(skipped) or 'nothing'})")
        for _, _, shape in frames:
            check_size(path, shape, options)
        cal, _ = calibration(sigs[frames[0][0]], detail)
        dtype = str(getattr(sigs[frames[0][0]]["data"], "dtype", ""))
        return refs_for(path, name, [s for _, _, s in frames], dtype, describe(cal, options))

    @hookimpl
    def grainhabit_read_frame(ref, options: dict):
        if ref.reader != name:
            return None
        reader = load(module, fmt(ref.path))
        sigs = read_signals(reader, ref.path)
        frames, skipped = index(sigs)
        if ref.page >= len(frames):
            raise ValueError(f"{ref.source}: the file has {len(frames)} images, not {ref.page + 1}")
        si, k, shape = frames[ref.page]
        check_size(ref.source, shape, options)
        cal, why = calibration(sigs[si], detail)
        notes = skipped_note(skipped) + ((why,) if why else ())
        meta = {"signal": si, "stack_index": k}
        title = (sigs[si].get("metadata", {}).get("General", {}) or {}).get("title")
        if title:
            meta["title"] = str(title)[:200]
        return finish(ref, pixels(sigs[si], k), cal, options, notes=notes, meta=meta)

    return grainhabit_list_frames, grainhabit_read_frame
