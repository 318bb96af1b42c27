"""Outline polygons of grains: smoothing a sub-pixel contour and fitting corners.

Pure functions on (m, 2) arrays of closed-contour vertices ``(x, y)``; any
length unit works as long as ``size`` and the contour share it (the measure
step passes pixels). A closed contour is given without repeating its first
vertex at the end (a repeated last vertex is dropped).

The polygon fit answers "how many corners has this grain outline and how
long are its edges": Douglas-Peucker simplification with a tolerance scaled
to the grain size, then merging of nearly collinear vertices and collapsing
of very short (spurious) edges, then each corner placed at the intersection
of straight lines fitted to the contour along its two edges, which undoes
the rounding that digitisation and smoothing leave at sharp corners.

Conventions: fitted polygons are returned with positive signed area in the
(x, y) axes of the input (counter-clockwise in x-right, y-up axes; with image
axes, y down, that looks clockwise on screen).
"""

from __future__ import annotations

import math

import numpy as np

from grainhabit.plugins.common.contours import savgol_coefficients  # noqa: F401 (used here and by its tests)

__all__ = [
    "closed_length",
    "douglas_peucker_closed",
    "edge_ratio",
    "douglas_peucker_packed",
    "fit_polygon",
    "fit_polygons",
    "interior_angles",
    "polygon_area",
    "polygon_edges",
    "savgol_coefficients",
    "smooth_closed_contour",
    "turning_angles",
]


