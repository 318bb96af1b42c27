"""Tests of the measure-grains step (grainhabit.plugins.measure.measure_grains).

Checks against the outside world: ISO 9276-6 shape factors of exact shapes,
handbook geometry (perimeter, Feret diameters, area, second moments of an
ellipse), and scikit-image / scipy as reference libraries. Shapes are drawn
here by pixel-centre sampling of exact figures.
"""

import numpy as np
import pytest
from scipy import ndimage as ndi
from scipy.spatial import ConvexHull
from scipy.spatial.distance import pdist
from skimage.draw import ellipse
from skimage.measure import find_contours, points_in_poly, regionprops, regionprops_table

from grainhabit.frame import FrameData
from grainhabit.plugins.measure import measure_grains as measure
from grainhabit.plugins.bench.measure import REGIONPROPS_PROPERTIES, _agreement, make_label_image, run
from grainhabit.plugins.common.contours import trace_outlines
from grainhabit.plugins.measure.convex import convex_hulls, feret_diameters
from grainhabit.plugins.measure.measure_grains import COLUMNS, STEP, grainhabit_measure, label_moments, measure_labels

PX = 2.5  # nm per pixel in the calibrated tests


def regular_polygon(k, circumradius, angle_deg=0.0, centre=(0.0, 0.0)):
    t = np.deg2rad(angle_deg) + 2 * np.pi * np.arange(k) / k
    return np.c_[centre[0] + circumradius * np.cos(t), centre[1] + circumradius * np.sin(t)]


def raster(vertices, shape):
    """Mask of pixels whose centres ((col + .5), (row + .5)) lie in the polygon."""
    yy, xx = np.mgrid[: shape[0], : shape[1]]
    pts = np.c_[xx.ravel() + 0.5, yy.ravel() + 0.5]
    return points_in_poly(pts, vertices).reshape(shape)


def disc(radius, centre, shape):
    yy, xx = np.mgrid[: shape[0], : shape[1]]
    return (xx + 0.5 - centre[0]) ** 2 + (yy + 0.5 - centre[1]) ** 2 <= radius**2


def one(mask, window=9, image=None, px=1.0):
    cols, _ = measure_labels(mask.astype(np.int32), image, px, window)
    return {k: v[0] for k, v in cols.items()}


def frame_of(labels, image=None, px=PX, order=None):
    labels = labels.astype(np.int32)
    img = np.zeros(labels.shape, np.float32) if image is None else image.astype(np.float32)
    n = int(labels.max())
    lab_col = np.arange(1, n + 1) if order is None else np.asarray(order)
    fr = FrameData(source="t.tif", sample="s", raw=img, pixel_size_nm=px, image=img, labels=labels)
    return fr.with_columns(label=lab_col, split=np.zeros(n, bool),
                           edge_cut=np.zeros(n, bool))


# --------------------------------------------------------------------------
# ISO 9276-6 shape factors and handbook geometry
# --------------------------------------------------------------------------


def circumradius_for_ecd(k, e):
    return np.sqrt(2 * (np.pi * e**2 / 4) / (k * np.sin(2 * np.pi / k)))


@pytest.mark.parametrize(
    "k,expected",
    [
        (4, np.pi / 4),                 # ISO 9276-6: square
        (3, np.pi * np.sqrt(3) / 9),    # ISO 9276-6: equilateral triangle
        (6, np.pi * np.sqrt(3) / 6),    # ISO 9276-6: regular hexagon
    ],
)
@pytest.mark.parametrize("angle", [0.0, 17.0, 38.0])
def test_iso_9276_6_form_factor_of_regular_polygons(k, expected, angle):
    # ISO 9276-6 (from memory): form factor 4 pi A / P^2, circularity its square root
    size = 140  # finely digitised: ECD 140 px
    R = circumradius_for_ecd(k, size)
    shape = (int(2 * R) + 12,) * 2
    mask = raster(regular_polygon(k, R, angle, (shape[1] / 2 + 0.3, shape[0] / 2 - 0.2)), shape)
    m = one(mask)
    assert m["form_factor"] == pytest.approx(expected, rel=0.02)
    assert m["circularity"] == pytest.approx(np.sqrt(expected), rel=0.01)
    assert m["circularity"] == pytest.approx(np.sqrt(m["form_factor"]), rel=1e-12)


