"""Tests of classify-habit on shapes drawn with skimage.draw (invented test data).

Each grain is drawn from the crystal model (:mod:`grainhabit.plugins.habit.crystal`) or as a
plain polygon, with either secondary-electron-like facet shading (bright
polarity) or transmission thickness contrast (dark polarity).
"""
import numpy as np
import pytest
from skimage.draw import ellipse

from grainhabit.plugins.habit import classify_habit as cl
from grainhabit.plugins.habit import crystal as cr
from grainhabit.plugins.habit.vocabulary import HABITS
from grainhabit.plugins.measure import outline as ol

from builders import body_and_rotation, draw_crystal_frame, draw_polygon_frame

# --------------------------------------------------------------- drawing helpers


def habit_of(frame):
    cols = cl.classify_frame(frame)
    return cols["habit"][0], cols


def regular_polygon(n, radius, start_deg=0.0):
    t = np.deg2rad(start_deg + 360.0 * np.arange(n) / n)
    return np.column_stack([radius * np.cos(t), radius * np.sin(t)])


# ------------------------------------------------------------------------ tests

def test_square_with_shaded_corner_facets_is_cube():
    # truncated cube (alpha = 1.3 on {100}): square outline, four small {111}
    # corner facets shaded differently from the top face (Wulff construction)
    body, rot = body_and_rotation(1.3, "100", 20.0)
    habit, cols = habit_of(draw_crystal_frame(body, rot, contrast="bright"))
    assert habit == "cube"
    assert cols["facet_chi2"][0] > cl.STEP.defaults()["facet_chi2_min"]


@pytest.mark.parametrize("mu_per_ecd", [4.0, 0.4])
def test_uniform_square_is_cube_in_either_contrast(mu_per_ecd):
    # a square outline with a flat interior is a cube seen on its top face
    # (Wulff construction: the {100} outline is square for alpha <= 1.5),
    # bright on dark (SEM) or dark on bright (TEM), opaque or semi-transparent
    body, rot = body_and_rotation(1.0, "100", 10.0)
    for contrast in ("bright", "dark"):
        habit, cols = habit_of(draw_crystal_frame(body, rot, contrast=contrast, mu_per_ecd=mu_per_ecd))
        assert habit == "cube"
        # the outline only bounds alpha: NaN, with the bound carried by the range
        assert np.isnan(cols["fit_alpha"][0])
        assert cols["fit_alpha_lo"][0] == pytest.approx(0.5) and 1.0 <= cols["fit_alpha_hi"][0] <= 1.6


@pytest.mark.parametrize("contrast", ["bright", "dark"])
def test_hexagon_with_inclined_facets_is_octahedron(contrast):
    # octahedron on a {111} face: hexagonal outline; SEM shows the top
    # triangle and three inclined facets, TEM a thickness peaking in the middle
    body, rot = body_and_rotation(3.0, "111", 5.0)
    habit, cols = habit_of(draw_crystal_frame(body, rot, contrast=contrast))
    assert habit == "octahedron"


@pytest.mark.parametrize("contrast", ["bright", "dark"])
def test_uniform_hexagon_is_tabular_hexagon(contrast):
    # the same hexagonal outline with a flat, uniform interior: a plate
    body, rot = body_and_rotation(3.0, "111", 5.0)
    habit, _ = habit_of(draw_crystal_frame(body, rot, contrast=contrast, facets=False, mu_per_ecd=0.5))
    assert habit == "tabular_hexagon"


def test_truncated_triangle_is_tabular_triangle():
    # short/long edge 0.05 < 0.1 (design contract rule for tabular_triangle)
    plate = cr.tabular_prism(0.05, 0.1)
    rot = cr.in_plane_rotation(33.0) @ cr.resting_rotation("111")
    poly = cr.project(plate, rot) * 70
    habit, cols = habit_of(draw_polygon_frame(poly))
    assert habit == "tabular_triangle"
    assert cols["plate_edge_ratio"][0] < 0.1


def test_tabular_hexagon_three_long_three_short_edges():
    # common practice: a hexagonal tabular grain has three long and three
    # short edges, alternating; edge ratio 0.5 here
    plate = cr.tabular_prism(0.5, 0.1)
    rot = cr.in_plane_rotation(12.0) @ cr.resting_rotation("111")
    poly = cr.project(plate, rot)
    e = ol.polygon_edges(poly)
    assert len(e) == 6
    assert np.allclose(e[0::2], e[0]) and np.allclose(e[1::2], e[1])
    assert min(e[0], e[1]) / max(e[0], e[1]) == pytest.approx(0.5, abs=1e-9)
    habit, cols = habit_of(draw_polygon_frame(poly * 70))
    assert habit == "tabular_hexagon"
    assert cols["plate_edge_ratio"][0] == pytest.approx(0.5, abs=0.08)


