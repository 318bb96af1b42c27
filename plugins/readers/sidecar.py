"""The text file a Hitachi SEM writes beside each image (same name, ``.txt``).

The file is INI-like: a ``[SemImageFile]`` section with ``PixelSize`` (nm
per pixel), ``DataSize`` (``1280x960``: the scanned image, without the info
strip saved below it) and ``Magnification``. The image itself (TIFF, BMP or
JPEG) carries no calibration, so the reader of the image consults this
file; its source label is ``instrument``.
"""

from __future__ import annotations

import math
import os
import re
from dataclasses import dataclass

from .calibration import Calibration, make

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
    """The text file beside an image (``.txt`` or ``.TXT``), or None."""
    stem = os.path.splitext(image_path)[0]
    for ext in (".txt", ".TXT"):
        if os.path.isfile(stem + ext):
            return stem + ext
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
