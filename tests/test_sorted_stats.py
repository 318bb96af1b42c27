"""Issue 19 (branch speed23): robust statistics by selection and from sorted copies, against numpy's own functions.

References: ``numpy.median``, ``numpy.percentile``, ``numpy.quantile`` and ``numpy.histogram`` on the
samples as they are, and the previous forms of the project's estimators (written out here), on invented
samples and on a rendered synthetic frame (plugins/synthetic).
"""

from __future__ import annotations

import numpy as np
import pytest

from grainhabit.plugins.common import image_stats as st
from grainhabit.plugins.preprocess import flatten_background as fb


def _samples(seed):
    rng = np.random.default_rng(seed)
    n = st.SORTED_MIN
    normal = rng.normal(0.3, 0.05, 3 * n + 1)
    ties = np.round(normal * 200) / 200  # few distinct values
    skewed = np.concatenate([rng.normal(0.0, 0.02, 2 * n), rng.normal(0.8, 0.1, n)])
    with_nan = normal.copy()
    with_nan[17] = np.nan
    signed_zero = np.concatenate([np.zeros(n // 2), -np.zeros(n // 2), rng.normal(size=n)])
    return [normal, normal[:-1], ties, skewed, with_nan, signed_zero, normal.astype(np.float32), normal[:1500],
            normal[:1501], np.ones(st.SELECT_MIN), np.arange(st.SELECT_MIN + 1, dtype=np.uint8),
            (normal * 4000).astype(np.uint16), (normal * 4000 - 1000).astype(np.int32), normal[:100],
            normal.reshape(1, -1), skewed.reshape(-1, 16), np.full(n, 2.5)]


def _frame():
    from grainhabit.plugins.synthetic.render import HABITS, make_field

    field = make_field(40, (256, 256), 5.0, {h: 1.0 for h in HABITS}, 60.0, seed=3)
    return np.asarray(field.image, float)


@pytest.mark.parametrize("seed", range(3))
def test_select_median_equals_numpy_median(seed):
    # reference library: numpy.median on the unsorted sample
    for a in _samples(seed) + [_frame()]:
        want, got = np.median(a), st.select_median(a)
        assert got.dtype == want.dtype
        np.testing.assert_array_equal(got, want)
        assert np.signbit(got) == np.signbit(want)
        if a.dtype.kind in "fiu" and not np.isnan(a).any():
            assert st.median(a) == float(want)


def test_select_ranks_equal_numpy_sort():
    # reference library: numpy.sort
    rng = np.random.default_rng(9)
    for a in (rng.normal(size=5000), np.round(rng.normal(size=5001) * 4), rng.integers(0, 9, 4003)):
        ref = np.sort(a)
        for ranks in ([0], [a.size - 1], [10, 11, 12, 13], [7, 8, 400, 401, 402, 4000], list(range(a.size - 3, a.size))):
            assert [float(x) for x in st.select_ranks(a, ranks)] == [float(ref[k]) for k in ranks]


@pytest.mark.parametrize("seed", range(3))
def test_percentiles_equal_numpy_percentile(seed):
    # reference library: numpy.percentile (default linear method) on the unsorted sample
    for a in _samples(seed) + [_frame(), _frame().astype(np.float32).astype(float)]:
        for q in ([0.5, 99.5], [0.1, 99.9], [95], [0, 50, 99.99]):
            np.testing.assert_array_equal(st.percentiles(a, q), np.percentile(a, q))


def _noise_model_reference(top, bottom, n_bins=16):
    """flatten-background 1.8's noise_model_from_pairs: numpy's quantiles and medians of the samples as they are."""
    top, bottom = np.asarray(top, float), np.asarray(bottom, float)
    d = ((bottom - top) / np.sqrt(2.0)).ravel()
    m = (0.5 * (bottom + top)).ravel()
    edges = np.unique(np.quantile(m, np.linspace(0, 1, n_bins + 1)))
    if len(edges) < 3:
        return 0.0, float(np.var(d))
    idx = fb.quantile_bins(edges, m)
    order = np.argsort(idx, kind="stable")
    bounds = np.concatenate([[0], np.cumsum(np.bincount(idx, minlength=len(edges) - 1))])
    d_sorted, m_sorted = d[order], m[order]
    means, variances = [], []
    for k in range(len(edges) - 1):
        dk = d_sorted[bounds[k]:bounds[k + 1]]
        if dk.size < 50:
            continue
        mad = np.median(np.abs(dk - np.median(dk)))
        means.append(np.mean(m_sorted[bounds[k]:bounds[k + 1]]))
        variances.append((1.4826 * mad) ** 2)
    if len(means) < 2:
        return 0.0, float(np.var(d))
    return fb.nonnegative_line(np.asarray(means), np.asarray(variances))


@pytest.mark.parametrize("seed", range(2))
def test_noise_model_from_pairs_equals_previous_form(seed):
    rng = np.random.default_rng(seed)
    img = _frame() / 65535.0
    img = img + rng.normal(0, 0.01 + 0.02 * img)  # noise growing with the signal (shot noise)
    for a in (img, img[:64, :80], np.round(img * 50) / 50):
        top, bottom = a[0:-1:2], a[1::2]
        assert fb.noise_model_from_pairs(top, bottom) == _noise_model_reference(top, bottom)


def test_sorted_histogram_equals_numpy_histogram():
    # reference library: numpy.histogram (equal-width bins, with and without a range)
    rng = np.random.default_rng(5)
    samples = [rng.normal(0.3, 0.05, 40_000), np.round(rng.normal(0, 1, 30_000) * 8) / 8, np.linspace(-1, 1, 4097),
               rng.random(20_000) * 1e-3 + 1e6, np.full(100, 3.0), np.array([1.0])]
    for a in samples:
        srt = np.sort(a)
        for bins in (16, 101, 256):
            for rng_ in (None, (float(np.percentile(a, 0.5)), float(np.percentile(a, 99.5))), (-0.5, 0.25),
                         (float(srt[0]), float(srt[-1]))):
                want = np.histogram(a, bins=bins, range=rng_)
                got = st.sorted_histogram(srt, bins, rng_)
                np.testing.assert_array_equal(got[0], want[0])
                np.testing.assert_array_equal(got[1], want[1])
                # values lying exactly on every edge
                on_edges = np.sort(np.concatenate([a, want[1], want[1]]))
                np.testing.assert_array_equal(st.sorted_histogram(on_edges, bins, rng_)[0],
                                              np.histogram(on_edges, bins=bins, range=rng_)[0])


def test_abs_dev_median_and_kth_of_two_equal_numpy():
    # reference library: numpy.median / numpy.sort of the absolute deviations
    rng = np.random.default_rng(6)
    for n in (1, 2, 3, 10, 11, 1000, 20_001):
        for a in (rng.normal(size=n), np.round(rng.normal(size=n) * 3) / 3):
            sample = st.SortedSample(a)
            for c in (0.0, float(a[0]), float(np.median(a)), -5.0, 5.0, 1 / 3):
                dev = np.abs(a - c)
                assert sample.abs_dev_median(c) == np.median(dev)
                lo, hi = sample.abs_dev_sorted(c)
                ref = np.sort(dev)
                for k in {0, n // 3, n // 2, n - 1}:
                    assert st._kth_of_two(lo, hi, k) == ref[k]
                for reach in (0.1, 1.0, 10.0):
                    np.testing.assert_array_equal(sample.within(c, reach), np.sort(a[dev <= reach]))


def test_sorted_histogram_mode_equals_histogram_mode():
    rng = np.random.default_rng(7)
    img = _frame()
    for a in (img.ravel(), img.ravel() / 65535.0 + rng.normal(0, 0.01, img.size), rng.normal(0, 1, 20_000),
              np.concatenate([rng.normal(0, 0.01, 30_000), rng.uniform(0, 50, 2_000)])):  # a range stretched
        assert st.sorted_histogram_mode(st.SortedSample(a)) == st.histogram_mode(a)


def _peak_cases():
    from grainhabit.plugins.synthetic.render import HABITS, make_field

    rng = np.random.default_rng(8)
    out = []
    for contrast, seed in (("bright", 1), ("dark", 2)):
        img = np.asarray(make_field(40, (256, 256), 5.0, {h: 1.0 for h in HABITS}, 60.0, contrast=contrast,
                                    seed=seed).image, float)
        out.append((img, None))
        out.append((img, rng.random(img.shape) > 0.2))
        out.append((img[100:164, 30:94], None))  # a block of the surface fit's size
    # grains covering most of the frame: their mode above Otsu's threshold (the caller's own steps)
    packed = rng.normal(0, 0.02, (200, 200))
    packed[20:190, 15:195] += 1.0
    out.append((packed, None))
    return out


@pytest.mark.parametrize("half_width", [True, False])
def test_background_peak_sorted_path_equals_previous_steps(monkeypatch, half_width):
    # reference: background_peak's own steps on the values as they are (numpy's partition and histogram)
    from grainhabit.plugins.preprocess import background_peak as bp

    cases = _peak_cases()
    want = {}
    monkeypatch.setattr(bp, "SORTED_MIN", 1 << 62)
    for i, (img, valid) in enumerate(cases):
        for sign in (1, -1, 0):
            want[i, sign] = bp.background_peak(img, sign, valid, half_width=half_width)
    monkeypatch.undo()
    fast_used = 0
    for i, (img, valid) in enumerate(cases):
        for sign in (1, -1, 0):
            assert bp.background_peak(img, sign, valid, half_width=half_width) == want[i, sign]
            v = img[valid] if valid is not None else img.ravel()
            fast_used += bp._sorted_background_peak(v, sign, half_width) is not None
    assert fast_used >= 8  # most cases take the sorted path
