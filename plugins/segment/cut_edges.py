"""Cuts between touching grains of different levels moved onto the edge between them.

The splitter (:mod:`grainhabit.plugins.segment.touching`) divides a cluster of
touching grains along straight lines between the notches of its outline, or
along the saddles of its distance map: the geometry of the cluster's
outline. Where the two grains differ in level (a pale thin plate beside a
thick cube, a faceted grain beside a rod, or a grain lying partly over
another), the line between them is in the image itself, as an edge, and it
need not be straight nor run between the notches: the outline of a rounded
grain lying over a plate is a curve that the straight cut crosses. The cut
then leaves a piece of one grain on the other, and the cut grain's outline
gets a false edge, which its habit reads (a plate becomes a "cube", a
cuboctahedron whose cap went to the rod beside it a "rod").

:func:`snap_cuts` moves each such cut onto the edge. Within a band each side
of the cut (:data:`BAND_PX`, and at most :data:`BAND_SHARE` of the thinner
part's inscribed radius), the pixels of the two parts are given to one or
the other by a marker-controlled watershed [1]_ of the gradient magnitude
(Gaussian derivatives of 1 px), flooded from the rest of each part: the two
floods meet on the ridge of the gradient, the edge between the two levels.
A pixel changes part only where its own level (the image smoothed by a
Gaussian of 1 px) is nearer the level of the part it goes to: a thin corner
of one grain, which the flood may reach from the other side first, stays
with its grain. Only pairs whose levels (medians of their pixels more than
:data:`INNER_PX` inside) differ by :data:`LEVEL_STEP` of the higher one or
more are looked at: between grains of one level there is no edge to move
to, and the gradient there is noise. A move is undone where either part
would fall in pieces or change its area by more than
:data:`MAX_AREA_CHANGE`.

References
----------
.. [1] F. Meyer and S. Beucher, "Morphological segmentation", J. Visual
   Commun. Image Represent. 1(1), 21-46, 1990, doi:10.1016/1047-3203(90)90014-M
"""

from __future__ import annotations

from functools import cache, partial

import numpy as np
from scipy import ndimage as ndi

from grainhabit.plugins.segment.disk_morphology import erode_disk
from grainhabit.plugins.segment.distance import distance_map
from grainhabit.plugins.segment.overlap_front import complete_front

#: Widest band (px) each side of a cut in which pixels may change part ...
BAND_PX = 12.0
#: ... and at most this share of the thinner part's inscribed radius.
BAND_SHARE = 0.6
#: A pair is looked at only where the two levels differ by this share of the higher one.
LEVEL_STEP = 0.25
#: A move that changes either part's area by more than this share is undone.
MAX_AREA_CHANGE = 0.3
#: Pixels more than this far (px) inside a part count for its level.
INNER_PX = 2.0
#: Margin (px) of a pair's box: a grain may have grown by a band at an earlier pair's cut.
PAD_PX = int(BAND_PX) + 2
#: Margin (px) over which a Gaussian of 1 px reads (scipy's default truncation at 4 sd).
SMOOTH_MARGIN_PX = 4
_EIGHT = np.ones((3, 3), bool)


def _inside_distance(mask: np.ndarray) -> np.ndarray:
    """Euclidean distance (px) of each pixel of ``mask`` to the nearest pixel outside it (the box's edge outside)."""
    return distance_map(np.pad(mask, 1))[1:-1, 1:-1]


def part_level(smooth: np.ndarray, mask: np.ndarray) -> float:
    """A part's level: the median of ``smooth`` over its pixels more than :data:`INNER_PX` inside; NaN if under 10."""
    # _inside_distance(mask) > INNER_PX: the pixels that survive the erosion by that disk (disk_morphology)
    inner = erode_disk(mask, INNER_PX, 0)
    return float(np.median(smooth[inner])) if np.count_nonzero(inner) >= 10 else float("nan")


def levels_differ(lev_a: float, lev_b: float) -> bool:
    """Whether two levels differ by :data:`LEVEL_STEP` of the higher one or more (False where either is NaN)."""
    high = max(lev_a, lev_b)
    return bool(high > 0 and abs(lev_a - lev_b) >= LEVEL_STEP * high)


