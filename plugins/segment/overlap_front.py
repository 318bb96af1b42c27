"""A grain lying partly over another: the front grain's edges carried on across the overlap.

Where one convex grain lies partly over another, the outline of the pair
has two notches, and the splitter (:mod:`grainhabit.plugins.segment.touching`)
cuts the pair along the straight line between them. The line between the
two grains in the picture is the front grain's own outline: its two edges
that end in the notches run on, straight, across the grain behind until
they meet. The straight cut leaves that corner of the front grain on the
grain behind, and the front grain's outline gets a false edge that its
habit reads.

:func:`complete_front` tries both grains as the front one: the edge of the
front grain's outline next to each notch (a line fitted to its pixels on
the background within :data:`EDGE_REACHES_PX` of the notch) is carried on
past the notch, and where the two lines meet inside the pair the triangle
between the notches and that point goes to the front grain. A hypothesis
holds only where the front grain stays convex (solidity at least
:data:`FRONT_SOLIDITY`), the grain behind keeps :data:`MIN_BACK_SHARE` of
its area in one piece, and the image shows an edge along the new line: its
mean gradient magnitude (Gaussian derivatives of 1 px) is at least
:data:`EDGE_GAIN` times the straight cut's. The better of the two is taken.
Between grains that look alike (no edge along either line) the straight cut
stays.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage as ndi

from grainhabit.plugins.segment.specks import solidity

#: Pixels of the front grain's outline within this distance (px) of a notch give the edge's direction (the
#: longest of these reaches over which they lie along a line) ...
EDGE_REACHES_PX = (10.0, 7.0, 5.0)
#: ... leaving out those nearer than this (px): the corner itself is rounded.
EDGE_SKIP_PX = 2.0
#: The completed front grain is convex to this solidity at least.
FRONT_SOLIDITY = 0.93
#: The grain behind keeps this share of its area at least, in one piece.
MIN_BACK_SHARE = 0.3
#: The new line's mean gradient is at least this many times the straight cut's.
EDGE_GAIN = 1.25
_FOUR = ndi.generate_binary_structure(2, 1)
_EIGHT = np.ones((3, 3), bool)


def dilate_square(mask: np.ndarray, radius: int) -> np.ndarray:
    """Dilation of a boolean image by the square of side ``2 radius + 1`` (outside the image counts as False).

    The same pixels as ``scipy.ndimage.binary_dilation(mask, np.ones((3, 3)), iterations=radius)``
    (border value 0), by ORs of shifted slices, rows then columns.
    """
    out = mask.copy()
    for _ in range(radius):  # rows: each pass widens by one pixel up and down
        grown = out.copy()
        grown[1:] |= out[:-1]
        grown[:-1] |= out[1:]
        out = grown
    for _ in range(radius):
        grown = out.copy()
        grown[:, 1:] |= out[:, :-1]
        grown[:, :-1] |= out[:, 1:]
        out = grown
    return out


def dilate_cross(mask: np.ndarray) -> np.ndarray:
    """One dilation of a boolean image by the 4-connected cross (outside the image counts as False).

    The same pixels as ``scipy.ndimage.binary_dilation(mask, generate_binary_structure(2, 1))``.
    """
    out = mask.copy()
    out[1:] |= mask[:-1]
    out[:-1] |= mask[1:]
    out[:, 1:] |= mask[:, :-1]
    out[:, :-1] |= mask[:, 1:]
    return out


def notch_points(a_mask: np.ndarray, b_mask: np.ndarray) -> list[np.ndarray] | None:
    """The two ends of the line between two touching parts, where it meets the background.

    Returns
    -------
    list of ndarray, shape (2,), or None
        (row, col) of each end (the centroid of the contact pixels next to the background there);
        None unless the contact meets the background at exactly two places.
    """
    union = a_mask | b_mask
    contact = a_mask & dilate_cross(b_mask)
    ends = contact & dilate_square(~union, 2)
    rows, cols = np.nonzero(ends)
    if rows.size < 2:
        return None
    # label only the box of the end pixels: the same components, numbered in the same (raster) order
    r0, c0 = int(rows[0]), int(cols.min())
    lab, n = ndi.label(ends[r0:int(rows[-1]) + 1, c0:int(cols.max()) + 1], _EIGHT)
    if n != 2:
        return None
    which = lab[rows - r0, cols - c0]
    # scipy.ndimage.center_of_mass: per label, the sums of the row and column indices over the count (all exact
    # whole numbers in float64 before the one division)
    count = np.bincount(which, minlength=3)[1:].astype(float)
    sum_r = np.bincount(which, weights=rows.astype(float), minlength=3)[1:]
    sum_c = np.bincount(which, weights=cols.astype(float), minlength=3)[1:]
    return [np.array([sum_r[i] / count[i], sum_c[i] / count[i]]) for i in range(2)]


def edge_direction(front: np.ndarray, union: np.ndarray, point: np.ndarray,
                   outer: np.ndarray | None = None) -> np.ndarray | None:
    """Unit direction of the front grain's outer edge arriving at a notch, pointing past it.

    A line is fitted (principal axis) to the front grain's pixels next to the background between
    :data:`EDGE_SKIP_PX` and the longest of :data:`EDGE_REACHES_PX` of the notch over which they lie along a line (the
    smaller axis at most a quarter of the larger); None where none does or fewer than 3 pixels are there.
    """
    if outer is None:
        outer = union & dilate_square(~union, 1)
    rr, cc = np.nonzero(front & outer)
    return _direction_at(rr, cc, point)


def _direction_at(rr: np.ndarray, cc: np.ndarray, point: np.ndarray) -> np.ndarray | None:
    """:func:`edge_direction` from the rows and columns of the front grain's pixels next to the background."""
    d = np.hypot(rr - point[0], cc - point[1])
    for reach in EDGE_REACHES_PX:
        # the longest reach whose pixels lie along one line (a short edge ends in a corner within reach)
        near = (d >= EDGE_SKIP_PX) & (d <= reach)
        if np.count_nonzero(near) < 3:
            return None
        pts = np.column_stack([rr[near], cc[near]]).astype(float)
        centre = pts.mean(axis=0)
        evals, evecs = np.linalg.eigh(np.cov((pts - centre).T))
        if evals[1] > 0 and evals[0] <= 0.0625 * evals[1]:
            direction = evecs[:, 1]
            return direction if np.dot(direction, point - centre) >= 0 else -direction
    return None


