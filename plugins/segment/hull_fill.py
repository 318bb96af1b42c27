"""Convex hull image of a binary shape, filled row by row in exact integer arithmetic.

The convex hull image of a shape (every pixel centre inside or on the smallest convex polygon holding
the midpoints of all its pixels' edges, the definition scikit-image's ``convex_hull_image`` uses [1]_)
is needed hundreds of times per frame by the splitting of touching grains and by the tests for drawn
marks. scikit-image tests every pixel of the box against the polygon (point in polygon); here the
polygon's span along each row is worked out once per row from its edges, so the cost is one
half-plane bound per edge and row, and the pixels are filled by one comparison per row.

With all coordinates doubled, the hull's vertices (pixel-edge midpoints) and the pixel centres are
integers, so every test is exact: a pixel is in when no edge has it strictly outside, the same
"inside, on an edge or on a vertex" that scikit-image's ``include_borders=True`` keeps
(tests/test_segment_speed.py checks the two pixel for pixel).

References
----------
.. [1] scikit-image documentation, ``skimage.morphology.convex_hull_image`` (``offset_coordinates=True``,
   ``include_borders=True``).
.. [2] C. B. Barber, D. P. Dobkin and H. Huhdanpaa, "The Quickhull algorithm for convex hulls",
   ACM Trans. Math. Softw. 22(4), 469-483, 1996, doi:10.1145/235815.235821 (scipy.spatial.ConvexHull)
.. [3] A. M. Andrew, "Another efficient algorithm for convex hulls in two dimensions", Inf. Process.
   Lett. 9(5), 216-219, 1979 (the hull as two chains of points ordered along one axis; from memory)
"""

from __future__ import annotations

import numpy as np


def hull_vertices2(mask: np.ndarray) -> np.ndarray | None:
    """Vertices of the convex hull of a shape's pixel-edge midpoints, in doubled pixel coordinates.

    Parameters
    ----------
    mask : ndarray of bool, shape (h, w)

    Returns
    -------
    ndarray of int64, shape (k, 2) or None
        ``(2 row, 2 col)`` of the hull's vertices in order around it; None for
        an empty mask.

    Notes
    -----
    The midpoints of the edges of pixel ``(r, c)`` are ``(2r +- 1, 2c)`` and
    ``(2r, 2c +- 1)`` doubled. Every pixel of a row lies between the row's
    leftmost and rightmost pixels, so its midpoints lie in the hull of theirs:
    only those two pixels per row count. Of their midpoints on one odd line
    ``Y = 2r + 1`` (the bottom edges of row ``r``, the top edges of row
    ``r + 1``) only the leftmost and the rightmost are kept: the others lie
    on the segment between them, inside the hull, which stays the same.

    Every line ``Y`` (odd and even) then has one leftmost and one rightmost
    point, in order of ``Y``: the hull's left side is the greatest convex
    function of ``Y`` below the leftmost points, its right side the least
    concave one above the rightmost (:func:`_convex_turns`, whole
    numbers only). That gives the vertex set Quickhull [2]_ gave here
    before (``scipy.spatial.ConvexHull``; tests/test_split_kernels_exact.py),
    without its set-up cost on a few hundred points.
    """
    m = np.asarray(mask, bool)
    present = m.any(axis=1)
    rows = np.flatnonzero(present)
    if rows.size == 0:
        return None
    r0, r1 = int(rows[0]), int(rows[-1])
    sub = m[r0:r1 + 1]
    has = present[r0:r1 + 1]
    far = np.int64(4 * (m.shape[0] + m.shape[1]) + 8)
    left = np.where(has, sub.argmax(axis=1), far).astype(np.int64, copy=False)
    right = np.where(has, m.shape[1] - 1 - sub[:, ::-1].argmax(axis=1), -far).astype(np.int64, copy=False)
    # odd line i (Y = 2 (r0 + i) - 1, i = 0 .. n): between row r0 + i - 1 and row r0 + i
    # (np.r_[far, left] and np.r_[left, far], built directly: np.r_ costs several times more on short rows)
    lo, hi = _ends(left, far, np.minimum), _ends(right, -far, np.maximum)
    y_odd = 2 * (r0 + np.arange(lo.size, dtype=np.int64)) - 1
    near = lo < far  # a line next to a row of the shape (rows of a shape in pieces may be empty)
    wide = hi > lo  # a line with one pixel's corner only gives one point
    # every line Y = 2 r0 - 1 + j, odd and even interleaved, with its leftmost and rightmost point
    n = 2 * lo.size - 1
    y_all = 2 * r0 - 1 + np.arange(n, dtype=np.int64)
    x_min = np.empty(n, np.int64)
    x_max = np.empty(n, np.int64)
    x_min[0::2], x_max[0::2] = 2 * lo, 2 * hi
    x_min[1::2], x_max[1::2] = 2 * left - 1, 2 * right + 1
    on = np.empty(n, bool)
    on[0::2], on[1::2] = near, has
    y_all, x_min, x_max = y_all[on], x_min[on], x_max[on]
    # the leftmost points down the lines, then the rightmost ones back up, closed by the first point again
    # (a top or bottom line with one point gives it once)
    bottom = 1 if x_max[-1] == x_min[-1] else 0
    top = 1 if x_max[0] == x_min[0] else 0
    ys = np.concatenate([y_all, y_all[::-1][bottom:len(y_all) - top], y_all[:1]])
    xs = np.concatenate([x_min, x_max[::-1][bottom:len(x_max) - top], x_min[:1]])
    keep = _convex_turns(ys, xs)
    if keep.size <= 2:
        return np.stack([ys[:1], xs[:1]], axis=1)  # a single point
    return np.stack([ys[keep[:-1]], xs[keep[:-1]]], axis=1)


