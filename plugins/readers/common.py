"""Helpers every reader plugin shares: recognising files, hashing, building the frame.

:func:`finish` is the one place where a reader's pixels and calibration
become a :class:`~grainhabit.frame.FrameData`: it applies
``input.calibration``, refuses a pixel size the file's own magnification
rules out, crops the info strip, masks drawn marks and resamples
non-square pixels, and writes each of these into the frame's notes.
"""

from __future__ import annotations

import hashlib
import math
import os

import numpy as np

from grainhabit.frame import FrameData, FrameRef

from . import overlays
from .calibration import Calibration, check_plausible, resample_square

#: Magic bytes at the start of the file formats the built-in readers know.
MAGIC = {
    "tiff": (b"II*\x00", b"MM\x00*", b"II+\x00", b"MM\x00+"),
    "png": (b"\x89PNG\r\n\x1a\n",),
    "jpeg": (b"\xff\xd8\xff",),
    "bmp": (b"BM",),
    "hdf5": (b"\x89HDF\r\n\x1a\n",),
    "dm3": (b"\x00\x00\x00\x03",),
    "dm4": (b"\x00\x00\x00\x04",),
    "ser": (b"II\x97\x01",),
    "jeol-img": (b"4\x00\x00\x00",),
    "bcf": (b"AAMVHFSS",),
    "digitalsurf": (b"DIGITAL SURF", b"DSCOMPRESSED"),
    "tvips": (b"\x00\x01\x00\x00",),
}


def head(path: str, n: int = 16) -> bytes:
    """The first ``n`` bytes of a file (empty for folders and unreadable files)."""
    if os.path.isdir(path):
        return b""
    try:
        with open(path, "rb") as fh:
            return fh.read(n)
    except OSError:
        return b""


def has_magic(path: str, kind: str) -> bool:
    """True if ``path`` starts with one of the magic byte strings of ``kind``."""
    start = head(path)
    return any(start.startswith(m) for m in MAGIC[kind])


def suffix(path: str) -> str:
    """Lower-case file suffix with the dot (``".dm3"``)."""
    return os.path.splitext(path)[1].lower()


def hash_file(path: str) -> str:
    """BLAKE2b (128 bit) of a file's bytes, hex."""
    h = hashlib.blake2b(digest_size=16)
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 22), b""):
            h.update(block)
    return h.hexdigest()


def refs_for(path: str, reader: str, shapes: list[tuple], dtype: str, calibration: str = "") -> list[FrameRef]:
    """One :class:`FrameRef` per frame; ``#N`` sources only for files of several frames."""
    fhash = hash_file(path)
    many = len(shapes) > 1
    return [FrameRef(source=f"{path}#{i}" if many else path, path=path, page=i, shape=tuple(int(x) for x in shape),
                     dtype=dtype, reader=reader, content_hash=f"{fhash}#{i}" if many else fhash,
                     calibration=calibration)
            for i, shape in enumerate(shapes)]


def check_size(where: str, shape: tuple, options: dict) -> None:
    """Refuse a frame larger than ``input.max_pixels``."""
    limit = int(options.get("max_pixels") or 0)
    if limit and int(shape[0]) * int(shape[1]) > limit:
        raise ValueError(f"{where}: declared frame size {shape[1]}x{shape[0]} px exceeds input.max_pixels = {limit}")


def to_luminance(rgb: np.ndarray) -> np.ndarray:
    """ITU-R BT.709 luma of an RGB(A) array, shape (rows, cols, 3 or 4), as float32."""
    w = np.array([0.2126, 0.7152, 0.0722], dtype=np.float32)
    return np.tensordot(rgb[..., :3].astype(np.float32), w, axes=([-1], [0]))


def describe(cal: Calibration | None, options: dict, cols: int = 0) -> str:
    """The calibration a frame will get, as one line for ``grainhabit check``.

    ``cols`` (image width in pixels) lets the magnification check run here
    too, so that ``check`` shows a scale the read will refuse.
    """
    fallback = options.get("pixel_size_nm")
    if options.get("calibration") == "override":
        return f"{fallback:g} nm (workflow, input.calibration: override)"
    if cal is None:
        return f"{fallback:g} nm (workflow)" if fallback else "none (the frame fails: set input.pixel_size_nm)"
    try:
        check_plausible(cal, cols, "")
    except ValueError as exc:
        return f"refused: {str(exc).lstrip(': ')}"
    text = cal.text()
    return text if cal.square else text + ", resampled to square pixels"


