"""Packed fields: particles that cover most of the frame, with thin gaps between them.

A monolayer of close-packed spheres or cubes leaves no background peak: the
particles make the frame's main level and the gaps between them, a few
pixels wide, make a flat shelf below it. The frame-wide background tests of
the usual path then take the particles' own level for background and find
nothing, or only their bright rims. Such a field is told by its geometry,
not its histogram:

1. The frame, smoothed with a Gaussian of 1 px, is cut in two at Otsu's
   threshold [1]_.
2. The inscribed radii of each class are measured with the Euclidean
   distance transform: the 95th percentile of the distance to the other
   class over the class's pixels. For a disc of radius ``r`` that
   percentile is ``(1 - sqrt(0.05)) r = 0.776 r`` (handbook geometry: the
   share of a disc's area farther than ``x`` from its rim is
   ``((r - x) / r)^2``). The class with the larger radii (the thick class)
   holds the particles, the other the gaps, whichever is brighter (this
   also settles the polarity).
   Particles with bright rims round darker middles (an SEM's edge effect)
   make rings of the upper class, which then covers less of the frame than
   the particles do. Where the cut fails and filling the upper class's holes
   adds at least :data:`RING_GAIN` of the frame, two more cuts are judged
   by the same tests, the filled rings and the gaps a black top-hat of
   :data:`TOPHAT_SIZES_PX` finds (the thin valleys narrower than its window,
   whatever the middles do), and the one that passes with the most
   particles is taken (segment-grains 2.7; EMPS 78b42bc5e8: 0 -> 134 of 136
   particles, the other 356 training frames unchanged).
3. Small holes of the thick class (a dark pit inside a particle) are
   filled. Where its distance map exceeds :data:`H_SHARE` of the inscribed
   radius lie the particles' cores: touching particles meet at necks
   narrower than that, so each core is one particle, a round one: its
   area is close to that of the disc inscribed in it (median ratio at most
   :data:`MAX_CORE_RATIO`), where the background of a frame of scattered
   grains leaves winding pockets. This cheap look is made first.
4. The thick class is divided at the saddles of its distance map
   (watershed from the distance map's h-maxima [2]_, ``h`` the same share
   of the inscribed radius), the textbook split of touching round particles.
5. The field counts as packed only when all of these hold: the thick class
   covers at least :data:`MIN_COVER` of the frame; the gaps are thin (their
   radius at most :data:`MAX_GAP_RATIO` of the particles'); the gaps reach
   over the whole frame (:data:`MIN_GAP_SPREAD` of an 8 x 8 grid of
   blocks); at least :data:`MIN_PARTS` cores and as many particles lie clear
   of the frame's edge; and those particles look like a packing: of similar
   size (coefficient of variation of their areas at most :data:`MAX_AREA_COV`;
   since segment-grains 2.8 the smaller of std / mean and the median absolute
   deviation's form, :func:`robust_cov`, so a few parts left joined do not
   count) and compact (median solidity at least
   :data:`MIN_SOLIDITY`). The pockets of background between crossing rods,
   or a frame of sparse grains whose background is the thick class, fail
   the count, size or shape tests.

A second look (segment-grains 2.8): a frame in which the usual path finds
no background at all (nothing above the noise threshold, or the most common
level on the grains' side) is judged once more without the two tests of the
gaps, which a loose packing (particles over 60 % of the frame, gaps as wide
as the particles here and there) fails. The count, size and shape tests
stay: on the EMPS training images 4 of the 19 frames left empty pass, with 50
of their 52 parts on particles (of 164 particles in the 19); frames of
Gaussian noise, white or smoothed, plain or skewed, fail them.

The size and shape limits are this project's rules, chosen to leave every
ordinary frame on the usual path; a polydisperse packing (radius COV above
:data:`MAX_AREA_COV`) is not taken for a packed field.

References
----------
.. [1] N. Otsu, "A threshold selection method from gray-level histograms",
   IEEE Trans. Syst. Man Cybern. 9(1), 62-66, 1979, doi:10.1109/TSMC.1979.4310076
.. [2] P. Soille, *Morphological Image Analysis*, 2nd ed., Springer, 2003,
   ch. 6 (regional extrema, h-maxima) and ch. 9 (marker-controlled watershed).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage as ndi

from grainhabit.blocks import block_sums
from grainhabit.plugins.segment.distance import distance_map
from grainhabit.plugins.segment.foreground import fill_holes
from grainhabit.plugins.segment.population import box_areas
from grainhabit.plugins.segment.runs import labelled_maxima
from grainhabit.plugins.segment.tiling import renumber_raster

#: Least share of the frame covered by the thick class.
MIN_COVER = 0.6
#: Largest ratio of the gaps' inscribed radius to the particles'.
MAX_GAP_RATIO = 0.5
#: Least share of the 8 x 8 blocks of the frame in which gaps are found (>= 1 % of the block).
MIN_GAP_SPREAD = 0.9
#: Fewest parts of a packed field.
MIN_PARTS = 5
#: Least share of the frame that filling the upper class's holes adds, for rings (bright rims) to be looked for.
RING_GAIN = 0.1
#: A raft's gaps lie at most this fraction of its particles' median level (in the preprocessed frame) ...
RAFT_GAP_LEVEL = 0.75
#: ... and it holds at least this many particles.
RAFT_MIN_PARTS = 10
#: Objects smaller than this many times the frame's median object are not looked at as rafts.
RAFT_AREA_FACTOR = 4.0
#: Parts of a raft smaller than this share of its median part are the interstices between particles.
RAFT_PART_SHARE = 0.4
#: ... and its valleys cut it into at least this many cells (a cut at one level joins some particles in rows).
RAFT_MIN_CELLS = 5
#: An object is looked at as a raft when this share of its inner pixels lie in valleys (see split_rafts).
RAFT_VALLEY_SHARE = 0.1
#: Windows (px) of the black top-hats that find the thin gaps between particles with bright rims.
TOPHAT_SIZES_PX = (5, 9, 13)
#: Largest coefficient of variation of the particles' areas.
MAX_AREA_COV = 0.6
#: Largest median ratio of a core's area to its inscribed disc's (a first look, before the watershed).
MAX_CORE_RATIO = 1.6
#: Least median solidity (area / convex hull area) of the parts.
MIN_SOLIDITY = 0.85
#: The cores are the particles' pixels farther than this share of their inscribed radius from the gaps.
H_SHARE = 0.3
#: The 95th percentile of the distance map inside a disc, in units of its radius (1 - sqrt(0.05)).
P95_OF_RADIUS = 1.0 - np.sqrt(0.05)
#: Frames at least twice this side (px) are first tested on a copy block-averaged by
#: ``side // COARSE_SIDE_PX`` (a 2048 px frame at 512 px: its cost is then a few per cent of the frame's).
COARSE_SIDE_PX = 512
#: Width of the Gaussian that takes the illumination's trend out before the cut, as a share of the frame's side.
TREND_SHARE = 0.125
#: Smoothing of the frame before the Otsu cut, px.
SMOOTH_PX = 1.0
_EIGHT = np.ones((3, 3), bool)


@dataclass
class PackedField:
    """The outcome of :func:`packed_field`.

    Attributes
    ----------
    packed : bool
        Whether every test passed.
    labels : ndarray of int32
        The parts (1..n), 0 for the gaps; empty when the test stopped early.
    bright : bool
        Whether the particles are the brighter class.
    cover : float
        Share of the frame in the thick class.
    radius_px, gap_radius_px : float
        Inscribed radii of the particles and of the gaps (the distance map's
        95th percentile divided by :data:`P95_OF_RADIUS`), px.
    area_cov : float
        Coefficient of variation of the areas of the particles clear of the frame's edge.
    solidity : float
        Their median solidity.
    core_ratio : float
        Median ratio of a core's area to the area of the disc inscribed in it.
    reason : str
        The first test that failed, or "" when packed.
    """

    packed: bool
    labels: np.ndarray
    bright: bool = True
    cover: float = 0.0
    radius_px: float = 0.0
    gap_radius_px: float = 0.0
    area_cov: float = float("nan")
    core_ratio: float = float("nan")
    solidity: float = float("nan")
    reason: str = ""


def inscribed_radius(dist: np.ndarray, mask: np.ndarray) -> float:
    """Typical inscribed radius (px) of the objects of ``mask``.

    Parameters
    ----------
    dist : ndarray of float
        Euclidean distance transform of ``mask``.
    mask : ndarray of bool

    Returns
    -------
    float
        The 95th percentile of ``dist`` over the mask divided by
        :data:`P95_OF_RADIUS`: the radius itself for a disc. 0 for an empty mask.
    """
    if not mask.any():
        return 0.0
    return float(np.percentile(dist[mask], 95)) / P95_OF_RADIUS


def _clear_of_edge(box: tuple | None, shape: tuple) -> bool:
    """Whether an object's box (``find_objects``; None for a missing label) keeps off the frame's edge."""
    return (box is not None and box[0].start > 0 and box[1].start > 0
            and box[0].stop < shape[0] and box[1].stop < shape[1])


def block_average(image: np.ndarray, f: int) -> np.ndarray:
    """Mean of ``f x f`` blocks (the last partial row and column of blocks dropped), as float64.

    Sums along the rows of each block first, then across, in an integer or
    float accumulator of the input's kind: no float copy of the whole frame.
    """
    a = np.asarray(image)
    rows, cols = (a.shape[0] // f) * f, (a.shape[1] // f) * f
    if a.dtype.kind in "iub" and a.dtype.itemsize <= 4 and rows and cols:
        # integer sums are exact in any order: strided slices added in int64 (a 2048 px frame: ~4 -> ~1.5 ms)
        return block_sums(a[:rows, :cols], f, np.int64) / float(f * f)
    acc = np.float64 if a.dtype.kind == "f" else np.int64
    s = a[:rows, :cols].reshape(rows // f, f, cols).sum(axis=1, dtype=acc)
    return s.reshape(rows // f, cols // f, f).sum(axis=2) / float(f * f)


def gap_spread(gaps: np.ndarray, blocks: int = 8) -> float:
    """Share of the ``blocks x blocks`` grid cells in which at least 1 % of the pixels are gaps."""
    rows, cols = gaps.shape
    r = np.linspace(0, rows, blocks + 1).astype(int)
    c = np.linspace(0, cols, blocks + 1).astype(int)
    hit = [gaps[r[i]:r[i + 1], c[j]:c[j + 1]].mean() > 0.01
           for i in range(blocks) for j in range(blocks) if r[i + 1] > r[i] and c[j + 1] > c[j]]
    return float(np.mean(hit)) if hit else 0.0


def core_area_ratios(dist: np.ndarray, cut: float, min_area: float) -> np.ndarray:
    """Area of each core over the area of the disc inscribed in it.

    Parameters
    ----------
    dist : ndarray of float
        Distance map of the particles' class.
    cut : float
        The cores are the connected regions where ``dist`` exceeds this (px).
    min_area : float
        Cores smaller than this (px), and cores touching the frame's edge, are left out.

    Returns
    -------
    ndarray
        ``area / (pi (d_max - cut)^2)`` per core, with ``d_max`` the largest
        distance in the core: about 1 for the round core of a particle
        (touching particles meet at necks narrower than the cut, so each core
        is one particle), several for the winding pockets the background of a
        frame of scattered grains leaves. A cheap look, made before the watershed.
    """
    above = dist > cut
    cores, n = ndi.label(above, _EIGHT)
    if n == 0:
        return np.zeros(0)
    # areas and largest distances from the cores' pixels alone (scipy's labelled maximum sorts the labels of
    # the whole frame: ~20 ms on a 512 px copy); entry 0 (the background) is never read
    at = np.flatnonzero(above)
    own = cores.ravel()[at]
    areas = np.bincount(own, minlength=n + 1)
    keep = [k for k, box in enumerate(ndi.find_objects(cores), start=1)
            if areas[k] >= min_area and _clear_of_edge(box, cores.shape)]
    if not keep:
        return np.zeros(0)
    inner = labelled_maxima(np.asarray(dist, float).ravel()[at], own, n)[keep] - cut
    return areas[keep] / (np.pi * np.maximum(inner, 0.5) ** 2)


def split_by_distance(dist: np.ndarray, mask: np.ndarray, radius_px: float, min_area: float) -> np.ndarray:
    """Touching round particles divided at the saddles of the distance map.

    Parameters
    ----------
    dist : ndarray of float
        Euclidean distance transform of ``mask``.
    mask : ndarray of bool
        The particles' class.
    radius_px : float
        Their inscribed radius (px): h-maxima of ``H_SHARE * radius_px``
        (1 px at least) mark one particle each.
    min_area : float
        Parts smaller than this (px) are dropped.

    Returns
    -------
    ndarray of int32
        Parts numbered 1..n in raster order of their first pixel.
    """
    from skimage.morphology import h_maxima
    from skimage.segmentation import watershed

    markers, n = ndi.label(h_maxima(dist, max(1.0, H_SHARE * radius_px)), _EIGHT)
    if n == 0:
        return np.zeros(mask.shape, np.int32)
    ws = watershed(-dist, markers, mask=mask)
    areas = np.bincount(ws.ravel(), minlength=n + 1)
    keep = areas >= min_area
    keep[0] = False
    return renumber_raster(np.where(keep[ws], ws, 0))[0]


def robust_cov(areas: np.ndarray) -> float:
    """Coefficient of variation of areas that a few outliers do not inflate.

    The smaller of ``std / mean`` and ``1.4826 * median(|a - median(a)|) /
    median(a)``: for normally distributed areas both estimate the same COV
    (1.4826 = 1 / Phi^-1(3/4), the MAD estimator of a normal sd; common
    practice). A few parts that stayed joined (two or four touching
    particles where the distance map has no saddle) inflate the first, not
    the second; a small sample of two sizes can inflate the second, not the
    first.
    """
    a = np.asarray(areas, float)
    med = float(np.median(a))
    if a.size == 0 or med <= 0:
        return float("inf")
    return min(float(a.std() / a.mean()), 1.4826 * float(np.median(np.abs(a - med))) / med)


def part_shapes(labels: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Areas (px) and solidities of the parts 1..n of ``labels`` clear of the frame's edge.

    Parts cut by the frame's edge are left out: their areas are fractions of
    a particle's and would inflate the spread of sizes.
    """
    from grainhabit.plugins.segment.hull_fill import convex_hull_mask

    areas, solid = [], []
    for k, box in enumerate(ndi.find_objects(labels), start=1):
        if not _clear_of_edge(box, labels.shape):
            continue
        m = labels[box] == k
        a = int(m.sum())
        areas.append(a)
        solid.append(a / max(int(convex_hull_mask(m).sum()), 1))
    return np.asarray(areas, float), np.asarray(solid, float)


