"""Moment means and size distributions of grain populations (ISO 9276-1, ISO 9276-2; pure functions).

Sizes are in whatever length unit the caller uses (grainhabit passes ECD in
nm); the functions never convert. The type of quantity ``r`` is 0 for
number, 1 for length, 2 for (projected) area and 3 for volume; ``Q_r`` is
the cumulative distribution and ``q_r`` its density; ``D[p,q]`` is the
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
"""

from __future__ import annotations

import numpy as np

from grainhabit.lazy import lazy_module

stats = lazy_module("scipy.stats")  # imported on first use (about 0.3 s): dask workers never need it


# --------------------------------------------------------------------------
# input checks
# --------------------------------------------------------------------------


def as_sizes(x, name: str = "x", positive: bool = True) -> np.ndarray:
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


def as_weights(w, n: int, name: str = "counts") -> np.ndarray:
    """Return optional class counts/weights as a float array of length ``n``."""
    if w is None:
        return np.ones(n)
    arr = np.asarray(w, dtype=float)
    if arr.shape != (n,):
        raise ValueError(f"{name} must have shape ({n},), got {arr.shape}")
    if (~np.isfinite(arr) | (arr < 0)).any():
        raise ValueError(f"{name} must be finite and >= 0; got {arr[~(np.isfinite(arr) & (arr >= 0))][0]!r}")
    return arr


def check_r(r) -> int:
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
    x = as_sizes(x)
    n = as_weights(counts, x.size)
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
    x = as_sizes(x)
    r = check_r(r)
    n = as_weights(counts, x.size)
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
    x = as_sizes(x)
    r = check_r(r)
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
    x = as_sizes(x, positive=False)
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
    x = as_sizes(x)
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
