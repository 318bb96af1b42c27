"""Step ``segment-grains``: foreground, touching-grain splitting, labels.

1. Foreground: by default ``noise_k`` background sigmas above the background
   level (both measured once per frame from the histogram's main mode), so
   that faint grains (thin plates in bright-field contrast) are found; or
   the global Otsu threshold [1]_; or a local one (Gaussian-weighted local
   mean, or Sauvola [2]_) over ``local_block_nm``, never below the noise
   threshold. Frame-wide levels are computed once and passed to every tile.
2. Grain extent comes from the outline only: a closing of radius
   ``close_nm`` bridges facet lines that reach the outline, every hole is
   filled, so inner facet edges (bright or dark lines) never split a grain.
   The closing never crosses the lines of the discrete Voronoi diagram of
   the grain cores (connected pixels above ``gap_level``, and thresholded
   components without such a core; :func:`gap_lines`), which run through
   the background and, up to 4 px from a core, through the dim pixels that
   blur and the low noise threshold add between near grains: with a blur
   of about 1 px, grains 4 px or more apart stay apart. The outline is then moved, within a band of
   ``refine_nm`` on either side, to the ridge of the gradient magnitude by
   a two-marker watershed (the half-height point of a blurred step edge;
   close to the foot of a soft, thickness-graded edge), which keeps the ECD
   unbiased whatever the threshold; the Voronoi lines seed the background
   of that flood, so the gap between two near grains is background too.
   Components with an ECD under ``min_ecd_nm`` are dropped.
3. Touching grains: each connected component is cropped to its bounding box.
   A component whose deepest concavity (largest distance from the shape of
   a pixel of its convex hull) is at most ``max(2 px, split_depth * r_eq)``,
   with ``r_eq`` the equal-area radius, is one convex grain and is never
   split. Otherwise it is cut along a straight segment between two outline
   concavities (or from one concavity to the outline point of the shortest
   cut; the segment's pixels between its two outline end points must lie in
   the shape), trying the shortest cuts relative to the concavity depths first;
   the first cut whose parts are convex (twice the allowance), or can be cut
   again into convex parts, and no part smaller than a tenth of the
   component, is kept (at most 200 cuts are tried per component, over all
   levels, which bounds the time on large clusters). The visible boundary of an overlapping
   pair is an edge of the front grain, and it runs between these points.
   If no cut works, the distance transform is flooded by a marker-controlled
   watershed [3]_ from its h-maxima, trying ``h = f * d_max`` for f = 0.5,
   0.35, 0.25, 0.15, 0.1 (``d_max`` the largest inscribed radius, so h
   follows the local grain size); the first split (fewest markers) with
   convex parts no smaller than ``min_ecd_nm`` is kept, provided every line
   between two parts crosses a neck: the distance map's saddle on it is at
   most 0.75 of the smaller part's peak (ripples along one elongated grain
   are not necks). A pair of different sizes has one distance maximum per
   member and the watershed line runs through the saddle at the neck.
4. Labels are numbered 1..n in row-major order of their first pixel, so a
   tiled run (see :mod:`grainhabit.plugins.segment.tiling`) numbers them as an untiled one.

References
----------
.. [1] N. Otsu, "A threshold selection method from gray-level histograms",
   IEEE Trans. Syst. Man Cybern. 9(1), 62-66, 1979, doi:10.1109/TSMC.1979.4310076
.. [2] J. Sauvola and M. Pietikainen, "Adaptive document image
   binarization", Pattern Recognition 33(2), 225-236, 2000,
   doi:10.1016/S0031-3203(99)00055-2
.. [3] F. Meyer and S. Beucher, "Morphological segmentation", J. Visual
   Commun. Image Represent. 1(1), 21-46, 1990, doi:10.1016/1047-3203(90)90014-M
.. [4] C. R. Maurer, R. Qi and V. Raghavan, "A linear time algorithm for
   computing exact Euclidean distance transforms of binary images in
   arbitrary dimensions", IEEE Trans. Pattern Anal. Mach. Intell. 25(2),
   265-270, 2003, doi:10.1109/TPAMI.2003.1177156 (the algorithm of
   scipy.ndimage.distance_transform_edt, from memory)
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage as ndi

from grainhabit import hookimpl
from grainhabit.params import Param, StepInfo

from grainhabit.plugins.preprocess.flatten_background import one_sided_sigma
from grainhabit.plugins.segment import annotations, tiling

GRAINHABIT_API = 1

STEP = StepInfo(
    name="segment-grains",
    stage="segment",
    version="2.1",
    summary="Noise, Otsu or local threshold, gradient-snapped outlines, convexity-checked splitting.",
    params=(
        Param("threshold", str, "auto", choices=("auto", "noise", "otsu", "local", "sauvola"),
              doc="Foreground threshold: auto (half grain height, faint grains at the noise level), noise_k "
                  "background sigmas, global Otsu, Gaussian local mean, or Sauvola."),
        Param("edge_level", float, 0.5, low=0.0, high=1.0,
              doc="auto threshold: outline level of distinct grains as a fraction of the grain level "
                  "(0.5, the half-height point of a blurred edge)."),
        Param("noise_k", float, 5.0, low=0.0,
              doc="Background sigmas above the background level for the noise threshold (and local floor)."),
        Param("local_block_nm", float, 2000.0, unit="nm", low=0.0,
              doc="Window side of the local thresholds; should be a few grain diameters."),
        Param("local_offset", float, 0.0,
              doc="Subtracted from the local threshold (image units, background 0, grains about 1)."),
        Param("min_ecd_nm", float, 0.0, unit="nm", low=0.0,
              doc="Grains (and split parts) with a smaller equivalent circle diameter are dropped (0: no nm limit)."),
        Param("min_ecd_px", float, 6.0, unit="px", low=1.0,
              doc="Grains smaller than this equivalent circle diameter in pixels are dropped (below it no "
                  "outline can be measured), whatever the pixel size."),
        Param("min_peak", float, 0.3, low=0.0,
              doc="Objects whose brightest pixel stays below this (image units: background 0, typical grain 1) "
                  "are background texture, not grains."),
        Param("reject_annotations", bool, True,
              doc="Drop thin line-like or stroke-like objects (scale bars, panel letters, text, scratches)."),
        Param("close_nm", float, None, unit="nm", low=0.0,
              doc="Radius of the closing that bridges facet lines at the outline; unset means 2 pixels."),
        Param("refine_nm", float, None, unit="nm", low=0.0,
              doc="Half-width of the band where outlines snap to the largest gradient; unset means 3 pixels, 0 off."),
        Param("gap_level", float, 0.25, low=0.0,
              doc="Grains whose cores above this level (image units, grains about 1) are a few pixels apart stay apart."),
        Param("split", bool, True, doc="Split touching grains by watershed."),
        Param("split_depth", float, 0.08, low=0.0, high=1.0,
              doc="Concavity depth, as a fraction of the equal-area radius, above which a component is split."),
        Param("min_contrast", float, 0.0, low=0.0,
              doc="Below this difference of the Otsu class means (image units) the frame holds no grains "
                  "(0: no such test; a frame without grains is flagged in any case)."),
        Param("tile_px", int, 2048, unit="px", low=64,
              doc="Frames with more pixels per side are segmented in overlapping tiles of this core size."),
        Param("tile_overlap_nm", float, 320.0, unit="nm", low=0.0,
              doc="Tile halo (at least 32 px); twice the reach of the segmentation around a grain. Clusters "
                  "that reach into the halo are segmented again in a window of their own."),
        Param("tile_workers", int, 0, low=0,
              doc="Threads for tiles outside a cluster; 0 spreads them over the cluster's workers or the local cores."),
    ),
)

#: Fractions of the component's largest inscribed radius tried as h.
H_FRACTIONS = (0.5, 0.35, 0.25, 0.15, 0.1)
#: h is never below this many pixels (pixel-grid ripples of the distance map).
H_MIN_PX = 1.5
#: Concavities up to this depth (pixels) are digitisation ripple, not a neck.
MIN_DEPTH_PX = 2.0
#: Largest saddle / smaller peak of the distance map accepted as a neck between grains.
NECK_RATIO = 0.75
#: Levels of recursive cutting at most.
MAX_DEPTH = 5
#: Cuts tried per component at most, over all recursion levels (bounds the time).
MAX_CUTS = 200
#: Smallest part of a split, as a fraction of the whole component's area.
MIN_PART_FRACTION = 0.1
#: Extra concavity allowance of the parts of a split (ragged ends of the dividing line).
PART_SLACK = 2.0
#: A foreground covering more of the frame than this has no background to work with.
MAX_FOREGROUND = 0.95
#: Components of the thresholded mask smaller than this (pixels) are specks, not grains kept apart.
GAP_MIN_AREA_PX = 20
#: Inside the thresholded mask a gap line reaches at most this far (px) from the nearest grain core.
GAP_REACH_PX = 4.0
#: A frame with a smaller fraction of pixels above the noise threshold holds noise only (Gaussian noise
#: exceeds 5 sigma in 3e-7 of the pixels).
NOISE_ONLY_FRACTION = 1e-4
#: Objects below min_peak are kept when at least this many times the smallest grain area (faint plates).
FAINT_MIN_AREA_FACTOR = 16.0
#: Width (px) of the skirt of a component that the auto threshold cuts at half its peak.
EDGE_BAND_PX = 3.0
#: Objects more elongated than this (area over squared inscribed diameter) are drawn lines, not grains.
LINE_ELONGATION = 15.0
#: Thin objects (elongation above this) with solidity below STROKE_SOLIDITY are strokes of letters.
STROKE_ELONGATION = 4.0
STROKE_SOLIDITY = 0.7
#: Strokes are drawn at screen resolution: at most this half-width (px); a wider curved band is an unsplit
#: chain of grains, not a letter.
STROKE_MAX_HALF_WIDTH_PX = 4.0
#: Text rows: at least this many glyphs, bottoms (or tops) within this many pixels, glyphs less solid than this.
TEXT_MIN_GLYPHS = 3
TEXT_BASELINE_PX = 2
TEXT_SOLIDITY = 0.85
_EIGHT = np.ones((3, 3), bool)


def _check_image(image) -> np.ndarray:
    arr = np.asarray(image)
    if arr.ndim != 2:
        raise ValueError(f"image must be 2-D (rows, cols), got shape {arr.shape}")
    if arr.size == 0:
        raise ValueError("image is empty")
    arr = arr.astype(np.float32, copy=False)
    if not np.all(np.isfinite(arr)):
        raise ValueError("image contains NaN or infinite values")
    return arr


def _odd(n: float) -> int:
    n = max(3, int(round(n)))
    return n if n % 2 else n + 1


def otsu_threshold(image: np.ndarray, max_samples: int = 2_000_000) -> float:
    """Global Otsu threshold, on a regular subsample of large frames.

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
    max_samples : int
        Above this many pixels every k-th row and column is used.

    Returns
    -------
    float
        The threshold; the image's value if it is constant.
    """
    from skimage.filters import threshold_otsu

    from grainhabit.plugins.common.image_stats import regular_subsample

    sub = regular_subsample(_check_image(image), max_samples)
    if float(sub.min()) == float(sub.max()):
        return float(sub.min())
    return float(threshold_otsu(sub))


def frame_levels(image: np.ndarray, noise_k: float = 5.0, max_samples: int = 2_000_000) -> dict:
    """Frame-wide threshold levels, computed once and shared by all tiles.

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
        Preprocessed frame (background about 0, grains about 1).
    noise_k : float
        Background sigmas above the background mode for the noise threshold.
    max_samples : int
        Above this many pixels a regular subsample is used.

    Returns
    -------
    dict
        ``otsu`` (Otsu threshold), ``background`` and ``sigma`` (mode and
        robust noise sd of the background) and ``noise`` =
        ``background + noise_k * sigma``.
    """
    from grainhabit.plugins.common.image_stats import background_level, regular_subsample

    sub = regular_subsample(_check_image(image), max_samples)
    # values clipped by the preprocessing (grains at 1, the low clip) pile up in one histogram bin that
    # can outnumber the background's mode: leave them out of the background's level and noise
    inner = sub[(sub > sub.min()) & (sub < sub.max())]
    bg, sigma = background_level(inner if inner.size >= 0.25 * sub.size else sub)
    # grains are bright here: the lower half of the background peak alone gives the noise, however
    # much of the frame the grains cover
    sigma = min(sigma, one_sided_sigma(inner if inner.size >= 0.25 * sub.size else sub, bg, -1))
    return {"otsu": otsu_threshold(sub), "background": bg, "sigma": sigma, "noise": bg + noise_k * sigma}


def foreground(image: np.ndarray, pixel_size_nm: float, levels: dict, method: str = "noise",
               local_block_nm: float = 2000.0, local_offset: float = 0.0,
               close_nm: float | None = None, refine_nm: float | None = None,
               gap_level: float = 0.25, edge_level: float = 0.5) -> np.ndarray:
    """Foreground mask with grain extent from outlines only.

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
        Preprocessed frame (grains bright, background 0).
    pixel_size_nm : float
        Pixel side in nm.
    levels : dict
        Frame-wide levels from :func:`frame_levels`.
    method : {"auto", "noise", "otsu", "local", "sauvola"}
        ``auto``: every component above the noise threshold is cut at
        ``edge_level`` of its own peak (:func:`half_height_mask`);
        ``noise``: a fixed number of background sigmas above the background
        (finds faint grains too); ``otsu``: the global Otsu threshold;
        ``local`` / ``sauvola``: local thresholds, never below ``noise``.
    local_block_nm : float
        Window of the local methods, in nm.
    local_offset : float
        Subtracted from the local threshold.
    close_nm : float or None
        Closing radius in nm; None means 2 pixels.
    refine_nm : float or None
        Half-width of the band in which outlines are moved to the largest
        intensity gradient; None means 3 pixels, 0 turns refinement off.
    gap_level : float
        Level of the grain cores (image units, background 0, grains about
        1) between which near grains are kept apart (see :func:`gap_lines`).
    edge_level : float
        Fraction of a component's peak where the ``auto`` outline lies.

    Returns
    -------
    ndarray of bool, shape (rows, cols)

    Notes
    -----
    ``D = fill_holes(close(I > T, disk(r)) & ~V)``, ``V`` the Voronoi lines
    between the components of ``I > T`` (:func:`gap_lines`). Refinement:
    pixels of ``D`` deeper than ``w`` (plus the deepest pixel of every thin
    component) seed the grains, pixels farther than ``w`` outside ``D`` and
    the pixels of ``V`` seed the background, and a watershed of the Sobel gradient magnitude decides the band in
    between, so the outline lands on the gradient ridge: the half-height
    point of a blurred step edge, the foot of a soft (thickness-graded)
    edge. Holes are filled again afterwards.
    """
    from skimage.filters import sobel, threshold_local, threshold_sauvola
    from skimage.morphology import disk
    from skimage.segmentation import watershed

    arr = _check_image(image)
    if method == "auto":
        fg = half_height_mask(arr, levels["noise"], edge_level)
    elif method == "noise":
        fg = arr > levels["noise"]
    elif method == "otsu":
        fg = arr > levels["otsu"]
    elif method in ("local", "sauvola"):
        block = _odd(local_block_nm / pixel_size_nm)
        if method == "local":
            t = threshold_local(arr, block, method="gaussian", offset=local_offset, mode="reflect")
        else:
            t = threshold_sauvola(arr, window_size=block, k=0.2) - local_offset
        fg = arr > np.maximum(t, levels["noise"])
    else:
        raise ValueError(f"threshold must be 'auto', 'noise', 'otsu', 'local' or 'sauvola', got {method!r}")
    gaps = gap_lines(fg, arr > max(gap_level, levels["noise"]))
    r = int(round(2.0 if close_nm is None else close_nm / pixel_size_nm))
    if r >= 1:
        pad = np.pad(fg, r, mode="edge")
        pad = ndi.binary_closing(pad, structure=disk(r), border_value=0)
        fg = pad[r:-r, r:-r]
    fg = fill_holes(fg & ~gaps)
    w = 3.0 if refine_nm is None else refine_nm / pixel_size_nm
    if w < 1 or not fg.any():
        return fg
    # deeper than w inside (or outside): the Euclidean distance to the nearest pixel of the other kind
    # exceeds w, i.e. the pixel survives an erosion by the disk of radius w (the frame's edge counts as
    # neither kind, as in scipy's distance transform); 8x cheaper than the distance transform itself
    ball = disk_structure(w)
    seeds = ndi.binary_erosion(fg, structure=ball, border_value=1)
    comp, n = ndi.label(fg, structure=_EIGHT)
    if n:
        # components too thin to hold a deep pixel keep their deepest pixels as seeds
        has_seed = np.zeros(n + 1, bool)
        has_seed[comp[seeds]] = True
        thin = np.flatnonzero(~has_seed[1:]) + 1
        if thin.size:
            seeds |= deepest_pixels(fg, comp, thin, w)
    markers = np.zeros(arr.shape, np.int32)
    markers[ndi.binary_erosion(~fg, structure=ball, border_value=1) | gaps] = 1
    markers[seeds] = 2
    # Flood only the undecided band and the marker pixels touching it: a marker pixel with no
    # undecided neighbour never labels anything, but scikit-image would queue every one of them
    # (most of the frame). With this mask the result is the same and the queue holds ~10x fewer pixels.
    band = markers == 0
    near_band = ndi.binary_dilation(band, structure=ndi.generate_binary_structure(2, 1))
    ws = watershed(sobel(arr), np.where(near_band, markers, 0), mask=near_band)
    return fill_holes(seeds | (ws == 2))


def half_height_mask(image: np.ndarray, noise_level: float, edge_level: float = 0.5) -> np.ndarray:
    """Foreground cut at a fixed fraction of each object's own peak.

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
        Preprocessed frame (background 0, grains bright).
    noise_level : float
        Noise threshold (a few background sigmas above the background).
    edge_level : float
        Fraction of the peak at which the outline is drawn.

    Returns
    -------
    ndarray of bool, shape (rows, cols)
        In every 8-connected component ``C`` of ``I > T_n``: its pixels deeper
        than :data:`EDGE_BAND_PX` from its outline, and the others where
        ``I > f * max_C(I)``.

    Notes
    -----
    The half-height point of a blurred step edge is where the step was
    (common practice: the full width at half maximum of a blurred object
    is its true width), so a component's outline at half its own peak keeps
    the ECD unbiased whatever the blur and however bright the grain; a
    faint grain (a thin plate a few sigmas up) has half its peak below the
    noise threshold and is kept whole at that threshold.
    """
    weak = image > noise_level
    lab, n = ndi.label(weak, structure=_EIGHT)
    if n == 0:
        return weak
    peak = np.full(n + 1, -np.inf, np.float32)
    # each component's peak over its own pixels (scipy's labelled maximum visits the whole frame: 0.2-0.7 s
    # on 2048 px; equal to it, tests/test_speed_kernels.py)
    np.maximum.at(peak, lab[weak], image[weak])
    peak[0] = 0.0
    # only the skirt of each component (within EDGE_BAND_PX of its outline) is cut at the level: inner
    # facet lines and texture deeper inside never split a grain
    deep = ndi.binary_erosion(weak, structure=disk_structure(EDGE_BAND_PX), border_value=1)
    return deep | (weak & (image > edge_level * peak[lab]))


def annotation_kind(part: np.ndarray, raw: np.ndarray) -> str | None:
    """Whether an object is a mark drawn on the picture rather than a grain.

    Parameters
    ----------
    part : ndarray of bool, shape (h, w)
        The object (holes filled).
    raw : ndarray of bool, shape (h, w)
        Its pixels above the noise threshold (before closing and hole filling).

    Returns
    -------
    {"line", "stroke", None}
        ``"line"``: a bar more than :data:`LINE_ELONGATION` times longer
        than wide and at most ``4 * STROKE_MAX_HALF_WIDTH_PX`` wide (scale
        bars, streaks, scratches; a wider band is an unsplit chain of grains); ``"stroke"``: a
        thin curved stroke (letters, digits, text), i.e. elongation above
        :data:`STROKE_ELONGATION`, solidity below :data:`STROKE_SOLIDITY` and
        half-width at most :data:`STROKE_MAX_HALF_WIDTH_PX`,
        judged on the pixels above the noise threshold (a letter O or a
        digit 0 is a curved stroke there, whatever its filled shape) or on
        the filled shape; None for a grain.

    Notes
    -----
    Elongation ``E = A / (2 r)^2`` with ``A`` the area and ``r`` the largest
    inscribed radius (distance transform maximum): about 0.8 for a disc, 1 for
    a square, ``L / w`` for a bar or rod of length ``L`` and width ``w``.
    Solidity is area over convex hull area (ISO 9276-6). Grains are compact
    and convex or made of convex parts; drawn marks are lines one to a few
    pixels wide.
    """
    from skimage.morphology import convex_hull_image

    area = float(part.sum())
    if area < 4:
        return None
    r = float(ndi.distance_transform_edt(np.pad(part, 1)).max())
    elong = area / (4.0 * r * r)
    if elong > LINE_ELONGATION and r <= 2 * STROKE_MAX_HALF_WIDTH_PX:
        return "line"
    raw = raw & part
    raw_area = float(raw.sum())
    if raw_area > 0:
        r_raw = float(ndi.distance_transform_edt(np.pad(raw, 1)).max())
        if r_raw <= STROKE_MAX_HALF_WIDTH_PX and raw_area / (4.0 * r_raw * r_raw) > STROKE_ELONGATION:
            hull = float(convex_hull_image(raw).sum())
            if raw_area < STROKE_SOLIDITY * hull:
                return "stroke"
    if elong > STROKE_ELONGATION and r <= STROKE_MAX_HALF_WIDTH_PX:
        solidity = area / max(float(convex_hull_image(part).sum()), 1.0)
        if solidity < STROKE_SOLIDITY:
            return "stroke"
    return None


def text_rows(labels: np.ndarray, drawn: np.ndarray) -> np.ndarray:
    """Labels that form a line of text: glyph-like objects of one height on one baseline.

    Parameters
    ----------
    labels : ndarray of int, shape (rows, cols)
        Grains 1..n.
    drawn : ndarray of bool, shape (rows, cols)
        Pixels above the noise threshold.

    Returns
    -------
    ndarray of int
        Labels to drop.

    Notes
    -----
    A row is a chain of at least :data:`TEXT_MIN_GLYPHS` objects whose
    bounding boxes end on the same row (within :data:`TEXT_BASELINE_PX`,
    their bottoms; or their tops), with heights within 35 % of each other and
    horizontal gaps under 1.5 heights: the layout of printed text (common
    practice). It is dropped when most of its members are not convex (drawn
    pixels fill under :data:`TEXT_SOLIDITY` of their convex hull), as
    letters and digits are and a row of touching grains is not. Smaller
    objects inside the band of a dropped row (pieces of split glyphs) are
    dropped with it.
    """
    from skimage.morphology import convex_hull_image

    boxes = ndi.find_objects(labels)
    items = [(k + 1, b) for k, b in enumerate(boxes) if b is not None]
    if len(items) < TEXT_MIN_GLYPHS:
        return np.zeros(0, np.int64)
    top = np.array([b[0].start for _, b in items])
    bottom = np.array([b[0].stop for _, b in items])
    left = np.array([b[1].start for _, b in items])
    right = np.array([b[1].stop for _, b in items])
    height = (bottom - top).astype(float)
    ids = np.array([k for k, _ in items])
    drop = set()
    solid = {}

    def solidity(i):
        if i not in solid:
            k, b = items[i]
            m = (labels[b] == k) & drawn[b]
            solid[i] = float(m.sum()) / max(float(convex_hull_image(m).sum()), 1.0) if m.any() else 1.0
        return solid[i]

    for edge in (bottom, top):
        order = np.argsort(edge, kind="stable")
        for a in order:
            # neighbours on the same line, chained left to right
            same = np.flatnonzero((np.abs(edge - edge[a]) <= TEXT_BASELINE_PX)
                                  & (np.abs(height / height[a] - 1) < 0.35))
            same = same[np.argsort(left[same])]
            group = [same[0]]
            for j in same[1:]:
                if left[j] - right[group[-1]] < 1.5 * max(height[a], 1):
                    group.append(j)
                elif a in group:
                    break
                else:
                    group = [j]
            if a not in group or len(group) < TEXT_MIN_GLYPHS:
                continue
            if sum(solidity(i) < TEXT_SOLIDITY for i in group) * 2 > len(group):
                drop.update(int(ids[i]) for i in group)
                # pieces of glyphs (a split letter, a dot) inside the line's band go with it
                g = np.asarray(group)
                t0, t1 = top[g].min() - TEXT_BASELINE_PX, bottom[g].max() + TEXT_BASELINE_PX
                c0, c1 = left[g].min() - height[a], right[g].max() + height[a]
                inside = (top >= t0) & (bottom <= t1) & (left >= c0) & (right <= c1)
                drop.update(int(k) for k in ids[inside])
    return np.asarray(sorted(drop), np.int64)


def fill_holes(mask: np.ndarray) -> np.ndarray:
    """Fill the holes of a mask: background not 4-connected to the frame's edge.

    Parameters
    ----------
    mask : ndarray of bool, shape (rows, cols)

    Returns
    -------
    ndarray of bool
        ``scipy.ndimage.binary_fill_holes(mask)`` (same default
        connectivity), found with one labelling of the background instead
        of scipy's repeated dilations (about 3x faster on a 1024^2 frame).
    """
    back, n = ndi.label(~mask)
    if n == 0:
        return mask.copy()
    edge = np.zeros(n + 1, bool)
    for side in (back[0], back[-1], back[:, 0], back[:, -1]):
        edge[side] = True
    edge[0] = False
    return ~edge[back]


def disk_structure(radius: float) -> np.ndarray:
    """Structuring element of the offsets within ``radius`` (px) of the centre (Euclidean).

    Returns
    -------
    ndarray of bool, shape (2k + 1, 2k + 1), k = floor(radius)
        True where ``dy**2 + dx**2 <= radius**2``. An erosion by it keeps
        exactly the pixels whose Euclidean distance transform exceeds
        ``radius`` (with ``border_value=1``).
    """
    k = int(np.floor(radius))
    dy, dx = np.mgrid[-k:k + 1, -k:k + 1]
    return dy * dy + dx * dx <= radius * radius


def deepest_pixels(mask: np.ndarray, labels: np.ndarray, which: np.ndarray, reach: float) -> np.ndarray:
    """Pixels of the given components at their largest distance from the background.

    Parameters
    ----------
    mask : ndarray of bool, shape (rows, cols)
        Foreground.
    labels : ndarray of int, shape (rows, cols)
        Connected components of ``mask``.
    which : ndarray of int
        Labels to take; none of their pixels may lie farther than ``reach``
        from the background.
    reach : float
        Bound on the components' depth (px).

    Returns
    -------
    ndarray of bool, shape (rows, cols)
        For each listed component, its pixels whose Euclidean distance
        transform (``scipy.ndimage.distance_transform_edt(mask)``) equals the
        component's maximum.

    Notes
    -----
    Every pixel of such a component has its nearest background pixel within
    ``reach``, so the distance transform of the component's bounding box
    grown by ``ceil(reach) + 1`` (clipped to the frame) is exact there.
    """
    out = np.zeros(mask.shape, bool)
    m = int(np.ceil(reach)) + 1
    boxes = ndi.find_objects(labels)
    for lab in which:
        box = boxes[lab - 1]
        if box is None:
            continue
        crop = tuple(slice(max(0, s.start - m), min(size, s.stop + m)) for s, size in zip(box, mask.shape))
        depth = ndi.distance_transform_edt(mask[crop])
        own = labels[crop] == lab
        out[crop] |= own & (depth >= depth[own].max())
    return out


def gap_lines(mask: np.ndarray, cores: np.ndarray, reach_px: float = GAP_REACH_PX,
              min_area_px: int = GAP_MIN_AREA_PX) -> np.ndarray:
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
    """
    cores = cores & mask
    comp, n = ndi.label(cores, structure=_EIGHT)
    faint, n_faint = ndi.label(mask, structure=_EIGHT)
    if n + n_faint < 2:
        return np.zeros(mask.shape, bool)
    # components of the mask without a core are bodies of their own
    has_core = np.zeros(n_faint + 1, bool)
    has_core[np.unique(faint[cores])] = True
    has_core[0] = True  # the background is no body
    faint = np.where(has_core[faint], 0, faint + n)
    bodies = np.where(cores, comp, faint)
    area = np.bincount(bodies.ravel())
    keep = area >= min_area_px
    keep[0] = False
    if keep.sum() < 2:
        return np.zeros(mask.shape, bool)
    bodies = np.where(keep[bodies], bodies, 0)
    dist, (ri, ci) = ndi.distance_transform_edt(bodies == 0, return_indices=True)
    nearest = bodies[ri, ci]
    out = np.zeros(mask.shape, bool)
    down = nearest[1:, :] != nearest[:-1, :]
    right = nearest[:, 1:] != nearest[:, :-1]
    out[1:, :] |= down
    out[:-1, :] |= down
    out[:, 1:] |= right
    out[:, :-1] |= right
    return out & (dist > 0) & (~mask | (dist <= reach_px))


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
    from skimage.morphology import convex_hull_image

    if mask.sum() < 3:
        return 0.0
    pocket = convex_hull_image(mask) & ~mask
    if not pocket.any():
        return 0.0
    return float(ndi.distance_transform_edt(~mask)[pocket].max())


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
    r_eq = np.sqrt(mask.sum() / np.pi)
    return concavity_depth(mask) <= slack * max(MIN_DEPTH_PX, split_depth * r_eq)


