"""Foreground of the segmentation: threshold, closing kept off the gap lines, outlines snapped to the gradient.

See :mod:`grainhabit.plugins.segment.segment_grains` for the whole step.

References
----------
.. [1] N. Otsu, "A threshold selection method from gray-level histograms",
   IEEE Trans. Syst. Man Cybern. 9(1), 62-66, 1979, doi:10.1109/TSMC.1979.4310076
.. [2] J. Sauvola and M. Pietikainen, "Adaptive document image
   binarization", Pattern Recognition 33(2), 225-236, 2000,
   doi:10.1016/S0031-3203(99)00055-2
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage as ndi

from grainhabit.plugins.segment import runs
from grainhabit.plugins.segment.band_flood import flood_band
from grainhabit.plugins.segment.disk_morphology import close_disk, dilate_disk, erode_disk
from grainhabit.plugins.segment.gaps import gap_lines
from grainhabit.plugins.segment.levels import check_image, odd_size

#: Width (px) of the skirt of a component that the auto threshold cuts at half its peak.
EDGE_BAND_PX = 3.0
#: Deep pixels at or below this share of their component's peak are kept only within STRONG_REACH_PX of
#: pixels above the level (a faint stain or film fold round a grain is not the grain).
STAIN_SHARE = 0.25
STRONG_REACH_PX = 3.0
#: A faint part that large (px) and that convex (solidity) is a faint grain touching a bright one, kept.
PLATE_MIN_AREA_PX = 100
PLATE_SOLIDITY = 0.8
#: Faint objects (below the noise threshold) this close (px) to a pixel above it are left out.
FAINT_CLEARANCE_PX = 6.0
#: ... and those of which the noise threshold already shows this share (sharp objects, not faint ones).
FAINT_SHOWN_SHARE = 0.5
#: ... and those smaller than this share of the smallest grain's area at the low level (specks of noise;
#: a faint grain's core there is smaller than its outline, which the refinement moves onto its edge).
FAINT_AREA_SHARE = 0.25
#: A frame whose background sigma is more than this share of the grain level (grains under about 17 background
#: sigmas: noisy TEM fields, fast SEM scans) has many grain pixels below the noise threshold; there the noise
#: threshold's objects grow into the connected pixels above HYSTERESIS_SIGMAS (see half_height_mask).
NOISY_SIGMA_SHARE = 0.06
#: Low level of that growth, background sigmas (half the noise threshold's 5: the two-to-one hysteresis of
#: J. Canny, 1986, common practice).
HYSTERESIS_SIGMAS = 2.5
_EIGHT = np.ones((3, 3), bool)


def foreground(image: np.ndarray, pixel_size_nm: float, levels: dict, method: str = "noise",
               local_block_nm: float = 2000.0, local_offset: float = 0.0,
               close_nm: float | None = None, refine_nm: float | None = None,
               gap_level: float = 0.25, edge_level: float = 0.5) -> np.ndarray:
    """Foreground mask with grain extent from outlines only (see :func:`foreground_labels`)."""
    return foreground_labels(image, pixel_size_nm, levels, method, local_block_nm, local_offset, close_nm,
                             refine_nm, gap_level, edge_level)[0]


def foreground_labels(image: np.ndarray, pixel_size_nm: float, levels: dict, method: str = "noise",
                      local_block_nm: float = 2000.0, local_offset: float = 0.0,
                      close_nm: float | None = None, refine_nm: float | None = None,
                      gap_level: float = 0.25, edge_level: float = 0.5, faint_min_area: float = 0.0) -> tuple:
    """Foreground mask with grain extent from outlines only, and its 8-connected components.

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
    faint_min_area : float
        With ``levels["faint"]``: smallest grain area (px), see :func:`half_height_mask`.

    Returns
    -------
    mask : ndarray of bool, shape (rows, cols)
    components, n, boxes
        ``scipy.ndimage.label(mask, structure=np.ones((3, 3)))`` and ``scipy.ndimage.find_objects`` of
        it (:func:`fill_label`).

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
    from skimage.filters import threshold_local, threshold_sauvola

    arr = check_image(image)
    if method == "auto":
        fg = half_height_mask(arr, levels["noise"], edge_level, levels.get("faint"), faint_min_area,
                              hysteresis_level(levels))
    elif method == "noise":
        fg = arr > levels["noise"]
    elif method == "otsu":
        fg = arr > levels["otsu"]
    elif method in ("local", "sauvola"):
        block = odd_size(local_block_nm / pixel_size_nm)
        if method == "local":
            t = threshold_local(arr, block, method="gaussian", offset=local_offset, mode="reflect")
        else:
            t = threshold_sauvola(arr, window_size=block, k=0.2) - local_offset
        fg = arr > np.maximum(t, levels["noise"])
    else:
        raise ValueError(f"threshold must be 'auto', 'noise', 'otsu', 'local' or 'sauvola', got {method!r}")
    r = int(round(2.0 if close_nm is None else close_nm / pixel_size_nm))
    w = 3.0 if refine_nm is None else refine_nm / pixel_size_nm
    # the lines matter only where the closing reaches (r of fg) and in the refinement's undecided band:
    # pixels with both kinds within w; the 4-connected staircase from such a pixel to the other kind
    # steps from a pixel kept after the closing (a filled hole never borders the outer background), so
    # they lie within w of one, and within r + w of fg. Lines within r + w + 1 of fg are the same as over
    # the whole frame, at a fraction of the cost.
    gaps = gap_lines(fg, arr > max(gap_level, levels["noise"]), near_px=max(r, 0) + max(w, 0.0) + 1)
    if r >= 1:
        pad = np.pad(fg, r, mode="edge")
        pad = close_disk(pad, r)  # scipy's binary_closing by disk(r), border 0 (disk_morphology)
        fg = pad[r:-r, r:-r]
    filled = fill_label(fg & ~gaps)
    fg, comp, n, boxes = filled
    if w < 1 or not fg.any():
        return filled
    # deeper than w inside (or outside): the Euclidean distance to the nearest pixel of the other kind
    # exceeds w, i.e. the pixel survives an erosion by the disk of radius w (the frame's edge counts as
    # neither kind, as in scipy's distance transform); 8x cheaper than the distance transform itself
    seeds = erode_disk(fg, w, 1)  # scipy's binary_erosion by disk_structure(w), border 1 (disk_morphology)
    if n:
        # components too thin to hold a deep pixel keep their deepest pixels as seeds
        has_seed = np.zeros(n + 1, bool)
        has_seed[comp[seeds]] = True
        thin = np.flatnonzero(~has_seed[1:]) + 1
        if thin.size:
            seeds |= deepest_pixels(fg, comp, thin, w, boxes)
    # 0, 1, 2: a quarter of the bytes of int32 (flood_band widens windows); 1 on the background seeds, 2 on
    # the grain seeds (over the background's where both), in two whole-array operations instead of two
    # assignments through boolean masks (several times dearer on a frame)
    markers = markers_of(erode_disk(~fg, w, 1) | gaps, seeds)
    # Flood only the undecided band and the marker pixels touching it: a marker pixel with no
    # undecided neighbour never labels anything, but scikit-image would queue every one of them
    # (most of the frame). With this mask the result is the same and the queue holds ~10x fewer pixels.
    band = markers == 0
    near_band = dilate_disk(band, 1)  # the 4-neighbours' cross
    # each connected piece of that band flooded in its own box (band_flood; equal to one whole-frame flood)
    # each connected piece of that band lies within floor(w) + 1 px of a component of fg (the band within w,
    # its cross one more): flooded cluster by cluster of the components' boxes
    return fill_label(seeds | flood_band(arr, markers, near_band, 2, boxes, int(np.floor(w)) + 1))


