"""Reader for TIFF, BigTIFF, multi-page stacks and OME-TIFF (tifffile).

Calibration precedence (design contract): OME-XML physical size with its
unit > ImageJ metadata (``unit`` with the resolution tags) > TIFF resolution
tags with ResolutionUnit inch or cm > the workflow's ``input.pixel_size_nm``
(applied by the host when this reader returns NaN).
"""

from __future__ import annotations

import hashlib
import math
import os
import xml.etree.ElementTree as ET

import numpy as np
import tifffile

from grainhabit import hookimpl
from grainhabit.frame import FrameData, FrameRef

GRAINHABIT_API = 1
__version__ = "1.0"
NAME = "read-tiff"
SUFFIXES = (".tif", ".tiff", ".btf", ".tf8", ".tf2")

#: nm per unit, for the unit names found in OME-XML and ImageJ metadata.
UNIT_NM = {
    "nm": 1.0, "nanometer": 1.0, "nanometre": 1.0,
    "µm": 1e3, "um": 1e3, "μm": 1e3, "micron": 1e3, "microns": 1e3, "micrometer": 1e3, "micrometre": 1e3,
    "\\u00b5m": 1e3,
    "mm": 1e6, "millimeter": 1e6, "cm": 1e7, "centimeter": 1e7, "m": 1e9, "meter": 1e9,
    "å": 0.1, "a": 0.1, "angstrom": 0.1, "ångström": 0.1, "pm": 1e-3, "picometer": 1e-3,
}


def unit_to_nm(unit: str | None) -> float | None:
    """nm per ``unit``, or None for an unknown unit."""
    if unit is None:
        return None
    return UNIT_NM.get(str(unit).strip().lower())


def _hash_file(path: str) -> str:
    h = hashlib.blake2b(digest_size=16)
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 22), b""):
            h.update(block)
    return h.hexdigest()


def _frames_of_series(series) -> tuple[int, tuple, bool]:
    """Number of 2-D frames in a series, frame shape, and whether it is RGB."""
    shape = tuple(series.shape)
    axes = series.axes
    rgb = axes.endswith("S") and shape[-1] in (3, 4)
    if rgb:
        frame_shape = shape[-3:]
        lead = shape[:-3]
    else:
        frame_shape = shape[-2:]
        lead = shape[:-2]
    return int(np.prod(lead)) if lead else 1, frame_shape, rgb


def _resolution_nm(page) -> tuple[float | None, str]:
    tags = page.tags
    xres = tags.get("XResolution")
    yres = tags.get("YResolution")
    unit = tags.get("ResolutionUnit")
    if xres is None:
        return None, ""
    def ratio(tag):
        v = tag.value
        return v[0] / v[1] if isinstance(v, tuple) and v[1] else float(v)
    try:
        xr, yr = ratio(xres), ratio(yres) if yres is not None else ratio(xres)
    except (TypeError, ZeroDivisionError):
        return None, ""
    if not xr or xr <= 0:
        return None, ""
    u = int(unit.value) if unit is not None else 2
    per = {2: 2.54e7, 3: 1e7}.get(u)  # inch, cm in nm
    if per is None:
        return None, ""
    sx, sy = per / xr, per / (yr or xr)
    return (sx, sy), "resolution"


def calibration(tif: tifffile.TiffFile, page) -> tuple[tuple[float, float] | None, str]:
    """Pixel size (x, y) in nm and where it came from, or (None, "")."""
    if tif.is_ome and tif.ome_metadata:
        try:
            root = ET.fromstring(tif.ome_metadata)
            for el in root.iter():
                if el.tag.endswith("Pixels"):
                    px, py = el.get("PhysicalSizeX"), el.get("PhysicalSizeY")
                    if px:
                        fx = unit_to_nm(el.get("PhysicalSizeXUnit", "µm"))
                        fy = unit_to_nm(el.get("PhysicalSizeYUnit", "µm"))
                        if fx:
                            sx = float(px) * fx
                            sy = float(py) * (fy or fx) if py else sx
                            return (sx, sy), "ome"
                    break
        except (ET.ParseError, ValueError):
            pass
    ij = tif.imagej_metadata if tif.is_imagej else None
    if ij and ij.get("unit"):
        factor = unit_to_nm(ij.get("unit"))
        xres = page.tags.get("XResolution")
        if factor and xres is not None:
            v = xres.value
            per_unit = v[0] / v[1] if isinstance(v, tuple) and v[1] else float(v)
            yres = page.tags.get("YResolution")
            vy = yres.value if yres is not None else v
            per_unit_y = vy[0] / vy[1] if isinstance(vy, tuple) and vy[1] else float(vy)
            if per_unit > 0:
                return (factor / per_unit, factor / (per_unit_y or per_unit)), "imagej"
    size, src = _resolution_nm(page)
    if size:
        return size, src
    return None, ""


