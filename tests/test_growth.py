"""Tests of the habit engine's alpha fit and of fit-growth-ratio, against closed-form geometry,
scipy and drawn model grains.

Drawn grains (skimage.draw) are invented test data.
"""
import math

import numpy as np
import pytest

from grainhabit.plugins.habit import crystal as cr
from grainhabit.plugins.habit import classify_habit as cl
from grainhabit.plugins.habit import engine as gr
from grainhabit.plugins.habit import fit_growth_ratio as fg
from builders import body_and_rotation, draw_crystal_frame, draw_polygon_frame


def evidence(frame):
    signal, mode = cl.interior_signal(frame)
    return gr.grain_evidence(frame.labels, signal, mode, cl.frame_contours(frame)[0], 1)


def fit_drawn(frame, interior=True):
    contour, inner = evidence(frame)
    return gr.fit_alpha(contour, inner if interior else None)


# ------------------------------------------------------------- closed form

def test_growth_parameter_limits_cube_and_octahedron():
    # kinetic Wulff construction as commonly stated in crystal-growth texts
    # (from memory): alpha = sqrt(3) v100 / v111 <= 1 gives a cube, >= 3 an
    # octahedron, cuboctahedra between
    fam = lambda p: sorted({cr.face_family(m) for m in p.face_miller})
    assert fam(cr.wulff_polyhedron(1.0)) == ["100"] and cr.wulff_polyhedron(1.0).n_faces == 6
    assert fam(cr.wulff_polyhedron(3.0)) == ["111"] and cr.wulff_polyhedron(3.0).n_faces == 8
    assert fam(cr.wulff_polyhedron(1.02)) == ["100", "111"]
    assert fam(cr.wulff_polyhedron(2.98)) == ["100", "111"]


def test_outline_on_100_is_square_up_to_alpha_1_5():
    # closed form: the {111} planes x + y + z = 3 d100 / alpha reach the
    # equator (z = 0) inside the square |x|, |y| <= d100 only for alpha > 3/2
    assert len(cr.outline_model(1.5, "100")) == 4
    assert len(cr.outline_model(1.55, "100")) == 8


def test_radial_signature_closed_forms():
    # handbook geometry: a square of side s has r(0) = s/2 and r(45 deg) =
    # s/sqrt(2) about its centre, area s^2; a disc r = R, area pi R^2
    sq = np.array([[-1, -1], [1, -1], [1, 1], [-1, 1]], float) * 3.0
    sig = gr.radial_signature(sq, 8)
    assert sig[0] == pytest.approx(3.0 / 6.0)
    assert sig[1] == pytest.approx(3.0 * math.sqrt(2) / 6.0)
    t = np.linspace(0, 2 * np.pi, 2000, endpoint=False)
    disc = np.column_stack([np.cos(t), np.sin(t)]) * 5
    assert np.allclose(gr.radial_signature(disc, 64), 1 / math.sqrt(math.pi), rtol=1e-5)


def test_shift_distances_find_rotation_against_numpy_roll():
    # reference: numpy.roll; a polygon turned by 2 pi s / n has zero distance at s
    poly = cr.outline_model(2.0, "100", 0.0)
    a = gr.radial_signature(poly, 128)
    b = gr.radial_signature(cr.outline_model(2.0, "100", 360.0 * 5 / 128), 128)
    d = gr.shift_distances(b, a)
    # the FFT route leaves sqrt(rounding) ~ 1e-8 at an exact match
    assert d[5] == pytest.approx(0.0, abs=1e-6)
    assert int(np.argmin(d)) % 32 == 5          # the octagon repeats every 90 deg = 32 samples
    brute = [np.sqrt(np.mean((np.roll(b, -s) - a) ** 2)) for s in range(128)]
    assert np.allclose(d, brute, atol=1e-6)


# ------------------------------------------------------------ drawn grains

@pytest.mark.parametrize("alpha", [1.7, 2.0, 2.4])
@pytest.mark.parametrize("contrast", ["bright", "dark"])
def test_fit_recovers_alpha_of_cuboctahedron_on_100(alpha, contrast):
    # noiseless model grain drawn at ~70 px ECD (e.g. 700 nm at 10 nm/px)
    body, rot = body_and_rotation(alpha, "100", 17.0)
    fit = fit_drawn(draw_crystal_frame(body, rot, contrast=contrast))
    assert fit.face == "100"
    assert abs(fit.alpha - alpha) <= 0.1
    assert fit.alpha_lo <= alpha <= fit.alpha_hi


def test_outline_alone_keeps_both_look_alike_octagons():
    # alpha = 1.8 and its twin octagon (straight and diagonal edges swapped)
    # look the same in outline: the range must hold the true alpha
    body, rot = body_and_rotation(1.8, "100", 17.0)
    fit = fit_drawn(draw_crystal_frame(body, rot), interior=False)
    assert fit.alpha_lo <= 1.8 <= fit.alpha_hi
    assert "outline only" in fit.note


