"""Split grains completed by six-fold symmetry, and the edge blur of a frame (invented test data).

Outside references: handbook geometry (the area of a regular hexagon, 3 sqrt(3) s^2 / 2; the
projection of a regular octahedron along a three-fold axis is a regular hexagon; the area of a
square), scipy's Gaussian filter (the blur) and scipy's spline interpolation (the half-height
point of a blurred corner).
"""
import math

import numpy as np
import pytest
from scipy import ndimage as ndi

from grainhabit.frame import FrameData
from grainhabit.plugins.habit import classify_habit as cl
from grainhabit.plugins.habit import edge_blur as eb
from grainhabit.plugins.habit import engine as en
from grainhabit.plugins.measure import measure_grains as measure
from grainhabit.plugins.preprocess import flatten_background as preprocess
from grainhabit.plugins.segment.segment_grains import edge_cut
from grainhabit.plugins.synthetic import render as sy

PX = 5.0


def _hexagon(side, n_per_edge=40):
    corners = np.array([[side * math.cos(k * math.pi / 3), side * math.sin(k * math.pi / 3)] for k in range(6)])
    return np.vstack([corners[i] + (corners[(i + 1) % 6] - corners[i]) * f
                      for i in range(6) for f in np.linspace(0, 1, n_per_edge, endpoint=False)])


def test_six_fold_completion_restores_a_cut_regular_hexagon():
    # handbook geometry: a regular hexagon of side s has area 3 sqrt(3) s^2 / 2; cut by a
    # straight line across one corner (less than a sixth of it), its other corners turned by
    # multiples of 60 degrees about the centre restore it
    s = 30.0
    hexa = _hexagon(s)
    cut = hexa[hexa[:, 0] < 0.75 * s]
    done = en.complete_by_symmetry(cut, None, 6)
    assert en.polygon_centroid(done)[1] == pytest.approx(3 * math.sqrt(3) / 2 * s * s, rel=0.01)


def test_completion_refuses_other_folds():
    with pytest.raises(ValueError, match="fold"):
        en.complete_by_symmetry(_hexagon(10.0), None, 4)


def _classified_on_truth(grains, shape, contrast, seed=3):
    """Render ``grains``, preprocess, then classify on the renderer's own labels (split = touching)."""
    field = sy.render_field(grains, shape, PX, contrast, seed=seed)
    frame = FrameData(source="invented", sample="invented", raw=field.image, pixel_size_nm=PX,
                      calibration="synthetic")
    f = preprocess.grainhabit_preprocess(frame, preprocess.STEP.resolve({}))
    lab = field.labels.astype(np.int32)
    n = int(lab.max())
    touch = {a for pair in sy.touching_label_pairs(lab) for a in pair}
    f = f.replace(labels=lab, grains={}).with_columns(
        label=np.arange(1, n + 1), split=np.array([k in touch for k in range(1, n + 1)]), edge_cut=edge_cut(lab))
    f = measure.grainhabit_measure(f, measure.STEP.resolve({}))
    return cl.classify_frame(f, cl.STEP.resolve({}))


def _overlapping(habit, shift, **kw):
    """Two grains of one habit, the second lying over the first's right side (a cut outline)."""
    ecd = 300.0
    a = sy.GrainSpec(habit, ecd, 330.0, 400.0, **kw)
    b = sy.GrainSpec(habit, ecd, 330.0 + shift * ecd, 400.0, z_order=1, **kw)
    return [a, b]


@pytest.mark.parametrize("contrast", ["bright", "dark"])
def test_cut_octahedron_on_111_keeps_its_habit(contrast):
    # handbook geometry: an octahedron on a {111} face projects to a regular hexagon, six-fold
    # symmetric; the back one loses a corner to the front one and is completed six-fold
    g = _overlapping("octahedron", 0.85, alpha=3.2, face="111", rotation_deg=0.0)
    cols = _classified_on_truth(g, (180, 240), contrast)
    assert list(cols["habit"]) == ["octahedron", "octahedron"]


@pytest.mark.parametrize("contrast", ["bright", "dark"])
def test_cut_cube_stays_a_cube(contrast):
    # a square loses a strip to the front square: completed two-fold (a square again), never
    # three-fold into a hexagonal plate
    g = _overlapping("cube", 0.9, alpha=0.8, face="100", rotation_deg=10.0)
    cols = _classified_on_truth(g, (180, 240), contrast)
    assert list(cols["habit"]) == ["cube", "cube"]


# ------------------------------------------------------------------ edge blur

def _blurred_squares(sigma, seed=0):
    """Bright squares on a dark ground, blurred by scipy's Gaussian filter, with their labels."""
    rng = np.random.default_rng(seed)
    img = np.zeros((200, 200))
    lab = np.zeros((200, 200), np.int32)
    k = 0
    for r in (20, 110):
        for c in (20, 110):
            k += 1
            img[r:r + 60, c:c + 60] = 1.0
            lab[r:r + 60, c:c + 60] = k
    img = ndi.gaussian_filter(img, sigma) + rng.normal(0.0, 0.01, img.shape)
    return img, lab


@pytest.mark.parametrize("sigma", [1.0, 2.0, 3.0])
def test_edge_blur_recovers_the_gaussian_sigma(sigma):
    # reference: scipy.ndimage.gaussian_filter blurs the frame by a known sigma
    img, lab = _blurred_squares(sigma)
    assert eb.edge_blur_px(img, lab) == pytest.approx(sigma, rel=0.15)


def test_edge_blur_does_not_depend_on_polarity_or_level():
    img, lab = _blurred_squares(2.0)
    assert eb.edge_blur_px(5.0 - 3.0 * img, lab) == pytest.approx(eb.edge_blur_px(img, lab), rel=1e-6)


def test_edge_blur_without_grains_is_nan():
    assert math.isnan(eb.edge_blur_px(np.zeros((50, 50)), np.zeros((50, 50), int)))


@pytest.mark.parametrize("sigma", [2.0, 4.0])
def test_half_height_point_of_a_blurred_right_angle_recedes_as_the_corner_radius_says(sigma):
    # reference: a right-angled corner blurred by scipy's Gaussian filter, read along its
    # bisector by scipy's spline interpolation; a circular arc of radius
    # CORNER_RADIUS_PER_SIGMA * sigma tangent to both edges recedes (sqrt 2 - 1) times its
    # radius from the sharp corner along the bisector
    n = 160
    img = np.zeros((n, n))
    img[n // 2:, n // 2:] = 1.0
    img = ndi.gaussian_filter(img, sigma, mode="nearest")
    corner = n // 2 - 0.5                                   # the step lies between pixel centres
    t = np.linspace(0.0, 4.0 * sigma, 4001)                 # distance along each axis
    v = ndi.map_coordinates(img, [corner + t, corner + t], order=3)
    recess = math.sqrt(2.0) * float(np.interp(0.5, v, t))
    assert recess == pytest.approx((math.sqrt(2) - 1) * eb.CORNER_RADIUS_PER_SIGMA * sigma, rel=0.03)


def test_corner_radius_is_never_below_the_step_parameter():
    assert eb.corner_radius_px(float("nan"), 1.0) == 1.0
    assert eb.corner_radius_px(0.2, 1.0) == 1.0
    assert eb.corner_radius_px(2.0, 1.0) == pytest.approx(2.0 * eb.CORNER_RADIUS_PER_SIGMA)