def _as_closed(points, name="contour_xy", min_vertices=1):
    """Check an (m, 2) vertex array and drop a repeated closing vertex."""
    arr = np.asarray(points, dtype=np.float64)
    if arr.ndim != 2 or arr.shape[1] != 2:
        raise ValueError(f"{name} must have shape (m, 2), got {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"{name} contains non-finite coordinates")
    if len(arr) > 1 and np.array_equal(arr[0], arr[-1]):
        arr = arr[:-1]
    if len(arr) < min_vertices:
        raise ValueError(f"{name} needs at least {min_vertices} distinct vertices, got {len(arr)}")
    return arr


def _shifted(a, step: int) -> np.ndarray:
    """``np.roll(a, step, axis=0)`` for step -1 or 1 (the same array), without roll's general-case overhead."""
    if len(a) == 0:
        return a.copy()
    return np.concatenate((a[1:], a[:1])) if step == -1 else np.concatenate((a[-1:], a[:-1]))


def polygon_area(poly):
    """Signed area of a closed polygon (shoelace formula).

    Parameters
    ----------
    poly : array_like, shape (k, 2)
        Vertices ``(x, y)`` in order, not repeating the first at the end.

    Returns
    -------
    float
        Signed area in the square of the input unit; positive when the
        vertices run counter-clockwise in x-right, y-up axes.

    Notes
    -----
    A = 1/2 * sum_i (x_i * y_{i+1} - x_{i+1} * y_i), indices modulo k.

    References
    ----------
    .. [1] B. Braden, "The surveyor's area formula", The College Mathematics
       Journal 17(4), 326-337, 1986. DOI: 10.1080/07468342.1986.11972974
    """
    p = _as_closed(poly, "poly")
    x, y = p[:, 0], p[:, 1]
    return 0.5 * float(np.dot(x, _shifted(y, -1)) - np.dot(_shifted(x, -1), y))


def closed_length(poly):
    """Length of a closed polygonal curve (sum of its edge lengths).

    Parameters
    ----------
    poly : array_like, shape (k, 2)
        Vertices in order, not repeating the first at the end.

    Returns
    -------
    float
        Perimeter in the input unit.
    """
    return float(polygon_edges(poly).sum())


def polygon_edges(poly):
    """Edge lengths of a closed polygon.

    Parameters
    ----------
    poly : array_like, shape (k, 2)
        Vertices in order, not repeating the first at the end.

    Returns
    -------
    ndarray, shape (k,)
        ``lengths[i]`` is the length of the edge from vertex ``i`` to vertex
        ``i + 1`` (modulo k), in the input unit.
    """
    p = _as_closed(poly, "poly")
    d = _shifted(p, -1) - p
    return np.hypot(d[:, 0], d[:, 1])


def turning_angles(poly):
    """Signed exterior (turning) angle at each vertex of a closed polygon.

    Parameters
    ----------
    poly : array_like, shape (k, 2)
        Vertices in order, not repeating the first at the end.

    Returns
    -------
    ndarray, shape (k,)
        Angle in degrees, in (-180, 180], from the incoming edge direction
        to the outgoing one; positive for a left turn (counter-clockwise in
        x-right, y-up axes). They add up to +360 for a simple polygon with
        positive area.
    """
    p = _as_closed(poly, "poly")
    d_in = p - _shifted(p, 1)
    d_out = _shifted(p, -1) - p
    cross = d_in[:, 0] * d_out[:, 1] - d_in[:, 1] * d_out[:, 0]
    dot = sum_xy(d_in * d_out)
    return np.degrees(np.arctan2(cross, dot))


def interior_angles(poly):
    """Interior angle at each vertex of a closed polygon.

    Parameters
    ----------
    poly : array_like, shape (k, 2)
        Vertices in order, not repeating the first at the end; either
        orientation.

    Returns
    -------
    ndarray, shape (k,)
        Interior angles in degrees; above 180 at reflex vertices. They add up
        to (k - 2) * 180 for a simple polygon.

    Notes
    -----
    interior_i = 180 - s * turning_i, where s = +1 for a polygon of positive
    signed area and -1 otherwise.
    """
    p = _as_closed(poly, "poly", min_vertices=3)
    s = 1.0 if polygon_area(p) >= 0 else -1.0
    return 180.0 - s * turning_angles(p)


def edge_ratio(poly):
    """Short-to-long edge ratio of a fitted outline polygon.

    Parameters
    ----------
    poly : array_like, shape (k, 2)
        Polygon vertices in order.

    Returns
    -------
    float
        For an even number of corners k >= 6 (hexagons, octagons: the
        outlines of truncated triangles, cuboctahedra and truncated cubes,
        whose edges alternate short and long), the mean length of one set
        of alternating edges over the mean of the other, the smaller over the
        larger; otherwise the shortest edge over the longest. In [0, 1];
        NaN for fewer than 3 vertices. A regular polygon gives 1.

    Notes
    -----
    For k even >= 6: r = min(mean(e_0, e_2, ...), mean(e_1, e_3, ...)) /
    max(...). Else r = min(e) / max(e).
    """
    p = _as_closed(poly, "poly")
    k = len(p)
    if k < 3:
        return float("nan")
    e = polygon_edges(p)
    if e.max() <= 0:
        return float("nan")
    if k % 2 == 0 and k >= 6:
        a, b = e[0::2].mean(), e[1::2].mean()
        return float(min(a, b) / max(a, b))
    return float(e.min() / e.max())


def smooth_closed_contour(contour_xy, window=9, order=2):
    """Smooth a closed contour by local polynomial (Savitzky-Golay) regression.

    Removes the staircase left by a binary mask's marching-squares contour
    (which makes its length 5-8 % too long) while keeping straight edges
    straight and rounding corners only over about ``window`` vertices.

    Parameters
    ----------
    contour_xy : array_like, shape (m, 2)
        Closed contour vertices in order (first not repeated at the end).
    window : int
        Number of vertices in the regression window (odd, > ``order``);
        0 or 1 returns the contour unchanged. For a marching-squares contour
        of a mask, neighbouring vertices are 0.71-1 px apart.
    order : int
        Degree of the local polynomial.

    Returns
    -------
    ndarray, shape (m, 2)
        Smoothed vertices, float64. Contours with no more than ``window``
        vertices are returned unchanged (too small to smooth).

    Notes
    -----
    Each coordinate is convolved cyclically with the least-squares
    polynomial-fit coefficients of [1]_, so polynomials of degree ``order``
    along the contour pass unchanged.

    References
    ----------
    .. [1] A. Savitzky, M. J. E. Golay, "Smoothing and differentiation of data
       by simplified least squares procedures", Analytical Chemistry 36(8),
       1627-1639, 1964. DOI: 10.1021/ac60214a047
    """
    c = _as_closed(contour_xy)
    window = int(window)
    if window <= 1:
        return c.copy()
    if window % 2 == 0 or window <= order:
        raise ValueError(f"window must be odd and greater than order={order}, got {window}")
    if len(c) <= window:
        return c.copy()
    coef = savgol_coefficients(window, order)
    h = window // 2
    ext = np.concatenate([c[-h:], c, c[:h]])
    out = np.empty_like(c)
    for j in range(2):
        out[:, j] = np.convolve(ext[:, j], coef, mode="valid")
    return out


def _check_fit_args(size, rel_tolerance, merge_angle_deg, min_edge_fraction, min_tolerance,
                    corner_rounding):
    if not np.isfinite(size) or size <= 0:
        raise ValueError(f"size must be a positive finite length, got {size!r}")
    if not 0 < rel_tolerance < 1:
        raise ValueError(f"rel_tolerance must be in (0, 1), got {rel_tolerance!r}")
    if not 0 <= merge_angle_deg < 90:
        raise ValueError(f"merge_angle_deg must be in [0, 90), got {merge_angle_deg!r}")
    if not 0 <= min_edge_fraction < 1:
        raise ValueError(f"min_edge_fraction must be in [0, 1), got {min_edge_fraction!r}")
    if min_tolerance < 0:
        raise ValueError(f"min_tolerance must be >= 0, got {min_tolerance!r}")
    if corner_rounding < 0:
        raise ValueError(f"corner_rounding must be >= 0, got {corner_rounding!r}")


def douglas_peucker_closed(contour_xy, tolerance):
    """Douglas-Peucker simplification of a closed contour, returning indices.

    Parameters
    ----------
    contour_xy : array_like, shape (m, 2)
        Closed contour, first vertex not repeated; vertex 0 is kept.
    tolerance : float
        Largest distance of a dropped vertex from the simplified polygon
        (distance to the segment, as ``skimage.measure.approximate_polygon``).

    Returns
    -------
    ndarray of intp, shape (k,)
        Increasing indices of the kept vertices.

    Notes
    -----
    The same vertices as the recursive algorithm [1]_ (and as
    ``skimage.measure.approximate_polygon`` on the closed chain): every
    segment is split at its vertex farthest from the segment while that
    distance exceeds the tolerance. The first segment runs from vertex 0
    round to itself, so its farthest vertex is the one farthest from
    vertex 0. See :func:`douglas_peucker_packed` for many contours at once.

    References
    ----------
    .. [1] D. H. Douglas, T. K. Peucker, "Algorithms for the reduction of the
       number of points required to represent a digitized line or its
       caricature", Cartographica 10(2), 112-122, 1973.
       DOI: 10.3138/FM57-6770-U75U-7727
    """
    c = _as_closed(contour_xy)
    if not np.isfinite(tolerance) or tolerance < 0:
        raise ValueError(f"tolerance must be a finite number >= 0, got {tolerance!r}")
    keep = douglas_peucker_packed(c, np.array([0, len(c)]), np.array([float(tolerance)]))
    return np.flatnonzero(keep)


def sum_xy(v) -> np.ndarray:
    """``v.sum(axis=1)`` of an (N, 2) array by columns: ``(v[:, 0] + v[:, 1]) + 0.0``, the same numbers.

    numpy reduces a length-2 axis row by row, about 25x slower on a frame's outline vertices. Its
    sum starts from +0, so two negative zeros sum to +0 there; adding +0 does the same here and
    leaves every other sum as it is (tested bit for bit, signed zeros and NaN included).
    """
    out = v[:, 0] + v[:, 1]
    out += 0.0
    return out


def douglas_peucker_packed(xy, offsets, tolerances):
    """Douglas-Peucker simplification of many closed contours at once.

    Parameters
    ----------
    xy : ndarray, shape (N, 2)
        Vertices of all contours end to end; contour i is
        ``xy[offsets[i]:offsets[i + 1]]``, closed, first vertex not repeated.
    offsets : ndarray of int, shape (n + 1,)
    tolerances : ndarray, shape (n,)
        Tolerance of each contour.

    Returns
    -------
    ndarray of bool, shape (N,)
        True for kept vertices. The first vertex of every contour is kept;
        contours with fewer than 3 vertices are kept whole.

    Notes
    -----
    All segments of all contours at one level of the recursion are split
    together with array operations (a few array passes per level, about
    log2 of the number of kept vertices levels), see
    :func:`douglas_peucker_closed`.
    """
    xy = np.asarray(xy, dtype=np.float64)
    off = np.asarray(offsets, dtype=np.intp)
    tol = np.asarray(tolerances, dtype=np.float64)
    n = len(off) - 1
    counts = np.diff(off)
    out = np.zeros(len(xy), dtype=bool)
    if len(xy) == 0:
        return out
    # each contour followed by a copy of its first vertex (the closed chain)
    ext_off = off + np.arange(n + 1)
    gid = np.repeat(np.arange(n), counts + 1)
    local = np.arange(len(xy) + n) - ext_off[:-1][gid]
    src = off[:-1][gid] + np.where(local == counts[gid], 0, local)
    src = np.minimum(src, len(xy) - 1)
    ext = xy[src]
    closing = local == counts[gid]
    keep = np.zeros(len(ext), dtype=bool)
    keep[ext_off[:-1]] = True
    keep[closing] = True
    # vertex farthest from the first one starts the recursion
    d0 = sum_xy((ext - ext[ext_off[:-1][gid]]) ** 2)
    pt_tol = tol[gid]
    dmax = _first_argmax(d0, ext_off)
    seed = dmax[(dmax >= 0)]
    seed = seed[d0[seed] > pt_tol[seed] ** 2]
    keep[seed] = True
    small = counts < 3
    # the points whose segment may still split: all at first, then those of the segments split in the
    # pass before (a segment with no point beyond its tolerance keeps its ends, its distances and so
    # its verdict; every distance depends on its own segment's ends only, so the passes over the
    # remaining points find the vertices of passes over all points)
    pos = np.arange(len(ext))
    while True:
        kept = np.flatnonzero(keep)
        seg = np.searchsorted(kept, pos, side="right") - 1
        a_i = kept[seg]
        b_i = kept[np.minimum(seg + 1, len(kept) - 1)]
        a, b = ext[a_i], ext[b_i]
        d = b - a
        ln2 = sum_xy(d**2)
        rel = ext[pos] - a
        proj = sum_xy(rel * d)
        inside = (proj > 0) & (proj < ln2)
        with np.errstate(invalid="ignore", divide="ignore"):
            perp = np.abs(d[:, 0] * rel[:, 1] - d[:, 1] * rel[:, 0]) / np.sqrt(ln2)
        ends = np.sqrt(np.minimum(sum_xy(rel**2), sum_xy((ext[pos] - b) ** 2)))
        dist = np.where(inside, perp, ends)
        dist[keep[pos]] = -1.0
        dist[b_i < a_i] = -1.0
        # segment maxima over the runs of equal seg (pos is increasing, so each segment is one run)
        starts = np.flatnonzero(np.r_[True, seg[1:] != seg[:-1]])
        segmax = np.maximum.reduceat(dist, starts)
        best = np.repeat(segmax, np.diff(np.r_[starts, len(seg)]))
        hit = (dist == best) & (dist > pt_tol[pos])
        cand = np.flatnonzero(hit)
        if len(cand) == 0:
            break
        first = np.ones(len(cand), dtype=bool)
        first[1:] = seg[cand][1:] != seg[cand][:-1]
        keep[pos[cand[first]]] = True
        # next pass: the points of the segments just split
        split = np.zeros(len(kept), dtype=bool)
        split[seg[cand[first]]] = True
        pos = pos[split[seg]]
    keep_c = keep[~closing]
    keep_c[np.repeat(small, counts)] = True
    return keep_c


def _first_argmax(values, offsets):
    """Index of the first maximum of each consecutive group (-1 if empty)."""
    n = len(offsets) - 1
    counts = np.diff(offsets)
    res = np.full(n, -1, dtype=np.intp)
    ne = counts > 0
    if not np.any(ne):
        return res
    mx = np.maximum.reduceat(values, offsets[:-1][ne])
    full = np.full(n, -np.inf)
    full[ne] = mx
    gid = np.repeat(np.arange(n), counts)
    hit = np.flatnonzero(values == full[gid])
    g = gid[hit]
    first = np.ones(len(hit), dtype=bool)
    first[1:] = g[1:] != g[:-1]
    res[g[first]] = hit[first]
    return res


def fit_polygon(
    contour_xy,
    size,
    rel_tolerance=0.02,
    merge_angle_deg=20.0,
    min_edge_fraction=0.06,
    min_tolerance=0.5,
    corner_rounding=2.0,
    refine=True,
):
    """Fit the corner polygon of a closed grain outline.

    Parameters
    ----------
    contour_xy : array_like, shape (m, 2)
        Closed sub-pixel contour (x, y), in order, first vertex not repeated.
    size : float
        Grain size in the contour's unit (the measure step passes the ECD);
        the tolerances scale with it, so the result does not depend on
        magnification.
    rel_tolerance : float
        Douglas-Peucker tolerance as a fraction of ``size``: the largest
        distance of the contour from the polygon before a corner is added.
    merge_angle_deg : float
        Vertices where the polygon turns by less than this (nearly collinear
        edges) are removed.
    min_edge_fraction : float
        Edges shorter than this fraction of ``size`` are always collapsed
        into one corner.
    min_tolerance : float
        Floor of the DP tolerance in the contour's unit (digitisation noise;
        0.5 suits contours in pixels).
    corner_rounding : float
        How far (contour unit) a sharp corner may lie from the outline and
        still be taken as rounded by digitisation and smoothing (2 suits
        contours in pixels smoothed over 9 vertices). An edge is collapsed
        into a corner when the two neighbouring edges meet within
        ``max(2 * tolerance, corner_rounding)`` of the outline.
    refine : bool
        Place each corner at the intersection of total-least-squares lines
        fitted to the middle three fifths of the contour along its two
        edges (undoes the rounding of sharp corners); ``False`` keeps the
        corners on the contour.

    Returns
    -------
    ndarray, shape (k, 2)
        Polygon vertices, positive signed area (k >= 3 for any contour with
        at least 3 distinct vertices).

    Notes
    -----
    The contour's first vertex is arbitrary. So that it does not become a
    false corner, the contour is rolled to start at the vertex farthest
    from its mean (a true corner of any convex polygon), and all clean-up
    treats vertices cyclically, the first one included. Clean-up changes
    one thing at a time and refits, until nothing changes or 3 vertices
    remain: (1) remove the vertex of smallest turn if it turns less than
    ``merge_angle_deg``; (2) collapse the shortest edge if shorter than
    ``min_edge_fraction * size``; (3) collapse the shortest edge (among those
    under a quarter of ``size``) whose two neighbouring edges, extended,
    meet within the rounding distance of the contour (a bevel that DP put
    on a rounded corner, not a real truncation). A small disc (ECD near 20
    px) keeps 8-12 corners this way; it is told from a polygon by its
    circularity and even edges. A collapsed edge becomes
    one corner at its middle.

    References
    ----------
    .. [1] D. H. Douglas, T. K. Peucker, "Algorithms for the reduction of the
       number of points required to represent a digitized line or its
       caricature", Cartographica 10(2), 112-122, 1973.
       DOI: 10.3138/FM57-6770-U75U-7727
    """
    c = _as_closed(contour_xy, min_vertices=1)
    return fit_polygons([c], [size], rel_tolerance, merge_angle_deg, min_edge_fraction,
                        min_tolerance, corner_rounding, refine)[0]


def fit_polygons(
    contours,
    sizes,
    rel_tolerance=0.02,
    merge_angle_deg=20.0,
    min_edge_fraction=0.06,
    min_tolerance=0.5,
    corner_rounding=2.0,
    refine=True,
):
    """Fit the corner polygons of many outlines (see :func:`fit_polygon`).

    Parameters
    ----------
    contours : sequence of array_like, shape (m_i, 2)
        Closed contours.
    sizes : array_like, shape (n,)
        Size of each grain in the contours' unit.
    rel_tolerance, merge_angle_deg, min_edge_fraction, min_tolerance, corner_rounding, refine
        As for :func:`fit_polygon`.

    Returns
    -------
    list of ndarray, shape (k_i, 2)
        One polygon per contour, the same as :func:`fit_polygon` gives for
        it alone; the Douglas-Peucker step runs on all contours together.
    """
    sizes = np.asarray(sizes, dtype=np.float64).ravel()
    if len(sizes) != len(contours):
        raise ValueError(f"got {len(contours)} contours but {len(sizes)} sizes")
    prepared = []
    for i, cont in enumerate(contours):
        c = _as_closed(cont, name=f"contours[{i}]")
        _check_fit_args(sizes[i], rel_tolerance, merge_angle_deg, min_edge_fraction,
                        min_tolerance, corner_rounding)
        if len(c) >= 3:
            if polygon_area(c) < 0:
                c = c[::-1]
            # start at the vertex farthest from the mean: a true corner of
            # any convex polygon, never a false one
            i0 = int(np.argmax(sum_xy((c - c.mean(axis=0)) ** 2)))
            c = np.concatenate([c[i0:], c[:i0]])
        prepared.append(c)
    tol = np.maximum(rel_tolerance * sizes, min_tolerance)
    counts = np.array([len(c) for c in prepared], dtype=np.intp)
    off = np.zeros(len(prepared) + 1, dtype=np.intp)
    np.cumsum(counts, out=off[1:])
    packed = np.concatenate(prepared) if len(prepared) else np.empty((0, 2))
    keep = douglas_peucker_packed(packed, off, tol)
    out = []
    for i, c in enumerate(prepared):
        if len(c) < 3:
            out.append(c.copy())
            continue
        idx = np.flatnonzero(keep[off[i]:off[i + 1]])
        out.append(_clean_polygon(c, idx, sizes[i], tol[i], merge_angle_deg,
                                  min_edge_fraction, corner_rounding, refine))
    return out


#: Marks a line not yet in :class:`_Cleaner`'s cache (a cached line may be None).
_MISSING = object()


class _Cleaner:
    """Corner clean-up on one contour with scalar arithmetic.

    Polygons here have about ten vertices, where array calls cost more than
    they compute; lines fitted to contour spans come from cumulative sums
    in O(1) and are cached per edge, as each step changes one or two edges.
    """

    def __init__(self, c):
        self.c = c
        self.m = m = len(c)
        self.cx, self.cy = (float(v) for v in c.mean(axis=0))
        cc = np.concatenate([c, c]) - (self.cx, self.cy)
        x, y = cc[:, 0], cc[:, 1]
        # running sums laid out (sum, vertex): each cumulative sum runs along a contiguous row (numpy's
        # cumsum adds in sequence along either axis, so these are the floats of the (vertex, sum) table)
        cum = np.zeros((5, 2 * m + 1))
        np.cumsum(np.stack([x, y, x * x, y * y, x * y]), axis=1, out=cum[:, 1:])
        # columns are turned into Python floats when a line needs them (two a line): the whole table of a
        # contour of m vertices, 10 m + 5 floats, cost more than the clean-up itself
        self.cum = cum
        # the vertices as Python floats, each turned when first read (a clean-up reads a few dozen of the
        # hundreds of a contour; the whole list cost about as much as the rest of this set-up)
        self.pts = _VertexFloats(c)
        self.cache = {}
        # a corner depends on its two neighbours, a turn and the edge after it on two corners to each side:
        # each clean-up step changes one or two corners, so most of them are looked up, not computed again
        self.corners = {}
        self.turns = {}

    def line(self, a, b):
        """Line (px, py, dx, dy) along edge a -> b, its middle three fifths
        fitted by total least squares; None for a degenerate edge."""
        key = (a, b)
        hit = self.cache.get(key)
        if hit is not None or key in self.cache:
            return hit
        m = self.m
        span = (b - a) % m
        trim = span // 5
        if span - 2 * trim >= 3:
            s0 = (a + trim) % m
            n = span - 2 * trim + 1
            lo, hi = self.cum[:, s0].tolist(), self.cum[:, s0 + n].tolist()
            mx, my = (hi[0] - lo[0]) / n, (hi[1] - lo[1]) / n
            sxx = (hi[2] - lo[2]) / n - mx * mx
            syy = (hi[3] - lo[3]) / n - my * my
            sxy = (hi[4] - lo[4]) / n - mx * my
            t = 0.5 * math.atan2(2.0 * sxy, sxx - syy)
            out = (mx + self.cx, my + self.cy, math.cos(t), math.sin(t))
        else:
            (ax, ay), (bx, by) = self.pts[a], self.pts[b]
            ln = math.hypot(bx - ax, by - ay)
            out = (ax, ay, (bx - ax) / ln, (by - ay) / ln) if ln > 0 else None
        self.cache[key] = out
        return out

    @staticmethod
    def meet(l1, l2):
        """Intersection of two lines, or None if missing or near parallel."""
        if l1 is None or l2 is None:
            return None
        den = l1[2] * l2[3] - l1[3] * l2[2]
        if abs(den) < 1e-6:
            return None
        t = ((l2[0] - l1[0]) * l2[3] - (l2[1] - l1[1]) * l2[2]) / den
        return (l1[0] + t * l1[2], l1[1] + t * l1[3])

    def polygon(self, idx, refine, reach):
        """Vertices for corner indices idx, and the lines of its edges."""
        k = len(idx)
        if not refine:
            return [tuple(self.pts[i]) for i in idx], None
        # the cached lines and corners are looked up here, without a method call per edge
        known = self.cache.get
        lines = []
        for j in range(k):
            a, b = idx[j], idx[(j + 1) % k]
            ln = known((a, b), _MISSING)
            lines.append(self.line(a, b) if ln is _MISSING else ln)
        poly = []
        corners = self.corners
        for j in range(k):
            key = (idx[j - 1], idx[j], idx[(j + 1) % k], reach)
            v = corners.get(key)
            if v is None:
                vx, vy = self.pts[idx[j]]
                p = self.meet(lines[j - 1], lines[j])
                v = p if p is not None and math.hypot(p[0] - vx, p[1] - vy) <= reach else (vx, vy)
                corners[key] = v
            poly.append(v)
        return poly, lines

    def turns_and_edges(self, idx, poly):
        """:func:`_turns_and_edges` of ``poly``, the polygon of corner indices ``idx`` from :meth:`polygon`
        (with one ``reach`` per cleaner), looked up where known."""
        k = len(poly)
        if k < 5:
            return _turns_and_edges(poly)
        known = self.turns
        turns, edges = [], []
        for j in range(k):
            key = (idx[j - 2], idx[j - 1], idx[j], idx[(j + 1) % k], idx[(j + 2) % k])
            te = known.get(key)
            if te is None:
                x0, y0 = poly[j - 1]
                x1, y1 = poly[j]
                x2, y2 = poly[(j + 1) % k]
                ax, ay, bx, by = x1 - x0, y1 - y0, x2 - x1, y2 - y1
                te = known[key] = (abs(math.degrees(math.atan2(ax * by - ay * bx, ax * bx + ay * by))),
                                   math.hypot(bx, by))
            turns.append(te[0])
            edges.append(te[1])
        return turns, edges

    def distance_to_contour(self, p):
        d = self.c - p
        return float(np.sqrt(sum_xy(d * d).min()))


class _VertexFloats:
    """``c.tolist()`` of a contour's (m, 2) vertices, each row made when first indexed (the same floats)."""

    __slots__ = ("c", "rows")

    def __init__(self, c):
        self.c = c
        self.rows = {}

    def __getitem__(self, i):
        row = self.rows.get(i)
        if row is None:
            row = self.rows[i] = self.c[i].tolist()
        return row


def _turns_and_edges(poly):
    """Absolute turning angles (deg) and outgoing edge lengths, scalar."""
    k = len(poly)
    turns, edges = [], []
    for j in range(k):
        x0, y0 = poly[j - 1]
        x1, y1 = poly[j]
        x2, y2 = poly[(j + 1) % k]
        ax, ay, bx, by = x1 - x0, y1 - y0, x2 - x1, y2 - y1
        turns.append(abs(math.degrees(math.atan2(ax * by - ay * bx, ax * bx + ay * by))))
        edges.append(math.hypot(bx, by))
    return turns, edges


def _clean_polygon(c, idx, size, tol, merge_angle_deg, min_edge_fraction, corner_rounding,
                   refine):
    """Merge, collapse and refine the DP vertices ``idx`` of contour ``c``."""
    m = len(c)
    if len(idx) < 3:
        # DP keeps too little of a tiny contour: fall back to all its vertices
        idx = np.arange(m)
    cl = _Cleaner(c)
    reach = max(2.0 * tol, corner_rounding)
    min_edge = min_edge_fraction * size
    idx = [int(i) for i in idx]
    for _ in range(4 * m):
        poly, lines = cl.polygon(idx, refine, 3.0 * reach)
        if len(idx) <= 3:
            break
        turn, e = cl.turns_and_edges(idx, poly) if refine else _turns_and_edges(poly)
        j = min(range(len(turn)), key=turn.__getitem__)
        if turn[j] < merge_angle_deg:
            del idx[j]
            continue
        j = min(range(len(e)), key=e.__getitem__)
        if e[j] < min_edge:
            idx = _collapse(idx, j, m)
            continue
        if refine:
            j = _bevel(cl, lines, e, 0.25 * size, reach)
            if j is not None:
                idx = _collapse(idx, j, m)
                continue
        break
    return np.array(poly, dtype=np.float64).reshape(-1, 2)


def _collapse(idx, j, m):
    """Replace edge idx[j] -> idx[j+1] by one vertex at its middle."""
    k = len(idx)
    a, b = idx[j], idx[(j + 1) % k]
    mid = (a + ((b - a) % m) // 2) % m
    rest = [v for i, v in enumerate(idx) if i not in (j, (j + 1) % k)]
    return sorted(set(rest + [mid]))


def _bevel(cl, lines, e, max_len, reach):
    """Shortest edge whose neighbours meet within ``reach`` of the contour."""
    k = len(e)
    for j in sorted(range(k), key=e.__getitem__):
        if e[j] >= max_len:
            return None
        p = cl.meet(lines[j - 1], lines[(j + 1) % k])
        if p is not None and cl.distance_to_contour(p) <= reach:
            return j
    return None