def markers_of(background: np.ndarray, grains: np.ndarray) -> np.ndarray:
    """The refinement's markers: 2 on ``grains``, else 1 on ``background``, else 0.

    Parameters
    ----------
    background, grains : ndarray of bool, shape (rows, cols)

    Returns
    -------
    ndarray of int8, shape (rows, cols)
        ``m = zeros; m[background] = 1; m[grains] = 2`` (tests/test_split_kernels_exact.py), as
        ``(background & ~grains) + 2 * grains`` over the bool arrays' bytes.
    """
    g = np.ascontiguousarray(grains, bool).view(np.int8)
    out = (np.asarray(background, bool) & ~np.asarray(grains, bool)).view(np.int8)
    out += g
    out += g
    return out


def hysteresis_level(levels: dict) -> float | None:
    """The low level to which the noise threshold's objects grow on a noisy frame, or None.

    Parameters
    ----------
    levels : dict
        Frame-wide levels (:func:`~grainhabit.plugins.segment.levels.frame_levels`): ``background`` and
        ``sigma`` in image units (grains about 1).

    Returns
    -------
    float or None
        ``background + HYSTERESIS_SIGMAS * sigma`` where ``sigma`` exceeds
        :data:`NOISY_SIGMA_SHARE` of the grain level (1), else None.

    Notes
    -----
    On the 357 EMPS training pictures (B. Yildirim and J. M. Cole, J. Chem. Inf. Model. 61 (2021) 1136)
    the growth took the precision from 0.847 to 0.865 and the median ECD error from 8.6 to 8.2 %, recall
    0.850 -> 0.848: grains of noisy or textured frames were found in fragments (pixels of the grain below
    the noise threshold cut it up), and the splitter and the pocket test made several grains of one.
    """
    sigma = float(levels.get("sigma", 0.0))
    if sigma <= NOISY_SIGMA_SHARE:
        return None
    return float(levels["background"]) + HYSTERESIS_SIGMAS * sigma


