"""Step ``known-thickness``: a thickness known from elsewhere, and the tabular aspect ratio.

Where the thickness of the plates is known from another measurement (a cross
section, a shadowed replica measured once, the make's specification), it is
given per sample or for all; the step writes ``thickness_nm`` for the tabular
grains and ``tabular_aspect_ratio`` = ECD / thickness (the usual figure of
merit of a tabular emulsion), NaN for every other habit.

Notes
-----
Only grains whose ``habit`` starts with ``tabular`` get a thickness: a cube or
an octahedron has no single thickness, and giving it one would put a false
aspect ratio into the statistics. The ``edge_ratio`` column of measure-grains
(short / long edge of the fitted outline) describes how far a tabular
triangle's corners are cut: 0 is a sharp triangle, 1 a regular hexagon.
"""
from __future__ import annotations

import numpy as np

from grainhabit import hookimpl
from grainhabit.params import Param, StepInfo

GRAINHABIT_API = 1

STEP = StepInfo(
    name="known-thickness",
    stage="thickness",
    version="1.0",
    summary="Thickness of tabular grains from a known value per sample; aspect ratio ECD / thickness.",
    params=(
        Param("thickness_nm", float, None, unit="nm", low=0.0,
              doc="Thickness of every tabular grain where the sample has no entry in by_sample."),
        Param("by_sample", list, None, unit="nm",
              doc='Per-sample thickness as "sample=nm" strings, e.g. ["batch-07=120", "batch-08=95"].'),
    ),
)


def parse_by_sample(entries) -> dict[str, float]:
    """Parse ``["sample=nm", ...]`` into a mapping.

    Parameters
    ----------
    entries : list of str or None

    Returns
    -------
    dict of str -> float
        Sample name to thickness (nm).

    Raises
    ------
    ValueError
        For an entry that is not ``name=number`` with a number > 0, or a
        sample named twice.
    """
    out: dict[str, float] = {}
    for e in entries or []:
        if not isinstance(e, str) or "=" not in e:
            raise ValueError(f"by_sample entry must be 'sample=nm', got {e!r}")
        name, _, val = e.rpartition("=")
        name = name.strip()
        try:
            nm = float(val)
        except ValueError:
            raise ValueError(f"by_sample entry {e!r}: {val!r} is not a number") from None
        if not name or not (np.isfinite(nm) and nm > 0):
            raise ValueError(f"by_sample entry {e!r}: need a sample name and a thickness > 0 nm")
        if name in out:
            raise ValueError(f"by_sample names sample {name!r} twice")
        out[name] = nm
    return out


def aspect_ratio(ecd_nm, thickness_nm, habit) -> np.ndarray:
    """Tabular aspect ratio ECD / thickness, NaN for grains that are not tabular.

    Parameters
    ----------
    ecd_nm, thickness_nm : array_like, shape (n,)
        nm.
    habit : array_like of str, shape (n,)

    Returns
    -------
    ndarray, shape (n,)
    """
    ecd = np.asarray(ecd_nm, float)
    t = np.asarray(thickness_nm, float)
    tab = np.char.startswith(np.asarray(habit, dtype=str), "tabular")
    if ecd.shape != t.shape or ecd.shape != tab.shape:
        raise ValueError(f"ecd, thickness and habit must have one shape, got {ecd.shape}, {t.shape}, {tab.shape}")
    with np.errstate(divide="ignore", invalid="ignore"):
        r = ecd / t
    return np.where(tab & (t > 0), r, np.nan)


def tabular_mask(frame) -> np.ndarray:
    """Which grains of a frame are tabular plates (bool per grain); ValueError without a habit column."""
    habit = frame.grains.get("habit")
    if habit is None:
        raise ValueError("a thickness step needs the habit column: run a classify step first")
    return np.char.startswith(np.asarray(habit, dtype=str), "tabular")


@hookimpl
def grainhabit_thickness(frame, params):
    """Write ``thickness_nm`` and ``tabular_aspect_ratio``; see the module docstring."""
    p = STEP.resolve(params)
    table = parse_by_sample(p["by_sample"])
    if p["thickness_nm"] is None and not table:
        raise ValueError("known-thickness needs thickness_nm or by_sample")
    value = table.get(frame.sample, p["thickness_nm"])
    n = frame.n_grains
    tab = tabular_mask(frame)
    t = np.full(n, np.nan)
    if value is not None:
        t[tab] = float(value)
    new = frame.with_columns(thickness_nm=t,
                             tabular_aspect_ratio=aspect_ratio(frame.grains["ecd_nm"], t,
                                                               frame.grains["habit"]))
    if value is None and tab.any():
        new = new.with_note(f"known-thickness: no thickness for sample {frame.sample!r}")
    return new