@pytest.mark.parametrize("radius", [20.0, 40.0, 70.0])
def test_iso_9276_6_circularity_and_perimeter_of_a_disc(radius):
    # ISO 9276-6: form factor and circularity 1 for a circle; handbook geometry: P = 2 pi r
    shape = (int(2 * radius) + 12,) * 2
    m = one(disc(radius, (shape[1] / 2 + 0.31, shape[0] / 2 - 0.17), shape))
    assert m["perimeter_nm"] == pytest.approx(2 * np.pi * radius, rel=0.01)
    assert m["circularity"] == pytest.approx(1.0, abs=0.008)
    assert m["form_factor"] == pytest.approx(1.0, abs=0.015)
    assert m["solidity"] == pytest.approx(1.0, abs=0.01)
    assert m["convexity"] == pytest.approx(1.0, abs=0.01)
    # handbook geometry: a disc's Feret diameter is 2 r in every direction
    assert m["feret_max_nm"] == pytest.approx(2 * radius, abs=1.0)
    assert m["feret_min_nm"] == pytest.approx(2 * radius, abs=1.0)


@pytest.mark.parametrize("angle", [0.0, 15.0, 30.0, 45.0, 62.0])
def test_feret_of_rotated_square(angle):
    # handbook geometry: x_Fmin = side, x_Fmax = side * sqrt(2)
    side = 60.0
    shape = (110, 110)
    mask = raster(regular_polygon(4, side / np.sqrt(2), angle, (55.2, 54.9)), shape)
    m = one(mask)
    assert m["feret_min_nm"] == pytest.approx(side, abs=1.0)
    assert m["feret_max_nm"] == pytest.approx(side * np.sqrt(2), abs=1.0)
    assert m["feret_ratio"] == pytest.approx(1 / np.sqrt(2), abs=0.015)
    # handbook geometry: the convex hull of a square is the square itself
    assert m["convex_area_nm2"] == pytest.approx(side**2, rel=0.02)
    assert m["convex_perimeter_nm"] == pytest.approx(4 * side, rel=0.01)


def test_calibrated_area_and_ecd_of_exact_shapes():
    # exact: a pixel-aligned 40 x 25 px rectangle has A = 1000 px^2
    lab = np.zeros((50, 60), np.int32)
    lab[10:35, 5:45] = 1
    m = one(lab, px=PX)
    assert m["area_nm2"] == 1000 * PX**2
    assert m["ecd_nm"] == pytest.approx(np.sqrt(4 * 1000 * PX**2 / np.pi))
    assert m["feret_min_nm"] == pytest.approx(25 * PX)
    assert m["centroid_x_nm"] == pytest.approx(25.0 * PX)
    assert m["centroid_y_nm"] == pytest.approx(22.5 * PX)
    # handbook geometry: disc of radius 50 px -> pi r^2, ECD = 2 r
    shape = (112, 112)
    m = one(disc(50.0, (56.4, 55.8), shape), px=PX)
    assert m["area_nm2"] == pytest.approx(np.pi * (50 * PX) ** 2, rel=0.003)
    assert m["ecd_nm"] == pytest.approx(100 * PX, rel=0.0015)


def test_centroid_uses_pixel_centre_convention():
    # design contract: pixel (row, col) centre at ((col + .5) px, (row + .5) px)
    lab = np.zeros((10, 12), np.int32)
    lab[3, 7] = 1
    lab[5:7, 1:4] = 2  # rows 5-6, cols 1-3: centre (2.5, 6.0) in px
    cols, _ = measure_labels(lab, None, PX)
    assert cols["centroid_x_nm"][0] == pytest.approx(7.5 * PX)
    assert cols["centroid_y_nm"][0] == pytest.approx(3.5 * PX)
    assert cols["centroid_x_nm"][1] == pytest.approx(2.5 * PX)
    assert cols["centroid_y_nm"][1] == pytest.approx(6.0 * PX)


