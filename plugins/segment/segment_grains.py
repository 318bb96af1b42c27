"""Step ``segment-grains``: foreground, touching-grain splitting, labels.

1. Foreground: by default ``noise_k`` background sigmas above the background
   level (both measured once per frame from the background's histogram peak,
   below the grains' even where they cover most of the frame), so
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
3. Touching grains (:mod:`grainhabit.plugins.segment.touching`): each connected component is
   cropped to its bounding box. A component whose deepest concavity (largest distance from the
   shape of a pixel of its convex hull) is at most ``max(2 px, split_depth * r_eq)``, with
   ``r_eq`` the equal-area radius, is one convex grain; it is divided only along a dark seam
   between two notches deeper than 2 px (grains face to face). Otherwise it is cut along a
   straight segment between two outline concavities (or from one concavity to the nearest
   outline point) where that crosses a neck: twice the shallower notch is at least 0.3 of the
   cut's length (a single notch at least as deep as the cut is long) and half the cut at most
   1.2 times the thicker part's inscribed radius, or the
   image along the cut is 15 % darker than both parts (a seam), or the component's concavity is over
   twice its allowance and the cut leaves two convex parts. The first such cut whose parts
   are convex, or can be cut again into convex parts, is kept; failing that the first such cut,
   its concave parts cut further where they can be (a chain falls apart at its necks). No part
   is smaller than a tenth of the component; at most 200 cuts are tried per component. If no
   cut crosses a neck, the distance transform is flooded by a marker-controlled watershed [3]_
   from its h-maxima (``h = f * d_max``, f = 0.5 ... 0.1), kept when its parts are convex and
   every line between two parts crosses a neck of the distance map (saddle at most 0.75 of the
   smaller part's peak). Drawn marks are judged on the whole component before any cut (a
   letter cut into convex pieces looks like grains), on the pieces after, and by their ink on
   the raw frame (:mod:`grainhabit.plugins.segment.annotations`); rows of text are looked for
   among the grains, the whole components and the marks already dropped, and the caption
   beside a dropped scale bar goes with it (:func:`~grainhabit.plugins.segment.mark_shapes.bar_captions`).
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

from grainhabit.plugins.segment import annotations, specks, tiling
from grainhabit.plugins.segment.foreground import foreground
from grainhabit.plugins.segment.levels import check_image, frame_levels
from grainhabit.plugins.segment.mark_shapes import aligned_bar, annotation_kind, bar_captions, text_rows
from grainhabit.plugins.segment.touching import split_component

GRAINHABIT_API = 1

STEP = StepInfo(
    name="segment-grains",
    stage="segment",
    version="2.5",
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

#: A foreground covering more of the frame than this has no background to work with.
MAX_FOREGROUND = 0.95
#: A frame with a smaller fraction of pixels above the noise threshold holds noise only (Gaussian noise
#: exceeds 5 sigma in 3e-7 of the pixels).
NOISE_ONLY_FRACTION = 1e-4
#: Objects below min_peak are kept when at least this many times the smallest grain area (faint plates).
FAINT_MIN_AREA_FACTOR = 16.0
_EIGHT = np.ones((3, 3), bool)


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
    arr = check_image(image)
    if not np.isfinite(pixel_size_nm) or pixel_size_nm <= 0:
        raise ValueError(f"pixel_size_nm must be positive, got {pixel_size_nm!r}")
    fg = foreground(arr, pixel_size_nm, levels, method, local_block_nm, local_offset, close_nm, refine_nm,
                    gap_level, edge_level)
    above = arr > levels["noise"]
    min_area = np.pi / 4.0 * max(min_ecd_nm / pixel_size_nm, min_ecd_px) ** 2
    rejected = {"line": 0, "stroke": 0}
    bars = []  # frame boxes of scale bars dropped, for their captions
    marks = np.zeros(arr.shape, bool)  # objects dropped as drawn marks: glyphs of the rows of text looked for below
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
        if reject_annotations:
            # a whole drawn mark, judged before the splitter cuts a letter into convex pieces that look like grains;
            # by its filled shape alone (the bright rims of grains touching in a chain are thin strokes above the
            # threshold, and the splitter may still make grains of them)
            kind = annotation_kind(m, m)
            if kind is not None:
                rejected[kind] += 1
                bar = _frame_box(aligned_bar(m), box)
                if bar is not None:
                    bars.append(bar)
                marks[box] |= m
                comp[box][m] = 0
                continue
        parts = split_component(m, max(min_area, 1), split_depth, arr[box]) if split else [m]
        was_split = len(parts) > 1
        # closing and hole filling can enclose background between grains: a part
        # mostly below the threshold is such a pocket, not a grain
        parts = [q for q in parts if above[box][q].mean() >= 0.5]
        parts = specks.drop_specks(parts, box, arr, fg)  # small objects no brighter than the texture around
        # an object must rise to min_peak of the frame's grain level (1): background texture and specks
        # of correlated noise a few sigmas up do not; a large object wholly above the noise threshold on
        # average (a faint thin plate) stays
        parts = [q for q in parts if float(arr[box][q].max()) >= min_peak
                 or (q.sum() >= FAINT_MIN_AREA_FACTOR * min_area and float(arr[box][q].mean()) > levels["noise"])]
        if reject_annotations and not (len(parts) == 1 and parts[0] is m):  # m itself was judged above
            kinds = [annotation_kind(q, above[box]) for q in parts]
            for q, kind in zip(parts, kinds):
                if kind is not None:
                    rejected[kind] += 1
                    bar = _frame_box(aligned_bar(q), box) if kind == "line" else None
                    if bar is not None:
                        bars.append(bar)
                    marks[box] |= q
            parts = [q for q, kind in zip(parts, kinds) if kind is None]
        view = labels[box]
        for p in parts:
            view[p] = nxt
            split_flag.append(was_split)
            nxt += 1
    if reject_annotations and nxt > 1:
        # the glyphs already dropped stay in the rows and captions looked for, as numbers past the grains'
        page = labels
        if marks.any():
            glyphs, _ = ndi.label(marks & (labels == 0), structure=_EIGHT)
            page = np.where(glyphs > 0, glyphs + (nxt - 1), labels)
        gone = text_rows(page, above)
        # touching glyphs cut apart look like grains: rows of text are looked for among the whole objects too
        whole = np.where(labels > 0, comp, 0)
        gone = np.union1d(gone, np.unique(labels[np.isin(whole, text_rows(whole, above))])).astype(np.int64)
        gone = np.union1d(gone, bar_captions(page, bars, above)).astype(np.int64)
        gone = gone[(gone > 0) & (gone < nxt)]
        if gone.size:
            rejected["stroke"] += int(gone.size)
            keep = np.ones(nxt, bool)
            keep[gone] = False
            labels = np.where(keep[labels], labels, 0)
    labels, old = tiling.renumber_raster(labels)
    flags = {"split": np.concatenate([[False], np.asarray(split_flag, bool)[old]]), "rejected": rejected}
    clusters = np.where(labels > 0, comp, 0).astype(np.int32, copy=False)
    return labels, clusters, flags


def _frame_box(box, crop):
    """A (top, bottom, left, right) box within ``crop`` (a pair of slices) in frame coordinates; None stays."""
    if box is None:
        return None
    return (crop[0].start + box[0], crop[0].start + box[1], crop[1].start + box[2], crop[1].start + box[3])


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
    arr = check_image(image)
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
        clusters = None
    else:
        labels, clusters, flags = func(arr)
        split = flags["split"][1:]
    n_line = sum(d["line"] for d in dropped)
    n_stroke = sum(d["stroke"] for d in dropped)
    if raw is not None and p["reject_annotations"] and labels.max() > 0:
        inked = annotations.drawn_labels(labels, raw)
        if clusters is not None and np.any(flags["split"]):
            # a glyph the splitter cut into convex pieces is judged whole as well
            cut = np.where(flags["split"][labels], clusters, 0)
            whole = annotations.drawn_labels(cut, raw, rim=annotations.RIM_PX)
            if whole.size:
                inked = np.union1d(inked, np.unique(labels[np.isin(cut, whole)])).astype(np.int64)
                inked = inked[inked > 0]
        if inked.size:
            # the caption beside a bar dropped here ("50 nm" in anti-aliased text, no ink of its own)
            boxes = ndi.find_objects(labels)
            bars = [b for b in (_frame_box(aligned_bar(labels[boxes[k - 1]] == k, annotations.BAR_MAX_WIDTH_PX,
                                                      annotations.BAR_ASPECT), boxes[k - 1]) for k in inked)
                    if b is not None]
            if bars:
                inked = np.union1d(inked, bar_captions(labels, bars, arr > levels["noise"])).astype(np.int64)
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
