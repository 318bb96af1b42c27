"""Comparing two samples: tests, differences with intervals, and the family-wise error (pure functions)."""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from grainhabit.lazy import lazy_module
from grainhabit.plugins.survey.intervals import BootstrapCI, Spread
from grainhabit.plugins.survey.size_distribution import as_sizes

stats = lazy_module("scipy.stats")  # imported on first use (about 0.3 s): dask workers never need it


# --------------------------------------------------------------------------
# comparing two samples
# --------------------------------------------------------------------------


def ks_test(x_a, x_b) -> tuple[float, float]:
    """Two-sample Kolmogorov-Smirnov test (``scipy.stats.ks_2samp``).

    Parameters
    ----------
    x_a, x_b : array_like, shape (n_a,), (n_b,)
        Values of the two samples (e.g. ECD in nm), finite.

    Returns
    -------
    statistic, pvalue : float
        D = sup |F_a - F_b| and its two-sided p-value (NaN if a sample is
        empty).
    """
    a = as_sizes(x_a, "x_a", positive=False)
    b = as_sizes(x_b, "x_b", positive=False)
    if a.size == 0 or b.size == 0:
        return float("nan"), float("nan")
    res = stats.ks_2samp(a, b)
    return float(res.statistic), float(res.pvalue)


def habit_chi2(counts_a, counts_b) -> tuple[float, float, int]:
    """Chi-square test of homogeneity of two habit count vectors.

    Parameters
    ----------
    counts_a, counts_b : array_like of int, shape (k,)
        Grains per habit in each sample.

    Returns
    -------
    statistic, pvalue : float
        Pearson chi-square of the 2 x k table without Yates' correction
        (``scipy.stats.chi2_contingency``) over the habits seen in either
        sample. With fewer than two such habits the samples cannot differ:
        statistic 0, p-value 1. NaN if a sample has no grains.
    dof : int
        Degrees of freedom (k_seen - 1).
    """
    a = np.asarray(counts_a, dtype=float)
    b = np.asarray(counts_b, dtype=float)
    if a.shape != b.shape or a.ndim != 1 or (a < 0).any() or (b < 0).any():
        raise ValueError(f"counts must be non-negative 1-D arrays of equal length, got {a!r} and {b!r}")
    if a.sum() == 0 or b.sum() == 0:
        return float("nan"), float("nan"), 0
    seen = (a + b) > 0
    if seen.sum() < 2:
        return 0.0, 1.0, 0
    res = stats.chi2_contingency(np.vstack([a[seen], b[seen]]), correction=False)
    return float(res.statistic), float(res.pvalue), int(res.dof)


def median_difference_ci(x_a, x_b, *, n_resamples: int = 2000, confidence: float = 0.95,
                         rng: np.random.Generator | None = None) -> BootstrapCI:
    """Difference of medians (b minus a) with a percentile bootstrap interval.

    Parameters
    ----------
    x_a, x_b : array_like
        Values of each sample; NaN values are ignored (e.g. undetermined alpha).
    n_resamples : int
        Resamples B, drawn independently within each sample.
    confidence : float
        Two-sided level.
    rng : numpy.random.Generator, optional
        Seeded generator for reproducible limits.

    Returns
    -------
    BootstrapCI
        Scalar estimate median(b) - median(a) and its percentile limits
        [4]_; all NaN when either sample has no finite value.
    """
    a = np.asarray(x_a, dtype=float)
    b = np.asarray(x_b, dtype=float)
    a = a[np.isfinite(a)]
    b = b[np.isfinite(b)]
    if a.size == 0 or b.size == 0:
        nan = np.array(np.nan)
        return BootstrapCI(nan, nan.copy(), nan.copy())
    if not (0 < confidence < 1):
        raise ValueError(f"confidence must lie in (0, 1), got {confidence!r}")
    rng = np.random.default_rng() if rng is None else rng
    est = np.median(b) - np.median(a)
    ma = np.median(a[rng.integers(0, a.size, size=(n_resamples, a.size))], axis=1)
    mb = np.median(b[rng.integers(0, b.size, size=(n_resamples, b.size))], axis=1)
    lo, hi = np.quantile(mb - ma, [0.5 * (1 - confidence), 0.5 * (1 + confidence)])
    return BootstrapCI(np.array(est), np.array(lo), np.array(hi))

# --------------------------------------------------------------------------
# differences between two samples, family-wise error
# --------------------------------------------------------------------------


