"""Measure kernels written without scipy.signal (same values), against scipy's own functions.

References named beside each check: ``scipy.signal.savgol_coeffs`` (Savitzky-Golay weights) and the
cyclic smoothing written with them.
"""

from __future__ import annotations

import numpy as np
import pytest

from grainhabit.plugins.measure import outline


@pytest.mark.parametrize("window", [3, 5, 7, 9, 11, 15, 21, 31])
def test_savgol_coefficients_equal_scipy_savgol_coeffs(window):
    # reference library: scipy.signal.savgol_coeffs (smoothing, use="conv"), bit for bit
    from scipy.signal import savgol_coeffs

    for order in range(0, min(window, 6)):
        got = outline.savgol_coefficients(window, order)
        want = savgol_coeffs(window, order)
        assert got.dtype == want.dtype
        np.testing.assert_array_equal(got, want)


def test_savgol_coefficients_refuse_bad_windows():
    for window, order in ((4, 2), (3, 3), (5, -1)):
        with pytest.raises(ValueError):
            outline.savgol_coefficients(window, order)


def test_smooth_closed_contour_equals_the_scipy_weights_form():
    # reference library: scipy.signal.savgol_coeffs, convolved cyclically as smooth_closed_contour did it
    # (a staircase outline of an invented disc)
    from scipy.signal import savgol_coeffs
    from skimage.measure import find_contours

    yy, xx = np.mgrid[:50, :50]
    c = find_contours((np.hypot(yy - 25, xx - 24) < 17).astype(float), 0.5)[0][:-1, ::-1]
    for window in (5, 9):
        coef, h = savgol_coeffs(window, 2), window // 2
        ext = np.concatenate([c[-h:], c, c[:h]])
        want = np.stack([np.convolve(ext[:, j], coef, mode="valid") for j in range(2)], axis=1)
        np.testing.assert_array_equal(outline.smooth_closed_contour(c, window, 2), want)
