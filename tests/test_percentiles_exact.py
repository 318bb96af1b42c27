"""Order statistics by counting float32 bits (common/image_stats.py) against numpy, bit for bit.

Reference library: numpy.percentile (default linear method) and numpy.sort; the samples are invented.
"""

from __future__ import annotations

import numpy as np
import pytest

from grainhabit.plugins.common import image_stats as st


def _samples(seed):
    # invented samples: normal, integer levels with many ties, negative and positive, a pile of zeros
    rng = np.random.default_rng(seed)
    n = int(rng.integers(st.FLOAT32_COUNTING_MIN, 4 * st.FLOAT32_COUNTING_MIN))
    many_zeros = rng.uniform(-1, 1, n)
    many_zeros[: n // 3] = 0.0
    return [rng.normal(0, 1, n), rng.integers(0, 50, n).astype(float), rng.normal(0, 1e-3, n) - 5.0,
            np.abs(rng.normal(0, 1, n)), many_zeros, rng.uniform(1000, 60000, n).round()]


@pytest.mark.parametrize("seed", range(6))
def test_percentiles_equal_numpy_percentile(seed):
    # reference library: numpy.percentile, linear method (float64 samples holding float32 numbers take the
    # counting path; the comparison is of the bits of the float64 results)
    for x in _samples(seed):
        x = x.astype(np.float32).astype(np.float64)
        for q in ((0.5, 99.5), (50.0,), (0.0, 25.0, 99.999), (10.0, 10.0), (33.3, 66.6)):
            got, want = st.percentiles(x, q), np.percentile(x, list(q))
            assert got.dtype == want.dtype == np.float64
            np.testing.assert_array_equal(got.view(np.uint64), want.view(np.uint64))


def test_percentiles_leave_other_samples_to_numpy():
    # reference library: numpy.percentile (float64 values that are no float32 numbers, small samples, q = 100)
    rng = np.random.default_rng(3)
    for x, q in ((rng.normal(0, 1, 200_000), (0.5, 99.5)), (rng.normal(0, 1, 100).astype(np.float32).astype(float),
                                                           (0.5, 99.5)),
                 (rng.normal(0, 1, 100_000).astype(np.float32).astype(float), (100.0,))):
        np.testing.assert_array_equal(st.percentiles(x, q), np.percentile(x, list(q)))


@pytest.mark.parametrize("seed", range(4))
def test_float32_ranks_equal_numpy_sort(seed):
    # reference library: numpy.sort (ranks at both ends, in the middle, repeated, in one group of upper bits)
    for x in _samples(seed):
        v = x.astype(np.float32)
        ranks = [0, 1, v.size // 2, v.size // 2 + 1, v.size - 2, v.size - 1, 7, 7]
        got = st.float32_ranks(v, ranks)
        want = np.sort(v)[ranks]
        assert [float(g) for g in got] == [float(w) for w in want]