def _necks_are_narrow(ws: np.ndarray, dist: np.ndarray, n: int) -> bool:
    """Whether every watershed line between two parts runs through a real neck.

    The saddle of the distance map on the line between parts i and j must
    be at most ``NECK_RATIO * min(peak_i, peak_j)``: two touching grains
    meet at a neck narrower than either, while ripples along the ridge of
    one elongated grain leave saddles almost as high as the peaks.
    """
    peaks = ndi.maximum(dist, ws, index=np.arange(1, n + 1))
    for i in range(1, n + 1):
        ring = ndi.binary_dilation(ws == i, structure=_EIGHT) & (ws > i)
        for j in np.unique(ws[ring]):
            saddle = float(dist[ring & (ws == j)].max())
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

    contours = find_contours(np.pad(mask, 1).astype(np.float32), 0.5)
    pts = max(contours, key=len)[:-1] - 1.0 if contours else np.zeros((0, 2))
    try:
        hv = np.sort(ConvexHull(pts).vertices) if len(pts) >= 8 else None
    except QhullError:
        hv = None
    if hv is None:
        return ([], pts) if outline else []
    out = []
    for k in range(len(hv)):
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
        # one hull edge can span several notches: keep every distinct peak
        peaks = find_peaks(np.r_[0.0, dist, 0.0], height=min_depth, prominence=0.5 * min_depth)
        out.extend((seg[m - 1], float(dist[m - 1])) for m in peaks)
    return (out, pts) if outline else out


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
        prominence=prominence)[0]`` [1]_ (workers import scipy.signal once, when
        they are prepared).

    References
    ----------
    .. [1] SciPy documentation, ``scipy.signal.find_peaks``.
    """
    from scipy.signal import find_peaks as _scipy_find_peaks

    x = np.asarray(x, float)
    if x.size < 3:
        return np.zeros(0, np.intp)
    return _scipy_find_peaks(x, height=height, prominence=prominence)[0].astype(np.intp)


def _cut(mask: np.ndarray, p: np.ndarray, q: np.ndarray, min_area: float) -> list[np.ndarray] | None:
    """Cut a shape along the segment p-q; two parts or None."""
    from skimage.draw import line
    from skimage.segmentation import watershed

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
    ws = watershed(np.zeros(mask.shape, np.float32), markers, mask=mask)
    return [ws == 1, ws == 2]


def _split_at_defects(mask: np.ndarray, min_area: float, split_depth: float, depth: int,
                      budget: list) -> list[np.ndarray] | None:
    """Cut between two concavities so that the parts are convex (or split further)."""
    r_eq = np.sqrt(mask.sum() / np.pi)
    defects, outline = convexity_defects(mask, max(MIN_DEPTH_PX, split_depth * r_eq), outline=True)
    if not defects:
        return None
    cuts = []
    for a in range(len(defects)):
        for b in range(a + 1, len(defects)):
            (p, dp), (q, dq) = defects[a], defects[b]
            cuts.append((float(np.hypot(*(p - q))) / (dp + dq), p, q))
    cuts.sort(key=lambda c: c[0])
    cuts = cuts[:8]
    # a concavity whose partner is too shallow to count: cut to the nearest outline points
    step = np.hypot(*np.diff(np.vstack([outline, outline[:1]]), axis=0).T)
    arc = np.concatenate([[0.0], np.cumsum(step)[:-1]])
    total = float(step.sum())
    for p, _ in defects:
        d = np.hypot(*(outline - p).T)
        ip = int(np.argmin(d))
        along = np.abs(arc - arc[ip])
        along = np.minimum(along, total - along)
        order = np.argsort(d)
        taken = []
        for i in order:
            # a cut is a short cut: much shorter than the way round the outline
            if d[i] < 2 * MIN_DEPTH_PX or along[i] < 3 * d[i] \
                    or any(np.hypot(*(outline[i] - t)) < 3 for t in taken):
                continue
            taken.append(outline[i])
            if len(taken) == 6:
                break
        cuts.extend((np.inf, p, t) for t in taken)
    for _, p, q in cuts:
        if budget[0] <= 0:
            return None
        budget[0] -= 1
        parts = _cut(mask, p, q, min_area)
        if parts is None:
            continue
        out = []
        for part in parts:
            if is_convex(part, split_depth, PART_SLACK):
                out.append(part)
                continue
            sub = _split(part, min_area, split_depth, depth + 1, budget)
            if sub is None:
                break
            out.extend(sub)
        else:
            return out
    return None


def split_component(mask: np.ndarray, min_area: float, split_depth: float = 0.08) -> list[np.ndarray]:
    """Split one connected component into convex grains.

    Parameters
    ----------
    mask : ndarray of bool, shape (h, w)
        One component, cropped to its bounding box with a margin of 1 pixel.
    min_area : float
        Smallest part area in pixels.
    split_depth : float
        Concavity allowance as a fraction of the equal-area radius (see
        :func:`is_convex`); convex components are never split, and a split
        is kept only if every part is convex.

    Returns
    -------
    list of ndarray of bool, shape (h, w)
        The grains; one element (the mask itself) if not split.

    Notes
    -----
    First the outline's concavities (:func:`convexity_defects`) are paired,
    shortest cut relative to the two depths first, and the shape is cut
    along the straight segment between them; the visible boundary between
    an overlapping pair is an edge of the front (convex) grain, which runs
    between these two points. Parts that are still concave are split again.
    If no cut gives convex parts, the distance-map watershed is tried.
    """
    if mask.sum() < 2 * min_area or is_convex(mask, split_depth):
        return [mask]
    # no part may be a sliver of the cluster: a tenth of its area at least
    min_part = max(min_area, MIN_PART_FRACTION * float(mask.sum()))
    return _split(mask, min_part, split_depth, 0, [MAX_CUTS]) or [mask]


def _split(mask: np.ndarray, min_area: float, split_depth: float, depth: int,
           budget: list) -> list[np.ndarray] | None:
    """Convex parts of a concave shape, or None if no acceptable split exists."""
    from skimage.morphology import h_maxima
    from skimage.segmentation import watershed

    if depth > MAX_DEPTH or mask.sum() < 2 * min_area:
        return None
    parts = _split_at_defects(mask, min_area, split_depth, depth, budget)
    if parts is not None:
        return parts
    dist = ndi.distance_transform_edt(mask)
    dmax = float(dist.max())
    for frac in H_FRACTIONS:
        h = max(frac * dmax, H_MIN_PX)
        if h >= dmax:
            continue
        markers, n = ndi.label(h_maxima(dist, h), structure=_EIGHT)
        if n < 2:
            continue
        ws = watershed(-dist, markers, mask=mask)
        parts = [ws == k for k in range(1, n + 1)]
        if min(int(p.sum()) for p in parts) < min_area:
            continue
        if not _necks_are_narrow(ws, dist, n):
            continue
        # the ends of a watershed line leave small notches: parts get twice the allowance
        if all(is_convex(p, split_depth, PART_SLACK) for p in parts):
            return parts
    return None


def label_grains(image: np.ndarray, pixel_size_nm: float, levels: dict, *, method: str = "noise",
                 local_block_nm: float = 2000.0, local_offset: float = 0.0, min_ecd_nm: float = 40.0,
                 close_nm: float | None = None, refine_nm: float | None = None, gap_level: float = 0.25,
                 split: bool = True, split_depth: float = 0.08, edge_level: float = 0.5,
                 min_ecd_px: float = 6.0, min_peak: float = 0.3,
                 reject_annotations: bool = True) -> tuple[np.ndarray, np.ndarray, dict]:
    """Label grains in one image (a whole frame or one tile).

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
        Preprocessed frame: grains bright, background 0.
    pixel_size_nm : float
        Pixel side in nm.
    levels : dict
        Frame-wide levels (see :func:`frame_levels`).
    method, local_block_nm, local_offset, close_nm, refine_nm, gap_level
        See :func:`foreground`.
    min_ecd_nm : float
        Minimum equivalent circle diameter ``sqrt(4 A / pi)`` in nm.
    split : bool
        Split touching grains.
    split_depth : float
        See :func:`split_component`.
    edge_level : float
        See :func:`half_height_mask`.
    min_ecd_px : float
        Minimum equivalent circle diameter in pixels (the larger of the two
        limits applies).
    min_peak : float
        Objects whose brightest pixel is below this (image units, grains
        about 1) are dropped, unless they are larger than
        :data:`FAINT_MIN_AREA_FACTOR` times the smallest grain and above the
        noise threshold on average (faint thin plates).
    reject_annotations : bool
        Drop objects :func:`annotation_kind` calls drawn marks.

    Returns
    -------
    labels : ndarray of int32, shape (rows, cols)
        1..n in row-major order of first pixels.
    clusters : ndarray of int32, shape (rows, cols)
        Connected component (before splitting) of every grain pixel.
    flags : dict
        ``{"split": ndarray of bool, shape (n + 1,)}`` indexed by label,
        and ``"rejected"``: ``{"line": k, "stroke": k}``, objects dropped as
        drawn marks.
    """
    arr = _check_image(image)
    if not np.isfinite(pixel_size_nm) or pixel_size_nm <= 0:
        raise ValueError(f"pixel_size_nm must be positive, got {pixel_size_nm!r}")
    fg = foreground(arr, pixel_size_nm, levels, method, local_block_nm, local_offset, close_nm, refine_nm,
                    gap_level, edge_level)
    above = arr > levels["noise"]
    min_area = np.pi / 4.0 * max(min_ecd_nm / pixel_size_nm, min_ecd_px) ** 2
    rejected = {"line": 0, "stroke": 0}
    comp, n = ndi.label(fg, structure=_EIGHT)
    labels = np.zeros(arr.shape, np.int32)
    split_flag = [False]
    nxt = 1
    for k, sl in enumerate(ndi.find_objects(comp), start=1):
        if sl is None:
            continue
        r0, r1 = max(sl[0].start - 1, 0), min(sl[0].stop + 1, arr.shape[0])
        c0, c1 = max(sl[1].start - 1, 0), min(sl[1].stop + 1, arr.shape[1])
        box = (slice(r0, r1), slice(c0, c1))
        m = comp[box] == k
        if m.sum() < max(min_area, 1):
            comp[box][m] = 0
            continue
        parts = split_component(m, max(min_area, 1), split_depth) if split else [m]
        was_split = len(parts) > 1
        # closing and hole filling can enclose background between grains: a part
        # mostly below the threshold is such a pocket, not a grain
        parts = [q for q in parts if above[box][q].mean() >= 0.5]
        # an object must rise to min_peak of the frame's grain level (1): background texture and specks
        # of correlated noise a few sigmas up do not; a large object wholly above the noise threshold on
        # average (a faint thin plate) stays
        parts = [q for q in parts if float(arr[box][q].max()) >= min_peak
                 or (q.sum() >= FAINT_MIN_AREA_FACTOR * min_area and float(arr[box][q].mean()) > levels["noise"])]
        if reject_annotations:
            kinds = [annotation_kind(q, above[box]) for q in parts]
            for kind in kinds:
                if kind is not None:
                    rejected[kind] += 1
            parts = [q for q, kind in zip(parts, kinds) if kind is None]
        view = labels[box]
        for p in parts:
            view[p] = nxt
            split_flag.append(was_split)
            nxt += 1
    if reject_annotations and nxt > 1:
        gone = text_rows(labels, above)
        if gone.size:
            rejected["stroke"] += int(gone.size)
            keep = np.ones(nxt, bool)
            keep[gone] = False
            labels = np.where(keep[labels], labels, 0)
    labels, old = tiling.renumber_raster(labels)
    flags = {"split": np.concatenate([[False], np.asarray(split_flag, bool)[old]]), "rejected": rejected}
    clusters = np.where(labels > 0, comp, 0).astype(np.int32)
    return labels, clusters, flags


def edge_cut(labels: np.ndarray) -> np.ndarray:
    """Which labels touch the frame border.

    Parameters
    ----------
    labels : ndarray of int, shape (rows, cols)
        1..n consecutive.

    Returns
    -------
    ndarray of bool, shape (n,)
    """
    n = int(labels.max()) if labels.size else 0
    out = np.zeros(n + 1, bool)
    for edge in (labels[0, :], labels[-1, :], labels[:, 0], labels[:, -1]):
        out[edge] = True
    return out[1:]


def segment_image(image: np.ndarray, pixel_size_nm: float, params: dict | None = None,
                  raw: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray, list[str]]:
    """The whole step on an array, tiled when the frame is large.

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
        Preprocessed frame: grains bright, background 0, about 1 on grains.
    pixel_size_nm : float
        Pixel side in nm.
    params : dict, optional
        Step parameters (see ``STEP``); missing keys take their defaults.
    raw : ndarray, shape (rows, cols), optional
        The frame as read; with it (and ``reject_annotations``) objects drawn
        in flat black or white ink are dropped
        (:mod:`grainhabit.plugins.segment.annotations`).

    Returns
    -------
    labels : ndarray of int32, shape (rows, cols)
    split : ndarray of bool, shape (n,)
    notes : list of str

    Raises
    ------
    ValueError
        If the foreground covers more than 95 % of the frame, or the most
        common level is nearer the upper Otsu class (grains everywhere).
    """
    p = STEP.resolve(params)
    arr = _check_image(image)
    notes = []
    levels = frame_levels(arr, p["noise_k"])
    t = levels["otsu"]
    upper, lower = arr > t, arr <= t
    mean_up = float(arr[upper].mean()) if upper.any() else t
    mean_low = float(arr[lower].mean()) if lower.any() else t
    contrast = mean_up - mean_low
    if contrast < p["min_contrast"]:
        notes.append(f"segment-grains: qc no-grains: no grains found (contrast {contrast:.3f} between the Otsu "
                     f"classes is below min_contrast {p['min_contrast']})")
        return np.zeros(arr.shape, np.int32), np.zeros(0, bool), notes
    otsu_frac = float(np.mean(upper))
    if otsu_frac > MAX_FOREGROUND:
        raise ValueError(f"segment-grains: foreground covers {100 * otsu_frac:.0f} % of the frame; no background "
                         "to separate grains from (check polarity and threshold)")
    fg_frac = float(np.mean(arr > levels["noise"]))
    if fg_frac < NOISE_ONLY_FRACTION:
        notes.append(f"segment-grains: qc no-grains: no grains found (only {100 * fg_frac:.2f} % of the frame is "
                     f"{p['noise_k']:g} background sigmas above the background: noise only)")
        return np.zeros(arr.shape, np.int32), np.zeros(0, bool), notes
    if abs(levels["background"] - mean_up) < abs(levels["background"] - mean_low):
        raise ValueError(f"segment-grains: foreground covers {100 * otsu_frac:.0f} % of the frame and the most "
                         "common level is not background; no background to separate grains from "
                         "(check polarity and threshold)")
    kw = dict(method=p["threshold"], local_block_nm=p["local_block_nm"], local_offset=p["local_offset"],
              min_ecd_nm=p["min_ecd_nm"], close_nm=p["close_nm"], refine_nm=p["refine_nm"],
              gap_level=p["gap_level"], split=p["split"], split_depth=p["split_depth"],
              edge_level=p["edge_level"], min_ecd_px=p["min_ecd_px"], min_peak=p["min_peak"],
              reject_annotations=p["reject_annotations"])

    dropped = []

    def func(tile):
        labels, clusters, flags = label_grains(tile, pixel_size_nm, levels, **kw)
        dropped.append(flags.pop("rejected"))
        return labels, clusters, flags

    if max(arr.shape) > p["tile_px"]:
        halo = max(32, int(np.ceil(p["tile_overlap_nm"] / pixel_size_nm)))
        labels, flags, n_lost = tiling.label_tiled(arr, func, p["tile_px"], halo, p["tile_workers"])
        split = flags.get("split", np.zeros(int(labels.max()), bool))
        if n_lost:
            notes.append(f"segment-grains: {n_lost} pixel(s) of grain clusters cut by tile edges were not found "
                         "again; raise tile_overlap_nm")
    else:
        labels, _, flags = func(arr)
        split = flags["split"][1:]
    n_line = sum(d["line"] for d in dropped)
    n_stroke = sum(d["stroke"] for d in dropped)
    if raw is not None and p["reject_annotations"] and labels.max() > 0:
        inked = annotations.drawn_labels(labels, raw)
        if inked.size:
            n_stroke += int(inked.size)
            keep = np.ones(int(labels.max()) + 1, bool)
            keep[inked] = False
            labels, old = tiling.renumber_raster(np.where(keep[labels], labels, 0))
            split = np.asarray(split, bool)[old - 1]
    if n_line or n_stroke:
        notes.append(f"segment-grains: {n_line} line-like and {n_stroke} stroke-like object(s) dropped as "
                     "drawn marks (scale bars, letters, text, streaks)")
    if labels.max() == 0:
        notes.append("segment-grains: qc no-grains: no grains found (nothing stands out of the background noise, "
                     "or everything was too small or looked like drawn marks)")
    return labels.astype(np.int32), split.astype(bool), notes


@hookimpl
def grainhabit_segment(frame, params):
    """Label the grains of ``frame.image``; see the module docstring."""
    if "tile_levels" in frame.meta:  # one tile of a frame processed by tiles: the frame's thresholds
        return tiling.segment_tile(frame, params)
    if frame.image is None:
        raise ValueError("segment-grains needs frame.image: run a preprocess step (flatten-background) first")
    raw = frame.raw if frame.raw is not None and np.shape(frame.raw) == np.shape(frame.image) else None
    labels, split, notes = segment_image(frame.image, frame.pixel_size_nm, params, raw)
    n = int(labels.max())
    new = frame.replace(labels=labels, grains={})
    new = new.with_columns(label=np.arange(1, n + 1, dtype=np.int64), split=split,
                           edge_cut=edge_cut(labels))
    for note in notes:
        new = new.with_note(note)
    return new


@hookimpl
def grainhabit_prepare_worker(steps):
    """Import the scikit-image modules the segmentation calls, once per worker."""
    if STEP.name not in steps:
        return
    import skimage.draw  # noqa: F401
    import skimage.filters  # noqa: F401
    import skimage.measure  # noqa: F401
    import skimage.morphology  # noqa: F401
    import skimage.segmentation  # noqa: F401
    import scipy.signal  # noqa: F401
