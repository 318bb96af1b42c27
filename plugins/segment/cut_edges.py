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

import numpy as np
from scipy import ndimage as ndi

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
_EIGHT = np.ones((3, 3), bool)


def touching_pairs(labels: np.ndarray) -> set[tuple[int, int]]:
    """Pairs ``(a, b)``, ``a < b``, of labels that touch (8-connected).

    Parameters
    ----------
    labels : ndarray of int, shape (rows, cols)
        0 background, grains 1..n.

    Returns
    -------
    set of tuple of int

    Examples
    --------
    >>> lab = np.array([[1, 1, 0, 3], [0, 2, 0, 3]])
    >>> sorted(touching_pairs(lab))
    [(1, 2)]
    """
    pairs = set()
    for first, second in ((labels[:, :-1], labels[:, 1:]), (labels[:-1, :], labels[1:, :]),
                          (labels[:-1, :-1], labels[1:, 1:]), (labels[:-1, 1:], labels[1:, :-1])):
        meet = (first > 0) & (second > 0) & (first != second)
        if meet.any():
            a, b = first[meet], second[meet]
            pairs.update(zip(np.minimum(a, b).tolist(), np.maximum(a, b).tolist()))
    return pairs


def _inside_distance(mask: np.ndarray) -> np.ndarray:
    """Euclidean distance (px) of each pixel of ``mask`` to the nearest pixel outside it (the box's edge outside)."""
    return ndi.distance_transform_edt(np.pad(mask, 1))[1:-1, 1:-1]


def snap_pair(grad: np.ndarray, smooth: np.ndarray, a_mask: np.ndarray, b_mask: np.ndarray
              ) -> tuple[np.ndarray, np.ndarray] | None:
    """Two touching parts with their common cut moved onto the edge between their levels, or None.

    Parameters
    ----------
    grad : ndarray of float, shape (h, w)
        Gradient magnitude of the image over the pair's box (Gaussian derivatives of 1 px).
    smooth : ndarray of float, shape (h, w)
        The image smoothed by a Gaussian of 1 px (grains bright, image units).
    a_mask, b_mask : ndarray of bool, shape (h, w)
        The two parts (disjoint, touching).

    Returns
    -------
    (ndarray of bool, ndarray of bool) or None
        The two parts moved (their union unchanged); None where the levels
        differ by less than :data:`LEVEL_STEP`, or the move fails a test (see
        the module docstring).
    """
    from skimage.segmentation import watershed

    d_a, d_b = _inside_distance(a_mask), _inside_distance(b_mask)
    inner_a, inner_b = d_a > INNER_PX, d_b > INNER_PX
    if np.count_nonzero(inner_a) < 10 or np.count_nonzero(inner_b) < 10:
        return None
    lev_a, lev_b = float(np.median(smooth[inner_a])), float(np.median(smooth[inner_b]))
    high = max(lev_a, lev_b)
    if high <= 0 or abs(lev_a - lev_b) < LEVEL_STEP * high:
        return None
    band = min(BAND_PX, BAND_SHARE * min(float(d_a.max()), float(d_b.max())))
    if band < 1.0:
        return None
    # the band: pixels of either part within `band` of the other one (the cut is where they meet)
    near = (a_mask & (ndi.distance_transform_edt(~b_mask) <= band)) | \
           (b_mask & (ndi.distance_transform_edt(~a_mask) <= band))
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


def snap_cuts(image: np.ndarray, labels: np.ndarray, split: np.ndarray) -> tuple[np.ndarray, int]:
    """Move the cuts between touching grains of different levels onto the edge between them.

    Parameters
    ----------
    image : ndarray of float, shape (rows, cols)
        Preprocessed frame (grains bright, background 0).
    labels : ndarray of int32, shape (rows, cols)
        Grains 1..n.
    split : ndarray of bool, shape (n,)
        Which grains were cut from a cluster; only touching pairs with a cut grain are looked at.

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
    pairs = [(a, b) for a, b in sorted(touching_pairs(labels)) if split[a - 1] or split[b - 1]]
    if not pairs:
        return labels, 0
    boxes = ndi.find_objects(labels)
    out = labels.copy()
    img = np.asarray(image, np.float32)
    moved = 0
    for a, b in pairs:
        box_a, box_b = boxes[a - 1], boxes[b - 1]
        r0 = max(min(box_a[0].start, box_b[0].start) - PAD_PX, 0)
        r1 = min(max(box_a[0].stop, box_b[0].stop) + PAD_PX, labels.shape[0])
        c0 = max(min(box_a[1].start, box_b[1].start) - PAD_PX, 0)
        c1 = min(max(box_a[1].stop, box_b[1].stop) + PAD_PX, labels.shape[1])
        window = out[r0:r1, c0:c1]
        patch = img[r0:r1, c0:c1]
        a_mask, b_mask = window == a, window == b
        res = snap_pair(ndi.gaussian_gradient_magnitude(patch, 1.0), ndi.gaussian_filter(patch, 1.0), a_mask, b_mask)
        if res is None or not (res[0] != a_mask).any():
            continue
        window[res[0]] = a
        window[res[1]] = b
        moved += 1
    return out, moved