class Difference(NamedTuple):
    """B minus A with its standard error, Welch-Satterthwaite degrees of freedom and p-value."""

    estimate: float
    se: float
    df: float
    pvalue: float


def difference(a: Spread, b: Spread, se_floor_a: float = 0.0, se_floor_b: float = 0.0) -> Difference:
    """Difference b - a of two independent estimates and its two-sided t test against 0.

    Parameters
    ----------
    a, b : Spread
        Scalar estimates with standard errors and degrees of freedom (from
        :func:`clustered_mean` or :func:`clustered_bootstrap`).
    se_floor_a, se_floor_b : float
        Least standard errors to use (e.g. the binomial error of the pooled
        fraction, so that a habit absent from one sample's few frames does
        not get a zero spread).

    Returns
    -------
    Difference
        NaN throughout where either standard error is unknown.

    Notes
    -----
    t = (b - a) / sqrt(se_a^2 + se_b^2) on the Welch-Satterthwaite
    degrees of freedom [11]_

    .. math:: \\nu = \\frac{(s_a^2 + s_b^2)^2}{s_a^4 / \\nu_a + s_b^4 / \\nu_b}

    where nu_a, nu_b are each sample's frames - 1: the samples' frames,
    not their grains, are the independent units.

    References
    ----------
    .. [11] B. L. Welch, "The generalization of 'Student's' problem when
       several different population variances are involved", Biometrika 34
       (1-2), 28-35, 1947, DOI 10.1093/biomet/34.1-2.28.
    """
    d = float(b.estimate) - float(a.estimate)
    sa = max(float(a.se), se_floor_a) if np.isfinite(a.se) else np.nan
    sb = max(float(b.se), se_floor_b) if np.isfinite(b.se) else np.nan
    va, vb = sa**2, sb**2
    if not (np.isfinite(d) and np.isfinite(va) and np.isfinite(vb)) or va + vb <= 0:
        return Difference(d, np.nan, np.nan, np.nan)
    se = float(np.sqrt(va + vb))
    den = (va**2 / a.df if va > 0 else 0.0) + (vb**2 / b.df if vb > 0 else 0.0)
    df = float((va + vb) ** 2 / den) if den > 0 else np.inf
    p = float(2 * stats.t.sf(abs(d) / se, df))
    return Difference(d, se, df, p)


def holm(pvalues, alpha: float = 0.05) -> tuple[np.ndarray, np.ndarray]:
    """Holm's step-down test of a family of hypotheses, with a level for each interval.

    Parameters
    ----------
    pvalues : array_like, shape (m,)
        Unadjusted p-values; NaN ones are not tested (never rejected, and
        do not count in m).
    alpha : float
        Family-wise error rate.

    Returns
    -------
    rejected : ndarray of bool, shape (m,)
    level : ndarray, shape (m,)
        Error level to give each hypothesis' confidence interval (its
        interval is at confidence 1 - level): alpha / (m - j + 1) for the
        j-th smallest p-value among those rejected, alpha / (m - r) for
        every hypothesis not rejected (r rejected in all). Each t interval
        then excludes 0 exactly when its hypothesis is rejected.

    Notes
    -----
    Holm [12]_: sort the m p-values, reject while p_(j) <= alpha / (m - j
    + 1), stop at the first that is not. This keeps the probability of
    any false rejection at or below alpha whatever the dependence between
    the tests, and rejects at least what Bonferroni rejects. The intervals
    of the hypotheses not rejected are Bonferroni intervals over those
    m - r hypotheses; the intervals of the rejected ones are at their
    step's level (consistent with the decision, not simultaneous).

    References
    ----------
    .. [12] S. Holm, "A simple sequentially rejective multiple test
       procedure", Scand. J. Statist. 6 (2), 65-70, 1979.
    """
    p = np.asarray(pvalues, dtype=float)
    ok = np.isfinite(p)
    m = int(ok.sum())
    rejected = np.zeros(p.shape, bool)
    level = np.full(p.shape, np.nan)
    if m == 0:
        return rejected, level
    idx = np.flatnonzero(ok)[np.argsort(p[ok], kind="stable")]
    r = 0
    for j, i in enumerate(idx):
        step = alpha / (m - j)
        if p[i] <= step:
            rejected[i] = True
            level[i] = step
            r += 1
        else:
            break
    level[ok & ~rejected] = alpha / (m - r)
    return rejected, level
