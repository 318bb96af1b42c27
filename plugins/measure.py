"""Step ``measure-grains``: size and shape of every grain in calibrated units.

Definitions follow ISO 9276-6 (descriptors of particle shape from 2-D
projections) and ISO 9276-1/ISO 13322-1 for size. Every length is in nm and
every area in nm^2, with the frame's pixel size ``px`` (nm) and the
pixel-centre convention of the design contract: pixel (row, col) has its
centre at ((col + 0.5) * px, (row + 0.5) * px) and covers the square of side
``px`` around it.

The outline of a grain
----------------------
Boundary quantities come from the grain's sub-pixel outline: the
marching-squares contour at level 0.5 of its mask, which passes through the
middles of the pixel edges between grain and not-grain, with 8-connected
grain pixels kept together (the vertices of
``skimage.measure.find_contours(mask, 0.5, fully_connected="high")``, here
traced for all grains at once). Two versions are used:

- the raw outline, a staircase whose convex hull bridges the steps: convex
  hull, Feret diameters and solidity are taken from it (smoothing would
  only blunt sharp corners and shorten calipers);
- the outline smoothed by local quadratic regression over
  ``contour_window`` vertices (:func:`plugins.outline.smooth_closed_contour`):
  perimeter, circularity and the corner polygon are taken from it. The raw
  staircase is 5-8 % too long at most orientations; smoothed, a digitised
  disc's perimeter is within 1 % of 2 pi r, while sharp corners are rounded
  by about a pixel (a square of ECD 80 px comes out about 1 % short).

Only the outer outline counts (holes and, for a label in several pieces,
all but the largest piece are left out of the boundary quantities). Grains
touching the frame border are closed along the border (the visible
outline). For grains of a few pixels the descriptors are defined but
carry little meaning (a single pixel's outline is a diamond of area 1/2).

Columns
-------
``centroid_x_nm``, ``centroid_y_nm``
    Mean position of the grain's pixel centres (centre of area).
``area_nm2``
    A = N * px^2, N the number of pixels of the label (projection area).
``ecd_nm``
    Equivalent circle (area-equivalent) diameter, x_A = sqrt(4 A / pi).
``perimeter_nm``
    P, length of the smoothed outline.
``convex_area_nm2``
    A_C, the area of the convex hull counted like A: the pixel centres
    inside or on the convex hull of the grain's pixel centres, times px^2
    (Pick's theorem on that lattice polygon gives the count exactly).
``convex_perimeter_nm``
    P_C, perimeter of the convex hull of the raw outline.
``feret_max_nm``, ``feret_min_nm``
    Largest and smallest caliper (Feret) diameter x_Fmax, x_Fmin, from the
    convex hull of the raw outline: the maximum is the largest distance
    between two hull vertices, the minimum the smallest width of the hull
    measured perpendicular to one of its edges (the narrowest caliper
    always rests flush against a hull edge, the rotating-calipers
    argument). A square of side s gives s and s * sqrt(2) (about 0.7 px
    less for x_Fmax, where the outline cuts the corner pixels).
    ``skimage.measure.regionprops``' ``feret_diameter_max`` uses the contour
    of the filled convex-hull image, which grows by up to a pixel along
    slanted hull edges; the two agree within 1 px.
``feret_ratio``
    x_Fmin / x_Fmax (the ISO 9276-6 aspect ratio from Feret diameters).
``circularity``
    4 pi A_o / P^2, with A_o the area enclosed by the smoothed outline
    (1 for a disc, pi/4 for a square, pi sqrt(3)/9 for an equilateral
    triangle, pi sqrt(3)/6 for a regular hexagon). A_o differs from
    ``area_nm2`` by about half a pixel (the outline cuts the corners of the
    pixels it passes); using it keeps tiny grains in [0, 1].
``solidity``
    A / A_C. A digitally convex grain scores exactly 1, whatever its size
    and orientation; regionprops' ``solidity`` is the same ratio with a hull
    through the pixel corners (slightly larger, so slightly lower values).
``convexity``
    P_C / P, clipped at 1 (corner rounding of the smoothed outline can make
    P slightly shorter than the hull's perimeter).
``orientation_deg``
    Direction of the major axis of the equivalent ellipse (the ellipse with
    the grain's second moments of area), in degrees in (-90, 90], measured
    from the +x axis (columns, to the right) towards +y (rows, down): on
    screen, positive angles turn clockwise. 0 for a grain with no preferred
    axis (disc, square).
``ellipse_major_nm``, ``ellipse_minor_nm``
    Full axis lengths of the equivalent ellipse, 4 sqrt(lambda_1,2) with
    lambda the eigenvalues of the second central moments of area per unit
    area, each pixel counted as a uniform square (adds px^2 / 12 to the
    variances of its centre points).
``elongation``
    1 - minor / major of the equivalent ellipse (0 for a disc or square,
    towards 1 for a needle).
``intensity_mean``, ``intensity_std``
    Mean and standard deviation (over the grain's pixels, ddof = 0) of
    ``frame.image`` (``frame.raw`` if no preprocess step ran).
``n_corners``, ``edge_ratio``
    Corners and short/long edge ratio of the fitted outline polygon
    (:func:`plugins.outline.fit_polygon`, :func:`plugins.outline.edge_ratio`).

References
----------
.. [1] ISO 9276-6:2008, "Representation of results of particle size
   analysis - Part 6: Descriptive and quantitative representation of
   particle shape and morphology".
.. [2] ISO 13322-1:2014, "Particle size analysis - Image analysis methods -
   Part 1: Static image analysis methods".
.. [3] G. T. Toussaint, "Solving geometric problems with the rotating
   calipers", Proc. IEEE MELECON, 1983.
.. [4] W. E. Lorensen, H. E. Cline, "Marching cubes: a high resolution 3D
   surface construction algorithm", SIGGRAPH Computer Graphics 21(4),
   163-169, 1987. DOI: 10.1145/37402.37422
"""

from __future__ import annotations

import dataclasses

import numpy as np
from scipy.spatial import ConvexHull, QhullError