def ray_meet(p1: np.ndarray, d1: np.ndarray, p2: np.ndarray, d2: np.ndarray) -> np.ndarray | None:
    """Where the rays ``p1 + t d1`` and ``p2 + s d2`` (t, s > 0) meet; None if they do not."""
    m = np.column_stack([d1, -d2])
    if abs(np.linalg.det(m)) < 1e-6:
        return None
    t, s = np.linalg.solve(m, p2 - p1)
    if t <= 0 or s <= 0:
        return None
    return p1 + t * d1


def _line_gradient(grad: np.ndarray, a_mask: np.ndarray, b_mask: np.ndarray) -> float:
    """Mean gradient magnitude over the pixels of ``a_mask`` 4-adjacent to ``b_mask``."""
    line = a_mask & dilate_cross(b_mask)
    return float(grad[line].mean()) if line.any() else 0.0


def complete_front(grad, a_mask: np.ndarray, b_mask: np.ndarray) -> tuple[np.ndarray, np.ndarray] | None:
    """Two touching parts with the front one's edges carried on across the other, or None.

    Parameters
    ----------
    grad : ndarray of float, shape (h, w), or callable
        Gradient magnitude of the image over the pair's box, or a function of no arguments giving it
        (asked only where a hypothesis passes the shape tests).
    a_mask, b_mask : ndarray of bool, shape (h, w)
        The two parts (disjoint, touching).

    Returns
    -------
    (ndarray of bool, ndarray of bool) or None
        The two parts after the better hypothesis (their union unchanged); None where neither holds.
    """
    from skimage.draw import polygon

    ends = notch_points(a_mask, b_mask)
    if ends is None:
        return None
    union = a_mask | b_mask
    outer = union & dilate_square(~union, 1)  # the pair's pixels next to the background
    straight = None
    best, best_gain = None, EDGE_GAIN
    for front, back in ((a_mask, b_mask), (b_mask, a_mask)):
        rr, cc = np.nonzero(front & outer)  # as edge_direction(front, union, p, outer) takes them, once for both
        dirs = [_direction_at(rr, cc, p) for p in ends]
        if dirs[0] is None or dirs[1] is None:
            continue
        apex = ray_meet(ends[0], dirs[0], ends[1], dirs[1])
        if apex is None:
            continue
        rr, cc = polygon([ends[0][0], apex[0], ends[1][0]], [ends[0][1], apex[1], ends[1][1]], shape=union.shape)
        taken = np.zeros(union.shape, bool)
        taken[rr, cc] = True
        taken &= back
        if not taken.any():
            continue
        new_back = back & ~taken
        lab, n = ndi.label(new_back, _EIGHT)
        if n == 0 or new_back.sum() < MIN_BACK_SHARE * back.sum():
            continue
        if n > 1:
            sizes = np.bincount(lab.ravel())[1:]
            if sizes.max() < 0.95 * new_back.sum():
                continue
        new_front = front | taken
        if solidity(new_front) < FRONT_SOLIDITY:
            continue
        if callable(grad):
            grad = grad()
        if straight is None:
            straight = _line_gradient(grad, a_mask, b_mask)
        gain = _line_gradient(grad, new_front, new_back) / max(straight, 1e-12)
        if gain >= best_gain:
            best_gain = gain
            best = (new_front, new_back) if front is a_mask else (new_back, new_front)
    return best
