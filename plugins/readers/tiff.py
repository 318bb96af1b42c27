"""Reader plugin ``read-tiff``: TIFF, BigTIFF, OME-TIFF, compressed and multi-page TIFF.

Pixels and tags are read with tifffile (compressed files through
imagecodecs). The calibration is the first of (design contract,
``input.calibration: auto``):

1. ``instrument``: a microscope maker's metadata (:mod:`.vendor_tiff`:
   FEI/Thermo, Zeiss, Tescan, JEOL, Gatan, Olympus soft-imaging) or the
   text file a Hitachi SEM writes beside its images (:mod:`.sidecar`);
2. ``ome``: OME-XML ``PhysicalSizeX/Y`` with their units (default µm);
3. ``tiff-description``: a length unit in the description text with the
   resolution tags (``unit=micron`` as image programs write it), or an
   explicit ``pixel size = 2.5 nm`` in the text;
4. ``tiff-resolution``: resolution tags in pixels per centimetre, or per
   inch only where the value cannot be a screen or print setting
   (:func:`.calibration.is_screen_dpi`);
5. otherwise NaN: the host applies ``input.pixel_size_nm`` (``workflow``).

The info strip under SEM images is cropped from the image height the
maker's metadata states, otherwise where image analysis finds one; drawn
scale bars and text are masked (:mod:`.overlays`).
"""

from __future__ import annotations

import logging
import os
import re
import xml.etree.ElementTree as ET

import numpy as np
import tifffile

from grainhabit import hookimpl
from grainhabit.frame import FrameRef

from . import sidecar, vendor_tiff
from .calibration import Calibration, is_screen_dpi, make, unit_to_nm
from .common import check_size, describe, finish, has_magic, refs_for, suffix

# tifffile logs what it cannot parse ("invalid offset to first page ...") as a bare line outside the run's log;
# the reader reports such a file itself, in one line naming it
logging.getLogger("tifffile").setLevel(logging.CRITICAL)

GRAINHABIT_API = 1
__version__ = "2.3"
NAME = "read-tiff"
SUFFIXES = (".tif", ".tiff", ".btf", ".tf8", ".tf2")


def recognises(path: str) -> bool:
    """True for files that start with TIFF magic bytes (any suffix).

    Raises
    ------
    ValueError
        For a file named like a TIFF that does not start like one and is no
        other known image either (another reader answers for a PNG saved
        as ``.tif``).
    """
    if has_magic(path, "tiff"):
        return True
    if suffix(path) in SUFFIXES and not os.path.isdir(path):
        raise ValueError(f"{path}: not a readable TIFF (the file does not start with TIFF bytes)")
    return False


def _frames_of_series(series) -> tuple[int, tuple, bool]:
    """Number of 2-D frames in a series, frame shape (rows, cols[, samples]), and whether it is RGB.

    Colour samples stored pixel by pixel (axes ending ``YXS``) or plane by plane (``SYX``, TIFF's
    separate planar configuration) make one colour frame, not three frames.
    """
    shape = tuple(series.shape)
    if series.axes.endswith("S") and shape[-1] in (3, 4):
        return int(np.prod(shape[:-3])), shape[-3:], True
    if _planar_rgb(series):
        return int(np.prod(shape[:-3])), shape[-2:] + shape[-3:-2], True
    return int(np.prod(shape[:-2])), shape[-2:], False  # the product of no lead axes is 1


def sis_pages(tif: tifffile.TiffFile) -> list[int] | None:
    """The pages of an Olympus soft-imaging TIFF that are frames; None for any other file.

    tifffile reads such a file as one series of its first page's shape, but one can hold an 8-bit RGB
    rendering of its image (first) beside the data (16-bit grey, the page the calibration belongs to): the
    pages are taken one by one, and a colour page of the same size as a grey page is that preview, not a
    second field (its grains would be counted twice).
    """
    if not getattr(tif, "is_sis", False):
        return None
    pages = list(tif.pages)
    grey = {tuple(p.shape[:2]) for p in pages if p.samplesperpixel == 1}
    return [i for i, p in enumerate(pages) if p.samplesperpixel == 1 or tuple(p.shape[:2]) not in grey]


def _planar_rgb(series) -> bool:
    """Whether a series stores its colour samples plane by plane (axes ending ``SYX``)."""
    return series.axes.endswith("SYX") and tuple(series.shape)[-3] in (3, 4)


def _ratio(tag) -> float:
    v = tag.value
    return v[0] / v[1] if isinstance(v, tuple) and v[1] else float(v)


