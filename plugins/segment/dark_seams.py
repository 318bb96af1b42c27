"""Grains left joined divided along the dark seams between them (segment-grains 2.9).

Particles that meet face to face leave a thin line darker than both of them
(a groove, a gap the blur filled, the thinner edges of both in transmission).
The splitter (:mod:`grainhabit.plugins.segment.touching`) cuts along straight
segments between notches of the outline; where the seams curve, or the
notches are shallow (a cluster of large SEM spheres with bright rims, packed
cubes, touching rods), a cluster can stay one grain. Here every grain that
is not convex is looked at once more:

1. the seams: on the image smoothed by a Gaussian of 1 px, the black top-hat
   [1]_ with a disc of radius :data:`SEAM_RADIUS_PX` (the closing minus the
   image: thin dark lines stand out, broad dark areas such as the grey top of
   a sphere do not) above :data:`~grainhabit.plugins.segment.touching.SEAM_DIP`
   of the grain's median level, more than a pixel inside its outline;
2. one marker per part: the h-maxima of the distance map of the grain less
   its seams, h = :data:`H_FRACTION` of the deepest distance (2 px at least),
   so a seam broken in places still separates two parts;
3. a marker-controlled watershed [2]_ from those markers of the top-hat (in
   units of the seam threshold) less the seam-free distance map (in units of
   its deepest distance): high on the seams, lowest at the parts' centres; the
   parts under :data:`MIN_PART_FRACTION` of the largest part (or under the
   smallest grain) given to their neighbours;
4. the division is kept only when every boundary between two parts is darker
   than both parts by ``SEAM_DIP`` (as
   :func:`~grainhabit.plugins.segment.touching.seam_contrast` measures a
   cut) and meets the outline at a notch (:data:`NOTCH_PX` deep, within
   :data:`NOTCH_REACH_PX`; a notch's depth is taken from the convex hull's
   edge, so the narrow V between the round ends of two rods side by side
   counts), and every part is convex (solidity at least
   :data:`PART_SOLIDITY`): the texture inside one grain gives wandering
   boundaries and parts that are not convex, and the edges between the
   facets of one crystal, dark as they may be, meet its outline at corners,
   not in notches. A division into :data:`HEAP_PARTS` parts or more (a
   heap, a bundle of rods) is kept where :data:`HEAP_CONVEX_SHARE` of its
   parts are convex (segment-grains 2.26: two rods crossing make one part
   that is not, and kept the whole bundle one grain before);
5. each part is looked at again by the same steps, as a grain of its own, up
   to :data:`ROUNDS` levels (:func:`divide_again`).

Only grains whose solidity (ISO 9276-6) is under :data:`GRAIN_SOLIDITY`,
or that are :data:`LARGE_FACTOR` times the frame's median grain or larger,
are looked at: a single particle, textured or not, is convex and of the
frame's usual size, and is never divided here.

On the 357 EMPS training pictures (B. Yildirim, J. M. Cole, J. Chem. Inf.
Model. 61 (2021) 1136) as a pass after segment-grains 2.8: 37 more
particles found, the false grains 2 fewer (touching rods, pairs of small
spheres, cubes in rows). Without the two convexity tests the same pass found
90 more particles but made 196 more false grains (textured SEM spheres cut
along their texture).

References
----------
.. [1] P. Soille, *Morphological Image Analysis*, 2nd ed., Springer, 2003,
   section 4.4 (top-hat transforms), from memory.
.. [2] F. Meyer and S. Beucher, "Morphological segmentation", J. Visual
   Commun. Image Represent. 1(1), 21-46, 1990, doi:10.1016/1047-3203(90)90014-M
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage as ndi

from grainhabit.plugins.segment.distance import distance_map
from grainhabit.plugins.segment.foreground import disk_structure
from grainhabit.plugins.segment.hull_fill import convex_hull_mask, hull_pixel_count
from grainhabit.plugins.segment.population import box_areas
from grainhabit.plugins.segment.touching import SEAM_DIP

#: Grains less solid than this are looked at (two touching discs: 0.88; one disc: 1).
GRAIN_SOLIDITY = 0.92
#: Every part of a division is at least this solid.
PART_SOLIDITY = 0.85
#: A division into this many parts or more (a heap, a bundle of rods side by side) is kept where this share of
#: its parts is convex: two crossing rods make one part that is not, and the rest of the heap still divides.
HEAP_PARTS = 4
HEAP_CONVEX_SHARE = 0.75
#: Radius (px) of the disc of the black top-hat: seams up to about twice as wide stand out.
SEAM_RADIUS_PX = 3
#: h of the h-maxima of the seam-free distance map, as a share of its deepest distance.
H_FRACTION = 0.3
#: Smallest part, as a share of the largest part's area (of the grain's area, a heap of nine spheres
#: could not be divided at all: each sphere is a ninth of it).
MIN_PART_FRACTION = 0.2
#: A convex grain is looked at when its area is this many times the median of its frame's grains ...
LARGE_FACTOR = 1.8
#: ... in a frame of at least this many grains.
LARGE_MIN_GRAINS = 5
#: Levels of division: the parts of a division are looked at again, as grains of their own (divide_again).
ROUNDS = 3
#: Grains under this many smallest grains are not looked at.
MIN_GRAINS = 4
#: A notch of the outline: pixels of the convex hull at least this far (px) outside the grain ...
NOTCH_PX = 1.5
#: ... within this distance (px) of where a boundary between two parts meets the outline.
NOTCH_REACH_PX = 4.0
#: Pixels nearer the outline than this (px) take no part in the levels and the seams' contrast.
EDGE_PX = 2.0
_EIGHT = np.ones((3, 3), bool)


def divide_at_seams(image: np.ndarray, mask: np.ndarray, min_area: float,
                    large: bool = False) -> list[np.ndarray] | None:
    """The parts of one grain along its dark seams, or None where it stays whole.

    Parameters
    ----------
    image : ndarray of float, shape (h, w)
        Preprocessed image over the grain's box (grains bright), with a margin.
    mask : ndarray of bool, shape (h, w)
        The grain.
    min_area : float
        Smallest grain area, px.
    large : bool
        The grain is :data:`LARGE_FACTOR` times its frame's typical grain or
        larger: looked at even when convex (two cubes face to face make a
        convex rectangle).

    Returns
    -------
    list of ndarray of bool, or None
        Two or more parts covering ``mask``; None when the grain is convex (and not large),
        has no seam, or the division fails a test (see the module docstring).
    """
    from skimage.segmentation import watershed

    from grainhabit.plugins.segment.distance_maxima import distance_h_maxima

    area = float(np.count_nonzero(mask))
    if area < MIN_GRAINS * min_area:
        return None
    # the hull's pixel count, remembered from the splitting for most grains (hull_fill.hull_pixel_count)
    if not large and area >= GRAIN_SOLIDITY * float(hull_pixel_count(mask)):
        return None
    smooth = ndi.gaussian_filter(np.asarray(image, np.float32), 1.0)
    dist = distance_map(mask)
    inner = mask & (dist > EDGE_PX)
    if np.count_nonzero(inner) < 20:
        return None
    level = float(np.median(smooth[inner]))
    if level <= 0:
        return None
    tophat = ndi.grey_closing(smooth, footprint=disk_structure(SEAM_RADIUS_PX)) - smooth
    seams = (tophat > SEAM_DIP * level) & (dist > 1) & mask
    if not seams.any():
        return None
    free = distance_map(mask & ~seams)
    peaks, n = ndi.label(distance_h_maxima(free, max(2.0, H_FRACTION * float(free.max()))), structure=_EIGHT)
    if n < 2:
        return None
    # the relief: high on the seams, lowest at the parts' centres (a flood of the top-hat alone would let
    # one marker run round another across the flat inside of a grain)
    relief = tophat / (SEAM_DIP * level) - free / float(free.max())
    flooded = watershed(relief, peaks, mask=mask)
    sizes = np.bincount(flooded.ravel(), minlength=n + 1)
    big = np.flatnonzero(sizes[1:] >= max(min_area, MIN_PART_FRACTION * float(sizes[1:].max()))) + 1
    if big.size < 2:
        return None
    if big.size < n:
        flooded = watershed(relief, np.where(np.isin(peaks, big), peaks, 0), mask=mask)
    darkest = ndi.grey_erosion(smooth, footprint=_EIGHT)
    levels = {}
    for k in big:
        part_inner = (flooded == k) & inner
        levels[k] = float(np.median(smooth[part_inner])) if np.count_nonzero(part_inner) >= 5 else level
    # parts joined again across every boundary that is no seam (union-find over the pairs)
    root = {int(k): int(k) for k in big}

    def find(k):
        while root[k] != k:
            k = root[k]
        return k

    # where the outline is notched: pixels of the convex hull outside the grain, NOTCH_PX deep or more
    hull = convex_hull_mask(mask)
    notched = hull & ~mask
    # deep by the hull's edge (a narrow V between the round ends of two rods side by side is only a pixel or
    # two from the grain everywhere, but it runs far in from the hull)
    notched &= distance_map(hull) > NOTCH_PX
    near_notch = distance_map(~notched) <= NOTCH_REACH_PX if notched.any() else notched
    for i, a in enumerate(big):
        grown = ndi.binary_dilation(flooded == a, structure=_EIGHT)
        for b in big[i + 1:]:
            meet = grown & (flooded == b)
            line = meet & (dist > EDGE_PX)
            if np.count_nonzero(line) < 3:
                continue
            low = min(levels[a], levels[b])
            seam = low > 0 and 1.0 - float(darkest[line].mean()) / low >= SEAM_DIP
            # two particles side by side leave a notch where their seam meets the outline; the edge between
            # two facets of one crystal meets it at a corner of a convex outline
            if not (seam and (meet & (dist <= EDGE_PX) & near_notch).any()):
                root[find(int(b))] = find(int(a))
    groups: dict[int, list[int]] = {}
    for k in big:
        groups.setdefault(find(int(k)), []).append(int(k))
    if len(groups) < 2:
        return None
    parts = [np.isin(flooded, g) for g in groups.values()]
    convex = sum(np.count_nonzero(p) >= PART_SOLIDITY * hull_pixel_count(p) for p in parts)
    if convex < len(parts) and (len(parts) < HEAP_PARTS or convex < HEAP_CONVEX_SHARE * len(parts)):
        return None
    return parts


def divide_again(image: np.ndarray, mask: np.ndarray, min_area: float, large_area: float,
                 rounds: int = ROUNDS) -> list[np.ndarray] | None:
    """:func:`divide_at_seams`, and each part it gives looked at again, ``rounds`` levels deep.

    Parameters
    ----------
    image, mask, min_area
        As :func:`divide_at_seams`.
    large_area : float
        Area (px) from which a grain or part counts as large (looked at even when convex).
    rounds : int
        Levels of division.

    Returns
    -------
    list of ndarray of bool, or None
        The parts (covering ``mask``), or None where the grain stays whole.

    Notes
    -----
    A part of a first division can still hold particles joined along a seam that
    the first division's tests did not let through with the rest (a seam whose
    relief the flood of the whole heap ran round, a part joined back because one
    of its boundaries was no seam); the same tests on that part alone decide it.
    """
    parts = divide_at_seams(image, mask, min_area, large=bool(np.count_nonzero(mask) >= large_area))
    if parts is None or rounds <= 1:
        return parts
    out = []
    for part in parts:
        again = divide_again(image, part, min_area, large_area, rounds - 1)
        out.extend(again if again is not None else [part])
    return out


def split_at_dark_seams(image: np.ndarray, labels: np.ndarray, split: np.ndarray, min_area: float,
                        boxes: list | None = None) -> tuple[np.ndarray, np.ndarray, int]:
    """Divide every grain of a frame that :func:`divide_at_seams` divides.

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
        Preprocessed frame (grains bright).
    labels : ndarray of int, shape (rows, cols)
        Grains 1..n in raster order.
    split : ndarray of bool, shape (n,)
        Whether each grain was cut from a larger component.
    min_area : float
        Smallest grain area, px.
    boxes : list of tuple of slice, optional
        ``scipy.ndimage.find_objects(labels)`` when the caller has it (every label present): the areas
        are then counted in the boxes, not over the whole frame (the same result).

    Returns
    -------
    labels : ndarray of int32
        Renumbered 1..m in raster order.
    split : ndarray of bool, shape (m,)
        The parts of a divided grain count as split.
    divided : int
        Grains divided.
    """
    from grainhabit.plugins.segment.tiling import renumber_raster

    n = int(labels.max()) if labels.size else 0
    if n == 0:
        return labels, split, 0
    if boxes is not None and len(boxes) == n and all(b is not None for b in boxes):
        areas = np.r_[0, box_areas(labels, boxes)]
    else:
        boxes = ndi.find_objects(labels)
        areas = np.bincount(labels.ravel(), minlength=n + 1)
    typical = float(np.median(areas[1:][areas[1:] > 0])) if n >= LARGE_MIN_GRAINS else np.inf
    out = None
    was_split = np.r_[False, np.asarray(split, bool)]
    next_id, divided = n + 1, 0
    for k, box in enumerate(boxes, start=1):
        if box is None:
            continue
        if (box[0].stop - box[0].start) * (box[1].stop - box[1].start) < MIN_GRAINS * min_area:
            continue
        if areas[k] < MIN_GRAINS * min_area:
            continue
        grown = tuple(slice(max(s.start - SEAM_RADIUS_PX, 0), s.stop + SEAM_RADIUS_PX) for s in box)
        mask = labels[grown] == k
        parts = divide_again(image[grown], mask, min_area, LARGE_FACTOR * typical)
        if parts is None:
            continue
        if out is None:
            out = np.asarray(labels, np.int32).copy()
        view = out[grown]
        for part in parts[1:]:
            view[part] = next_id
            next_id += 1
        was_split[k] = True
        was_split = np.r_[was_split, np.ones(len(parts) - 1, bool)]
        divided += 1
    if not divided:
        return labels, split, 0
    out, old = renumber_raster(out)
    return out, was_split[old], divided
