"""Tests of grainhabit.plugins.measure.outline: polygon geometry, contour smoothing and corner fitting.

Shapes are drawn here (pixel-centre sampling of exact polygons) at realistic
grain sizes (ECD 30-80 px); their outlines come from scikit-image's
marching squares, independent of the measure step.
"""

import numpy as np
import pytest
from skimage.measure import approximate_polygon, find_contours, points_in_poly

from grainhabit.plugins.measure.outline import (
    closed_length,
    douglas_peucker_closed,
    douglas_peucker_packed,
    edge_ratio,
    fit_polygon,
    fit_polygons,
    interior_angles,
    polygon_area,
    polygon_edges,
    smooth_closed_contour,
    turning_angles,
)


def regular_polygon(k, circumradius, angle_deg=0.0, centre=(0.0, 0.0)):
    t = np.deg2rad(angle_deg) + 2 * np.pi * np.arange(k) / k
    return np.c_[centre[0] + circumradius * np.cos(t), centre[1] + circumradius * np.sin(t)]


def truncated(vertices, frac):
    """Cut every corner of a polygon: keep the middle (1 - 2 frac) of each edge."""
    pts = []
    k = len(vertices)
    for i in range(k):
        a, b = vertices[i], vertices[(i + 1) % k]
        pts += [a + frac * (b - a), b - frac * (b - a)]
    return np.array(pts)


def raster(vertices, pad=6):
    """Mask of the pixels whose centres lie inside the polygon (x, y in px)."""
    lo = np.floor(vertices.min(axis=0)) - pad
    v = vertices - lo
    n = int(np.ceil(v.max())) + pad
    yy, xx = np.mgrid[:n, :n]
    centres = np.c_[xx.ravel() + 0.5, yy.ravel() + 0.5]
    return points_in_poly(centres, v).reshape(n, n)


def raster_disc(radius, offset=(0.3, -0.2), pad=6):
    n = int(2 * radius + 2 * pad)
    yy, xx = np.mgrid[:n, :n]
    c = n / 2 + np.asarray(offset)
    return (xx + 0.5 - c[0]) ** 2 + (yy + 0.5 - c[1]) ** 2 <= radius**2


def outline(mask, window=9):
    """Smoothed marching-squares outline (x, y) of a mask, via scikit-image."""
    cs = find_contours(np.pad(mask, 1).astype(float), 0.5, fully_connected="high")
    c = max(cs, key=len)[:-1]
    xy = np.c_[c[:, 1] - 0.5, c[:, 0] - 0.5]
    return smooth_closed_contour(xy, window)


def ecd(mask):
    return np.sqrt(4 * mask.sum() / np.pi)


def fit(mask, **kw):
    return fit_polygon(outline(mask), ecd(mask), **kw)


def circumradius_for_ecd(k, e):
    area = np.pi * e**2 / 4
    return np.sqrt(2 * area / (k * np.sin(2 * np.pi / k)))


# --------------------------------------------------------------------------
# polygon geometry (handbook geometry)
# --------------------------------------------------------------------------


def test_area_edges_angles_of_regular_hexagon():
    # handbook geometry: side s, area 3*sqrt(3)/2 s^2, interior angles 120 deg
    hexagon = regular_polygon(6, 10.0)
    assert polygon_area(hexagon) == pytest.approx(1.5 * np.sqrt(3) * 100)
    assert np.allclose(polygon_edges(hexagon), 10.0)
    assert closed_length(hexagon) == pytest.approx(60.0)
    assert np.allclose(interior_angles(hexagon), 120.0)
    assert np.allclose(interior_angles(hexagon[::-1]), 120.0)
    assert turning_angles(hexagon).sum() == pytest.approx(360.0)


def test_interior_angles_of_nonconvex_polygon_sum_to_k_minus_2_times_180():
    # handbook geometry: (k - 2) * 180 for any simple polygon; reflex > 180
    arrow = np.array([[0, 0], [4, 0], [4, 4], [2, 1], [0, 4]], float)
    ang = interior_angles(arrow)
    assert ang.sum() == pytest.approx(540.0)
    assert ang[3] > 180


