"""Touching grains: a connected component cut into convex parts.

A component is cut along straight segments between outline concavities, or
else by a marker-controlled watershed [3]_ of its distance map; see
:mod:`grainhabit.plugins.segment.segment_grains` (step 3) for the rules.

Heaps of many grains (segment-grains 2.5):

- Background enclosed by a ring of grains (filled as a hole by the
  foreground) is taken out first (:func:`enclosed_pockets`); the ring is
  split on its own and the pocket, below the threshold, is dropped by the
  caller.
- A shape that could hold :data:`HEAP_MIN_GRAINS` discs of its largest
  inscribed radius is flooded from the h-maxima of its distance map first,
  the dark gaps between packed grains counted as background
  (:func:`_split_heap`): the interior grains of a heap have no notch on
  its outline to cut between.
- Parts may be smaller than a tenth of the component only after a cut
  between two corners of the outline, narrower than both parts
  (:func:`_split_at_defects`); such small parts that meet a neighbour at
  no neck and no seam are joined again (:func:`_rejoin`).
- A cut from one notch across to a side is no neck where the shape goes on
  as narrow past it (:func:`_is_band`): a rod or a plate seen edge-on that
  a grain touches at its side is not cut across there.

References
----------
.. [3] F. Meyer and S. Beucher, "Morphological segmentation", J. Visual
   Commun. Image Represent. 1(1), 21-46, 1990, doi:10.1016/1047-3203(90)90014-M
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage as ndi

from grainhabit.plugins.segment.band_flood import watershed_window
from grainhabit.plugins.segment.disk_morphology import dilate_disk, erode_disk
from grainhabit.plugins.segment.distance import distance_map
from grainhabit.plugins.segment.distance_maxima import distance_h_maxima, squared_distances
from grainhabit.plugins.segment.hull_fill import convex_hull_mask, remember_hull_count, shape_key, tight_hull
from grainhabit.plugins.segment.runs import maxima_by_label

#: Fractions of the component's largest inscribed radius tried as h.
H_FRACTIONS = (0.5, 0.35, 0.25, 0.15, 0.1)
#: h is never below this many pixels (pixel-grid ripples of the distance map).
H_MIN_PX = 1.5
#: Concavities up to this depth (pixels) are digitisation ripple, not a neck.
MIN_DEPTH_PX = 2.0
#: Largest saddle / smaller peak of the distance map accepted as a neck between grains.
NECK_RATIO = 0.75
#: Levels of recursive cutting at most (a chain of grains may be cut one grain at a time).
MAX_DEPTH = 30
#: Cuts tried per component at most, over all recursion levels (bounds the time), per HEAP_GRAINS grains
#: the component could hold (its area over the disc of its largest inscribed radius), and at least this.
MAX_CUTS = 200
HEAP_GRAINS = 10.0
#: A shape that could hold this many discs of its largest inscribed radius is a heap: the distance-map
#: watershed is tried on it first (:func:`_split_heap`).
HEAP_MIN_GRAINS = 6.0
#: Smallest part of a split, as a fraction of the whole component's area (the heap's floor), except for
#: cuts between corners (see :data:`NOTCH_TURN_DEG`).
MIN_PART_FRACTION = 0.1
#: A part split again on its own keeps the split where it is this many times the median part of the cut ...
ALONE_MIN_SIZE = 1.5
#: ... or the new parts meet along at most this share of the thinner one's inscribed diameter ...
ALONE_NECK = 0.8
#: ... and only where every new part holds this share of the median
#: part of the first cut.
ALONE_MIN_SHARE = 0.25
#: Extra concavity allowance of the parts of a split (ragged ends of the dividing line).
PART_SLACK = 2.0
#: Smallest (twice the shallower of the notches at its ends) / (its length) of a straight cut across a neck.
NOTCH_RATIO = 0.3
#: A cut with shallower notches needs a seam: the image along it darker than both parts by this fraction.
SEAM_DIP = 0.15
#: Pixels nearer the outline than this (px) are left out of seam and interior levels (the blurred edge).
EDGE_PX = 2.0
#: Pixels of a part nearer the cut than this (px) are left out of its interior level.
SEAM_CLEAR_PX = 3.0
#: A seam is also darker than the lines beside it, this far (px) from the cut on either side, by ...
SEAM_SIDE_PX = 4.0
#: ... at least this fraction of their level (the same darkest-of-3 x 3 measure on both): a dark line of
#: a textured grain's own surface is as dark as its neighbours.
SEAM_SIDE_DIP = 0.05
#: A cut between notches crosses a neck when at most this fraction of the thicker part's inscribed diameter.
NECK_WIDTH = 1.2
#: A cut from one notch to the nearest outline point crosses a neck when the notch is this many times its length.
ONE_NOTCH_RATIO = 1.0
#: A cut leaving a part below the heap's floor (a tenth of the component) must end in corners: the outline
#: turns by at least this many degrees at both its ends (a side of a rod turns by almost none).
NOTCH_TURN_DEG = 35.0
#: ... and the cut leaves each corner within this many degrees of the notch's axis.
NOTCH_AXIS_DEG = 60.0
#: The turn at a cut's end is measured over arms of this fraction of the cut's length ...
NOTCH_ARM_FRACTION = 0.25
#: ... and never shorter than this (px; blur and thresholding round a corner over a few pixels).
NOTCH_ARM_PX = 3.0
#: A cut from one notch is across a band (not a neck) when the shape beyond it stays as narrow as the cut,
#: within this fraction (plus 2 px) ...
BAND_TOLERANCE = 0.15
#: ... for more than this many times the cut's length on one side.
BAND_RUN = 1.3
#: Enclosed pixels below this fraction of a component's median level are background (a pocket), not grain.
POCKET_LEVEL = 0.25
#: In a heap, pixels below this fraction of the component's median level are gaps between grains.
GAP_LEVEL = 0.5
#: A shape whose deepest concavity exceeds this many times its allowance is no single grain: a cut into
#: two convex parts is kept there without a neck or a seam.
CLEAR_CONCAVITY = 2.0
_EIGHT = np.ones((3, 3), bool)
#: Shapes given to concavity_depth lately and their depths (key: shape and packed pixels of the shape cut to
#: its box); emptied when it holds _DEPTHS_KEPT.
_DEPTHS: dict = {}
_DEPTHS_KEPT = 64
#: The last shape given to _distance_map and its distance map (the same key).
_LAST_DISTANCE: list = [None]


def concavity_depth(mask: np.ndarray) -> float:
    """Depth of the deepest concavity of a shape, in pixels.

    Parameters
    ----------
    mask : ndarray of bool, shape (h, w)
        One connected shape.

    Returns
    -------
    float
        ``max over (hull - shape) of the distance to the shape``; about 1
        pixel or less for a digitised convex shape.
    """
    if np.count_nonzero(mask) < 3:
        return 0.0
    # the depth depends on the shape alone, not on where it lies in its array: the hull, its pocket and the
    # pocket's distances to the shape all lie within the shape's own box, so the shape is cut to that box
    # (a part of a cut is asked in its component's box, then in its own)
    rows, cols = np.flatnonzero(mask.any(axis=1)), np.flatnonzero(mask.any(axis=0))
    tight = mask[rows[0]:rows[-1] + 1, cols[0]:cols[-1] + 1]
    # the same shape is often asked again (is the component convex? then: any seam?; a part, then the part
    # alone)
    key = shape_key(tight)
    known = _DEPTHS.get(key)
    if known is not None:
        return known
    # skimage.morphology.convex_hull_image, filled row by row (hull_fill; equal pixel for pixel); its pixel
    # count noted for hull_fill.hull_pixel_count (the seam pass asks for the same grains' hulls)
    hull = tight_hull(tight, key)
    remember_hull_count(key, int(np.count_nonzero(hull)))
    pocket = hull & ~tight
    depth = _pocket_depth(tight, pocket)
    if len(_DEPTHS) >= _DEPTHS_KEPT:
        _DEPTHS.clear()
    _DEPTHS[key] = depth
    return depth


def _pocket_depth(mask: np.ndarray, pocket: np.ndarray) -> float:
    """``max(distance_transform_edt(~mask)[pocket])`` (0 for an empty pocket).

    A digitised convex shape leaves a pocket one pixel thick along its hull: when every pocket pixel
    touches the shape (8-neighbours), its distance is 1 (a 4-neighbour in the shape) or sqrt(2) (a
    diagonal one only), and no distance transform is needed.
    """
    if not pocket.any():
        return 0.0
    m = np.zeros((mask.shape[0] + 2, mask.shape[1] + 2), bool)  # np.pad(mask, 1), without its overhead
    m[1:-1, 1:-1] = mask
    cross = m[:-2, 1:-1] | m[2:, 1:-1] | m[1:-1, :-2] | m[1:-1, 2:]
    diag = m[:-2, :-2] | m[:-2, 2:] | m[2:, :-2] | m[2:, 2:]
    deep = pocket & ~(cross | diag)
    if deep.any():
        # the deepest pocket pixel is one with no 8-neighbour in the shape (its distance is 2 or more)
        return _deep_pocket_depth(mask, deep)
    return float(np.sqrt(2.0)) if (pocket & ~cross).any() else 1.0


#: Margin (px) of the first window round a pocket's deep pixels in :func:`_deep_pocket_depth`.
POCKET_WINDOW_PX = 8


def _deep_pocket_depth(mask: np.ndarray, deep: np.ndarray) -> float:
    """``max(distance_transform_edt(~mask)[deep])``, the transform taken in a window round ``deep`` only.

    The window is the box of ``deep`` grown by :data:`POCKET_WINDOW_PX`. A pixel's distance to the
    nearest shape pixel found in the window is its distance in the whole array when no pixel beyond
    the window can be nearer: when it is at most the distance to the nearest pixel beyond a side of the
    window cut out of the array. Checked at every deep pixel; otherwise the window grows (twice the
    margin) and, at the array's size, is the whole array (tests/test_split_kernels_exact.py).
    """
    rows, cols = mask.shape
    rr, cc = np.nonzero(deep)
    margin = POCKET_WINDOW_PX
    while True:
        y0, y1 = max(int(rr.min()) - margin, 0), min(int(rr.max()) + margin + 1, rows)
        x0, x1 = max(int(cc.min()) - margin, 0), min(int(cc.max()) + margin + 1, cols)
        whole = (y0, y1, x0, x1) == (0, rows, 0, cols)
        window = mask[y0:y1, x0:x1]
        if whole or window.any():
            d = distance_map(~window)[rr - y0, cc - x0]
            if whole:
                return float(d.max())
            big = np.inf
            beyond = np.minimum(np.minimum(rr - y0 + 1 if y0 > 0 else big, y1 - rr if y1 < rows else big),
                                np.minimum(cc - x0 + 1 if x0 > 0 else big, x1 - cc if x1 < cols else big))
            if np.all(d <= beyond):
                return float(d.max())
        margin *= 2


def is_convex(mask: np.ndarray, split_depth: float = 0.08, slack: float = 1.0) -> bool:
    """Whether a shape counts as one convex grain.

    Parameters
    ----------
    mask : ndarray of bool, shape (h, w)
    split_depth : float
        Allowed concavity depth as a fraction of the equal-area radius.
    slack : float
        Multiplies the allowance (parts cut by a watershed line get 2).

    Notes
    -----
    Convex when ``concavity_depth <= slack * max(MIN_DEPTH_PX, split_depth * sqrt(A / pi))``:
    the allowance follows the grain size (``sqrt(A / pi)`` is the radius of
    the equal-area circle) and never drops below the digitisation ripple.
    """
    r_eq = np.sqrt(np.count_nonzero(mask) / np.pi)  # the pixel count, as mask.sum() (a quicker count)
    return concavity_depth(mask) <= slack * max(MIN_DEPTH_PX, split_depth * r_eq)


def _necks_are_narrow(ws: np.ndarray, dist: np.ndarray, n: int) -> bool:
    """Whether every watershed line between two parts runs through a real neck.

    The saddle of the distance map on the line between parts i and j must
    be at most ``NECK_RATIO * min(peak_i, peak_j)``: two touching grains
    meet at a neck narrower than either, while ripples along the ridge of
    one elongated grain leave saddles almost as high as the peaks.
    """
    peaks = maxima_by_label(dist, ws, n)  # ndi.maximum(dist, ws, index=np.arange(1, n + 1)), from the runs
    for i, sl in enumerate(ndi.find_objects(ws, max_label=n), start=1):
        if sl is None:
            continue
        # the part's box grown by a pixel holds its whole 8-neighbour ring
        box = tuple(slice(max(s.start - 1, 0), s.stop + 1) for s in sl)
        w = ws[box]
        ring = ndi.binary_dilation(w == i, structure=_EIGHT) & (w > i)
        for j in np.unique(w[ring]):
            saddle = float(dist[box][ring & (w == j)].max())
            if saddle > NECK_RATIO * min(peaks[i - 1], peaks[j - 1]):
                return False
    return True


def convexity_defects(mask: np.ndarray, min_depth: float, outline: bool = False):
    """Deepest points of the concavities of a shape's outline.

    Parameters
    ----------
    mask : ndarray of bool, shape (h, w)
        One connected shape without holes.
    min_depth : float
        Concavities shallower than this (pixels) are ignored.
    outline : bool
        Also return the outline points.

    Returns
    -------
    defects : list of (point, depth)
        ``point`` (row, col) as floats, ``depth`` in pixels: for every hull
        edge, the outline points farthest from it (every peak of the
        distance profile with a prominence of at least ``min_depth / 2``).
    points : ndarray of float, shape (k, 2)
        The outline (row, col), only if ``outline`` is true.
    """
    from scipy.spatial import ConvexHull, QhullError
    from skimage.measure import find_contours

    padded = np.zeros((mask.shape[0] + 2, mask.shape[1] + 2), np.float32)  # np.pad(mask, 1) as float32
    padded[1:-1, 1:-1] = mask
    contours = find_contours(padded, 0.5)
    pts = max(contours, key=len)[:-1] - 1.0 if contours else np.zeros((0, 2))
    try:
        hv = np.sort(ConvexHull(pts).vertices) if len(pts) >= 8 else None
    except QhullError:
        hv = None
    if hv is None:
        return ([], pts) if outline else []
    out = []
    for k in _edges_reaching(pts, hv, min_depth):
        i, j = hv[k], hv[(k + 1) % len(hv)]
        idx = np.arange(i, j + 1) if j > i else np.r_[np.arange(i, len(pts)), np.arange(0, j + 1)]
        if len(idx) < 3:
            continue
        a, b = pts[i], pts[j]
        ab = b - a
        norm = float(np.hypot(*ab))
        if norm == 0:
            continue
        seg = pts[idx]
        dist = np.abs(ab[0] * (seg[:, 1] - a[1]) - ab[1] * (seg[:, 0] - a[0])) / norm
        if dist.max() < min_depth:
            continue  # no peak reaches the height (most hull edges: the same as find_peaks' empty answer)
        # one hull edge can span several notches: keep every distinct peak
        peaks = find_peaks(np.r_[0.0, dist, 0.0], height=min_depth, prominence=0.5 * min_depth)
        out.extend((seg[m - 1], float(dist[m - 1])) for m in peaks)
    return (out, pts) if outline else out


def _edges_reaching(pts: np.ndarray, hv: np.ndarray, min_depth: float) -> np.ndarray:
    """The hull edges of an outline that some outline point between their ends lies ``min_depth`` or more from.

    Parameters
    ----------
    pts : ndarray of float, shape (n, 2)
        The closed outline.
    hv : ndarray of int, shape (k,)
        Increasing indices of the hull's vertices on the outline.
    min_depth : float

    Returns
    -------
    ndarray of int
        Increasing edge numbers ``e`` (from ``hv[e]`` to ``hv[e + 1]``, the last one round to ``hv[0]``):
        the edges whose largest distance, computed as :func:`convexity_defects` computes it, is not
        below ``min_depth`` (less a relative 1e-9), or is not a number. All points at once, one edge
        per point (the one starting at or before it; an edge's end point lies on it), instead of a
        pass per edge. A superset of the edges the loop of :func:`convexity_defects` goes on with,
        which then judges them as before (tests/test_split_kernels_exact.py).
    """
    n = len(pts)
    edge = np.searchsorted(hv, np.arange(n), side="right") - 1
    edge[edge < 0] = len(hv) - 1  # the points before the first vertex lie on the edge round from the last
    start = pts[hv[edge]]
    end = pts[hv[(edge + 1) % len(hv)]]
    ab0, ab1 = end[:, 0] - start[:, 0], end[:, 1] - start[:, 1]
    with np.errstate(divide="ignore", invalid="ignore"):
        dist = np.abs(ab0 * (pts[:, 1] - start[:, 1]) - ab1 * (pts[:, 0] - start[:, 0])) / np.hypot(ab0, ab1)
    top = np.zeros(len(hv))
    np.maximum.at(top, edge, dist)
    # a hair below min_depth: a superset of the edges the loop keeps, whatever the last bit of a quotient
    return np.flatnonzero(~(top < min_depth * (1.0 - 1e-9)))


def find_peaks(x: np.ndarray, height: float, prominence: float) -> np.ndarray:
    """Local maxima of a 1-D signal at least ``height`` high and ``prominence`` prominent.

    Parameters
    ----------
    x : ndarray, shape (n,)
    height : float
        Smallest peak value.
    prominence : float
        Smallest prominence.

    Returns
    -------
    ndarray of int
        Peak indices, increasing: ``scipy.signal.find_peaks(x, height=height,
        prominence=prominence)[0]`` [1]_, computed here with numpy (importing
        scipy.signal brings scipy.stats with it, about 0.6 s of CPU in every
        worker process; ``tests/test_touching_exact.py`` checks the two equal).

    Notes
    -----
    As scipy defines them: a local maximum is a sample higher than its left
    neighbour and than the first sample after it that differs from it (a
    flat top counts once, at its middle sample, rounded down; the first and
    the last sample never count). Its prominence is its value less the
    higher of the lowest values between it and the nearest strictly higher
    sample on either side (or the signal's end).

    References
    ----------
    .. [1] SciPy documentation, ``scipy.signal.find_peaks`` and ``scipy.signal.peak_prominences``.
    """
    x = np.asarray(x, float)
    if x.size < 3:
        return np.zeros(0, np.intp)
    # runs of equal samples: start index and value; a run is a peak when higher than both neighbour runs
    # and neither at the signal's start nor at its end
    starts = np.r_[0, np.flatnonzero(x[1:] != x[:-1]) + 1]
    ends = np.r_[starts[1:], x.size] - 1
    v = x[starts]
    top = np.zeros(v.size, bool)
    top[1:-1] = (v[1:-1] > v[:-2]) & (v[1:-1] > v[2:])
    peaks = (starts[top] + ends[top]) // 2
    peaks = peaks[height <= x[peaks]]
    keep = np.zeros(peaks.size, bool)
    for i, p in enumerate(peaks):
        h = x[p]
        higher_left = np.flatnonzero(x[:p] > h)
        lo = higher_left[-1] + 1 if higher_left.size else 0
        higher_right = np.flatnonzero(x[p + 1:] > h)
        hi = p + 1 + higher_right[0] if higher_right.size else x.size
        keep[i] = prominence <= h - max(x[lo:p + 1].min(), x[p:hi].min())
    return peaks[keep].astype(np.intp)


def _cut(mask: np.ndarray, p: np.ndarray, q: np.ndarray, min_area: float) -> list[np.ndarray] | None:
    """Cut a shape along the segment p-q; two parts or None."""
    from skimage.draw import line

    r0, c0 = np.clip(np.round(p).astype(int), 0, np.array(mask.shape) - 1)
    r1, c1 = np.clip(np.round(q).astype(int), 0, np.array(mask.shape) - 1)
    rr, cc = line(r0, c0, r1, c1)
    # the end points lie on the outline and round to either side of it: judge the pixels between
    inner = mask[rr[1:-1], cc[1:-1]] if len(rr) > 2 else mask[rr, cc]
    if inner.size == 0 or inner.mean() < 0.9:
        return None  # the segment leaves the shape
    cut = mask.copy()
    cut[rr, cc] = False
    pieces, n = ndi.label(cut)  # 4-connected: a digital line separates
    if n < 2:
        return None
    areas = np.bincount(pieces.ravel())[1:]
    order = np.argsort(areas)[::-1]
    if areas[order[1]] < min_area:
        return None
    markers = np.zeros(mask.shape, np.int32)
    markers[pieces == order[0] + 1] = 1
    markers[pieces == order[1] + 1] = 2
    ws = watershed_window(np.zeros(mask.shape, np.float32), markers, mask)  # skimage's watershed
    return [ws == 1, ws == 2]


def _darkest_3x3(smooth: np.ndarray, r: np.ndarray, c: np.ndarray) -> np.ndarray:
    """The least of each pixel's 3 x 3 neighbours (scipy.ndimage.grey_erosion with a 3 x 3 footprint, the
    array's edge mirrored, read at the given pixels only)."""
    h, w = smooth.shape
    return np.min([smooth[np.clip(r + dr, 0, h - 1), np.clip(c + dc, 0, w - 1)]
                   for dr in (-1, 0, 1) for dc in (-1, 0, 1)], axis=0)


def _side_lines_level(smooth: np.ndarray, deep: np.ndarray, rr: np.ndarray, cc: np.ndarray,
                      on: np.ndarray) -> float | None:
    """The darker of the two lines beside a cut, :data:`SEAM_SIDE_PX` off it on either side.

    Each line's level is the mean of the darkest-of-3 x 3 values at the cut's inner pixels shifted along
    the cut's normal, counted where the shifted pixel lies inside the shape clear of its edge. None
    where either line has fewer than 3 such pixels (a cut through a thin shape).
    """
    dr, dc = float(rr[-1] - rr[0]), float(cc[-1] - cc[0])
    norm = np.hypot(dr, dc)
    if norm == 0:
        return None
    h, w = deep.shape
    levels = []
    for sign in (1.0, -1.0):
        r = np.rint(rr[on] + sign * SEAM_SIDE_PX * -dc / norm).astype(np.intp)
        c = np.rint(cc[on] + sign * SEAM_SIDE_PX * dr / norm).astype(np.intp)
        inside = (r >= 0) & (r < h) & (c >= 0) & (c < w)
        r, c = r[inside], c[inside]
        keep = deep[r, c]
        if np.count_nonzero(keep) < 3:
            return None
        levels.append(float(_darkest_3x3(smooth, r[keep], c[keep]).mean()))
    return min(levels)


def seam_contrast(image: np.ndarray, mask: np.ndarray, parts: list[np.ndarray], rr: np.ndarray,
                  cc: np.ndarray) -> float:
    """How much darker the image is along a cut than inside the two parts it leaves.

    Parameters
    ----------
    image : ndarray of float, shape (h, w)
        Preprocessed image over the component's box (grains bright).
    mask : ndarray of bool, shape (h, w)
        The shape that was cut.
    parts : list of ndarray of bool
        The two parts.
    rr, cc : ndarray of int
        Pixels of the cut.

    Returns
    -------
    float
        ``1 - seam / min(level_1, level_2)``: ``seam`` is the mean, over the
        cut's pixels more than :data:`EDGE_PX` inside the outline, of the
        darkest pixel within 1 px of each (the cut may run a pixel beside the
        seam), and ``level_i`` the median of part i more than
        :data:`EDGE_PX` from the outline and :data:`SEAM_CLEAR_PX` from the
        cut, all on the image smoothed by a Gaussian of 1 px. 0 when either
        is too small to measure.

    Notes
    -----
    Grains that meet face to face leave a dark line between them (a gap, a
    groove, or the thinner edges of both in transmission), while a line
    across one grain has the grain's own level.
    """
    smooth = ndi.gaussian_filter(np.asarray(image, np.float32), 1.0)
    if mask.all():  # no background in the box: the transform's own convention (see distance_transform_edt)
        deep = distance_map(mask) > EDGE_PX
    else:
        # distance_transform_edt(mask) > EDGE_PX: survives the erosion by that disk, the array's edge counting
        # as neither kind (disk_morphology; the same pixels, several times cheaper on a component's box)
        deep = erode_disk(mask, EDGE_PX, 1)
    on = deep[rr, cc]
    if on.sum() < 3:
        return 0.0
    # scipy.ndimage.grey_erosion(smooth, footprint=3x3) read at the cut's pixels only: the least of the
    # 3 x 3 neighbours, the box's edge mirrored ('reflect': a pixel beyond the edge is the edge pixel)
    darkest = _darkest_3x3(smooth, rr[on], cc[on])
    seam = float(darkest.mean())
    side = _side_lines_level(smooth, deep, rr, cc, on)
    if side is not None and side > 0 and 1.0 - seam / side < SEAM_SIDE_DIP:
        return 1.0 - seam / side
    cut = np.zeros(mask.shape, bool)
    cut[rr, cc] = True
    clear = ~dilate_disk(cut, SEAM_CLEAR_PX)  # distance_transform_edt(~cut) > SEAM_CLEAR_PX (disk_morphology)
    levels = []
    for part in parts:
        inner = part & deep & clear
        if inner.sum() < 3:
            return 0.0
        levels.append(float(np.median(smooth[inner])))
    low = min(levels)
    return 1.0 - seam / low if low > 0 else 0.0


def _cut_line(mask: np.ndarray, p: np.ndarray, q: np.ndarray):
    """Pixels of the digital segment p-q, clipped to the box."""
    from skimage.draw import line

    r0, c0 = np.clip(np.round(p).astype(int), 0, np.array(mask.shape) - 1)
    r1, c1 = np.clip(np.round(q).astype(int), 0, np.array(mask.shape) - 1)
    return line(r0, c0, r1, c1)


def _corner(outline: np.ndarray, arc: np.ndarray, total: float, point: np.ndarray, arm: float,
            toward: np.ndarray) -> tuple[float, float]:
    """How sharply a closed outline turns at one of its points, and how a cut from there meets the turn.

    Parameters
    ----------
    outline : ndarray of float, shape (k, 2)
        Closed outline (row, col), in order.
    arc : ndarray of float, shape (k,)
        Arc length (px) from the first point to each point.
    total : float
        Length of the whole outline (px).
    point : ndarray of float, shape (2,)
        A point of the outline (the nearest one is taken).
    arm : float
        Arc length (px) before and after the point over which the directions are taken.
    toward : ndarray of float, shape (2,)
        The other end of a cut from ``point``.

    Returns
    -------
    turn : float
        Angle (degrees, 0 to 180) between the chords (point before -> point) and (point -> point
        after): near 0 on a straight or gently curved side, about 90 where two square grains meet
        face to face, 60 to 180 where two discs meet (handbook geometry: the tangents of two circles
        whose centres are ``D`` apart turn by ``180 - 2 acos(D / 2r)`` at their crossing).
    off_axis : float
        Angle (degrees) between the cut and the notch's axis (the bisector of the two chords from the
        point, reversed: into the shape). Where two grains meet the line between them leaves the
        notch along its axis (two discs: 0; a small square face to face against a larger one: 45);
        a cut that crosses a rod from the corner where another grain touches its side leaves at
        nearly 90 degrees.
    """
    i = int(np.argmin(np.hypot(*(outline - point).T)))
    before = outline[int(np.argmin(np.abs((arc - (arc[i] - arm)) % total)))]
    after = outline[int(np.argmin(np.abs((arc - (arc[i] + arm)) % total)))]
    u, v = outline[i] - before, after - outline[i]
    nu, nv = float(np.hypot(*u)), float(np.hypot(*v))
    if nu == 0 or nv == 0:
        return 0.0, 90.0
    turn = float(np.degrees(np.arccos(np.clip(np.dot(u, v) / (nu * nv), -1.0, 1.0))))
    axis = u / nu - v / nv  # minus the sum of the unit chords from the point: into the shape
    cut = toward - outline[i]
    na, nc = float(np.hypot(*axis)), float(np.hypot(*cut))
    if na == 0 or nc == 0:
        return turn, 90.0
    return turn, float(np.degrees(np.arccos(np.clip(np.dot(axis, cut) / (na * nc), -1.0, 1.0))))


def _is_band(mask: np.ndarray, p: np.ndarray, q: np.ndarray) -> bool:
    """Whether the segment p-q runs across a band (a rod, a plate seen edge-on) rather than a neck.

    Parameters
    ----------
    mask : ndarray of bool, shape (h, w)
        The shape being cut.
    p, q : ndarray of float, shape (2,)
        Ends of the cut (row, col), on the outline.

    Returns
    -------
    bool
        True when, on either side, the shape's chord parallel to the cut stays within
        ``(1 + BAND_TOLERANCE) * length + 2 px`` for more than :data:`BAND_RUN` times the cut's length
        beyond it (the chord's middle followed step by step, 1 px at a time): the cut then lies across
        a band that goes on past it, as when a grain touches a rod's side.
    """
    u = q - p
    length = float(np.hypot(*u))
    if length == 0:
        return False
    u = u / length
    limit = (1.0 + BAND_TOLERANCE) * length + 2.0
    s = np.arange(-limit, limit + 0.5, 0.5)
    mid = len(s) // 2
    lo, hi = np.zeros(2), np.array(mask.shape, float) - 1
    for sign in (1.0, -1.0):
        normal = sign * np.array([-u[1], u[0]])
        centre = 0.5 * (p + q)
        t = 0
        while t <= BAND_RUN * length:
            t += 1
            centre = centre + normal
            pts = np.clip(np.round(centre + s[:, None] * u), lo, hi).astype(int)
            inside = mask[pts[:, 0], pts[:, 1]]
            if not inside[mid]:
                break  # the shape ends (or turns away) here
            if inside[:mid + 1].all() or inside[mid:].all():
                break  # wider than the limit: the shape widens past the cut
            left = mid - int(np.argmin(inside[mid::-1]))
            right = mid + int(np.argmin(inside[mid:]))
            centre = centre + 0.5 * (s[left + 1] + s[right - 1]) * u
        else:
            return True
    return False


def _box(mask: np.ndarray) -> tuple[slice, slice]:
    """The bounding box of a shape's pixels with a margin of 1 pixel, within the array."""
    rows = np.flatnonzero(mask.any(axis=1))
    cols = np.flatnonzero(mask.any(axis=0))
    return (slice(max(int(rows[0]) - 1, 0), int(rows[-1]) + 2), slice(max(int(cols[0]) - 1, 0), int(cols[-1]) + 2))


def _inscribed_radius(part: np.ndarray) -> float:
    """``distance_transform_edt(part).max()``, the transform taken in the part's box only.

    The box with its margin of one pixel (:func:`_box`) holds every pixel's nearest background pixel
    or ends at the array's edge: a background pixel beyond a margin row or column is farther than
    the margin pixel in line with it, so the distances inside the box are those of the whole array.
    """
    if not part.any():
        return 0.0
    return float(distance_map(part[_box(part)]).max())


def _distance_map(mask: np.ndarray) -> np.ndarray:
    """``scipy.ndimage.distance_transform_edt(mask)``, remembered for the last shape asked (read only).

    A component's transform is asked for its inscribed radius (:func:`split_component`) and again by
    the heap test and the distance-map flood of the same shape (:func:`_split_heap`, :func:`_split`).
    """
    key = (mask.shape, np.packbits(mask).tobytes())
    last = _LAST_DISTANCE[0]  # one tuple, read at once (tiles may run in threads)
    if last is not None and last[0] == key:
        return last[1]
    dist = distance_map(mask)  # scipy's distance_transform_edt (segment.distance)
    dist.flags.writeable = False
    _LAST_DISTANCE[0] = (key, dist)
    return dist


def _divide_further(parts: list[np.ndarray], min_area: float, split_depth: float, depth: int, budget: list,
                    image: np.ndarray | None, keep: bool, fine_area: float) -> list[np.ndarray] | None:
    """The parts of a cut, each concave one split again.

    With ``keep`` false, None as soon as a concave part cannot be split;
    with ``keep`` true such a part stays whole. Each part is judged and cut
    within its own bounding box (the same result, by translation, at the
    cost of its box rather than the component's).
    """
    out = []
    for part in parts:
        box = _box(part)
        sub_mask = part[box]
        if is_convex(sub_mask, split_depth, PART_SLACK):
            out.append(part)
            continue
        sub = _split(sub_mask, min_area, split_depth, depth + 1, budget, None if image is None else image[box],
                     fine_area)
        if sub is None:
            if not keep:
                return None
            out.append(part)
            continue
        for piece in sub:
            full = np.zeros(part.shape, bool)
            full[box] = piece
            out.append(full)
    return out


def _split_at_seams(mask: np.ndarray, min_area: float, depth: int, budget: list,
                    image: np.ndarray) -> list[np.ndarray] | None:
    """Cuts along dark seams only, between notches deeper than :data:`MIN_DEPTH_PX`, repeated on the parts.

    For shapes within the convexity allowance (grains face to face leave
    only shallow notches): nothing but a seam divides them.
    """
    if depth > MAX_DEPTH or np.count_nonzero(mask) < 2 * min_area or concavity_depth(mask) <= MIN_DEPTH_PX:
        return None
    parts = _split_at_defects(mask, min_area, 0.0, depth, budget, image, seam_only=True)
    if parts is None:
        return None
    out = []
    for part in parts:
        out.extend(_split_at_seams(part, min_area, depth + 1, budget, image) or [part])
    return out


def _split_at_defects(mask: np.ndarray, min_area: float, split_depth: float, depth: int,
                      budget: list, image: np.ndarray | None = None,
                      seam_only: bool = False, fine_area: float | None = None) -> list[np.ndarray] | None:
    """Cut across a neck between concavities so that the parts are convex (or split further).

    A cut is across a neck when the notches at its ends are deep for its
    length (twice the shallower one is :data:`NOTCH_RATIO` of it or more; a
    cut from a single notch: the notch :data:`ONE_NOTCH_RATIO` times the
    length) and half its length is at most :data:`NECK_WIDTH` times the
    inscribed radius of the thicker part, or,
    with the image, when it runs along a dark seam (:func:`seam_contrast` at
    least :data:`SEAM_DIP`). The first such cut (deepest notches for the
    length first) whose parts are convex, or can be cut again into convex
    parts, is kept; failing that the first such cut at all, its concave
    parts cut further where they can be (a chain of grains whose parts are
    not all convex still falls apart at its necks). A shape whose deepest
    concavity exceeds :data:`CLEAR_CONCAVITY` times its allowance is no
    single grain: there a cut into two convex parts is kept without a neck
    or a seam (a triangle pressed against a square along its whole side).

    No part is smaller than ``min_area`` (the heap's floor, a tenth of the
    component) nor a tenth of this shape, except after a cut between two
    notches that are corners (the outline turns by :data:`NOTCH_TURN_DEG`
    or more at both ends, over arms of a quarter of the cut's length) and
    narrower than both parts (half its length at most :data:`NECK_WIDTH`
    times the thinner part's inscribed radius): a grain of a heap of more
    than ten. The straight side of a rod, where the notch of a pocket
    between the grains touching it may lie, turns by almost nothing there.
    Such parts are at least ``fine_area`` (default ``min_area``).
    """
    r_eq = np.sqrt(mask.sum() / np.pi)
    defects, outline = convexity_defects(mask, max(MIN_DEPTH_PX, split_depth * r_eq), outline=True)
    if not defects:
        return None
    # no part may be a sliver of the shape being cut either
    min_part = max(min_area, MIN_PART_FRACTION * float(mask.sum()))
    fine_area = min_area if fine_area is None else fine_area
    fine_part = max(fine_area, MIN_PART_FRACTION * float(mask.sum()))
    step = np.hypot(*np.diff(np.vstack([outline, outline[:1]]), axis=0).T)
    arc = np.concatenate([[0.0], np.cumsum(step)[:-1]])  # arc length (px) along the outline
    total = float(step.sum())
    cuts = []
    for a in range(len(defects)):
        for b in range(a + 1, len(defects)):
            (p, dp), (q, dq) = defects[a], defects[b]
            cuts.append((float(np.hypot(*(p - q))) / (dp + dq), p, q, 2.0 * min(dp, dq)))
    cuts.sort(key=lambda c: c[0])
    cuts = cuts[:8]
    # a concavity whose partner is too shallow to count: cut to the nearest outline points
    for p, dp in defects:
        d = np.hypot(*(outline - p).T)
        ip = int(np.argmin(d))
        along = np.abs(arc - arc[ip])
        along = np.minimum(along, total - along)
        order = np.argsort(d)
        # a cut is a short cut: much shorter than the way round the outline (tested for all points at once)
        short = ~((d < 2 * MIN_DEPTH_PX) | (along < 3 * d))
        taken = []
        for i in order[short[order]]:
            if any(np.hypot(*(outline[i] - t)) < 3 for t in taken):
                continue
            taken.append(outline[i])
            if len(taken) == 6:
                break
        cuts.extend((np.inf, p, t, NOTCH_RATIO * dp / ONE_NOTCH_RATIO) for t in taken)
    fallback = None
    clearly_concave = (not seam_only
                       and concavity_depth(mask) > CLEAR_CONCAVITY * max(MIN_DEPTH_PX, split_depth * r_eq))
    for key, p, q, notches in cuts:
        if budget[0] <= 0:
            break
        length = float(np.hypot(*(p - q)))
        narrow = notches >= NOTCH_RATIO * length and not seam_only
        if not narrow and image is None:
            continue
        budget[0] -= 1
        pair = narrow and np.isfinite(key)
        parts = _cut(mask, p, q, fine_part if pair else min_part)
        if parts is None:
            continue
        # notches alone mark a neck only where the cut is narrower than the thicker part (a thin band,
        # a rim or a ring cut across has deep notches on its inner side but no neck)
        if narrow:
            radii = [_inscribed_radius(part) - 0.5 for part in parts]
            narrow = 0.5 * length <= NECK_WIDTH * max(radii)
            arm = max(NOTCH_ARM_PX, NOTCH_ARM_FRACTION * length)
            ends = [_corner(outline, arc, total, x, arm, y) for x, y in ((p, q), (q, p))] if pair else []
            corners = pair and all(turn >= NOTCH_TURN_DEG for turn, _ in ends)
            if min(part.sum() for part in parts) < min_part:
                # a part below the heap's floor: a grain of a heap, cut off between corners, narrower than
                # both parts
                if not (narrow and corners and 0.5 * length <= NECK_WIDTH * min(radii)
                        and all(off <= NOTCH_AXIS_DEG for _, off in ends)):
                    continue
            if narrow and not pair:
                # from one notch across to a side: no neck where the shape goes on as narrow past the
                # cut (a rod touched by a grain at its side)
                narrow = not _is_band(mask, p, q)
        if not narrow and (image is None
                           or seam_contrast(image, mask, parts, *_cut_line(mask, p, q)) < SEAM_DIP):
            # no neck and no seam: a shape far from convex (notches over CLEAR_CONCAVITY times the
            # allowance) still falls into two convex parts there (two faceted grains pressed together)
            if not (clearly_concave and all(is_convex(part, split_depth) for part in parts)):
                continue
        if seam_only:
            return parts
        out = _divide_further(parts, min_area, split_depth, depth, budget, image, keep=False, fine_area=fine_area)
        if out is not None:
            return out
        if fallback is None:
            fallback = parts
    if fallback is not None:
        return _divide_further(fallback, min_area, split_depth, depth, budget, image, keep=True, fine_area=fine_area)
    return None


def split_component(mask: np.ndarray, min_area: float, split_depth: float = 0.08,
                    image: np.ndarray | None = None) -> list[np.ndarray]:
    """Split one connected component into grains at its necks.

    Parameters
    ----------
    mask : ndarray of bool, shape (h, w)
        One component, cropped to its bounding box with a margin of 1 pixel.
    min_area : float
        Smallest part area in pixels.
    split_depth : float
        Concavity allowance as a fraction of the equal-area radius (see
        :func:`is_convex`); convex components are never split.
    image : ndarray of float, shape (h, w), optional
        The preprocessed image over the same box (grains bright): with it a
        cut between shallow notches is made where a dark seam runs.

    Returns
    -------
    list of ndarray of bool, shape (h, w)
        The grains; one element (the mask itself) if not split.

    Notes
    -----
    First the outline's concavities (:func:`convexity_defects`) are paired,
    deepest notches for the cut's length first, and the shape is cut along
    the straight segment between them where that crosses a neck (see
    :func:`_split_at_defects`); the visible boundary between an overlapping
    pair is an edge of the front (convex) grain, which runs between these
    two points. Parts that are still concave are split again; no part is
    smaller than a tenth of the shape it is cut from, nor, but for cuts between two corners that are
    narrower than both parts, a tenth of the component (the heap's floor; see
    :func:`_split_at_defects`). If no cut crosses a neck, the distance-map watershed is tried (parts
    of a tenth of the component at least). Neighbouring parts, one of them under the heap's floor,
    that meet at no neck and no seam are joined again (:func:`_rejoin`).
    """
    if np.count_nonzero(mask) < 2 * min_area:
        return [mask]
    if is_convex(mask, split_depth):
        # within the allowance: only a dark seam between two notches divides it
        return (_split_at_seams(mask, min_area, 0, [MAX_CUTS], image) if image is not None else None) or [mask]
    # no part may be a sliver of the component: a tenth of its area at least (a letter's stem and bowl
    # are not two grains)
    pockets = enclosed_pockets(mask, image, min_area) if image is not None else None
    if pockets is not None:
        # background enclosed by a ring of grains (filled as a hole): the ring is split on its own, and
        # the pocket is returned as a part of its own (mostly below the threshold, it is dropped as such)
        rest, n = ndi.label(mask & ~pockets, structure=_EIGHT)
        found, _ = ndi.label(pockets, structure=_EIGHT)
        out = [found == k for k in range(1, int(found.max()) + 1)]
        for k in range(1, n + 1):
            piece = rest == k
            out.extend(split_component(piece, min_area, split_depth, image) if piece.sum() >= min_area else [piece])
        return out
    min_part = max(min_area, MIN_PART_FRACTION * float(mask.sum()))
    radius = float(_distance_map(mask).max())
    grains = float(mask.sum()) / (np.pi * radius ** 2)  # how many of its thickest grain it could hold
    budget = [int(MAX_CUTS * max(1.0, grains / HEAP_GRAINS))]
    parts = _split(mask, min_part, split_depth, 0, budget, image, min_area) or [mask]
    if len(parts) > 2:
        parts = _rejoin(parts, split_depth, image, min_part)
    if len(parts) > 1:
        parts = _split_parts_alone(parts, min_area, split_depth, image)
    return parts


def _meet_at_necks(pieces: list[np.ndarray]) -> bool:
    """Whether every two touching pieces meet along less than :data:`ALONE_NECK` of the thinner one's
    inscribed diameter (the contact counted as the pixels of one 8-adjacent to the other)."""
    radii = [_inscribed_radius(p) for p in pieces]
    for i, a in enumerate(pieces):
        grown = ndi.binary_dilation(a, _EIGHT)
        for j in range(i + 1, len(pieces)):
            contact = int(np.count_nonzero(grown & pieces[j]))
            if contact and contact > ALONE_NECK * 2.0 * min(radii[i], radii[j]):
                return False
    return True


def _split_parts_alone(parts: list[np.ndarray], min_area: float, split_depth: float,
                       image: np.ndarray | None) -> list[np.ndarray]:
    """Split again, each on its own, the parts of a cut that are still concave.

    Inside a long chain or a large group no part may be smaller than a tenth
    of the whole (the heap's floor) and the cuts per component are bounded,
    so pairs of grains along a chain stay joined. A part that is still
    concave is taken on its own and split by the same rules as any component
    of its size (segment-grains 2.7); the split is kept only where every new
    part holds at least :data:`ALONE_MIN_SHARE` of the median part of the
    first cut (grains of a pair or a short chain, not a sliver cut off one
    grain), and where the part is at least :data:`ALONE_MIN_SIZE` times that
    median (a pair among single grains) or the new parts meet at necks
    (:func:`_meet_at_necks`): a rod among rods is not cut across its full width.
    """
    typical = float(np.median([int(q.sum()) for q in parts]))
    out = []
    for q in parts:
        if q.sum() < 2 * min_area or is_convex(q, split_depth):
            out.append(q)
            continue
        # 2 px round the part (its _box grown by one): the image beyond the outline is read by the cut
        # tests, and a 1 px crop gives other cuts on EMPS frames
        rows, cols = _box(q)
        r0, c0 = max(rows.start - 1, 0), max(cols.start - 1, 0)
        r1, c1 = min(rows.stop + 1, q.shape[0]), min(cols.stop + 1, q.shape[1])
        sub = split_component(q[r0:r1, c0:c1], min_area, split_depth,
                              image[r0:r1, c0:c1] if image is not None else None)
        if (len(sub) == 1 or min(int(piece.sum()) for piece in sub) < ALONE_MIN_SHARE * typical
                or not (q.sum() >= ALONE_MIN_SIZE * typical or _meet_at_necks(sub))):
            out.append(q)
            continue
        for piece in sub:
            full = np.zeros_like(q)
            full[r0:r1, c0:c1] = piece
            out.append(full)
    return out


def enclosed_pockets(mask: np.ndarray, image: np.ndarray, min_area: float) -> np.ndarray | None:
    """Background enclosed by a component: pixels far below its grains' level, away from its outline.

    Parameters
    ----------
    mask : ndarray of bool, shape (h, w)
        One component (its holes filled).
    image : ndarray of float, shape (h, w)
        The preprocessed image (grains bright, background 0).
    min_area : float
        Smallest pocket kept (pixels).

    Returns
    -------
    ndarray of bool or None
        Connected regions where the image, smoothed by a Gaussian of 1 px, is below
        :data:`POCKET_LEVEL` of the component's median, of ``min_area`` or more, that do not reach
        the component's outline (a ring of grains around a gap); None when there is none.
    """
    smooth = ndi.gaussian_filter(np.asarray(image, np.float32), 1.0)
    level = POCKET_LEVEL * float(np.median(smooth[mask]))
    if level <= 0:
        return None
    low, n = ndi.label(mask & (smooth < level), structure=_EIGHT)
    if n == 0:
        return None
    areas = np.bincount(low.ravel())[1:]
    rim = np.unique(low[ndi.binary_dilation(~mask, structure=_EIGHT)])
    keep = np.zeros(n + 1, bool)
    keep[1:] = areas >= min_area
    keep[rim] = False
    keep[0] = False
    return keep[low] if keep.any() else None


def _meet_at_neck(a: np.ndarray, b: np.ndarray) -> bool:
    """Whether two touching parts meet at a neck of their union: notches at both ends of their border.

    The border (pixels of ``b`` next to ``a``) reaches the union's outline at two ends (or more); each
    end's notch is the depth (largest distance to the union) of the pockets of the union's convex hull
    that reach within 2 px of it. A neck: twice the shallower of the two deepest end notches is at least :data:`NOTCH_RATIO`
    of the border's length, as for a cut (:func:`_split_at_defects`).
    """
    union = a | b
    border = ndi.binary_dilation(a, structure=_EIGHT) & b
    outside = ~union
    ends = border & ndi.binary_dilation(outside, structure=_EIGHT)
    end_labels, n_ends = ndi.label(ndi.binary_dilation(ends, structure=_EIGHT), structure=_EIGHT)
    if n_ends < 2:
        return False
    pocket = convex_hull_mask(union) & outside
    if not pocket.any():
        return False
    pockets, n_pockets = ndi.label(pocket, structure=_EIGHT)
    deepest = np.r_[0.0, maxima_by_label(distance_map(outside), pockets, n_pockets)]  # ndi.maximum
    notch = np.sort([deepest[np.unique(pockets[ndi.binary_dilation(end_labels == k, structure=_EIGHT)])].max()
                     for k in range(1, n_ends + 1)])[::-1]
    rows, cols = np.nonzero(border)
    length = float(np.hypot(rows.max() - rows.min(), cols.max() - cols.min()))
    return 2.0 * float(notch[1]) >= NOTCH_RATIO * length


def _rejoin(parts: list[np.ndarray], split_depth: float, image: np.ndarray | None,
            heap_floor: float) -> list[np.ndarray]:
    """Join back neighbouring parts, one of them under the heap's floor, that meet at no neck.

    A pair of touching parts (8-neighbours), the smaller under ``heap_floor``, is joined when their
    union is convex within the allowance (:func:`is_convex`) or their border has no notch at both
    ends (:func:`_meet_at_neck`), unless the image shows a dark seam along the border
    (:func:`seam_contrast`): such a cut crossed a grain between notches that belong to other grains
    (a rod with grains touching its sides). Pairs with the smaller part first; a pair judged once is
    judged again only after one of its parts has grown.
    """
    labels = np.zeros(parts[0].shape, np.int32)
    for k, part in enumerate(parts, 1):
        labels[part] = k
    kept = set()  # pairs judged to stay apart
    while True:
        areas = np.bincount(labels.ravel(), minlength=len(parts) + 1)
        pairs = set()
        for a, b in ((labels[1:, :], labels[:-1, :]), (labels[:, 1:], labels[:, :-1]),
                     (labels[1:, 1:], labels[:-1, :-1]), (labels[1:, :-1], labels[:-1, 1:])):
            touch = (a > 0) & (b > 0) & (a != b)
            pairs.update(zip(np.minimum(a[touch], b[touch]).tolist(), np.maximum(a[touch], b[touch]).tolist()))
        todo = sorted((p for p in pairs if p not in kept and min(areas[p[0]], areas[p[1]]) < heap_floor),
                      key=lambda p: min(areas[p[0]], areas[p[1]]))
        joined = False
        for i, j in todo:
            union = (labels == i) | (labels == j)
            box = _box(union)
            a, b = labels[box] == i, labels[box] == j
            if not is_convex(union[box], split_depth) and _meet_at_neck(a, b):
                kept.add((i, j))
                continue
            if image is not None:
                rr, cc = np.nonzero(ndi.binary_dilation(a, structure=_EIGHT) & b)
                if seam_contrast(image[box], union[box], [a, b], rr, cc) >= SEAM_DIP:
                    kept.add((i, j))
                    continue
            labels[labels == j] = i
            kept = {p for p in kept if i not in p and j not in p}
            joined = True
            break
        if not joined:
            return [labels == k for k in np.unique(labels) if k > 0]


def _split(mask: np.ndarray, min_area: float, split_depth: float, depth: int,
           budget: list, image: np.ndarray | None = None, fine_area: float | None = None) -> list[np.ndarray] | None:
    """Parts of a concave shape divided at necks, or None if no acceptable split exists."""
    fine_area = min_area if fine_area is None else fine_area
    if depth > MAX_DEPTH or mask.sum() < 2 * fine_area:
        return None
    parts = _split_heap(mask, split_depth, depth, budget, image, min_area, fine_area)
    if parts is not None:
        return parts
    parts = _split_at_defects(mask, min_area, split_depth, depth, budget, image, fine_area=fine_area)
    if parts is not None:
        return parts
    if mask.sum() < 2 * min_area:
        return None
    min_part = max(min_area, MIN_PART_FRACTION * float(mask.sum()))
    dist = _distance_map(mask)
    for ws, parts, n in _distance_floods(dist, mask):
        if min(int(p.sum()) for p in parts) < min_part:
            continue
        if not _necks_are_narrow(ws, dist, n):
            continue
        # the ends of a watershed line leave small notches: parts get twice the allowance
        if all(is_convex(p, split_depth, PART_SLACK) for p in parts):
            return parts
    return None


#: Devillard's 19 compare-exchanges that leave the median of 9 values in the 5th place (from memory; checked
#: against scipy.ndimage.median_filter in tests/test_foreground_exact.py).
_MEDIAN9_NET = ((1, 2), (4, 5), (7, 8), (0, 1), (3, 4), (6, 7), (1, 2), (4, 5), (7, 8), (0, 3), (5, 8), (4, 7),
                (3, 6), (1, 4), (2, 5), (4, 7), (4, 2), (6, 4), (4, 2))


def median3(image: np.ndarray) -> np.ndarray:
    """``scipy.ndimage.median_filter(image, size=3)`` (reflect borders) of a 2-D float array without NaN.

    Parameters
    ----------
    image : ndarray of float, shape (h, w)
        No NaN.

    Returns
    -------
    ndarray, same shape and dtype
        The median of every pixel's 3 x 3 neighbourhood, the frame's edge mirrored
        (``d c b a | a b c d``), by a sorting network of 19 compare-exchanges over the nine shifted
        copies (J. Devillard, "Fast median search: an ANSI C implementation", 1998; P. Smith,
        "Median finding on a 3x3 grid", Graphics Gems II, 1991; from memory). A median is one of the
        values, so no rounding enters: the same numbers as scipy's rank filter, several times faster
        on the small windows of a component (a zero's sign may differ where +0 and -0 tie).
    """
    a = np.asarray(image)
    if a.ndim != 2 or a.dtype.kind != "f" or a.size == 0:
        return ndi.median_filter(a, size=3)
    h, w = a.shape
    pad = np.pad(a, 1, mode="symmetric")  # numpy's symmetric is scipy's reflect
    v = [pad[i:i + h, j:j + w] for i in range(3) for j in range(3)]
    v = [x.copy() for x in v]
    for i, j in _MEDIAN9_NET:
        lo = np.minimum(v[i], v[j])
        np.maximum(v[i], v[j], out=v[j])
        v[i] = lo
    return v[4]


def _split_heap(mask: np.ndarray, split_depth: float, depth: int, budget: list, image: np.ndarray | None,
                min_area: float, fine_area: float) -> list[np.ndarray] | None:
    """A heap of many grains divided by the distance-map watershed [3]_, its concave parts cut further.

    Only for a shape that could hold :data:`HEAP_MIN_GRAINS` or more discs of its largest inscribed
    radius (the interior grains of a heap have no notches on the outline to cut between). The
    h-maxima of the distance map (``h`` as in :func:`_split`) seed the flood; the split is kept when
    every part is at least ``fine_area``, every line between two parts crosses a neck of the distance
    map (:func:`_necks_are_narrow`) and at least half the parts are convex (twice the allowance); the
    others are cut further at their necks where they can be (:func:`_divide_further`).
    """
    solid = mask
    if image is not None:
        # the dark gaps between packed grains (filled as holes) are background for the distance map
        smooth = median3(np.asarray(image, np.float32))  # single noisy pixels are no gap
        solid = mask & (smooth >= GAP_LEVEL * float(np.median(smooth[mask])))
    dist = _distance_map(solid)
    dmax = float(dist.max())
    if float(mask.sum()) < HEAP_MIN_GRAINS * np.pi * dmax ** 2:
        return None
    for ws, parts, n in _distance_floods(dist, mask, budget):
        if min(int(p.sum()) for p in parts) < fine_area or not _necks_are_narrow(ws, dist, n):
            continue
        if 2 * sum(is_convex(p[_box(p)], split_depth, PART_SLACK) for p in parts) >= n:
            return _divide_further(parts, min_area, split_depth, depth, budget, image, keep=True,
                                   fine_area=fine_area)
    return None


def _distance_floods(dist: np.ndarray, mask: np.ndarray, budget: list | None = None):
    """Watershed floods of ``-dist`` within ``mask`` from the h-maxima of ``dist``, h falling.

    ``h = max(f * d_max, H_MIN_PX)`` for ``f`` in :data:`H_FRACTIONS` (levels with ``h >= d_max``
    or fewer than two markers skipped); each flood made counts one against ``budget[0]`` if given.

    Yields
    ------
    ws : ndarray of int
        The flood's labels.
    parts : list of ndarray of bool
        ``ws == k`` for k = 1..n.
    n : int
        Number of parts.
    """
    dmax = float(dist.max())
    squared = squared_distances(dist)
    for frac in H_FRACTIONS:
        h = max(frac * dmax, H_MIN_PX)
        if h >= dmax:
            continue
        # skimage.morphology.h_maxima and skimage.segmentation.watershed, without their set-up costs
        # (tests/test_split_kernels_exact.py)
        markers, n = ndi.label(distance_h_maxima(dist, h, squared), structure=_EIGHT)
        if n < 2:
            continue
        if budget is not None:
            budget[0] -= 1
        ws = watershed_window(-dist, markers, mask)
        yield ws, [ws == k for k in range(1, n + 1)], n
