"""How much {100} truncation of an octahedron a grain's outline can show (handbook geometry).

Rendered grains are invented test data (the project's renderer).
"""
import math

import numpy as np
import pytest

from grainhabit.plugins.bench import habit as bh
from grainhabit.plugins.habit import crystal as cr
from grainhabit.plugins.habit import engine as en


def _tau_level(ecd_px):
    area = math.pi * ecd_px ** 2 / 4
    tau = max(0.25 / math.sqrt(area), 0.003)
    level = int(np.argmin(np.abs(np.asarray(en.ROUNDING_LEVELS) - 1.0 / ecd_px)))
    return tau, level


@pytest.mark.parametrize("alpha", [2.2, 2.7, 2.95])
def test_truncation_square_of_a_cut_octahedron(alpha):
    # handbook geometry: with d100 = 1 the octahedron |x| + |y| + |z| <= 3 / alpha is cut by
    # x = 1 in the square |y| + |z| <= h, h = 3 / alpha - 1, of area 2 h^2
    p = cr.wulff_polyhedron(alpha)
    fam = np.array([cr.face_family(m) for m in p.face_miller])
    h = 3.0 / alpha - 1.0
    assert np.allclose(p.face_areas[fam == "100"], 2.0 * h * h, rtol=1e-9)


@pytest.mark.parametrize("alpha", [2.4, 2.8])
def test_corner_cut_along_111(alpha):
    # handbook geometry: seen along n = [111] the cut square's corners (1, -h, 0) and (1, 0, -h)
    # lie at r^2 = |v|^2 - (v . n)^2 = (2 + 2 h + 2 h^2) / 3 from the centre, and the short
    # outline edge between them has length h sqrt(2) (the octahedron's hexagon corner, at
    # 2 R / sqrt(6), R = 3 / alpha, recedes by h / sqrt(6) along its own direction)
    p = cr.wulff_polyhedron(alpha)
    out = cr.project(p, cr.resting_rotation("111"))
    h = 3.0 / alpha - 1.0
    assert len(out) == 12
    assert np.linalg.norm(out, axis=1).max() == pytest.approx(math.sqrt((2 + 2 * h + 2 * h * h) / 3), rel=1e-9)
    edges = np.sort(np.linalg.norm(np.roll(out, -1, axis=0) - out, axis=1))
    assert np.allclose(edges[:6], h * math.sqrt(2.0), rtol=1e-9)


def test_gap_table_equals_shift_distances():
    # reference: shift_distances (tested against numpy.roll) between library signatures
    lib = en.model_library()
    tab = lib.tables
    for face in ("100", "111", "110"):
        rows = np.flatnonzero(np.asarray(lib.faces) == face)
        octa = rows[np.argmax(lib.alphas[rows])]
        for a in (1.7, 2.5, 2.9):
            i = rows[np.argmin(np.abs(lib.alphas[rows] - a))]
            for level in (0, 3):
                ref = en.shift_distances(lib.signatures[level, i], lib.signatures[level, octa]).min()
                assert tab.octa_gap[level, tab.model_shape[i]] == pytest.approx(ref, abs=1e-9)


def test_resolvable_alpha_grows_with_size_and_power_costs():
    lib = en.model_library()
    for face in ("100", "110"):
        seen = [en.resolvable_alpha(lib, face, *_tau_level(e)) for e in (25, 40, 60, 80)]
        sure = [en.resolvable_alpha(lib, face, *_tau_level(e), power_z=1.645) for e in (25, 40, 60, 80)]
        assert all(np.diff(seen) >= 0) and all(np.diff(sure) >= 0)
        assert all(s <= d for s, d in zip(sure, seen))
        assert 2.0 < seen[0] < 3.0 and seen[-1] < 3.0


@pytest.mark.parametrize("contrast", ["bright", "dark"])
def test_unresolvable_cuboctahedron_is_bounded_not_confident(contrast):
    # alpha 2.93 at 40 px on {111}: the corners recede by 0.27 * 40 * (1 - 2.93 / 3) = 0.25 px
    alpha = 2.93
    tau, level = _tau_level(40)
    assert alpha > en.resolvable_alpha(en.model_library(), "111", tau, level)
    row = bh.single_grain(alpha, "111", 40, contrast, np.random.default_rng(11))
    assert row["habit"] in ("octahedron", "cuboctahedron")
    assert bh.covered(alpha, row["alpha_lo"], row["alpha_hi"])
    if row["habit"] == "octahedron":
        assert row["habit_score"] <= 0.5 and np.isnan(row["alpha"])
        assert "resolves no truncation" in row["habit_note"]