def test_closing_vertex_is_ignored_and_bad_input_rejected():
    sq = np.array([[0, 0], [1, 0], [1, 1], [0, 1]], float)
    assert polygon_area(np.vstack([sq, sq[:1]])) == pytest.approx(1.0)
    with pytest.raises(ValueError, match="shape"):
        polygon_area(np.zeros((4, 3)))
    with pytest.raises(ValueError, match="non-finite"):
        polygon_edges(np.array([[0, 0], [np.nan, 1], [1, 1]]))
    with pytest.raises(ValueError, match="size"):
        fit_polygon(sq * 10, 0.0)
    with pytest.raises(ValueError, match="window"):
        smooth_closed_contour(regular_polygon(40, 5), window=8)


def test_edge_ratio_definitions():
    assert edge_ratio(regular_polygon(6, 5)) == pytest.approx(1.0)
    # hexagon with alternating edges a, b: mean(b) / mean(a)
    tri = regular_polygon(3, 20)
    hexagon = truncated(tri, 0.1875)  # short/long = 0.1875 / 0.625 = 0.3
    assert len(hexagon) == 6
    assert edge_ratio(hexagon) == pytest.approx(0.3)
    rect = np.array([[0, 0], [10, 0], [10, 4], [0, 4]], float)
    assert edge_ratio(rect) == pytest.approx(0.4)
    assert np.isnan(edge_ratio(rect[:2]))


# --------------------------------------------------------------------------
# smoothing and Douglas-Peucker
# --------------------------------------------------------------------------


def test_smoothing_fixes_staircase_length_of_digitised_disc():
    # handbook geometry: perimeter 2 pi r; the raw marching-squares contour
    # of a binary disc is about 5 % too long
    r = 30.0
    raw = outline(raster_disc(r), window=0)
    smooth = outline(raster_disc(r), window=9)
    assert closed_length(raw) / (2 * np.pi * r) > 1.04
    assert closed_length(smooth) / (2 * np.pi * r) == pytest.approx(1.0, abs=0.01)


def test_smoothing_keeps_a_smooth_curve():
    # Savitzky-Golay (order 2) passes quadratics: a densely sampled circle
    # moves by far less than its sampling step
    circle = regular_polygon(400, 50.0)
    out = smooth_closed_contour(circle, window=9)
    assert np.abs(np.hypot(out[:, 0], out[:, 1]) - 50.0).max() < 1e-3
    assert np.array_equal(smooth_closed_contour(circle[:5], 9), circle[:5])


def test_douglas_peucker_matches_scikit_image():
    # reference library: skimage.measure.approximate_polygon on the closed chain
    rng = np.random.default_rng(7)
    contours, tols, ref = [], [], []
    for _ in range(40):
        m = int(rng.integers(6, 200))
        ang = np.sort(rng.uniform(0, 2 * np.pi, m))
        r = 20 + rng.normal(0, 1.5, m)
        c = np.c_[r * np.cos(ang), r * np.sin(ang)]
        tol = float(rng.uniform(0.2, 3.0))
        approx = approximate_polygon(np.vstack([c, c[:1]]), tol)[:-1]
        want = sorted({int(np.flatnonzero((c == p).all(axis=1))[0]) for p in approx})
        got = douglas_peucker_closed(c, tol)
        assert list(got) == want
        contours.append(c)
        tols.append(tol)
        ref.append(want)
    off = np.r_[0, np.cumsum([len(c) for c in contours])]
    keep = douglas_peucker_packed(np.concatenate(contours), off, np.array(tols))
    for i, want in enumerate(ref):
        assert list(np.flatnonzero(keep[off[i]:off[i + 1]])) == want


# --------------------------------------------------------------------------
# corner fitting on drawn shapes
# --------------------------------------------------------------------------


