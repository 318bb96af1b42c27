"""Flat drawn panels of a figure: the box behind a panel letter, a data bar holding text.

A micrograph exported into a figure often carries rectangles filled with one
flat colour: a white box behind the panel letter "(a)", a black data bar with
the microscope's settings written in it. Their fill has none of the detector
noise that every imaged region carries, and it is a rectangle aligned with
the frame. Large and at the end of the grey scale, such a box passes for the
brightest (or darkest) grain of the frame: it sets the grain level the frame
is normalised by, and its text passes for grains.

A *panel* here is a connected region of *flat* pixels (the 3 x 3
neighbourhood's range within :data:`FLAT_TOLERANCE` of the frame's grey
range), closed over its text (:data:`CLOSE_PX`) and its holes filled, that

- fills at least :data:`MIN_FILL` of its axis-aligned bounding box,
- is flat over at least :data:`MIN_FLAT` of that box,
- holds something drawn in it: at least :data:`MIN_TEXT` of the box is not
  flat (the text, the letter),
- spans at least :data:`MIN_SIDE_PX` per side and :data:`MIN_BOX_PX`
  pixels, and at most :data:`MAX_SHARE` of the frame.

A grain whose core is clipped flat to black or white is no panel: its outline
is round or faceted (it does not fill an aligned box), or it holds nothing
drawn. On the 357 EMPS training images (B. Yildirim, J. M. Cole, J. Chem.
Inf. Model. 61 (2021) 1136) panels were found in 49, none of them over a
hand-masked particle.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage as ndi

#: A pixel is flat when its 3 x 3 neighbourhood spans at most this fraction of the frame's grey range.
FLAT_TOLERANCE = 0.01
#: Radius (px) of the closing that joins a panel's flat fill across its text strokes.
CLOSE_PX = 2
#: Least fraction of its bounding box a panel fills (after the closing and hole filling).
MIN_FILL = 0.9
#: Least fraction of its bounding box that is flat.
MIN_FLAT = 0.4
#: Least fraction of its bounding box that is drawn in it (not flat): a panel holds text or a letter.
MIN_TEXT = 0.01
#: Smallest side (px) and area (px) of a panel's box.
MIN_SIDE_PX = 8
MIN_BOX_PX = 300
#: Largest share of the frame a panel's box covers (a flat background is no panel).
MAX_SHARE = 0.25
#: Side (px) of the blocks screened first: only groups of blocks flat as a whole are looked at closely ...
BLOCK_PX = 4
#: ... in their box grown by this margin (px).
MARGIN_PX = 16


def flat_pixels(image: np.ndarray, tolerance: float) -> np.ndarray:
    """Pixels whose 3 x 3 neighbourhood spans at most ``tolerance``.

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
    tolerance : float
        In the image's units.

    Returns
    -------
    ndarray of bool, shape (rows, cols)
    """
    a = np.asarray(image, np.float32)
    return (ndi.maximum_filter(a, 3) - ndi.minimum_filter(a, 3)) <= tolerance


def drawn_panels(image: np.ndarray, span: float | None = None) -> np.ndarray:
    """Mask of the flat drawn panels of a frame (box and what is drawn in it).

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
        The frame as read (no smoothing).
    span : float, optional
        The frame's grey range (default: max - min of ``image``).

    Returns
    -------
    ndarray of bool, shape (rows, cols)
        True inside every panel's filled region; all False when the frame
        has none (as any frame with noise everywhere).

    Notes
    -----
    Blocks of :data:`BLOCK_PX` pixels that are flat as a whole are looked
    for first (one pass of block maxima and minima); the pixel test runs
    only in the boxes of their groups, grown by :data:`MARGIN_PX`, so a
    frame with noise everywhere costs one pass.
    """
    a = np.asarray(image)
    out = np.zeros(a.shape, bool)
    if a.ndim != 2 or min(a.shape) < 2 * BLOCK_PX:
        return out
    if span is None:
        span = float(np.max(a)) - float(np.min(a))
    if span <= 0:
        return out
    tol = FLAT_TOLERANCE * span
    b = BLOCK_PX
    rb, cb = a.shape[0] // b, a.shape[1] // b
    flat_blocks = _block_range(a[:rb * b, :cb * b], b) <= tol
    if not flat_blocks.any():
        return out
    groups, _ = ndi.label(flat_blocks, structure=np.ones((3, 3), bool))
    min_blocks = MIN_FLAT * MIN_BOX_PX / (b * b)
    sizes = np.bincount(groups.ravel())
    for k, sl in enumerate(ndi.find_objects(groups), start=1):
        if sl is None or sizes[k] < min_blocks:
            continue
        r0, r1 = max(sl[0].start * b - MARGIN_PX, 0), min(sl[0].stop * b + MARGIN_PX, a.shape[0])
        c0, c1 = max(sl[1].start * b - MARGIN_PX, 0), min(sl[1].stop * b + MARGIN_PX, a.shape[1])
        cut = (r0 > 0, r1 < a.shape[0], c0 > 0, c1 < a.shape[1])
        out[r0:r1, c0:c1] |= _panels_in(a[r0:r1, c0:c1], tol, a.size, cut)
    return out


def _block_range(a: np.ndarray, b: int) -> np.ndarray:
    """max - min over the b x b blocks of ``a`` (sides multiples of b), as float64."""
    hi = np.maximum.reduce([a[i::b] for i in range(b)])
    lo = np.minimum.reduce([a[i::b] for i in range(b)])
    hi = np.maximum.reduce([hi[:, j::b] for j in range(b)])
    lo = np.minimum.reduce([lo[:, j::b] for j in range(b)])
    return hi.astype(np.float64) - lo


def _panels_in(a: np.ndarray, tol: float, frame_px: int, cut: tuple = (False,) * 4) -> np.ndarray:
    """The pixel test of :func:`drawn_panels` on one window of the frame.

    ``frame_px`` is the frame's size; ``cut`` tells which window edges (top, bottom, left, right) lie
    inside the frame: a region reaching such an edge goes on beyond the window, and is left out (its
    box seen here is no box of its own).
    """
    out = np.zeros(a.shape, bool)
    flat = flat_pixels(a, tol)
    disc = np.ones((2 * CLOSE_PX + 1,) * 2, bool)
    closed = ndi.binary_fill_holes(ndi.binary_closing(flat, disc) | flat)
    lab, n = ndi.label(closed, structure=np.ones((3, 3), bool))
    for k, sl in enumerate(ndi.find_objects(lab), start=1):
        h, w = sl[0].stop - sl[0].start, sl[1].stop - sl[1].start
        box = h * w
        if min(h, w) < MIN_SIDE_PX or box < MIN_BOX_PX or box > MAX_SHARE * frame_px:
            continue
        if ((cut[0] and sl[0].start == 0) or (cut[1] and sl[0].stop == a.shape[0])
                or (cut[2] and sl[1].start == 0) or (cut[3] and sl[1].stop == a.shape[1])):
            continue
        comp = lab[sl] == k
        fl = flat[sl] & comp
        n_comp, n_flat = int(comp.sum()), int(fl.sum())
        if n_comp >= MIN_FILL * box and n_flat >= MIN_FLAT * box and n_comp - n_flat >= MIN_TEXT * box:
            out[sl] |= comp
    return out
