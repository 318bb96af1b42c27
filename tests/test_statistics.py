"""Tests of grainhabit.plugins.survey.statistics against published definitions and reference libraries."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from grainhabit.plugins.survey import statistics as st

# --------------------------------------------------------------------------
# ISO 9276-2 moment means and ISO 9276-1 distributions on a hand-worked population
# --------------------------------------------------------------------------

# sizes 1, 2, 3, 4 (um) with counts 4, 3, 2, 1
X = np.array([1.0, 2.0, 3.0, 4.0])
N = np.array([4.0, 3.0, 2.0, 1.0])


def test_moment_means_hand_worked_iso_9276_2():
    # ISO 9276-2, D[p,q] = (sum n x^p / sum n x^q)^(1/(p-q)); sums done by hand:
    # sum n = 10, sum n x = 4+6+6+4 = 20, sum n x^2 = 4+12+18+16 = 50,
    # sum n x^3 = 4+24+54+64 = 146, sum n x^4 = 4+48+162+256 = 470
    assert st.moment_mean(X, 1, 0, N) == pytest.approx(20 / 10)
    assert st.moment_mean(X, 2, 0, N) == pytest.approx(np.sqrt(50 / 10))
    assert st.moment_mean(X, 3, 0, N) == pytest.approx((146 / 10) ** (1 / 3))
    assert st.sauter_diameter(X, N) == pytest.approx(146 / 50)  # D[3,2] = 2.92
    assert st.de_brouckere_diameter(X, N) == pytest.approx(470 / 146)  # D[4,3] = 3.2192
    # ISO 9276-2, p = q: D[3,3] = exp(sum n x^3 ln x / sum n x^3)
    # = exp((24 ln 2 + 54 ln 3 + 64 ln 4) / 146)
    d33 = np.exp((24 * np.log(2) + 54 * np.log(3) + 64 * np.log(4)) / 146)
    assert st.moment_mean(X, 3, 3, N) == pytest.approx(d33)
    # counts are the same as repeating sizes
    assert st.sauter_diameter(np.repeat(X, N.astype(int))) == pytest.approx(146 / 50)
    # scale invariance of a mean diameter: D[p,q](c x) = c D[p,q](x)
    assert st.moment_mean(1e3 * X, 4, 3, N) == pytest.approx(1e3 * 470 / 146)


def test_cumulative_distributions_hand_worked_iso_9276_1():
    # ISO 9276-1: Q_r at the class edges; weights n x^r
    edges = [0.5, 1.5, 2.5, 3.5, 4.5]
    Q0, q0 = st.size_distribution(X, edges, r=0, counts=N)
    np.testing.assert_allclose(Q0, [0, 0.4, 0.7, 0.9, 1.0])
    np.testing.assert_allclose(q0, [0.4, 0.3, 0.2, 0.1])  # class width 1
    Q2, _ = st.size_distribution(X, edges, r=2, counts=N)  # 4, 12, 18, 16 of 50
    np.testing.assert_allclose(Q2, [0, 4 / 50, 16 / 50, 34 / 50, 1.0])
    Q3, _ = st.size_distribution(X, edges, r=3, counts=N)  # 4, 24, 54, 64 of 146
    np.testing.assert_allclose(Q3, np.cumsum([0, 4, 24, 54, 64]) / 146)


def test_number_quantiles_are_numpy_hazen_and_weighted_medians_by_hand():
    rng = np.random.default_rng(3)
    x = rng.lognormal(5, 0.4, 101)
    # reference library: numpy's Hazen quantile definition
    np.testing.assert_allclose(st.d_values(x), np.quantile(x, [0.1, 0.5, 0.9], method="hazen"))
    # by hand, volume basis on sizes 1..4 (weights 1, 8, 27, 64 of 100): plotting positions
    # c = 0.005, 0.05, 0.225, 0.68, so x50,3 = 3 + (0.5 - 0.225) / (0.68 - 0.225)
    assert st.size_quantile(X, 0.5, r=3) == pytest.approx(3 + 0.275 / 0.455)


def test_hatch_choate_relations_on_sampled_lognormal():
    # Hatch and Choate (1929): for a lognormal number distribution with count median
    # diameter CMD and geometric sd sigma_g (s = ln sigma_g):
    #   ln x50,2 = ln CMD + 2 s^2 (area median), ln x50,3 = ln CMD + 3 s^2 (mass median),
    #   D[p,q] = CMD exp((p + q) s^2 / 2), so D[3,2] = CMD exp(2.5 s^2), D[4,3] = CMD exp(3.5 s^2)
    cmd, gsd = 500.0, 1.4
    s2 = np.log(gsd) ** 2
    x = np.random.default_rng(11).lognormal(np.log(cmd), np.log(gsd), 400_000)
    # sampling error of these estimates is well under 0.5 % at this n
    assert st.size_quantile(x, 0.5, 0) == pytest.approx(cmd, rel=5e-3)
    assert st.size_quantile(x, 0.5, 2) == pytest.approx(cmd * np.exp(2 * s2), rel=5e-3)
    assert st.size_quantile(x, 0.5, 3) == pytest.approx(cmd * np.exp(3 * s2), rel=5e-3)
    assert st.sauter_diameter(x) == pytest.approx(cmd * np.exp(2.5 * s2), rel=5e-3)
    assert st.de_brouckere_diameter(x) == pytest.approx(cmd * np.exp(3.5 * s2), rel=5e-3)
    assert st.moment_mean(x, 1, 0) == pytest.approx(cmd * np.exp(0.5 * s2), rel=5e-3)
    gm, g = st.lognormal_fit(x)
    assert gm == pytest.approx(cmd, rel=5e-3) and g == pytest.approx(gsd, rel=5e-3)


def test_lognormal_fit_against_scipy_mle():
    # reference library: scipy.stats.lognorm.fit with floc=0 (MLE, ddof = 0)
    x = np.random.default_rng(5).lognormal(np.log(300), 0.25, 500)
    s, loc, scale = stats.lognorm.fit(x, floc=0)
    gm, gsd = st.lognormal_fit(x)
    assert gm == pytest.approx(scale, rel=1e-6)
    n = x.size
    assert np.log(gsd) == pytest.approx(s * np.sqrt(n / (n - 1)), rel=1e-6)
    grid = np.linspace(200, 400, 5)
    np.testing.assert_allclose(st.lognormal_pdf(grid, gm, gsd),
                               stats.lognorm.pdf(grid, np.log(gsd), scale=gm))


def test_mean_sd_cov_ddof1():
    # by hand: 2, 4, 6 -> mean 4, sd = sqrt((4 + 0 + 4) / 2) = 2, COV = 50 %
    assert st.mean_sd_cov([2.0, 4.0, 6.0]) == pytest.approx((4.0, 2.0, 50.0))
    m, sd, cov = st.mean_sd_cov([5.0])
    assert m == 5.0 and np.isnan(sd) and np.isnan(cov)


# --------------------------------------------------------------------------
# habits, alpha, verdict
# --------------------------------------------------------------------------


def test_habit_fractions_by_number_and_by_area_hand_example():
    # three small cubes (area 1 each), one large plate (area 9), one unknown
    codes = st.habit_codes(["cube", "cube", "cube", "tabular_hexagon", "blob"])
    assert list(codes) == [0, 0, 0, 3, -1]
    nf, af = st.habit_fractions(codes, [1.0, 1.0, 1.0, 9.0, 100.0])
    # by number: 3 / 4 cubes, 1 / 4 plates; by area: 3 / 12 and 9 / 12
    assert nf[0] == pytest.approx(0.75) and nf[3] == pytest.approx(0.25)
    assert af[0] == pytest.approx(0.25) and af[3] == pytest.approx(0.75)
    assert nf.sum() == pytest.approx(1) and af.sum() == pytest.approx(1)
    nf, af = st.habit_fractions(np.array([-1]), [1.0])
    assert np.isnan(nf).all() and np.isnan(af).all()


def test_alpha_median_iqr_and_tabular_mean():
    med, iqr, n = st.alpha_median_iqr([1.0, 2.0, np.nan, 3.0, 4.0, 5.0])
    # numpy linear quantiles of 1..5: Q1 = 2, Q3 = 4
    assert (med, iqr, n) == (3.0, 2.0, 5)
    med, iqr, n = st.alpha_median_iqr([np.nan, np.nan])
    assert np.isnan(med) and np.isnan(iqr) and n == 0
    codes = st.habit_codes(["tabular_hexagon", "tabular_triangle", "cube", "tabular_hexagon"])
    assert st.tabular_aspect_ratio_mean([6.0, 10.0, 3.0, np.nan], codes) == (8.0, 2)


def test_monodispersity_verdict():
    # threshold 15 % (common practice, from memory)
    assert st.monodispersity(9.0, 8.0, 10.5) == (True, "monodisperse")
    assert st.monodispersity(14.0, 12.0, 16.5) == (True, "borderline")
    assert st.monodispersity(30.0, 25.0, 35.0) == (False, "polydisperse")
    assert st.monodispersity(np.nan) == (False, "no data")
    assert st.monodispersity(12.0, threshold_pct=10.0) == (False, "polydisperse")


def test_inputs_are_validated():
    with pytest.raises(ValueError, match="x must be finite and > 0"):
        st.moment_mean([1.0, -2.0], 3, 2)
    with pytest.raises(ValueError, match="r .* must be 0, 1, 2 or 3"):
        st.size_quantile([1.0], 0.5, r=5)
    with pytest.raises(ValueError, match="fraction"):
        st.size_quantile([1.0], 1.5)
    with pytest.raises(ValueError, match="method"):
        st.bootstrap_ci(st.cov_pct_rows, np.ones(5), method="normal")


# --------------------------------------------------------------------------
# bootstrap
# --------------------------------------------------------------------------


def test_bca_agrees_with_scipy_bootstrap():
    # reference library: scipy.stats.bootstrap (BCa); different draws, so agree within
    # the Monte-Carlo error of B = 4000 resamples
    x = np.random.default_rng(8).lognormal(np.log(400), 0.2, 200)
    ours = st.bootstrap_ci(st.cov_pct_rows, x, n_resamples=4000, rng=np.random.default_rng(1))
    ref = stats.bootstrap((x,), lambda a, axis: 100 * a.std(axis=axis, ddof=1) / a.mean(axis=axis),
                          n_resamples=4000, method="BCa", rng=np.random.default_rng(2)).confidence_interval
    width = ref.high - ref.low
    assert abs(float(ours.low) - ref.low) < 0.05 * width
    assert abs(float(ours.high) - ref.high) < 0.05 * width
    # seeded generator: same seed, same limits
    again = st.bootstrap_ci(st.cov_pct_rows, x, n_resamples=4000, rng=np.random.default_rng(1))
    assert float(again.low) == float(ours.low)


def test_bootstrap_degenerate_and_tiny_samples():
    r = st.bootstrap_ci(st.habit_fraction_rows(), (np.zeros(20, int), np.ones(20)), n_resamples=50,
                        rng=np.random.default_rng(0))
    assert r.low[0] == r.high[0] == 1.0 and r.low[1] == r.high[1] == 0.0
    r = st.bootstrap_ci(st.cov_pct_rows, np.array([3.0]), n_resamples=50)
    assert np.isnan(r.low) and np.isnan(r.high)


def _coverage(reps=200, n=120, B=500, method="bca"):
    """Fraction of 95 % intervals covering the true value over simulated samples."""
    rng = np.random.default_rng(2024)
    cmd, s, p_cube = 500.0, np.log(1.25), 0.3
    true_cov = 100 * np.sqrt(np.exp(s**2) - 1)  # lognormal COV (Hatch-Choate moments)
    frac = st.habit_fraction_rows(2)
    hits = np.zeros(3)
    for _ in range(reps):
        x = rng.lognormal(np.log(cmd), s, n)
        codes = (rng.random(n) >= p_cube).astype(int)  # 0 = cube with probability 0.3
        for i, (stat, data, true) in enumerate((
                (st.cov_pct_rows, (x,), true_cov),
                (st.median_rows, (x,), cmd),
                (lambda c, a: frac(c, a)[..., 0], (codes, np.ones(n)), p_cube))):
            r = st.bootstrap_ci(stat, data, n_resamples=B, method=method, rng=rng)
            hits[i] += float(r.low) <= true <= float(r.high)
    return hits / reps


def test_bootstrap_ci_coverage_on_simulated_samples():
    # Efron and Tibshirani (1993): a 95 % interval should cover the true value in about
    # 95 % of repeated samples. With 200 repetitions the binomial standard error is
    # sqrt(0.95 * 0.05 / 200) = 1.5 %; we accept 89-99 % (about 4 SE below, allowing the
    # known slight under-coverage of bootstrap intervals at n = 120, 3 SE above).
    cov = _coverage()
    print("coverage (COV, D50, cube fraction):", cov)
    assert np.all(cov >= 0.89) and np.all(cov <= 0.99), cov


# --------------------------------------------------------------------------
# two-sample tests
# --------------------------------------------------------------------------


def test_two_sample_tests():
    rng = np.random.default_rng(4)
    a = rng.lognormal(np.log(400), 0.15, 300)
    b = rng.lognormal(np.log(440), 0.15, 300)
    a2 = rng.lognormal(np.log(400), 0.15, 300)
    # reference library: scipy.stats.ks_2samp
    assert st.ks_test(a, b)[1] < 1e-6
    assert st.ks_test(a, a2)[1] > 0.05
    assert st.ks_test(a, b) == pytest.approx(tuple(stats.ks_2samp(a, b)))
    # chi-square by hand on the 2 x 2 table [[30, 10], [10, 30]]: expected 20 each,
    # X^2 = 4 * 10^2 / 20 = 20, dof 1 (habits seen in neither sample are dropped)
    chi, p, dof = st.habit_chi2([30, 10, 0], [10, 30, 0])
    assert chi == pytest.approx(20.0) and dof == 1
    assert p == pytest.approx(stats.chi2.sf(20.0, 1))
    assert st.habit_chi2([5, 0], [7, 0]) == (0.0, 1.0, 0)
    d = st.median_difference_ci(a, b, n_resamples=1000, rng=np.random.default_rng(0))
    # true difference of medians is 440 - 400 = 40; the interval excludes 0
    assert 0 < float(d.low) < 40 < float(d.high)


def test_ks_false_alarm_rate_under_null():
    # under the null hypothesis the KS p-value is uniform (scipy.stats.ks_2samp, exact
    # for these sizes): about 5 % of 400 same-population pairs fall below 0.05
    # (binomial SE 1.1 %; accept 2-9 %)
    rng = np.random.default_rng(7)
    p = np.array([st.ks_test(rng.lognormal(6, 0.15, 140), rng.lognormal(6, 0.15, 140))[1] for _ in range(400)])
    rate = float(np.mean(p < 0.05))
    assert 0.02 <= rate <= 0.09, rate
