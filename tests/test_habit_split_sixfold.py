"""Split grains completed by six-fold symmetry (invented test data).

Outside references: handbook geometry (the area of a regular hexagon, 3 sqrt(3) s^2 / 2; the
projection of a regular octahedron along a three-fold axis is a regular hexagon, six-fold
symmetric; a square cut by a straight line is completed by central symmetry).
"""
import math

import numpy as np
import pytest

from grainhabit.plugins.habit import engine as en
from grainhabit.plugins.synthetic import render as sy

from builders import classified_on_truth

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
    return classified_on_truth(grains, shape, contrast, PX, seed)


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
