"""Confidence intervals: the bootstrap, exact intervals for fractions, and grains clustered by frame.

References
----------
.. [1] B. Efron and R. J. Tibshirani, "An Introduction to the Bootstrap",
   Chapman & Hall, 1993, DOI 10.1201/9780429246593 (chapters 13-14:
   percentile and BCa intervals, jackknife acceleration).
"""

from __future__ import annotations

import warnings
from typing import Callable, NamedTuple

import numpy as np
from scipy import special

from grainhabit.plugins.habit.vocabulary import HABITS


def t_quantile(q, df):
    """Quantile ``q`` of Student's t distribution with ``df`` degrees of freedom.

    ``scipy.special.stdtrit(df, q)``, the function ``scipy.stats.t.ppf``
    evaluates (the same values, tests/test_intervals_quantile.py), without
    importing scipy.stats: that import (about 0.4 s of CPU) otherwise falls in
    the main process after the last frame, on every run's critical path.

    Parameters
    ----------
    q : float or ndarray
        Probability, in (0, 1).
    df : float or ndarray
        Degrees of freedom, > 0.

    Returns
    -------
    float or ndarray
    """
    return special.stdtrit(df, q)


# --------------------------------------------------------------------------
# bootstrap
# --------------------------------------------------------------------------


class BootstrapCI(NamedTuple):
    """Estimate and confidence limits (arrays of the statistic's shape)."""

    estimate: np.ndarray
    low: np.ndarray
    high: np.ndarray


def _batched(statistic, data, index_batches):
    return np.concatenate([np.asarray(statistic(*(d[idx] for d in data)), dtype=float)
                           for idx in index_batches], axis=0)


