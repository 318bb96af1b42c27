"""Tests of the interval, frame-clustering and family-wise pieces of plugins.statistics.

Each check names its outside reference: scipy.stats (binomtest, ttest_ind,
sem), numpy.quantile, or a worked example from the cited paper. Simulated
populations are invented test data.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from grainhabit.plugins.survey import statistics as st

# --------------------------------------------------------------------------
# fractions
# --------------------------------------------------------------------------


@pytest.mark.parametrize("k,n", [(0, 50), (1, 50), (25, 50), (49, 50), (50, 50), (0, 1), (1, 1), (3, 7), (0, 400)])
def test_binomial_ci_matches_scipy_binomtest(k, n):
    # reference library: scipy.stats.binomtest(...).proportion_ci, methods "exact"
    # (Clopper-Pearson) and "wilson"
    for ours, ref in (("clopper-pearson", "exact"), ("wilson", "wilson")):
        lo, hi = st.binomial_ci(k, n, 0.95, ours)
        r = stats.binomtest(k, n).proportion_ci(0.95, method=ref)
        assert lo == pytest.approx(r.low, abs=1e-12) and hi == pytest.approx(r.high, abs=1e-12), (ours, k, n)


def test_zero_of_fifty_is_not_zero_width():
    # 0 of 50: Clopper-Pearson [0, 1 - 0.025^(1/50)] = [0, 0.0711] (Clopper and Pearson 1934)
    lo, hi = st.binomial_ci(0, 50)
    assert lo == 0.0 and hi == pytest.approx(1 - 0.025 ** (1 / 50)) and round(hi, 3) == 0.071
    # the clustered form on one frame (no frame-to-frame spread seen) is the same interval
    assert st.proportion_ci(0.0, 0.0, 50) == pytest.approx((0.0, hi))
    # vectorised, and n = 0 gives NaN
    lo, hi = st.binomial_ci(np.array([0, 5]), np.array([0, 10]))
    assert np.isnan(lo[0]) and np.isnan(hi[0]) and 0 < lo[1] < 0.5 < hi[1] < 1
    with pytest.raises(ValueError, match="k <= n"):
        st.binomial_ci(6, 5)


def test_proportion_ci_is_clopper_pearson_for_binomial_variance_and_widens_for_few_frames():
    # Korn and Graubard (1998): with the binomial variance p(1-p)/n and no degrees-of-freedom
    # loss the effective n is n, so the interval is Clopper-Pearson (scipy.stats.binomtest)
    p, n = 12 / 80, 80
    lo, hi = st.proportion_ci(p, p * (1 - p) / n, n)
    r = stats.binomtest(12, 80).proportion_ci(0.95, method="exact")
    assert (lo, hi) == pytest.approx((r.low, r.high))
    # a design effect of 2 halves the effective n: the interval of 6 of 40
    lo2, hi2 = st.proportion_ci(p, 2 * p * (1 - p) / n, n)
    r2 = stats.binomtest(6, 40).proportion_ci(0.95, method="exact")
    assert (lo2, hi2) == pytest.approx((r2.low, r2.high))
    # the variance estimated from 4 frames (df 3) widens it further; from 40 frames hardly
    lo3, hi3 = st.proportion_ci(p, 2 * p * (1 - p) / n, n, df=3)
    lo4, hi4 = st.proportion_ci(p, 2 * p * (1 - p) / n, n, df=39)
    assert lo3 < lo4 < lo2 and hi2 < hi4 < hi3


# --------------------------------------------------------------------------
# frame-clustered errors
# --------------------------------------------------------------------------


def test_clustered_mean_equal_frames_is_the_error_of_frame_means():
    # Cochran (1977): with equal frame sizes the ratio estimate is the mean of the frame
    # means and its clustered variance is their variance / F (reference: scipy.stats.sem)
    rng = np.random.default_rng(3)
    f = np.repeat(np.arange(8), 20)
    y = rng.normal(300, 30, f.size) + rng.normal(0, 15, 8)[f]
    sp = st.clustered_mean(y, f)
    means = np.array([y[f == i].mean() for i in range(8)])
    assert sp.estimate == pytest.approx(means.mean())
    assert sp.se == pytest.approx(stats.sem(means))
    assert sp.df == 7 and sp.n_clusters == 8
    # every grain its own frame: the ordinary standard error s / sqrt(n) (scipy.stats.sem)
    sp1 = st.clustered_mean(y, np.arange(y.size))
    assert sp1.se == pytest.approx(stats.sem(y))
    # one frame: independent grains, df n - 1
    sp0 = st.clustered_mean(y, np.zeros(y.size))
    assert sp0.se == pytest.approx(stats.sem(y)) and sp0.df == y.size - 1


def test_weighted_statistics_equal_the_repeated_sample():
    # a bootstrap weight c repeats a grain c times: reference numpy.quantile(method="hazen")
    # and the ddof = 1 COV of the repeated sample
    rng = np.random.default_rng(5)
    x = rng.lognormal(np.log(300), 0.2, 60)
    w = rng.multinomial(60, np.full(60, 1 / 60), size=6).astype(float)
    q = st.weighted_quantile_stat(x, [0.1, 0.5, 0.9])
    cov = st.weighted_cov_stat(x)
    d32 = st.weighted_moment_mean_stat(x, 3, 2)
    for row in w:
        rep = np.repeat(x, row.astype(int))
        np.testing.assert_allclose(q(row[None])[0], np.quantile(rep, [0.1, 0.5, 0.9], method="hazen"))
        assert cov(row[None])[0] == pytest.approx(st.mean_sd_cov(rep)[2])
        assert d32(row[None])[0] == pytest.approx(st.sauter_diameter(rep))
    np.testing.assert_allclose(q(np.ones((1, 60)))[0], st.d_values(x))


def _clustered_population(rng, frames, per_frame, spread=0.03, sd=0.12):
    f = np.repeat(np.arange(frames), per_frame)
    return 300.0 * np.exp(rng.normal(0, spread, frames))[f] * rng.lognormal(0, sd, f.size), f


def test_frame_intervals_cover_where_grain_intervals_do_not():
    # Davison and Hinkley (1997) 3.8: with a 3 % frame-to-frame spread and 40 grains a frame,
    # intervals that take grains as independent are far too narrow; resampling frames is not.
    # 200 repetitions: the binomial SE of a 95 % coverage is 1.5 %.
    rng = np.random.default_rng(11)
    truth = 300.0 * np.exp(0.5 * (0.03**2 + 0.12**2))  # lognormal mean (Hatch-Choate)
    hit_frame = hit_grain = hit_boot = 0
    reps = 200
    for i in range(reps):
        x, f = _clustered_population(rng, 10, 40)
        sp = st.clustered_mean(x, f)
        lo, hi = st.t_interval(sp)
        hit_frame += lo <= truth <= hi
        se = stats.sem(x)
        hit_grain += abs(x.mean() - truth) <= 1.96 * se
        if i < 60:
            bs = st.clustered_bootstrap(st.weighted_mean_stat(x), x.size, f, n_resamples=100, rng=rng)
            blo, bhi = st.t_interval(bs)
            hit_boot += blo <= truth <= bhi
    print("coverage frame / grain / frame bootstrap:", hit_frame / reps, hit_grain / reps, hit_boot / 60)
    assert 0.91 <= hit_frame / reps <= 0.99
    assert hit_grain / reps < 0.85
    assert hit_boot / 60 >= 0.85


def test_clustered_bootstrap_input_checks_and_tiny_samples():
    x = np.array([300.0])
    sp = st.clustered_bootstrap(st.weighted_cov_stat(x), 1, [0], n_resamples=20)
    assert np.isnan(sp.se)
    with pytest.raises(ValueError, match="n_resamples"):
        st.clustered_bootstrap(st.weighted_mean_stat(x), 1, [0], n_resamples=5)
    with pytest.raises(ValueError, match="clusters has 2 entries"):
        st.clustered_bootstrap(st.weighted_mean_stat(x), 1, [0, 1])


# --------------------------------------------------------------------------
# alpha bounds
# --------------------------------------------------------------------------


def test_alpha_states_and_ranges():
    nan = np.nan
    alpha = np.array([1.2, nan, nan, 2.2, 3.4, nan, nan])
    lo = np.array([1.1, 0.5, 3.0, 2.1, 3.2, 1.2, nan])
    hi = np.array([1.3, 1.5, 4.0, 2.3, 3.6, 2.0, nan])
    det, bnd = st.alpha_states(alpha, lo, hi)
    assert det.tolist() == [1, 0, 0, 1, 1, 0, 0] and bnd.tolist() == [0, 1, 1, 0, 0, 1, 0]
    yes, und = st.alpha_in_range(alpha, lo, hi, 1.5, below=True)
    assert yes.tolist() == [1, 1, 0, 0, 0, 0, 0] and und.tolist() == [0, 0, 0, 0, 0, 1, 0]
    yes, und = st.alpha_in_range(alpha, lo, hi, 3.0, below=False)
    assert yes.tolist() == [0, 0, 1, 0, 1, 0, 0] and not und.any()


# --------------------------------------------------------------------------
# differences and Holm
# --------------------------------------------------------------------------


def test_difference_of_independent_grains_is_welchs_t_test():
    # reference library: scipy.stats.ttest_ind(equal_var=False); each grain its own frame
    rng = np.random.default_rng(2)
    a, b = rng.normal(300, 20, 40), rng.normal(310, 35, 55)
    d = st.difference(st.clustered_mean(a, np.arange(40)), st.clustered_mean(b, np.arange(55)))
    ref = stats.ttest_ind(b, a, equal_var=False)
    assert d.estimate == pytest.approx(b.mean() - a.mean())
    assert d.pvalue == pytest.approx(ref.pvalue) and d.df == pytest.approx(ref.df)


def test_holm_worked_example():
    # Holm (1979) procedure by hand: p = 0.01, 0.04, 0.03, 0.005 at alpha 0.05; sorted
    # 0.005 <= 0.05/4 reject, 0.01 <= 0.05/3 reject, 0.03 > 0.05/2 stop
    rej, level = st.holm([0.01, 0.04, 0.03, 0.005, np.nan])
    assert rej.tolist() == [True, False, False, True, False]
    np.testing.assert_allclose(level[:4], [0.05 / 3, 0.025, 0.025, 0.0125])
    assert np.isnan(level[4])
    # Bonferroni would reject only 0.005 (<= 0.0125); Holm rejects at least as much
    assert st.holm([0.2, 0.3])[0].tolist() == [False, False]