@hookimpl
def grainhabit_list_frames(path: str, options: dict):
    """List the frames of a TIFF file (every page of every series)."""
    if not path.lower().endswith(SUFFIXES) or os.path.isdir(path):
        return None
    limit = int(options.get("max_pixels") or 0)
    try:
        with tifffile.TiffFile(path) as tif:
            refs = []
            fhash = _hash_file(path)
            total = sum(_frames_of_series(s)[0] for s in tif.series)
            index = 0
            for s in tif.series:
                n, fshape, _ = _frames_of_series(s)
                npx = int(fshape[0]) * int(fshape[1])
                if limit and npx > limit:
                    raise ValueError(f"{path}: declared frame size {fshape[1]}x{fshape[0]} px exceeds "
                                     f"input.max_pixels = {limit}")
                for _ in range(n):
                    source = path if total == 1 else f"{path}#{index}"
                    refs.append(FrameRef(source=source, path=path, page=index, shape=tuple(int(x) for x in fshape),
                                         dtype=str(s.dtype), reader=NAME,
                                         content_hash=fhash if total == 1 else f"{fhash}#{index}"))
                    index += 1
            if not refs:
                raise ValueError(f"{path}: the file holds no image")
            return refs
    except tifffile.TiffFileError as exc:
        raise ValueError(f"{path}: not a readable TIFF ({exc})") from None


def _locate(tif: tifffile.TiffFile, index: int):
    for s in tif.series:
        n, fshape, rgb = _frames_of_series(s)
        if index < n:
            return s, index, fshape, rgb
        index -= n
    raise ValueError(f"frame {index} not in file")


def to_luminance(rgb: np.ndarray) -> np.ndarray:
    """ITU-R BT.709 luma of an RGB(A) array, shape (rows, cols, 3 or 4)."""
    w = np.array([0.2126, 0.7152, 0.0722], dtype=np.float32)
    return np.tensordot(rgb[..., :3].astype(np.float32), w, axes=([-1], [0]))


@hookimpl
def grainhabit_read_frame(ref: FrameRef, options: dict):
    """Read one frame of a TIFF file as float32 with its calibration."""
    if ref.reader != NAME:
        return None
    limit = int(options.get("max_pixels") or 0)
    with tifffile.TiffFile(ref.path) as tif:
        series, local, fshape, rgb = _locate(tif, ref.page)
        if limit and fshape[0] * fshape[1] > limit:
            raise ValueError(f"{ref.source}: declared frame size {fshape[1]}x{fshape[0]} px exceeds "
                             f"input.max_pixels = {limit}")
        n, _, _ = _frames_of_series(series)
        if n == 1:
            data = series.asarray()
        else:
            pages_per_frame = 1
            data = series.asarray(key=local * pages_per_frame) if len(series.pages) == n else \
                series.asarray().reshape((n,) + tuple(fshape))[local]
        page = series.pages[0] if series.pages else tif.pages[0]
        size, source = calibration(tif, page)
        meta = {"tiff_series": series.name or "", "dtype": str(data.dtype)}
        try:
            desc = page.tags.get("ImageDescription")
            if desc is not None and not tif.is_ome:
                meta["description"] = str(desc.value)[:2000]
            dt = page.tags.get("DateTime")
            if dt is not None:
                meta["datetime"] = str(dt.value)
        except Exception:
            pass
    data = np.squeeze(np.asarray(data))
    notes = []
    if rgb or (data.ndim == 3 and data.shape[-1] in (3, 4)):
        data = to_luminance(data)
        notes.append("RGB converted to luminance (BT.709)")
    if data.ndim != 2:
        raise ValueError(f"{ref.source}: expected a 2-D frame, got shape {data.shape}")
    if data.dtype.kind not in "uif" and data.dtype != bool:
        raise ValueError(f"{ref.source}: unsupported pixel type {data.dtype}")
    raw = data.astype(np.float32, copy=False)
    px = math.nan
    if size is not None:
        sx, sy = size
        if not (sx > 0 and sy > 0):
            raise ValueError(f"{ref.source}: invalid pixel size {size} nm")
        if abs(sx - sy) / max(sx, sy) > 0.01:
            raise ValueError(f"{ref.source}: non-square pixels ({sx:.4g} x {sy:.4g} nm) are not supported")
        px = float(sx)
    return FrameData(source=ref.source, sample="", raw=raw, pixel_size_nm=px, calibration=source,
                     notes=tuple(notes), meta=meta)