def bootstrap_ci(statistic: Callable, data, *, n_resamples: int = 1000, confidence: float = 0.95,
                 method: str = "bca", rng: np.random.Generator | None = None,
                 max_elements: int = 4_000_000, max_jackknife: int = 400) -> BootstrapCI:
    """Bootstrap confidence interval of a statistic of paired per-grain data.

    Parameters
    ----------
    statistic : callable
        ``statistic(*arrays)`` where each array has shape (m, n): m
        resampled populations of n grains. Returns shape (m,) or (m, k)
        (k statistics at once, e.g. one fraction per habit). Must be
        vectorised along the last axis.
    data : ndarray or tuple of ndarray, each shape (n,)
        Per-grain columns, resampled together (same indices).
    n_resamples : int
        Bootstrap resamples B (>= 10).
    confidence : float
        Two-sided confidence level in (0, 1).
    method : {"bca", "percentile"}
        Interval type.
    rng : numpy.random.Generator, optional
        Source of randomness; pass a seeded one for reproducible limits.
    max_elements : int
        Largest index array built at once (bounds memory).
    max_jackknife : int
        Above this many grains the BCa acceleration uses a delete-group
        jackknife with this many groups instead of leave-one-out.

    Returns
    -------
    BootstrapCI
        ``estimate`` (the statistic on the data), ``low``, ``high``; NaN
        limits when n < 2. Resamples where the statistic is NaN are left out.

    Notes
    -----
    Resampling draws an index matrix of shape (B, n) with replacement and
    evaluates the statistic on all rows at once. Percentile limits are the
    (1 -/+ c)/2 quantiles of the B values theta*_b. BCa [4]_ moves them to

    .. math:: \\alpha_{1,2} = \\Phi\\left(z_0 + \\frac{z_0 + z_{\\alpha}}{1 - a (z_0 + z_{\\alpha})}\\right)

    with bias correction z_0 = Phi^-1(#{theta*_b < theta} / B + #{theta*_b
    = theta} / 2B) and acceleration from jackknife values theta_(i):

    .. math:: a = \\frac{\\sum (\\bar\\theta - \\theta_{(i)})^3}
              {6 \\left[\\sum (\\bar\\theta - \\theta_{(i)})^2\\right]^{3/2}}

    A degenerate bootstrap distribution (all theta*_b equal) gives a
    zero-width interval.

    References
    ----------
    .. [4] Efron and Tibshirani, 1993, chapters 13-14.
    """
    if method not in ("bca", "percentile"):
        raise ValueError(f"method must be 'bca' or 'percentile', got {method!r}")
    if not (0 < confidence < 1):
        raise ValueError(f"confidence must lie in (0, 1), got {confidence!r}")
    if int(n_resamples) < 10:
        raise ValueError(f"n_resamples must be >= 10, got {n_resamples!r}")
    if isinstance(data, np.ndarray):
        data = (data,)
    data = tuple(np.asarray(d) for d in data)
    n = data[0].shape[0] if data and data[0].ndim == 1 else -1
    if n < 1 or any(d.shape != (n,) for d in data):
        raise ValueError(f"data must be 1-D arrays of equal non-zero length, got shapes {[d.shape for d in data]}")
    rng = np.random.default_rng() if rng is None else rng
    with warnings.catch_warnings():
        if n < 2:  # e.g. a sd of one value: NaN is the answer, not a warning
            warnings.simplefilter("ignore", RuntimeWarning)
        theta = np.asarray(statistic(*(d[None, :] for d in data)), dtype=float)[0]
    if n < 2:
        nan = np.full(theta.shape, np.nan)
        return BootstrapCI(theta, nan, nan.copy())

    B = int(n_resamples)
    step = max(1, max_elements // n)
    batches = (rng.integers(0, n, size=(min(step, B - s), n)) for s in range(0, B, step))
    boot = _batched(statistic, data, batches)  # (B,) or (B, k)

    a_half = 0.5 * (1.0 - confidence)
    z = special.ndtri(np.array([a_half, 1.0 - a_half]))
    boot2 = boot.reshape(B, -1)
    th = theta.reshape(-1)
    if method == "bca":
        if n <= max_jackknife:
            j = np.arange(n - 1)
            keep = j[None, :] + (j[None, :] >= np.arange(n)[:, None])  # (n, n-1) leave-one-out
            rows = max(1, max_elements // (n - 1))
            jack = _batched(statistic, data, (keep[s:s + rows] for s in range(0, n, rows)))
        else:
            groups = np.array_split(rng.permutation(n), max_jackknife)
            mask = np.ones(n, dtype=bool)
            jack = []
            for g in groups:  # few hundred groups: a loop is cheap against B resamples
                mask[g] = False
                jack.append(np.asarray(statistic(*(d[mask][None, :] for d in data)), dtype=float)[0])
                mask[g] = True
            jack = np.array(jack)
        jack2 = jack.reshape(jack.shape[0], -1)
    lo = np.full(th.shape, np.nan)
    hi = np.full(th.shape, np.nan)
    for k in range(th.size):
        b = boot2[:, k]
        b = b[np.isfinite(b)]
        if b.size < 2 or not np.isfinite(th[k]):
            continue
        if np.all(b == b[0]):
            lo[k] = hi[k] = b[0]
            continue
        if method == "percentile":
            probs = np.array([a_half, 1.0 - a_half])
        else:
            p0 = (np.sum(b < th[k]) + 0.5 * np.sum(b == th[k])) / b.size
            p0 = np.clip(p0, 0.5 / b.size, 1.0 - 0.5 / b.size)
            z0 = special.ndtri(p0)
            jk = jack2[:, k]
            jk = jk[np.isfinite(jk)]
            d = jk.mean() - jk if jk.size else np.zeros(1)
            den = 6.0 * np.sum(d**2) ** 1.5
            acc = np.sum(d**3) / den if den > 0 else 0.0
            probs = special.ndtr(z0 + (z0 + z) / (1.0 - acc * (z0 + z)))
        lo[k], hi[k] = np.quantile(b, probs)
    return BootstrapCI(theta, lo.reshape(theta.shape), hi.reshape(theta.shape))


# vectorised statistics for bootstrap_ci (last axis = grains)


def cov_pct_rows(x: np.ndarray) -> np.ndarray:
    """COV in percent along the last axis (ddof = 1), for :func:`bootstrap_ci`."""
    return 100.0 * x.std(axis=-1, ddof=1) / x.mean(axis=-1)


def median_rows(x: np.ndarray) -> np.ndarray:
    """Number-based median along the last axis (Hazen, as :func:`size_quantile`)."""
    return np.quantile(x, 0.5, axis=-1, method="hazen")


def nanmedian_rows(x: np.ndarray) -> np.ndarray:
    """Median of the finite values along the last axis; NaN for rows with none."""
    x = np.asarray(x, dtype=float)
    finite = np.isfinite(x)
    out = np.full(x.shape[:-1], np.nan)
    ok = finite.any(axis=-1)
    if ok.any():
        xs = np.where(finite, x, np.inf)[ok]
        xs.sort(axis=-1)
        m = finite[ok].sum(axis=-1)
        r = np.arange(xs.shape[0])
        out[ok] = 0.5 * (xs[r, (m - 1) // 2] + xs[r, m // 2])
    return out


def habit_fraction_rows(n_habits: int = len(HABITS)):
    """Return a vectorised statistic giving number and area fractions per habit.

    The returned function takes ``(codes, areas)`` of shape (m, n) and returns
    shape (m, 2 * n_habits): number fractions, then area fractions (grains
    with code -1 excluded), as :func:`habit_fractions`.
    """

    def stat(codes, areas):
        nf = np.empty(codes.shape[:-1] + (n_habits,))
        af = np.empty_like(nf)
        for k in range(n_habits):  # a loop over habits keeps memory at one (m, n) array
            hit = codes == k
            nf[..., k] = hit.sum(axis=-1)
            af[..., k] = np.where(hit, areas, 0.0).sum(axis=-1)
        with np.errstate(invalid="ignore", divide="ignore"):
            nf /= nf.sum(axis=-1, keepdims=True)
            af /= af.sum(axis=-1, keepdims=True)
        return np.concatenate([nf, af], axis=-1)

    return stat

# --------------------------------------------------------------------------
# intervals for fractions
# --------------------------------------------------------------------------


def binomial_ci(k, n, confidence: float = 0.95, method: str = "clopper-pearson"):
    """Confidence interval of a binomial proportion k / n, exact at 0 and n.

    Parameters
    ----------
    k : float or array_like
        Number of hits (may be non-integer: an effective count, see
        :func:`proportion_ci`).
    n : float or array_like
        Number of trials (may be non-integer), broadcast against ``k``.
    confidence : float
        Two-sided level in (0, 1).
    method : {"clopper-pearson", "wilson"}
        Clopper-Pearson [5]_ (the default): the exact interval from beta
        quantiles, never narrower than it must be; Wilson [6]_: the score
        interval, closer to the nominal level on average.

    Returns
    -------
    low, high : float or ndarray
        Limits in [0, 1]; NaN where n <= 0.

    Notes
    -----
    Clopper-Pearson with a = 1 - confidence:

    .. math:: p_L = B^{-1}(a/2;\\, k, n - k + 1), \\qquad
              p_U = B^{-1}(1 - a/2;\\, k + 1, n - k)

    with p_L = 0 at k = 0 and p_U = 1 at k = n, so 0 of 50 gives
    [0, 1 - (a/2)^{1/50}] = [0, 0.0711] at 95 %. The same as
    ``scipy.stats.binomtest(k, n).proportion_ci(confidence, method="exact")``
    (or ``"wilson"``) for integer k.

    References
    ----------
    .. [5] C. J. Clopper and E. S. Pearson, "The use of confidence or
       fiducial limits illustrated in the case of the binomial",
       Biometrika 26 (4), 404-413, 1934, DOI 10.1093/biomet/26.4.404.
    .. [6] E. B. Wilson, "Probable inference, the law of succession, and
       statistical inference", J. Am. Stat. Assoc. 22 (158), 209-212,
       1927, DOI 10.1080/01621459.1927.10502953.
    """
    if not (0 < confidence < 1):
        raise ValueError(f"confidence must lie in (0, 1), got {confidence!r}")
    if method not in ("clopper-pearson", "wilson"):
        raise ValueError(f"method must be 'clopper-pearson' or 'wilson', got {method!r}")
    k, n = np.broadcast_arrays(np.asarray(k, dtype=float), np.asarray(n, dtype=float))
    if ((k < 0) | (k > n)).any():
        raise ValueError(f"need 0 <= k <= n, got k={k!r}, n={n!r}")
    a = 1.0 - confidence
    ok = n > 0
    nn = np.where(ok, n, 1.0)
    if method == "clopper-pearson":
        with np.errstate(invalid="ignore", divide="ignore"):
            lo = np.where(k > 0, special.betaincinv(np.maximum(k, 1e-300), nn - k + 1, a / 2), 0.0)
            hi = np.where(k < nn, special.betaincinv(k + 1, np.maximum(nn - k, 1e-300), 1 - a / 2), 1.0)
    else:
        z = special.ndtri(1 - a / 2)
        p = k / nn
        den = 1 + z**2 / nn
        mid = (p + z**2 / (2 * nn)) / den
        half = z / den * np.sqrt(p * (1 - p) / nn + z**2 / (4 * nn**2))
        lo, hi = np.clip(mid - half, 0, 1), np.clip(mid + half, 0, 1)
    lo = np.where(ok, lo, np.nan)
    hi = np.where(ok, hi, np.nan)
    if lo.ndim == 0:
        return float(lo), float(hi)
    return lo, hi


def proportion_ci(p, variance, n, df=np.inf, confidence: float = 0.95):
    """Clopper-Pearson interval of a fraction estimated from clustered grains.

    Parameters
    ----------
    p : float or array_like
        Estimated fraction in [0, 1] (by number or by area).
    variance : float or array_like
        Its variance, e.g. from :func:`clustered_mean` or a frame
        bootstrap; NaN or 0 where unknown (then n grains count as
        independent).
    n : float or array_like
        Number of grains behind the fraction.
    df : float or array_like
        Degrees of freedom of ``variance`` (frames - 1); ``inf`` for a
        variance known exactly or for independent grains.
    confidence : float
        Two-sided level.

    Returns
    -------
    low, high : float or ndarray

    Notes
    -----
    The method of Korn and Graubard [7]_: the effective sample size
    n* = p (1 - p) / variance (capped at n; n itself where p is 0 or 1,
    where no variance can be seen), shrunk for the few degrees of freedom
    of a variance estimated from F frames by
    (t_{n-1} / t_{df})^2 at the interval's level, enters
    :func:`binomial_ci` (Clopper-Pearson) with k* = p n*. With one frame
    (df = inf) this is the plain Clopper-Pearson interval of p n of n.

    References
    ----------
    .. [7] E. L. Korn and B. I. Graubard, "Confidence intervals for
       proportions with small expected number of positive counts estimated
       from survey data", Survey Methodology 24 (2), 193-201, 1998 (from
       memory).
    """
    p, v, n, df = np.broadcast_arrays(*(np.asarray(x, dtype=float) for x in (p, variance, n, df)))
    inner = (p > 0) & (p < 1) & np.isfinite(v) & (v > 0)
    with np.errstate(invalid="ignore", divide="ignore"):
        n_eff = np.where(inner, np.minimum(n, p * (1 - p) / np.where(inner, v, 1.0)), n)
        q = 1 - 0.5 * (1 - confidence)
        shrink = np.where(np.isfinite(df) & (df >= 1) & (n > 1),
                          (t_quantile(q, np.maximum(n - 1, 1)) / t_quantile(q, np.maximum(df, 1))) ** 2, 1.0)
    n_eff = np.where(n > 0, np.minimum(n_eff * shrink, n), 0.0)
    k_eff = np.clip(p * n_eff, 0, n_eff)
    lo, hi = binomial_ci(k_eff, n_eff, confidence)
    return (float(lo), float(hi)) if np.ndim(lo) == 0 else (lo, hi)

# --------------------------------------------------------------------------
# grains clustered by frame
# --------------------------------------------------------------------------


def cluster_codes(clusters) -> tuple[np.ndarray, int]:
    """Code 0..F-1 of each grain's cluster (frame) and the number F of clusters.

    Parameters
    ----------
    clusters : array_like, shape (n,)
        Frame index (or any label) of each grain.

    Returns
    -------
    codes : ndarray of int, shape (n,)
    n_clusters : int
    """
    c = np.asarray(clusters)
    if c.ndim != 1:
        raise ValueError(f"clusters must be 1-D, got shape {c.shape}")
    if c.size == 0:
        return np.zeros(0, dtype=int), 0
    uniq, codes = np.unique(c, return_inverse=True)
    return codes.astype(int), int(uniq.size)


class Spread(NamedTuple):
    """An estimate with its standard error and the degrees of freedom of that error."""

    estimate: np.ndarray
    se: np.ndarray
    df: float
    n_clusters: int


def clustered_mean(y, clusters, binary: bool = False) -> Spread:
    """Mean of per-grain values (a fraction for 0/1 values) and its clustered standard error.

    Parameters
    ----------
    y : array_like, shape (n,) or (n, k)
        Per-grain values (k columns at once, e.g. one 0/1 column per habit).
    clusters : array_like, shape (n,)
        Frame of each grain.
    binary : bool
        ``y`` holds 0/1 values (a fraction): the independent-grain variance
        is the binomial p (1 - p) / n, and with one frame the degrees of
        freedom are infinite (the binomial interval is exact).

    Returns
    -------
    Spread
        ``estimate`` (mean), ``se``, ``df`` = F - 1 (n - 1 for one frame),
        ``n_clusters`` = F.

    Notes
    -----
    The mean is a ratio of frame totals, so its variance across frames
    follows the linearised (ratio-estimator) formula of survey sampling
    [8]_ with e_f = sum over frame f of (y_i - ybar):

    .. math:: v_{cl} = \\frac{F}{F - 1} \\frac{\\sum_f e_f^2}{n^2}

    The standard error is sqrt(max(v_cl, s^2 / n)): the design effect is
    floored at 1 (frames never make the mean surer than independent
    grains would), so a fraction seen in every frame alike, or a habit
    with a few grains in separate frames, does not get a zero spread.
    With one frame only s^2 / n is known.

    References
    ----------
    .. [8] W. G. Cochran, "Sampling Techniques", 3rd ed., Wiley, 1977,
       section 6.11 (variance of a ratio estimate; from memory).
    """
    y = np.asarray(y, dtype=float)
    one = y.ndim == 1
    y2 = y[:, None] if one else y
    codes, F = cluster_codes(clusters)
    n = y2.shape[0]
    if codes.size != n:
        raise ValueError(f"clusters has {codes.size} entries, y has {n}")
    if n == 0:
        nan = np.full(y2.shape[1], np.nan)
        return Spread(nan[0] if one else nan, nan[0] if one else nan.copy(), np.nan, 0)
    m = y2.mean(axis=0)
    if binary:
        v_iid = m * (1 - m) / n
    else:
        v_iid = y2.var(axis=0, ddof=1) / n if n > 1 else np.full(y2.shape[1], np.nan)
    if F >= 2:
        e = np.zeros((F, y2.shape[1]))
        np.add.at(e, codes, y2 - m)
        v_cl = F / (F - 1) * np.sum(e**2, axis=0) / n**2
        v = np.fmax(v_cl, v_iid)
        df = float(F - 1)
    else:
        v, df = v_iid, (np.inf if binary else float(n - 1))
    se = np.sqrt(v)
    return Spread(m[0] if one else m, se[0] if one else se, df, F)


def _draw_counts(rng, k: int, b: int) -> np.ndarray:
    """Counts (b, k): how often each of k units is drawn in b samples of size k with replacement."""
    idx = rng.integers(0, k, size=(b, k)) + k * np.arange(b)[:, None]
    return np.bincount(idx.ravel(), minlength=b * k).reshape(b, k).astype(float)


def _weight_batches(codes, n_clusters, n_resamples, by_frame, rng, max_elements=2_000_000):
    """Yield bootstrap weight matrices (b, n): how often each grain is drawn."""
    n = codes.size
    rows = max(1, max_elements // max(n, 1))
    for s in range(0, n_resamples, rows):
        b = min(rows, n_resamples - s)
        if by_frame:
            yield _draw_counts(rng, n_clusters, b)[:, codes]
        else:
            yield _draw_counts(rng, n, b)


def clustered_bootstrap(statistic, n: int, clusters, *, n_resamples: int = 400,
                        rng: np.random.Generator | None = None):
    """Standard error of a statistic of clustered grains by resampling whole frames.

    Parameters
    ----------
    statistic : callable or dict
        ``statistic(w)`` with ``w`` of shape (m, n): m sets of grain
        weights (how often each grain is drawn). Returns shape (m,) or
        (m, k). The estimate is ``statistic(ones((1, n)))``. Build one
        with :func:`weighted_mean_stat`, :func:`weighted_cov_stat`,
        :func:`weighted_quantile_stat`, ... on the data. A dict maps names
        to such callables, or to ``(callable, mask)`` for a statistic of
        the grains in ``mask`` only (e.g. those with a determined alpha;
        it gets ``w[:, mask]``); all of them are evaluated on the same
        resamples.
    n : int
        Number of grains.
    clusters : array_like, shape (n,)
        Frame of each grain.
    n_resamples : int
        Resamples B of each kind (>= 10).
    rng : numpy.random.Generator, optional
        Seeded generator for reproducible errors.

    Returns
    -------
    Spread or dict of Spread
        ``se`` = max(frame-bootstrap SD * sqrt(F / (F - 1)), grain-bootstrap
        SD); ``df`` = F - 1 (n - 1 for one frame: frame-to-frame spread
        unseen), F counting the frames that hold the statistic's grains.

    Notes
    -----
    The cluster bootstrap [9]_: draw F of the F frames with replacement and
    keep every grain of each drawn frame, so whatever grains of one frame
    share (focus, local supersaturation, a frame-to-frame size drift)
    stays together. It resamples only the top level, as advised for
    hierarchical data with many more grains than frames. Its variance is
    short by the factor (F - 1) / F, which is put back; intervals then use
    Student t quantiles on F - 1 degrees of freedom, the usual
    small-number-of-clusters correction [10]_. The grain (ordinary)
    bootstrap gives the floor, as in :func:`clustered_mean`.

    References
    ----------
    .. [9] A. C. Davison and D. V. Hinkley, "Bootstrap Methods and their
       Application", Cambridge University Press, 1997, section 3.8
       (hierarchical data; from memory), DOI 10.1017/CBO9780511802843.
    .. [10] A. C. Cameron and D. L. Miller, "A practitioner's guide to
       cluster-robust inference", J. Human Resources 50 (2), 317-372,
       2015, DOI 10.3368/jhr.50.2.317 (from memory).
    """
    if int(n_resamples) < 10:
        raise ValueError(f"n_resamples must be >= 10, got {n_resamples!r}")
    codes, F = cluster_codes(clusters)
    if codes.size != n:
        raise ValueError(f"clusters has {codes.size} entries, expected {n}")
    rng = np.random.default_rng() if rng is None else rng
    single = callable(statistic)
    items = {"": statistic} if single else dict(statistic)
    funcs, masks = {}, {}
    for name, item in items.items():
        f, mask = item if isinstance(item, tuple) else (item, None)
        mask = None if mask is None else np.asarray(mask, dtype=bool)
        if mask is not None and mask.shape != (n,):
            raise ValueError(f"mask of {name!r} has shape {mask.shape}, expected ({n},)")
        funcs[name], masks[name] = f, mask

    def evaluate(w):
        out = {}
        with np.errstate(invalid="ignore", divide="ignore"):
            for name, f in funcs.items():
                m = masks[name]
                out[name] = np.asarray(f(w if m is None else w[:, m]), dtype=float)
        return out

    est = {k: v[0] for k, v in evaluate(np.ones((1, n))).items()}
    sizes = {k: (n if masks[k] is None else int(masks[k].sum())) for k in funcs}
    frames = {k: (F if masks[k] is None else int(np.unique(codes[masks[k]]).size)) for k in funcs}

    def sd(by_frame):
        vals = {k: [] for k in funcs}
        for w in _weight_batches(codes, F, int(n_resamples), by_frame, rng):
            for k, v in evaluate(w).items():
                vals[k].append(v)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN columns give NaN
            return {k: np.nanstd(np.concatenate(v), axis=0, ddof=1) for k, v in vals.items()}

    out = {}
    if n >= 2:
        sd_grain = sd(False)
        sd_frame = sd(True) if F >= 2 else None
    for k in funcs:
        nk, fk = sizes[k], frames[k]
        if n < 2 or nk < 2:
            out[k] = Spread(est[k], np.full(est[k].shape, np.nan), np.nan, fk)
        elif fk >= 2:
            out[k] = Spread(est[k], np.fmax(sd_grain[k], sd_frame[k] * np.sqrt(fk / (fk - 1))), float(fk - 1), fk)
        else:
            out[k] = Spread(est[k], sd_grain[k], float(nk - 1), fk)
    return out[""] if single else out


def t_interval(spread: Spread, confidence: float = 0.95, low: float = -np.inf, high: float = np.inf):
    """Confidence interval estimate -/+ t_{df} * se.

    Parameters
    ----------
    spread : Spread
        Estimate, standard error and degrees of freedom (from
        :func:`clustered_mean` or :func:`clustered_bootstrap`).
    confidence : float
        Two-sided level.
    low, high : float
        Limits are clipped to [low, high] (e.g. 0 for a size).

    Returns
    -------
    low, high : float or ndarray
        NaN where the standard error or degrees of freedom are unknown.
    """
    q = t_quantile(1 - 0.5 * (1 - confidence), spread.df) if np.isfinite(spread.df) else np.nan
    est, se = np.asarray(spread.estimate, float), np.asarray(spread.se, float)
    lo = np.clip(est - q * se, low, high)
    hi = np.clip(est + q * se, low, high)
    return (float(lo), float(hi)) if lo.ndim == 0 else (lo, hi)


# weighted statistics for clustered_bootstrap: each takes the data once and returns
# a function of the weight matrix w (m, n)


def weighted_mean_stat(x):
    """Weighted arithmetic mean of ``x``, as a function of weights (m, n)."""
    x = np.asarray(x, dtype=float)
    return lambda w: (w @ x) / w.sum(axis=1)


def weighted_cov_stat(x):
    """Weighted COV in percent (frequency weights, ddof = 1) of ``x``."""
    x = np.asarray(x, dtype=float)
    c = x.mean() if x.size else 0.0
    d = x - c  # centred once: keeps the sum of squares free of cancellation

    def stat(w):
        W = w.sum(axis=1)
        m = (w @ d) / W
        var = ((w @ d**2) - W * m**2) / (W - 1)
        return 100.0 * np.sqrt(np.maximum(var, 0)) / (m + c)

    return stat


def weighted_ratio_stat(num, den):
    """Weighted ratio sum(w num) / sum(w den), e.g. an area fraction; ``num`` may be (n, k)."""
    num = np.asarray(num, dtype=float)
    den = np.asarray(den, dtype=float)
    if num.ndim == 2:
        return lambda w: (w @ num) / (w @ den)[:, None]
    return lambda w: (w @ num) / (w @ den)


def weighted_moment_mean_stat(x, p: float, q: float):
    """Weighted moment-ratio mean D[p,q] (p != q, ISO 9276-2) of ``x``."""
    x = np.asarray(x, dtype=float)
    s = x.max() if x.size else 1.0
    up, uq = (x / s) ** p, (x / s) ** q
    return lambda w: s * ((w @ up) / (w @ uq)) ** (1.0 / (p - q))


def weighted_quantile_stat(x, fractions):
    """Hazen quantiles (as :func:`size_quantile`, r = 0) of ``x`` under integer weights.

    A weight of c repeats a grain c times; the quantile is that of the
    repeated sample with plotting positions (j - 1/2) / W, so weights of
    all ones give ``numpy.quantile(x, f, method="hazen")``.
    """
    order = np.argsort(np.asarray(x, dtype=float), kind="stable")
    xs = np.asarray(x, dtype=float)[order]
    f = np.atleast_1d(np.asarray(fractions, dtype=float))
    scalar = np.ndim(fractions) == 0

    def stat(w):
        ws = w[:, order]
        m, n = ws.shape
        cw = np.cumsum(ws, axis=1)
        W = cw[:, -1]
        out = np.empty((m, f.size))
        big = W.max() + 2.0
        flat = (cw + big * np.arange(m)[:, None]).ravel()
        for j, fr in enumerate(f):
            h = np.clip(fr * W + 0.5, 1.0, W)  # 1-based position in the repeated sample
            lo = np.floor(h)
            hi = np.minimum(lo + 1, W)
            i_lo = np.searchsorted(flat, lo + big * np.arange(m), side="left") - n * np.arange(m)
            i_hi = np.searchsorted(flat, hi + big * np.arange(m), side="left") - n * np.arange(m)
            i_lo, i_hi = np.clip(i_lo, 0, n - 1), np.clip(i_hi, 0, n - 1)
            out[:, j] = xs[i_lo] + (h - lo) * (xs[i_hi] - xs[i_lo])
        out[W <= 0] = np.nan
        return out[:, 0] if scalar else out

    return stat