def finish(ref: FrameRef, stored: np.ndarray, cal: Calibration | None, options: dict, *,
           notes: tuple = (), meta: dict | None = None, image_rows: int | None = None,
           strip_rows: int | None = None, strip_detail: str = "", look_for_overlays: bool = False) -> FrameData:
    """Turn a frame's stored pixels and calibration into a :class:`FrameData`.

    Parameters
    ----------
    ref : FrameRef
        The listed frame.
    stored : ndarray, shape (rows, cols) or (rows, cols, 3|4)
        Pixels as stored (integer values are kept for the overlay analysis).
    cal : Calibration or None
        The file's own calibration, None if it has none.
    options : dict
        The workflow's ``input`` section (``calibration``, ``pixel_size_nm``,
        ``max_pixels``).
    notes : tuple of str
        Notes the reader already has.
    meta : dict, optional
        Acquisition metadata for the frame record.
    image_rows : int, optional
        Rows of the scanned image as the file states them; rows below are an
        info strip and are cropped.
    strip_rows : int, optional
        Rows of the info strip at the bottom as the file states them.
    strip_detail : str
        Where the file states the strip, for the note.
    look_for_overlays : bool
        Look for an info strip by image analysis when the file states none,
        and for drawn scale bars and text (TIFF and bitmap exports; the
        other formats hold the detector's data only).

    Returns
    -------
    FrameData
        ``raw`` float32; ``pixel_size_nm`` NaN where neither the file nor an
        override gives one (the host then applies ``input.pixel_size_nm``);
        ``valid`` False on drawn marks and on pixels without a finite value
        (None if there are none).

    Raises
    ------
    ValueError
        If the pixel size contradicts the file's magnification, pixels are
        too far from square to be resampled, or no pixel holds a finite value.
    """
    notes = list(notes)
    data = np.asarray(stored)
    if data.ndim == 3 and data.shape[-1] in (3, 4):
        if np.array_equal(data[..., 0], data[..., 1]) and np.array_equal(data[..., 0], data[..., 2]):
            data = data[..., 0]
            notes.append("grey image stored as RGB: one channel used")
        else:
            data = to_luminance(data)
            notes.append("RGB converted to luminance (BT.709)")
    data = np.squeeze(data)
    if data.ndim != 2:
        raise ValueError(f"{ref.source}: expected a 2-D frame, got shape {data.shape}")
    if data.dtype.kind not in "uifb":
        raise ValueError(f"{ref.source}: unsupported pixel type {data.dtype}")
    bad = None
    if data.dtype.kind == "f":
        finite = np.isfinite(data)
        if not finite.any():
            raise ValueError(f"{ref.source}: no pixel holds a finite value (all NaN or infinite)")
        if not finite.all():
            # dead or masked pixels of a corrected float image (NaN, +-inf): excluded and filled like drawn marks
            bad = ~finite
            data = overlays.fill_marks(data, bad)
            notes.append(f"{int(bad.sum())} px without a finite value (NaN or infinite) excluded from analysis "
                         "and filled with the grey level around them")
    rows = data.shape[0]
    cut = 0
    if image_rows and 0 < image_rows < rows:
        cut = rows - int(image_rows)
        how = f"the file states an image height of {image_rows} rows{' (' + strip_detail + ')' if strip_detail else ''}"
    elif strip_rows and 0 < strip_rows < rows:
        cut = int(strip_rows)
        how = f"the file states a {cut}-row strip{' (' + strip_detail + ')' if strip_detail else ''}"
    elif look_for_overlays:
        cut = overlays.find_info_strip(data)
        how = "found by image analysis"
    if cut:
        data = data[: rows - cut]
        notes.append(f"info strip removed: bottom {cut} of {rows} rows ({how})")
        if bad is not None:
            bad = bad[: rows - cut]
    marks = overlays.annotation_mask(data) if look_for_overlays else None
    valid = None if bad is None or not bad.any() else ~bad
    if marks is not None:
        valid = ~marks if valid is None else valid & ~marks
        data = overlays.fill_marks(data, marks)
        notes.append(f"drawn marks (scale bar, text) masked: {int(marks.sum())} px excluded from analysis "
                     "and filled with the grey level around them")

    mode = options.get("calibration") or "auto"
    raw = data.astype(np.float32, copy=False)
    px, source = math.nan, ""
    if mode == "override" and options.get("pixel_size_nm"):
        px, source = float(options["pixel_size_nm"]), "workflow"
        if cal is not None:
            notes.append(f"input.calibration: override: the file's own {cal.text()} not used")
    elif cal is not None:
        check_plausible(cal, raw.shape[1], ref.source)
        if cal.square:
            px = cal.x_nm
        else:
            try:
                raw, px, note = resample_square(raw, cal, int(options.get("max_pixels") or 0))
            except ValueError as exc:
                raise ValueError(f"{ref.source}: {exc}") from None
            notes.append(note)
            if valid is not None:
                from scipy import ndimage

                zoom = (raw.shape[0] / valid.shape[0], raw.shape[1] / valid.shape[1])
                valid = ndimage.zoom(valid.astype(np.uint8), zoom, order=0, grid_mode=True, mode="nearest") > 0
        source = cal.source
        if cal.detail:
            notes.append(f"pixel size from {cal.detail}")
    return FrameData(source=ref.source, sample="", raw=raw, pixel_size_nm=px, calibration=source,
                     notes=tuple(notes), meta=dict(meta or {}), valid=valid)
