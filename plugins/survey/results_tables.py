"""Results tables for the survey commands: open a results store, text columns as plain str.

Used by the report, ``compare`` and ``aggregate``.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from grainhabit.lazy import lazy_module

xr = lazy_module("xarray")


def load_results(path: str | os.PathLike) -> dict[str, xr.Dataset]:
    """Open every group of a results store into memory.

    Raises
    ------
    ValueError
        If ``path`` is missing, not a store, or lacks the ``grains`` or
        ``frames`` group.
    """
    from grainhabit.results import open_results

    p = Path(path)
    if not p.exists():
        raise ValueError(f"{path}: no such results store")
    groups = open_results(p)
    for need in ("grains", "frames"):
        if need not in groups:
            raise ValueError(f"{path}: not a grainhabit results store (no {need!r} group)")
    return groups


def text_values(values) -> np.ndarray:
    """Any array of text (numpy StringDType, unicode, object) as a flat object array of ``str``."""
    return np.array(["" if v is None else str(v) for v in np.asarray(values).ravel()], dtype=object)


def plain_dataset(ds: xr.Dataset) -> xr.Dataset:
    """Text variables as object arrays of str (for pandas, pyarrow and NetCDF 3)."""
    out = ds.copy()
    for name, var in list(out.variables.items()):
        if var.dtype.kind in ("U", "S", "O", "T"):
            out[name] = var.copy(data=text_values(var.values).reshape(var.shape))
    return out
