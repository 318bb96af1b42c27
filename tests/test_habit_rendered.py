"""The habit steps on grains rendered by the project's renderer (invented test data).

Each grain is a Wulff shape (:mod:`grainhabit.plugins.habit.crystal`) projected and shaded
by :mod:`grainhabit.plugins.synthetic.render` (blur, noise, illumination gradient), and
the default chain (flatten-background, segment-grains, measure-grains, classify-habit,
fit-growth-ratio) is run on it, as ``grainhabit bench habit --coverage`` does on more grains.
"""
import math

import numpy as np
import pytest

from grainhabit.frame import FrameData
from grainhabit.plugins.bench import habit as bh
from grainhabit.plugins.habit import crystal as cr
from grainhabit.plugins.habit import engine as en
from grainhabit.plugins.synthetic import render as sy


@pytest.mark.parametrize("alpha,face,size,contrast", [
    (0.8, "100", 40, "dark"), (1.3, "100", 60, "bright"), (2.0, "100", 40, "bright"),
    (2.9, "100", 60, "dark"), (1.8, "111", 40, "dark"), (2.6, "111", 60, "bright"),
    (3.3, "111", 40, "bright"), (1.2, "110", 60, "dark"), (2.4, "110", 40, "bright")])
def test_range_holds_the_true_alpha_of_a_rendered_grain(alpha, face, size, contrast):
    # truth: the alpha the grain was rendered with (all alpha <= 1 are the cube and all
    # alpha >= 3 the octahedron: Wulff construction, so the range must reach that end member)
    row = bh.single_grain(alpha, face, size, contrast, np.random.default_rng(int(alpha * 100) + size))
    assert row is not None
    assert bh.covered(alpha, row["fit_alpha_lo"], row["fit_alpha_hi"])
    if alpha <= 1.0:
        # a square outline only bounds alpha: NaN, the bound in the range (design contract)
        assert np.isnan(row["alpha"]) and row["alpha_lo"] == pytest.approx(0.5)


def test_covered_counts_end_members_as_one_body():
    assert bh.covered(0.7, 0.5, 1.2) and bh.covered(0.7, 0.9, 1.4) and not bh.covered(0.7, 1.1, 1.4)
    assert bh.covered(3.4, 2.9, 4.0) and not bh.covered(3.4, 2.5, 2.95) and not bh.covered(2.0, np.nan, 3.0)


@pytest.mark.parametrize("contrast", ["bright", "dark"])
def test_clean_square_cube_is_a_cube_in_both_contrasts(contrast):
    # dark is the transmission look: a dark square on a bright background
    row = bh.single_grain(1.0, "100", 50, contrast, np.random.default_rng(5))
    assert row["habit"] == "cube" and row["habit_score"] > 0.5
    assert np.isnan(row["alpha"]) and row["alpha_hi"] <= 1.6


@pytest.mark.parametrize("contrast", ["bright", "dark"])
def test_octahedron_is_told_from_a_cuboctahedron(contrast):
    rng = np.random.default_rng(9)
    assert bh.single_grain(3.3, "111", 50, contrast, rng)["habit"] == "octahedron"
    assert bh.single_grain(2.2, "111", 50, contrast, rng)["habit"] == "cuboctahedron"
    assert bh.single_grain(2.2, "100", 50, contrast, rng)["habit"] == "cuboctahedron"


@pytest.mark.parametrize("ecd_px", [8, 11])
def test_tiny_grain_is_not_confidently_labelled(ecd_px):
    # at about ten pixels a cube's corners are within the outline noise of a disc
    for alpha, face in ((1.0, "100"), (3.2, "111")):
        row = bh.single_grain(alpha, face, ecd_px, "bright", np.random.default_rng(ecd_px))
        assert row["habit"] == "irregular" and row["habit_score"] <= 0.25
        assert "unresolved" in row["habit_note"] or "too small to resolve" in row["habit_note"]


