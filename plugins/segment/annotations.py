"""Marks drawn on a picture (letters, digits, scale bars, boxes), told from imaged objects by their ink.

A micrograph exported into a figure carries panel letters, scale bars and
their text, drawn in a flat ink at the end of the grey scale (black or white):
their pixels sit at the frame's darkest or brightest level with none of the
detector noise that every imaged object carries. Shape tests alone miss bold
glyphs and thick bars (see :func:`grainhabit.plugins.segment.mark_shapes.annotation_kind`);
the ink test needs the raw frame, before any smoothing.

An object is a drawn mark when at least :data:`MIN_INK` of its inner pixels
(the object eroded by one pixel; a cluster the splitter cut is judged whole as
well, eroded by :data:`RIM_PX`, as a figure's resampling blurs a bold glyph's
edge: :func:`core_pixels`) lie within :data:`INK_TOLERANCE` of the
frame's range from its darkest or brightest level, and, so that a real grain
whose core is clipped to black or white is kept, its shape is not that of a
filled convex body: either the ink covers less than :data:`SOLID_INK` of the
inner pixels and at least :data:`HOLE_FRACTION` of them are far from the ink
(the background seen through the hole of a "0", "8", "a") or, for a single
object, its solidity is under :data:`PARTLY_INKED_SOLIDITY` (a letter without
a counter in a compressed figure, "K", "F", whose blurred strokes keep their ink
only inside), or the object is not convex (solidity under
:data:`GLYPH_SOLIDITY`: most letters and digits; objects of
:data:`GLYPH_MIN_AREA_PX` or more). A bar is a drawn mark
whatever share of it is ink (over :data:`MIN_INK`): it fills its axis-aligned
bounding box (over :data:`BOX_FILL`) and is at least :data:`BAR_ASPECT` times
longer than wide; so is a rectangle mostly in ink (:data:`SOLID_INK`) filling
its box to the pixel (:data:`RECT_FILL`) and :data:`RECT_ASPECT` times longer
than wide (a thick bar, a label's box). Objects in ink within half a mark's
length of a mark (a glyph cut in two, the small digits under a scale bar) go
with it. A scale bar pasted in a grey that is no end of the scale is told by
its flat colour instead: it fills its axis-aligned box like a bar and varies
along its length by under half the frame's background noise
(:func:`is_flat_bar`), where an imaged rod carries the detector's noise.
"""

from __future__ import annotations

import functools

import numpy as np
from scipy import ndimage as ndi

from grainhabit.plugins.common.image_stats import median, median_of_counts, robust_sd
from grainhabit.plugins.segment.mark_shapes import BAR_RAGGED_LINES, aligned_bar

#: Fraction of the frame's grey range, from either end, counted as ink.
INK_TOLERANCE = 0.02
#: Rim (px) of an object left out of its ink test: resampling blurs a mark's edge over this many pixels.
RIM_PX = 2
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
#: A glyph of a compressed or resampled figure keeps its ink only inside its strokes: one object under SOLID_INK
#: of it in ink and less solid than this is a glyph too, hole or no hole (two tangent discs have 0.88).
PARTLY_INKED_SOLIDITY = 0.85
#: Objects filling more than this of their axis-aligned bounding box, and at least BAR_ASPECT times longer
#: than wide, are bars (a clipped rod is seldom that long and that well aligned with the frame).
BOX_FILL = 0.95
BAR_ASPECT = 5.0
#: An object mostly in ink that fills more than this of its box and is at least RECT_ASPECT times longer
#: than wide is a drawn rectangle (a thick bar, a label's box): a spherocylinder of aspect 2.5 fills 0.91.
RECT_FILL = 0.97
RECT_ASPECT = 2.5
#: Rows of the frame's background noise estimate at most (:func:`noise_sd`, a regular subsample of rows).
NOISE_ROWS = 512
#: Bars told by their flat colour (:func:`is_flat_bar`) are at most this wide (px).
BAR_MAX_WIDTH_PX = 24
#: A drawn bar varies along its length by at most this fraction of the background noise.
FLAT_NOISE_RATIO = 0.5
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


