"""Annotations burnt into synthetic micrographs: a scale bar with its length written above it, and a
panel letter, drawn in a dot-matrix type of this project's own design.

Micrographs taken from papers and reports often carry such marks in the pixels themselves; a grain
finder must not take them for grains. This module draws them on top of a rendered field (after the
noise, as software adds them) in full white or full black, only where no grain lies nearby, and
returns where each mark lies, so that a benchmark can tell which marks were taken for grains. The
glyph shapes are invented for these test images.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage

__all__ = ["GLYPHS", "text_mask", "scale_bar_length_nm", "Annotations", "burn_in"]

#: 5 x 7 dot-matrix glyphs ('#' a dot), drawn for these test images.
GLYPHS = {
    "0": (".###.", "#...#", "#..##", "#.#.#", "##..#", "#...#", ".###."),
    "1": ("..#..", ".##..", "..#..", "..#..", "..#..", "..#..", ".###."),
    "2": (".###.", "#...#", "....#", "...#.", "..#..", ".#...", "#####"),
    "3": ("####.", "....#", "....#", ".###.", "....#", "....#", "####."),
    "4": ("...#.", "..##.", ".#.#.", "#..#.", "#####", "...#.", "...#."),
    "5": ("#####", "#....", "####.", "....#", "....#", "#...#", ".###."),
    "6": ("..##.", ".#...", "#....", "####.", "#...#", "#...#", ".###."),
    "7": ("#####", "....#", "...#.", "..#..", ".#...", ".#...", ".#..."),
    "8": (".###.", "#...#", "#...#", ".###.", "#...#", "#...#", ".###."),
    "9": (".###.", "#...#", "#...#", ".####", "....#", "...#.", ".##.."),
    "n": (".....", ".....", "#.##.", "##..#", "#...#", "#...#", "#...#"),
    "m": (".....", ".....", "##.#.", "#.#.#", "#.#.#", "#.#.#", "#.#.#"),
    "u": (".....", "#...#", "#...#", "#...#", "#..##", "###.#", "#...."),
    "a": (".....", ".....", ".###.", "....#", ".####", "#...#", ".####"),
    "b": ("#....", "#....", "#.##.", "##..#", "#...#", "#...#", "####."),
    "c": (".....", ".....", ".###.", "#....", "#....", "#...#", ".###."),
    "d": ("....#", "....#", ".##.#", "#..##", "#...#", "#...#", ".####"),
    " ": (".....",) * 7,
}


def text_mask(text: str, dot_px: int) -> np.ndarray:
    """Pixels of a line of text in the dot-matrix type.

    Parameters
    ----------
    text : str
        Characters of :data:`GLYPHS` (``'u'`` stands for the micro sign).
    dot_px : int
        Side of one dot in pixels (>= 1); a glyph is 5 x 7 dots, one dot apart.

    Returns
    -------
    ndarray of bool, shape (7 dot_px, (6 len(text) - 1) dot_px)
    """
    dot = int(dot_px)
    if dot < 1:
        raise ValueError(f"dot_px must be >= 1, got {dot_px!r}")
    bad = sorted(set(text) - set(GLYPHS))
    if bad or not text:
        raise ValueError(f"text must be non-empty and use only {''.join(sorted(GLYPHS))!r}, got {text!r}")
    cells = []
    for k, ch in enumerate(text):
        cells.append(np.array([[c == "#" for c in row] for row in GLYPHS[ch]], dtype=bool))
        if k < len(text) - 1:
            cells.append(np.zeros((7, 1), bool))
    dots = np.hstack(cells)
    return np.kron(dots, np.ones((dot, dot), bool))


def scale_bar_length_nm(width_nm: float) -> float:
    """A round scale-bar length near a sixth of the field width.

    Parameters
    ----------
    width_nm : float
        Field width (nm), > 0.

    Returns
    -------
    float
        The largest of 1, 2, 2.5 or 5 times a power of ten (nm) not above
        ``width_nm / 6`` (the usual choice of round lengths; common practice).
    """
    if not (np.isfinite(width_nm) and width_nm > 0):
        raise ValueError(f"width_nm must be > 0, got {width_nm!r}")
    target = width_nm / 6.0
    p = 10.0 ** np.floor(np.log10(target))
    return float(max(m * p for m in (1.0, 2.0, 2.5, 5.0) if m * p <= target))


def _length_text(nm: float) -> str:
    if nm >= 1000:
        v = nm / 1000
        return f"{v:g} um"
    return f"{nm:g} nm"


@dataclass
class Annotations:
    """Where the burnt-in marks lie.

    Attributes
    ----------
    labels : ndarray of int32, shape (rows, cols)
        0 where no mark is; k for the pixels of mark k (1-based).
    kinds : list of str
        Kind of mark k at index k - 1: ``'scale_bar'``, ``'scale_text'`` or ``'panel_letter'``.
    skipped : int
        Marks left out because every place tried lay near a grain.
    """

    labels: np.ndarray
    kinds: list = field(default_factory=list)
    skipped: int = 0


def _free_spot(busy: np.ndarray, h: int, w: int, corners, rng, inset: int, tries: int = 200):
    """Top-left (row, col) of an h x w box that holds no busy pixel: the corners first, then random."""
    rows, cols = busy.shape
    if h + 2 * inset > rows or w + 2 * inset > cols:
        return None
    where = {"tl": (inset, inset), "tr": (inset, cols - inset - w), "bl": (rows - inset - h, inset),
             "br": (rows - inset - h, cols - inset - w)}
    spots = [where[c] for c in corners]
    spots += [(int(rng.integers(inset, rows - inset - h + 1)), int(rng.integers(inset, cols - inset - w + 1)))
              for _ in range(tries)]
    for r, c in spots:
        if not busy[r:r + h, c:c + w].any():
            return r, c
    return None


def burn_in(image: np.ndarray, grain_labels: np.ndarray, pixel_size_nm: float, seed: int = 0,
            panel: str = "a", clear_px: int = 6) -> tuple[np.ndarray, Annotations]:
    """Burn a scale bar, its length and a panel letter into an image.

    Parameters
    ----------
    image : ndarray of float, shape (rows, cols)
        Nominal [0, 1] image (left unchanged; a copy is returned).
    grain_labels : ndarray of int, shape (rows, cols)
        Truth labels of the grains; marks keep ``clear_px`` pixels away from them.
    pixel_size_nm : float
        For the scale bar's length.
    seed : int
        Seed of the colour (white or black) and of the places tried after the corners.
    panel : str
        The panel letter (one of ``'abcd'``); ``''`` for none.
    clear_px : int
        Least distance (pixels) between a mark and any grain.

    Returns
    -------
    image : ndarray of float32
    annotations : Annotations

    Notes
    -----
    The bar is ``length / pixel_size_nm`` pixels long and about 1 % of the
    field width thick, in a lower corner; the text above it has dots of
    ``cols / 400`` px (a line is 7 dots high); the panel letter's dots are
    ``cols / 150`` px, in an upper corner. Where a corner is near a grain,
    random places are tried. Marks are drawn with value 1 or 0 (the same
    for all marks of a frame).
    """
    img = np.array(image, dtype=np.float32, copy=True)
    rows, cols = img.shape
    rng = np.random.default_rng((int(seed), 0xA77))
    colour = 1.0 if rng.random() < 0.5 else 0.0
    busy = ndimage.binary_dilation(np.asarray(grain_labels) > 0, np.ones((2 * clear_px + 1,) * 2, bool))
    labels = np.zeros((rows, cols), np.int32)
    kinds: list[str] = []
    skipped = 0
    inset = max(8, cols // 60)

    length_nm = scale_bar_length_nm(cols * pixel_size_nm)
    bar_w = max(int(round(length_nm / pixel_size_nm)), 4)
    bar_h = max(3, int(round(cols / 110)))
    text = text_mask(_length_text(length_nm), max(1, int(round(cols / 400))))
    gap = max(2, text.shape[0] // 4)
    h = text.shape[0] + gap + bar_h
    w = max(bar_w, text.shape[1])
    spot = _free_spot(busy, h, w, ("br", "bl"), rng, inset)
    if spot is None:
        skipped += 2
    else:
        r, c = spot
        tc = c + (w - text.shape[1]) // 2
        labels[r:r + text.shape[0], tc:tc + text.shape[1]][text] = len(kinds) + 1
        kinds.append("scale_text")
        bc = c + (w - bar_w) // 2
        labels[r + text.shape[0] + gap:r + h, bc:bc + bar_w] = len(kinds) + 1
        kinds.append("scale_bar")
        busy[max(r - clear_px, 0):r + h + clear_px, max(c - clear_px, 0):c + w + clear_px] = True
    if panel:
        letter = text_mask(panel, max(2, int(round(cols / 150))))
        spot = _free_spot(busy, *letter.shape, ("tl", "tr"), rng, inset)
        if spot is None:
            skipped += 1
        else:
            r, c = spot
            labels[r:r + letter.shape[0], c:c + letter.shape[1]][letter] = len(kinds) + 1
            kinds.append("panel_letter")
    img[labels > 0] = colour
    return img, Annotations(labels=labels, kinds=kinds, skipped=skipped)
