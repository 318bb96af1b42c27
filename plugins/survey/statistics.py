"""Size, shape and habit statistics of grain populations (pure functions).

Everything here works on plain numpy arrays of per-grain values and knows
nothing about results stores or xarray. Sizes are in whatever length unit
the caller uses (grainhabit passes ECD in nm); the functions never convert.

Notation follows ISO 9276-1 and ISO 9276-2: the type of quantity ``r`` is
0 for number, 1 for length, 2 for (projected) area and 3 for volume; ``Q_r``
is the cumulative distribution and ``q_r`` its density; ``D[p,q]`` is the
moment-ratio mean diameter.

References
----------
.. [1] ISO 9276-1:1998, "Representation of results of particle size
   analysis - Part 1: Graphical representation", ISO, 1998.
.. [2] ISO 9276-2:2014, "Representation of results of particle size
   analysis - Part 2: Calculation of average particle sizes/diameters and
   moments from particle size distributions", ISO, 2014.
.. [3] T. Hatch and S. P. Choate, "Statistical description of the size
   properties of non-uniform particulate substances", J. Franklin Inst.
   207 (3), 369-387, 1929, DOI 10.1016/S0016-0032(29)91451-4.
.. [4] B. Efron and R. J. Tibshirani, "An Introduction to the Bootstrap",
   Chapman & Hall, 1993, DOI 10.1201/9780429246593 (chapters 13-14:
   percentile and BCa intervals, jackknife acceleration).
"""

from __future__ import annotations

import warnings
from typing import Callable, NamedTuple

import numpy as np
from scipy import special

from grainhabit.lazy import lazy_module
from grainhabit.plugins.habit.vocabulary import HABITS, TABULAR_HABITS

stats = lazy_module("scipy.stats")  # imported on first use (about 0.3 s): dask workers never need it

#: Monodispersity threshold on the size COV in percent. Emulsions with a
#: size COV of roughly 10-15 % or less are called monodisperse (common
#: practice, from memory).
MONODISPERSE_COV_PCT = 15.0


# --------------------------------------------------------------------------
# input checks
# --------------------------------------------------------------------------


def _as_sizes(x, name: str = "x", positive: bool = True) -> np.ndarray:
    """Return ``x`` as a 1-D float array of finite (positive) values.

    Raises
    ------
    ValueError
        If ``x`` is not 1-D or holds non-finite or (with ``positive``)
        non-positive values; the message names the argument and a bad value.
    """
    arr = np.asarray(x, dtype=float)
    if arr.ndim != 1:
        raise ValueError(f"{name} must be 1-D, got shape {arr.shape}")
    bad = ~np.isfinite(arr)
    if positive:
        bad |= ~(arr > 0)
    if bad.any():
        what = "finite and > 0" if positive else "finite"
        raise ValueError(f"{name} must be {what}; got {arr[bad][0]!r} at index {int(np.argmax(bad))}")
    return arr


def _as_weights(w, n: int, name: str = "counts") -> np.ndarray:
    """Return optional class counts/weights as a float array of length ``n``."""
    if w is None:
        return np.ones(n)
    arr = np.asarray(w, dtype=float)
    if arr.shape != (n,):
        raise ValueError(f"{name} must have shape ({n},), got {arr.shape}")
    if (~np.isfinite(arr) | (arr < 0)).any():
        raise ValueError(f"{name} must be finite and >= 0; got {arr[~(np.isfinite(arr) & (arr >= 0))][0]!r}")
    return arr


def _check_r(r) -> int:
    if r not in (0, 1, 2, 3):
        raise ValueError(f"r (type of quantity) must be 0, 1, 2 or 3, got {r!r}")
    return int(r)


# --------------------------------------------------------------------------
# moment means and distributions (ISO 9276-1, ISO 9276-2)
# --------------------------------------------------------------------------


