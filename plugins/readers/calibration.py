"""Pixel calibration shared by the reader plugins.

A reader finds the candidate calibrations a file offers and keeps the first
in the order of the design contract (``input.calibration: auto``):

1. ``instrument``: the microscope's own metadata (vendor TIFF tags and text
   blocks, DM3/DM4, EMD, SER/EMI, MRC headers, ELID);
2. ``ome``: OME-XML ``PhysicalSizeX/Y`` with their units;
3. ``tiff-description``: a length unit written into the TIFF description
   text together with the resolution tags (or an explicit scale);
4. ``tiff-resolution``: TIFF resolution tags in pixels per centimetre, or
   per inch where the value cannot be a screen or print setting;
5. ``workflow``: ``input.pixel_size_nm`` (applied by the host when a reader
   returns NaN).

:func:`finish` turns a frame's pixels and its chosen :class:`Calibration`
into a :class:`FrameData`: it applies ``input.calibration: override``,
checks the pixel size against the file's own magnification, and resamples
non-square pixels to square ones (or refuses them with a reason).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

#: nm per unit, for the unit spellings found in instrument files, OME-XML and
#: description texts (lower case).
UNIT_NM = {
    "pm": 1e-3, "picometer": 1e-3, "picometre": 1e-3,
    "a": 0.1, "å": 0.1, "\u212b": 0.1, "angstrom": 0.1, "ångström": 0.1, "angstroms": 0.1,
    "nm": 1.0, "nanometer": 1.0, "nanometre": 1.0, "nanometers": 1.0,
    "µm": 1e3, "μm": 1e3, "um": 1e3, "micron": 1e3, "microns": 1e3, "micrometer": 1e3, "micrometre": 1e3,
    "micrometers": 1e3, "\\u00b5m": 1e3,
    "mm": 1e6, "millimeter": 1e6, "millimetre": 1e6,
    "cm": 1e7, "centimeter": 1e7, "centimetre": 1e7,
    "m": 1e9, "meter": 1e9, "metre": 1e9, "meters": 1e9, "metres": 1e9,
}

#: The generic calibration labels of the design contract, best first.
SOURCES = ("instrument", "ome", "tiff-description", "tiff-resolution", "workflow")

#: Resolution values (dots per inch) that screens and printers use: never a
#: specimen scale (common practice; 93 dpi is a camera software's default
#: seen on a real TEM file).
SCREEN_DPI = (72, 75, 90, 93, 96, 100, 110, 120, 144, 150, 180, 200, 240, 254, 300, 360, 400, 600, 720,
              1200, 2400, 4800)

#: Densities up to this many pixels per inch are taken as screen or print settings.
MAX_SCREEN_PPI = 1200.0

#: Relative tolerance for calling pixels square.
SQUARE_TOLERANCE = 0.01

#: Largest side ratio of non-square pixels that is resampled to square ones.
MAX_RESAMPLE_RATIO = 8.0


def unit_to_nm(unit) -> float | None:
    """nm per ``unit`` (e.g. ``"µm"`` -> 1000.0), or None for an unknown unit.

    Parameters
    ----------
    unit : str or None
        Unit name or symbol, any case; surrounding blanks are ignored.

    Returns
    -------
    float or None
    """
    if unit is None:
        return None
    if isinstance(unit, bytes):
        unit = unit.decode("utf-8", "replace")
    return UNIT_NM.get(str(unit).strip().strip("\x00").lower())


def is_screen_dpi(value: float) -> bool:
    """True if a resolution in pixels per inch looks like a screen or print setting.

    Parameters
    ----------
    value : float
        Pixels per inch.

    Returns
    -------
    bool
        True for any density up to 1200 ppi (a pixel of 21 µm or more: the
        range of screens, cameras' "dpi" fields and office printers), within
        0.5 % of a common print density (:data:`SCREEN_DPI`), or a whole
        number up to 4800 ppi. A specimen scale in pixels per inch is a
        large, non-round number (1 nm per pixel is 2.54e7 ppi). Common
        practice; the thresholds are this project's choice.
    """
    if not (value > 0):
        return True
    if value <= MAX_SCREEN_PPI or any(abs(value - d) <= 0.005 * d for d in SCREEN_DPI):
        return True
    return value <= 4800 and abs(value - round(value)) < 1e-6


@dataclass(frozen=True)
class Calibration:
    """A pixel size and where it came from.

    Parameters
    ----------
    x_nm, y_nm : float
        Pixel width (along columns) and height (along rows) in nm.
    source : str
        One of :data:`SOURCES`.
    detail : str
        Where in the file, for the frame's notes (e.g. ``"text tag 50431,
        PixelSizeX"``).
    magnification : float
        The file's stated magnification (NaN if none).
    kind : str
        ``"sem"`` where the magnification refers to a display or print width
        (scanning instruments); ``""`` if not known.
    """

    x_nm: float
    y_nm: float
    source: str
    detail: str = ""
    magnification: float = math.nan
    kind: str = ""

    @property
    def square(self) -> bool:
        """True if the pixels are square within :data:`SQUARE_TOLERANCE`."""
        return abs(self.x_nm - self.y_nm) <= SQUARE_TOLERANCE * max(self.x_nm, self.y_nm)

    def text(self) -> str:
        """Short description, e.g. ``"5.5 nm (instrument: text tag 50431)"``."""
        size = f"{self.x_nm:.6g} nm" if self.square else f"{self.x_nm:.6g} x {self.y_nm:.6g} nm"
        return f"{size} ({self.source}{': ' + self.detail if self.detail else ''})"


def make(x_nm, y_nm, source: str, detail: str = "", magnification=math.nan, kind: str = "") -> Calibration | None:
    """A :class:`Calibration`, or None if the sizes are not finite and positive."""
    try:
        x, y = float(x_nm), float(y_nm)
    except (TypeError, ValueError):
        return None
    if not (math.isfinite(x) and math.isfinite(y) and x > 0 and y > 0):
        return None
    try:
        mag = float(magnification)
    except (TypeError, ValueError):
        mag = math.nan
    return Calibration(x, y, source, detail, mag, kind)


def check_plausible(cal: Calibration, cols: int, where: str) -> None:
    """Refuse a pixel size that the file's own magnification rules out.

    For a scanning instrument the magnification refers the field of view
    to a display or print width: ``field width * magnification`` is that
    width, in practice between a few centimetres and about a metre (common
    practice: instruments refer to a 10-50 cm display or photo width;
    from memory). A width outside 1 cm .. 3 m means the pixel size and the
    magnification cannot both be right, and the frame is refused.

    Parameters
    ----------
    cal : Calibration
        With ``magnification`` and ``kind``; nothing is checked unless
        ``kind == "sem"`` and the magnification is known.
    cols : int
        Image width in pixels.
    where : str
        File name for the message.

    Raises
    ------
    ValueError
        If the implied display width is outside 1 cm .. 3 m.
    """
    if cal.kind != "sem" or not (cal.magnification > 0) or cols <= 0:
        return
    width_m = cal.x_nm * 1e-9 * cols * cal.magnification
    if not (0.01 <= width_m <= 3.0):
        raise ValueError(
            f"{where}: pixel size {cal.x_nm:.6g} nm is impossible at the file's magnification "
            f"{cal.magnification:.6g}x ({cols} px would span {width_m:.3g} m on the reference display)")


def resample_square(raw: np.ndarray, cal: Calibration, max_pixels: int = 0):
    """Resample an image with non-square pixels to square pixels of the finer side.

    Parameters
    ----------
    raw : ndarray, shape (rows, cols)
        Image.
    cal : Calibration
        Non-square pixel sizes.
    max_pixels : int
        Refuse if the result would exceed this many pixels (0: no limit).

    Returns
    -------
    image : ndarray of float32, shape (rows', cols')
        Linearly interpolated (scipy.ndimage.zoom, order 1) so that both
        axes have ``min(x_nm, y_nm)`` per pixel.
    size : float
        The new square pixel size in nm.
    note : str
        What was done, for the frame record.

    Raises
    ------
    ValueError
        If the side ratio exceeds :data:`MAX_RESAMPLE_RATIO` or the result
        is too large; a measurement in nm would otherwise be wrong.
    """
    from scipy import ndimage

    size = min(cal.x_nm, cal.y_nm)
    fy, fx = cal.y_nm / size, cal.x_nm / size
    ratio = max(fx, fy)
    if ratio > MAX_RESAMPLE_RATIO:
        raise ValueError(f"non-square pixels {cal.x_nm:.6g} x {cal.y_nm:.6g} nm (ratio {ratio:.3g} > "
                         f"{MAX_RESAMPLE_RATIO:g}) are refused: the frame cannot be measured in nm on both axes")
    rows, cols = raw.shape
    new_shape = (max(1, round(rows * fy)), max(1, round(cols * fx)))
    if max_pixels and new_shape[0] * new_shape[1] > max_pixels:
        raise ValueError(f"non-square pixels: resampled frame {new_shape[1]}x{new_shape[0]} px would exceed "
                         f"input.max_pixels = {max_pixels}")
    out = ndimage.zoom(raw.astype(np.float32, copy=False), (new_shape[0] / rows, new_shape[1] / cols), order=1,
                       grid_mode=True, mode="nearest")
    note = (f"non-square pixels {cal.x_nm:.6g} x {cal.y_nm:.6g} nm resampled to square {size:.6g} nm pixels "
            f"({cols}x{rows} -> {out.shape[1]}x{out.shape[0]} px, linear interpolation)")
    return out.astype(np.float32, copy=False), size, note
