"""Dividing lines between grains that do not touch: the discrete Voronoi diagram of the grain cores.

References
----------
.. [4] C. R. Maurer, R. Qi and V. Raghavan, "A linear time algorithm for
   computing exact Euclidean distance transforms of binary images in
   arbitrary dimensions", IEEE Trans. Pattern Anal. Mach. Intell. 25(2),
   265-270, 2003, doi:10.1109/TPAMI.2003.1177156 (the algorithm of
   scipy.ndimage.distance_transform_edt, from memory)
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage as ndi

from grainhabit.plugins.segment import runs
from grainhabit.plugins.segment.disk_morphology import dilate_disk
from grainhabit.plugins.segment.distance import feature_transform

#: Components of the thresholded mask smaller than this (pixels) are specks, not grains kept apart.
GAP_MIN_AREA_PX = 20
#: Inside the thresholded mask a gap line reaches at most this far (px) from the nearest grain core.
GAP_REACH_PX = 4.0
_EIGHT = np.ones((3, 3), bool)
#: Side (px) of the blocks by which the clusters of :func:`gap_lines` with ``near_px`` are grouped.
_BLOCK = 4


def gap_lines(mask: np.ndarray, cores: np.ndarray, reach_px: float = GAP_REACH_PX,
              min_area_px: int = GAP_MIN_AREA_PX, near_px: float | None = None) -> np.ndarray:
    """Pixels on the dividing lines between grains that do not touch.

    Parameters
    ----------
    mask : ndarray of bool, shape (rows, cols)
        Thresholded frame (before any closing).
    cores : ndarray of bool, shape (rows, cols)
        Pixels well above the background (``image > gap_level``), a subset
        of ``mask``.
    reach_px : float
        Inside ``mask`` a line is kept only up to this distance (px) from
        the nearest core: a gap up to about twice as wide that the noise
        threshold filled.
    min_area_px : int
        Components smaller than this (pixels; noise specks next to a grain)
        take no part.
    near_px : float or None
        None: the lines over the whole frame. Otherwise the lines only at
        pixels within ``near_px`` (Euclidean) of a pixel of ``mask``, and no
        line elsewhere; there they equal the whole-frame lines pixel for
        pixel (see Notes).

    Returns
    -------
    ndarray of bool, shape (rows, cols)
        Pixels outside every core where the nearest body (Euclidean
        distance) changes between 4-neighbours: the lines of the discrete
        Voronoi diagram of the bodies, two pixels wide, so they also cut
        8-connected paths. The bodies are the connected cores and the
        components of ``mask`` that hold no core (faint grains).

    Notes
    -----
    A closing bridges a gap narrower than its diameter, and the outline
    refinement has no background seed in it; the noise threshold, a few
    background sigmas up, fills a gap of a few pixels between two blurred
    grains by itself. The bright cores of two such grains stay apart, and
    the pixels between them, dimmer than ``gap_level``, are background
    that the blur lifted. The closing is kept off these lines and the
    refinement floods the background from them, so grains that do not touch
    stay apart; facet lines that notch a grain from its outline are still
    bridged, and a dark facet line across a grain (blurred, it keeps most
    of the grain level) never drops below ``gap_level``. The nearest body
    comes from the Euclidean distance transform with feature indices [4]_.

    With ``near_px`` the feature transform runs in one window per cluster
    (connected blocks holding pixels within ``near_px`` of the mask): the
    cluster's box grown by a margin. A pixel's nearest body found in the window is its
    nearest in the frame when that distance is below the distance to the
    nearest pixel outside the window (no body outside can be as near, so
    ties are broken among the same bodies); every pixel of the cluster and
    its 4-neighbours is checked, and a window that fails is grown (twice
    the margin, at most the frame) and computed again. On frames with
    grains on a small part of the area this is several times cheaper than
    one transform of the whole frame (tests/test_fast_paths.py checks the
    two against each other).
    """
    cores = cores & mask
    # the bodies, worked out on the mask's pixels only (the rest of the frame is no body): the 8-connected
    # components of the cores and of the mask at those pixels, in the order of np.flatnonzero(mask)
    at, core_of, comp_of, n, n_faint = _components_at_mask(mask, cores)
    if n + n_faint < 2:
        return np.zeros(mask.shape, bool)
    # components of the mask without a core are bodies of their own
    has_core = np.zeros(n_faint + 1, bool)
    has_core[comp_of[core_of > 0]] = True
    has_core[0] = True  # the background is no body
    body = np.where(core_of > 0, core_of, np.where(has_core[comp_of], 0, comp_of + n))
    area = np.bincount(body, minlength=n + n_faint + 1)
    keep = area >= min_area_px
    keep[0] = False
    if keep.sum() < 2:
        return np.zeros(mask.shape, bool)
    bodies = np.zeros(mask.shape, np.int32)
    bodies.ravel()[at] = np.where(keep[body], body, 0)
    if near_px is None:
        return nearest_body_lines(bodies, mask, reach_px)[0]
    return _lines_near_mask(bodies, mask, reach_px, near_px)


def _components_at_mask(mask: np.ndarray, cores: np.ndarray) -> tuple:
    """The 8-connected components of ``cores`` (within ``mask``) and of ``mask``, read at the mask's pixels.

    Parameters
    ----------
    mask : ndarray of bool, shape (rows, cols)
    cores : ndarray of bool, shape (rows, cols)
        A subset of ``mask``.

    Returns
    -------
    at : ndarray of int
        ``numpy.flatnonzero(mask)``.
    core_of, comp_of : ndarray of int32, shape (len(at),)
        ``scipy.ndimage.label(cores, structure=np.ones((3, 3)))[0].ravel()[at]`` and the same of ``mask``.
    n, n_mask : int
        The numbers of components.

    Notes
    -----
    Both labellings come from the masks' runs along the rows (:mod:`~grainhabit.plugins.segment.runs`):
    the mask's labels are its runs' labels repeated over their lengths; a run of the cores lies inside one
    run of the mask, found by a binary search, and its labels are written at its place among the mask's
    pixels. No pass over the frame but the two run searches (three whole-frame passes and two labellings
    before; equal, tests/test_seg9_kernels_exact.py).
    """
    cols = mask.shape[1]
    rows, starts, stops = runs.row_runs(mask)
    comp_run, n_mask = runs.connect_runs(rows, starts, stops, cols)
    lengths = stops - starts
    at = runs.run_pixels(rows, starts, stops, cols)
    comp_of = np.repeat(comp_run, lengths)
    core_of = np.zeros(at.size, np.int32)
    c_rows, c_starts, c_stops = runs.row_runs(cores)
    core_run, n = runs.connect_runs(c_rows, c_starts, c_stops, cols)
    if n:
        width = cols + 1
        host = np.searchsorted(rows * width + starts, c_rows * width + c_starts, side="right") - 1
        offset = (np.cumsum(lengths) - lengths)[host] + (c_starts - starts[host])
        c_len = c_stops - c_starts
        place = np.repeat(offset - (np.cumsum(c_len) - c_len), c_len) + np.arange(int(c_len.sum()))
        core_of[place] = np.repeat(core_run, c_len)
    return at, core_of, comp_of, n, n_mask


def nearest_body_lines(bodies: np.ndarray, mask: np.ndarray,
                       reach_px: float) -> tuple[np.ndarray, np.ndarray | None]:
    """The dividing lines of labelled bodies in one array (the frame or a window of it).

    Parameters
    ----------
    bodies : ndarray of int, shape (rows, cols)
        Body labels, 0 elsewhere.
    mask : ndarray of bool, shape (rows, cols)
        Thresholded pixels (a line inside them reaches ``reach_px`` at most).
    reach_px : float
        See :func:`gap_lines`.

    Returns
    -------
    lines : ndarray of bool, shape (rows, cols)
        Pixels outside the bodies whose nearest body (Euclidean) differs
        from that of a 4-neighbour; inside ``mask`` only up to ``reach_px``
        from it.
    nearest : ndarray of int, shape (2, rows, cols) or None
        Row and column of every pixel's nearest body pixel (scipy's feature
        transform); None when there is no body.

    Notes
    -----
    Only the feature indices are asked of scipy; the distances (the
    larger part of its cost on a large frame) are computed where a line
    lies inside ``mask``, as scipy does: the square root of the summed
    squared index differences in float64.
    """
    free = bodies == 0
    if free.all():  # no body at all: no nearest body anywhere
        return np.zeros(bodies.shape, bool), None
    ft = feature_transform(free)  # scipy's distance_transform_edt(free, return_distances=False, return_indices=True)
    out = np.zeros(bodies.shape, bool)
    held = bodies[~free]
    if held.min() == held.max():
        return out, ft  # one body: the same nearest body everywhere, no line
    ri, ci = ft
    # bodies[ri, ci] by flat indices (one index array instead of numpy's two-array gather; the same values)
    nearest = np.ascontiguousarray(bodies).ravel().take(ri * np.intp(bodies.shape[1]) + ci)
    down = nearest[1:, :] != nearest[:-1, :]
    right = nearest[:, 1:] != nearest[:, :-1]
    out[1:, :] |= down
    out[:-1, :] |= down
    out[:, 1:] |= right
    out[:, :-1] |= right
    out &= free
    r, c = np.nonzero(out & mask)
    if r.size:
        d = np.sqrt((ri[r, c] - r).astype(np.float64) ** 2 + (ci[r, c] - c).astype(np.float64) ** 2)
        out[r[d > reach_px], c[d > reach_px]] = False
    return out, ft


def _lines_near_mask(bodies: np.ndarray, mask: np.ndarray, reach_px: float, near_px: float) -> np.ndarray:
    """:func:`gap_lines` at the pixels within ``near_px`` (Euclidean) of ``mask``, window by window.

    The clusters are the connected groups of :data:`_BLOCK` px blocks that
    hold such a pixel; each is computed in its box grown by a margin, and
    written (and checked) at those pixels only.
    """
    rows, cols = mask.shape
    b = _BLOCK
    zone = dilate_disk(mask, near_px)
    nby, nbx = -(-rows // b), -(-cols // b)
    padded = np.zeros((nby * b, nbx * b), bool)
    padded[:rows, :cols] = zone
    held = block_any(padded, b)
    lab, _ = ndi.label(held, structure=_EIGHT)
    out = np.zeros(mask.shape, bool)
    # a pixel of the zone lies within near_px of a mask pixel: when that is a body pixel, its nearest body
    # is no farther, so a margin of near_px + 3 holds it. Other cases (a speck or a dim rim far from any
    # body) fail the check and take a wider window.
    first = int(np.ceil(near_px)) + 3
    for j, box in enumerate(ndi.find_objects(lab), start=1):
        if box is None:
            continue
        by0, bx0 = box[0].start * b, box[1].start * b
        by1, bx1 = min(box[0].stop * b, rows), min(box[1].stop * b, cols)
        own_box = np.repeat(np.repeat(lab[box] == j, b, axis=0), b, axis=1)[:by1 - by0, :bx1 - bx0]
        own_box &= zone[by0:by1, bx0:bx1]
        margin = first
        while True:
            y0, y1 = max(by0 - margin, 0), min(by1 + margin, rows)
            x0, x1 = max(bx0 - margin, 0), min(bx1 + margin, cols)
            win = (slice(y0, y1), slice(x0, x1))
            own = np.zeros((y1 - y0, x1 - x0), bool)
            own[by0 - y0:by1 - y0, bx0 - x0:bx1 - x0] = own_box
            if _one_body_all_near(bodies[win], mask[win]):
                lines = None  # no line at the cluster's pixels, in the window or the frame (see the function)
                break
            lines, ft = nearest_body_lines(bodies[win], mask[win], reach_px)
            if (y0, y1, x0, x1) == (0, rows, 0, cols):
                break
            # the cluster and its 4-neighbours (a line compares a pixel with them): is the nearest body found
            # in the window nearer than any pixel beyond a side of the window cut out of the frame?
            check = own.copy()
            check[1:] |= own[:-1]
            check[:-1] |= own[1:]
            check[:, 1:] |= own[:, :-1]
            check[:, :-1] |= own[:, 1:]
            if ft is not None:
                r, c = np.nonzero(check)
                big = rows + cols
                beyond = np.minimum(np.minimum(r + 1 if y0 > 0 else big, y1 - y0 - r if y1 < rows else big),
                                    np.minimum(c + 1 if x0 > 0 else big, x1 - x0 - c if x1 < cols else big))
                d2 = (ft[0][r, c] - r).astype(np.int64) ** 2 + (ft[1][r, c] - c).astype(np.int64) ** 2
                if np.all(d2 < beyond.astype(np.int64) ** 2):
                    break
            margin *= 2
        if lines is not None:
            out[win] |= lines & own
    return out


def _one_body_all_near(bodies: np.ndarray, mask: np.ndarray) -> bool:
    """Whether a window of :func:`_lines_near_mask` holds one body, with every pixel of ``mask`` beside it.

    Parameters
    ----------
    bodies : ndarray of int, shape (h, w)
        The window's body labels.
    mask : ndarray of bool, shape (h, w)
        The window's thresholded pixels.

    Returns
    -------
    bool
        True when the nonzero labels are all one body ``B`` and every pixel of ``mask`` is in ``B`` or
        an 8-neighbour of it (within sqrt(2) px). Then the window's cluster needs no feature transform:
        a pixel of the cluster lies within ``near_px`` of a pixel of ``mask`` (the zone), inside the
        window since the margin exceeds ``near_px``; so it lies within ``near_px + sqrt(2)`` of ``B``, and
        its 4-neighbours within ``near_px + 1 + sqrt(2)``, less than the first margin
        ``ceil(near_px) + 3``. The window check then passes, and with one body there is no dividing
        line: what :func:`nearest_body_lines` and the check would find. False decides nothing.
    """
    present = bodies != 0
    held = bodies[present]
    if held.size == 0 or held.min() != held.max():
        return False
    near = present.copy()
    near[1:] |= present[:-1]
    near[:-1] |= present[1:]
    rows = near.copy()
    near[:, 1:] |= rows[:, :-1]
    near[:, :-1] |= rows[:, 1:]
    return not (mask & ~near).any()


def block_any(mask: np.ndarray, b: int) -> np.ndarray:
    """Which ``b`` x ``b`` blocks of a mask hold a True pixel.

    Parameters
    ----------
    mask : ndarray of bool, shape (rows, cols)
        Both sides multiples of ``b``.
    b : int
        Block side (px).

    Returns
    -------
    ndarray of bool, shape (rows // b, cols // b)
        ``mask.reshape(rows // b, b, cols // b, b).any(axis=(1, 3))``. For ``b`` of 2, 4 or 8 each block's
        row is read as one unsigned integer (nonzero when any of its ``b`` bytes is), which spares numpy's
        strided reduction over the frame (several times cheaper; equal, tests/test_segment_exact.py).
    """
    rows, cols = mask.shape
    words = {2: np.uint16, 4: np.uint32, 8: np.uint64}.get(int(b))
    if words is None or not mask.flags.c_contiguous:
        return mask.reshape(rows // b, b, cols // b, b).any(axis=(1, 3))
    per_row = mask.view(np.uint8).view(words)  # (rows, cols // b): one word per block row
    return np.bitwise_or.reduce(per_row.reshape(rows // b, b, cols // b), axis=1) != 0