def moment_mean(x, p: float, q: float, counts=None) -> float:
    """Moment-ratio mean diameter D[p,q] of a number-based population.

    Parameters
    ----------
    x : array_like, shape (n,)
        Particle sizes (or class mid-points), > 0, any length unit.
    p, q : float
        Moment orders (e.g. ``p=3, q=2`` for the Sauter diameter).
    counts : array_like, shape (n,), optional
        Number of particles of each size; 1 each when left out.

    Returns
    -------
    float
        D[p,q] in the unit of ``x``; NaN for an empty population.

    Notes
    -----
    From ISO 9276-2 [2]_ for number-based data with counts n_i:

    .. math:: D[p,q] = \\left(\\frac{\\sum n_i x_i^p}{\\sum n_i x_i^q}\\right)^{1/(p-q)},
              \\qquad p \\ne q

    .. math:: D[p,p] = \\exp\\left(\\frac{\\sum n_i x_i^p \\ln x_i}{\\sum n_i x_i^p}\\right)

    References
    ----------
    .. [2] ISO 9276-2:2014, clause 5.

    Examples
    --------
    >>> round(moment_mean([1, 2, 3, 4], 3, 2), 4)
    3.3333
    """
    x = _as_sizes(x)
    n = _as_weights(counts, x.size)
    if x.size == 0 or n.sum() == 0:
        return float("nan")
    # work relative to the largest size to keep high powers in range
    scale = x.max()
    u = x / scale
    mp = np.sum(n * u**p)
    if p == q:
        return float(scale * np.exp(np.sum(n * u**p * np.log(u)) / mp))
    mq = np.sum(n * u**q)
    return float(scale * (mp / mq) ** (1.0 / (p - q)))


def sauter_diameter(x, counts=None) -> float:
    """Sauter mean diameter D[3,2] (surface-weighted mean), see :func:`moment_mean`.

    Parameters
    ----------
    x : array_like, shape (n,)
        Sizes > 0.
    counts : array_like, shape (n,), optional
        Class counts.

    Returns
    -------
    float
        D[3,2] = sum x^3 / sum x^2, in the unit of ``x``.

    References
    ----------
    .. [2] ISO 9276-2:2014.
    """
    return moment_mean(x, 3, 2, counts)


def de_brouckere_diameter(x, counts=None) -> float:
    """De Brouckere mean diameter D[4,3] (volume-weighted mean), see :func:`moment_mean`.

    Parameters
    ----------
    x : array_like, shape (n,)
        Sizes > 0.
    counts : array_like, shape (n,), optional
        Class counts.

    Returns
    -------
    float
        D[4,3] = sum x^4 / sum x^3, in the unit of ``x``.

    References
    ----------
    .. [2] ISO 9276-2:2014.
    """
    return moment_mean(x, 4, 3, counts)


def size_distribution(x, edges, r: int = 0, counts=None) -> tuple[np.ndarray, np.ndarray]:
    """Cumulative distribution Q_r and density q_r over size classes.

    Parameters
    ----------
    x : array_like, shape (n,)
        Particle sizes > 0.
    edges : array_like, shape (m + 1,)
        Increasing class boundaries in the unit of ``x``; particles outside
        them are ignored.
    r : {0, 1, 2, 3}
        Type of quantity: 0 number, 1 length, 2 projected area, 3 volume.
    counts : array_like, shape (n,), optional
        Particle counts per size.

    Returns
    -------
    Q : ndarray, shape (m + 1,)
        Cumulative fraction Q_r at each edge (Q[0] = 0, Q[-1] = 1 when all
        particles fall inside the edges).
    q : ndarray, shape (m,)
        Density q_r = Delta Q_r / Delta x per class, in 1 / unit of ``x``.

    Notes
    -----
    Following ISO 9276-1 [1]_, a particle of size x_i carries the weight
    n_i x_i^r, so

    .. math:: Q_r(x) = \\frac{\\sum_{x_i \\le x} n_i x_i^r}{\\sum_i n_i x_i^r},
              \\qquad q_{r,j} = \\frac{Q_r(x_j) - Q_r(x_{j-1})}{x_j - x_{j-1}}

    References
    ----------
    .. [1] ISO 9276-1:1998, clauses 4-5.
    """
    x = _as_sizes(x)
    r = _check_r(r)
    n = _as_weights(counts, x.size)
    e = np.asarray(edges, dtype=float)
    if e.ndim != 1 or e.size < 2 or not np.all(np.diff(e) > 0):
        raise ValueError(f"edges must be a 1-D increasing array of >= 2 values, got {e!r}")
    w = n * x**r
    total = w.sum()
    hist, _ = np.histogram(x, bins=e, weights=w)
    if total == 0:
        return np.zeros(e.size), np.zeros(e.size - 1)
    Q = np.concatenate([[0.0], np.cumsum(hist) / total])
    q = np.diff(Q) / np.diff(e)
    return Q, q


