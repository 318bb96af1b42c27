"""Objects far smaller than a frame's grains: debris and substrate texture, not grains.

A micrograph is taken at a magnification chosen for its grains, so the
grains of one frame span a limited range of sizes, while dust, debris,
substrate grain and film texture add specks far below it. An object whose
area is under ``share`` times the frame's *typical grain area* is dropped,
the typical area being the area-weighted median of the objects found: the
area that halves the frame's total grain area (half of it lies in larger
objects). Objects on the frame's edge count too: leaving them out of the
reference kept a dark corner taken for one huge object from dropping three
real particles (EMPS b392e4784f) but let back some 80 specks on other frames
whose large edge objects are real grains cut by the edge. Weighting by area keeps the reference on the grains even where
the specks outnumber them ten to one, as on a rough film; a plain median
would fall to the specks.

With the default share of 0.02 an object is dropped when its equivalent
circle diameter is under about 1/7 of the typical one (sqrt(0.02) = 0.14).
A sample that really holds grains spanning more than that in one field (a
blend of a fine and a coarse emulsion) should set ``min_area_share`` to 0,
and rely on ``min_ecd_nm`` / ``min_ecd_px`` alone.

An object lying along the frame's edge, touching it over at least
:data:`EDGE_STRIP_RATIO` times its depth from it, is left out of the
reference (it is still dropped if small): a bright strip along the edge of
an SEM frame (charging, the scan's border), cut into a few long objects, set
the typical area of EMPS a4027c076c to a strip piece's and dropped 14 of its
small particles as debris. A grain cut by the edge reaches that ratio only
when less than half of it lies inside (a disc cut at depth ``d`` touches the
edge over ``2 sqrt(d (2 r - d))``, at least ``2 d`` for ``d <= r``): such
a remnant says little about the grain's size either.

On the 357 EMPS training images (B. Yildirim, J. M. Cole, J. Chem. Inf.
Model. 61 (2021) 1136) the rule dropped 366 found objects that lie on no
hand-masked particle and 17 that matched one, measured on the labels of
segment-grains 2.6 (see DEVELOPERS.md, "Debris below the frame's grains").

Given the preprocessed frame, objects both small and dim beside the
frame's grains go as well (:func:`small_and_dim`, segment-grains 2.27):
stains of a film and grains of a rough substrate are smaller than the
particles and far fainter than their size would make a particle.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage as ndi

#: Default smallest area, as a fraction of the frame's area-weighted median grain area.
MIN_AREA_SHARE = 0.02
#: An object of at most :data:`SPECK_AREA_PX` (a disc of 6 px ECD: no shape is told at that size) goes already
#: under this share of the typical area (with ``share`` 0 nothing is dropped).
SPECK_SHARE = 0.05
SPECK_AREA_PX = np.pi / 4.0 * 6.0 ** 2
#: An object under DIM_AREA_SHARE of the typical area whose mean level is under DIM_LEVEL of the typical grain's
#: (the median mean level of the objects of at least the median area) is a stain or a grain of the substrate
#: (segment-grains 2.27) ...
DIM_AREA_SHARE = 0.2
DIM_LEVEL = 0.4
#: ... in a frame of at least this many objects.
DIM_MIN_OBJECTS = 5
#: An object touching the frame's edge over this many times its depth from it is no reference for the typical area.
EDGE_STRIP_RATIO = 2.0


def typical_area(areas: np.ndarray) -> float:
    """The area-weighted median of object areas.

    Parameters
    ----------
    areas : array_like of float, shape (n,)
        Object areas (px or any unit), n >= 1.

    Returns
    -------
    float
        The smallest area ``a`` such that objects of area <= ``a`` hold at
        least half of the total area.

    Examples
    --------
    Ten specks of 1 px and one grain of 100 px: the grain holds most of the
    area, so it is the typical area.

    >>> typical_area([1] * 10 + [100])
    100.0
    """
    a = np.sort(np.asarray(areas, np.float64))
    if a.size == 0:
        raise ValueError("typical_area needs at least one area")
    cum = np.cumsum(a)
    return float(a[np.searchsorted(cum, 0.5 * cum[-1])])


def below_population(areas: np.ndarray, share: float = MIN_AREA_SHARE, reference: np.ndarray | None = None
                     ) -> np.ndarray:
    """Which objects are smaller than ``share`` of the frame's typical grain area.

    Parameters
    ----------
    areas : array_like of float, shape (n,)
        Areas of the frame's objects (px).
    share : float
        Fraction of :func:`typical_area`; 0 drops nothing.
    reference : ndarray of bool, shape (n,), optional
        The objects the typical area is taken from (default all; all where none is).

    Returns
    -------
    ndarray of bool, shape (n,)
        True for the objects to drop: under ``share`` of the typical area, or under
        :data:`SPECK_SHARE` of it and :data:`SPECK_AREA_PX` (specks at the resolution floor in a frame
        of larger grains; where the grains themselves are that small, the typical area is small too).
    """
    areas = np.asarray(areas, np.float64)
    if share <= 0 or areas.size == 0:
        return np.zeros(areas.shape, bool)
    ref = areas if reference is None or not np.any(reference) else areas[np.asarray(reference, bool)]
    typical = typical_area(ref)
    # specks at the resolution floor go at a larger share (see SPECK_SHARE)
    return (areas < share * typical) | ((areas < SPECK_AREA_PX) & (areas < SPECK_SHARE * typical))


def edge_strips(boxes: list, shape: tuple) -> np.ndarray:
    """Which objects lie along the frame's edge: touching it over :data:`EDGE_STRIP_RATIO` times their depth.

    Parameters
    ----------
    boxes : list of tuple of slice
        ``scipy.ndimage.find_objects`` of the labels (None for an absent label: not a strip).
    shape : tuple of int
        The frame's (rows, cols).

    Returns
    -------
    ndarray of bool, shape (len(boxes),)

    Examples
    --------
    A 20 x 150 px strip along the right edge of a 512 x 685 px frame, and a grain cut by that edge
    (40 px deep, 60 px along it):

    >>> boxes = [(slice(0, 150), slice(665, 685)), (slice(300, 360), slice(645, 685))]
    >>> edge_strips(boxes, (512, 685)).tolist()
    [True, False]
    """
    rows, cols = shape
    out = np.zeros(len(boxes), bool)
    for i, box in enumerate(boxes):
        if box is None:
            continue
        h, w = box[0].stop - box[0].start, box[1].stop - box[1].start
        along_rows = box[0].start == 0 or box[0].stop == rows      # touches the top or bottom edge
        along_cols = box[1].start == 0 or box[1].stop == cols      # touches the left or right edge
        out[i] = (along_rows and w >= EDGE_STRIP_RATIO * h) or (along_cols and h >= EDGE_STRIP_RATIO * w)
    return out


def box_areas(labels: np.ndarray, boxes: list) -> np.ndarray:
    """Pixel counts of labels 1..n, each counted in its own box.

    Parameters
    ----------
    labels : ndarray of int, shape (rows, cols)
    boxes : list of tuple of slice
        ``scipy.ndimage.find_objects(labels)``, every label present.

    Returns
    -------
    ndarray of int64, shape (n,)
        ``np.bincount(labels.ravel())[1:]`` without a pass over the whole frame.
    """
    return np.array([np.count_nonzero(labels[b] == k) for k, b in enumerate(boxes, start=1)], np.int64)


def drop_below_population(labels: np.ndarray, split: np.ndarray, share: float = MIN_AREA_SHARE,
                          image: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray, int]:
    """Remove the objects :func:`below_population` (and, given ``image``, :func:`small_and_dim`) names.

    Parameters
    ----------
    labels : ndarray of int, shape (rows, cols)
        Grains 1..n, numbered in row-major order of their first pixel.
    split : ndarray of bool, shape (n,)
        A per-grain flag carried along.
    share : float
        See :func:`below_population`; 0 drops nothing.
    image : ndarray of float, shape (rows, cols), optional
        The preprocessed frame (grains bright): objects small and dim beside the frame's grains go too.

    Returns
    -------
    labels : ndarray of int32
        The kept grains, renumbered 1..m in the same order.
    split : ndarray of bool, shape (m,)
    dropped : int
        Objects removed.
    """
    n = int(labels.max()) if labels.size else 0
    if n == 0 or share <= 0:
        return labels, split, 0
    areas = np.bincount(labels.ravel(), minlength=n + 1)[1:]
    reference = ~edge_strips(ndi.find_objects(labels, n), labels.shape)
    drop = below_population(areas, share, reference)
    if image is not None:
        drop |= small_and_dim(areas, ndi.mean(image, labels, np.arange(1, n + 1)), reference)
    if not drop.any():
        return labels, split, 0
    keep = ~drop
    lut = np.zeros(n + 1, np.int32)
    lut[1:][keep] = np.arange(1, int(keep.sum()) + 1, dtype=np.int32)
    return lut[labels], np.asarray(split, bool)[keep], int(drop.sum())


def small_and_dim(areas: np.ndarray, levels: np.ndarray, reference: np.ndarray | None = None) -> np.ndarray:
    """Which objects are both far smaller and far dimmer than the frame's grains.

    Parameters
    ----------
    areas : array_like of float, shape (n,)
        Areas of the frame's objects (px).
    levels : array_like of float, shape (n,)
        Their mean level on the preprocessed frame (background 0, grains bright).
    reference : ndarray of bool, shape (n,), optional
        The objects the typical area and level are taken from (default all; all where none is).

    Returns
    -------
    ndarray of bool, shape (n,)
        True under :data:`DIM_AREA_SHARE` of :func:`typical_area` and under :data:`DIM_LEVEL` of the
        typical level, the median mean level of the reference objects of at least their median area;
        all False in a frame of fewer than :data:`DIM_MIN_OBJECTS` objects or where the typical level
        is not above 0.

    Notes
    -----
    A grain of a frame's own material a fifth of the typical area is about half as wide, and in
    transmission about half as thick: its contrast falls with its thickness, but to under 0.4 of the
    typical grain's only where it is thinner still than its width says (or is no grain of that
    material). On a rough film the grains of the substrate, and on a stained film its faint blotches,
    are such objects. Measured on the final labels of the 357 EMPS training pictures (B. Yildirim,
    J. M. Cole, J. Chem. Inf. Model. 61 (2021) 1136) at segment-grains 2.26: 39 false grains and 7
    matched particles among the objects under 0.2 of the typical area and 0.4 of the typical level.
    """
    areas = np.asarray(areas, np.float64)
    levels = np.asarray(levels, np.float64)
    if areas.size < DIM_MIN_OBJECTS:
        return np.zeros(areas.shape, bool)
    ref = np.ones(areas.shape, bool) if reference is None or not np.any(reference) else np.asarray(reference, bool)
    typical = typical_area(areas[ref])
    large = ref & (areas >= np.median(areas[ref]))
    level = float(np.median(levels[large]))
    if not level > 0:
        return np.zeros(areas.shape, bool)
    return (areas < DIM_AREA_SHARE * typical) & (levels < DIM_LEVEL * level)
