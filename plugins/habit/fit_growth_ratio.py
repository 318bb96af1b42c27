"""Step ``fit-growth-ratio``: the growth-rate parameter alpha of every polyhedral grain.

alpha = sqrt(3) v100 / v111 (the cube/octahedron growth parameter; thresholds
in :mod:`vocabulary`). The fit itself is done once per grain by the habit
engine (:func:`engine.fit_alpha`) inside ``classify-habit``, whose
parameters are the one set that controls it (model grid, tolerance, noise
units, interior use); that step writes the fit to the frame (``fit_alpha``,
``fit_alpha_lo``, ``fit_alpha_hi``, ``fit_note``). This step turns it into the
reported ``alpha``, ``alpha_lo``, ``alpha_hi`` and ``alpha_note``:

- polyhedral grains (cube, cuboctahedron, octahedron) keep the fit: ``alpha``
  is a number only where outline and interior determine it; where they only
  bound it (a square outline: alpha <= 1.5; an octahedron: alpha >= 3)
  ``alpha`` is NaN and ``alpha_lo``/``alpha_hi`` carry the bound, one of them
  the edge of the model grid (design contract);
- other habits get NaN with the reason (alpha is not defined for a plate, a
  rod or an irregular grain);
- grains that touch the frame border get NaN unless ``fit_edge_cut`` (their
  outline is cut, so the fit compares a partial outline with whole models).
"""
from __future__ import annotations

import numpy as np

from grainhabit import hookimpl
from grainhabit.params import Column, Param, StepInfo
from grainhabit.plugins.habit.vocabulary import POLYHEDRAL_HABITS

GRAINHABIT_API = 1

STEP = StepInfo(
    name="fit-growth-ratio",
    stage="fit_growth",
    version="2.0",
    summary="Growth-rate parameter alpha of polyhedral grains, with the range the data allow "
            "(NaN where only bounded).",
    params=(
        Param("fit_edge_cut", bool, False,
              doc="Also report alpha for grains that touch the frame border (their outline is cut)."),
    ),
    outputs=(
        Column("alpha_note", "", "why alpha is NaN, or what bounds its range"),
    ),
)

_NOT_DEFINED = {
    "tabular_hexagon": "tabular plate: alpha not defined (edge_ratio gives the truncation)",
    "tabular_triangle": "tabular plate: alpha not defined (edge_ratio gives the truncation)",
    "rod": "rod: elongated prism, not a Wulff shape",
    "irregular": "irregular: fits no polyhedron",
}
_FIT_COLUMNS = ("fit_alpha", "fit_alpha_lo", "fit_alpha_hi", "fit_note")


def report_alpha(habit, fit_alpha, fit_lo, fit_hi, fit_note, edge_cut, fit_edge_cut=False) -> dict:
    """Reported alpha columns from the fit columns of classify-habit.

    Parameters
    ----------
    habit : array_like of str, shape (n,)
    fit_alpha, fit_lo, fit_hi : array_like of float, shape (n,)
        The engine's alpha (NaN where only bounded) and its range.
    fit_note : array_like of str, shape (n,)
    edge_cut : array_like of bool, shape (n,)
    fit_edge_cut : bool
        Report edge-cut grains too.

    Returns
    -------
    dict
        ``alpha``, ``alpha_lo``, ``alpha_hi`` (float arrays) and
        ``alpha_note`` (object array).
    """
    habit = np.asarray(habit, dtype=object)
    n = habit.size
    out = {"alpha": np.full(n, np.nan), "alpha_lo": np.full(n, np.nan), "alpha_hi": np.full(n, np.nan),
           "alpha_note": np.full(n, "", dtype=object)}
    for i in range(n):
        h = str(habit[i])
        if h not in POLYHEDRAL_HABITS:
            out["alpha_note"][i] = _NOT_DEFINED.get(h, f"habit {h!r} is not polyhedral")
        elif bool(edge_cut[i]) and not fit_edge_cut:
            out["alpha_note"][i] = "touches the frame border: outline cut"
        elif not (np.isfinite(fit_lo[i]) and np.isfinite(fit_hi[i])):
            out["alpha_note"][i] = str(fit_note[i]) or "no fit"
        else:
            out["alpha"][i], out["alpha_lo"][i], out["alpha_hi"][i] = fit_alpha[i], fit_lo[i], fit_hi[i]
            out["alpha_note"][i] = str(fit_note[i])
    return out


def fit_frame(frame, params=None) -> dict:
    """The columns of this step for every grain of a frame."""
    p = STEP.resolve(params)
    n = frame.n_grains
    if n == 0:
        return report_alpha([], [], [], [], [], [])
    g = frame.grains
    missing = [c for c in ("habit",) + _FIT_COLUMNS if c not in g]
    if missing:
        raise ValueError(f"fit-growth-ratio reads {', '.join(missing)} from classify-habit: "
                         "run classify-habit in the classify stage")
    return report_alpha(g["habit"], np.asarray(g["fit_alpha"], float), np.asarray(g["fit_alpha_lo"], float),
                        np.asarray(g["fit_alpha_hi"], float), g["fit_note"],
                        g.get("edge_cut", np.zeros(n, bool)), p["fit_edge_cut"])


@hookimpl
def grainhabit_fit_growth(frame, params):
    """Add ``alpha``, ``alpha_lo``, ``alpha_hi``, ``alpha_note`` (see the module docstring)."""
    return frame.with_columns(**fit_frame(frame, params))