def test_square_outline_gives_upper_bound_1_5():
    # square outline on {100}, no facets seen: alpha <= 1.5, nothing more
    lib = gr.model_library()
    sq = np.array([[-35, -35], [35, -35], [35, 35], [-35, 35]], float)
    fit = fit_drawn(draw_polygon_frame(sq), interior=False)
    assert fit.alpha_lo == pytest.approx(lib.grid[0])
    # ~1.5: at 70 px a corner cut of alpha = 1.6 is ~4 px along the side,
    # about what one pixel of outline rounding hides, so up to ~1.6 is allowed
    assert 1.5 <= fit.alpha_hi <= 1.65
    # design contract: a square only bounds alpha, so alpha itself is NaN
    assert np.isnan(fit.alpha) and fit.alpha_best <= 1.5
    assert "only bounded: alpha <=" in fit.note


def test_octahedron_on_111_gives_lower_bound_near_3():
    lib = gr.model_library()
    body, rot = body_and_rotation(3.0, "111", 8.0)
    fit = fit_drawn(draw_crystal_frame(body, rot, contrast="bright"))
    assert fit.face == "111"
    assert fit.alpha_hi == pytest.approx(lib.grid[-1])
    assert 2.6 <= fit.alpha_lo <= 3.0
    assert np.isnan(fit.alpha) and "only bounded: alpha >=" in fit.note


def test_hook_writes_nan_with_reason_for_non_polyhedral():
    body, rot = body_and_rotation(2.0, "100", 0.0)
    frame = cl.grainhabit_classify(draw_crystal_frame(body, rot), cl.STEP.resolve({}))
    for habit, word in (("tabular_hexagon", "edge_ratio"), ("rod", "rod"), ("irregular", "irregular")):
        f = frame.with_columns(habit=np.array([habit], object))
        out = fg.grainhabit_fit_growth(f, fg.STEP.resolve({}))
        assert np.isnan(out.grains["alpha"][0]) and np.isnan(out.grains["alpha_lo"][0])
        assert word in out.grains["alpha_note"][0]
    f = frame.with_columns(habit=np.array(["cuboctahedron"], object))
    out = fg.grainhabit_fit_growth(f, fg.STEP.resolve({}))
    assert out.grains["alpha"][0] == pytest.approx(2.0, abs=0.1)
    assert out.grains["alpha_lo"][0] <= 2.0 <= out.grains["alpha_hi"][0]
    cut = frame.with_columns(habit=np.array(["cube"], object), edge_cut=np.array([True]))
    out = fg.grainhabit_fit_growth(cut, fg.STEP.resolve({}))
    assert np.isnan(out.grains["alpha"][0]) and "border" in out.grains["alpha_note"][0]
    with pytest.raises(ValueError, match="classify-habit"):
        fg.grainhabit_fit_growth(draw_crystal_frame(body, rot).with_columns(habit=np.array(["cube"], object)),
                                 fg.STEP.resolve({}))


def test_bad_inputs_are_refused():
    with pytest.raises(ValueError):
        gr.radial_signature(np.zeros((2, 2)))
    with pytest.raises(ValueError):
        gr.shift_distances(np.ones(8), np.ones(9))
    with pytest.raises(ValueError):
        gr.model_library(1.2, 4.0)


# ------------------------------------------------ fast paths against references

def _brute_signature(poly, n):
    # every ray against every edge (Cramer's rule), the farthest crossing
    p = np.asarray(poly, float)
    c, area = gr.polygon_centroid(p)
    q = p - c
    e = np.roll(q, -1, axis=0) - q
    phi = 2 * np.pi * np.arange(n) / n
    dx, dy = np.cos(phi)[:, None], np.sin(phi)[:, None]
    det = -dx * e[:, 1] + e[:, 0] * dy
    ok = np.abs(det) > 1e-14
    det = np.where(ok, det, 1.0)
    t = (-q[:, 0] * e[:, 1] + e[:, 0] * q[:, 1]) / det
    s = (dx * q[:, 1] - dy * q[:, 0]) / det
    hit = ok & (s >= -1e-9) & (s <= 1 + 1e-9) & (t > 0)
    return np.where(hit, t, 0.0).max(axis=1) / math.sqrt(area)