def is_drawn(part: np.ndarray, raw: np.ndarray, low: float, high: float, background: float | None = None,
             rim: int = 1) -> bool:
    """Whether one object is a drawn mark.

    Parameters
    ----------
    part : ndarray of bool, shape (h, w)
        The object (holes filled), cropped.
    raw : ndarray, shape (h, w)
        The raw frame over the same crop.
    low, high : float
        Ink levels from :func:`ink_levels`.
    background : float or callable, optional
        The frame's background grey level (median of the pixels outside every
        object), or a function of no arguments giving it (asked only where a
        hole is looked for). A hole shows the background: inner pixels count as hole
        pixels only within ``HOLE_CONTRAST`` of the range from it, so that a
        faceted grain with one facet clipped to white and the others grey is
        not taken for a hollow glyph. Unset: any pixel far from the ink counts.
    rim : int
        Rim (px) left out of the ink count besides the one-pixel edge
        (:func:`core_pixels`): 1 for single objects; :data:`RIM_PX` for a
        whole cluster the splitter cut (a bold glyph blurred by resampling),
        where the pieces were judged with 1 already.

    Returns
    -------
    bool
    """
    from skimage.morphology import convex_hull_image

    if high <= low:
        return False
    inner, core = core_pixels(part, rim)
    vals = raw[inner]
    dark, bright = ink_shares(raw[core], low, high)
    if core is not inner:  # a hollow glyph's core is mostly its hole: the inner ring counts as well
        dark, bright = (max(a, b) for a, b in zip((dark, bright), ink_shares(vals, low, high)))
    ink = max(dark, bright)
    if ink < MIN_INK:
        return False
    if part.sum() < GLYPH_MIN_AREA_PX:
        # too small to tell a glyph's shape from a digitised grain's (rows of small text: text_rows)
        return False
    rows, cols = np.nonzero(part)
    h, w = rows.max() - rows.min() + 1, cols.max() - cols.min() + 1
    area = float(part.sum())
    long_side = max(h, w) / min(h, w)
    if area >= BOX_FILL * h * w and long_side >= BAR_ASPECT:
        # a bar whatever share of it is ink: a thin bar's resampled edges and a caption printed on it in the
        # other ink leave under SOLID_INK of its pixels at the ink level
        return True
    if ink >= SOLID_INK and long_side >= RECT_ASPECT and \
            aligned_bar(part, np.inf, RECT_ASPECT, trim=True, fill=RECT_FILL) is not None:
        # a rectangle of ink to the pixel: a thick scale bar or a label's box (a clipped rod's round ends
        # leave a tenth of its box or so empty)
        return True
    if ink < SOLID_INK:
        # a hollow glyph shows the background through its hole; a grain partly clipped is dark (or
        # bright) all over
        span = (high - low) / (1.0 - 2.0 * INK_TOLERANCE)
        end = low if dark >= bright else high
        hole = np.abs(vals - end) > HOLE_CONTRAST * span
        if callable(background):
            background = background()
        if background is not None:
            hole &= np.abs(vals - background) <= HOLE_CONTRAST * span
        if float(np.mean(hole)) >= HOLE_FRACTION:
            return True
        # one object less solid than a glyph's least: a letter without a counter ("K", "F"); never a whole
        # cluster (rim > 1), whose touching grains, partly clipped, leave notches between them
        return rim == 1 and area < PARTLY_INKED_SOLIDITY * float(convex_hull_image(part).sum())
    return area < GLYPH_SOLIDITY * float(convex_hull_image(part).sum())


def frame_ink(raw: np.ndarray) -> dict:
    """What :func:`drawn_labels` needs of the raw frame alone, worked out once for several calls.

    Parameters
    ----------
    raw : ndarray, shape (rows, cols)
        The frame as read.

    Returns
    -------
    dict
        ``low``, ``high`` (:func:`ink_levels`), ``pixels`` (bool, shape of ``raw``: at or below ``low``
        or at or above ``high``) and ``counts`` (``numpy.bincount`` of the grey levels for 8 or 16 bit
        unsigned frames, else None).
    """
    raw = np.asarray(raw)
    low, high = ink_levels(raw)
    counts = level_counts(raw) if raw.dtype.kind == "u" and raw.dtype.itemsize <= 2 else None
    return {"low": low, "high": high, "pixels": (raw <= low) | (raw >= high), "counts": counts}


