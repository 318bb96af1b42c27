"""Microscope makers' metadata in TIFF files: pixel size and image height.

Each function takes an open :class:`tifffile.TiffFile` (and the page of the
frame) and returns a :class:`VendorInfo` or None. Where tifffile has a
parser for a maker's metadata it is used (``fei_metadata``,
``sem_metadata``, ``sis_metadata``); the rest are small key=value or XML
texts read here.

Formats (all state the pixel size of the specimen, so the source is
``instrument``):

- FEI/Thermo Fisher SEM/FIB: INI-style text in tag 34680 or 34682;
  ``[Scan] PixelWidth/PixelHeight`` in m, ``[Image] ResolutionY`` is the
  scanned height (rows below it are the info strip).
- Zeiss SEM: tag 34118; ``ap_width`` / ``ap_height`` (the field of view)
  over the stored pixels. The tag's own ``ap_pixel_size`` belongs to the
  acquisition store resolution, which a saved file need not have.
- Tescan SEM: text tag 50431 (after an embedded thumbnail), ``PixelSizeX``
  / ``PixelSizeY`` in m and ``ImageStripSize`` (rows of the info strip).
- JEOL TEM software: XML in ImageDescription (root ``TemReporter``); in
  imaging mode ``ModeString = MAG`` the image-plane pitch (resolution tags)
  over ``SelectorValue`` (the magnification).
- Gatan TIFF export: private tags 65003/65004 (x/y unit) and 65009/65010
  (x/y scale per pixel).
- Olympus soft-imaging TIFF: tags 33560/33471 (``sis_metadata``,
  ``pixelsizex/y`` in m).
- TVIPS camera TIFF: tag 37706 (``tvips_metadata``), version-2 header
  ``PixelSizeX/Y`` in nm.
"""

from __future__ import annotations

import math
import re
import xml.etree.ElementTree as ET
from dataclasses import dataclass

from .calibration import Calibration, make, unit_to_nm


@dataclass(frozen=True)
class VendorInfo:
    """What a maker's metadata says about a frame.

    Parameters
    ----------
    calibration : Calibration or None
        Pixel size (source ``instrument``), None if the metadata has none.
    image_rows : int or None
        Rows of the scanned image where the file states it (rows below are
        an info strip to drop), None if not stated.
    strip_rows : int or None
        Rows of the info strip at the bottom where the file states them.
    maker : str
        Format family, for notes (e.g. ``"FEI/Thermo text block"``).
    """

    calibration: Calibration | None
    image_rows: int | None = None
    strip_rows: int | None = None
    maker: str = ""


def _float(value) -> float:
    try:
        return float(str(value).strip().split()[0])
    except (ValueError, IndexError, TypeError):
        return math.nan


# -- FEI / Thermo Fisher ---------------------------------------------------------


def fei(tif) -> VendorInfo | None:
    """FEI/Thermo Fisher text block (tags 34680/34682) via ``TiffFile.fei_metadata``."""
    if not getattr(tif, "is_fei", False):
        return None
    meta = tif.fei_metadata or {}
    scan = meta.get("Scan") or meta.get("EScan") or meta.get("IScan") or {}
    px, py = _float(scan.get("PixelWidth")), _float(scan.get("PixelHeight"))
    if not (py > 0):
        py = px
    image = meta.get("Image") or {}
    rows = image.get("ResolutionY")
    hfw = _float(scan.get("HorFieldsize"))
    canvas = _float(image.get("MagCanvasRealWidth"))
    mag = canvas / hfw if canvas > 0 and hfw > 0 else math.nan  # magnification as the instrument shows it
    cal = make(px * 1e9, py * 1e9, "instrument", "FEI/Thermo text block [Scan] PixelWidth", mag, "sem")
    if cal is not None and hfw > 0:
        # the field width must agree with pixel width x pixel columns of the scan
        cols = _float(image.get("ResolutionX"))
        if cols > 0 and abs(hfw - px * cols) > 0.02 * hfw:
            raise ValueError(f"FEI/Thermo metadata disagrees with itself: HorFieldsize {hfw:g} m but "
                             f"PixelWidth x ResolutionX = {px * cols:g} m")
    return VendorInfo(cal, int(rows) if isinstance(rows, (int, float)) and rows > 0 else None, None,
                      "FEI/Thermo text block")


# -- Zeiss -----------------------------------------------------------------------


def _zeiss_length(entry) -> float:
    """nm of a Zeiss (name, value, unit) entry, NaN if not a length."""
    if not isinstance(entry, tuple) or len(entry) < 3:
        return math.nan
    factor = unit_to_nm(entry[2])
    value = _float(entry[1])
    return value * factor if factor and value > 0 else math.nan