def ome_calibration(tif: tifffile.TiffFile, series_index: int) -> Calibration | None:
    """OME-XML physical pixel size of image ``series_index`` (units default to µm)."""
    if not (tif.is_ome and tif.ome_metadata):
        return None
    try:
        root = ET.fromstring(tif.ome_metadata)
    except ET.ParseError:
        return None
    pixels = [el for el in root.iter() if el.tag.endswith("}Pixels") or el.tag == "Pixels"]
    if not pixels:
        return None
    el = pixels[series_index] if series_index < len(pixels) else pixels[0]
    px, py = el.get("PhysicalSizeX"), el.get("PhysicalSizeY")
    if not px:
        return None
    fx = unit_to_nm(el.get("PhysicalSizeXUnit", "µm"))
    fy = unit_to_nm(el.get("PhysicalSizeYUnit", el.get("PhysicalSizeXUnit", "µm")))
    if not fx or not fy:
        return None
    try:
        return make(float(px) * fx, float(py or px) * fy, "ome", "OME-XML PhysicalSizeX")
    except ValueError:
        return None


_PIXEL_SIZE_TEXT = re.compile(
    r"pixel[ _]?(?:size|width|spacing)\s*[=:]\s*([0-9.]+(?:[eE][-+]?\d+)?)\s*([a-zA-Zµμ\u00c5]+)", re.IGNORECASE)


def description_calibration(tif: tifffile.TiffFile, page) -> Calibration | None:
    """Unit and scale written into the description text.

    Image programs write a length ``unit=...`` line and keep the pixels per unit
    in the resolution tags (whatever their ResolutionUnit); other texts may
    state ``pixel size = 2.5 nm`` directly.
    """
    desc = page.description or ""
    ij = tif.imagej_metadata if tif.is_imagej else None
    unit = (ij or {}).get("unit")
    if unit is None:
        m = re.search(r"^\s*unit\s*=\s*(\S+)\s*$", desc, re.MULTILINE)
        unit = m.group(1) if m else None
    factor = unit_to_nm(unit)
    xres, yres = page.tags.get("XResolution"), page.tags.get("YResolution")
    if factor and xres is not None:
        try:
            rx = _ratio(xres)
            ry = _ratio(yres) if yres is not None else rx
        except (TypeError, ZeroDivisionError, ValueError):
            rx = ry = 0
        if rx > 0 and ry > 0:
            return make(factor / rx, factor / ry, "tiff-description", f"description unit {unit!r} with resolution tags")
    m = _PIXEL_SIZE_TEXT.search(desc)
    if m:
        factor = unit_to_nm(m.group(2))
        if factor:
            size = float(m.group(1)) * factor
            return make(size, size, "tiff-description", "pixel size in the description text")
    return None


def resolution_calibration(page) -> tuple[Calibration | None, str]:
    """Resolution tags as a pixel size, and a note when they were set aside.

    Pixels per centimetre are a specimen scale; pixels per inch only when
    the value cannot be a screen or print setting; no unit is no scale.
    """
    xres, yres, unit = page.tags.get("XResolution"), page.tags.get("YResolution"), page.tags.get("ResolutionUnit")
    if xres is None:
        return None, ""
    try:
        rx = _ratio(xres)
        ry = _ratio(yres) if yres is not None else rx
    except (TypeError, ZeroDivisionError, ValueError):
        return None, ""
    u = int(unit.value) if unit is not None else 2
    if not (rx > 0 and ry > 0) or u not in (2, 3):
        return None, ""
    if u == 2 and (is_screen_dpi(rx) or is_screen_dpi(ry)):
        return None, f"resolution tags ({rx:.4g} per inch) are a screen or print setting, not a specimen scale: not used"
    per = 2.54e7 if u == 2 else 1e7
    return make(per / rx, per / ry, "tiff-resolution", "TIFF resolution tags"), ""


def calibrate(tif: tifffile.TiffFile, page, path: str, series_index: int = 0):
    """The calibration of a page by the contract's precedence.

    Returns
    -------
    cal : Calibration or None
    info : vendor_tiff.VendorInfo or sidecar.SidecarInfo or None
        The maker's metadata (for the info strip), if any.
    notes : list of str
    """
    notes = []
    try:
        info = vendor_tiff.read(tif, page) or sidecar.read(path)
    except ValueError as exc:
        raise ValueError(f"{path}: {exc}") from None
    if info is not None and info.calibration is not None:
        return info.calibration, info, notes
    if info is not None:
        notes.append(f"{info.maker}: no specimen scale in it")
    for probe in (lambda: ome_calibration(tif, series_index), lambda: description_calibration(tif, page)):
        cal = probe()
        if cal is not None:
            return cal, info, notes
    cal, note = resolution_calibration(page)
    if note:
        notes.append(note)
    return cal, info, notes


