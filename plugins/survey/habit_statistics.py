"""Habit fractions, alpha summaries, tabular aspect ratios and the monodispersity call (pure functions)."""

from __future__ import annotations

import numpy as np

from grainhabit.lazy import lazy_module
from grainhabit.plugins.survey.size_distribution import as_sizes
from grainhabit.plugins.habit.vocabulary import HABITS, TABULAR_HABITS

stats = lazy_module("scipy.stats")  # imported on first use (about 0.3 s): dask workers never need it


#: Monodispersity threshold on the size COV in percent. Emulsions with a
#: size COV of roughly 10-15 % or less are called monodisperse (common
#: practice, from memory).
MONODISPERSE_COV_PCT = 15.0


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
    a = as_sizes(areas, "areas", positive=False)
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