def level_counts(values: np.ndarray, chunk: int = 1 << 18) -> np.ndarray:
    """``numpy.bincount(values.ravel())`` of 8 or 16 bit unsigned integers, counted ``chunk`` values at a time.

    numpy widens the values to 64-bit integers before counting; done on a whole frame at once that is a
    temporary of 8 bytes per pixel, which on a busy machine can cost more in fresh memory than the count
    itself. The counts are the same.
    """
    flat = np.asarray(values).ravel()
    if flat.size == 0:
        return np.bincount(flat)
    n = int(flat.max()) + 1
    counts = np.zeros(n, np.intp)
    for i in range(0, flat.size, chunk):
        counts += np.bincount(flat[i:i + chunk], minlength=n)
    return counts


def drawn_labels(labels: np.ndarray, raw: np.ndarray, rim: int = 1, boxes: list | None = None,
                 ink: dict | None = None) -> np.ndarray:
    """Labels of a segmentation that are drawn marks.

    Parameters
    ----------
    labels : ndarray of int, shape (rows, cols)
        Grains 1..n.
    raw : ndarray, shape (rows, cols)
        The frame as read.
    rim : int
        See :func:`is_drawn`.
    boxes : list of tuple of slice or None, optional
        ``scipy.ndimage.find_objects(labels)``, when the caller has it already.
    ink : dict, optional
        :func:`frame_ink` of ``raw``, when the caller has it already.

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
    if ink is None:
        ink = frame_ink(raw)
    low, high = ink["low"], ink["high"]

    @functools.cache
    def background():
        # asked only by is_drawn's hole test, which few frames reach (a whole-frame median: ~35 ms at 2048 px)
        if ink["counts"] is not None:
            # the background's grey-level counts: the frame's less the objects' (fewer pixels to count)
            counts = ink["counts"] - np.bincount(raw[labels != 0], minlength=len(ink["counts"]))
            n_out = int(counts.sum())
            return median_of_counts(counts, n_out) if n_out else None
        outside = raw[labels == 0]
        return median(outside) if outside.size else None
    out, inked, reach = [], [], 0.0
    if boxes is None:
        boxes = ndi.find_objects(labels)
    # only objects holding an ink pixel at all can be marks (one pass over the frame, not one per object)
    has_ink = np.bincount(labels[ink["pixels"]].ravel(), minlength=len(boxes) + 1) > 0
    bars = bar_candidates(labels, boxes)
    noise = noise_sd(raw, labels) if bars.any() else 0.0
    for k, sl in enumerate(boxes, start=1):
        if sl is None or not (has_ink[k] or bars[k]):
            continue
        part = labels[sl] == k
        crop = np.asarray(raw[sl], np.float64)
        if bars[k] and is_flat_bar(part, crop, noise):
            out.append(k)
            reach = max(reach, 0.5 * max(sl[0].stop - sl[0].start, sl[1].stop - sl[1].start))
        elif has_ink[k] and is_drawn(part, crop, low, high, background, rim):
            out.append(k)
            reach = max(reach, 0.5 * max(sl[0].stop - sl[0].start, sl[1].stop - sl[1].start))
        elif ink_fraction(part, crop, low, high, rim) >= MIN_INK:
            inked.append(k)
    if out and inked:
        # pieces of a mark (a glyph cut in two, a dot) and the text of a scale bar: in ink and within half
        # a mark's length of one
        near = ndi.distance_transform_edt(~np.isin(labels, out)) <= max(reach, 2.0)
        out += [k for k in inked if near[boxes[k - 1]][labels[boxes[k - 1]] == k].any()]
    return np.asarray(sorted(out), np.int64)


def bar_candidates(labels: np.ndarray, boxes: list) -> np.ndarray:
    """Which labels fill their bounding box like a bar along a frame axis.

    Parameters
    ----------
    labels : ndarray of int, shape (rows, cols)
    boxes : list of tuple of slice or None
        ``scipy.ndimage.find_objects(labels)``.

    Returns
    -------
    ndarray of bool, shape (len(boxes) + 1,)
        True where the object fills over :data:`BOX_FILL` of its box, which
        is at least :data:`BAR_ASPECT` times longer than wide and at most
        :data:`BAR_MAX_WIDTH_PX` wide; the box is that of
        :func:`~grainhabit.plugins.segment.mark_shapes.bar_core` (up to two
        thin lines along each long edge left out: a bar's anti-aliased edge
        rows, the feet of a caption touching it), holding 80 % of the object.
    """
    out = np.zeros(len(boxes) + 1, bool)
    for k, sl in enumerate(boxes, start=1):
        if sl is None:
            continue
        h, w = sl[0].stop - sl[0].start, sl[1].stop - sl[1].start
        # the box's shape first (a ragged line or two at each end allowed): the pixels are looked at only
        # for the few long boxes
        if max(h, w) < BAR_ASPECT * max(min(h, w) - 2 * BAR_RAGGED_LINES, 1):
            continue
        out[k] = aligned_bar(labels[sl] == k, BAR_MAX_WIDTH_PX, BAR_ASPECT, trim=True, fill=BOX_FILL) is not None
    return out


def noise_sd(raw: np.ndarray, labels: np.ndarray) -> float:
    """Pixel noise of the frame's background (grey levels), from differences of neighbours along rows.

    Returns
    -------
    float
        ``1.4826 MAD(d) / sqrt(2)`` over the differences ``d`` of
        horizontally adjacent pixels both outside every object: a robust
        standard deviation (normal consistency factor 1.4826) that a smooth
        illumination gradient hardly moves. On frames of more than
        :data:`NOISE_ROWS` rows, every k-th row alone (a regular subsample
        of at most that many rows: half a million differences on a 2048 px
        frame are more than a robust scale needs).
    """
    step = max(1, raw.shape[0] // NOISE_ROWS)
    lab = labels[::step]
    free = (lab[:, 1:] == 0) & (lab[:, :-1] == 0)
    d = np.diff(np.asarray(raw[::step], np.float32), axis=1)[free]
    if d.size < 16:
        return 0.0
    return robust_sd(d)[1] / float(np.sqrt(2.0))


def is_flat_bar(part: np.ndarray, raw: np.ndarray, noise: float) -> bool:
    """Whether a bar-shaped object is drawn: flat along its length, with none of the frame's noise.

    Parameters
    ----------
    part : ndarray of bool, shape (h, w)
        An object that fills its axis-aligned box (see :func:`bar_candidates`).
    raw : ndarray, shape (h, w)
        The raw frame over the same crop.
    noise : float
        The frame's background noise (:func:`noise_sd`).

    Returns
    -------
    bool
        True when the median, over the lines of the bar's core (the object
        less its rim, :func:`core_pixels`) along its length, of the
        standard deviation of the grey levels along the line is at most
        :data:`FLAT_NOISE_RATIO` times ``noise``. A scale bar is one flat
        colour however the figure was resampled; an imaged rod, however well
        aligned, carries the detector's noise along its axis.
    """
    if noise <= 0:
        return False
    _, core = core_pixels(part)
    if part.shape[0] > part.shape[1]:  # lines along the bar's length are rows
        core, raw = core.T, raw.T
    lines = np.flatnonzero(core.sum(axis=1) >= 8)
    if lines.size == 0:
        return False
    sds = [float(np.std(raw[i][core[i]])) for i in lines]
    return float(np.median(sds)) <= FLAT_NOISE_RATIO * noise


def core_pixels(part: np.ndarray, rim: int = RIM_PX) -> tuple[np.ndarray, np.ndarray]:
    """The pixels of an object inside its rim, and deeper inside, where a drawn mark shows its flat ink.

    Parameters
    ----------
    part : ndarray of bool, shape (h, w)

    Returns
    -------
    inner, core : ndarray of bool, shape (h, w)
        ``inner``: ``part`` eroded by one pixel (``part`` itself where fewer
        than 4 pixels remain). ``core``: ``part`` eroded by ``rim``
        pixels where at least 4 remain, else ``inner`` (the same object).
        Figures resampled for print spread a mark's edge over one to two
        pixels of grey; the core of a bold glyph is then in ink where its
        inner ring is not.
    """
    inner = ndi.binary_erosion(part)
    if inner.sum() < 4:
        return part, part
    if rim <= 1:
        return inner, inner
    core = ndi.binary_erosion(inner, iterations=int(rim) - 1)
    return inner, (core if core.sum() >= 4 else inner)


def ink_shares(vals: np.ndarray, low: float, high: float) -> tuple[float, float]:
    """Fractions of ``vals`` at or below ``low`` and at or above ``high``."""
    if vals.size == 0:
        return 0.0, 0.0
    return float(np.mean(vals <= low)), float(np.mean(vals >= high))


def ink_fraction(part: np.ndarray, raw: np.ndarray, low: float, high: float, rim: int = 1) -> float:
    """Largest fraction of an object's inner or core pixels (:func:`core_pixels`) at either ink level."""
    inner, core = core_pixels(part, rim)
    return max(*ink_shares(raw[inner], low, high), *ink_shares(raw[core], low, high))
