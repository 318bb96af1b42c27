"""The concave test's confidence follows the outline noise (classify-habit 2.7; invented test data).

An outline whose points scatter by ``d`` about the true edge has a hull that exceeds its area by about
``d`` times the perimeter, so its solidity is uncertain by about ``d P / A`` (``classify_habit.solidity_noise``):
``4 d / a`` for a square of side ``a`` and ``2 d / r`` for a disc of radius ``r`` (handbook perimeters and
areas). A grain just under ``min_solidity`` is named irregular either way; how sure the step is of that
depends on its size.
"""
import math

import numpy as np
import pytest

from grainhabit.plugins.habit import classify_habit as cl


P = cl.STEP.resolve({})


def test_solidity_noise_follows_handbook_perimeter_over_area():
    d = P["outline_noise_px"]
    a = 12.0
    square = np.array([[0, 0], [a, 0], [a, a], [0, a]], float)
    assert cl.solidity_noise(square, a * a, 1.0, P) == pytest.approx(4 * d / a)
    r = 9.0
    t = np.linspace(0, 2 * np.pi, 3600, endpoint=False)
    disc = r * np.column_stack([np.cos(t), np.sin(t)])
    assert cl.solidity_noise(disc, math.pi * r * r, 1.0, P) == pytest.approx(2 * d / r, rel=1e-3)
    # a pixel of 0.5 units: the same outline in half-size units is the same grain
    assert cl.solidity_noise(disc * 0.5, math.pi * r * r * 0.25, 0.5, P) == pytest.approx(2 * d / r, rel=1e-3)
    # large grains keep the old width
    big = 400.0 * np.array([[0, 0], [1, 0], [1, 1], [0, 1]], float)
    assert cl.solidity_noise(big, 400.0 ** 2, 1.0, P) == 0.01


def dented_rod(scale):
    """A 6 x 34 rectangle with a notch 4 deep and 10 long in one long side, all lengths times ``scale``."""
    pts = [(0, 0), (12, 0), (17, 4), (22, 0), (34, 0), (34, 6), (0, 6)]
    return scale * np.array(pts, float)


def test_a_small_dented_rod_is_concave_with_little_confidence():
    # the concave test alone (no outline is too far from every family here)
    p = cl.STEP.resolve({"irregular_misfit": 1000.0})
    small, large = dented_rod(1.0), dented_rod(10.0)                  # 16 px and 161 px ECD
    sol_small = cl.hull_shape(small)[0]
    assert sol_small == pytest.approx(cl.hull_shape(large)[0])       # the same shape, the same solidity
    assert sol_small < p["min_solidity"] - 0.02
    h_small, s_small, ev_small, _ = cl.classify_grain(small, None, p)
    h_large, s_large, ev_large, _ = cl.classify_grain(large, None, p)
    assert h_small == h_large == "irregular"
    assert ev_small["habit_note"] == ev_large["habit_note"] == "concave outline"
    assert s_small < 0.65 and s_large > 0.9