@hookimpl
def grainhabit_list_frames(path: str, options: dict):
    """List the frames of a TIFF file (every page of every series)."""
    if not recognises(path):
        return None
    try:
        with tifffile.TiffFile(path) as tif:
            shapes, dtype = [], ""
            sis = sis_pages(tif)
            if sis is not None:  # page by page
                shapes = [tuple(tif.pages[i].shape) for i in sis]
                dtype = str(tif.pages[sis[0]].dtype) if sis else ""
            else:
                for s in tif.series:
                    n, fshape, _ = _frames_of_series(s)
                    shapes.extend([fshape] * n)
                    dtype = dtype or str(s.dtype)
            for fshape in shapes:
                check_size(path, fshape, options)
            if not shapes:
                raise ValueError(f"{path}: the file holds no image")
            page = tif.series[0].pages[0] if tif.series[0].pages else tif.pages[0]
            cal, _, _ = calibrate(tif, page, path)
    except tifffile.TiffFileError as exc:
        raise ValueError(f"{path}: not a readable TIFF ({exc})") from None
    return refs_for(path, NAME, shapes, dtype, describe(cal, options, int(shapes[0][1])))


def _locate(tif: tifffile.TiffFile, index: int):
    for si, s in enumerate(tif.series):
        n, fshape, rgb = _frames_of_series(s)
        if index < n:
            return si, s, index, fshape, rgb
        index -= n
    raise ValueError(f"frame {index} not in file")


@hookimpl
def grainhabit_read_frame(ref: FrameRef, options: dict):
    """Read one frame of a TIFF file with its calibration; crop the info strip."""
    if ref.reader != NAME:
        return None
    with tifffile.TiffFile(ref.path) as tif:
        sis = sis_pages(tif)
        if sis is not None:
            return _read_sis_page(tif, ref, options, sis)
        si, series, local, fshape, rgb = _locate(tif, ref.page)
        check_size(ref.source, fshape, options)
        n, _, _ = _frames_of_series(series)
        planar = _planar_rgb(series)
        stored_shape = tuple(series.shape)[-3:] if planar else tuple(fshape)
        if n == 1:
            data = series.asarray()
        elif len(series.pages) == n:
            data = series.asarray(key=local)
        else:
            data = series.asarray().reshape((n,) + stored_shape)[local]
        if planar:
            data = np.moveaxis(np.asarray(data).reshape(stored_shape), 0, -1)  # samples last, as finish expects
        page = series.pages[0] if series.pages else tif.pages[0]
        cal, info, notes = calibrate(tif, page, ref.path, si)
        meta = {"tiff_series": series.name or "", "dtype": str(data.dtype)}
        for key in ("Make", "Model", "DateTime"):
            tag = page.tags.get(key)
            if tag is not None:
                meta[key.lower()] = str(tag.value)[:200]
    maker = info.maker if info is not None else ""
    return finish(ref, data, cal, options, notes=tuple(notes), meta=meta,
                  image_rows=getattr(info, "image_rows", None), strip_rows=getattr(info, "strip_rows", None),
                  strip_detail=maker, look_for_overlays=True)


def _read_sis_page(tif: tifffile.TiffFile, ref: FrameRef, options: dict, sis: list[int]):
    """One frame of an Olympus soft-imaging TIFF: its page (:func:`sis_pages`), at the file's calibration."""
    if ref.page >= len(sis):
        raise ValueError(f"{ref.source}: the file has {len(sis)} images, not {ref.page + 1}")
    page = tif.pages[sis[ref.page]]
    check_size(ref.source, tuple(page.shape), options)
    data = page.asarray()
    cal, info, notes = calibrate(tif, page, ref.path)
    if len(sis) < len(tif.pages):
        notes.append(f"{len(tif.pages) - len(sis)} colour preview page(s) of the same image skipped (not a second field)")
    meta = {"tiff_series": "sis", "dtype": str(data.dtype)}
    return finish(ref, data, cal, options, notes=tuple(notes), meta=meta, strip_detail=getattr(info, "maker", ""),
                  look_for_overlays=True)


@hookimpl
def grainhabit_open_regions(ref: FrameRef, options: dict):
    """Open a TIFF frame for region reads (:mod:`.regions`): tags now, pixels window by window."""
    if ref.reader != NAME:
        return None
    from .regions import open_tiff

    with tifffile.TiffFile(ref.path) as tif:
        if sis_pages(tif) is not None:
            return None  # read page by page (sis_pages); no region reads for such files
    try:
        return open_tiff(ref, options, _locate, calibrate)
    except tifffile.TiffFileError as exc:
        raise ValueError(f"{ref.source}: not a readable TIFF ({exc})") from None
