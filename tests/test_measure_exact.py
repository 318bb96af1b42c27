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


def _label_moments_before(lab, image, n):
    # the function as it was (np.flatnonzero of the labels themselves)
    flat = lab.ravel()
    fg = np.flatnonzero(flat)
    ids = flat[fg].astype(np.intp)
    rows, cols = np.divmod(fg, lab.shape[1])
    x, y = cols.astype(np.float64), rows.astype(np.float64)

    def total(w=None):
        return np.bincount(ids, w, n + 1)[1:n + 1]

    area = total().astype(np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        inv = 1.0 / area
        mx, my = total(x) * inv, total(y) * inv
        out = {"area": area, "cx": mx + 0.5, "cy": my + 0.5, "mxx": total(x * x) * inv - mx * mx + 1.0 / 12.0,
               "myy": total(y * y) * inv - my * my + 1.0 / 12.0, "mxy": total(x * y) * inv - mx * my}
        vals = np.asarray(image).ravel()[fg].astype(np.float64)
        mean = total(vals) * inv
        dv = vals - np.concatenate([[0.0], mean])[ids]
        out["mean"], out["std"] = mean, np.sqrt(total(dv * dv) * inv)
    return out


def test_label_moments_equal_the_form_before():
    # reference: label_moments as it was, bit for bit, on a rendered and segmented frame (invented data),
    # with one label left absent
    from grainhabit.frame import FrameData
    from grainhabit.plugins.bench import harness as bu
    from grainhabit.plugins.measure.measure_grains import label_moments
    from grainhabit.plugins.preprocess import flatten_background
    from grainhabit.plugins.segment import segment_grains

    raw = bu.render_frames(1, 512, grains=25, seed=2)[0].astype(np.float32)
    frame = FrameData(source="t.tif", sample="t", raw=raw, pixel_size_nm=bu.PIXEL_SIZE_NM)
    frame = segment_grains.grainhabit_segment(frame=flatten_background.grainhabit_preprocess(frame=frame, params={}),
                                              params={})
    lab = frame.labels.copy()
    lab[lab == 3] = 0
    n = int(lab.max()) + 1
    got, want = label_moments(lab, frame.image, n), _label_moments_before(lab, frame.image, n)
    assert got.keys() == want.keys()
    for k in want:
        np.testing.assert_array_equal(got[k], want[k])