def test_elongated_prism_is_rod():
    rect = np.array([[-60, -12], [60, -12], [60, 12], [-60, 12]], float)
    t = np.deg2rad(25)
    r = np.array([[np.cos(t), -np.sin(t)], [np.sin(t), np.cos(t)]])
    habit, cols = habit_of(draw_polygon_frame(rect @ r.T, size=160))
    assert habit == "rod"
    assert cols["rod_aspect"][0] == pytest.approx(5.0, rel=0.15)


def test_rounded_blob_is_irregular():
    # a lumpy rounded grain: ellipse with two bumps (ripened / aggregated look)
    size = 128
    lab = np.zeros((size, size), np.int32)
    for (r, c, a, b) in ((64, 64, 30, 24), (44, 80, 12, 12), (86, 50, 10, 10)):
        rr, cc = ellipse(r, c, a, b, (size, size))
        lab[rr, cc] = 1
    img = np.where(lab > 0, 0.45, 0.1).astype(np.float32)
    frame = draw_polygon_frame(regular_polygon(6, 30)).replace(raw=img, image=img, labels=lab)
    habit, cols = habit_of(frame)
    assert habit == "irregular"


def test_disc_is_irregular():
    size = 128
    lab = np.zeros((size, size), np.int32)
    rr, cc = ellipse(64, 64, 35, 35, (size, size))
    lab[rr, cc] = 1
    img = np.where(lab > 0, 0.45, 0.1).astype(np.float32)
    frame = draw_polygon_frame(regular_polygon(6, 30)).replace(raw=img, image=img, labels=lab)
    assert habit_of(frame)[0] == "irregular"


def test_hull_shape_square_feret_and_solidity():
    # ISO 9276-6 / handbook geometry: Feret of a square are side and side*sqrt(2)
    sq = np.array([[0, 0], [10, 0], [10, 10], [0, 10]], float)
    sol, fmin, fmax = cl.hull_shape(sq)
    assert sol == pytest.approx(1.0)
    assert fmin == pytest.approx(10.0)
    assert fmax == pytest.approx(10 * np.sqrt(2))
    ell = np.array([[0, 0], [10, 0], [10, 4], [4, 4], [4, 10], [0, 10]], float)
    assert cl.hull_shape(ell)[0] == pytest.approx(64 / 82)   # area 64, hull area 100 - 18


def test_hook_returns_columns_for_every_grain():
    body, rot = body_and_rotation(2.0, "100", 0.0)
    frame = draw_crystal_frame(body, rot)
    out = cl.grainhabit_classify(frame, cl.STEP.resolve({}))
    assert set(HABITS) >= set(out.grains["habit"])
    assert 0.0 <= out.grains["habit_score"][0] <= 1.0
    for c in cl.STEP.outputs:
        assert c.name in out.grains
    assert out.grains["habit"][0] == "cuboctahedron"


def test_bad_parameter_is_refused():
    with pytest.raises(ValueError):
        cl.STEP.resolve({"min_solidity": 1.5})


def test_outline_shortcut_gives_the_same_habit_as_the_full_fit(monkeypatch):
    # reference: the same grains classified with the interior fit forced on
    plate = cr.tabular_prism(0.5, 0.1)
    rot = cr.in_plane_rotation(12.0) @ cr.resting_rotation("111")
    rect = np.array([[-60, -12], [60, -12], [60, 12], [-60, 12]], float)
    body, brot = body_and_rotation(3.0, "111", 5.0)
    cube, crot = body_and_rotation(1.0, "100", 21.0)
    frames = [draw_polygon_frame(cr.project(plate, rot) * 70),
              draw_polygon_frame(cr.project(cr.tabular_prism(0.05, 0.1), rot) * 70),
              draw_polygon_frame(rect, size=160),
              draw_crystal_frame(body, brot, contrast="dark", facets=False, mu_per_ecd=0.5),
              draw_crystal_frame(cube, crot, contrast="dark", noise=0.02),
              draw_crystal_frame(cube, crot, contrast="bright", noise=0.02)]
    placed = []                                     # per frame: whether each fit placed the interior
    real = cl.en.fit_alpha_steps

    def spy(contour, interior=None, **kw):
        placed[-1].append(interior is not None and kw.get("search") != "quick")
        return real(contour, interior, **kw)

    monkeypatch.setattr(cl.en, "fit_alpha_steps", spy)
    short = []
    for f in frames:
        placed.append([])
        short.append(cl.classify_frame(f))
    assert not any(any(p) for p in placed[:3])      # plate and rod outlines decided alone
    monkeypatch.setattr(cl, "outline_decides", lambda *a, **k: False)
    monkeypatch.setattr(cl.en, "outline_settles", lambda *a, **k: False)
    full = [cl.classify_frame(f) for f in frames]
    assert [c["habit"][0] for c in short] == [c["habit"][0] for c in full]
    assert [c["habit"][0] for c in short] == ["tabular_hexagon", "tabular_triangle", "rod",
                                              "tabular_hexagon", "cube", "cube"]
