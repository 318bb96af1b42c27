"""Shewhart individuals charts and the Western Electric run rules.

A product's history is a sequence of one value per batch (or per night):
a spec'd statistic such as the mean ECD or the cube fraction. The chart
draws that sequence with a centre line and control limits at three
standard deviations; the run rules flag patterns that are unlikely while
the process stays as it was, so drift shows before a batch leaves its spec
limits.

- Individuals (X) chart: centre = mean of the history; the short-term
  standard deviation is estimated from the average moving range of
  neighbouring points, sigma = MR-bar / d2 with d2 = 2 / sqrt(pi) (the
  expected range of two independent normal values in units of sigma);
  control limits centre +- 3 sigma. Shewhart, *Economic Control of Quality
  of Manufactured Product* (1931); NIST/SEMATECH e-Handbook of Statistical
  Methods, section 6.3.2.2 ("Individuals control charts") (section number
  from memory). d2 is derived here, not looked up (tests check it against
  scipy's half-normal distribution).
- Run rules, as in the Western Electric *Statistical Quality Control
  Handbook* (1956) (the rules as we recall them, from memory; tests check
  each rule's false-alarm rate against the normal distribution), on one
  side of the centre at a time:

  1. one point beyond 3 sigma;
  2. two of three consecutive points beyond 2 sigma;
  3. four of five consecutive points beyond 1 sigma;
  4. eight consecutive points on one side of the centre line.

  A rule flags the point that completes its pattern.

- Each point is judged against the limits of the history before it
  (:func:`prospective`): the nights before a point are its reference, so a
  drifting batch is measured against the in-control batches that came
  before it and not against a history that already holds the drift (a
  chart whose limits include the drifted points widens with the drift and
  flags it late). This is the usual split of a control chart into a
  reference period and the monitoring of new points (NIST/SEMATECH
  e-Handbook 6.3.1, from memory), applied at every point.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

#: Expected range of two independent standard normal values, E|Z1 - Z2| = 2 / sqrt(pi).
D2_SPAN2 = 2.0 / np.sqrt(np.pi)

#: The run rules by number: (short description, window, points needed, sigma multiple).
RULES = {
    1: ("one point beyond 3 sigma", 1, 1, 3.0),
    2: ("two of three consecutive points beyond 2 sigma on one side", 3, 2, 2.0),
    3: ("four of five consecutive points beyond 1 sigma on one side", 5, 4, 1.0),
    4: ("eight consecutive points on one side of the centre line", 8, 8, 0.0),
}

#: How the page names the rules.
RULES_NAME = "Western Electric rules 1-4"


@dataclass
class Limits:
    """Centre line and control limits of an individuals chart.

    Attributes
    ----------
    centre : float
        Mean of the history.
    sigma : float
        Short-term standard deviation, average moving range / d2.
    lower, upper : float
        centre -/+ 3 sigma.
    points : int
        Finite points the limits were computed from.
    """

    centre: float
    sigma: float
    lower: float
    upper: float
    points: int


def individuals_limits(values, min_points: int = 5) -> Limits:
    """Centre line and 3-sigma limits of an individuals chart.

    Parameters
    ----------
    values : array_like of float
        The history in time order; NaN points (no data that night) are left
        out, and moving ranges are taken between neighbouring finite points.
    min_points : int
        Fewer finite points give NaN limits (the centre is still the mean).

    Returns
    -------
    Limits
        In the units of ``values``.

    References
    ----------
    NIST/SEMATECH e-Handbook of Statistical Methods, 6.3.2.2 (from memory):
    sigma = MR-bar / 1.128 for moving ranges of span 2.
    """
    x = np.asarray(values, dtype=float).ravel()
    x = x[np.isfinite(x)]
    n = int(x.size)
    centre = float(x.mean()) if n else np.nan
    if n < max(int(min_points), 2):
        return Limits(centre, np.nan, np.nan, np.nan, n)
    sigma = float(np.abs(np.diff(x)).mean() / D2_SPAN2)
    return Limits(centre, sigma, centre - 3 * sigma, centre + 3 * sigma, n)


def run_rules(values, centre: float, sigma: float) -> list[list[int]]:
    """Which Western Electric rules each point completes.

    Parameters
    ----------
    values : array_like of float
        The history in time order. NaN points break no pattern and are
        skipped (windows run over the finite points).
    centre, sigma : float
        Centre line and short-term standard deviation (:func:`individuals_limits`).

    Returns
    -------
    list of list of int
        For every point of ``values``, the numbers (1-4) of the rules whose
        pattern it completes; empty where none, and everywhere when
        ``sigma`` is not a positive number.
    """
    x = np.asarray(values, dtype=float).ravel()
    flags: list[list[int]] = [[] for _ in range(x.size)]
    if not (np.isfinite(centre) and np.isfinite(sigma) and sigma > 0):
        return flags
    idx = np.flatnonzero(np.isfinite(x))
    z = (x[idx] - centre) / sigma
    for rule, (_, window, need, k) in RULES.items():
        for side in (1.0, -1.0):
            beyond = (side * z > k) if k > 0 else (side * z > 0)
            for end in range(window - 1, z.size):
                if beyond[end] and beyond[end - window + 1:end + 1].sum() >= need:
                    if rule not in flags[idx[end]]:
                        flags[idx[end]].append(rule)
    for f in flags:
        f.sort()
    return flags


def prospective(values, min_points: int = 5) -> tuple[list[Limits], list[list[int]]]:
    """Limits and run-rule flags of every point, each judged against the history before it.

    Parameters
    ----------
    values : array_like of float
        The history in time order (NaN: no data that night, skipped).
    min_points : int
        Finite earlier points needed before a point gets limits (and can
        break a rule).

    Returns
    -------
    limits : list of Limits
        Per point, the limits from the finite points before it (NaN limits
        until ``min_points`` earlier points exist).
    flags : list of list of int
        Per point, the rules whose pattern it completes when its window (it
        and the finite points just before it) is measured against its own
        limits.
    """
    x = np.asarray(values, dtype=float).ravel()
    idx = np.flatnonzero(np.isfinite(x))
    limits: list[Limits] = []
    flags: list[list[int]] = [[] for _ in range(x.size)]
    for i in range(x.size):
        before = idx[idx < i]
        lim = individuals_limits(x[before], min_points=min_points)
        limits.append(lim)
        if not np.isfinite(x[i]) or not (np.isfinite(lim.sigma) and lim.sigma > 0):
            continue
        window = max(w for _, w, _, _ in RULES.values())
        recent = np.r_[before[-(window - 1):], i]
        last = run_rules(x[recent], lim.centre, lim.sigma)[-1]
        flags[i] = last
    return limits, flags

