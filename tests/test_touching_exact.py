"""Touching-grain kernels written without scipy.signal (same answers), against scipy's own functions.

References named beside each check: ``scipy.signal.find_peaks`` (peaks with a height and a prominence)
and ``skimage.measure.find_contours`` of the padded mask (the outline that convexity_defects follows).
"""

from __future__ import annotations

import numpy as np
import pytest

from grainhabit.plugins.segment import touching


def _signals(seed):
    # invented signals: smooth bumps, noise, and integer steps with flat tops (plateaus at either end too)
    rng = np.random.default_rng(seed)
    n = int(rng.integers(3, 200))
    t = np.linspace(0, 1, n)
    out = [np.sin(t * rng.uniform(2, 30)) * rng.uniform(0.5, 5) + rng.normal(0, 0.3, n),
           rng.integers(0, 4, n).astype(float),
           np.repeat(rng.integers(0, 6, max(1, n // 4)).astype(float), 4),
           np.abs(rng.normal(0, 2, n)),
           np.r_[0.0, np.abs(rng.normal(0, 2, n)), 0.0]]
    flat = rng.integers(0, 3, n).astype(float)
    flat[:3] = flat[-3:] = 2.0  # flat runs touching both ends
    out.append(flat)
    return out


@pytest.mark.parametrize("seed", range(40))
def test_find_peaks_equals_scipy_find_peaks(seed):
    # reference library: scipy.signal.find_peaks with height and prominence
    from scipy.signal import find_peaks

    rng = np.random.default_rng(1000 + seed)
    for x in _signals(seed):
        for height, prom in ((0.0, 0.0), (0.5, 0.25), (1.0, 1.0), (float(rng.uniform(0, 3)), float(rng.uniform(0, 2)))):
            want = find_peaks(x, height=height, prominence=prom)[0]
            got = touching.find_peaks(x, height, prom)
            np.testing.assert_array_equal(got, want)
            assert got.dtype == np.intp


def test_find_peaks_of_short_signals_is_empty():
    # reference library: scipy.signal.find_peaks (no sample of a 0-2 sample signal is a peak)
    from scipy.signal import find_peaks

    for x in (np.zeros(0), np.ones(1), np.array([0.0, 1.0])):
        assert touching.find_peaks(x, 0.0, 0.0).size == 0 == find_peaks(x, height=0.0, prominence=0.0)[0].size


def test_convexity_defects_follow_the_padded_outline():
    # reference library: skimage.measure.find_contours of np.pad(mask, 1) as float32 at level 0.5, the outline
    # the defects are found on (two overlapping discs, invented shape)
    from skimage.measure import find_contours

    yy, xx = np.mgrid[:60, :90]
    mask = (np.hypot(yy - 30, xx - 30) < 20) | (np.hypot(yy - 30, xx - 60) < 18)
    _, pts = touching.convexity_defects(mask, 2.0, outline=True)
    want = max(find_contours(np.pad(mask, 1).astype(np.float32), 0.5), key=len)[:-1] - 1.0
    np.testing.assert_array_equal(pts, want)