def _zeiss_mag(entry) -> float:
    if not isinstance(entry, tuple) or len(entry) < 2:
        return math.nan
    m = re.match(r"\s*([\d.]+)\s*([kKmM]?)\s*X", str(entry[1]))
    if not m:
        return math.nan
    return float(m.group(1)) * {"": 1, "k": 1e3, "K": 1e3, "m": 1e6, "M": 1e6}[m.group(2)]


def zeiss(tif, page) -> VendorInfo | None:
    """Zeiss SEM tag 34118 via ``TiffFile.sem_metadata``.

    The pixel size is the stated field of view (``ap_width``) over the
    stored columns: the tag's ``ap_pixel_size`` is that of the acquisition
    store resolution and is wrong for a file saved at another size; it is
    used only with the store size (``dp_image_store``, ``1024 * 768``) to
    scale it by, otherwise the tag gives no scale.
    """
    if not getattr(tif, "is_sem", False):
        return None
    meta = tif.sem_metadata or {}
    cols, rows = int(page.shape[1]), int(page.shape[0])
    width, height = _zeiss_length(meta.get("ap_width")), _zeiss_length(meta.get("ap_height"))
    mag = _zeiss_mag(meta.get("ap_mag"))
    detail = "Zeiss tag 34118, ap_width over image width"
    if width > 0:
        px = width / cols
        py = height / rows if height > 0 else px
        # ap_height may cover the image without the info strip: then it is shorter than rows * px
        if height > 0 and abs(py - px) > 0.01 * px:
            py = px
        return VendorInfo(make(px, py, "instrument", detail, mag, "sem"), None, None, "Zeiss tag 34118")
    size = _zeiss_length(meta.get("ap_pixel_size"))
    store = re.match(r"\s*(\d+)\s*\*\s*(\d+)", str((meta.get("dp_image_store") or ("", ""))[1]))
    if size > 0 and store:
        # ap_pixel_size is that of the acquisition store; scale it to the stored columns
        size *= int(store.group(1)) / cols
        return VendorInfo(make(size, size, "instrument", "Zeiss tag 34118, ap_pixel_size over image store", mag,
                               "sem"), None, None, "Zeiss tag 34118")
    return VendorInfo(None, None, None, "Zeiss tag 34118")


# -- Tescan ----------------------------------------------------------------------

TESCAN_TAG = 50431


def tescan(page) -> VendorInfo | None:
    """Tescan SEM text tag 50431 (``PixelSizeX/Y`` in m, ``ImageStripSize`` rows)."""
    tag = page.tags.get(TESCAN_TAG)
    if tag is None:
        return None
    raw = tag.value
    text = raw.decode("latin-1") if isinstance(raw, (bytes, bytearray)) else str(raw)
    # the tag starts with a thumbnail image; the metadata is key=value lines after it
    if "PixelSizeX=" not in text:
        return None
    return tescan_text(text, "Tescan text tag 50431, PixelSizeX")


def tescan_text(text: str, detail: str) -> VendorInfo:
    """Tescan ``key=value`` metadata text (in tag 50431 or a ``.hdr`` file beside the image)."""
    kv = {}
    for m in re.finditer(r"(PixelSizeX|PixelSizeY|Magnification|ImageStripSize)=([^\r\n\x00]*)", text):
        kv.setdefault(m.group(1), m.group(2).strip())
    px = _float(kv.get("PixelSizeX"))
    py = _float(kv.get("PixelSizeY", kv.get("PixelSizeX")))
    mag = _float(kv.get("Magnification"))
    strip = _float(kv.get("ImageStripSize"))
    cal = make(px * 1e9, py * 1e9, "instrument", detail, mag, "sem")
    return VendorInfo(cal, None, int(strip) if strip > 0 else None, "Tescan text tag 50431")


# -- JEOL ------------------------------------------------------------------------


def _resolution_ppm(page) -> tuple[float, float] | None:
    """Pixels per metre along x and y from the resolution tags, None if absent."""
    xres, yres, unit = page.tags.get("XResolution"), page.tags.get("YResolution"), page.tags.get("ResolutionUnit")
    if xres is None:
        return None

    def ratio(tag):
        v = tag.value
        return v[0] / v[1] if isinstance(v, tuple) and v[1] else float(v)

    try:
        rx = ratio(xres)
        ry = ratio(yres) if yres is not None else rx
    except (TypeError, ZeroDivisionError, ValueError):
        return None
    per_m = {2: 1 / 0.0254, 3: 100.0}.get(int(unit.value) if unit is not None else 2)
    if per_m is None or not (rx > 0 and ry > 0):
        return None
    return rx * per_m, ry * per_m