@pytest.mark.parametrize("contrast", ["bright", "dark"])
def test_split_cube_keeps_its_habit(contrast):
    # two cubes touching face to face, one shifted along the contact by a third of its side
    px, side = 10.0, 50.0
    ecd = side * 2 / math.sqrt(math.pi) * px
    g = [sy.GrainSpec("cube", ecd, 600.0, 600.0, rotation_deg=0.0, alpha=1.0),
         sy.GrainSpec("cube", ecd, 600.0 + side * px, 600.0 + side * px / 3, rotation_deg=0.0, alpha=1.0)]
    field = sy.render_field(g, (160, 180), px, contrast, seed=3)
    out = bh.run_chain(FrameData(source="split", sample="invented", raw=field.image, pixel_size_nm=px,
                                 calibration="synthetic"))
    inner = ~np.asarray(out.grains["edge_cut"], bool)
    assert inner.sum() == 2 and np.all(np.asarray(out.grains["split"])[inner])
    assert list(np.asarray(out.grains["habit"])[inner]) == ["cube", "cube"]


def test_completion_by_symmetry_restores_a_cut_square():
    # handbook geometry: a square cut by a chord keeps more than half of its outline; the
    # smallest centrally symmetric convex set holding the rest is the square again
    sq = np.array([[0, 0], [10, 0], [10, 10], [0, 10]], float)
    cut = np.array([[0, 0], [10, 0], [10, 6], [7, 10], [0, 10]], float)
    done = en.complete_by_symmetry(cut)
    assert en.polygon_centroid(done)[1] == pytest.approx(100.0, rel=1e-3)
    assert np.allclose(done.min(axis=0), sq.min(axis=0), atol=0.05)
    assert np.allclose(done.max(axis=0), sq.max(axis=0), atol=0.05)


def test_rounded_square_area_closed_form():
    # handbook geometry: a square of side s with corners rounded to radius r has area
    # s^2 - (4 - pi) r^2
    sq = np.array([[0, 0], [2, 0], [2, 2], [0, 2]], float)
    r = en.rounded_outline(sq, 0.5, arc_step_deg=0.5)
    assert en.polygon_centroid(r)[1] == pytest.approx(4 - (4 - math.pi) * 0.25, rel=1e-4)
    assert np.allclose(en.rounded_outline(sq, 0.0), sq)


def test_view_prior_follows_the_faces_of_the_body():
    # Wulff construction: the cube has only {100} faces, the octahedron only {111}
    assert en.view_probability(1.0, "100") == pytest.approx(1.0)
    assert en.view_probability(3.0, "111") == pytest.approx(1.0)
    assert en.view_probability(1.0, "111", floor=0.02) == pytest.approx(0.02)
    assert en.view_probability(2.0, "110", floor=0.02) == pytest.approx(0.02)
    p = cr.wulff_polyhedron(2.0)
    fam = np.array([cr.face_family(m) for m in p.face_miller])
    share = p.face_areas[fam == "100"].sum() / p.surface_area
    assert en.view_probability(2.0, "100") + en.view_probability(2.0, "111") == pytest.approx(1.0)
    assert en.view_probability(2.0, "100") == pytest.approx(share)


@pytest.mark.parametrize("contrast", ["bright", "dark"])
def test_grain_under_the_resolved_size_gets_no_habit(contrast):
    # a rod of aspect 3 rendered at 5 px ECD (its width about 2.5 px) is kept by segment-grains (floor 4 px)
    # but its outline's pixel steps are as large as what tells a rod from a plate or a prism: irregular with
    # habit_score 0; the same rod at 16 px is a rod (the rule follows size, it does not hide rods)
    px = 10.0
    for ecd_px, habit in ((5.0, "irregular"), (16.0, "rod")):
        g = [sy.GrainSpec("rod", ecd_px * px, 400.0, 400.0, rotation_deg=30.0, aspect=3.0)]
        field = sy.render_field(g, (80, 80), px, contrast, seed=5)
        out = bh.run_chain(FrameData(source="tiny-rod", sample="invented", raw=field.image, pixel_size_nm=px,
                                     calibration="synthetic"))
        assert out.n_grains == 1
        assert (out.grains["ecd_nm"][0] / px < 8.0) == (habit == "irregular")  # measured below / above 8 px
        assert str(out.grains["habit"][0]) == habit, (ecd_px, out.grains["habit"][0])
        if habit == "irregular":
            assert out.grains["habit_score"][0] == 0.0
            assert "too small to resolve" in str(out.grains["habit_note"][0])