def grown_to(seeds: np.ndarray, low: np.ndarray) -> np.ndarray:
    """``seeds`` with every 8-connected component of ``low`` that holds a seed pixel (hysteresis).

    Parameters
    ----------
    seeds, low : ndarray of bool, shape (rows, cols)

    Returns
    -------
    ndarray of bool
        ``seeds |`` the morphological reconstruction of ``low`` from ``seeds`` with the 3 x 3 square (what
        scikit-image's ``apply_hysteresis_threshold`` does with 4-connected components;
        tests/test_noisy_growth.py checks against both).
    """
    lab, n = runs.label(low)  # ndi.label(low, _EIGHT), from the runs along the rows
    keep = np.zeros(n + 1, bool)
    keep[lab[seeds]] = True
    keep[0] = False
    return seeds | keep[lab]


def half_height_mask(image: np.ndarray, noise_level: float, edge_level: float = 0.5,
                     faint_level: float | None = None, faint_min_area: float = 0.0,
                     grow_level: float | None = None) -> np.ndarray:
    """Foreground cut at a fixed fraction of each object's own peak.

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
        Preprocessed frame (background 0, grains bright).
    noise_level : float
        Noise threshold (a few background sigmas above the background).
    edge_level : float
        Fraction of the peak at which the outline is drawn.
    faint_level : float, optional
        A lower threshold (fewer background sigmas): the faint objects it
        shows that ``noise_level`` shows too little of are taken whole (the
        rules: :func:`faint_objects`; a two-level threshold after J. Canny,
        "A computational approach to edge detection", IEEE Trans. PAMI 8(6),
        679-698, 1986, doi:10.1109/TPAMI.1986.4767851). Grains that stand
        clear of ``noise_level`` keep the extent that threshold gives them.
    faint_min_area : float
        Smallest grain area (px), for :func:`faint_objects`.
    grow_level : float, optional
        On a noisy frame (:func:`hysteresis_level`): the objects above
        ``noise_level`` (and the faint ones) first take every pixel above
        this level connected to them (:func:`grown_to`).

    Returns
    -------
    ndarray of bool, shape (rows, cols)
        In every 8-connected component ``C`` of ``I > T_n``: the pixels where
        ``I > f * max_C(I)``, and those deeper than :data:`EDGE_BAND_PX` from
        its outline, except deep pixels at most :data:`STAIN_SHARE` of the
        peak farther than :data:`STRONG_REACH_PX` from the pixels above the
        level, in parts not shaped like a grain (:func:`diffuse_parts`): the
        faint stain, film fold or halo a grain lies on.

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
    if faint_level is not None and faint_level < noise_level:
        weak |= faint_objects(image > faint_level, weak, faint_min_area)
    if grow_level is not None and grow_level < noise_level:
        weak = grown_to(weak, image > grow_level)
    # the 8-connected components of weak from its runs along the rows (runs.connect_runs: scipy's labels, in
    # scipy's numbering), read at weak's pixels only: no whole-frame label image and no gather from it
    # (tests/test_segspeed_exact.py keeps the scipy form)
    w_rows, w_starts, w_stops = runs.row_runs(weak)
    run_lab, n = runs.connect_runs(w_rows, w_starts, w_stops, weak.shape[1])
    if n == 0:
        return weak
    peak = np.full(n + 1, -np.inf, np.float32)
    # each component's pixels in row-major order (numpy.flatnonzero(weak)) and their labels
    at = runs.run_pixels(w_rows, w_starts, w_stops, weak.shape[1])
    lengths = w_stops - w_starts
    own, value = np.repeat(run_lab, lengths), image.ravel()[at]
    # each component's peak over its own pixels: one maximum per run (numpy's reduceat), then the runs'
    # maxima gathered by label (numpy's maximum.at over ~1e4 runs, not ~6e5 pixels; no sort): a maximum is a
    # maximum in any order (equal to scipy's labelled maximum, tests/test_speed_kernels.py)
    np.maximum.at(peak, run_lab, np.maximum.reduceat(value, np.cumsum(lengths) - lengths))
    peak[0] = 0.0
    # only the skirt of each component (within EDGE_BAND_PX of its outline) is cut at the level: inner
    # facet lines and texture deeper inside never split a grain
    deep = erode_disk(weak, EDGE_BAND_PX, 1)  # binary_erosion by disk_structure(EDGE_BAND_PX), border 1
    # the level test on the pixels of weak only (the same comparison as over the whole frame)
    strong = np.zeros(weak.shape, bool)
    strong.ravel()[at[value > edge_level * peak[own]]] = True
    # deep pixels at a small share of the peak and far from every pixel above the level are a faint stain
    # or film fold the grain lies on, not the grain: dropped beyond STRONG_REACH_PX of the grain's pixels.
    # Worked out at those few pixels only (faint & deep & ~dilate_disk(strong, STRONG_REACH_PX), the
    # dilations read where they are used: tests/test_segment_passes.py keeps the whole-frame form)
    faint = at[value <= STAIN_SHARE * peak[own]]
    faint = faint[deep.ravel()[faint]]
    stain_at = faint[~dilated_at(strong, STRONG_REACH_PX, faint)]
    if stain_at.size:
        stain = np.zeros(weak.shape, bool)
        stain.ravel()[stain_at] = True
        # a stain reaches the component's outer skirt; a dark crevice of a rough grain lies inside it
        # (diffuse_parts reads the skirt at the stain's pixels only: dilate_disk(weak & ~deep, 1.5) there)
        outer = np.zeros(weak.shape, bool)
        outer.ravel()[stain_at] = dilated_at(weak & ~deep, 1.5, stain_at)
        deep &= ~diffuse_parts(stain, outer)
    deep |= strong
    return deep


def dilated_at(mask: np.ndarray, radius: float, at: np.ndarray) -> np.ndarray:
    """``dilate_disk(mask, radius).ravel()[at]``, read at the given pixels only.

    Parameters
    ----------
    mask : ndarray of bool, shape (rows, cols)
    radius : float
        Disk radius (px), as :func:`disk_structure`.
    at : ndarray of int
        Flat (row-major) indices of the pixels asked for.

    Returns
    -------
    ndarray of bool, shape (len(at),)
        Whether a pixel of ``mask`` lies within ``radius`` (Euclidean) of each pixel, nothing beyond the
        frame counted (scipy's binary dilation by the disk, border 0). Where many pixels are asked for, the
        whole-frame dilation is taken.
    """
    at = np.asarray(at, np.intp)
    if at.size > mask.size // 256:
        return dilate_disk(mask, radius).ravel()[at]
    rows, cols = mask.shape
    dy, dx = np.nonzero(disk_structure(radius))
    k = int(np.floor(radius))
    r = at[:, None] // cols + (dy - k)[None, :]
    c = at[:, None] % cols + (dx - k)[None, :]
    inside = (r >= 0) & (r < rows) & (c >= 0) & (c < cols)
    hit = mask[np.clip(r, 0, rows - 1), np.clip(c, 0, cols - 1)] & inside
    return hit.any(axis=1)


def faint_objects(low: np.ndarray, high: np.ndarray, min_area: float = 0.0) -> np.ndarray:
    """The objects of a low threshold that the high one shows too little of.

    Parameters
    ----------
    low, high : ndarray of bool, shape (rows, cols)
        The pixels above the low and the high threshold (``high`` within ``low``).
    min_area : float
        Smallest grain area (px).

    Returns
    -------
    ndarray of bool
        The 8-connected components of ``low`` of at least
        :data:`FAINT_AREA_SHARE` of ``min_area`` px that have less than
        :data:`FAINT_SHOWN_SHARE` of their pixels in ``high``, hold no
        8-connected component of ``high`` of ``min_area`` px or more and keep
        :data:`FAINT_CLEARANCE_PX` from every such component: a faint grain
        whose brightest pixels alone (or none) pass the high threshold. A
        sharp bright object (a glyph's strokes, a grain the high threshold
        shows whole) stands above it over most of its extent; near such a
        grain a faint streak or speck would join it in the closing (a bump on
        its outline) and is left out.

    Notes
    -----
    The share and area tests take two counts per component; the clearance is
    then checked in the box of each component left (few: most of a frame's
    objects are grains the high threshold shows whole), the components of
    ``high`` cut by the box's edge counted as large.
    """
    out = np.zeros(low.shape, bool)
    # the 8-connected components of low from its runs along the rows (runs.connect_runs: scipy's labels)
    cols = low.shape[1]
    l_rows, l_starts, l_stops = runs.row_runs(low)
    run_lab, n = runs.connect_runs(l_rows, l_starts, l_stops, cols)
    if n == 0:
        return out
    # each component's pixels in low and in high, counted from the runs: a run of high & low lies in one run
    # of low (np.bincount(lab[low]) and np.bincount(lab[high]), the background's entry 0 never read)
    areas = np.bincount(np.repeat(run_lab, l_stops - l_starts), minlength=n + 1)
    h_rows, h_starts, h_stops = runs.row_runs(high & low)
    host = np.searchsorted(l_rows * (cols + 1) + l_starts, h_rows * (cols + 1) + h_starts, side="right") - 1
    shown_px = np.bincount(np.repeat(run_lab[host], h_stops - h_starts), minlength=n + 1)
    cand = (areas >= max(FAINT_AREA_SHARE * min_area, 1.0)) & (shown_px < FAINT_SHOWN_SHARE * areas)
    cand[0] = False
    if not cand.any():
        return out
    reach = int(np.ceil(FAINT_CLEARANCE_PX))
    rows, cols = low.shape
    lab = runs.paint_runs(low.shape, l_rows, l_starts, l_stops, run_lab)
    boxes = runs.run_boxes(l_rows, l_starts, l_stops, run_lab, n)
    for k in np.flatnonzero(cand):
        box = boxes[k - 1]
        r0, r1 = max(box[0].start - reach, 0), min(box[0].stop + reach, rows)
        c0, c1 = max(box[1].start - reach, 0), min(box[1].stop + reach, cols)
        own = lab[r0:r1, c0:c1] == k
        hi = high[r0:r1, c0:c1]
        if hi.any():
            parts, m = ndi.label(hi, structure=_EIGHT)
            big = np.bincount(parts.ravel(), minlength=m + 1) >= max(min_area, 1.0)
            for side in (parts[0], parts[-1], parts[:, 0], parts[:, -1]):
                big[side] = True   # cut by the box: may be larger than it looks
            big[0] = False
            if (big[parts] & dilate_disk(own, FAINT_CLEARANCE_PX)).any():
                continue
        out[r0:r1, c0:c1] |= own
    return out


def diffuse_parts(mask: np.ndarray, outer: np.ndarray | None = None) -> np.ndarray:
    """The parts of ``mask`` that are not shaped like a grain: small, or far from convex.

    A faint region joined to a bright grain is either a stain, film fold or halo
    (diffuse, winding round the grain) or a faint grain of its own touching it (a thin
    plate: compact, convex). Parts of at least :data:`PLATE_MIN_AREA_PX` px whose
    solidity (area over convex hull area) is at least :data:`PLATE_SOLIDITY` are kept;
    with ``outer`` (ndarray of bool), so are the parts that do not meet it (the dark
    crevices of a rough grain, enclosed by the grain).
    """
    from grainhabit.plugins.segment.hull_fill import convex_hull_mask

    out = mask.copy()
    rows, cols = np.flatnonzero(mask.any(axis=1)), np.flatnonzero(mask.any(axis=0))
    if rows.size == 0:
        return out
    # labelled in the mask's bounding box: the same parts, in the same (row-major) order as over the frame
    crop = (slice(int(rows[0]), int(rows[-1]) + 1), slice(int(cols[0]), int(cols[-1]) + 1))
    part = mask[crop]
    lab, n, boxes = runs.label_with_boxes(part)  # ndi.label(part, _EIGHT) and its find_objects
    areas = np.bincount(lab[part], minlength=n + 1)  # entry 0 (the background) is never read
    # the parts that meet ``outer``, counted at once (most parts of a frame are small and decided here)
    meets = np.ones(n + 1, bool)
    if outer is not None:
        meets[:] = False
        meets[lab[outer[crop] & part]] = True
    drop = ~meets
    big = np.flatnonzero(meets & (areas >= PLATE_MIN_AREA_PX))
    big = big[big > 0]
    if big.size:
        for k in big:
            box = boxes[k - 1]
            drop[k] = areas[k] >= PLATE_SOLIDITY * convex_hull_mask(lab[box] == k).sum()
    drop[0] = False
    if drop.any():
        view = out[crop]
        view[drop[lab]] = False
    return out


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
    outer = np.flatnonzero(edge)
    if outer.size == n:
        return mask.copy()  # no hole
    if outer.size == 1:
        return back != outer[0]  # one background piece touches the edge: a comparison, not a lookup
    return ~edge[back]


def fill_label(mask: np.ndarray) -> tuple[np.ndarray, np.ndarray, int, list]:
    """Fill the holes of a mask and label the 8-connected components of the result.

    Parameters
    ----------
    mask : ndarray of bool, shape (rows, cols)

    Returns
    -------
    filled : ndarray of bool
        :func:`fill_holes` of ``mask`` (scipy's ``binary_fill_holes``).
    components : ndarray of int32
        ``scipy.ndimage.label(filled, structure=np.ones((3, 3)))[0]``.
    n : int
        Number of components.
    boxes : list of tuple of slice
        ``scipy.ndimage.find_objects(components)``.

    Notes
    -----
    One labelling of the mask instead of one of its background (for the holes) and one of the
    filled mask. A hole of the mask (background not 4-connected to the frame's edge) is a hole of
    one 8-connected component ``C`` of the mask: the pixels that border the hole's outside are
    8-connected and all in the mask, hence in one component, which every path from the hole to the
    edge crosses (A. Rosenfeld, "Digital topology", Amer. Math. Monthly 86(8), 621-630, 1979,
    doi:10.2307/2321290; from memory). Conversely a hole of ``C`` alone that
    is background of the mask is a hole of the mask. So each component's holes are found in its own
    box. A component inside the hole of another (an island in a ring) merges with it; the others
    keep their numbers, which ``scipy.ndimage.label`` gives in the row-major order of first pixels
    and a hole never precedes its component's first row. Equal to the two labellings
    (tests/test_segment_exact.py).
    """
    lab, n0, boxes0 = runs.label_with_boxes(mask)  # ndi.label(mask, _EIGHT) and find_objects, from the row runs
    if n0 == euler_number8(mask):  # components less holes: no hole anywhere (grains seldom have one)
        return mask.copy(), lab, int(n0), boxes0
    holes = {}
    for k, b in enumerate(boxes0, start=1):
        if b is None or b[0].stop - b[0].start < 3 or b[1].stop - b[1].start < 3:
            continue  # a hole needs a ring of at least 3 x 3 pixels around it
        crop = lab[b] == k
        full = fill_holes(crop)
        if full.sum() > crop.sum():
            holes[k] = full & ~crop
    if not holes:
        return mask.copy(), lab, int(n0), boxes0
    inside = np.zeros(mask.shape, bool)
    for k, hole in holes.items():
        inside[boxes0[k - 1]] |= hole
    # a component whose first pixel is in a hole lies wholly in it (8-connected, it would touch the ring)
    top = []
    for k, b in enumerate(boxes0, start=1):
        r = b[0].start
        c = b[1].start + int(np.argmax(lab[r, b[1]] == k))
        if not inside[r, c]:
            top.append(k)
    if len(top) < n0:
        lut = np.zeros(n0 + 1, np.int32)
        lut[top] = np.arange(1, len(top) + 1, dtype=np.int32)
        lab = lut[lab]
    rank = {k: i for i, k in enumerate(top, start=1)}
    for k, hole in holes.items():
        if k in rank:
            view = lab[boxes0[k - 1]]
            view[hole] = rank[k]
    return mask | inside, lab, len(top), [boxes0[k - 1] for k in top]


def euler_number8(mask: np.ndarray) -> int:
    """Euler number of a mask: 8-connected components less holes (4-connected background not reaching the edge).

    Parameters
    ----------
    mask : ndarray of bool, shape (rows, cols)

    Returns
    -------
    int
        ``(n1 - n3 - 2 nD) / 4`` over the 2 x 2 windows of the mask padded with background, ``n1``
        and ``n3`` the windows with one and three pixels set, ``nD`` those with two set on a
        diagonal (S. B. Gray, "Local properties of binary images in two dimensions", IEEE Trans.
        Comput. C-20(5), 551-561, 1971, doi:10.1109/T-C.1971.223289; from memory; checked against
        ``skimage.measure.euler_number`` with connectivity 2 in the tests).
    """
    m = np.asarray(mask, bool)
    if m.ndim == 2 and hasattr(np, "bitwise_count"):
        return _euler_number8_packed(m)
    m = np.pad(m, 1).view(np.uint8)
    a, b, c, d = m[:-1, :-1], m[:-1, 1:], m[1:, :-1], m[1:, 1:]
    s = a + b
    s += c
    s += d
    n1 = int(np.count_nonzero(s == 1))
    n3 = int(np.count_nonzero(s == 3))
    n_diag = int(np.count_nonzero((s == 2) & (a == d)))
    return (n1 - n3 - 2 * n_diag) // 4


def _euler_number8_packed(mask: np.ndarray) -> int:
    """:func:`euler_number8` on rows packed 64 pixels to a word (numpy 2's ``bitwise_count``).

    The four pixels of every 2 x 2 window are four bit planes (a row, the row below, each also moved
    by one column); a window holds one or three pixels when the pairs ``(a, b)`` and ``(c, d)`` hold an
    odd number together, three when one pair is full; a diagonal pair is ``a d`` without ``b c`` or
    the reverse. Counting the set bits of these words gives ``n1``, ``n3`` and ``nD`` without a byte per
    window (tests/test_segment_exact.py checks the result against scikit-image).
    """
    rows, cols = mask.shape
    width = -(-(cols + 2) // 64) * 64
    big = np.zeros((rows + 2, width), bool)  # one pixel of background round the mask, then up to a word
    big[1:-1, 1:cols + 1] = mask
    words = np.packbits(big, axis=1, bitorder="little").view("<u8")
    right = np.right_shift(words, np.uint64(1))  # bit x: the pixel in column x + 1
    right[:, :-1] |= np.left_shift(words[:, 1:], np.uint64(63))
    a, b, c, d = words[:-1], right[:-1], words[1:], right[1:]
    odd = a ^ b ^ c ^ d
    full = (a & b) | (c & d)
    diag = (a & d & ~(b | c)) | (b & c & ~(a | d))
    n1 = int(np.bitwise_count(odd & ~full).sum(dtype=np.int64))
    n3 = int(np.bitwise_count(odd & full).sum(dtype=np.int64))
    n_diag = int(np.bitwise_count(diag).sum(dtype=np.int64))
    return (n1 - n3 - 2 * n_diag) // 4


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


def deepest_pixels(mask: np.ndarray, labels: np.ndarray, which: np.ndarray, reach: float,
                   boxes: list | None = None) -> np.ndarray:
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
    boxes : list of tuple of slice, optional
        ``scipy.ndimage.find_objects(labels)``, when the caller has it already.

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
    if boxes is None:
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
