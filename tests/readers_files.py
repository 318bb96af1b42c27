"""Builders of small instrument-style files for the reader tests.

Each writes a file in the layout a microscope maker's software uses, with
the values found in real files of that maker (the real files themselves
never enter the repository). Plain module, imported by the reader tests.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import tifffile

OPTS = {"max_pixels": 10_000_000, "pixel_size_nm": None, "calibration": "auto"}


def noisy(shape, seed=0, mean=90, sd=12, dtype=np.uint8) -> np.ndarray:
    """A micrograph-like field: Gaussian noise around ``mean`` (no two rows flat)."""
    rng = np.random.default_rng(seed)
    info = np.iinfo(dtype)
    return np.clip(rng.normal(mean, sd, shape), info.min + 1, info.max - 1).astype(dtype)


def with_info_strip(image: np.ndarray, rows: int, background: int = 40, ink: int | None = None) -> np.ndarray:
    """``image`` with an instrument-style strip appended: flat background, text-like strokes, a frame line."""
    ink = int(np.iinfo(image.dtype).max) if ink is None else ink
    strip = np.full((rows, image.shape[1]), background, image.dtype)
    strip[0, :] = ink  # frame line
    for k, c0 in enumerate(range(6, image.shape[1] - 20, 24)):  # "letters": short strokes
        r0 = min(3 + (k % 3), rows - 2)
        strip[r0:r0 + 7, c0] = ink
        strip[min(r0 + 3, rows - 1), c0:c0 + 5] = ink
    return np.concatenate([image, strip], axis=0)


def write_fei(path: Path, rows=60, strip=8, cols=64, field_factor=1.0) -> Path:
    """FEI/Thermo SEM TIFF: INI text in tag 34682 (values of a real Helios file, 3.3724 µm pixels)."""
    image = with_info_strip(noisy((rows, cols)), strip)
    hfw = 3.3724e-06 * cols * field_factor
    text = ("[User]\r\nDate=06/13/2016\r\n[Scan]\r\nPixelWidth=3.3724e-06\r\nPixelHeight=3.3724e-06\r\n"
            f"HorFieldsize={hfw:.6g}\r\n[Image]\r\nResolutionX={cols}\r\nResolutionY={rows}\r\n"
            f"MagCanvasRealWidth={0.2072 * cols / 512:.6g}\r\n")
    tifffile.imwrite(path, image, resolution=(64, 64), resolutionunit="INCH",
                     extratags=[(34682, "s", 0, text, True)])
    return path


def write_zeiss(path: Path, cols=64, rows=48) -> Path:
    """Zeiss SEM TIFF: tag 34118 text (a real file: 5.965 µm wide, its 'Pixel Size' of the 1024-px store)."""
    width_um = 11.6504e-3 * cols
    text = ("0\r\n0\r\n0\r\n5.824988e-009\r\n5.000000e+004\r\n6\r\n1\r\n"
            "AP_WIDTH\r\nWidth = %.4f \xb5m\r\nAP_HEIGHT\r\nHeight = %.4f \xb5m\r\n"
            "AP_MAG\r\nMag =  50.00 K X\r\nAP_PIXEL_SIZE\r\nPixel Size = 5.825 nm\r\n"
            % (width_um, 11.6504e-3 * rows))
    tifffile.imwrite(path, noisy((rows, cols)), resolution=(1, 1), resolutionunit="NONE",
                     extratags=[(34118, "s", 0, text.encode("latin-1"), True)])
    return path


def write_tescan(path: Path, px_m="5.5000e-9", mag="50.000e3", cols=64, rows=48, strip=10) -> Path:
    """Tescan SEM TIFF: tag 50431 (thumbnail bytes, then key=value text; a real file: 5.5 nm, 50 kx)."""
    image = with_info_strip(noisy((rows, cols), dtype=np.uint16, mean=9000, sd=900), strip, background=20000)
    text = (f"AccFrames=1\r\nDevice=VEGA3 SBU\r\nImageStripSize={strip}\r\nMagnification={mag}\r\n"
            f"PixelSizeX={px_m}\r\nPixelSizeY={px_m}\r\nTagRevision=2\r\n")
    blob = b"\x00\x0cjP  \r\n\x87\n" + bytes(range(256)) + text.encode("ascii")
    # 109.6 dpi resolution tags as the real files carry them (a screen setting)
    tifffile.imwrite(path, image, resolution=(4294967295 / 39190872,) * 2, resolutionunit="INCH",
                     extratags=[(50431, "B", len(blob), blob, True)])
    return path


def write_jeol(path: Path, mode="MAG", selector="150000") -> Path:
    """JEOL TEM TIFF: TemReporter XML in ImageDescription, 93 dpi image-plane pitch (a real file: 1.8208 nm)."""
    xml = ('<?xml version="1.0"?>\n<TemReporter>\n  <Eos><EosMode>eosTEM</EosMode></Eos>\n'
           f'  <ImageFormingSystem><ModeString>{mode}</ModeString><SelectorValue>{selector}</SelectorValue>'
           '<SelectorUnitString>X</SelectorUnitString></ImageFormingSystem>\n</TemReporter>')
    tifffile.imwrite(path, noisy((32, 32), dtype=np.uint16, mean=3000, sd=100), description=xml,
                     resolution=(93, 93), resolutionunit="INCH", metadata=None,
                     extratags=[(271, "s", 0, "JEOL Ltd.", True)])
    return path


def write_gatan_tags(path: Path) -> Path:
    """Gatan TIFF export: private tags 65003/65004 (unit) and 65009/65010 (scale; a real file: 0.16867 µm)."""
    extratags = [(65003, "s", 0, "µm".encode("latin-1"), True), (65004, "s", 0, "µm".encode("latin-1"), True),
                 (65009, "d", 1, 0.16867469251155853, True), (65010, "d", 1, 0.16867469251155853, True)]
    tifffile.imwrite(path, noisy((32, 32)).astype(np.int32), resolution=(72, 72), resolutionunit="INCH",
                     extratags=extratags)
    return path