@pytest.mark.parametrize("size", [40, 80])
@pytest.mark.parametrize("angle", [0.0, 13.0, 31.0, 45.0])
def test_square_gives_four_corners_at_any_rotation(size, angle):
    # handbook geometry: a square has 4 corners of 90 deg and equal edges
    mask = raster(regular_polygon(4, circumradius_for_ecd(4, size), angle, (0, 0)))
    poly = fit(mask)
    assert len(poly) == 4
    assert edge_ratio(poly) > 0.93
    assert np.allclose(interior_angles(poly), 90.0, atol=4.0)


@pytest.mark.parametrize("size,angle", [(40, 5.0), (40, 22.0), (80, 17.0)])
def test_regular_hexagon_gives_six_corners_and_ratio_one(size, angle):
    mask = raster(regular_polygon(6, circumradius_for_ecd(6, size), angle))
    poly = fit(mask)
    assert len(poly) == 6
    assert edge_ratio(poly) == pytest.approx(1.0, abs=0.08)
    assert np.allclose(interior_angles(poly), 120.0, atol=5.0)


@pytest.mark.parametrize("size,angle", [(40, 7.0), (60, 40.0), (80, 100.0)])
def test_truncated_triangle_gives_six_corners_and_its_edge_ratio(size, angle):
    # a triangle with corners cut so that short/long edge = 0.3
    side = size / 0.702  # ECD of this truncated triangle = 0.702 * side
    mask = raster(truncated(regular_polygon(3, side / np.sqrt(3), angle), 0.1875))
    poly = fit(mask)
    assert len(poly) == 6
    assert edge_ratio(poly) == pytest.approx(0.3, abs=0.05)


@pytest.mark.parametrize("angle", [0.0, 20.0, 40.0])
def test_triangle_and_truncated_square(angle):
    tri = raster(regular_polygon(3, circumradius_for_ecd(3, 60), angle))
    assert len(fit(tri)) == 3
    octagon = raster(truncated(regular_polygon(4, 40, angle), 0.25))
    poly = fit(octagon)
    assert len(poly) == 8
    # edges alternate: cut edge sqrt(2) * 0.25 * s vs kept 0.5 * s
    assert edge_ratio(poly) == pytest.approx(np.sqrt(2) * 0.25 / 0.5, abs=0.06)


@pytest.mark.parametrize("radius", [20, 40])
def test_disc_gives_many_corners(radius):
    assert len(fit(raster_disc(radius))) > 8


def test_start_point_of_contour_does_not_matter():
    mask = raster(regular_polygon(6, circumradius_for_ecd(6, 50), 11.0))
    c = outline(mask)
    polys = [fit_polygon(np.roll(c, s, axis=0), ecd(mask)) for s in (0, 17, 40, 123)]
    assert {len(p) for p in polys} == {6}
    for p in polys[1:]:
        # same corners, in whatever cyclic order
        d = np.hypot(*(p[:, None, :] - polys[0][None, :, :]).transpose(2, 0, 1))
        assert d.min(axis=1).max() < 0.5


def test_refined_corners_sit_on_the_true_corners():
    verts = regular_polygon(4, 40.0, 27.0, (50.3, 50.1))
    mask = raster(verts, pad=0)
    lo = np.floor(verts.min(axis=0)) - 0
    poly = fit(mask)
    true = verts - lo
    d = np.hypot(*(poly[:, None, :] - true[None, :, :]).transpose(2, 0, 1))
    assert d.min(axis=1).max() < 1.0


def test_fit_polygons_matches_fit_polygon_and_handles_tiny_contours():
    masks = [raster(regular_polygon(k, 25, 9.0 * k)) for k in (3, 4, 6)]
    contours = [outline(m) for m in masks]
    sizes = [ecd(m) for m in masks]
    together = fit_polygons(contours, sizes)
    for c, s, p in zip(contours, sizes, together):
        assert np.allclose(fit_polygon(c, s), p)
    diamond = np.array([[0.5, 0.0], [1.0, 0.5], [0.5, 1.0], [0.0, 0.5]])
    assert len(fit_polygon(diamond, 1.13)) == 4
    assert len(fit_polygon(diamond[:2], 1.0)) == 2