def packed_field(image: np.ndarray, min_area: float, thin_gaps: bool = True) -> PackedField:
    """Test whether a frame is a packed field of particles and, if so, label them.

    A frame of at least twice :data:`COARSE_SIDE_PX` per side is first tested
    on a copy block-averaged to about that side (an ordinary frame is turned
    away there, at a small cost); only a frame that passes is tested and
    divided again at full resolution. Gaps narrower than the block (4 px on
    a 2048 px frame) are lost on the copy, so packed fields of particles
    smaller than about 12 blocks across are not recognised on such frames.

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
        The frame as read (any polarity, any units).
    min_area : float
        Smallest particle area, px.
    thin_gaps : bool
        False leaves out the two tests of the gaps (thin, reaching over the
        frame): the second look at a frame in which the usual path found no
        background (see the module docstring).

    Returns
    -------
    PackedField
        See the module docstring for the tests; ``labels`` holds the parts
        whenever the tests got as far as dividing the thick class.
    """
    f = max(1, int(max(np.shape(image)) // COARSE_SIDE_PX))
    if f > 1:
        coarse = _test(block_average(image, f), min_area / f ** 2, thin_gaps)
        if not coarse.packed:
            coarse.labels = np.zeros(np.shape(image), np.int32)
            coarse.radius_px *= f
            coarse.gap_radius_px *= f
            return coarse
    return _test(ndi.gaussian_filter(np.asarray(image, float), SMOOTH_PX), min_area, thin_gaps)


def _test(g: np.ndarray, min_area: float, thin_gaps: bool = True) -> PackedField:
    """The tests of :func:`packed_field` on a smoothed frame ``g``."""
    from skimage.filters import threshold_otsu

    empty = np.zeros(g.shape, np.int32)
    if float(g.min()) == float(g.max()):
        return PackedField(False, empty, reason="flat frame")
    # uneven illumination (an SEM's shading, a TEM's beam spot) moves the levels of particles and gaps alike:
    # the cut is made on the frame less its trend over many particles
    g = g - trend(g, TREND_SHARE * max(g.shape))
    upper = g > threshold_otsu(g)
    out = _judge(upper, min_area, thin_gaps=thin_gaps)
    if out.packed:
        return out
    # particles whose rims are brighter than their middles (an SEM's edge effect) make rings of the upper
    # class, which then covers less than the particles do. Filled, the rings are the particles where the
    # rims close; where they do not, the gaps are still the frame's thin dark valleys, which a black
    # top-hat keeps (what is darker than its window's closing and narrower than the window). The
    # candidate that passes every test with the most particles is taken
    if upper.mean() >= MIN_COVER:
        return out
    ringed = fill_holes(upper)  # scipy's binary_fill_holes by one labelling (foreground.fill_holes)
    if ringed.mean() - upper.mean() < RING_GAIN:
        return out
    best = _judge(ringed, min_area, bright=True, thin_gaps=thin_gaps)
    for size in TOPHAT_SIZES_PX:
        gaps = valley_gaps(g, size)
        if gaps is None:
            continue
        found = _judge(~gaps, min_area, bright=True, thin_gaps=thin_gaps)
        if found.packed and (not best.packed or found.labels.max() > best.labels.max()):
            best = found
    return best if best.packed else out


def _judge(upper: np.ndarray, min_area: float, bright: bool | None = None, thin_gaps: bool = True) -> PackedField:
    """The tests of :func:`packed_field` on a two-class cut of the frame.

    Parameters
    ----------
    upper : ndarray of bool
        One class of the cut.
    min_area : float
        Smallest particle area, px.
    bright : bool or None
        None: ``upper`` is the brighter class, and the class with the larger
        inscribed radii holds the particles. True / False: ``upper`` holds the
        particles, which are brighter / darker than the gaps.
    thin_gaps : bool
        False leaves out the tests of the gaps' width and spread.
    """
    empty = np.zeros(upper.shape, np.int32)
    if bright is not None and upper.mean() < MIN_COVER:
        return PackedField(False, empty, bright, float(upper.mean()),
                           reason=f"particles cover {upper.mean():.2f} < {MIN_COVER}")
    d_up, d_low = distance_map(upper), distance_map(~upper)  # scipy's distance_transform_edt (segment.distance)
    r_up, r_low = inscribed_radius(d_up, upper), inscribed_radius(d_low, ~upper)
    if bright is None:
        bright = bool(r_up >= r_low)
        grains = upper if bright else ~upper
        radius, gap_radius = max(r_up, r_low), min(r_up, r_low)
    else:
        grains, radius, gap_radius = upper, r_up, r_low
    up_is_grains = grains is upper
    out = PackedField(False, empty, bright, float(grains.mean()), radius, gap_radius)
    if out.cover < MIN_COVER:
        out.reason = f"particles cover {out.cover:.2f} < {MIN_COVER}"
        return out
    if thin_gaps and gap_radius > MAX_GAP_RATIO * radius:
        out.reason = f"gaps not thin ({gap_radius:.1f} px against {radius:.1f} px)"
        return out
    if thin_gaps and gap_spread(~grains) < MIN_GAP_SPREAD:
        out.reason = "gaps do not reach over the frame"
        return out
    # a speck of the gaps' class inside a particle (a dark core, a pit) is part of the particle
    holes = fill_holes(grains) & ~grains
    small = holes & ~_large(holes, min_area)
    solid = grains | small
    dist = distance_map(solid) if small.any() else (d_up if up_is_grains else d_low)
    # one core per particle where the necks are narrow: a cheap count before the watershed
    ratios = core_area_ratios(dist, max(1.0, H_SHARE * radius), min_area)
    if ratios.size < MIN_PARTS:
        out.reason = f"{ratios.size} particle cores clear of the edge < {MIN_PARTS}"
        return out
    out.core_ratio = float(np.median(ratios))
    if out.core_ratio > MAX_CORE_RATIO:
        out.reason = (f"cores not round (median area over inscribed disc {out.core_ratio:.2f} > "
                      f"{MAX_CORE_RATIO})")
        return out
    labels = split_by_distance(dist, solid, radius, min_area)
    areas, solidity = part_shapes(labels)
    if areas.size < MIN_PARTS:
        out.reason = f"{areas.size} particles clear of the edge < {MIN_PARTS}"
        return out
    out.area_cov = robust_cov(areas)
    out.solidity = float(np.median(solidity))
    if out.area_cov > MAX_AREA_COV:
        out.reason = f"particle areas vary (COV {out.area_cov:.2f} > {MAX_AREA_COV})"
    elif out.solidity < MIN_SOLIDITY:
        out.reason = f"particles not compact (median solidity {out.solidity:.2f} < {MIN_SOLIDITY})"
    else:
        out.packed = True
        out.labels = labels
    return out


def trend(image: np.ndarray, sigma: float) -> np.ndarray:
    """The frame's slow trend: a Gaussian of sd ``sigma`` (px), taken on a coarse copy.

    The copy is block-averaged by ``k = floor(sigma / 4)`` (the Gaussian then has
    ``sigma / k`` >= 4 blocks, far wider than a block), smoothed with mirrored
    edges and interpolated back (linear, ``scipy.ndimage.zoom``): a trend over
    many particles at a few per cent of the cost of the full-size filter, whose
    taps grow with ``sigma``.
    """
    k = max(1, int(sigma // 4))
    rows, cols = image.shape
    if k == 1 or rows < 2 * k or cols < 2 * k:
        return ndi.gaussian_filter(image, sigma, mode="reflect")
    small = ndi.gaussian_filter(block_average(image, k), sigma / k, mode="reflect")
    return ndi.zoom(small, (rows / small.shape[0], cols / small.shape[1]), order=1, mode="nearest",
                    grid_mode=True)[:rows, :cols]


def _large(mask: np.ndarray, min_area: float) -> np.ndarray:
    """The connected parts of ``mask`` of at least ``min_area`` px (gaps enclosed by a ring of particles stay gaps)."""
    lab, n = ndi.label(mask)
    if n == 0:
        return np.zeros(mask.shape, bool)
    areas = np.bincount(lab.ravel(), minlength=n + 1)
    big = areas >= min_area
    big[0] = False
    return big[lab]


def valley_gaps(g: np.ndarray, size: int, mask: np.ndarray | None = None) -> np.ndarray | None:
    """The thin dark valleys of ``g``: Otsu's cut of its black top-hat of a ``size`` px window.

    Parameters
    ----------
    g : ndarray of float, shape (rows, cols)
        A smoothed frame or window.
    size : int
        Side (px) of the top-hat's square window: valleys narrower than it are kept.
    mask : ndarray of bool, optional
        Where to cut (the threshold from these pixels alone); the whole array by default.

    Returns
    -------
    ndarray of bool or None
        The valley pixels (within ``mask``), or None where the top-hat is flat there.
    """
    from skimage.filters import threshold_otsu

    hat = ndi.black_tophat(g, size=(size, size))
    vals = hat if mask is None else hat[mask]
    if vals.size == 0 or float(vals.max()) == float(vals.min()):
        return None
    gaps = hat > threshold_otsu(vals)
    return gaps if mask is None else gaps & mask


def split_raft(image: np.ndarray, mask: np.ndarray, min_area: float) -> np.ndarray | None:
    """An island of packed particles (a raft) divided at the thin gaps inside it, or None.

    A raft, a patch of a monolayer lying on the support, is one object to a
    frame-wide threshold: its gaps are thin and shallow, and less of the frame
    than :data:`MIN_COVER` is packed, so :func:`packed_field` does not apply.
    Inside the object, the gaps are the thin valleys that a black top-hat of
    :data:`TOPHAT_SIZES_PX` keeps (Otsu's cut of the top-hat over the object's
    pixels); the rest is divided at the saddles of its distance map. The
    division stands when the gaps are valleys (their median level at most
    :data:`RAFT_GAP_LEVEL` of the parts': not the texture of one large grain)
    and thin (radius at most :data:`MAX_GAP_RATIO` of the parts'), and there
    are at least :data:`RAFT_MIN_PARTS` parts clear of the object's box, of
    similar size and compact (the tests of a packed field); parts under
    :data:`RAFT_PART_SHARE` of the median part are the wider interstices
    between three particles and are dropped. The cores need
    not be round: a raft's necks are wide. Of the windows that pass, the one
    with the most parts is taken.

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
        The preprocessed frame around the object (grains bright).
    mask : ndarray of bool, shape (rows, cols)
        The object.
    min_area : float
        Smallest particle area, px.

    Returns
    -------
    ndarray of int32 or None
        The parts 1..n (0 outside them), or None when no window passes.
    """
    g = ndi.gaussian_filter(np.asarray(image, float), SMOOTH_PX)
    best, best_n = None, 0
    for size in TOPHAT_SIZES_PX:
        gaps = valley_gaps(g, size, mask)
        if gaps is None:
            continue
        parts = mask & ~gaps
        holes = ndi.binary_fill_holes(parts) & ~parts & mask
        solid = parts | (holes & ~_large(holes, min_area))
        dist = distance_map(solid)
        radius = inscribed_radius(dist, solid)
        gap_radius = inscribed_radius(distance_map(gaps), gaps) if gaps.any() else 0.0
        if radius <= 0 or gap_radius > MAX_GAP_RATIO * radius:
            continue
        if float(np.median(g[gaps])) > RAFT_GAP_LEVEL * float(np.median(g[parts])):
            continue  # no valleys: texture on one large grain
        labels = split_by_distance(dist, solid, radius, min_area)
        sizes = np.bincount(labels.ravel())
        if sizes.size > 1:
            # the wider interstices between three particles, kept by a window narrower than them, are no particles
            small = sizes < RAFT_PART_SHARE * np.median(sizes[1:])
            small[0] = False
            if small.any():
                labels = renumber_raster(np.where(small[labels], 0, labels))[0]
        areas, solidity = part_shapes(labels)
        if (areas.size < RAFT_MIN_PARTS or float(areas.std() / areas.mean()) > MAX_AREA_COV
                or float(np.median(solidity)) < MIN_SOLIDITY):
            continue
        if int(labels.max()) > best_n:
            best, best_n = labels, int(labels.max())
    return best


def split_rafts(image: np.ndarray, labels: np.ndarray, split: np.ndarray, min_area: float,
                boxes: list | None = None) -> tuple[np.ndarray, np.ndarray, int]:
    """Divide every labelled object that is a raft of packed particles (:func:`split_raft`).

    An object is looked at when it has room for :data:`RAFT_MIN_PARTS`
    smallest grains and, in a frame of :data:`RAFT_MIN_PARTS` objects or
    more, is :data:`RAFT_AREA_FACTOR` times their median or larger (a raft
    among single particles; a frame of many rafts alone is left to
    :func:`packed_field`), at least :data:`RAFT_VALLEY_SHARE` of its inner pixels
    (2 px in from its outline) lie below :data:`RAFT_GAP_LEVEL` of its upper
    quartile level, and those valleys cut its inner pixels into at least
    :data:`RAFT_MIN_CELLS` cells of :data:`RAFT_PART_SHARE` of a smallest
    grain or more: the network of gaps inside a raft. A grain of even level,
    or one whose facets differ in brightness, costs a percentile and a label.

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
        Preprocessed frame (grains bright).
    labels : ndarray of int, shape (rows, cols)
        Objects 1..n in raster order.
    split : ndarray of bool, shape (n,)
        Whether each object was cut from a larger component.
    min_area : float
        Smallest particle area, px.
    boxes : list of tuple of slice, optional
        ``scipy.ndimage.find_objects(labels)`` when the caller has it (every label present): the
        areas are then counted in the boxes, not over the whole frame (the same result).

    Returns
    -------
    labels : ndarray of int32
        Renumbered 1..m in raster order, each raft replaced by its particles.
    split : ndarray of bool, shape (m,)
        The particles of a raft count as split.
    rafts : int
        Objects divided.
    """
    if boxes is not None and all(b is not None for b in boxes):
        n = len(boxes)  # areas[0] (the background) is never read
        areas = np.r_[0, box_areas(labels, boxes)]
    else:
        n = int(labels.max()) if labels.size else 0
        boxes = None
    if n == 0:
        return labels, split, 0
    if boxes is None:
        areas = np.bincount(labels.ravel(), minlength=n + 1)
    least = RAFT_MIN_PARTS * min_area
    if n >= RAFT_MIN_PARTS:
        least = max(least, RAFT_AREA_FACTOR * float(np.median(areas[1:])))
    if not (areas[1:] >= least).any():
        return labels, split, 0
    if boxes is None:
        boxes = ndi.find_objects(labels)
    out = np.asarray(labels, np.int32).copy()
    was_split = np.r_[False, np.asarray(split, bool)]
    next_id, rafts = n + 1, 0
    for k, box in enumerate(boxes, start=1):
        if box is None or areas[k] < least:
            continue
        grown = tuple(slice(max(s.start - 3, 0), s.stop + 3) for s in box)
        mask = labels[grown] == k
        inner = ndi.binary_erosion(mask, iterations=2)
        vals = image[grown][inner]
        if vals.size < RAFT_MIN_PARTS * min_area / 2:
            continue
        level = RAFT_GAP_LEVEL * np.percentile(vals, 75)
        if np.mean(vals < level) < RAFT_VALLEY_SHARE:
            continue
        # the valleys must cut the object into many cells (particles, or rows of them), not a few facets
        cells, n_cells = ndi.label(inner & (image[grown] >= level))
        if n_cells < RAFT_MIN_CELLS or np.count_nonzero(
                np.bincount(cells.ravel())[1:] >= RAFT_PART_SHARE * min_area) < RAFT_MIN_CELLS:
            continue
        parts = split_raft(image[grown], mask, min_area)
        if parts is None:
            continue
        view = out[grown]
        view[mask] = 0
        view[parts > 0] = parts[parts > 0] + (next_id - 1)
        was_split = np.r_[was_split, np.ones(int(parts.max()), bool)]
        next_id += int(parts.max())
        rafts += 1
    if not rafts:
        return labels, split, 0
    out, old = renumber_raster(out)
    return out, was_split[old], rafts
