"""Benchmark ``grainhabit bench measure``: grain measurement vs scikit-image.

Times :func:`grainhabit.plugins.measure.measure_grains.measure_labels` (all scalar descriptors of the
``measure-grains`` step except the corner polygon) against
``skimage.measure.regionprops_table`` computing the corresponding
quantities on the same invented label image, and reports how well the two
agree. The polygon fit is timed separately for information.

The label image is invented test material: seeded random convex polygons
(3 to 8 corners), discs and ellipses of ECD 20-80 px on a jittered grid, with
a noisy "bright grain" intensity image.
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from grainhabit import hookimpl

GRAINHABIT_API = 1
#: The name this plugin is registered under.
NAME = "bench-measure"

#: regionprops properties timed against our scalar measurement.
REGIONPROPS_PROPERTIES = (
    "label", "area", "centroid", "perimeter", "feret_diameter_max", "area_convex",
    "solidity", "axis_major_length", "axis_minor_length", "orientation",
    "intensity_mean", "intensity_std",
)


def make_label_image(n_grains=500, seed=0, ecd_range=(20.0, 80.0)):
    """Invented label image of separate convex grains, for tests and benchmarks.

    Parameters
    ----------
    n_grains : int
        Number of grains (one per cell of a square grid, row by row).
    seed : int
        Seed of ``numpy.random.default_rng``.
    ecd_range : (float, float)
        Range of the grains' nominal ECD in pixels.

    Returns
    -------
    labels : ndarray of int32, shape (rows, cols)
        0 background, 1..n_grains.
    image : ndarray of float32, shape (rows, cols)
        Grains near 0.8, background near 0.1, Gaussian noise (sd 0.05).
    """
    from skimage.draw import ellipse, polygon

    if n_grains < 0:
        raise ValueError(f"n_grains must be >= 0, got {n_grains}")
    lo, hi = ecd_range
    if not 0 < lo <= hi:
        raise ValueError(f"ecd_range must satisfy 0 < low <= high, got {ecd_range}")
    rng = np.random.default_rng(seed)
    per_row = max(int(np.ceil(np.sqrt(n_grains))), 1)
    cell = int(np.ceil(hi * 1.25)) + 8
    shape = (cell * int(np.ceil(n_grains / per_row)) if n_grains else cell, cell * per_row)
    labels = np.zeros(shape, dtype=np.int32)
    for g in range(n_grains):
        r0, c0 = divmod(g, per_row)
        ecd = rng.uniform(lo, hi)
        radius = ecd / 2.0
        slack = cell / 2.0 - hi * 0.65
        cy = (r0 + 0.5) * cell + rng.uniform(-slack, slack)
        cx = (c0 + 0.5) * cell + rng.uniform(-slack, slack)
        kind = rng.integers(0, 3)
        if kind == 0:
            rr, cc = ellipse(cy, cx, radius, radius, shape=shape)
        elif kind == 1:
            a = radius * rng.uniform(1.0, 1.3)
            rr, cc = ellipse(cy, cx, radius * radius / a, a, shape=shape,
                             rotation=rng.uniform(0, np.pi))
        else:
            k = int(rng.integers(3, 9))
            ang = np.linspace(0, 2 * np.pi, k, endpoint=False) + rng.uniform(0, 2 * np.pi)
            ang += rng.uniform(-0.3, 0.3, k) * np.pi / k
            rad = radius * 1.15 * rng.uniform(0.85, 1.0, k)
            rr, cc = polygon(cy + rad * np.sin(ang), cx + rad * np.cos(ang), shape=shape)
        labels[rr, cc] = g + 1
    image = np.where(labels > 0, 0.8, 0.1) + rng.normal(0.0, 0.05, shape)
    return labels, image.astype(np.float32)


def compare_with_regionprops(labels, image, cols):
    """Differences between our columns (pixel size 1) and regionprops.

    Parameters
    ----------
    labels, image : ndarray, shape (rows, cols)
    cols : dict of str -> ndarray
        From ``measure_labels(labels, image, pixel_size_nm=1.0)``.

    Returns
    -------
    dict of str -> float
        Largest absolute differences: ``area_px2``, ``centroid_px``,
        ``feret_max_px``, ``major_axis_px``, ``orientation_deg`` (grains with
        minor/major < 0.9 only), ``intensity_mean``, ``solidity``; and the
        median relative perimeter difference ``perimeter_rel_median``.
    """
    from skimage.measure import regionprops_table

    rp = regionprops_table(labels, image, properties=REGIONPROPS_PROPERTIES)
    return _agreement(rp, cols)


def _agreement(rp, cols):
    cx = rp["centroid-1"] + 0.5
    cy = rp["centroid-0"] + 0.5
    ours_theta = np.asarray(cols["orientation_deg"])
    rp_theta = -(90.0 + np.degrees(rp["orientation"]))
    dtheta = np.abs((ours_theta - rp_theta + 90.0) % 180.0 - 90.0)
    elongated = rp["axis_minor_length"] < 0.9 * rp["axis_major_length"]
    return {
        "area_px2": float(np.max(np.abs(cols["area_nm2"] - rp["area"]), initial=0.0)),
        "centroid_px": float(np.max(np.hypot(cols["centroid_x_nm"] - cx,
                                             cols["centroid_y_nm"] - cy), initial=0.0)),
        "feret_max_px": float(np.max(np.abs(cols["feret_max_nm"] - rp["feret_diameter_max"]),
                                     initial=0.0)),
        "major_axis_px": float(np.max(np.abs(cols["ellipse_major_nm"] - rp["axis_major_length"]),
                                      initial=0.0)),
        "orientation_deg": float(np.max(dtheta[elongated], initial=0.0)),
        "intensity_mean": float(np.max(np.abs(cols["intensity_mean"] - rp["intensity_mean"]),
                                       initial=0.0)),
        "solidity": float(np.max(np.abs(cols["solidity"] - rp["solidity"]), initial=0.0)),
        "perimeter_rel_median": float(np.median(
            cols["perimeter_nm"][rp["perimeter"] > 0] / rp["perimeter"][rp["perimeter"] > 0] - 1.0))
        if np.any(rp["perimeter"] > 0) else 0.0,
    }


def run(argv: list[str]) -> int:
    """Run the benchmark; print times, their ratio and the agreement.

    Parameters
    ----------
    argv : list of str
        Command-line arguments after ``grainhabit bench measure``.

    Returns
    -------
    int
        0, or 1 if the agreement targets (area exact, centroid within
        0.01 px, Feret within 1 px) are missed.
    """
    from skimage.measure import regionprops_table

    from grainhabit.plugins.measure.measure_grains import STEP, fit_outlines, measure_labels

    parser = argparse.ArgumentParser(
        prog="grainhabit bench measure",
        description="Time grain measurement against skimage.measure.regionprops_table "
                    "on an invented label image.")
    parser.add_argument("--grains", type=int, default=500, help="number of grains (default 500)")
    parser.add_argument("--repeat", type=int, default=3, help="timed runs of each, best kept (default 3)")
    parser.add_argument("--seed", type=int, default=0, help="seed of the invented image (default 0)")
    args = parser.parse_args(argv)
    if args.grains < 1 or args.repeat < 1:
        parser.error("--grains and --repeat must be >= 1")

    labels, image = make_label_image(args.grains, args.seed)
    window = STEP.defaults()["contour_window"]
    ours, theirs = [], []
    for _ in range(args.repeat):
        # interleave the two so that load from other processes hits both alike
        t0 = time.perf_counter()
        cols, contours = measure_labels(labels, image, 1.0, window)
        t1 = time.perf_counter()
        rp = regionprops_table(labels, image, properties=REGIONPROPS_PROPERTIES)
        t2 = time.perf_counter()
        ours.append(t1 - t0)
        theirs.append(t2 - t1)
    t0 = time.perf_counter()
    _, ncorn, _ = fit_outlines(contours, cols["ecd_nm"])
    t_fit = time.perf_counter() - t0
    a, b = min(ours), min(theirs)
    agree = _agreement(rp, cols)
    print(f"label image {labels.shape[0]}x{labels.shape[1]} px, {args.grains} grains "
          f"(invented), best of {args.repeat}")
    print(f"measure_labels (scalar descriptors)  {a * 1e3:9.1f} ms")
    print(f"regionprops_table ({len(REGIONPROPS_PROPERTIES)} properties)   {b * 1e3:9.1f} ms")
    print(f"speed ratio regionprops / ours       {b / a:9.2f}  (target >= 3)")
    print(f"polygon fit (not in the ratio)       {t_fit * 1e3:9.1f} ms, "
          f"median {int(np.median(ncorn))} corners")
    print("agreement with regionprops (max abs difference):")
    print(f"  area            {agree['area_px2']:.3g} px^2   (target 0)")
    print(f"  centroid        {agree['centroid_px']:.3g} px     (target <= 0.01)")
    print(f"  feret max       {agree['feret_max_px']:.3g} px     (target <= 1)")
    print(f"  major axis      {agree['major_axis_px']:.3g} px     (ours counts pixels as squares)")
    print(f"  orientation     {agree['orientation_deg']:.3g} deg    (grains with minor/major < 0.9)")
    print(f"  intensity mean  {agree['intensity_mean']:.3g}")
    print(f"  solidity        {agree['solidity']:.3g}        (ours: hull of pixel centres, regionprops: of pixel corners)")
    print(f"  perimeter       {agree['perimeter_rel_median'] * 100:+.2f} % median "
          f"(different estimators: smoothed contour vs regionprops' pixel-chain count)")
    ok = agree["area_px2"] == 0 and agree["centroid_px"] <= 0.01 and agree["feret_max_px"] <= 1.0
    return 0 if ok else 1


@hookimpl
def grainhabit_benchmarks():
    """Offer ``grainhabit bench measure``."""
    return {"measure": run}