def _convex_turns(y: np.ndarray, x: np.ndarray) -> np.ndarray:
    """The vertices of a closed path of points that turns one way only, its straight and inward points left out.

    Parameters
    ----------
    y, x : ndarray of int64, shape (n,)
        A shape's leftmost points line by line downwards (``y`` increasing), then its rightmost ones
        upwards, the first point repeated at the end: the convex hull's left side is the greatest
        convex function of ``y`` below the first run, its right side the least concave one above the
        second.

    Returns
    -------
    ndarray of intp
        Increasing indices of the points kept: the first and the last, and every point where the path
        through the points kept turns strictly the hull's way; the hull's vertices in order around it,
        points on a straight stretch left out as Quickhull [2]_ leaves them out.

    Notes
    -----
    A point on or beyond the chord between two other points of its side is no vertex of that side (the
    chord lies on or inside the hull), so every point that does not turn strictly the hull's way with
    its two current neighbours is dropped at once, and the passes repeat until none is. The extreme
    points (the first and last of each line's run, the ends of the path) always turn the hull's way,
    so the two sides never mix. Exact: whole numbers only.
    """
    idx = np.arange(y.size)
    yy, xx = y, x
    while yy.size > 2:
        ya, xa = yy[:-2], xx[:-2]
        # strictly left of the chord going down, strictly right of it going up: one cross-product sign
        keep = (xx[1:-1] - xa) * (yy[2:] - ya) < (xx[2:] - xa) * (yy[1:-1] - ya)
        if keep.all():
            break
        kept = np.empty(yy.size, bool)
        kept[0] = kept[-1] = True
        kept[1:-1] = keep
        idx, yy, xx = idx[kept], yy[kept], xx[kept]
    return idx


def _ends(v: np.ndarray, pad, combine) -> np.ndarray:
    """``combine(np.r_[pad, v], np.r_[v, pad])``: each line between two rows from the rows on either side."""
    a = np.empty(v.size + 1, np.int64)
    a[0] = pad
    a[1:] = v
    b = np.empty(v.size + 1, np.int64)
    b[:-1] = v
    b[-1] = pad
    return combine(a, b, out=a)