@pytest.mark.parametrize("rotation", [0.0, 0.4, -1.1])
def test_equivalent_ellipse_of_a_drawn_ellipse(rotation):
    # handbook geometry: an ellipse with semi-axes a, b has second moments
    # a^2/4, b^2/4, so the equivalent ellipse has full axes 2a, 2b
    lab = np.zeros((200, 200), np.int32)
    rr, cc = ellipse(100, 100, 20, 60, rotation=rotation, shape=lab.shape)
    lab[rr, cc] = 1
    m = one(lab)
    assert m["ellipse_major_nm"] == pytest.approx(120.0, rel=0.01)
    assert m["ellipse_minor_nm"] == pytest.approx(40.0, rel=0.01)
    assert m["elongation"] == pytest.approx(1 - 40 / 120, abs=0.01)
    # skimage.draw.ellipse turns the column axis by -rotation in x-right, y-down axes
    want = np.rad2deg(-rotation)
    assert abs((m["orientation_deg"] - want + 90) % 180 - 90) < 0.5


def test_intensity_statistics_match_numpy():
    rng = np.random.default_rng(3)
    lab = np.zeros((30, 30), np.int32)
    lab[2:12, 3:20] = 1
    lab[15:28, 10:25] = 2
    img = rng.normal(5.0, 2.0, lab.shape)
    cols, _ = measure_labels(lab, img, 1.0)
    for i in (1, 2):
        assert cols["intensity_mean"][i - 1] == pytest.approx(img[lab == i].mean())
        assert cols["intensity_std"][i - 1] == pytest.approx(img[lab == i].std())


# --------------------------------------------------------------------------
# agreement with scikit-image and scipy (reference libraries)
# --------------------------------------------------------------------------


def touching_labels():
    """Invented label image with touching and diagonally joined grains."""
    labels, image = make_label_image(60, seed=11)
    # a split pair: cut one grain in two along a line
    rows, cols = np.nonzero(labels == 5)
    half = cols > np.median(cols)
    labels[rows[half], cols[half]] = labels.max() + 1
    # two pixels joined only diagonally belong to one grain
    labels[0, 0] = labels[1, 1] = labels.max() + 1
    return labels, image


def test_agreement_with_regionprops_on_random_label_image():
    # reference library: skimage.measure.regionprops_table
    labels, image = touching_labels()
    cols, _ = measure_labels(labels, image, 1.0)
    rp = regionprops_table(labels, image, properties=REGIONPROPS_PROPERTIES)
    agree = _agreement(rp, cols)
    assert agree["area_px2"] == 0
    assert agree["centroid_px"] <= 0.01
    assert agree["feret_max_px"] <= 1.0
    # equivalent-ellipse axes: ours counts each pixel as a square (+1/12 px^2
    # per variance), which matters only for tiny grains
    big = rp["area"] >= 50
    assert np.abs(cols["ellipse_major_nm"] - rp["axis_major_length"])[big].max() <= 0.1
    assert np.abs(cols["ellipse_minor_nm"] - rp["axis_minor_length"])[big].max() <= 0.1
    assert agree["orientation_deg"] <= 0.01
    assert agree["intensity_mean"] <= 1e-5
    # solidity: our hull runs through the pixel centres, regionprops' through
    # the pixel corners (never smaller), so ours is the larger of the two
    assert np.all(cols["solidity"] >= rp["solidity"] - 1e-12)
    assert agree["solidity"] <= 0.1
    assert np.allclose(cols["intensity_std"], rp["intensity_std"], atol=1e-5)


def test_raw_outline_vertices_are_scikit_image_contours():
    # reference library: skimage.measure.find_contours(mask, 0.5, "high")
    rng = np.random.default_rng(5)
    blobs = ndi.gaussian_filter(rng.normal(size=(160, 160)), 3) > 0.05
    labels, n = ndi.label(blobs, structure=np.ones((3, 3)))
    outl = trace_outlines(labels, window=0)
    for i in range(n):
        mask = labels == i + 1
        cs = find_contours(np.pad(mask, 1).astype(float), 0.5, fully_connected="high")
        ref = max(cs, key=lambda c: abs(_area(c)))[:-1]
        ref_xy = np.c_[ref[:, 1] - 0.5, ref[:, 0] - 0.5]
        ours = outl[i]
        assert len(ours) == len(ref_xy)
        assert set(map(tuple, np.round(ours, 6))) == set(map(tuple, np.round(ref_xy, 6)))
        assert _area(ours) > 0  # positive orientation
        assert outl.raw_area[i] == pytest.approx(_area(ref_xy))


def _area(c):
    return 0.5 * float(np.dot(c[:, 0], np.roll(c[:, 1], -1)) - np.dot(np.roll(c[:, 0], -1), c[:, 1]))