from pipeline import hookimpl
from pipeline.params import Column, Param, StepInfo

from .outline import edge_ratio, fit_polygons, savgol_smoothing_coefficients

GRAINHABIT_API = 1

STEP = StepInfo(
    name="measure-grains",
    stage="measure",
    version="1.0",
    summary="ISO 9276-6 size and shape descriptors in nm from a sub-pixel outline; corner polygon fit.",
    params=(
        Param("contour_window", int, 9, unit="vertices", low=0, high=51,
              doc="Odd number of outline vertices (about 0.85 px each) in the smoothing window; 0 or 1 turns smoothing off."),
        Param("corner_tolerance", float, 0.02, unit="", low=0.001, high=0.5,
              doc="Largest distance of the outline from its fitted polygon, as a fraction of the grain's ECD."),
        Param("min_tolerance_px", float, 0.5, unit="px", low=0.0, high=10.0,
              doc="Floor of that distance in pixels, for small grains (digitisation noise)."),
        Param("min_corner_angle_deg", float, 20.0, unit="deg", low=0.0, high=89.0,
              doc="Polygon vertices where the outline turns by less than this are merged away."),
        Param("min_edge_fraction", float, 0.06, unit="", low=0.0, high=0.5,
              doc="Polygon edges shorter than this fraction of the ECD are always collapsed into one corner."),
        Param("corner_rounding_px", float, 2.0, unit="px", low=0.0, high=20.0,
              doc="An edge is collapsed into a corner when its neighbours meet within this distance of the outline (or twice the tolerance)."),
    ),
)

#: Columns written by this step: name -> (units, long name).
COLUMNS = {
    "centroid_x_nm": ("nm", "centroid x (along columns, from the frame's left edge)"),
    "centroid_y_nm": ("nm", "centroid y (along rows, from the frame's top edge)"),
    "area_nm2": ("nm^2", "projected area (pixel count times pixel area)"),
    "ecd_nm": ("nm", "equivalent circle diameter sqrt(4 A / pi)"),
    "perimeter_nm": ("nm", "perimeter of the smoothed sub-pixel outline"),
    "convex_area_nm2": ("nm^2", "area of the convex hull (pixel centres inside it)"),
    "convex_perimeter_nm": ("nm", "perimeter of the convex hull of the outline"),
    "feret_max_nm": ("nm", "maximum Feret diameter"),
    "feret_min_nm": ("nm", "minimum Feret diameter"),
    "feret_ratio": ("1", "Feret ratio (min / max)"),
    "circularity": ("1", "circularity 4 pi A / P^2"),
    "solidity": ("1", "solidity (area / convex hull area)"),
    "convexity": ("1", "convexity (convex hull perimeter / perimeter)"),
    "orientation_deg": ("deg", "major-axis direction from +x towards +y (clockwise on screen)"),
    "ellipse_major_nm": ("nm", "major axis of the equivalent (same second moments) ellipse"),
    "ellipse_minor_nm": ("nm", "minor axis of the equivalent ellipse"),
    "elongation": ("1", "elongation 1 - minor / major axis of the equivalent ellipse"),
    "intensity_mean": ("1", "mean preprocessed intensity inside the grain"),
    "intensity_std": ("1", "standard deviation of the preprocessed intensity (ddof 0)"),
    "n_corners": ("1", "number of corners of the fitted outline polygon"),
    "edge_ratio": ("1", "short / long edge of the fitted outline polygon"),
}

#: The same, as the step's declared outputs (units and long names in the results store).
STEP = dataclasses.replace(STEP, outputs=tuple(Column(k, u, ln) for k, (u, ln) in COLUMNS.items()))


def _check_labels(labels, image=None, pixel_size_nm=1.0):
    lab = np.asarray(labels)
    if lab.ndim != 2:
        raise ValueError(f"labels must be 2-D, got shape {lab.shape}")
    if not np.issubdtype(lab.dtype, np.integer):
        raise ValueError(f"labels must be an integer array, got dtype {lab.dtype}")
    if lab.size and lab.min() < 0:
        raise ValueError(f"labels must be >= 0, got minimum {lab.min()}")
    if image is not None and np.shape(image) != lab.shape:
        raise ValueError(f"image shape {np.shape(image)} differs from labels shape {lab.shape}")
    if not (np.isfinite(pixel_size_nm) and pixel_size_nm > 0):
        raise ValueError(f"pixel_size_nm must be a positive number, got {pixel_size_nm!r}")
    return lab