def size_quantile(x, fraction, r: int = 0):
    """Size x_{P,r} below which the fraction ``fraction`` of quantity ``r`` lies.

    Parameters
    ----------
    x : array_like, shape (n,)
        Particle sizes > 0.
    fraction : float or array_like
        Fractions in [0, 1] (0.5 gives the median size x_{50,r}).
    r : {0, 1, 2, 3}
        0 number-based (the default), 2 projected-area-based, 3 volume-based.

    Returns
    -------
    float or ndarray
        Size(s) in the unit of ``x``; NaN for an empty population.

    Notes
    -----
    Each particle i (sorted by size) stands for the middle of its share of
    the total weight w_i = x_i^r; the quantile interpolates linearly between
    these plotting positions and is clamped at the ends:

    .. math:: c_i = \\frac{\\sum_{j \\le i} w_j - w_i / 2}{\\sum_j w_j}

    For r = 0 this is the Hazen definition, ``numpy.quantile(x, fraction,
    method="hazen")``; for r > 0 it reads the size off the weighted
    cumulative Q_r of ISO 9276-1 [1]_.

    References
    ----------
    .. [1] ISO 9276-1:1998.
    """
    x = _as_sizes(x)
    r = _check_r(r)
    f = np.asarray(fraction, dtype=float)
    if ((f < 0) | (f > 1) | ~np.isfinite(f)).any():
        raise ValueError(f"fraction must lie in [0, 1], got {fraction!r}")
    if x.size == 0:
        out = np.full(f.shape, np.nan)
        return float(out) if out.ndim == 0 else out
    xs = np.sort(x)
    w = (xs / xs[-1]) ** r
    c = (np.cumsum(w) - 0.5 * w) / w.sum()
    out = np.interp(f, c, xs)
    return float(out) if np.ndim(out) == 0 else out


def d_values(x, r: int = 0) -> tuple[float, float, float]:
    """D10, D50 and D90 of a population, by number (``r=0``) unless told.

    Parameters
    ----------
    x : array_like, shape (n,)
        Particle sizes > 0.
    r : {0, 1, 2, 3}
        Basis: 0 number (default), 2 projected area, 3 volume.

    Returns
    -------
    tuple of float
        (x_{10,r}, x_{50,r}, x_{90,r}) in the unit of ``x``.

    Notes
    -----
    See :func:`size_quantile`. The basis matters: for a lognormal
    population the volume-based median exceeds the number-based one by
    the factor exp(3 ln^2 sigma_g) (Hatch-Choate [3]_).

    References
    ----------
    .. [3] Hatch and Choate, 1929.
    """
    d = size_quantile(x, [0.1, 0.5, 0.9], r)
    return float(d[0]), float(d[1]), float(d[2])


def mean_sd_cov(x) -> tuple[float, float, float]:
    """Arithmetic mean, sample standard deviation and coefficient of variation.

    Parameters
    ----------
    x : array_like, shape (n,)
        Values (finite).

    Returns
    -------
    mean, sd, cov_pct : float
        sd uses ddof = 1 (NaN for n < 2); COV = 100 sd / mean in percent.

    Notes
    -----
    .. math:: s = \\sqrt{\\frac{1}{n-1}\\sum (x_i - \\bar x)^2},
              \\qquad \\mathrm{COV} = 100\\, s / \\bar x
    """
    x = _as_sizes(x, positive=False)
    if x.size == 0:
        return float("nan"), float("nan"), float("nan")
    m = float(x.mean())
    if x.size < 2:
        return m, float("nan"), float("nan")
    s = float(x.std(ddof=1))
    return m, s, (100.0 * s / m if m != 0 else float("nan"))


