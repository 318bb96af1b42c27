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
  ``contour_window`` vertices (:func:`grainhabit.plugins.measure.outline.smooth_closed_contour`):
  perimeter, form factor, circularity and the corner polygon are taken from it. The raw
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
``form_factor``
    4 pi A_o / P^2 (the ISO 9276-6 form factor), with A_o the area enclosed
    by the smoothed outline (1 for a disc, pi/4 for a square, pi sqrt(3)/9
    for an equilateral triangle, pi sqrt(3)/6 for a regular hexagon). A_o
    differs from ``area_nm2`` by about half a pixel (the outline cuts the
    corners of the pixels it passes); using it keeps tiny grains in [0, 1].
``circularity``
    sqrt(form_factor), the ISO 9276-6 circularity (the standard's
    definitions as we recall them, from memory: no copy at hand): 1 for a
    disc, sqrt(pi)/2 for a square.
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
    (:func:`grainhabit.plugins.measure.outline.fit_polygon`, :func:`grainhabit.plugins.measure.outline.edge_ratio`).

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

from grainhabit import hookimpl
from grainhabit.params import Column, Param, StepInfo

from grainhabit.plugins.common.contours import check_labels, trace_outlines
from grainhabit.plugins.measure.convex import convex_hulls, feret_diameters, lattice_points_in_hulls, polygon_area_perimeter
from grainhabit.plugins.measure.outline import edge_ratio, fit_polygons

GRAINHABIT_API = 1

