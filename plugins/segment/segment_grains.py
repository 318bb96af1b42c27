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
   beside a dropped scale bar goes with it (:func:`~grainhabit.plugins.segment.mark_shapes.bar_captions`);
   a bar in the particles' own ink goes with its caption
   (:func:`~grainhabit.plugins.segment.mark_shapes.bars_with_captions`), and the pieces of
   letters inside the band of a dropped line with it
   (:func:`~grainhabit.plugins.segment.mark_shapes.line_pieces`, segment-grains 2.25).
4. Packed fields (:mod:`grainhabit.plugins.segment.packed`): before all of
   this, a frame of at most ``tile_px`` per side is tested, on the frame as
   read, for particles covering most of it with thin gaps between them (a
   close-packed monolayer, where the usual background tests take the
   particles' own level for background). Such a frame is divided at the
   saddles of the distance map of the particles' Otsu class instead, whatever
   polarity the preprocessing chose; its drawn marks are dropped by ink as
   below, and a note says so (``packed_fields: false`` turns the test off).
5. Seams (segment-grains 2.9, :mod:`grainhabit.plugins.segment.dark_seams`): after the
   splitting, a grain that is not convex, or is 1.8 times the frame's median grain or larger, is
   divided along the thin dark lines inside it (black top-hat) by a marker-controlled watershed,
   kept only where every boundary between its parts is 15 % darker than both and meets the outline
   in a notch (the edges between the facets of one crystal meet it at corners), and every part is
   convex; the note counts the grains divided.
6. Labels are numbered 1..n in row-major order of their first pixel, so a
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

from grainhabit.plugins.segment import (annotations, cut_edges, faint_outline, outer_edge, population, rimmed_discs,
                                        specks, tiling)
from grainhabit.plugins.segment.dark_seams import split_at_dark_seams
from grainhabit.plugins.segment.foreground import foreground_labels
from grainhabit.plugins.segment.levels import check_image, frame_levels
from grainhabit.plugins.segment.packed import packed_field, split_rafts
from grainhabit.plugins.segment.mark_shapes import (aligned_bar, annotation_kind, bar_captions, bars_with_captions,
                                                    captioned_bars, line_pieces, text_rows)
from grainhabit.plugins.segment.rim_interior import fill_rim_interiors
from grainhabit.plugins.segment.touching import split_component

GRAINHABIT_API = 1

STEP = StepInfo(
    name="segment-grains",
    stage="segment",
    version="2.28",
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
        Param("faint_k", float, 4.0, low=0.0,
              doc="auto threshold: objects this many background sigmas up of which the noise_k threshold shows "
                  "less than one smallest grain are taken whole (faint small grains; noise_k or more: off)."),
        Param("local_block_nm", float, 2000.0, unit="nm", low=0.0,
              doc="Window side of the local thresholds; should be a few grain diameters."),
        Param("local_offset", float, 0.0,
              doc="Subtracted from the local threshold (image units, background 0, grains about 1)."),
        Param("outline", str, "half-height", choices=("half-height", "outer"),
              doc="Where outlines lie: at the half-height point of the edge (projected areas unbiased under a "
                  "symmetric blur), or out to the last pixels at 0.3 of the grain's level, at most 2 px further, "
                  "as hand-drawn masks are (for comparison with hand measurements; see outer_edge.py)."),
        Param("min_ecd_nm", float, 0.0, unit="nm", low=0.0,
              doc="Grains (and split parts) with a smaller equivalent circle diameter are dropped (0: no nm limit)."),
        Param("min_ecd_px", float, 4.0, unit="px", low=1.0,
              doc="Grains smaller than this equivalent circle diameter in pixels are dropped (below it no "
                  "outline can be measured), whatever the pixel size; small objects must also stand out of "
                  "their surroundings, the more the smaller they are (specks.py)."),
        Param("min_area_share", float, population.MIN_AREA_SHARE, low=0.0, high=1.0,
              doc="Objects smaller than this fraction of the frame's typical grain area (the area-weighted median: "
                  "half the grain area lies in larger objects) are dropped as debris or substrate texture, and "
                  "specks under 6 px ECD already under 5 % of it (0: off, both; set 0 for a field that holds grains "
                  "over 7 times apart in diameter)."),
        Param("min_peak", float, 0.3, low=0.0,
              doc="Objects whose brightest pixel stays below this (image units: background 0, typical grain 1) "
                  "are background texture, not grains."),
        Param("reject_annotations", bool, True,
              doc="Drop thin line-like or stroke-like objects (scale bars, panel letters, text, scratches)."),
        Param("ink_marks", str, "auto", choices=("auto", "on", "off"),
              doc="Also drop objects drawn in flat black or white ink (annotations.py): 'auto' does so unless "
                  "the frame's pixel size comes from its instrument's own metadata (a file as the microscope "
                  "wrote it, whose reader has already masked the marks drawn in its stored values; there a "
                  "grain clipped to white is a grain)."),
        Param("close_nm", float, None, unit="nm", low=0.0,
              doc="Radius of the closing that bridges facet lines at the outline; unset means 2 pixels."),
        Param("refine_nm", float, None, unit="nm", low=0.0,
              doc="Half-width of the band where outlines snap to the largest gradient; unset means 3 pixels, 0 off."),
        Param("gap_level", float, 0.25, low=0.0,
              doc="Grains whose cores above this level (image units, grains about 1) are a few pixels apart stay apart."),
        Param("split", bool, True, doc="Split touching grains by watershed."),
        Param("split_depth", float, 0.08, low=0.0, high=1.0,
              doc="Concavity depth, as a fraction of the equal-area radius, above which a component is split."),
        Param("packed_fields", bool, True,
              doc="Look for a packed field (particles covering the frame, thin gaps between them) and divide it "
                  "at the saddles of its distance map (frames of at most tile_px per side; see packed.py)."),
        Param("rimmed_discs", bool, True,
              doc="Where the grains found are mostly ring-like, or none or no background was found, look for round "
                  "particles seen by their bright rims by the circular Hough transform (frames of at most tile_px "
                  "per side; see rimmed_discs.py)."),
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
#: Where Otsu's classes find no background, a frame with at most this share of its pixels above the noise
#: threshold is taken to have a textured background and a few grains (:func:`few_above_noise`).
FEW_ABOVE_NOISE = 0.05
#: ... and the grains found there must be at least this many: one or two objects (a caption left, a
#: highlight) do not show that the frame has a background.
FEW_GRAINS_MIN = 3
#: A frame with a smaller fraction of pixels above the noise threshold holds noise only (Gaussian noise
#: exceeds 5 sigma in 3e-7 of the pixels).
NOISE_ONLY_FRACTION = 1e-4
#: Objects below min_peak are kept when at least this many times the smallest grain area (faint plates).
FAINT_MIN_AREA_FACTOR = 16.0
#: A low part enclosed by one grain joins it when the two together are at least this solid (interiors_rejoined).
FACE_SOLIDITY = 0.9
#: ... and it is at least this share of the two together (interiors_rejoined).
FACE_SHARE = 0.1
#: ... and its centre lies within this share of their equal-area radius of theirs (interiors_rejoined).
FACE_OFFSET = 0.35
_EIGHT = np.ones((3, 3), bool)


def label_grains(image: np.ndarray, pixel_size_nm: float, levels: dict, *, method: str = "noise",
                 local_block_nm: float = 2000.0, local_offset: float = 0.0, min_ecd_nm: float = 40.0,
                 close_nm: float | None = None, refine_nm: float | None = None, gap_level: float = 0.25,
                 split: bool = True, split_depth: float = 0.08, edge_level: float = 0.5,
                 min_ecd_px: float = 4.0, min_peak: float = 0.3,
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
    # the foreground and its 8-connected components (one labelling for the hole filling and them)
    min_area = np.pi / 4.0 * max(min_ecd_nm / pixel_size_nm, min_ecd_px) ** 2
    fg, comp, n, comp_boxes = foreground_labels(arr, pixel_size_nm, levels, method, local_block_nm, local_offset,
                                                close_nm, refine_nm, gap_level, edge_level, min_area)
    # rods and plates seen by their bright rims: the open inside of a C-shaped rim joins it
    fill_rim_interiors(arr, fg, comp, comp_boxes, levels["noise"])
    above = arr > levels["noise"]
    rejected = {"line": 0, "stroke": 0}
    bars = []  # frame boxes of scale bars dropped, for their captions
    marks = np.zeros(arr.shape, bool)  # objects dropped as drawn marks: glyphs of the rows of text looked for below
    labels = np.zeros(arr.shape, np.int32)
    split_flag = [False]
    nxt = 1
    # every label's bounding box, first pixel (row-major frame index) and component, noted as it is
    # written: what scipy's find_objects and a raster scan would give, without their passes over the
    # frame. Trusted only when the parts lie in their components and do not overlap (checked below).
    part_box, part_first, part_comp = [None], [-1], [0]
    written, boxes_ok = 0, True
    for k, sl in enumerate(comp_boxes, start=1):
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
        # closing and hole filling can enclose background between grains: a part of a split component
        # mostly below the threshold is such a pocket, not a grain (a whole component is no pocket: the
        # outline of a faint grain lies outside the few pixels above the threshold, on its edge's gradient)
        if was_split:
            kept = [q for q in parts if above[box][q].mean() >= 0.5]
            if len(kept) < len(parts):
                kept = interiors_rejoined(parts, kept, m)
            # every part a "pocket": nothing round it is a grain to enclose it, so the component is one grain
            # that the threshold shows little of (faint, or noisy: on a noisy frame a grain's pixels dip below
            # the threshold in numbers), cut where it is not (a crystal of the Tescan 50000x test file of
            # ../shared/realdata was split in two and both halves dropped, 25 % and 21 % of their pixels above)
            parts, was_split = (kept, True) if kept else ([m], False)
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
            rr = np.flatnonzero(p.any(axis=1))
            if rr.size == 0:
                part_box.append(None)
                part_first.append(-1)
            else:
                cc = np.flatnonzero(p.any(axis=0))
                part_box.append((slice(r0 + int(rr[0]), r0 + int(rr[-1]) + 1),
                                 slice(c0 + int(cc[0]), c0 + int(cc[-1]) + 1)))
                part_first.append((r0 + int(rr[0])) * arr.shape[1] + c0 + int(np.argmax(p[rr[0]])))
            part_comp.append(k)
            written += int(np.count_nonzero(p))
            boxes_ok &= p.dtype == bool and p.shape == m.shape and not (p & ~m).any()
    # overlapping parts would leave fewer labelled pixels than written
    boxes_ok = boxes_ok and written == int(np.count_nonzero(labels))
    keep = np.ones(nxt, bool)
    whole = None
    if reject_annotations and nxt > 1:
        # the glyphs already dropped stay in the rows and captions looked for, as numbers past the grains'
        page = labels
        page_boxes = part_box[1:] if boxes_ok else None
        n_marks = 0
        if marks.any():
            glyphs, n_marks = ndi.label(marks & (labels == 0), structure=_EIGHT)
            page = np.where(glyphs > 0, glyphs + (nxt - 1), labels)
            if page_boxes is not None:
                page_boxes = page_boxes + ndi.find_objects(glyphs)
        gone = text_rows(page, above, page_boxes)
        # touching glyphs cut apart look like grains: rows of text are looked for among the whole objects too
        if boxes_ok:
            whole = paint_boxes(labels, part_box, part_comp, np.ones(nxt, bool))  # np.where(labels > 0, comp, 0)
            whole_rows = text_rows(whole, above, union_boxes(part_box, part_comp, np.ones(nxt, bool)))
        else:
            whole = np.where(labels > 0, comp, 0)
            whole_rows = text_rows(whole, above)
        if whole_rows.size:
            gone = np.union1d(gone, np.unique(labels[np.isin(whole, whole_rows)])).astype(np.int64)
        else:
            gone = np.union1d(gone, np.zeros(0, np.int64)).astype(np.int64)
        # a bar beside a caption dropped here (a grey scale bar under "100 nm"; the glyphs dropped by their
        # shape alone, numbered from nxt in page, counted as well), and then the rest of its caption
        captioned, captioned_boxes = captioned_bars(
            page, np.union1d(gone, np.arange(nxt, nxt + n_marks)), page_boxes, annotations.BAR_MAX_WIDTH_PX,
            annotations.BAR_ASPECT, annotations.BOX_FILL)  # the bar of the ink test's shape
        gone = np.union1d(gone, captioned).astype(np.int64)
        bars += captioned_boxes
        gone = np.union1d(gone, bar_captions(page, bars, above, page_boxes)).astype(np.int64)
        # a bar in the particles' own ink with a caption in bold print (glyphs run together, none dropped)
        shaped, _ = bars_with_captions(page, above, page_boxes, annotations.BAR_MAX_WIDTH_PX,
                                       annotations.BAR_ASPECT, annotations.BOX_FILL, skip=gone)
        gone = np.union1d(gone, shaped).astype(np.int64)
        # pieces of letters beside the glyphs dropped: the splitter cut them off, alone they look like grains
        gone = np.union1d(gone, line_pieces(page, np.union1d(gone, np.arange(nxt, nxt + n_marks)),
                                            page_boxes)).astype(np.int64)
        gone = gone[(gone > 0) & (gone < nxt)]
        if gone.size:
            rejected["stroke"] += int(gone.size)
            keep[gone] = False
            if not boxes_ok:
                labels = np.where(keep[labels], labels, 0)
    if boxes_ok:
        # tiling.renumber_raster from the first pixels noted above (labels dropped map to 0)
        first = np.asarray(part_first, np.int64)
        present = np.flatnonzero(keep & (first >= 0))
        present = present[present > 0]
        old = present[np.argsort(first[present], kind="stable")]
        lut = np.zeros(nxt, np.int32)
        lut[old] = np.arange(1, len(old) + 1, dtype=np.int32)
        keep_box = np.zeros(nxt, bool)
        keep_box[old] = True
        # lut[labels] and np.where(labels > 0, comp, 0), box by box
        if whole is not None:
            # the components painted above for every label: those dropped since (few) are taken out again
            clusters = paint_boxes(labels, part_box, np.zeros(nxt, np.int32), ~keep_box, whole)
        else:
            clusters = paint_boxes(labels, part_box, part_comp, keep_box)
        labels = paint_boxes(labels, part_box, lut, keep_box)
    else:
        labels, old = tiling.renumber_raster(labels)
        clusters = np.where(labels > 0, comp, 0).astype(np.int32, copy=False)
    flags = {"split": np.concatenate([[False], np.asarray(split_flag, bool)[old]]), "rejected": rejected}
    if boxes_ok:
        # for the caller: find_objects(labels), and the component of every label
        flags["boxes"] = [part_box[i] for i in old]
        flags["cluster_of"] = np.asarray(part_comp, np.int64)[old]
    return labels, clusters, flags


def paint_boxes(labels: np.ndarray, boxes: list, value, take: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
    """``np.where(take[labels], value[labels], 0)`` as int32, written box by box (or into ``out``).

    Parameters
    ----------
    labels : ndarray of int, shape (rows, cols)
    boxes : list of tuple of slice or None
        ``boxes[i]``: a box holding every pixel of label ``i`` (entry 0 unused).
    value : sequence of int
        The value painted for each label.
    take : ndarray of bool
        Which labels are painted.
    out : ndarray of int32, shape (rows, cols), optional
        Painted over in place (the pixels of the labels not taken keep their values) and returned.

    Returns
    -------
    ndarray of int32, shape (rows, cols)
        For a frame of ~150 grains, a few per cent of its pixels are visited instead of all of them.
    """
    if out is None:
        out = np.zeros(labels.shape, np.int32)
    for i in np.flatnonzero(take).tolist():
        b = boxes[i] if i < len(boxes) else None
        if b is None:
            continue
        np.copyto(out[b], value[i], where=labels[b] == i)  # view[labels[b] == i] = value[i], without the gather
    return out


def union_boxes(boxes: list, group: list | np.ndarray, take: np.ndarray) -> list:
    """``find_objects`` of the image that gives every pixel of object ``i`` (where ``take[i]``) the id ``group[i]``.

    Parameters
    ----------
    boxes : list of tuple of slice or None
        Bounding box of every object (entry 0 unused).
    group : sequence of int
        The id each object's pixels get (>= 1).
    take : ndarray of bool
        Which objects are drawn.

    Returns
    -------
    list of tuple of slice or None
        Entry ``g - 1``: the smallest box holding the boxes of the objects of id ``g`` (None where there
        are none), up to the largest id drawn.
    """
    spans = {}
    for i in range(1, len(boxes)):
        b = boxes[i]
        if b is None or not take[i]:
            continue
        g = int(group[i])
        if g in spans:
            s = spans[g]
            spans[g] = [min(s[0], b[0].start), max(s[1], b[0].stop), min(s[2], b[1].start), max(s[3], b[1].stop)]
        else:
            spans[g] = [b[0].start, b[0].stop, b[1].start, b[1].stop]
    out = [None] * (max(spans) if spans else 0)
    for g, s in spans.items():
        out[g - 1] = (slice(s[0], s[1]), slice(s[2], s[3]))
    return out


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
        See :func:`check_frame` (grains everywhere, no background).
    """
    p = STEP.resolve(params)
    labels, split, notes = first_look(image, pixel_size_nm, p, raw)
    if p["rimmed_discs"] and max(np.shape(image)) <= p["tile_px"]:
        labels, split, notes = rimmed_discs.second_look(check_image(image), labels, split, notes)
    return labels, split, notes


def first_look(image: np.ndarray, pixel_size_nm: float, p: dict,
               raw: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray, list[str]]:
    """The segmentation before the look for rimmed discs; see :func:`segment_image`."""
    arr = check_image(image)
    notes = []
    levels = frame_levels(arr, p["noise_k"], faint_k=p["faint_k"])
    field = packed_test(arr, raw, pixel_size_nm, p)
    if field is not None:
        notes.append(f"segment-grains: packed field: {int(field.labels.max())} particles divided at the saddles "
                     f"of the distance map ({'bright' if field.bright else 'dark'} particles covering "
                     f"{100 * field.cover:.0f} % of the frame, gaps {field.gap_radius_px:.1f} px against "
                     f"{field.radius_px:.1f} px)")
        return finish_field(arr, raw, levels, p, field.labels, notes)
    no_background = ""
    try:
        empty = check_frame(arr, levels, p, smallest_grain_area(p, pixel_size_nm))
    except ValueError as err:
        field = second_look(arr, raw, pixel_size_nm, p, "no level free of grains", notes)
        if field is None:
            few_above_noise(arr, levels, p, str(err), notes)
            empty, no_background = "", str(err)
    else:
        field = second_look(arr, raw, pixel_size_nm, p, "nothing stands above its noise", notes) if empty else None
    if field is not None:
        return finish_field(arr, raw, levels, p, field.labels, notes)
    if empty:
        notes.append(empty)
        return np.zeros(arr.shape, np.int32), np.zeros(0, bool), notes
    kw = dict(method=p["threshold"], local_block_nm=p["local_block_nm"], local_offset=p["local_offset"],
              min_ecd_nm=p["min_ecd_nm"], close_nm=p["close_nm"], refine_nm=p["refine_nm"],
              gap_level=p["gap_level"], split=p["split"], split_depth=p["split_depth"],
              edge_level=p["edge_level"], min_ecd_px=p["min_ecd_px"], min_peak=p["min_peak"],
              reject_annotations=p["reject_annotations"])

    dropped = []
    noted = {}

    def func(tile):
        labels, clusters, flags = label_grains(tile, pixel_size_nm, levels, **kw)
        dropped.append(flags.pop("rejected"))
        # boxes and components of the labels: used by an untiled run (tiles are stitched and renumbered)
        noted["boxes"], noted["cluster_of"] = flags.pop("boxes", None), flags.pop("cluster_of", None)
        return labels, clusters, flags

    if max(arr.shape) > p["tile_px"]:
        halo = max(32, int(np.ceil(p["tile_overlap_nm"] / pixel_size_nm)))
        labels, flags, n_lost = tiling.label_tiled(arr, func, p["tile_px"], halo, p["tile_workers"])
        split = flags.get("split", np.zeros(int(labels.max()), bool))
        if n_lost:
            notes.append(f"segment-grains: {n_lost} pixel(s) of grain clusters cut by tile edges were not found "
                         "again; raise tile_overlap_nm")
        clusters = None
        boxes = cluster_of = None
    else:
        labels, clusters, flags = func(arr)
        split = flags["split"][1:]
        boxes, cluster_of = noted["boxes"], noted["cluster_of"]
    split_by_label = flags.get("split")
    least = smallest_grain_area(p, pixel_size_nm)
    labels, split, n_rafts = split_rafts(arr, labels, split, least, boxes)
    if n_rafts:
        notes.append(f"segment-grains: {n_rafts} raft(s) of packed particles divided at their gaps")
        boxes = None
    labels, split, n_seamed = split_at_dark_seams(arr, labels, split, least, boxes)
    if n_seamed:
        notes.append(f"segment-grains: {n_seamed} grain(s) divided along dark seams")
        boxes = None
    if n_rafts or n_seamed:
        # the labels were renumbered: the boxes and components noted by label_grains no longer apply
        cluster_of = None
        if clusters is not None:
            split_by_label = np.r_[False, split]
    labels, split, notes = place_outlines(arr, *drop_debris(*drop_drawn_marks(
        arr, raw, levels, p, labels, split, clusters, split_by_label, dropped, notes, boxes, cluster_of), p, arr), p,
        levels["sigma"])
    if no_background and int(labels.max()) < FEW_GRAINS_MIN:
        # one or two objects do not show a background under grains (few_above_noise): the error stands
        raise ValueError(no_background)
    return labels, split, notes


def finish_field(arr: np.ndarray, raw: np.ndarray | None, levels: dict, p: dict, labels: np.ndarray,
                 notes: list) -> tuple[np.ndarray, np.ndarray, list[str]]:
    """The last steps for the parts of a packed field (its own or a second look's): marks, debris, outlines."""
    n = int(labels.max())
    return place_outlines(arr, *drop_debris(*drop_drawn_marks(
        arr, raw, levels, p, labels, np.zeros(n, bool), None, np.zeros(n + 1, bool), [], notes), p, arr), p,
        levels["sigma"])


def interiors_rejoined(parts: list, kept: list, component: np.ndarray) -> list:
    """The kept parts of a split component, each with the low parts it alone encloses as a convex whole.

    :func:`~grainhabit.plugins.segment.touching.enclosed_pockets` takes pixels far below a component's
    median level, away from its outline, for background enclosed by a ring of grains. A particle seen by
    its bright rim (the edge effect of secondary-electron images) encloses its own dim face the same
    way, as dark as the substrate at its centre: dropped as a pocket, it left the particle a ring, its
    area and ECD a fraction of the particle's (EMPS 226dc58f03: 10 of 24 spheres). A low part is such a
    face, and joins the part round it, when that one kept part is all it touches within the component
    and the two together are convex (solidity at least :data:`FACE_SOLIDITY`, ISO 9276-6): a gap
    enclosed by a heap touches several grains, or leaves the heap with it concave.

    Parameters
    ----------
    parts : list of ndarray of bool
        Every part of the component (masks over its box).
    kept : list of ndarray of bool
        The parts mostly above the noise threshold (a sublist of ``parts``).
    component : ndarray of bool
        The whole component.

    Returns
    -------
    list of ndarray of bool
        ``kept``, some of them grown by the faces they enclose.
    """
    if not kept:
        return kept
    owner = np.zeros(component.shape, np.int32)
    for k, q in enumerate(kept, start=1):
        owner[q] = k
    grown = [q.copy() for q in kept]
    kept_ids = {id(q) for q in kept}
    for q in parts:
        if id(q) in kept_ids or not q.any():
            continue
        ring = ndi.binary_dilation(q, structure=_EIGHT) & ~q
        if (ring & ~component).any():
            continue
        around = np.unique(owner[ring])
        if around.size != 1 or around[0] == 0:
            continue
        whole = grown[int(around[0]) - 1] | q
        # a face is a good share of its particle; a gap left in a heap the splitter has not divided yet
        # (dark_seams, packed fields do later) is a small share of it
        if np.count_nonzero(q) < FACE_SHARE * np.count_nonzero(whole) or specks.solidity(whole) < FACE_SOLIDITY:
            continue
        # a face lies about the middle of its particle; a gap left between two grains of a part the
        # splitter did not divide lies on their seam, off the part's centre
        (fr, fc), (wr, wc) = ndi.center_of_mass(q), ndi.center_of_mass(whole)
        if np.hypot(fr - wr, fc - wc) <= FACE_OFFSET * np.sqrt(np.count_nonzero(whole) / np.pi):
            grown[int(around[0]) - 1] = whole
    return grown


def place_outlines(arr: np.ndarray, labels: np.ndarray, split: np.ndarray, notes: list, boxes: list | None,
                   p: dict, noise_sd: float) -> tuple[np.ndarray, np.ndarray, list[str]]:
    """Outlines refined (:func:`refine_outlines`; ``noise_sd`` the background's standard deviation, ``boxes``
    the grains' boxes where known), then out to the edge's foot where ``outline`` is ``outer``
    (:mod:`~grainhabit.plugins.segment.outer_edge`)."""
    labels, split, _ = refine_outlines(arr, labels, split, noise_sd, notes, boxes)
    if p["outline"] == "outer":
        labels = outer_edge.grow_to_level(arr, labels)
    return labels, split, notes


def refine_outlines(arr: np.ndarray, labels: np.ndarray, split: np.ndarray, noise_sd: float, notes: list,
                    boxes: list | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    """Faint grains' dents filled, then the cuts between grains of different levels moved onto their edge.

    Parameters
    ----------
    arr : ndarray of float, shape (rows, cols)
        Preprocessed frame (grains bright).
    labels : ndarray of int32, shape (rows, cols)
        Grains 1..n in raster order of their first pixels.
    split : ndarray of bool, shape (n,)
    noise_sd : float
        The background's standard deviation (image units).
    notes : list of str
        A note is appended for each refinement that changed a grain.
    boxes : list of tuple of slice, optional
        ``scipy.ndimage.find_objects(labels)`` where known: the refinements and the renumbering then
        keep it up to date instead of passing over the frame again (the same boxes; not changed here).

    Returns
    -------
    labels, split
        The grains numbered again in raster order of their first pixels where a pixel moved.
    old : ndarray of int, shape (n,), or None
        ``old[k - 1]`` is the label that became ``k``; None where nothing moved.

    Notes
    -----
    :func:`~grainhabit.plugins.segment.faint_outline.fill_faint_dents` and
    :func:`~grainhabit.plugins.segment.cut_edges.snap_cuts`; both read pixels within a few tens of px of
    a grain only, so a frame processed by tiles gives the same grains (``tiling.segment_tile``).
    """
    boxes = list(boxes) if boxes is not None else None  # kept up to date below (the caller's list untouched)
    labels, filled = faint_outline.fill_faint_dents(arr, labels, noise_sd, boxes)
    if filled:
        notes.append(f"segment-grains: the dents of {filled} faint grain(s) filled from the image smoothed by "
                     f"{faint_outline.SMOOTH_PX:g} px")
    labels, moved = cut_edges.snap_cuts(arr, labels, split, boxes)
    if moved:
        notes.append(f"segment-grains: {moved} cut(s) between grains of different levels moved onto the edge "
                     "between them")
    if not (filled or moved):
        return labels, split, None
    labels, old = tiling.renumber_raster(labels, boxes)
    return labels, split[old - 1], old


def drop_debris(labels: np.ndarray, split: np.ndarray, notes: list, boxes: list | None, p: dict,
                arr: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray, list[str], list | None]:
    """Drop objects under ``min_area_share`` of the frame's typical grain area, or small and dim, and note how many.

    See :mod:`grainhabit.plugins.segment.population`. The first four arguments are what
    :func:`drop_drawn_marks` returns: ``boxes`` (``find_objects(labels)``, labels numbered in row-major
    order of their first pixel), when known, confine the work to them; None: the whole-frame path.
    ``arr``, the preprocessed frame, gives the objects' levels (:func:`population.small_and_dim`).
    Returns the labels, split flags and notes, and the kept grains' boxes (None on the whole-frame path).
    """
    if boxes is not None and all(b is not None for b in boxes):
        labels, split, n, boxes = drop_below_population_boxed(labels, split, boxes, p["min_area_share"], arr,
                                                              with_boxes=True)
    else:
        labels, split, n = population.drop_below_population(labels, split, p["min_area_share"], arr)
        boxes = None
    if n:
        notes.append(f"segment-grains: {n} object(s) under {100 * p['min_area_share']:g} % of the frame's typical "
                     f"grain area dropped (debris, substrate texture; also under {100 * population.DIM_AREA_SHARE:g} % "
                     f"of it and {100 * population.DIM_LEVEL:g} % of the grains' level: stains)")
    return labels, split, notes, boxes


def drop_below_population_boxed(labels: np.ndarray, split: np.ndarray, boxes: list, share: float,
                                 image: np.ndarray | None = None, with_boxes: bool = False) -> tuple:
    """:func:`~grainhabit.plugins.segment.population.drop_below_population`, box by box.

    Parameters
    ----------
    labels : ndarray of int32, shape (rows, cols)
        Grains 1..n in row-major order of their first pixel.
    split : ndarray of bool, shape (n,)
    boxes : list of tuple of slice
        ``scipy.ndimage.find_objects(labels)`` (every label present).
    share : float
    image : ndarray, optional
        The preprocessed frame, as ``drop_below_population`` takes it.
    with_boxes : bool
        Also return the boxes of the labels returned (the kept grains' boxes, renumbered).

    Returns
    -------
    labels, split, dropped
        As ``drop_below_population``, bit for bit: the areas are counted in each box and the kept
        labels painted box by box (a 2048 px frame of ~150 grains: its whole-frame ``bincount``
        and ``lut[labels]`` cost ~50 ms).
    boxes : list of tuple of slice
        With ``with_boxes``: ``scipy.ndimage.find_objects`` of the labels returned.
    """
    n = len(boxes)
    if n == 0 or share <= 0:
        return (labels, split, 0) + ((list(boxes),) if with_boxes else ())
    areas = population.box_areas(labels, boxes)
    reference = ~population.edge_strips(boxes, labels.shape)
    drop = population.below_population(areas, share, reference)
    if image is not None:
        levels = np.array([float(image[b][labels[b] == k].mean(dtype=np.float64)) for k, b in enumerate(boxes, start=1)])
        drop |= population.small_and_dim(areas, levels, reference)
    if not drop.any():
        return (labels, split, 0) + ((list(boxes),) if with_boxes else ())
    keep = np.r_[False, ~drop]
    lut = np.zeros(n + 1, np.int32)
    lut[keep] = np.arange(1, int(keep.sum()) + 1, dtype=np.int32)
    out = (paint_boxes(labels, [None] + list(boxes), lut, keep), np.asarray(split, bool)[~drop], int(drop.sum()))
    return out + (([b for b, d in zip(boxes, drop) if not d],) if with_boxes else ())


def smallest_grain_area(p: dict, pixel_size_nm: float) -> float:
    """Area (px) of a disc of the smallest grain ECD the step keeps: ``min_ecd_px`` or ``min_ecd_nm``, the larger."""
    return np.pi / 4.0 * max(p["min_ecd_px"], p["min_ecd_nm"] / pixel_size_nm) ** 2


def check_frame(arr: np.ndarray, levels: dict, p: dict, least_area: float = 0.0) -> str:
    """Whether the frame can hold grains at all, from its frame-wide levels.

    Parameters
    ----------
    arr : ndarray
        Preprocessed frame (grains bright).
    levels : dict
        :func:`frame_levels` of ``arr``.
    p : dict
        Resolved step parameters (``min_contrast``, ``noise_k``).
    least_area : float
        Area (px) of the smallest grain kept (:func:`smallest_grain_area`):
        fewer pixels than that above the noise threshold cannot make a grain,
        however small the frame (on a 68 x 68 px frame one stray pixel is
        already more than :data:`NOISE_ONLY_FRACTION` of it).

    Returns
    -------
    str
        A ``qc no-grains`` note when the Otsu classes differ by less than
        ``min_contrast`` or almost nothing stands above the noise threshold
        (under :data:`NOISE_ONLY_FRACTION` of the frame or under
        ``least_area`` pixels); "" otherwise.

    Raises
    ------
    ValueError
        If Otsu's upper class covers more than :data:`MAX_FOREGROUND` of the
        frame, or the background's level is nearer that class's mean than
        the lower class's (grains everywhere, no background to work with).
    """
    t = levels["otsu"]
    upper = arr > t
    mean_up = float(arr[upper].mean()) if upper.any() else t
    mean_low = float(arr[~upper].mean()) if not upper.all() else t
    if mean_up - mean_low < p["min_contrast"]:
        return (f"segment-grains: qc no-grains: no grains found (contrast {mean_up - mean_low:.3f} between the "
                f"Otsu classes is below min_contrast {p['min_contrast']})")
    otsu_frac = np.count_nonzero(upper) / upper.size  # np.mean of the mask: the same correctly rounded quotient
    if otsu_frac > MAX_FOREGROUND:
        raise ValueError(f"segment-grains: foreground covers {100 * otsu_frac:.0f} % of the frame; no background "
                         "to separate grains from (check polarity and threshold)")
    n_above = np.count_nonzero(arr > levels["noise"])
    fg_frac = n_above / arr.size
    if fg_frac < NOISE_ONLY_FRACTION or n_above < least_area:
        return (f"segment-grains: qc no-grains: no grains found (only {100 * fg_frac:.2f} % of the frame is "
                f"{p['noise_k']:g} background sigmas above the background: noise only)")
    if abs(levels["background"] - mean_up) < abs(levels["background"] - mean_low):
        raise ValueError(f"segment-grains: foreground covers {100 * otsu_frac:.0f} % of the frame and the most "
                         "common level is not background; no background to separate grains from "
                         "(check polarity and threshold)")
    return ""


def few_above_noise(arr: np.ndarray, levels: dict, p: dict, error: str, notes: list) -> None:
    """Go on with the usual path where few pixels stand above the noise threshold, else raise ``error``.

    :func:`check_frame` judges by Otsu's two classes whether the frame has a
    background. On a frame of a few small grains (under a hundredth of it)
    over a textured or mottled background, Otsu's threshold divides the
    background's own texture in two and the most common level falls in the
    upper half, although nearly every pixel lies within the noise of the
    background: the frame has a background, and the grains stand far above
    it. Where at most :data:`FEW_ABOVE_NOISE` of the frame lies above the
    noise threshold (and more than noise alone puts there), the usual path is
    taken with a ``qc no-background`` note; otherwise the error stands. The
    caller raises it too where the usual path then finds fewer than
    :data:`FEW_GRAINS_MIN` grains.

    Parameters
    ----------
    arr : ndarray
        Preprocessed frame (grains bright).
    levels : dict
        :func:`frame_levels` of ``arr`` (``noise``: the noise threshold, image units).
    p : dict
        Resolved step parameters (``noise_k`` for the note).
    error : str
        The message of :func:`check_frame`'s error.
    notes : list of str
        The frame's notes; the ``qc no-background`` note is appended.

    Raises
    ------
    ValueError
        With ``error``, where the test does not hold (otherwise the note is appended and the frame
        goes on as one with a background).
    """
    share = np.count_nonzero(arr > levels["noise"]) / arr.size
    if not NOISE_ONLY_FRACTION <= share <= FEW_ABOVE_NOISE:
        raise ValueError(error)
    notes.append(f"segment-grains: qc no-background: Otsu's classes found no background, but only "
                 f"{100 * share:.2f} % of the frame stands {p['noise_k']:g} background sigmas above the most "
                 "common level: grains taken above it (a textured background; check the frame)")


def second_look(arr: np.ndarray, raw: np.ndarray | None, pixel_size_nm: float, p: dict, why: str,
                notes: list):
    """A frame the usual path finds no background in, judged as a loose packing; the field or None.

    The packed-field tests without those of the gaps
    (:func:`~grainhabit.plugins.segment.packed.packed_field` with ``thin_gaps=False``): particles
    over most of a frame whose background the frame-wide levels missed. Where it passes, a
    ``qc no-background`` note says why the usual path failed, so the frame is looked at.
    """
    if raw is None or not p["packed_fields"] or max(arr.shape) > p["tile_px"]:
        return None
    field = packed_field(raw, smallest_grain_area(p, pixel_size_nm), thin_gaps=False)
    if not field.packed:
        return None
    notes.append(f"segment-grains: qc no-background: the frame-wide levels found no background ({why}); "
                 f"{int(field.labels.max())} particles covering {100 * field.cover:.0f} % of the frame divided at "
                 "the saddles of the distance map instead")
    return field


def packed_test(arr: np.ndarray, raw: np.ndarray | None, pixel_size_nm: float, p: dict):
    """The packed field of an untiled frame (:func:`~grainhabit.plugins.segment.packed.packed_field`), or None.

    Tested on the frame as read (``raw``), whose two classes the preprocessing may have
    taken for grains and background the wrong way round; None without ``raw``, with
    ``packed_fields`` off, for a frame larger than ``tile_px`` per side, or when the
    frame is not packed.
    """
    if raw is None or not p["packed_fields"] or max(arr.shape) > p["tile_px"]:
        return None
    field = packed_field(raw, smallest_grain_area(p, pixel_size_nm))
    return field if field.packed else None


def drop_drawn_marks(arr: np.ndarray, raw: np.ndarray | None, levels: dict, p: dict, labels: np.ndarray,
                     split: np.ndarray, clusters: np.ndarray | None, split_by_label: np.ndarray | None, dropped: list,
                     notes: list, boxes: list | None = None,
                     cluster_of: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray, list[str], list | None]:
    """Drop the grains drawn in flat ink on the raw frame, count the marks, flag an empty frame.

    Parameters
    ----------
    arr : ndarray
        Preprocessed frame.
    raw : ndarray or None
        The frame as read (no ink test without it).
    levels : dict
        :func:`frame_levels` of ``arr``.
    p : dict
        Resolved step parameters.
    labels : ndarray of int
        Grains 1..n.
    split : ndarray of bool, shape (n,)
        Whether each grain was cut from a larger component.
    clusters : ndarray of int or None
        The components before cutting (untiled frames), for the ink test of whole cut clusters.
    split_by_label : ndarray of bool, shape (n + 1,), or None
        ``split`` indexed by label (0 for the background); None for a tiled frame.
    dropped : list of dict
        The ``line`` and ``stroke`` counts of marks dropped by shape.
    notes : list of str
        Appended to.
    boxes : list of tuple of slice, optional
        The box of each grain (``boxes[k - 1]`` for grain ``k``), as :func:`label_grains` records them
        (grains numbered in row-major order of their first pixel).
    cluster_of : ndarray of int, shape (n,), optional
        The component of ``clusters`` each grain came from (with ``boxes``).

    Returns
    -------
    labels, split, notes
        As :func:`segment_image`.
    boxes : list of tuple of slice, or None
        The box of each grain returned, when ``boxes`` was given; None otherwise.
    """
    n_line = sum(d["line"] for d in dropped)
    n_stroke = sum(d["stroke"] for d in dropped)
    given = boxes
    n_labels = len(boxes) if boxes is not None else int(labels.max())
    if raw is not None and p["reject_annotations"] and p["ink_marks"] != "off" and n_labels > 0:
        ink = annotations.frame_ink(raw)  # ink levels, ink pixels and grey-level counts, shared by both calls
        inked = annotations.drawn_labels(labels, raw, boxes=boxes, ink=ink)
        if clusters is not None and split_by_label is not None and np.any(split_by_label):
            # a glyph the splitter cut into convex pieces is judged whole as well
            cut_boxes = None
            if boxes is not None:
                # np.where(split_by_label[labels], clusters, 0), box by box
                cut = paint_boxes(labels, [None] + list(boxes), np.r_[0, cluster_of], split_by_label)
                cut_boxes = union_boxes([None] + list(boxes), np.r_[0, cluster_of], split_by_label)
            else:
                cut = np.where(split_by_label[labels], clusters, 0)
            whole = annotations.drawn_labels(cut, raw, rim=annotations.RIM_PX, boxes=cut_boxes, ink=ink)
            if whole.size:
                inked = np.union1d(inked, np.unique(labels[np.isin(cut, whole)])).astype(np.int64)
                inked = inked[inked > 0]
        if inked.size:
            # the caption beside a bar dropped here ("50 nm" in anti-aliased text, no ink of its own)
            if boxes is None:
                boxes = ndi.find_objects(labels)
            bars = [b for b in (_frame_box(aligned_bar(labels[boxes[k - 1]] == k, annotations.BAR_MAX_WIDTH_PX,
                                                      annotations.BAR_ASPECT, trim=True), boxes[k - 1]) for k in inked)
                    if b is not None]
            if bars:
                inked = np.union1d(inked, bar_captions(labels, bars, arr > levels["noise"])).astype(np.int64)
            inked = np.union1d(inked, line_pieces(labels, inked, boxes)).astype(np.int64)
            n_stroke += int(inked.size)
            keep = np.ones(n_labels + 1, bool)
            keep[inked] = False
            if given is not None:
                # tiling.renumber_raster(np.where(keep[labels], labels, 0)) box by box: the labels are in
                # raster order already, and dropping some keeps the order of the others
                old = np.flatnonzero(keep[1:]) + 1
                lut = np.zeros(n_labels + 1, np.int32)
                lut[old] = np.arange(1, len(old) + 1, dtype=np.int32)
                keep[0] = False
                labels = paint_boxes(labels, [None] + list(given), lut, keep)
                given = [given[k - 1] for k in old]
            else:
                labels, old = tiling.renumber_raster(np.where(keep[labels], labels, 0))
            n_labels = len(old)
            split = np.asarray(split, bool)[old - 1]
    if n_line or n_stroke:
        notes.append(f"segment-grains: {n_line} line-like and {n_stroke} stroke-like object(s) dropped as "
                     "drawn marks (scale bars, letters, text, streaks)")
    if n_labels == 0:
        notes.append("segment-grains: qc no-grains: no grains found (nothing stands out of the background noise, "
                     "or everything was too small or looked like drawn marks)")
    return labels.astype(np.int32, copy=False), split.astype(bool), notes, given


@hookimpl
def grainhabit_segment(frame, params):
    """Label the grains of ``frame.image``; see the module docstring."""
    if "tile_levels" in frame.meta:  # one tile of a frame processed by tiles: the frame's thresholds
        return tiling.segment_tile(frame, params)
    if frame.image is None:
        raise ValueError("segment-grains needs frame.image: run a preprocess step (flatten-background) first")
    raw = frame.raw if frame.raw is not None and np.shape(frame.raw) == np.shape(frame.image) else None
    if STEP.resolve(params)["ink_marks"] == "auto":
        params = dict(params, ink_marks="off" if frame.calibration == "instrument" else "on")
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
