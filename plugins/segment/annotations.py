"""Marks drawn on a picture (letters, digits, scale bars, boxes), told from imaged objects by their ink.

A micrograph exported into a figure carries panel letters, scale bars and
their text, drawn in a flat ink at the end of the grey scale (black or white):
their pixels sit at the frame's darkest or brightest level with none of the
detector noise that every imaged object carries. Shape tests alone miss bold
glyphs and thick bars (see :func:`grainhabit.plugins.segment.mark_shapes.annotation_kind`);
the ink test needs the raw frame, before any smoothing.

An object is a drawn mark when at least :data:`MIN_INK` of its inner pixels
(the object eroded by one pixel) lie within :data:`INK_TOLERANCE` of the
frame's range from its darkest or brightest level, and, so that a real grain
whose core is clipped to black or white is kept, its shape is not that of a
filled convex body: either the ink covers less than :data:`SOLID_INK` of the
inner pixels and at least :data:`HOLE_FRACTION` of them are far from the ink
(the background seen through the hole of a "0", "8", "a"), or the object
is not convex (solidity under :data:`GLYPH_SOLIDITY`: most letters and
digits; objects of :data:`GLYPH_MIN_AREA_PX` or more), or it is a bar: it fills
its axis-aligned bounding box (over :data:`BOX_FILL`) and is at least
:data:`BAR_ASPECT` times longer than wide. Objects in ink within half a mark's
length of a mark (a glyph cut in two, the small digits under a scale bar) go
with it.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage as ndi

#: Fraction of the frame's grey range, from either end, counted as ink.
INK_TOLERANCE = 0.02
#: Smallest fraction of inner pixels in ink for a drawn mark.
MIN_INK = 0.3
#: Above this ink fraction a convex, non-rectangular object is a clipped grain, not a mark.
SOLID_INK = 0.75
#: A hollow mark: at least HOLE_FRACTION of its inner pixels differ from the ink by over HOLE_CONTRAST of
#: the frame's range (the background seen through the hole of a "0" or an "a").
HOLE_CONTRAST = 0.3
HOLE_FRACTION = 0.15
#: Objects less solid than this (area over convex hull area, ISO 9276-6) are glyph-like.
GLYPH_SOLIDITY = 0.9
#: Objects filling more than this of their axis-aligned bounding box, and at least BAR_ASPECT times longer
#: than wide, are bars (a clipped rod is seldom that long and that well aligned with the frame).
BOX_FILL = 0.95
BAR_ASPECT = 5.0
#: Smaller objects are never called marks: a small digitised disc is neither solid nor hollow enough to judge.
GLYPH_MIN_AREA_PX = 50


def ink_levels(raw: np.ndarray) -> tuple[float, float]:
    """Grey values at or below / at or above which a pixel counts as ink.

    Parameters
    ----------
    raw : ndarray, shape (rows, cols)
        The frame as read (no smoothing).

    Returns
    -------
    low, high : float
        ``min + t (max - min)`` and ``max - t (max - min)``, ``t`` =
        :data:`INK_TOLERANCE`; equal ends for a constant frame.
    """
    lo, hi = float(np.min(raw)), float(np.max(raw))
    span = hi - lo
    return lo + INK_TOLERANCE * span, hi - INK_TOLERANCE * span


def is_drawn(part: np.ndarray, raw: np.ndarray, low: float, high: float, background: float | None = None) -> bool:
    """Whether one object is a drawn mark.

    Parameters
    ----------
    part : ndarray of bool, shape (h, w)
        The object (holes filled), cropped.
    raw : ndarray, shape (h, w)
        The raw frame over the same crop.
    low, high : float
        Ink levels from :func:`ink_levels`.
    background : float, optional
        The frame's background grey level (median of the pixels outside every
        object). A hole shows the background: inner pixels count as hole
        pixels only within ``HOLE_CONTRAST`` of the range from it, so that a
        faceted grain with one facet clipped to white and the others grey is
        not taken for a hollow glyph. Unset: any pixel far from the ink counts.

    Returns
    -------
    bool
    """
    from skimage.morphology import convex_hull_image

    if high <= low:
        return False
    inner = ndi.binary_erosion(part)
    if inner.sum() < 4:
        inner = part
    vals = raw[inner]
    dark, bright = float(np.mean(vals <= low)), float(np.mean(vals >= high))
    ink = max(dark, bright)
    if ink < MIN_INK:
        return False
    if part.sum() < GLYPH_MIN_AREA_PX:
        # too small to tell a glyph's shape from a digitised grain's (rows of small text: text_rows)
        return False
    if ink < SOLID_INK:
        # a hollow glyph shows the background through its hole; a grain partly clipped is dark (or
        # bright) all over
        span = (high - low) / (1.0 - 2.0 * INK_TOLERANCE)
        end = low if dark >= bright else high
        hole = np.abs(vals - end) > HOLE_CONTRAST * span
        if background is not None:
            hole &= np.abs(vals - background) <= HOLE_CONTRAST * span
        return float(np.mean(hole)) >= HOLE_FRACTION
    rows, cols = np.nonzero(part)
    h, w = rows.max() - rows.min() + 1, cols.max() - cols.min() + 1
    area = float(part.sum())
    if area >= BOX_FILL * h * w and max(h, w) >= BAR_ASPECT * min(h, w):
        return True
    return area < GLYPH_SOLIDITY * float(convex_hull_image(part).sum())


def drawn_labels(labels: np.ndarray, raw: np.ndarray) -> np.ndarray:
    """Labels of a segmentation that are drawn marks.

    Parameters
    ----------
    labels : ndarray of int, shape (rows, cols)
        Grains 1..n.
    raw : ndarray, shape (rows, cols)
        The frame as read.

    Returns
    -------
    ndarray of int
        The labels :func:`is_drawn` calls marks.
    """
    raw = np.asarray(raw)
    if raw.shape != labels.shape:
        raise ValueError(f"raw frame shape {raw.shape} differs from the labels' shape {labels.shape}")
    # the frame stays in its own type (a whole-frame float64 copy costs more than the rest); comparisons
    # with the float levels promote elementwise, and every crop handed on is float64 as before
    low, high = ink_levels(raw)
    outside = raw[labels == 0]
    background = median(outside) if outside.size else None
    out, inked, reach = [], [], 0.0
    boxes = ndi.find_objects(labels)
    # only objects holding an ink pixel at all can be marks (one pass over the frame, not one per object)
    has_ink = np.bincount(labels[(raw <= low) | (raw >= high)].ravel(), minlength=len(boxes) + 1) > 0
    for k, sl in enumerate(boxes, start=1):
        if sl is None or not has_ink[k]:
            continue
        part = labels[sl] == k
        crop = np.asarray(raw[sl], np.float64)
        if is_drawn(part, crop, low, high, background):
            out.append(k)
            reach = max(reach, 0.5 * max(sl[0].stop - sl[0].start, sl[1].stop - sl[1].start))
        elif ink_fraction(part, crop, low, high) >= MIN_INK:
            inked.append(k)
    if out and inked:
        # pieces of a mark (a glyph cut in two, a dot) and the text of a scale bar: in ink and within half
        # a mark's length of one
        near = ndi.distance_transform_edt(~np.isin(labels, out)) <= max(reach, 2.0)
        out += [k for k in inked if near[boxes[k - 1]][labels[boxes[k - 1]] == k].any()]
    return np.asarray(sorted(out), np.int64)


def ink_fraction(part: np.ndarray, raw: np.ndarray, low: float, high: float) -> float:
    """Fraction of an object's inner pixels (eroded by one pixel) at either ink level."""
    inner = ndi.binary_erosion(part)
    if inner.sum() < 4:
        inner = part
    vals = raw[inner]
    return max(float(np.mean(vals <= low)), float(np.mean(vals >= high)))


def median(values: np.ndarray) -> float:
    """``float(numpy.median(values))``, from a histogram when the values are 8 or 16 bit unsigned integers.

    Parameters
    ----------
    values : ndarray
        At least one value.

    Returns
    -------
    float
        The middle value, or the mean of the two middle values of an even
        count (as numpy). For 8/16-bit unsigned integers the counts of every level
        (``numpy.bincount``) give it without sorting: equal to numpy's, 5-10x
        faster on the millions of background pixels of a frame.
    """
    values = np.asarray(values).ravel()
    if values.dtype.kind != "u" or values.dtype.itemsize > 2:
        return float(np.median(values))
    counts = np.cumsum(np.bincount(values))
    n = values.size
    lo = int(np.searchsorted(counts, (n - 1) // 2, side="right"))
    hi = int(np.searchsorted(counts, n // 2, side="right"))
    return (float(lo) + float(hi)) / 2.0