def label_moments(labels, image=None, n_labels=None):
    """Area, centroid, second moments and intensity of every label at once.

    Parameters
    ----------
    labels : ndarray of int, shape (rows, cols)
        0 background, 1..n grains.
    image : ndarray of float, shape (rows, cols), optional
        Intensities to average inside each label.
    n_labels : int, optional
        Number of labels n (default ``labels.max()``); labels 1..n get rows
        0..n-1, absent labels get area 0 and NaN elsewhere.

    Returns
    -------
    dict of str -> ndarray, shape (n,)
        ``area`` (pixels), ``cx``, ``cy`` (centroid in pixel units, pixel
        centres at index + 0.5), ``mxx``, ``myy``, ``mxy`` (central second
        moments of area per unit area, px^2, pixels as uniform squares),
        and with an image ``mean`` and ``std`` (ddof = 0).

    Notes
    -----
    One ``np.bincount`` per moment over the grain pixels; no loop over
    labels. mxx = <x^2> - <x>^2 + 1/12, mxy = <x y> - <x><y>; the
    intensity variance is summed about the mean (two passes) so that large
    raw intensities lose no precision.
    """
    lab = _check_labels(labels, image)
    n = int(lab.max()) if n_labels is None else int(n_labels)
    flat = lab.ravel()
    fg = np.flatnonzero(flat)
    ids = flat[fg].astype(np.intp)
    rows, cols = np.divmod(fg, lab.shape[1])
    x = cols.astype(np.float64)
    y = rows.astype(np.float64)
    size = n + 1

    def total(w=None):
        return np.bincount(ids, w, size)[1:size]

    area = total().astype(np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        inv = 1.0 / area
        mx, my = total(x) * inv, total(y) * inv
        # raw second moments minus squared means: coordinates are below 1e5
        # px, so float64 keeps the variances to about 1e-6 px^2
        mxx = total(x * x) * inv - mx * mx + 1.0 / 12.0
        myy = total(y * y) * inv - my * my + 1.0 / 12.0
        mxy = total(x * y) * inv - mx * my
        out = {"area": area, "cx": mx + 0.5, "cy": my + 0.5, "mxx": mxx, "myy": myy, "mxy": mxy}
        if image is not None:
            vals = np.asarray(image).ravel()[fg].astype(np.float64)
            mean = total(vals) * inv
            dv = vals - np.concatenate([[0.0], mean])[ids]
            out["mean"] = mean
            out["std"] = np.sqrt(total(dv * dv) * inv)
    return out


def ellipse_axes(mxx, myy, mxy):
    """Equivalent-ellipse axes and orientation from second central moments.

    Parameters
    ----------
    mxx, myy, mxy : ndarray, shape (n,)
        Central second moments of area per unit area (length^2), x along
        columns and y along rows.

    Returns
    -------
    major, minor : ndarray, shape (n,)
        Full axis lengths 4 sqrt(lambda_1), 4 sqrt(lambda_2) (length).
    orientation_deg : ndarray, shape (n,)
        Major-axis direction in (-90, 90], from +x towards +y.

    Notes
    -----
    lambda_1,2 = (mxx + myy)/2 +- sqrt(((mxx - myy)/2)^2 + mxy^2);
    theta = atan2(2 mxy, mxx - myy) / 2. An ellipse with semi-axes a, b has
    lambda = a^2/4, b^2/4, so 4 sqrt(lambda) are its full axes.
    """
    mxx, myy, mxy = (np.asarray(v, dtype=np.float64) for v in (mxx, myy, mxy))
    half = 0.5 * (mxx + myy)
    rad = np.sqrt((0.5 * (mxx - myy)) ** 2 + mxy**2)
    l1 = half + rad
    l2 = np.maximum(half - rad, 0.0)
    theta = 0.5 * np.degrees(np.arctan2(2.0 * mxy, mxx - myy))
    theta = np.where(theta <= -90.0, theta + 180.0, theta)
    return 4.0 * np.sqrt(l1), 4.0 * np.sqrt(l2), theta


# crack directions k: 0 +x (next column), 1 +y (next row), 2 -x, 3 -y
_DROW = np.array([0, 1, 0, -1])
_DCOL = np.array([1, 0, -1, 0])


def _trace_cracks(labels):
    """Every boundary crack of every label, with its successor along the outline.

    A crack is a pair (pixel p of label L, direction k) whose neighbour
    p + dir_k is not L; its contour vertex is the crack's midpoint, where
    marching squares at level 0.5 on L's mask puts it. The successor is the
    next crack met walking along the outline with the grain on the left in
    (x, y) axes (positive shoelace area for an outer boundary), with grain
    pixels 8-connected.

    Returns
    -------
    succ : ndarray of intp, shape (N,)
        Index of each crack's successor.
    lab : ndarray, shape (N,)
        Label of each crack.
    x, y : ndarray of float64, shape (N,)
        Crack midpoints in pixel units (pixel centres at index + 0.5).
    k : ndarray of int, shape (N,)
        Direction of each crack from its grain pixel (0 +x, 1 +y, 2 -x, 3 -y).
    """
    lab = np.pad(labels, 1)
    width = lab.shape[1]
    flat = lab.ravel()
    step = np.array([1, width, -1, -width])
    nz = lab != 0
    horiz = lab[:, :-1] != lab[:, 1:]   # pixel (r, c) differs from (r, c + 1)
    vert = lab[:-1, :] != lab[1:, :]    # pixel (r, c) differs from (r + 1, c)
    i_e = np.flatnonzero(horiz & nz[:, :-1])
    i_w = np.flatnonzero(horiz & nz[:, 1:])
    i_s = np.flatnonzero(vert & nz[:-1, :])
    i_n = np.flatnonzero(vert & nz[1:, :])
    # back to flat indices of the padded image, times 4 plus the direction
    found = [
        (i_e // (width - 1) * width + i_e % (width - 1)) * 4 + 0,
        i_s * 4 + 1,
        (i_w // (width - 1) * width + i_w % (width - 1) + 1) * 4 + 2,
        (i_n + width) * 4 + 3,
    ]
    crack = np.sort(np.concatenate(found))
    p, k = np.divmod(crack, 4)
    L = flat[p]
    # walking direction t: the grain (on the -dir_k side) lies to its left
    tk = (k + 1) % 4
    ahead = p + step[tk]
    diag = ahead + step[k]
    in_diag = flat[diag] == L
    in_ahead = flat[ahead] == L
    # turn outwards if the diagonal pixel is L (8-connected), else go
    # straight if the pixel ahead is L, else turn inwards round p
    nxt_pix = np.where(in_diag, diag, np.where(in_ahead, ahead, p))
    nxt_k = np.where(in_diag, (tk + 2) % 4, np.where(in_ahead, k, tk))
    succ = np.searchsorted(crack, nxt_pix * 4 + nxt_k)
    rows, cols = np.divmod(p, width)
    x = cols - 0.5 + 0.5 * _DCOL[k]
    y = rows - 0.5 + 0.5 * _DROW[k]
    return succ, L, x, y, k


def _rank_cycles(succ):
    """Cycle id (smallest member) and position from it, by pointer jumping."""
    n = len(succ)
    root = np.arange(n)
    nxt = succ.copy()
    span = 1
    while span < n:
        # root covers the 2*span members starting at each crack after this
        root = np.minimum(root, root[nxt])
        nxt = nxt[nxt]
        span *= 2
        if np.array_equal(root[succ], root):
            break
    # cut each cycle before its root and rank by list ranking
    is_root = root == np.arange(n)
    nxt = np.where(is_root[succ], -1, succ)
    dist = np.where(nxt >= 0, 1, 0)
    cur = nxt.copy()
    while np.any(cur >= 0):
        live = cur >= 0
        dist[live] += dist[cur[live]]
        cur[live] = cur[cur[live]]
    return root, dist


class Outlines:
    """Outer outlines of all labels of a label image, stored end to end.

    Attributes
    ----------
    xy : ndarray of float64, shape (N, 2)
        Vertices (x, y) in pixel units, pixel centres at index + 0.5; the
        outline of label i + 1 is ``xy[offsets[i]:offsets[i + 1]]``, in order
        with positive signed area.
    offsets : ndarray of intp, shape (n + 1,)
    raw_xy : ndarray of float64, shape (N, 2)
        The same vertices before smoothing (midpoints of the boundary pixel
        edges), same offsets.
    raw_area : ndarray of float64, shape (n,)
        Area enclosed by the unsmoothed outline (pixel count - 1/2 for a
        simply connected grain).
    pixel_xy : ndarray of float64, shape (N, 2)
        Centre of the grain pixel on the inner side of each raw vertex
        (same offsets; a pixel repeats once per boundary edge).
    """

    def __init__(self, xy, offsets, raw_xy, raw_area, pixel_xy):
        self.xy = xy
        self.offsets = offsets
        self.raw_xy = raw_xy
        self.raw_area = raw_area
        self.pixel_xy = pixel_xy

    def __len__(self):
        return len(self.offsets) - 1

    def __getitem__(self, i):
        return self.xy[self.offsets[i]:self.offsets[i + 1]]

    def as_list(self):
        """The outlines as a list of (m_i, 2) arrays (views)."""
        return [self[i] for i in range(len(self))]


def trace_outlines(labels, n_labels=None, window=9):
    """Sub-pixel outer outline of every label, all labels at once.

    Parameters
    ----------
    labels : ndarray of int, shape (rows, cols)
        0 background, 1..n grains.
    n_labels : int, optional
        n (default ``labels.max()``); absent labels get empty outlines.
    window : int
        Smoothing window in vertices (see
        :func:`plugins.outline.smooth_closed_contour`, order 2); 0 or 1
        keeps the marching-squares vertices.

    Returns
    -------
    Outlines

    Notes
    -----
    The vertices are those of ``skimage.measure.find_contours(mask, 0.5,
    fully_connected="high")`` on each label's mask padded with background:
    the midpoints of the pixel edges between the label and anything else.
    They are found and ordered for all labels together: every boundary
    crack gets its successor from its 2 x 2 neighbourhood, then pointer
    jumping finds each closed outline and the order along it (about
    log2(outline length) array passes). Per label the outline of largest
    signed area is kept (the outer boundary; holes run the other way round
    and are dropped, as are smaller pieces of a label in several parts).
    Smoothing is a cyclic Savitzky-Golay filter along each outline, applied
    to outlines longer than the window.
    """
    lab = _check_labels(labels)
    n = int(lab.max()) if n_labels is None and lab.size else int(n_labels or 0)
    if n == 0 or not np.any(lab):
        return Outlines(np.empty((0, 2)), np.zeros(n + 1, dtype=np.intp), np.empty((0, 2)),
                        np.zeros(n), np.empty((0, 2)))
    succ, L, x, y, kdir = _trace_cracks(lab)
    root, dist = _rank_cycles(succ)
    # signed area of each cycle (shoelace over successor pairs)
    cross = x * y[succ] - x[succ] * y
    cyc_area = np.bincount(root, cross, minlength=len(succ)) * 0.5
    roots = np.flatnonzero(root == np.arange(len(succ)))
    # per label, the cycle of largest signed area
    order = np.lexsort((cyc_area[roots], L[roots]))
    r_sorted = roots[order]
    lab_sorted = L[r_sorted]
    last = np.ones(len(r_sorted), dtype=bool)
    last[:-1] = lab_sorted[1:] != lab_sorted[:-1]
    keep_root = r_sorted[last]
    keep = np.zeros(len(succ), dtype=bool)
    keep[keep_root] = True
    members = np.flatnonzero(keep[root])
    length = np.bincount(root[members], minlength=len(succ))
    # order the kept cracks by label, then along the outline from the root
    pos = length[root[members]] - 1 - dist[members]
    seq = members[np.lexsort((pos, L[members]))]
    counts = np.bincount(L[seq], minlength=n + 1)[1:n + 1]
    offsets = np.zeros(n + 1, dtype=np.intp)
    np.cumsum(counts, out=offsets[1:])
    xy = np.stack([x[seq], y[seq]], axis=1)
    # centres of the boundary pixels, in outline order (repeats where a
    # pixel has several boundary edges)
    pix = xy - 0.5 * np.stack([_DCOL[kdir[seq]], _DROW[kdir[seq]]], axis=1)
    raw_area = np.zeros(n)
    raw_area[L[keep_root] - 1] = cyc_area[keep_root]
    smooth = _smooth_all(xy, offsets, int(window)) if window > 1 else xy
    return Outlines(smooth, offsets, xy, raw_area, pix)


def _smooth_all(xy, offsets, window, order=2):
    """Cyclic Savitzky-Golay smoothing of every outline at once.

    Each outline is extended by ``window // 2`` vertices wrapped from its
    other end, the whole end-to-end array is convolved once per
    coordinate, and the valid part of each outline is taken back; outlines
    with no more vertices than the window are left as they are.
    """
    if window % 2 == 0 or window <= order:
        raise ValueError(f"contour window must be odd and greater than {order}, got {window}")
    coef = savgol_smoothing_coefficients(window, order)  # as scipy.signal's, without its 0.7 s import
    h = window // 2
    counts = np.diff(offsets)
    n = len(counts)
    ext_counts = counts + 2 * h
    ext_off = np.zeros(n + 1, dtype=np.intp)
    np.cumsum(ext_counts, out=ext_off[1:])
    gid = np.repeat(np.arange(n), ext_counts)
    local = np.arange(int(ext_off[-1])) - ext_off[:-1][gid] - h
    src = offsets[:-1][gid] + local % np.maximum(counts[gid], 1)
    ext = xy[np.minimum(src, max(len(xy) - 1, 0))]
    out = xy.copy()
    if len(ext) < window:
        return out
    conv = np.stack([np.convolve(ext[:, j], coef[::-1], mode="valid") for j in range(2)], axis=1)
    # conv[i] is the window centred on ext[i + h]
    centre = np.arange(len(xy)) - offsets[:-1][np.repeat(np.arange(n), counts)]
    pos = ext_off[:-1][np.repeat(np.arange(n), counts)] + centre
    smooth = np.repeat(counts > window, counts)
    out[smooth] = conv[pos[smooth]]
    return out


def grain_contours(labels, n_labels=None, window=9):
    """Sub-pixel outer outline of every label, as a list.

    Parameters
    ----------
    labels : ndarray of int, shape (rows, cols)
        0 background, 1..n grains.
    n_labels : int, optional
        n (default ``labels.max()``).
    window : int
        Smoothing window in vertices; 0 or 1 keeps the raw contour.

    Returns
    -------
    list of ndarray, shape (m_i, 2)
        Outline of label i + 1 as (x, y) in pixel units (pixel centres at
        index + 0.5), positive signed area, first vertex not repeated;
        empty (0, 2) for an absent label. See :func:`trace_outlines`.
    """
    return trace_outlines(labels, n_labels, window).as_list()


def _segment_reduce(values, offsets, op):
    """``op.reduceat`` over consecutive groups; NaN for empty groups."""
    n = len(offsets) - 1
    out = np.full(n, np.nan)
    nonempty = np.diff(offsets) > 0
    if len(values) and np.any(nonempty):
        out[nonempty] = op.reduceat(values, offsets[:-1][nonempty])
    return out


def feret_diameters(hull_xy, hull_offsets):
    """Largest and smallest caliper diameters of convex polygons, all at once.

    Parameters
    ----------
    hull_xy : ndarray, shape (K, 2)
        Vertices of all hulls end to end, each hull counter-clockwise in
        x-right, y-up sense (as ``scipy.spatial.ConvexHull`` gives them),
        without repeated or collinear vertices.
    hull_offsets : ndarray of int, shape (n + 1,)
        Hull i is ``hull_xy[hull_offsets[i]:hull_offsets[i + 1]]``.

    Returns
    -------
    fmax, fmin : ndarray, shape (n,)
        In the hulls' unit; NaN for an empty hull; a single point gives 0
        and 0, a segment its length and 0.

    Notes
    -----
    Rotating calipers [3]_ (module notes), vectorised over all hulls. The
    outward edge normals of a convex polygon turn monotonically, so the
    vertex touching a caliper of any direction is found by a binary search
    among the normal angles. For each edge j with outward normal n_j, s(j)
    is the vertex touching the opposite caliper; the width across edge j
    is (v_j - v_s(j)) . n_j and x_Fmin = min_j of it (the narrowest
    caliper lies flush with an edge); x_Fmax is the largest of
    |v_j - v_s(j)| and |v_j+1 - v_s(j)|, which covers every antipodal pair.
    """
    hull_xy = np.asarray(hull_xy, dtype=np.float64)
    off = np.asarray(hull_offsets, dtype=np.intp)
    n = len(off) - 1
    k = np.diff(off)
    fmax = np.full(n, np.nan)
    fmin = np.full(n, np.nan)
    fmax[k == 1] = 0.0
    fmin[k == 1] = 0.0
    two = np.flatnonzero(k == 2)
    if len(two):
        d = hull_xy[off[two] + 1] - hull_xy[off[two]]
        fmax[two] = np.hypot(d[:, 0], d[:, 1])
        fmin[two] = 0.0
    poly = k >= 3
    if not np.any(poly):
        return fmax, fmin
    gsel = np.flatnonzero(poly)
    # gather the polygons (k >= 3) end to end
    kk = k[gsel]
    sub_off = np.zeros(len(gsel) + 1, dtype=np.intp)
    np.cumsum(kk, out=sub_off[1:])
    gid = np.repeat(np.arange(len(gsel)), kk)
    local = np.arange(sub_off[-1]) - sub_off[:-1][gid]
    v = hull_xy[off[gsel][gid] + local]
    nxt = sub_off[:-1][gid] + (local + 1) % kk[gid]
    e = v[nxt] - v
    elen = np.hypot(e[:, 0], e[:, 1])
    normal = np.stack([e[:, 1], -e[:, 0]], axis=1) / elen[:, None]
    ang = np.arctan2(normal[:, 1], normal[:, 0])
    # cumulative normal angle from the hull's first edge, monotone by construction
    prev = sub_off[:-1][gid] + (local - 1) % kk[gid]
    turn = np.mod(ang - ang[prev], 2.0 * np.pi)
    turn[local == 0] = 0.0
    cum = np.cumsum(turn)
    cum -= cum[sub_off[:-1]][gid]
    key = gid * 8.0 + cum
    query = gid * 8.0 + np.mod(cum + np.pi, 2.0 * np.pi)
    hit = np.searchsorted(key, query, side="left")
    s_local = (hit - sub_off[:-1][gid]) % kk[gid]
    s = sub_off[:-1][gid] + s_local
    width = ((v - v[s]) * normal).sum(axis=1)
    d1 = np.hypot(*(v - v[s]).T)
    d2 = np.hypot(*(v[nxt] - v[s]).T)
    fmin[gsel] = _segment_reduce(width, sub_off, np.minimum)
    fmax[gsel] = _segment_reduce(np.maximum(d1, d2), sub_off, np.maximum)
    return fmax, fmin


def _hull(xy):
    """Convex hull vertices of points (qhull), counter-clockwise, no collinear ones."""
    if len(xy) < 3:
        return np.unique(xy, axis=0)
    try:
        return xy[ConvexHull(xy).vertices]
    except (QhullError, ValueError):
        # all points on a line: the hull is the segment between its ends
        a = xy[int(np.argmax(((xy - xy[0]) ** 2).sum(axis=1)))]
        b = xy[int(np.argmax(((xy - a) ** 2).sum(axis=1)))]
        return np.array([a, b]) if np.any(a != b) else xy[:1]


def _cyclic_neighbours(offsets):
    """Indices of the previous and next vertex within each stored polygon."""
    counts = np.diff(offsets)
    n_pts = int(offsets[-1])
    gid = np.repeat(np.arange(len(counts)), counts)
    local = np.arange(n_pts) - offsets[:-1][gid]
    start = offsets[:-1][gid]
    size = np.maximum(counts[gid], 1)
    return gid, start + (local - 1) % size, start + (local + 1) % size


def convex_hulls(xy, offsets, max_passes=200):
    """Convex hulls of many simple closed polygons at once.

    Parameters
    ----------
    xy : ndarray, shape (N, 2)
        Vertices of all polygons end to end, each a simple closed polygon in
        order with positive signed area (as :func:`trace_outlines` gives).
    offsets : ndarray of int, shape (n + 1,)
        Polygon i is ``xy[offsets[i]:offsets[i + 1]]``.
    max_passes : int
        Passes of vertex removal before a polygon is handed to qhull.

    Returns
    -------
    hull_xy : ndarray, shape (K, 2)
    hull_offsets : ndarray of intp, shape (n + 1,)
        Hull vertices end to end, counter-clockwise in x-right, y-up sense,
        without collinear vertices.

    Notes
    -----
    Every pass removes, in all polygons at once, the vertices where the
    polygon does not turn left (cross product of the incoming and outgoing
    edge <= 0), until none is left. The result is then proved to be the
    hull: a polygon whose turns are all left and add up to one full turn
    is convex, and a convex polygon with vertices from the point set that
    contains every point of the set is its convex hull. Containment is
    tested for every original vertex by a binary search over the fan of
    the hull from its first vertex. Polygons that fail the proof (deep,
    winding concavities) or do not settle within ``max_passes`` are handed
    to ``scipy.spatial.ConvexHull``, as are polygons with fewer than 3
    vertices.
    """
    xy = np.asarray(xy, dtype=np.float64)
    offsets = np.asarray(offsets, dtype=np.intp)
    n = len(offsets) - 1
    counts = np.diff(offsets)
    gid0 = np.repeat(np.arange(n), counts)
    scale = float(np.abs(xy).max()) if len(xy) else 1.0
    eps = 1e-12 * max(scale, 1.0) ** 2
    cur, cur_gid = xy, gid0
    cur_off = offsets.copy()
    settled = False
    for _ in range(max_passes):
        # drop vertices that repeat their (cyclic) predecessor: a zero-length
        # edge hides the turn; a polygon of one repeated point keeps one
        _, prv, _ = _cyclic_neighbours(cur_off)
        distinct = np.any(cur != cur[prv], axis=1)
        lone = np.bincount(cur_gid[distinct], minlength=n) == 0
        starts = cur_off[:-1][lone & (np.diff(cur_off) > 0)]
        distinct[starts] = True
        if not np.all(distinct):
            cur, cur_gid = cur[distinct], cur_gid[distinct]
            cur_off = np.zeros(n + 1, dtype=np.intp)
            np.cumsum(np.bincount(cur_gid, minlength=n), out=cur_off[1:])
        _, prv, nxt = _cyclic_neighbours(cur_off)
        a = cur - cur[prv]
        b = cur[nxt] - cur
        cross = a[:, 0] * b[:, 1] - a[:, 1] * b[:, 0]
        drop = cross <= eps
        # never thin a polygon below 3 vertices here (degenerate ones go to qhull)
        left = np.bincount(cur_gid[~drop], minlength=n)
        drop &= left[cur_gid] >= 3
        if not np.any(drop):
            settled = True
            break
        keep = ~drop
        cur, cur_gid = cur[keep], cur_gid[keep]
        cur_off = np.zeros(n + 1, dtype=np.intp)
        np.cumsum(np.bincount(cur_gid, minlength=n), out=cur_off[1:])
    hk = np.diff(cur_off)
    good = hk >= 3
    if not settled:
        _, prv, nxt = _cyclic_neighbours(cur_off)
        a = cur - cur[prv]
        b = cur[nxt] - cur
        bad = (a[:, 0] * b[:, 1] - a[:, 1] * b[:, 0]) <= eps
        good &= np.bincount(cur_gid[bad], minlength=n) == 0
    good &= _turns_once(cur, cur_off)
    good &= _contains_all(cur, cur_off, xy, offsets, eps)
    # proven hulls as they are; the rest (usually none or a few) from qhull
    sel = good[cur_gid]
    parts, gids = [cur[sel]], [cur_gid[sel]]
    for i in np.flatnonzero(~good):
        h = _hull(xy[offsets[i]:offsets[i + 1]])
        parts.append(h.reshape(-1, 2))
        gids.append(np.full(len(h), i, dtype=cur_gid.dtype))
    h_xy, h_gid = np.concatenate(parts), np.concatenate(gids)
    order = np.argsort(h_gid, kind="stable")
    h_off = np.zeros(n + 1, dtype=np.intp)
    np.cumsum(np.bincount(h_gid, minlength=n), out=h_off[1:])
    return h_xy[order].reshape(-1, 2), h_off


def _turns_once(poly, off):
    """True where the polygon's exterior angles add up to one full turn."""
    n = len(off) - 1
    if len(poly) == 0:
        return np.zeros(n, dtype=bool)
    gid, prv, nxt = _cyclic_neighbours(off)
    a = poly - poly[prv]
    b = poly[nxt] - poly
    ang = np.arctan2(a[:, 0] * b[:, 1] - a[:, 1] * b[:, 0], (a * b).sum(axis=1))
    total = np.bincount(gid, ang, minlength=n)
    return np.abs(total - 2.0 * np.pi) < 1e-6


def _contains_all(hull, h_off, pts, p_off, eps):
    """True where every point of set i lies in convex polygon i (fan search)."""
    n = len(h_off) - 1
    hk = np.diff(h_off)
    ok = hk >= 3
    if len(pts) == 0 or not np.any(ok):
        return ok
    hg = np.repeat(np.arange(n), hk)
    first = hull[h_off[:-1][ok]]
    h0 = np.zeros((n, 2))
    h0[ok] = first
    h1 = np.zeros((n, 2))
    h1[ok] = hull[h_off[:-1][ok] + 1]
    base = np.arctan2(h1[:, 1] - h0[:, 1], h1[:, 0] - h0[:, 0])
    rel = hull - h0[hg]
    theta = np.mod(np.arctan2(rel[:, 1], rel[:, 0]) - base[hg] + np.pi, 2 * np.pi) - np.pi
    local = np.arange(len(hull)) - h_off[:-1][hg]
    theta[local == 0] = 0.0
    key = hg * 8.0 + theta + 4.0
    pg = np.repeat(np.arange(n), np.diff(p_off))
    prel = pts - h0[pg]
    at_h0 = (np.abs(prel) <= 1e-12 * max(1.0, float(np.abs(pts).max()))).all(axis=1)
    pth = np.mod(np.arctan2(prel[:, 1], prel[:, 0]) - base[pg] + np.pi, 2 * np.pi) - np.pi
    # wedge j: between rays h0->h_j and h0->h_j+1, j = 1..k-2
    last = h_off[1:] - 1
    j = np.searchsorted(key, pg * 8.0 + pth + 4.0, side="left") - 1
    lo = h_off[:-1][pg] + 1
    hi = last[pg] - 1
    j = np.clip(np.clip(j, lo, np.maximum(hi, lo)), 0, len(hull) - 1)
    va, vb = hull[j], hull[np.minimum(j + 1, len(hull) - 1)]
    e = vb - va
    q = pts - va
    inside = (e[:, 0] * q[:, 1] - e[:, 1] * q[:, 0]) >= -1e-9 * max(1.0, float(np.abs(pts).max()))
    # outside the fan's angular range
    span = theta[last[pg]]
    tol = 1e-12
    inside &= (pth >= -tol) & (pth <= span + tol)
    inside |= at_h0
    inside |= ~ok[pg]
    return ok & (np.bincount(pg[~inside], minlength=n) == 0)


def _lattice_points_in_hulls(h_xy, h_off):
    """Pixel centres inside or on each convex hull of pixel centres (Pick).

    Notes
    -----
    For a polygon with vertices on the pixel-centre lattice, Pick's theorem
    A = I + B/2 - 1 gives the count I + B = A + B/2 + 1, with B the lattice
    points on the boundary, sum of gcd(|dx|, |dy|) over the edges. It holds
    for a segment (A = 0, each edge counted both ways) and a point too.
    """
    n = len(h_off) - 1
    counts = np.diff(h_off)
    out = np.full(n, np.nan)
    if len(h_xy) == 0:
        return out
    gid, _, nxt = _cyclic_neighbours(h_off)
    q = np.rint(h_xy - 0.5).astype(np.int64)
    d = np.abs(q[nxt] - q)
    b = np.bincount(gid, np.gcd(d[:, 0], d[:, 1]), minlength=n)
    area, _ = _polygon_area_perimeter(h_xy, h_off)
    area = np.where(counts >= 3, area, 0.0)
    out[counts > 0] = (area + b / 2.0 + 1.0)[counts > 0]
    return out


def _polygon_area_perimeter(xy, offsets):
    """Shoelace area and perimeter of polygons stored end to end."""
    n = len(offsets) - 1
    counts = np.diff(offsets)
    if len(xy) == 0:
        return np.full(n, np.nan), np.full(n, np.nan)
    gid = np.repeat(np.arange(n), counts)
    nxt = np.arange(len(xy)) + 1
    nxt[offsets[1:][counts > 0] - 1] = offsets[:-1][counts > 0]
    d = xy[nxt] - xy
    per = np.bincount(gid, np.hypot(d[:, 0], d[:, 1]), minlength=n)
    area = 0.5 * np.abs(np.bincount(gid, xy[:, 0] * xy[nxt, 1] - xy[nxt, 0] * xy[:, 1], minlength=n))
    empty = counts == 0
    per[empty] = np.nan
    area[empty] = np.nan
    return area, per


def measure_labels(labels, image=None, pixel_size_nm=1.0, contour_window=9):
    """All scalar size and shape descriptors of every label, vectorised.

    Parameters
    ----------
    labels : ndarray of int, shape (rows, cols)
        0 background, 1..n grains (n = ``labels.max()``).
    image : ndarray of float, shape (rows, cols), optional
        Intensities for ``intensity_mean``/``intensity_std`` (NaN without).
    pixel_size_nm : float
        Pixel side in nm.
    contour_window : int
        Outline smoothing window in vertices (see :func:`grain_contours`).

    Returns
    -------
    columns : dict of str -> ndarray, shape (n,)
        The columns of the module notes except ``n_corners`` and
        ``edge_ratio``, row i for label i + 1, lengths in nm.
    contours : list of ndarray, shape (m_i, 2)
        The outlines in pixel units (for the polygon fit).

    Notes
    -----
    Area, centroid, moments and intensities come from ``np.bincount`` over
    all pixels; the outlines of all grains are traced together
    (:func:`trace_outlines`), their lengths and areas summed with
    ``np.bincount``, and the Feret diameters found for all hulls at once
    (:func:`feret_diameters`) of hulls found together
    (:func:`convex_hulls`).
    """
    lab = _check_labels(labels, image, pixel_size_nm)
    px = float(pixel_size_nm)
    n = int(lab.max()) if lab.size else 0
    mom = label_moments(lab, image, n)
    outl = trace_outlines(lab, n, contour_window)
    xy, off = outl.xy, outl.offsets
    # enclosed area and perimeter of the (smoothed) outlines, all at once
    out_a, perim = _polygon_area_perimeter(xy, off)
    # convex hulls and calipers of all unsmoothed outlines at once (the hull
    # bridges the staircase; smoothing would only blunt sharp corners)
    h_xy, h_off = convex_hulls(outl.raw_xy, off)
    fmax, fmin = feret_diameters(h_xy, h_off)
    _, conv_p = _polygon_area_perimeter(h_xy, h_off)
    hull_pixels = _lattice_points_in_hulls(*convex_hulls(outl.pixel_xy, off))
    contours = outl.as_list()
    major, minor, theta = ellipse_axes(mom["mxx"], mom["myy"], mom["mxy"])
    area = mom["area"]
    absent = area == 0
    with np.errstate(invalid="ignore", divide="ignore"):
        cols = {
            "centroid_x_nm": mom["cx"] * px,
            "centroid_y_nm": mom["cy"] * px,
            "area_nm2": area * px * px,
            "ecd_nm": np.sqrt(4.0 * area / np.pi) * px,
            "perimeter_nm": perim * px,
            "convex_area_nm2": hull_pixels * px * px,
            "convex_perimeter_nm": conv_p * px,
            "feret_max_nm": fmax * px,
            "feret_min_nm": fmin * px,
            "feret_ratio": np.where(fmax > 0, fmin / fmax, np.nan),
            "circularity": np.where(perim > 0, 4.0 * np.pi * out_a / perim**2, np.nan),
            "solidity": np.where(hull_pixels > 0, area / hull_pixels, np.nan),
            "convexity": np.where(perim > 0, np.minimum(conv_p / perim, 1.0), np.nan),
            "orientation_deg": np.where(absent, np.nan, theta),
            "ellipse_major_nm": np.where(absent, np.nan, major * px),
            "ellipse_minor_nm": np.where(absent, np.nan, minor * px),
            "elongation": np.where(absent | (major <= 0), np.nan, 1.0 - minor / major),
            "intensity_mean": mom.get("mean", np.full(n, np.nan)),
            "intensity_std": mom.get("std", np.full(n, np.nan)),
        }
    cols["ecd_nm"] = np.where(absent, np.nan, cols["ecd_nm"])
    return {k: np.asarray(v, dtype=np.float64) for k, v in cols.items()}, contours


def fit_outlines(contours, ecd_px, params=None):
    """Fit the corner polygon of each outline.

    Parameters
    ----------
    contours : list of ndarray, shape (m_i, 2)
        Outlines in pixel units (from :func:`grain_contours`).
    ecd_px : ndarray, shape (n,)
        ECD of each grain in pixels (the size the tolerances scale with).
    params : dict, optional
        ``corner_tolerance``, ``min_tolerance_px``, ``min_corner_angle_deg``,
        ``min_edge_fraction``, ``corner_rounding_px`` (defaults of
        :data:`STEP`).

    Returns
    -------
    polygons : list of ndarray, shape (k_i, 2)
        In pixel units; (0, 2) for an absent label.
    n_corners : ndarray of int64, shape (n,)
    ratios : ndarray of float64, shape (n,)
        :func:`plugins.outline.edge_ratio` (NaN below 3 corners).
    """
    p = STEP.defaults()
    p.update(params or {})
    n = len(contours)
    ecd_px = np.asarray(ecd_px, dtype=np.float64)
    ok = np.array([len(c) > 0 for c in contours], dtype=bool) & np.isfinite(ecd_px) & (ecd_px > 0)
    sel = np.flatnonzero(ok)
    fitted = fit_polygons(
        [contours[i] for i in sel], ecd_px[sel],
        rel_tolerance=p["corner_tolerance"],
        merge_angle_deg=p["min_corner_angle_deg"],
        min_edge_fraction=p["min_edge_fraction"],
        min_tolerance=p["min_tolerance_px"],
        corner_rounding=p["corner_rounding_px"],
    )
    polys = [np.empty((0, 2)) for _ in range(n)]
    ncorn = np.zeros(n, dtype=np.int64)
    ratios = np.full(n, np.nan)
    for i, poly in zip(sel, fitted):
        polys[i] = poly
        ncorn[i] = len(poly)
        ratios[i] = edge_ratio(poly)
    return polys, ncorn, ratios


@hookimpl
def grainhabit_measure(frame, params):
    """Measure every labelled grain of ``frame`` (see the module notes).

    Parameters
    ----------
    frame : FrameData
        With ``labels`` (int, 0 background, 1..n) and the segment columns
        ``label``, ``split``, ``edge_cut`` (kept as they are).
    params : dict
        Resolved parameters of :data:`STEP`.

    Returns
    -------
    FrameData
        With the columns of :data:`COLUMNS`, rows in the order of
        ``frame.grains["label"]``, and ``outlines`` (one (k, 2) polygon of
        (x_nm, y_nm) vertices per grain).

    Raises
    ------
    ValueError
        If ``labels`` is missing or the ``label`` column names labels absent
        from the label image.
    """
    p = STEP.resolve(params)
    if frame.labels is None:
        raise ValueError("measure-grains needs frame.labels (run a segment step first)")
    lab = _check_labels(frame.labels, None, frame.pixel_size_nm)
    n = int(lab.max()) if lab.size else 0
    if "label" in frame.grains:
        order = np.asarray(frame.grains["label"]).astype(np.int64)
    else:
        order = np.arange(1, n + 1, dtype=np.int64)
        frame = frame.with_columns(label=order)
    if len(order) and (order.min() < 1 or order.max() > n):
        raise ValueError(
            f"label column holds labels outside 1..{n} (min {order.min()}, max {order.max()})")
    image = frame.image if frame.image is not None else frame.raw
    if image is not None and np.shape(image) != lab.shape:
        image = None
    cols, contours = measure_labels(lab, image, frame.pixel_size_nm, p["contour_window"])
    rows = order - 1
    px = float(frame.pixel_size_nm)
    ecd_px = cols["ecd_nm"] / px
    sel_contours = [contours[r] for r in rows]
    polys, ncorn, ratios = fit_outlines(sel_contours, ecd_px[rows], p)
    out = {k: v[rows] for k, v in cols.items()}
    out["n_corners"] = ncorn
    out["edge_ratio"] = ratios
    outlines = tuple(np.asarray(poly, dtype=np.float64) * px for poly in polys)
    return frame.with_columns(**out).replace(outlines=outlines)