def convex_hull_mask(mask: np.ndarray) -> np.ndarray:
    """``skimage.morphology.convex_hull_image(mask)`` (default options), without its point-in-polygon test.

    Parameters
    ----------
    mask : ndarray of bool, shape (h, w)

    Returns
    -------
    ndarray of bool, shape (h, w)
        Pixels whose centres lie inside or on the convex hull of the
        midpoints of the edges of the pixels of ``mask`` (all False for an
        empty mask).

    Notes
    -----
    For an edge ``V_i -> V_(i+1)`` of the hull (doubled coordinates,
    counter-clockwise), a pixel centre ``P = (Y, X)`` is on the inner side
    when ``dY (X - X_i) - dX (Y - Y_i) >= 0``; along a row ``Y`` that is a
    lower or an upper bound on ``X`` (or on the row itself when ``dY = 0``),
    rounded to whole pixels by integer floor division.
    """
    m = np.asarray(mask, bool)
    out = np.zeros(m.shape, bool)
    v = hull_vertices2(m)
    if v is None:
        return out
    y, x = v[:, 0], v[:, 1]
    y1, x1 = np.concatenate([y[1:], y[:1]]), np.concatenate([x[1:], x[:1]])
    dy, dx = y1 - y, x1 - x
    # orientation: twice the signed area (shoelace) in the (Y, X) plane
    if int(np.dot(y, x1) - np.dot(x, y1)) < 0:
        dy, dx = -dy, -dx
    r0 = max(int(y.min() + 1) // 2, 0)
    r1 = min(int(y.max()) // 2, m.shape[0] - 1)
    if r1 < r0:
        return out
    big = np.int64(4 * (m.shape[0] + m.shape[1]) + 8)
    yy = 2 * np.arange(r0, r1 + 1, dtype=np.int64)[:, None]
    # a X >= b at every edge, X = 2c
    a = dy[None, :]
    b = dy[None, :] * x[None, :] + dx[None, :] * (yy - y[None, :])
    with np.errstate(divide="ignore"):
        lower = np.where(a > 0, -((-b) // np.where(a > 0, 2 * a, 1)), -big)
        upper = np.where(a < 0, b // np.where(a < 0, 2 * a, 1), big)
    # rows an edge with dY = 0 has strictly outside
    upper = np.where((a == 0) & (b > 0), -big, upper)
    lo = np.maximum(lower.max(axis=1), 0)
    hi = np.minimum(upper.min(axis=1), m.shape[1] - 1)
    cols = np.arange(m.shape[1])
    out[r0:r1 + 1] = (cols[None, :] >= lo[:, None]) & (cols[None, :] <= hi[:, None])
    return out


#: Pixel counts of convex hull images lately worked out (:func:`hull_pixel_count`), keyed by :func:`shape_key`
#: of the shape cut to its box; emptied when it holds _COUNTS_KEPT.
_COUNTS: dict = {}
_COUNTS_KEPT = 4096


def shape_key(tight: np.ndarray) -> tuple:
    """A dictionary key of a shape cut to its box: its size and its packed pixels."""
    return tight.shape, np.packbits(tight).tobytes()


def remember_hull_count(key: tuple, count: int) -> None:
    """Note the pixel count of the convex hull image of the shape of ``key`` (:func:`shape_key`)."""
    if len(_COUNTS) >= _COUNTS_KEPT:
        _COUNTS.clear()
    _COUNTS[key] = int(count)


#: Hull images lately worked out by :func:`tight_hull`, keyed by :func:`shape_key`; emptied when their pixels
#: pass _HULLS_KEPT_PX (16 MiB of booleans).
_HULLS: dict = {}
_HULLS_PX = [0]
_HULLS_KEPT_PX = 1 << 24


def tight_hull(tight: np.ndarray, key: tuple | None = None) -> np.ndarray:
    """:func:`convex_hull_mask` of a shape cut to its box, remembered per shape (do not write to it).

    Parameters
    ----------
    tight : ndarray of bool, shape (h, w)
        The shape, cut to its bounding box.
    key : tuple, optional
        :func:`shape_key` of ``tight``, when the caller has it.

    Returns
    -------
    ndarray of bool, shape (h, w)
        The hull image. The segment step asks for the hull of each component twice (the rim
        interiors of every component first, then the splitter's concavity depth of each): the second
        asking reads it back.
    """
    key = shape_key(tight) if key is None else key
    hull = _HULLS.get(key)
    if hull is None:
        hull = convex_hull_mask(tight)
        if _HULLS_PX[0] + hull.size > _HULLS_KEPT_PX:
            _HULLS.clear()
            _HULLS_PX[0] = 0
        _HULLS[key] = hull
        _HULLS_PX[0] += hull.size
    return hull


def hull_pixel_count(mask: np.ndarray) -> int:
    """``numpy.count_nonzero(convex_hull_mask(mask))``, remembered per shape.

    Parameters
    ----------
    mask : ndarray of bool, shape (h, w)

    Returns
    -------
    int
        Pixels of the convex hull image (0 for an empty mask). The hull lies within the shape's bounding
        box (its vertices are at most half a pixel beyond the outer pixels' centres), so the count depends
        on the shape cut to its box alone, wherever it lies in ``mask``: the splitting of touching grains
        notes the count of every shape whose hull it fills (``touching.concavity_depth``), and the seam
        pass, which asks again for most of the same grains, reads it back.
    """
    m = np.asarray(mask, bool)
    rows, cols = np.flatnonzero(m.any(axis=1)), np.flatnonzero(m.any(axis=0))
    if rows.size == 0:
        return 0
    tight = m[rows[0]:rows[-1] + 1, cols[0]:cols[-1] + 1]
    key = shape_key(tight)
    count = _COUNTS.get(key)
    if count is None:
        count = int(np.count_nonzero(convex_hull_mask(tight)))
        remember_hull_count(key, count)
    return count