def test_radial_signature_equals_all_pairs_solution():
    rng = np.random.default_rng(3)
    # a non-star (re-entrant) outline: the farthest crossing is kept
    spiral = np.array([[0, 0], [10, 0], [10, 10], [2, 10], [2, 2], [8, 2], [8, 8], [4, 8], [4, 6],
                       [6, 6], [6, 4], [0, 4]], float)
    polys = [spiral, spiral[::-1] + 0.3]
    for _ in range(20):
        k = int(rng.integers(3, 300))
        th = np.sort(rng.uniform(0, 2 * np.pi, k))
        r = rng.uniform(0.4, 1.5, k)
        polys.append(np.column_stack([r * np.cos(th), r * np.sin(th)]) * 40 + rng.normal(size=2))
    for i, p in enumerate(polys):
        n = (64, 100, 256)[i % 3]
        assert np.allclose(gr.radial_signature(p, n), _brute_signature(p, n), atol=1e-12)


def _drawn(alpha, face, rot_deg, contrast, noise=0.02, seed=0):
    body, rot = body_and_rotation(alpha, face, rot_deg)
    frame = draw_crystal_frame(body, rot, contrast=contrast, noise=noise, seed=seed)
    return evidence(frame)


@pytest.mark.parametrize("contrast", ["bright", "dark"])
def test_batched_interior_fit_equals_one_model_at_a_time(contrast):
    # reference: the single-model fit (interior_rss): numpy least squares for SEM,
    # scipy.optimize.lsq_linear (bounded least squares) for TEM
    lib = gr.model_library()
    tab = lib.tables
    _, inner = _drawn(2.0, "100", 17.0, contrast)
    rng = np.random.default_rng(1)
    uniq = np.unique(lib.shape_id)
    shapes = rng.integers(0, uniq.size, 12)
    shifts = rng.integers(0, 256, 12)
    batch = gr.interior_rss_batch(inner, *gr.placed_planes(tab, shapes, shifts, 256),
                                  max_elements=20_000)           # several chunks
    for r, u, k in zip(batch, shapes, shifts):
        i = int(np.flatnonzero(lib.shape_id == uniq[u])[0])
        rot = cr.in_plane_rotation(360.0 * k / 256) @ lib.rotations[i]
        # float32 geometry: a pixel exactly on a facet edge may change side
        assert r == pytest.approx(gr.interior_rss(inner, lib.bodies[i], rot), rel=1e-5)


def test_batched_outline_distances_match_shift_distances():
    lib = gr.model_library()
    tab = lib.tables
    contour, _ = _drawn(1.8, "100", 9.0, "bright")
    sig = gr.radial_signature(contour, 256)
    shifts, dist, valid = gr.outline_candidates(sig, tab)
    uniq = np.unique(lib.shape_id)
    for u in (0, 10, 60, uniq.size - 1):
        i = int(np.flatnonzero(lib.shape_id == uniq[u])[0])
        d = gr.shift_distances(sig, lib.signatures[0, i])
        assert dist[u, 0] == pytest.approx(d.min(), abs=1e-9)
        assert np.allclose(dist[u][valid[u]], d[shifts[u][valid[u]]], atol=1e-9)


@pytest.mark.parametrize("alpha,face,rot_deg,contrast", [
    (1.7, "100", 17.0, "bright"), (2.3, "100", 31.0, "dark"), (2.2, "111", 8.0, "bright"),
    (1.5, "111", 40.0, "dark"), (3.0, "111", 8.0, "bright")])
def test_coarse_search_gives_the_exhaustive_answer(alpha, face, rot_deg, contrast):
    # reference: every candidate model placed over the interior
    contour, inner = _drawn(alpha, face, rot_deg, contrast, seed=int(10 * alpha))
    ref = gr.fit_alpha(contour, inner, search="exhaustive")
    fast = gr.fit_alpha(contour, inner, search="coarse")
    assert abs(fast.alpha_best - ref.alpha_best) <= 0.02
    assert np.isnan(fast.alpha) == np.isnan(ref.alpha)
    assert fast.alpha_lo == pytest.approx(ref.alpha_lo, abs=0.021)
    assert fast.alpha_hi == pytest.approx(ref.alpha_hi, abs=0.021)
    assert fast.face == ref.face
    assert fast.facet_chi2 == pytest.approx(ref.facet_chi2, rel=0.05)


def test_subsampled_interior_keeps_its_weight():
    _, inner = _drawn(2.0, "100", 0.0, "bright")
    sub = gr.subsample_interior(inner, 300)
    assert 300 / 4 <= sub.value.size <= 300
    assert sub.weight * sub.value.size == pytest.approx(inner.value.size)
    # sums of squares over the lattice estimate those over all pixels
    assert sub.weight * np.sum(sub.value ** 2) == pytest.approx(np.sum(inner.value ** 2), rel=0.05)
    assert gr.subsample_interior(inner, 10 ** 5) is inner
    with pytest.raises(ValueError):
        gr.subsample_interior(inner, 5)
    with pytest.raises(ValueError):
        gr.fit_alpha(np.array([[0, 0], [1, 0], [0, 1]], float), search="fast")