def lognormal_fit(x) -> tuple[float, float]:
    """Geometric mean and geometric standard deviation of sizes.

    Parameters
    ----------
    x : array_like, shape (n,)
        Sizes > 0.

    Returns
    -------
    geo_mean : float
        exp(mean(ln x)), in the unit of ``x``; for a lognormal population
        this estimates the count median diameter (CMD).
    geo_sd : float
        exp(sd(ln x)) with ddof = 1, dimensionless (>= 1); NaN for n < 2.

    Notes
    -----
    The lognormal number density these describe is

    .. math:: q_0(x) = \\frac{1}{x \\ln\\sigma_g \\sqrt{2\\pi}}
              \\exp\\left(-\\frac{(\\ln x - \\ln x_g)^2}{2 \\ln^2\\sigma_g}\\right)

    which is ``scipy.stats.lognorm(s=ln sigma_g, scale=x_g)``. The maximum
    likelihood fit (``lognorm.fit(x, floc=0)``) gives the same x_g and a
    sigma_g with ddof = 0.

    References
    ----------
    .. [3] Hatch and Choate, 1929.
    """
    x = _as_sizes(x)
    if x.size == 0:
        return float("nan"), float("nan")
    lx = np.log(x)
    gm = float(np.exp(lx.mean()))
    gsd = float(np.exp(lx.std(ddof=1))) if x.size > 1 else float("nan")
    return gm, gsd


def lognormal_pdf(x, geo_mean: float, geo_sd: float) -> np.ndarray:
    """Lognormal number density q_0(x) with the given geometric mean and sd.

    Parameters
    ----------
    x : array_like
        Sizes > 0 at which to evaluate.
    geo_mean : float
        Geometric mean (median) x_g > 0.
    geo_sd : float
        Geometric standard deviation sigma_g > 1.

    Returns
    -------
    ndarray
        Density in 1 / unit of ``x`` (see :func:`lognormal_fit`, Notes).
    """
    if not (geo_mean > 0 and geo_sd > 1):
        raise ValueError(f"need geo_mean > 0 and geo_sd > 1, got {geo_mean!r}, {geo_sd!r}")
    return stats.lognorm.pdf(np.asarray(x, dtype=float), s=np.log(geo_sd), scale=geo_mean)


# --------------------------------------------------------------------------
# habits, alpha, tabular grains
# --------------------------------------------------------------------------


def habit_codes(habits, names=HABITS) -> np.ndarray:
    """Integer code of each habit name: its position in ``names``, -1 if absent.

    Parameters
    ----------
    habits : array_like of str, shape (n,)
        Habit of each grain.
    names : sequence of str
        Vocabulary (default: :data:`HABITS`).

    Returns
    -------
    ndarray of int, shape (n,)
    """
    lookup = {h: i for i, h in enumerate(names)}
    return np.array([lookup.get(str(h), -1) for h in np.asarray(habits, dtype=object)], dtype=int)