STEP = StepInfo(
    name="measure-grains",
    stage="measure",
    version="1.1",
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
    "form_factor": ("1", "form factor 4 pi A / P^2 (ISO 9276-6)"),
    "circularity": ("1", "circularity sqrt(4 pi A / P^2) (ISO 9276-6)"),
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
    lab = check_labels(labels, image)
    n = int(lab.max()) if n_labels is None else int(n_labels)
    flat = lab.ravel()
    size = n + 1
    runs = None
    if lab.size and max(lab.shape) ** 2 * lab.size < _EXACT_INTEGER_SUM:
        # every coordinate sum is an integer below 2**53, so float64 holds each partial sum exactly
        # and any order of summation gives the same number: sums over the rows' runs of one label
        runs = _label_runs(lab)
        s1, sx, sy, sxx, syy, sxy = _run_coordinate_sums(lab, size, runs)
    else:
        fg = np.flatnonzero(flat != 0)
        ids = flat[fg].astype(np.intp)
        rows, cols = np.divmod(fg, lab.shape[1])
        x = cols.astype(np.float64)
        y = rows.astype(np.float64)
        s1, sx, sy, sxx, syy, sxy = (np.bincount(ids, w, size)[1:size] for w in (None, x, y, x * x, y * y, x * y))
    area = s1.astype(np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        inv = 1.0 / area
        mx, my = sx * inv, sy * inv
        # raw second moments minus squared means: coordinates are below 1e5
        # px, so float64 keeps the variances to about 1e-6 px^2
        mxx = sxx * inv - mx * mx + 1.0 / 12.0
        myy = syy * inv - my * my + 1.0 / 12.0
        mxy = sxy * inv - mx * my
        out = {"area": area, "cx": mx + 0.5, "cy": my + 0.5, "mxx": mxx, "myy": myy, "mxy": mxy}
        if image is not None:
            if runs is not None:
                fg, ids = _run_pixels(runs)  # the grain pixels in raster order, from the runs found above
            else:
                fg = np.flatnonzero(flat != 0)  # numpy finds them about 3x faster in a bool array
                ids = flat[fg].astype(np.intp)

            def total(w=None):
                return np.bincount(ids, w, size)[1:size]

            vals = np.asarray(image).ravel()[fg].astype(np.float64)
            mean = total(vals) * inv
            dv = vals - np.concatenate([[0.0], mean])[ids]
            out["mean"] = mean
            out["std"] = np.sqrt(total(dv * dv) * inv)
    return out


#: 2**53: integers below it are exact in float64 (coordinate sums of a frame stay below it when
#: max(rows, cols)**2 * rows * cols does).
_EXACT_INTEGER_SUM = 2 ** 53


def _label_runs(lab):
    """Runs of one non-zero label along the rows, in raster order.

    Parameters
    ----------
    lab : ndarray of int, shape (rows, cols)

    Returns
    -------
    starts : ndarray of int64
        Flat index of each run's first pixel (ascending).
    length : ndarray of int64
        Pixels in each run.
    run_lab : ndarray of intp
        The label of each run (never 0).
    """
    change = np.empty(lab.shape, bool)
    change[:, 0] = True
    np.not_equal(lab[:, 1:], lab[:, :-1], out=change[:, 1:])
    starts = np.flatnonzero(change)                      # every row starts a run, so a run ends at the next start
    length = np.diff(starts, append=lab.size)
    run_lab = lab.ravel()[starts]
    keep = run_lab != 0
    return starts[keep], length[keep], run_lab[keep].astype(np.intp)


def _run_pixels(runs):
    """Flat indices and labels of every pixel of the runs, in raster order.

    The same arrays as ``fg = np.flatnonzero(lab.ravel() != 0)`` and
    ``lab.ravel()[fg]`` (as intp), built from the runs of
    :func:`_label_runs` without a pass over the whole frame.
    """
    starts, length, run_lab = runs
    first = np.cumsum(length) - length                   # where each run's pixels begin among all grain pixels
    fg = np.arange(int(length.sum()), dtype=np.intp) + np.repeat(starts - first, length)
    return fg, np.repeat(run_lab, length)


def _run_coordinate_sums(lab, size, runs=None):
    """Per-label sums of 1, x, y, x^2, y^2 and x y over the pixels (x column, y row index), from row runs.

    Parameters
    ----------
    lab : ndarray of int, shape (rows, cols)
    size : int
        n + 1 (labels 1..n; larger labels are not allowed).
    runs : tuple, optional
        :func:`_label_runs` of ``lab`` (found here if not given).

    Returns
    -------
    tuple of ndarray, shape (n,)
        Pixel counts (int) and the five coordinate sums (float64) of labels 1..n.

    Notes
    -----
    A run of label L in row y over columns c0 .. c1 - 1 (length l) adds l, l c0 + l (l - 1) / 2,
    y l, S(c1 - 1) - S(c0 - 1) with S(k) = k (k + 1) (2 k + 1) / 6, y^2 l and y times its x sum,
    all integers (int64). The caller uses this only where every sum stays below 2**53, so the
    float64 totals equal the per-pixel sums in raster order (``np.bincount`` of x, y, x x, ...)
    bit for bit: no partial sum is ever rounded.
    """
    rows_n, cols_n = lab.shape
    starts, length, run_lab = _label_runs(lab) if runs is None else runs
    y, c0 = np.divmod(starts, cols_n)
    c1 = c0 + length - 1                                 # last column of the run
    sx = length * c0 + (length * (length - 1)) // 2
    sxx = (c1 * (c1 + 1) * (2 * c1 + 1) - (c0 - 1) * c0 * (2 * c0 - 1)) // 6

    def per_label(w=None):
        return np.bincount(run_lab, None if w is None else w.astype(np.float64), size)[1:size]

    s1 = np.bincount(run_lab, length, size)[1:size].astype(np.int64)
    return s1, per_label(sx), per_label(y * length), per_label(sxx), per_label(y * y * length), per_label(y * sx)


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
    lab = check_labels(labels, image, pixel_size_nm)
    px = float(pixel_size_nm)
    n = int(lab.max()) if lab.size else 0
    mom = label_moments(lab, image, n)
    outl = trace_outlines(lab, n, contour_window)
    xy, off = outl.xy, outl.offsets
    # enclosed area and perimeter of the (smoothed) outlines, all at once
    out_a, perim = polygon_area_perimeter(xy, off)
    # convex hulls and calipers of all unsmoothed outlines at once (the hull
    # bridges the staircase; smoothing would only blunt sharp corners)
    h_xy, h_off = convex_hulls(outl.raw_xy, off)
    fmax, fmin = feret_diameters(h_xy, h_off)
    _, conv_p = polygon_area_perimeter(h_xy, h_off)
    hull_pixels = lattice_points_in_hulls(*convex_hulls(outl.pixel_xy, off))
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
            "form_factor": np.where(perim > 0, 4.0 * np.pi * out_a / perim**2, np.nan),
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
    cols["circularity"] = np.sqrt(cols["form_factor"])
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
        :func:`grainhabit.plugins.measure.outline.edge_ratio` (NaN below 3 corners).
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
    lab = check_labels(frame.labels, None, frame.pixel_size_nm)
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