def snap_pair(grad: np.ndarray, smooth: np.ndarray, a_mask: np.ndarray, b_mask: np.ndarray,
              lev_a: float, lev_b: float) -> tuple[np.ndarray, np.ndarray] | None:
    """Two touching parts with their common cut moved onto the edge between their levels, or None.

    Parameters
    ----------
    grad : ndarray of float, shape (h, w)
        Gradient magnitude of the image over the pair's box (Gaussian derivatives of 1 px).
    smooth : ndarray of float, shape (h, w)
        The image smoothed by a Gaussian of 1 px (grains bright, image units).
    a_mask, b_mask : ndarray of bool, shape (h, w)
        The two parts (disjoint, touching).
    lev_a, lev_b : float
        Their levels (:func:`part_level`).

    Returns
    -------
    (ndarray of bool, ndarray of bool) or None
        The two parts moved (their union unchanged); None where the levels
        differ by less than :data:`LEVEL_STEP`, or the move fails a test (see
        the module docstring).
    """
    from skimage.segmentation import watershed

    if not levels_differ(lev_a, lev_b):
        return None
    d_a, d_b = _inside_distance(a_mask), _inside_distance(b_mask)
    band = min(BAND_PX, BAND_SHARE * min(float(d_a.max()), float(d_b.max())))
    if band < 1.0:
        return None
    # the band: pixels of either part within `band` of the other one (the cut is where they meet)
    near = (a_mask & (distance_map(~b_mask) <= band)) | (b_mask & (distance_map(~a_mask) <= band))
    markers = np.zeros(a_mask.shape, np.int32)
    markers[a_mask & ~near] = 1
    markers[b_mask & ~near] = 2
    if not (markers == 1).any() or not (markers == 2).any():
        return None
    union = a_mask | b_mask
    flooded = watershed(grad, markers, mask=union)
    # a pixel changes part only where its own level is nearer the level of the part it goes to
    nearer_a = np.abs(smooth - lev_a) < np.abs(smooth - lev_b)
    new_a = union & np.where(a_mask, ~((flooded == 2) & ~nearer_a), (flooded == 1) & nearer_a)
    new_b = union & ~new_a
    for old, new in ((a_mask, new_a), (b_mask, new_b)):
        n_old = float(np.count_nonzero(old))
        if abs(float(np.count_nonzero(new)) - n_old) > MAX_AREA_CHANGE * n_old:
            return None
        if ndi.label(new, structure=_EIGHT)[1] != 1:
            return None
    return new_a, new_b