def habit_fractions(codes, areas, n_habits: int = len(HABITS)) -> tuple[np.ndarray, np.ndarray]:
    """Habit fractions by number and by projected area.

    Parameters
    ----------
    codes : array_like of int, shape (n,)
        Habit code per grain (see :func:`habit_codes`); -1 (unknown) grains
        are left out of both numerator and denominator.
    areas : array_like, shape (n,)
        Projected area per grain (any unit), >= 0.
    n_habits : int
        Number of habit classes.

    Returns
    -------
    number_fraction, area_fraction : ndarray, shape (n_habits,)
        Each sums to 1 over the habits (NaN everywhere when no grain has a
        known habit).

    Notes
    -----
    .. math:: f_{0,k} = \\frac{N_k}{\\sum_j N_j}, \\qquad
              f_{2,k} = \\frac{\\sum_{i \\in k} A_i}{\\sum_{i} A_i}

    The area-based fraction is the r = 2 counterpart of the number fraction
    in the ISO 9276-1 [1]_ sense: a few large plates can dominate it.
    """
    c = np.asarray(codes, dtype=int)
    a = _as_sizes(areas, "areas", positive=False)
    if c.shape != a.shape or c.ndim != 1:
        raise ValueError(f"codes and areas must be 1-D of equal length, got {c.shape} and {a.shape}")
    if (a < 0).any():
        raise ValueError(f"areas must be >= 0, got {a[a < 0][0]!r}")
    if (c >= n_habits).any() or (c < -1).any():
        raise ValueError(f"codes must lie in [-1, {n_habits - 1}], got {c[(c >= n_habits) | (c < -1)][0]}")
    known = c >= 0
    counts = np.bincount(c[known], minlength=n_habits).astype(float)
    area = np.bincount(c[known], weights=a[known], minlength=n_habits)
    nf = counts / counts.sum() if counts.sum() > 0 else np.full(n_habits, np.nan)
    af = area / area.sum() if area.sum() > 0 else np.full(n_habits, np.nan)
    return nf, af


def alpha_median_iqr(alpha) -> tuple[float, float, int]:
    """Median and interquartile range of the growth parameter alpha.

    Parameters
    ----------
    alpha : array_like, shape (n,)
        alpha = sqrt(3) v100 / v111 per grain, NaN where not determined.

    Returns
    -------
    median, iqr : float
        Over the finite values; NaN when there are none.
    n : int
        Number of finite values used.

    Notes
    -----
    IQR = Q(0.75) - Q(0.25) with numpy's default (linear) quantiles.
    """
    a = np.asarray(alpha, dtype=float)
    if a.ndim != 1:
        raise ValueError(f"alpha must be 1-D, got shape {a.shape}")
    a = a[np.isfinite(a)]
    if a.size == 0:
        return float("nan"), float("nan"), 0
    q25, q50, q75 = np.quantile(a, [0.25, 0.5, 0.75])
    return float(q50), float(q75 - q25), int(a.size)


def tabular_aspect_ratio_mean(aspect_ratio, codes, names=HABITS) -> tuple[float, int]:
    """Mean aspect ratio (ECD / thickness) of the tabular grains.

    Parameters
    ----------
    aspect_ratio : array_like, shape (n,)
        Per-grain tabular aspect ratio, NaN unless measured.
    codes : array_like of int, shape (n,)
        Habit codes into ``names``.
    names : sequence of str
        Vocabulary; the tabular ones are :data:`TABULAR_HABITS`.

    Returns
    -------
    mean : float
        Arithmetic mean over tabular grains with a finite ratio (NaN if none).
    n : int
        Number of grains used.
    """
    ar = np.asarray(aspect_ratio, dtype=float)
    c = np.asarray(codes, dtype=int)
    if ar.shape != c.shape:
        raise ValueError(f"aspect_ratio and codes differ in shape: {ar.shape} vs {c.shape}")
    tab = np.isin(c, [names.index(h) for h in TABULAR_HABITS if h in names])
    use = tab & np.isfinite(ar)
    if not use.any():
        return float("nan"), 0
    return float(ar[use].mean()), int(use.sum())


