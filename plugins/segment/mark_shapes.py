"""Marks drawn on a picture told from grains by their shape: bars, strokes of letters, rows of text.

The ink test on the raw frame is in :mod:`grainhabit.plugins.segment.annotations`.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage as ndi

from grainhabit.plugins.segment.disk_morphology import erode_disk

#: Objects more elongated than this (area over squared inscribed diameter) are drawn lines, not grains.
LINE_ELONGATION = 15.0
#: Thin objects (elongation above this) with solidity below STROKE_SOLIDITY are strokes of letters.
STROKE_ELONGATION = 4.0
STROKE_SOLIDITY = 0.7
#: Strokes are drawn at screen resolution: at most this half-width (px); a wider curved band is an unsplit
#: chain of grains, not a letter.
STROKE_MAX_HALF_WIDTH_PX = 4.0
#: Scale bars: objects filling over BAR_BOX_FILL of their axis-aligned bounding box, at least ALIGNED_BAR_ASPECT
#: times longer than wide and at most ``2 * STROKE_MAX_HALF_WIDTH_PX`` wide (a rod lying that exactly along a
#: frame axis, that thin and that square-ended is rare; a drawn bar always is).
BAR_BOX_FILL = 0.95
ALIGNED_BAR_ASPECT = 8.0
#: A bar with ragged edges (anti-aliased rows, the feet of a caption touching it): up to BAR_RAGGED_LINES
#: lines along it at each edge, filled under BAR_LINE_FILL of its length, are left out before the box tests,
#: if the rest holds BAR_CORE_SHARE of it.
BAR_LINE_FILL = 0.75
BAR_RAGGED_LINES = 2
BAR_CORE_SHARE = 0.8
#: Text rows: at least this many glyphs, bottoms (or tops) within this many pixels, glyphs less solid than this.
TEXT_MIN_GLYPHS = 3
TEXT_BASELINE_PX = 2
TEXT_SOLIDITY = 0.85
#: A member of a row is judged by its pixels above the noise threshold only where they (holes filled) cover
#: at least this share of it: text is drawn in ink, all of it far above the noise; of a faint grain (its
#: average below the threshold) the pixels above are a noise-ridden sample, less solid than any glyph.
TEXT_MIN_COVER = 0.5
#: A line of at least this many members is text also when its glyphs are solid (bold or blurred print) ...
TEXT_LINE_GLYPHS = 6
#: ... where the widest member is this many times the narrowest (words and letters of a printed line; the
#: grains of one row of a packing are of one width) ...
TEXT_WIDTH_SPREAD = 2.5
#: ... and the bands one line height above and below it hold fewer objects than this share of its members
#: (a line of print stands alone; a row of a packed array has rows of grains above and below it).
TEXT_LINE_NEIGHBOURS = 0.5


def annotation_kind(part: np.ndarray, raw: np.ndarray) -> str | None:
    """Whether an object is a mark drawn on the picture rather than a grain.

    Parameters
    ----------
    part : ndarray of bool, shape (h, w)
        The object (holes filled).
    raw : ndarray of bool, shape (h, w)
        Its pixels above the noise threshold (before closing and hole filling).

    Returns
    -------
    {"line", "stroke", None}
        ``"line"``: a bar more than :data:`LINE_ELONGATION` times longer
        than wide and at most ``4 * STROKE_MAX_HALF_WIDTH_PX`` wide (scale
        bars, streaks, scratches; a wider band is an unsplit chain of grains),
        or a bar along a frame axis (:func:`aligned_bar`); ``"stroke"``: a
        thin curved stroke (letters, digits, text), i.e. elongation above
        :data:`STROKE_ELONGATION`, solidity below :data:`STROKE_SOLIDITY` and
        half-width at most :data:`STROKE_MAX_HALF_WIDTH_PX`,
        judged on the pixels above the noise threshold (a letter O or a
        digit 0 is a curved stroke there, whatever its filled shape) or on
        the filled shape; None for a grain.

    Notes
    -----
    Elongation ``E = A / (2 r)^2`` with ``A`` the area and ``r`` the largest
    inscribed radius (distance transform maximum): about 0.8 for a disc, 1 for
    a square, ``L / w`` for a bar or rod of length ``L`` and width ``w``.
    Solidity is area over convex hull area (ISO 9276-6). Grains are compact
    and convex or made of convex parts; drawn marks are lines one to a few
    pixels wide.
    """
    from skimage.morphology import convex_hull_image

    area = float(part.sum())
    if area < 4:
        return None
    raw = raw & part
    # every test below needs a thin object: r <= 8 and r < sqrt(area / 60) for a line, r_raw <= 4 or r <= 4
    # for a stroke (r_raw <= r, raw lying inside part). An object whose raw pixels survive an erosion by the
    # disk of the larger bound (Euclidean distance transform above it) is none, and no transform is needed.
    bound = max(STROKE_MAX_HALF_WIDTH_PX, min(2 * STROKE_MAX_HALF_WIDTH_PX, float(np.sqrt(area / (4.0 * LINE_ELONGATION)))))
    if survives_disk_erosion(raw, bound):
        return None
    if aligned_bar(part) is not None:
        return "line"
    r, r_raw = inscribed_radii(part, raw)
    elong = area / (4.0 * r * r)
    if elong > LINE_ELONGATION and r <= 2 * STROKE_MAX_HALF_WIDTH_PX:
        return "line"
    raw_area = float(raw.sum())
    if raw_area > 0:
        if r_raw <= STROKE_MAX_HALF_WIDTH_PX and raw_area / (4.0 * r_raw * r_raw) > STROKE_ELONGATION:
            hull = float(convex_hull_image(raw).sum())
            if raw_area < STROKE_SOLIDITY * hull:
                return "stroke"
    if elong > STROKE_ELONGATION and r <= STROKE_MAX_HALF_WIDTH_PX:
        solidity = area / max(float(convex_hull_image(part).sum()), 1.0)
        if solidity < STROKE_SOLIDITY:
            return "stroke"
    return None


def aligned_bar(part: np.ndarray, max_width: float = 2 * STROKE_MAX_HALF_WIDTH_PX,
                aspect: float = ALIGNED_BAR_ASPECT, trim: bool = False,
                fill: float = BAR_BOX_FILL) -> tuple[int, int, int, int] | None:
    """The box of a thin bar drawn along a frame axis (a scale bar), or None.

    Parameters
    ----------
    part : ndarray of bool, shape (h, w)
        One object.
    max_width : float
        Widest bar (px).
    aspect : float
        Least length over width.
    trim : bool
        Judge the box of :func:`bar_core` (ragged edge lines trimmed), which
        must then also hold :data:`BAR_CORE_SHARE` of the object.
    fill : float
        Least share of the box the object fills.

    Returns
    -------
    (top, bottom, left, right) or None
        The object's bounding box within ``part`` (bottom and right
        exclusive) when it fills over ``fill`` of it, is at least
        ``aspect`` times longer than wide and at most ``max_width`` wide;
        else None. The defaults are the shape test of :func:`annotation_kind`.
    """
    rows, cols = np.flatnonzero(part.any(axis=1)), np.flatnonzero(part.any(axis=0))
    if rows.size == 0:
        return None
    top, bottom, left, right = int(rows[0]), int(rows[-1]) + 1, int(cols[0]), int(cols[-1]) + 1
    area = float(np.count_nonzero(part))
    if trim:
        top, bottom, left, right = bar_core(part)
    h, w = bottom - top, right - left
    if h <= 0 or w <= 0 or min(h, w) > max_width or max(h, w) < aspect * min(h, w):
        return None
    inside = float(np.count_nonzero(part[top:bottom, left:right]))
    if inside < fill * h * w or (trim and inside < BAR_CORE_SHARE * area):
        return None
    return top, bottom, left, right


def bar_core(part: np.ndarray) -> tuple[int, int, int, int]:
    """The bounding box of an object less thin lines along its long side at both edges.

    Parameters
    ----------
    part : ndarray of bool, shape (h, w)
        The object.

    Returns
    -------
    (top, bottom, left, right)
        Within ``part``, bottom and right exclusive; an empty box for an empty
        object. For an object wider than tall, up to :data:`BAR_RAGGED_LINES`
        rows at its top and at its bottom filled under :data:`BAR_LINE_FILL`
        of its width are left out (for a taller one, columns): a scale bar
        whose edge rows were resampled to grey, or whose caption's feet
        touch it, keeps the box of its flat part. Its ends are not trimmed:
        a rod's round ends still leave its box partly empty.
    """
    rows, cols = np.flatnonzero(part.any(axis=1)), np.flatnonzero(part.any(axis=0))
    if rows.size == 0:
        return 0, 0, 0, 0
    top, bottom, left, right = int(rows[0]), int(rows[-1]) + 1, int(cols[0]), int(cols[-1]) + 1
    box = part[top:bottom, left:right]
    tall = box.shape[0] > box.shape[1]
    m = box.T if tall else box
    thin = m.sum(axis=1) < BAR_LINE_FILL * m.shape[1]
    first = 0
    while first < min(BAR_RAGGED_LINES, m.shape[0] - 1) and thin[first]:
        first += 1
    last = m.shape[0]
    while last > first + 1 and m.shape[0] - last < BAR_RAGGED_LINES and thin[last - 1]:
        last -= 1
    if tall:
        return top, bottom, left + first, left + last
    return top + first, top + last, left, right


def inscribed_radii(first: np.ndarray, second: np.ndarray) -> tuple[float, float]:
    """Largest inscribed radius (maximum of the Euclidean distance transform) of two masks of one shape.

    Parameters
    ----------
    first, second : ndarray of bool, shape (h, w)

    Returns
    -------
    (float, float)
        ``scipy.ndimage.distance_transform_edt(numpy.pad(m, 1)).max()`` for
        each mask (0 for an empty one).

    Notes
    -----
    Both go through one distance transform: the two padded masks stacked
    one above the other. A pixel's nearest background pixel lies in its own
    padded mask, as the padding row between them (same column) is nearer
    than any pixel of the other mask. One call instead of two halves the
    fixed cost that dominates on the crops of single grains.
    """
    h, w = first.shape
    both = np.zeros((2 * h + 4, w + 2), bool)
    both[1:h + 1, 1:w + 1] = first
    both[h + 3:2 * h + 3, 1:w + 1] = second
    dist = ndi.distance_transform_edt(both)
    return float(dist[:h + 2].max()), float(dist[h + 2:].max())


def survives_disk_erosion(mask: np.ndarray, radius: float) -> bool:
    """Whether any pixel of a mask survives an erosion by the disk of ``radius`` (nothing beyond the mask's box).

    Parameters
    ----------
    mask : ndarray of bool, shape (h, w)
    radius : float
        Disk radius (px), >= 0.

    Returns
    -------
    bool
        ``erode_disk(numpy.pad(mask, 1), radius, 0).any()``.

    Notes
    -----
    The disk lies inside the square of half-side ``floor(radius)``: a pixel
    that survives the erosion by that square (two running minima, cheap)
    survives the disk's too; the square round the middle of the array is
    looked at first (set all over for a compact grain: no filter at all).
    Only a mask with no such pixel (a thin object, rare among grains) takes
    the erosion by the disk itself.
    """
    k = int(np.floor(radius))
    m = np.asarray(mask, bool)
    # the square round the middle of the array first: set all over (a compact grain, nearly always), its
    # middle pixel survives the square's erosion (the running minima below are then not needed)
    cy, cx = m.shape[0] // 2, m.shape[1] // 2
    if k <= cy < m.shape[0] - k and k <= cx < m.shape[1] - k and m[cy - k:cy + k + 1, cx - k:cx + k + 1].all():
        return True
    if m.size and ndi.minimum_filter(m.view(np.uint8), size=2 * k + 1, mode="constant", cval=0).any():
        return True
    return bool(erode_disk(np.pad(m, 1), radius, 0).any())


def text_rows(labels: np.ndarray, drawn: np.ndarray, boxes: list | None = None) -> np.ndarray:
    """Labels that form a line of text: glyph-like objects of one height on one baseline.

    Parameters
    ----------
    labels : ndarray of int, shape (rows, cols)
        Grains 1..n.
    drawn : ndarray of bool, shape (rows, cols)
        Pixels above the noise threshold.
    boxes : list of tuple of slice or None, optional
        ``scipy.ndimage.find_objects(labels)``, when the caller has it already.

    Returns
    -------
    ndarray of int
        Labels to drop.

    Notes
    -----
    A row is a chain of at least :data:`TEXT_MIN_GLYPHS` objects whose
    bounding boxes end on the same row (within :data:`TEXT_BASELINE_PX`,
    their bottoms; or their tops; a box ending on the frame's edge is cut, not on a baseline), with heights within 35 % of each other and
    horizontal gaps under 1.5 heights: the layout of printed text (common
    practice). It is dropped when most of its members are not convex (drawn
    pixels fill under :data:`TEXT_SOLIDITY` of their convex hull), as
    letters and digits are and a row of touching grains is not, or when it
    is a line of print whose glyphs are solid (bold or blurred letters,
    run-together words of an instrument's data line: EMPS 9dc60257e5, 19
    pieces of one line): at least :data:`TEXT_LINE_GLYPHS` members of widths
    spread :data:`TEXT_WIDTH_SPREAD` times or more, alone in their band
    (:func:`alone_in_band`). A member
    whose drawn pixels, holes filled, cover under :data:`TEXT_MIN_COVER` of
    it is a faint object, not a glyph drawn in ink, and counts as convex
    (EMPS 482193653a, ../shared/realdata: 22 faint particles of a noisy
    field in rows of three were dropped as text; their drawn pixels covered
    0-47 % of them, the glyphs of the 357 pictures' rows 63-100 %). Smaller
    objects inside the band of a dropped row (pieces of split glyphs) are
    dropped with it.
    """
    from skimage.morphology import convex_hull_image

    items, ids, top, bottom, left, right = box_table(labels, boxes)
    if len(items) < TEXT_MIN_GLYPHS:
        return np.zeros(0, np.int64)
    height = (bottom - top).astype(float)
    width = right - left
    drop = set()
    solid = {}

    def solidity(i):
        if i not in solid:
            k, b = items[i]
            whole = labels[b] == k
            m = whole & drawn[b]
            # a faint object (under TEXT_MIN_COVER of it above the threshold, the counter of a "0" counted
            # as covered) is no glyph: it counts as convex
            shown = m.any() and float((ndi.binary_fill_holes(m) & whole).sum()) >= TEXT_MIN_COVER * float(whole.sum())
            solid[i] = float(m.sum()) / max(float(convex_hull_image(m).sum()), 1.0) if shown else 1.0
        return solid[i]

    for edge, at_frame_edge in ((bottom, bottom >= labels.shape[0]), (top, top <= 0)):
        order = np.argsort(edge, kind="stable")
        for a in order:
            if at_frame_edge[a]:
                # objects cut by the frame's top (or bottom) edge share that edge, not a baseline
                continue
            # neighbours on the same line, chained left to right
            same = np.flatnonzero((np.abs(edge - edge[a]) <= TEXT_BASELINE_PX) & ~at_frame_edge
                                  & (np.abs(height / height[a] - 1) < 0.35))
            group = chain_holding(a, same, left, right, 1.5 * max(height[a], 1))
            if len(group) < TEXT_MIN_GLYPHS:
                continue
            if (sum(solidity(i) < TEXT_SOLIDITY for i in group) * 2 > len(group)
                    or (len(group) >= TEXT_LINE_GLYPHS
                        and width[group].max() >= TEXT_WIDTH_SPREAD * max(width[group].min(), 1)
                        and alone_in_band(group, top, bottom, left, right))):
                drop.update(int(ids[i]) for i in group)
                # pieces of glyphs (a split letter, a dot) inside the line's band go with it
                drop.update(int(k) for k in ids[in_band(group, height[a], top, bottom, left, right)])
    return np.asarray(sorted(drop), np.int64)


def in_band(group: list, reach: float, top: np.ndarray, bottom: np.ndarray, left: np.ndarray,
            right: np.ndarray) -> np.ndarray:
    """The boxes lying wholly inside the band of a line of text.

    Parameters
    ----------
    group : list of int
        Indices of the line's boxes.
    reach : float
        How far (px) the band runs on past the line's first and last box: one line height.
    top, bottom, left, right : ndarray of int, shape (n,)
        All boxes (:func:`box_table`), pixel rows and columns, bottom and right exclusive.

    Returns
    -------
    ndarray of bool, shape (n,)
        Inside the rows of the line (widened by :data:`TEXT_BASELINE_PX`) and its columns widened by
        ``reach``: pieces of glyphs the splitter cut off (a stroke, the dot of an "i").
    """
    g = np.asarray(group)
    t0, t1 = top[g].min() - TEXT_BASELINE_PX, bottom[g].max() + TEXT_BASELINE_PX
    c0, c1 = left[g].min() - reach, right[g].max() + reach
    return (top >= t0) & (bottom <= t1) & (left >= c0) & (right <= c1)


def line_pieces(labels: np.ndarray, glyphs: np.ndarray, boxes: list | None = None) -> np.ndarray:
    """Kept objects inside the band of a line of glyphs already dropped: the pieces of its letters.

    Parameters
    ----------
    labels : ndarray of int, shape (rows, cols)
        Objects 1..n: the kept ones and the glyphs.
    glyphs : ndarray of int
        The labels dropped as glyphs, bars or text.
    boxes : list of tuple of slice or None, optional
        ``scipy.ndimage.find_objects(labels)``, when the caller has it already.

    Returns
    -------
    ndarray of int
        Kept labels to drop.

    Notes
    -----
    A line is a chain of two or more dropped glyphs ending on one baseline
    (within ``TEXT_BASELINE_PX + 1``) with horizontal gaps under 1.5 of their
    height, the layout of printed text (common practice); a kept object
    wholly inside its band (:func:`in_band`) is a piece of one of its glyphs
    that the splitter cut off and that looked like a grain alone (the upper
    bowl of a "5", the end of an "m"). Where the ink or shape tests dropped
    the rest of a caption by then, its pieces went one by one before.
    """
    glyphs = np.asarray(glyphs, np.int64)
    if glyphs.size < 2:
        return np.zeros(0, np.int64)
    items, ids, top, bottom, left, right = box_table(labels, boxes)
    is_glyph = np.isin(ids, glyphs)
    if is_glyph.sum() < 2 or is_glyph.all():
        return np.zeros(0, np.int64)
    height = (bottom - top).astype(float)
    drop = np.zeros(ids.size, bool)
    members = np.flatnonzero(is_glyph)
    for a in members:
        same = members[np.abs(bottom[members] - bottom[a]) <= TEXT_BASELINE_PX + 1]
        group = chain_holding(a, same, left, right, 1.5 * max(height[a], 1.0))
        if len(group) >= 2:
            drop |= in_band(group, height[a], top, bottom, left, right)
    return ids[drop & ~is_glyph]


def alone_in_band(group: list, top: np.ndarray, bottom: np.ndarray, left: np.ndarray, right: np.ndarray) -> bool:
    """Whether a line of boxes has few other boxes in the bands one line height above and below it.

    Parameters
    ----------
    group : list of int
        Indices of the line's boxes.
    top, bottom, left, right : ndarray of int, shape (n,)
        All boxes (:func:`box_table`), pixel rows and columns, bottom and right exclusive.

    Returns
    -------
    bool
        True when the boxes outside ``group`` that overlap the line's columns
        and the rows within one line height above its top or below its
        bottom number under :data:`TEXT_LINE_NEIGHBOURS` times its members.
    """
    g = np.asarray(group)
    t0, t1, c0, c1 = top[g].min(), bottom[g].max(), left[g].min(), right[g].max()
    h = t1 - t0
    other = np.ones(top.size, bool)
    other[g] = False
    beside = other & (left < c1) & (right > c0)
    above = beside & (bottom > t0 - h) & (bottom <= t0 + 1)
    below = beside & (top < t1 + h) & (top >= t1 - 1)
    return int(np.count_nonzero(above | below)) < TEXT_LINE_NEIGHBOURS * len(group)


def bar_captions(labels: np.ndarray, bars: list[tuple[int, int, int, int]],
                 drawn: np.ndarray | None = None, boxes: list | None = None) -> np.ndarray:
    """Labels that form the caption of a scale bar ("50 nm" above or below the bar).

    Parameters
    ----------
    labels : ndarray of int, shape (rows, cols)
        Grains 1..n.
    bars : list of (top, bottom, left, right)
        Frame boxes (bottom and right exclusive) of the bars dropped as drawn
        lines.
    drawn : ndarray of bool, shape (rows, cols), optional
        Pixels above the noise threshold; with it a lone object counts as a
        caption (glyphs run together) when they fill under
        :data:`TEXT_SOLIDITY` of its convex hull.
    boxes : list of tuple of slice or None, optional
        ``scipy.ndimage.find_objects(labels)``, when the caller has it already.

    Returns
    -------
    ndarray of int
        Labels to drop.

    Notes
    -----
    A caption is a row of at least two objects beside a horizontal bar: their
    boxes overlap the bar's columns (widened by a quarter of its length on
    each side), lie within twice their height (or that quarter length)
    above or below it, are at
    most half the bar's length tall, and end on one baseline (within
    ``TEXT_BASELINE_PX + 1``) with horizontal gaps under 1.5 heights, the
    layout of printed text (common practice), or one object of glyphs run
    together, not convex (see ``drawn``), wider than tall, at most a
    quarter of the bar's length tall and within its height of the bar. Small text drawn without a
    flat ink (anti-aliased, resampled) passes neither the ink nor the
    stroke test, but it is set beside its bar.
    """
    from skimage.morphology import convex_hull_image

    items, ids, top, bottom, left, right = box_table(labels, boxes)
    drop: set[int] = set()
    if not items or not bars:
        return np.zeros(0, np.int64)
    height = (bottom - top).astype(float)

    def width_of(i):
        return float(right[i] - left[i])

    for b_top, b_bottom, b_left, b_right in bars:
        length = b_right - b_left
        if length <= b_bottom - b_top:
            continue  # an upright bar: its caption is set sideways or not at all
        reach = 0.25 * length
        gap = np.maximum(b_top - bottom, top - b_bottom)  # rows between box and bar (<= 0: overlapping rows)
        near = np.flatnonzero((right > b_left - reach) & (left < b_right + reach) & (gap >= 0)
                              & (gap <= np.maximum(2.0 * height, reach)) & (height <= 0.5 * length))
        for a in near:
            row = near[np.abs(bottom[near] - bottom[a]) <= TEXT_BASELINE_PX + 1]
            chain = chain_holding(a, row, left, right, 1.5 * max(height[a], 1.0))
            if len(chain) >= 2:
                drop.update(int(ids[i]) for i in chain)
            elif (drawn is not None and len(chain) <= 1 and width_of(a) >= height[a] and gap[a] <= height[a]
                  and height[a] <= reach):
                k, b = items[a]
                m = (labels[b] == k) & drawn[b]
                if m.any() and float(m.sum()) < TEXT_SOLIDITY * float(convex_hull_image(m).sum()):
                    drop.add(int(k))
    return np.asarray(sorted(drop), np.int64)


def captioned_bars(labels: np.ndarray, glyphs: np.ndarray, boxes: list | None = None,
                   max_width: float = 24.0, aspect: float = 5.0,
                   fill: float = 0.95) -> tuple[np.ndarray, list[tuple[int, int, int, int]]]:
    """Labels of bars beside a caption that was dropped as text: the scale bar under (or over) "100 nm".

    Parameters
    ----------
    labels : ndarray of int, shape (rows, cols)
        Objects 1..n: the grains kept and the glyphs dropped.
    glyphs : ndarray of int
        The labels dropped as glyphs (letters, digits, rows of text).
    boxes : list of tuple of slice or None, optional
        ``scipy.ndimage.find_objects(labels)``, when the caller has it already.
    max_width, aspect, fill : float
        A bar is at most ``max_width`` px wide, ``aspect`` times longer than
        wide and fills ``fill`` of its box (ragged edge lines trimmed; see
        :func:`aligned_bar`); segment-grains passes the bar shape of its ink
        test (``annotations.BAR_MAX_WIDTH_PX``, ``BAR_ASPECT``, ``BOX_FILL``).

    Returns
    -------
    bars : ndarray of int
        The kept labels that are such bars.
    frame_boxes : list of (top, bottom, left, right)
        Their boxes (bottom and right exclusive), for :func:`bar_captions`.

    Notes
    -----
    A horizontal bar goes when at least two of the glyphs lie beside it:
    overlapping its columns widened each side by a quarter of its length or
    twice their height, whichever is more (a caption is often set off to one
    side of a short bar), at most half its length tall, within twice their
    height (or that quarter length) above or below it. A scale bar in a
    grey that is no end of the grey scale and carries the figure's
    compression noise passes neither the ink nor the flatness test
    (:mod:`grainhabit.plugins.segment.annotations`), but its caption, drawn
    as text, is found; a rod lying beside two dropped glyphs and that well
    aligned with the frame is rare.
    """
    glyphs = np.asarray(glyphs, np.int64)
    out, frame_boxes = [], []
    if glyphs.size < 2:
        return np.zeros(0, np.int64), frame_boxes
    items, ids, top, bottom, left, right = box_table(labels, boxes)
    is_glyph = np.isin(ids, glyphs)
    if is_glyph.sum() < 2:
        return np.zeros(0, np.int64), frame_boxes
    height = (bottom - top).astype(float)
    for i in np.flatnonzero(~is_glyph):
        h, w = height[i], float(right[i] - left[i])
        if w < aspect * max(h - 2 * BAR_RAGGED_LINES, 1):
            continue  # not a horizontal bar by its box (pixels looked at only for the few long boxes)
        k, b = items[i]
        bar = aligned_bar(labels[b] == k, max_width, aspect, trim=True, fill=fill)
        if bar is None:
            continue
        b_top, b_bottom = top[i] + bar[0], top[i] + bar[1]
        b_left, b_right = left[i] + bar[2], left[i] + bar[3]
        length = b_right - b_left
        reach = np.maximum(0.25 * length, 2.0 * height)
        gap = np.maximum(b_top - bottom, top - b_bottom)
        beside = (is_glyph & (right > b_left - reach) & (left < b_right + reach) & (gap >= 0)
                  & (gap <= np.maximum(2.0 * height, 0.25 * length)) & (height <= 0.5 * length))
        if beside.sum() >= 2:
            out.append(int(k))
            frame_boxes.append((int(b_top), int(b_bottom), int(b_left), int(b_right)))
    return np.asarray(out, np.int64), frame_boxes


def bars_with_captions(labels: np.ndarray, drawn: np.ndarray | None = None, boxes: list | None = None,
                       max_width: float = 24.0, aspect: float = 5.0,
                       fill: float = 0.95, skip: np.ndarray | None = None
                       ) -> tuple[np.ndarray, list[tuple[int, int, int, int]]]:
    """Labels of kept bars that carry a caption of their own, and that caption: a scale bar and its "50 nm".

    Parameters
    ----------
    labels : ndarray of int, shape (rows, cols)
        Objects 1..n.
    drawn : ndarray of bool, shape (rows, cols), optional
        Pixels above the noise threshold (see :func:`bar_captions`).
    boxes : list of tuple of slice or None, optional
        ``scipy.ndimage.find_objects(labels)``, when the caller has it already.
    max_width, aspect, fill : float
        The bar's shape, as :func:`captioned_bars` takes it.
    skip : ndarray of int, optional
        Labels already dropped: no bar among them (they may still be part of a caption).

    Returns
    -------
    labels : ndarray of int
        The bars and their captions' objects.
    frame_boxes : list of (top, bottom, left, right)
        The bars' boxes (bottom and right exclusive).

    Notes
    -----
    :func:`captioned_bars` needs two glyphs already dropped beside a bar. A
    scale bar in the particles' own ink (black bars beside black TEM
    particles pass no ink test) captioned in bold print, whose glyphs run
    together into two solid blobs ("50" and "nm"), has none. Here the
    caption is found from the bar: a horizontal bar of the shape above with
    a caption beside it as :func:`bar_captions` finds one, every object of
    which is at most half the bar's length wide; a line on the frame's edge
    (the rim of a data bar) is no scale bar. A row of parallel rods
    lying along the frame's axis has rods as long as the bar above and
    below it, no caption. A lone rod lying exactly along a frame axis with
    two small particles side by side just above or below it would go as a
    captioned bar: not seen on the 357 EMPS pictures.
    """
    items, ids, top, bottom, left, right = box_table(labels, boxes)
    out: set[int] = set()
    frame_boxes = []
    if len(items) < 2:
        return np.zeros(0, np.int64), frame_boxes
    index = {int(k): i for i, k in enumerate(ids)}
    height = (bottom - top).astype(float)
    long = (right - left) >= aspect * np.maximum(height - 2 * BAR_RAGGED_LINES, 1)
    if skip is not None:
        long &= ~np.isin(ids, skip)
    for i in np.flatnonzero(long):
        k, b = items[i]
        bar = aligned_bar(labels[b] == k, max_width, aspect, trim=True, fill=fill)
        if bar is None:
            continue
        frame_box = (int(top[i] + bar[0]), int(top[i] + bar[1]), int(left[i] + bar[2]), int(left[i] + bar[3]))
        length = frame_box[3] - frame_box[2]
        if (length <= frame_box[1] - frame_box[0] or min(frame_box[:3]) <= 0 or frame_box[1] >= labels.shape[0]
                or frame_box[3] >= labels.shape[1]):
            continue  # upright, or on the frame's edge (the rim of a data bar, a strip along the frame)
        caption = [int(c) for c in bar_captions(labels, [frame_box], drawn, boxes) if int(c) != k]
        if caption and all(right[index[c]] - left[index[c]] <= 0.5 * length for c in caption):
            out.add(int(k))
            out.update(caption)
            frame_boxes.append(frame_box)
    return np.asarray(sorted(out), np.int64), frame_boxes


def box_table(labels: np.ndarray, boxes: list | None = None) -> tuple[list, np.ndarray, np.ndarray, np.ndarray,
                                                                       np.ndarray, np.ndarray]:
    """The labels present and their bounding boxes as columns.

    Parameters
    ----------
    labels : ndarray of int, shape (rows, cols)
    boxes : list of tuple of slice or None, optional
        ``scipy.ndimage.find_objects(labels)`` (entry ``k - 1`` the box of label ``k``, None for a label
        not present); computed here when not given.

    Returns
    -------
    items : list of (int, tuple of slice)
        ``(label, box)`` of every label present, in label order.
    ids, top, bottom, left, right : ndarray of int
        The labels and their boxes' first and past-the-end row and column.
    """
    if boxes is None:
        boxes = ndi.find_objects(labels)
    items = [(k + 1, b) for k, b in enumerate(boxes) if b is not None]
    ids = np.array([k for k, _ in items], np.int64)
    top, bottom, left, right = (np.array([getattr(b[axis], end) for _, b in items], np.int64)
                                for axis, end in ((0, "start"), (0, "stop"), (1, "start"), (1, "stop")))
    return items, ids, top, bottom, left, right


def chain_holding(a: int, members: np.ndarray, left: np.ndarray, right: np.ndarray, max_gap: float) -> list:
    """The run of boxes holding box ``a`` among ``members``, chained left to right with gaps under ``max_gap``.

    Parameters
    ----------
    a : int
        Index of the box the run must hold.
    members : ndarray of int
        Indices of the candidate boxes (``a`` among them).
    left, right : ndarray
        Left and right (exclusive) column of every box.
    max_gap : float
        Largest horizontal gap (px) between neighbours of one run.

    Returns
    -------
    list of int
        The run, left to right; empty if ``a`` is not in ``members``.
    """
    members = members[np.argsort(left[members], kind="stable")]
    run = []
    for j in members:
        if run and left[j] - right[run[-1]] >= max_gap:
            if a in run:
                break
            run = []
        run.append(j)
    return run if a in run else []
