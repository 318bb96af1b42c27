"""Faster robust image statistics (same values), each against the slower reference it replaces.

References named beside each check: numpy's ``median`` (the float32 median by counting bits).
"""

from __future__ import annotations

import numpy as np
import pytest

from grainhabit.plugins.common import image_stats as st


def _float32_samples(seed):
    # invented samples: the shapes a frame's pixels take (noise about a level, integer grey levels kept as
    # float32, one-sided, constant, heavy-tailed, mixed signs and zeros, infinities)
    rng = np.random.default_rng(seed)
    n = (1 << 16) + int(rng.integers(0, 5000))
    return [
        rng.normal(0.0, 1.0, n),
        rng.normal(7888.0, 300.0, n).round(),
        -np.abs(rng.normal(5.0, 1.0, n)),
        np.full(n, 3.5),
        rng.integers(0, 65535, n).astype(float),
        np.r_[np.zeros(n // 2), -np.zeros(n - n // 2)],
        rng.normal(1e30, 1e29, n),
        rng.standard_cauchy(n),
        np.r_[np.full(n // 2, -np.inf), rng.normal(0, 1, 3), np.full(n // 2, np.inf)],
        np.r_[rng.normal(-1e-30, 1e-31, n // 2), rng.normal(1e-30, 1e-31, n - n // 2)],
        np.r_[rng.normal(-2.0, 0.1, n // 2), rng.normal(2.0, 0.1, n // 2 + 1)],
    ]


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("extra", [0, 1])
def test_float32_median_equals_numpy_median(seed, extra):
    # reference library: numpy.median, bit for bit, even and odd counts
    for v in _float32_samples(seed):
        v = np.r_[v, v[:extra]].astype(np.float32)
        np.random.default_rng(seed).shuffle(v)
        ref = float(np.median(v))
        got = st.float32_median(v)
        assert got == ref, (got, ref)
        assert st.median(v) == ref
        if ref != 0.0:
            assert np.float64(got).tobytes() == np.float64(ref).tobytes()


@pytest.mark.parametrize("n", [1, 2, 3, 10, 1001])
def test_float32_median_of_small_samples_equals_numpy_median(n):
    # reference library: numpy.median (median() leaves samples this small to numpy; the kernel itself is exact too)
    v = np.random.default_rng(n).normal(3.0, 2.0, n).astype(np.float32)
    assert st.float32_median(v) == float(np.median(v))
    assert st.median(v) == float(np.median(v))


def test_median_of_float32_with_nan_is_numpy_median():
    # reference library: numpy.median (NaN in the sample: numpy's answer, NaN)
    v = np.random.default_rng(4).normal(0, 1, 1 << 17).astype(np.float32)
    v[100] = np.nan
    with np.errstate(invalid="ignore"):
        assert np.isnan(st.median(v)) and np.isnan(np.median(v))


def test_median_of_a_frame_sized_float32_sample_equals_numpy():
    # reference library: numpy.median on a rendered frame's pixels, as drawn_labels asks for them (invented data)
    from grainhabit.plugins.bench import harness as bu

    raw = bu.render_frames(1, 512, grains=20, seed=3)[0].astype(np.float32)
    for sample in (raw.ravel(), raw[raw < np.percentile(raw, 60)], raw[:, :-1].ravel()):
        assert st.median(sample) == float(np.median(sample))