def monodispersity(cov_pct: float, ci_lo: float = np.nan, ci_hi: float = np.nan,
                   threshold_pct: float = MONODISPERSE_COV_PCT) -> tuple[bool, str]:
    """Verdict on monodispersity from the size COV and its confidence interval.

    Parameters
    ----------
    cov_pct : float
        Size COV in percent.
    ci_lo, ci_hi : float, optional
        Confidence interval of the COV in percent (NaN if unknown).
    threshold_pct : float
        COV at or below which a sample counts as monodisperse; 15 % by
        default (common practice, from memory).

    Returns
    -------
    monodisperse : bool
        ``cov_pct <= threshold_pct`` (False for NaN).
    verdict : str
        ``"monodisperse"`` or ``"polydisperse"`` when the whole interval
        lies on one side of the threshold (or no interval is known),
        ``"borderline"`` when the interval straddles it, ``"no data"`` for
        a NaN COV.
    """
    if not np.isfinite(threshold_pct) or threshold_pct <= 0:
        raise ValueError(f"threshold_pct must be > 0, got {threshold_pct!r}")
    if not np.isfinite(cov_pct):
        return False, "no data"
    mono = bool(cov_pct <= threshold_pct)
    if np.isfinite(ci_lo) and np.isfinite(ci_hi) and ci_lo <= threshold_pct < ci_hi:
        return mono, "borderline"
    return mono, "monodisperse" if mono else "polydisperse"


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
    a = _as_sizes(x_a, "x_a", positive=False)
    b = _as_sizes(x_b, "x_b", positive=False)
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
                          (stats.t.ppf(q, np.maximum(n - 1, 1)) / stats.t.ppf(q, np.maximum(df, 1))) ** 2, 1.0)
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
    q = stats.t.ppf(1 - 0.5 * (1 - confidence), spread.df) if np.isfinite(spread.df) else np.nan
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


# --------------------------------------------------------------------------
# alpha: determined values and bounds
# --------------------------------------------------------------------------


def alpha_states(alpha, alpha_lo, alpha_hi) -> tuple[np.ndarray, np.ndarray]:
    """Which grains have alpha determined, and which only bounded.

    Parameters
    ----------
    alpha, alpha_lo, alpha_hi : array_like, shape (n,)
        Per-grain alpha (NaN where not determined) and the range the
        outline cannot tell apart (NaN where there is none).

    Returns
    -------
    determined : ndarray of bool
        ``alpha`` is finite.
    bounded : ndarray of bool
        ``alpha`` is NaN but ``alpha_lo`` and ``alpha_hi`` are finite (e.g.
        a square outline: alpha <= 1.5; a pure octahedron: alpha >= 3, with
        the edge of the model range as the other end).
    """
    a, lo, hi = (np.asarray(v, dtype=float) for v in (alpha, alpha_lo, alpha_hi))
    if not (a.shape == lo.shape == hi.shape) or a.ndim != 1:
        raise ValueError(f"alpha, alpha_lo and alpha_hi must be 1-D of equal length, got {a.shape}, "
                         f"{lo.shape}, {hi.shape}")
    det = np.isfinite(a)
    return det, ~det & np.isfinite(lo) & np.isfinite(hi)


def alpha_in_range(alpha, alpha_lo, alpha_hi, limit: float, below: bool,
                   tol: float = 1e-9) -> tuple[np.ndarray, np.ndarray]:
    """Whether each grain's alpha is known to lie at or below (or at or above) ``limit``.

    Parameters
    ----------
    alpha, alpha_lo, alpha_hi : array_like, shape (n,)
        As in :func:`alpha_states`.
    limit : float
        The threshold, e.g. 1.5 (the cube range) or 3 (the octahedron).
    below : bool
        True for alpha <= limit, False for alpha >= limit.
    tol : float
        Slack on the comparison (a bound of exactly the limit counts).

    Returns
    -------
    yes : ndarray of bool
        A determined alpha on the asked side, or a bound that puts the
        whole range there (``alpha_hi <= limit`` for ``below``).
    undecided : ndarray of bool
        Only bounded, with the range straddling the limit.
    """
    a, lo, hi = (np.asarray(v, dtype=float) for v in (alpha, alpha_lo, alpha_hi))
    det, bnd = alpha_states(a, lo, hi)
    if below:
        yes = (det & (a <= limit + tol)) | (bnd & (hi <= limit + tol))
        no = (det & (a > limit + tol)) | (bnd & (lo > limit + tol))
    else:
        yes = (det & (a >= limit - tol)) | (bnd & (lo >= limit - tol))
        no = (det & (a < limit - tol)) | (bnd & (hi < limit - tol))
    return yes, bnd & ~yes & ~no