def snap_cuts(image: np.ndarray, labels: np.ndarray, split: np.ndarray,
              boxes: list | None = None) -> tuple[np.ndarray, int]:
    """Move the cuts between touching grains of different levels onto the edge between them.

    Parameters
    ----------
    image : ndarray of float, shape (rows, cols)
        Preprocessed frame (grains bright, background 0).
    labels : ndarray of int32, shape (rows, cols)
        Grains 1..n.
    split : ndarray of bool, shape (n,)
        Which grains were cut from a cluster; only touching pairs with a cut grain are looked at.
    boxes : list of tuple of slice, optional
        ``scipy.ndimage.find_objects(labels)`` where the caller has it; it is then updated in place to
        the boxes of the labels returned.

    Returns
    -------
    labels : ndarray of int32
        The same grains and numbering (a new array where a cut moved), pixels near the moved cuts
        given to the other grain of their pair.
    moved : int
        How many cuts were moved.
    """
    n = int(labels.max()) if labels.size else 0
    if n < 2 or not np.any(split):
        return labels, 0
    given = boxes
    boxes = ndi.find_objects(labels) if given is None else list(given)
    written: dict[int, list] = {}  # label -> windows where its pixels were rewritten
    img = np.asarray(image, np.float32)
    levels = {}

    def level(k):
        # on the grain's box grown by SMOOTH_MARGIN_PX: the smoothing there is the whole frame's
        if k not in levels:
            box = grown_box(boxes[k - 1], labels.shape, SMOOTH_MARGIN_PX)
            levels[k] = part_level(ndi.gaussian_filter(img[box], 1.0), labels[box] == k)
        return levels[k]

    pairs = sorted({(min(a, b), max(a, b)) for a in np.flatnonzero(split[:n]) + 1 if boxes[a - 1] is not None
                    for b in neighbours(labels, int(a), boxes[a - 1])})
    out = labels
    moved = 0
    for a, b in pairs:
        pair_box = tuple(slice(min(u.start, v.start), max(u.stop, v.stop)) for u, v in zip(boxes[a - 1], boxes[b - 1]))
        box = grown_box(pair_box, labels.shape, PAD_PX)
        window = out[box]
        patch = img[box]
        a_mask, b_mask = window == a, window == b
        # the Gaussian derivatives of the pair's box, taken only where a move is looked at
        gradient = cache(partial(ndi.gaussian_gradient_magnitude, patch, 1.0))
        # a grain lying partly over the other: the front one's edges carried on across it
        res = complete_front(gradient, a_mask, b_mask)
        if res is None:
            if not levels_differ(level(a), level(b)):
                continue
            res = snap_pair(gradient(), ndi.gaussian_filter(patch, 1.0), a_mask, b_mask, level(a), level(b))
        if res is None or not (res[0] != a_mask).any():
            continue
        if out is labels:  # the caller's labels are left as they are
            out = labels.copy()
            window = out[box]
        window[res[0]] = a
        window[res[1]] = b
        moved += 1
        written.setdefault(a, []).append(box)
        written.setdefault(b, []).append(box)
    if given is not None:
        # a label's pixels lie in its first box or where it was rewritten: its box over those windows
        for k, windows in written.items():
            given[k - 1] = _union_box(out, k, ([boxes[k - 1]] if boxes[k - 1] is not None else []) + windows)
    return out, moved


def _union_box(labels: np.ndarray, k: int, windows: list) -> tuple | None:
    """The box (``find_objects`` form) of label ``k``'s pixels within the union of ``windows``; None if none."""
    found = [b for b in (mask_box(labels[win] == k, win) for win in windows) if b is not None]
    if not found:
        return None
    return (slice(min(b[0].start for b in found), max(b[0].stop for b in found)),
            slice(min(b[1].start for b in found), max(b[1].stop for b in found)))


def mask_box(mask: np.ndarray, window: tuple) -> tuple | None:
    """The box (``scipy.ndimage.find_objects`` form) of a mask's pixels, in the frame; None where it has none.

    Parameters
    ----------
    mask : ndarray of bool, shape (h, w)
        Pixels of the window ``window`` of the frame.
    window : tuple of slice
        Where the mask lies in the frame (starts given).
    """
    rows = np.flatnonzero(mask.any(axis=1))
    if rows.size == 0:
        return None
    cols = np.flatnonzero(mask.any(axis=0))
    r0, c0 = window[0].start, window[1].start
    return (slice(r0 + int(rows[0]), r0 + int(rows[-1]) + 1), slice(c0 + int(cols[0]), c0 + int(cols[-1]) + 1))


def grown_box(box: tuple, shape: tuple, margin: int) -> tuple:
    """A box grown by ``margin`` px each side, clipped to the frame."""
    return tuple(slice(max(b.start - margin, 0), min(b.stop + margin, size)) for b, size in zip(box, shape))


def neighbours(labels: np.ndarray, k: int, box: tuple) -> list[int]:
    """The labels that touch label ``k`` (8-connected), read in its box grown by one pixel.

    Parameters
    ----------
    labels : ndarray of int, shape (rows, cols)
    k : int
    box : tuple of slice
        ``scipy.ndimage.find_objects(labels)[k - 1]``.

    Returns
    -------
    list of int
    """
    grown = grown_box(box, labels.shape, 1)
    window = labels[grown]
    around = ndi.binary_dilation(window == k, structure=_EIGHT)
    found = np.unique(window[around])
    return [int(v) for v in found if v != 0 and v != k]
