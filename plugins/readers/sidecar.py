"""The text file an SEM writes beside each image (same name, ``.txt``).

The image itself (TIFF, BMP or JPEG) carries no calibration, so the reader
of the image consults this file; its source label is ``instrument``. Two
layouts are known:

- Hitachi: INI-like, a ``[SemImageFile]`` section with ``PixelSize`` (nm
  per pixel), ``DataSize`` (``1280x960``: the scanned image, without the
  info strip saved below it) and ``Magnification``;
- JEOL SEM: ``$KEY value`` lines; the scale bar's length in pixels
  (``$$SM_MICRON_BAR 160``) and in length units (``$$SM_MICRON_MARKER
  5um``) give the pixel size (the bar length is a whole number of pixels,
  so the size is known to about 1/bar, 0.6 % for a 160-px bar);
  ``$CM_FULL_SIZE 1280 960`` is the scanned image and ``$CM_MAG`` the
  magnification;
- Tescan SEM: ``NAME-tif.hdr`` (or ``NAME.hdr``) with the same
  ``PixelSizeX=5.5e-9`` (m) lines as its TIFF tag 50431 (for exports
  without the tag).

As a plugin (``read-sem-text``) this module recognises such a text file
when it is an input itself (a glob like ``**/*`` matches it) and lists no
frames for it: its image is read, with it, by the image's reader.
"""

from __future__ import annotations

import math
import os
import re
from dataclasses import dataclass

from grainhabit import hookimpl

from .calibration import Calibration, make, unit_to_nm

GRAINHABIT_API = 1
__version__ = "1.0"
NAME = "read-sem-text"

#: Suffixes of the images such a text file belongs to.
IMAGE_SUFFIXES = (".tif", ".tiff", ".bmp", ".jpg", ".jpeg", ".png")

#: Section header that identifies such a file.
HEADER = "[SemImageFile]"


@dataclass(frozen=True)
class SidecarInfo:
    """What the text file says (see :class:`.vendor_tiff.VendorInfo`)."""

    calibration: Calibration | None
    image_rows: int | None = None
    strip_rows: int | None = None
    maker: str = "Hitachi SEM text file"


def path_for(image_path: str) -> str | None:
    """The text file beside an image (``NAME.txt``, ``NAME-tif.hdr``, ``NAME.hdr``, any case), or None."""
    stem, ext = os.path.splitext(image_path)
    for tail in (".txt", f"-{ext.lstrip('.').lower()}.hdr", ".hdr"):
        for candidate in (stem + tail, stem + tail.upper()):
            if os.path.isfile(candidate):
                return candidate
    return None


def parse(text: str) -> dict:
    """``key=value`` lines of the ``[SemImageFile]`` section."""
    out = {}
    for line in text.splitlines():
        key, sep, value = line.partition("=")
        if sep:
            out.setdefault(key.strip(), value.strip())
    return out


def read(image_path: str) -> SidecarInfo | None:
    """Calibration and scanned height from the text file beside an image, or None."""
    txt = path_for(image_path)
    if txt is None:
        return None
    try:
        with open(txt, encoding="utf-8", errors="replace") as fh:
            text = fh.read(200_000)
    except OSError:
        return None
    if HEADER not in text:
        if "$$SM_MICRON_BAR" in text:
            return _jeol(text, os.path.basename(txt))
        if "PixelSizeX=" in text:
            return _tescan(text, os.path.basename(txt))
        return None
    kv = parse(text)
    try:
        px = float(kv.get("PixelSize", "nan"))
    except ValueError:
        px = math.nan
    m = re.match(r"\s*(\d+)\s*[xX*]\s*(\d+)", kv.get("DataSize", ""))
    rows = int(m.group(2)) if m else None
    try:
        mag = float(kv.get("Magnification", "nan").split()[0])
    except (ValueError, IndexError):
        mag = math.nan
    cal = make(px, px, "instrument", f"{os.path.basename(txt)}, PixelSize", mag, "sem")
    return SidecarInfo(cal, rows)


def _jeol(text: str, name: str) -> SidecarInfo:
    """JEOL SEM ``$KEY value`` lines: scale bar pixels and length, scanned size, magnification."""
    kv = {}
    for line in text.splitlines():
        parts = line.strip().split(None, 1)
        if len(parts) == 2 and parts[0].startswith("$"):
            kv.setdefault(parts[0].lstrip("$"), parts[1].strip())
    bar_px = _number(kv.get("SM_MICRON_BAR"))
    marker = re.match(r"\s*([0-9.]+)\s*([^\s0-9.]+)", kv.get("SM_MICRON_MARKER", ""))
    size = math.nan
    if marker and bar_px > 0:
        factor = unit_to_nm(marker.group(2))
        if factor:
            size = float(marker.group(1)) * factor / bar_px
    full = re.match(r"\s*(\d+)\s+(\d+)", kv.get("CM_FULL_SIZE", ""))
    cal = make(size, size, "instrument", f"{name}, scale bar $$SM_MICRON_MARKER over $$SM_MICRON_BAR",
               _number(kv.get("CM_MAG")), "sem")
    return SidecarInfo(cal, int(full.group(2)) if full else None, None, "JEOL SEM text file")


def _number(value) -> float:
    try:
        return float(str(value).split()[0])
    except (ValueError, IndexError, TypeError):
        return math.nan


def _is_sem_text(path: str) -> bool:
    if not path.lower().endswith((".txt", ".hdr")) or not os.path.isfile(path):
        return False
    try:
        with open(path, encoding="utf-8", errors="replace") as fh:
            start = fh.read(4000)
    except OSError:
        return False
    return HEADER in start or "$$SM_MICRON_BAR" in start or "$CM_FORMAT" in start or "PixelSizeX=" in start


@hookimpl
def grainhabit_list_frames(path: str, options: dict):
    """An SEM text file is recognised with no frames of its own when its image lies beside it."""
    if not _is_sem_text(path):
        return None
    stem = os.path.splitext(path)[0]
    stems = {stem, re.sub(r"-(tif|tiff|png|jpg|jpeg|bmp)$", "", stem, flags=re.IGNORECASE)}
    if any(os.path.isfile(st + ext) or os.path.isfile(st + ext.upper()) for st in stems for ext in IMAGE_SUFFIXES):
        return []
    raise ValueError(f"{path}: an SEM text file whose image (same name, .tif/.bmp/.jpg/.png) is missing")


def _tescan(text: str, name: str) -> SidecarInfo:
    """Tescan ``key=value`` lines: ``PixelSizeX/Y`` (m), ``Magnification``, ``ImageStripSize`` (rows)."""
    from .vendor_tiff import tescan_text

    info = tescan_text(text, f"{name}, PixelSizeX")
    return SidecarInfo(info.calibration, None, info.strip_rows, "Tescan text file")