def jeol(tif, page) -> VendorInfo | None:
    """JEOL TEM XML in ImageDescription: image-plane pitch over the magnification.

    Only the imaging mode (``ModeString`` MAG) gives a specimen scale; a
    diffraction pattern has none (returns a VendorInfo without calibration).
    """
    desc = page.description or ""
    if "<TemReporter" not in desc[:2000]:
        return None
    try:
        root = ET.fromstring(desc.strip().strip("\x00"))
    except ET.ParseError as exc:
        raise ValueError(f"JEOL XML in ImageDescription is not readable ({exc})") from None
    forming = root.find(".//ImageFormingSystem")
    if forming is None:
        return VendorInfo(None, None, None, "JEOL XML")
    mode = (forming.findtext("ModeString") or "").strip()
    mag = _float(forming.findtext("SelectorValue"))
    ppm = _resolution_ppm(page)
    if mode != "MAG" or not (mag > 0) or ppm is None:
        return VendorInfo(None, None, None, "JEOL XML")
    px, py = 1e9 / ppm[0] / mag, 1e9 / ppm[1] / mag
    return VendorInfo(make(px, py, "instrument", f"JEOL XML, image-plane pitch over magnification {mag:g}x", mag),
                      None, None, "JEOL XML")


# -- Gatan TIFF export -----------------------------------------------------------


def gatan(page) -> VendorInfo | None:
    """Gatan private tags 65003/65004 (units) and 65009/65010 (scale per pixel)."""
    tags = page.tags
    if 65009 not in tags or 65003 not in tags:
        return None
    fx = unit_to_nm(tags[65003].value)
    fy = unit_to_nm(tags[65004].value) if 65004 in tags else fx
    sx = _float(tags[65009].value)
    sy = _float(tags[65010].value) if 65010 in tags else sx
    if not fx or not fy:
        return VendorInfo(None, None, None, "Gatan private tags")
    return VendorInfo(make(sx * fx, sy * fy, "instrument", "Gatan private tags 65003/65009"), None, None,
                      "Gatan private tags")


# -- Olympus soft-imaging --------------------------------------------------------


def olympus_sis(tif) -> VendorInfo | None:
    """Olympus soft-imaging tags 33560/33471 via ``TiffFile.sis_metadata`` (pixel size in m)."""
    if not getattr(tif, "is_sis", False):
        return None
    meta = tif.sis_metadata or {}
    px, py = _float(meta.get("pixelsizex")), _float(meta.get("pixelsizey"))
    if not (py > 0):
        py = px
    mag = _float(meta.get("magnification"))
    return VendorInfo(make(px * 1e9, py * 1e9, "instrument", "Olympus soft-imaging tag, pixelsizex", mag),
                      None, None, "Olympus soft-imaging tags")


# -- TVIPS ------------------------------------------------------------------------

#: A TVIPS pixel size under this is in m (tifffile before 2023 converted the header's nm to m), else in nm.
TVIPS_METRE_BELOW = 1e-3


def tvips(tif) -> VendorInfo | None:
    """TVIPS camera header in tag 37706 via ``TiffFile.tvips_metadata``: ``PixelSizeX/Y`` (version 2).

    The header's version 2 states the pixel size in nm (tifffile since 2023 passes it on as is; earlier
    releases converted it to m, told here by its size); a version-1 header states none.
    """
    if not getattr(tif, "is_tvips", False):
        return None
    meta = tif.tvips_metadata or {}
    px, py = _float(meta.get("PixelSizeX")), _float(meta.get("PixelSizeY"))
    if not (px > 0):
        return VendorInfo(None, None, None, "TVIPS header")
    if not (py > 0):
        py = px
    factor = 1e9 if px < TVIPS_METRE_BELOW else 1.0
    return VendorInfo(make(px * factor, py * factor, "instrument", "TVIPS header tag 37706, PixelSizeX"),
                      None, None, "TVIPS header")


def read(tif, page) -> VendorInfo | None:
    """The first maker's metadata found in a TIFF page, or None."""
    for probe in (lambda: fei(tif), lambda: zeiss(tif, page), lambda: tescan(page), lambda: jeol(tif, page),
                  lambda: gatan(page), lambda: olympus_sis(tif), lambda: tvips(tif)):
        info = probe()
        if info is not None:
            return info
    return None