def test_hulls_and_calipers_match_scipy():
    # reference library: scipy.spatial.ConvexHull and brute-force distances
    rng = np.random.default_rng(9)
    blobs = ndi.gaussian_filter(rng.normal(size=(200, 200)), 4) > 0.03
    labels, n = ndi.label(blobs)
    outl = trace_outlines(labels, window=9)
    h_xy, h_off = convex_hulls(outl.xy, outl.offsets)
    fmax, fmin = feret_diameters(h_xy, h_off)
    for i in range(n):
        pts = outl[i]
        hull = pts[ConvexHull(pts).vertices]
        ours = h_xy[h_off[i]:h_off[i + 1]]
        assert set(map(tuple, np.round(ours, 9))) == set(map(tuple, np.round(hull, 9)))
        assert fmax[i] == pytest.approx(np.sqrt(pdist(hull, "sqeuclidean").max()), abs=1e-9)
        e = np.roll(hull, -1, axis=0) - hull
        nrm = np.c_[e[:, 1], -e[:, 0]] / np.hypot(e[:, 0], e[:, 1])[:, None]
        widths = np.abs(((hull[None, :, :] - hull[:, None, :]) * nrm[:, None, :]).sum(-1)).max(1)
        assert fmin[i] == pytest.approx(widths.min(), abs=1e-9)


def test_convex_area_counts_pixel_centres_in_the_hull():
    # reference library: scipy.spatial.ConvexHull half-planes, counted by brute force
    rng = np.random.default_rng(4)
    blobs = ndi.gaussian_filter(rng.normal(size=(150, 150)), 4) > 0.02
    labels, n = ndi.label(blobs)
    cols, _ = measure_labels(labels, None, 1.0)
    yy, xx = np.mgrid[:150, :150]
    centres = np.c_[xx.ravel() + 0.5, yy.ravel() + 0.5]
    for i in range(n):
        r, c = np.nonzero(labels == i + 1)
        pts = np.c_[c + 0.5, r + 0.5]
        if len(pts) < 3 or np.linalg.matrix_rank(pts - pts[0]) < 2:
            continue
        eq = ConvexHull(pts).equations
        inside = (centres @ eq[:, :2].T + eq[:, 2] <= 1e-9).all(axis=1).sum()
        assert cols["convex_area_nm2"][i] == inside
        assert cols["solidity"][i] == pytest.approx(len(pts) / inside)


def test_solidity_of_an_l_shape():
    # exact: an L of 51 pixels; the hull of its pixel centres holds 51 + 21
    # more centres (the triangle cut off the missing 7 x 7 corner block,
    # counted from the drawing)
    lab = np.zeros((14, 14), np.int32)
    lab[2:12, 2:5] = 1
    lab[9:12, 5:12] = 1
    m = one(lab)
    assert m["area_nm2"] == 51
    assert m["convex_area_nm2"] == 72
    assert m["solidity"] == pytest.approx(51 / 72)
    assert m["convexity"] < 1


def test_label_moments_match_regionprops_moments():
    labels, _ = make_label_image(12, seed=2)
    mom = label_moments(labels)
    for r in regionprops(labels):
        i = r.label - 1
        mu = r.moments_central
        assert mom["mxx"][i] == pytest.approx(mu[0, 2] / mu[0, 0] + 1 / 12)
        assert mom["myy"][i] == pytest.approx(mu[2, 0] / mu[0, 0] + 1 / 12)
        assert mom["mxy"][i] == pytest.approx(mu[1, 1] / mu[0, 0], abs=1e-9)


# --------------------------------------------------------------------------
# the step hook
# --------------------------------------------------------------------------


def test_step_declaration():
    assert measure.GRAINHABIT_API == 1
    assert STEP.name == "measure-grains" and STEP.stage == "measure"
    assert all(p.doc for p in STEP.params)
    assert STEP.resolve({"corner_tolerance": 0.03})["corner_tolerance"] == 0.03


