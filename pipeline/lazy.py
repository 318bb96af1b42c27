"""Modules imported on first use, so that dask workers start fast.

A worker process builds the whole plugin host, but runs only the per-frame
steps; the survey-level plugins (summaries, report, comparison) need
xarray, zarr, matplotlib and ``scipy.stats``, which together take about
1.5 s to import on the development machine. Those plugins bind such
modules with :func:`lazy_module`, and the import happens when an attribute
is first used.
"""

from __future__ import annotations

import importlib.util
import sys
from types import ModuleType


def lazy_module(name: str) -> ModuleType:
    """A module object that imports ``name`` when one of its attributes is first read.

    Parameters
    ----------
    name : str
        Absolute module name, e.g. ``"xarray"`` or ``"scipy.stats"`` (the
        parent package of a submodule is imported at once).

    Returns
    -------
    module
        ``sys.modules[name]`` if it is imported already, else a lazy module
        registered there, so later plain imports get the same object.

    Raises
    ------
    ModuleNotFoundError
        If no module of that name can be found (checked now, not at first use).

    References
    ----------
    .. [1] Python documentation, ``importlib`` -- "Implementing lazy imports"
       (``importlib.util.LazyLoader``).
    """
    if name in sys.modules:
        return sys.modules[name]
    spec = importlib.util.find_spec(name)
    if spec is None or spec.loader is None:
        raise ModuleNotFoundError(f"No module named {name!r}", name=name)
    loader = importlib.util.LazyLoader(spec.loader)
    spec.loader = loader
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module
    loader.exec_module(module)
    return module