def test_hook_columns_outlines_and_units():
    lab = np.zeros((120, 120), np.int32)
    sq = regular_polygon(4, 30 / np.sqrt(2), 20.0, (40.0, 40.0))
    lab[raster(sq, lab.shape)] = 1
    lab[disc(25.0, (88.0, 88.0), lab.shape)] = 2
    fr = frame_of(lab)
    out = grainhabit_measure(fr, {})
    assert set(COLUMNS) <= set(out.grains)
    for key in ("label", "split", "edge_cut"):
        assert np.array_equal(out.grains[key], fr.grains[key])
    assert out.grains["n_corners"].dtype == np.int64
    assert out.grains["n_corners"][0] == 4
    assert out.grains["n_corners"][1] > 8
    assert len(out.outlines) == 2
    # outline polygon in nm, corners on the drawn square's corners
    d = np.hypot(*(out.outlines[0][:, None, :] - (sq * PX)[None, :, :]).transpose(2, 0, 1))
    assert d.min(axis=1).max() < 1.0 * PX
    assert out.grains["area_nm2"][0] == pytest.approx(900 * PX**2, rel=0.02)
    assert out.grains["feret_min_nm"][0] == pytest.approx(30 * PX, abs=PX)


def test_hook_rows_follow_the_label_column():
    lab = np.zeros((40, 40), np.int32)
    lab[2:6, 2:6] = 1
    lab[10:30, 10:20] = 2
    lab[32:38, 30:39] = 3
    out = grainhabit_measure(frame_of(lab, order=[3, 1, 2]), {})
    assert list(out.grains["area_nm2"] / PX**2) == [54, 16, 200]
    assert len(out.outlines[2]) == 4


def test_hook_with_no_grains():
    fr = frame_of(np.zeros((20, 20), np.int32))
    out = grainhabit_measure(fr, {})
    assert out.outlines == ()
    for key in COLUMNS:
        assert len(out.grains[key]) == 0
    assert out.grains["area_nm2"].dtype == np.float64
    assert out.grains["n_corners"].dtype == np.int64


def test_single_pixel_and_border_grains():
    lab = np.zeros((30, 30), np.int32)
    lab[10, 10] = 1                 # one pixel
    lab[0:8, 20:30] = 2             # touches the top and right border
    lab[29, 0] = 3                  # one pixel in the corner
    out = grainhabit_measure(frame_of(lab), {})
    g = out.grains
    assert list(g["area_nm2"] / PX**2) == [1, 80, 1]
    for key in ("perimeter_nm", "feret_max_nm", "feret_min_nm", "form_factor", "circularity", "solidity"):
        assert np.all(np.isfinite(g[key])), key
    assert np.all(g["form_factor"] <= 1.0 + 1e-9) and np.all(g["circularity"] <= 1.0 + 1e-9)
    # the border grain is closed along the frame border: a 10 x 8 box
    assert g["feret_min_nm"][1] == pytest.approx(8 * PX)
    assert g["centroid_x_nm"][1] == pytest.approx(25.0 * PX)
    assert g["centroid_y_nm"][1] == pytest.approx(4.0 * PX)
    assert all(len(o) >= 3 for o in out.outlines)


def test_ring_uses_its_outer_outline_and_absent_labels_give_nan():
    # handbook geometry: a ring's outer perimeter is 2 pi r_out; its area is
    # the annulus pi (r_out^2 - r_in^2)
    shape = (110, 110)
    ring = disc(45.0, (55.3, 54.8), shape) & ~disc(20.0, (55.3, 54.8), shape)
    lab = np.zeros(shape, np.int32)
    lab[ring] = 1
    lab[2:5, 2:5] = 3  # label 2 absent
    cols, _ = measure_labels(lab, None, 1.0)
    assert cols["perimeter_nm"][0] == pytest.approx(2 * np.pi * 45, rel=0.01)
    assert cols["area_nm2"][0] == pytest.approx(np.pi * (45**2 - 20**2), rel=0.01)
    assert cols["solidity"][0] < 0.85
    assert np.isnan(cols["perimeter_nm"][1]) and cols["area_nm2"][1] == 0
    assert cols["area_nm2"][2] == 9


def test_hook_rejects_bad_frames():
    fr = frame_of(np.ones((5, 5), np.int32))
    with pytest.raises(ValueError, match="labels"):
        grainhabit_measure(fr.replace(labels=None), {})
    with pytest.raises(ValueError, match="outside"):
        grainhabit_measure(fr.with_columns(label=np.array([4])), {})
    with pytest.raises(ValueError, match="pixel_size_nm"):
        grainhabit_measure(fr.replace(pixel_size_nm=float("nan")), {})


def test_benchmark_runs_on_a_small_image(capsys):
    assert run(["--grains", "20", "--repeat", "1"]) == 0
    text = capsys.readouterr().out
    assert "speed ratio" in text and "feret max" in text
