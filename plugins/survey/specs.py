"""Product specification files: what each batch is meant to be.

A workflow names one with ``specs: products.yaml`` (path relative to the
workflow). The file is YAML (safe loader), checked in full before a run
starts; the first problem is raised as :class:`grainhabit.workflow.WorkflowError`
naming the spec file, the key path and what was expected (``grainhabit run``
and ``check`` exit 2 on it)::

    version: 1
    note: "what these products are"          # optional, shown on the report
    products:
      - name: cubic-300                      # the product a batch is meant to be
        samples: ["KB-01*", "KB-11*"]        # globs on sample names (fnmatch, case-sensitive)
        min_grains: 300                      # fewer counted grains: the batch is undecided
        ecd_mean_nm: {target: 300, tolerance: 20}
        ecd_cov_pct: {max: 15}
        habit_number_fraction: {cube: {min: 0.85}}
        alpha_median: {min: 1.0, max: 1.6}

Every other key of a product names a numeric variable of the ``summary``
group; per-habit variables (dims sample, habit) take a mapping of habit
names. A criterion is ``min``, ``max`` (either or both) or ``target`` with
``tolerance`` (limits target -/+ tolerance).
"""

from __future__ import annotations

import fnmatch
import math
from dataclasses import dataclass, field
from pathlib import Path

import yaml

from grainhabit.plugins.habit.vocabulary import HABITS

_PRODUCT_KEYS = ("name", "samples", "min_grains", "note")
_BOUND_KEYS = ("min", "max", "target", "tolerance")

#: Summary variables that are counts (exact, no sampling interval).
EXACT_VARIABLES = frozenset({
    "grain_count", "frame_count", "frames_failed", "edge_cut_count", "habit_count", "habit_unknown_count",
    "alpha_count", "alpha_bounded_count", "tabular_count", "ci_frames",
})


def summary_variables() -> dict[str, bool]:
    """Numeric variables of the built-in ``summary`` group a spec may name.

    Found by summarising one invented grain with the built-in
    ``summarise-samples`` step, so the list follows that step as it grows.

    Returns
    -------
    dict of str -> bool
        Variable name -> whether it has a habit dimension. Confidence
        limits (``*_ci_lo``, ``*_ci_hi``) and text or true/false variables
        are left out.
    """
    global _VARIABLES
    if _VARIABLES is None:
        import numpy as np
        import xarray as xr

        from grainhabit.plugins.survey import summarise_samples as ss

        grains = xr.Dataset({"ecd_nm": ("grain", [100.0]), "area_nm2": ("grain", [7854.0]),
                             "habit": ("grain", np.array([HABITS[0]], dtype=object)),
                             "sample": ("grain", np.array(["x"], dtype=object)), "frame": ("grain", [0])})
        frames = xr.Dataset({"sample": ("frame", np.array(["x"], dtype=object)),
                             "status": ("frame", np.array(["ok"], dtype=object))})
        ds = ss.summarise_by(grains, frames, "sample", ss.STEP.resolve({"bootstrap": 0}))
        _VARIABLES = {name: "habit" in var.dims for name, var in ds.data_vars.items()
                      if var.dtype.kind in "iuf" and not name.endswith(("_ci_lo", "_ci_hi"))}
    return dict(_VARIABLES)


_VARIABLES: dict[str, bool] | None = None


@dataclass(frozen=True)
class Criterion:
    """One limit of a product on one summary variable.

    Attributes
    ----------
    variable : str
        ``summary`` variable, e.g. ``ecd_mean_nm``.
    habit : str
        Habit for per-habit variables, else ``""``.
    lower, upper : float
        Limits (-inf / inf where open).
    text : str
        The limit as written, e.g. ``"300 +- 20"`` or ``">= 0.85"``.
    """

    variable: str
    habit: str
    lower: float
    upper: float
    text: str

    @property
    def name(self) -> str:
        """Label of the criterion: the variable, with ``[habit]`` for per-habit ones."""
        return f"{self.variable}[{self.habit}]" if self.habit else self.variable


@dataclass
class Product:
    """A product: the batches it covers and its criteria."""

    name: str
    samples: list[str]
    min_grains: int
    criteria: list[Criterion] = field(default_factory=list)
    note: str = ""

    def matches(self, sample: str) -> bool:
        """Whether a sample name matches one of the product's globs."""
        return any(fnmatch.fnmatchcase(sample, g) for g in self.samples)


@dataclass
class Specs:
    """A validated spec file."""

    file: str
    products: list[Product]
    note: str = ""

    def product_of(self, sample: str) -> Product | None:
        """The first product (in file order) whose globs match ``sample``; None if none does."""
        return next((p for p in self.products if p.matches(sample)), None)


def _error(file: str, key: str, message: str):
    from grainhabit.workflow import WorkflowError

    return WorkflowError(file, key, message)


def _number(file: str, key: str, value) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise _error(file, key, f"expected a finite number, got {value!r}")
    return float(value)


def _fmt(v: float) -> str:
    return f"{v:g}"


def _criterion(file: str, key: str, variable: str, habit: str, body) -> Criterion:
    if not isinstance(body, dict) or not body:
        raise _error(file, key, "expected a mapping with min, max, or target and tolerance")
    for k in body:
        if k not in _BOUND_KEYS:
            raise _error(file, f"{key}.{k}", f"unknown key (expected one of: {', '.join(_BOUND_KEYS)})")
    vals = {k: _number(file, f"{key}.{k}", v) for k, v in body.items()}
    if "target" in vals or "tolerance" in vals:
        if "min" in vals or "max" in vals:
            raise _error(file, key, "give min and/or max, or target with tolerance, not both")
        if "target" not in vals or "tolerance" not in vals:
            raise _error(file, key, "target and tolerance go together")
        if vals["tolerance"] <= 0:
            raise _error(file, f"{key}.tolerance", f"expected a number > 0, got {body['tolerance']!r}")
        t, tol = vals["target"], vals["tolerance"]
        return Criterion(variable, habit, t - tol, t + tol, f"{_fmt(t)} \u00b1 {_fmt(tol)}")
    lo, hi = vals.get("min", -math.inf), vals.get("max", math.inf)
    if lo > hi:
        raise _error(file, key, f"min {_fmt(lo)} is above max {_fmt(hi)}")
    if math.isinf(hi):
        text = f"\u2265 {_fmt(lo)}"
    elif math.isinf(lo):
        text = f"\u2264 {_fmt(hi)}"
    else:
        text = f"{_fmt(lo)} \u2013 {_fmt(hi)}"
    return Criterion(variable, habit, lo, hi, text)


def _product(file: str, key: str, item, variables: dict[str, bool]) -> Product:
    if not isinstance(item, dict):
        raise _error(file, key, f"expected a mapping (name, samples, criteria), got {item!r}")
    name = item.get("name")
    if not isinstance(name, str) or not name.strip():
        raise _error(file, f"{key}.name", f"expected a non-empty string, got {name!r}")
    globs = item.get("samples")
    if isinstance(globs, str):
        globs = [globs]
    if not isinstance(globs, list) or not globs or not all(isinstance(g, str) and g for g in globs):
        raise _error(file, f"{key}.samples", f"expected a non-empty list of sample-name globs, got {globs!r}")
    min_grains = item.get("min_grains", 0)
    if isinstance(min_grains, bool) or not isinstance(min_grains, int) or min_grains < 0:
        raise _error(file, f"{key}.min_grains", f"expected an integer >= 0, got {min_grains!r}")
    note = item.get("note", "")
    if not isinstance(note, str):
        raise _error(file, f"{key}.note", f"expected a string, got {note!r}")
    criteria = []
    for var, body in item.items():
        if var in _PRODUCT_KEYS:
            continue
        ckey = f"{key}.{var}"
        if not isinstance(var, str) or var not in variables:
            known = ", ".join(list(_PRODUCT_KEYS) + sorted(variables))
            raise _error(file, ckey, f"unknown key (expected one of: {known})")
        if variables[var]:
            if not isinstance(body, dict) or not body:
                raise _error(file, ckey, "expected a mapping of habit names to limits, e.g. {cube: {min: 0.8}}")
            for habit, hbody in body.items():
                if habit not in HABITS:
                    raise _error(file, f"{ckey}.{habit}", f"unknown habit (expected one of: {', '.join(HABITS)})")
                criteria.append(_criterion(file, f"{ckey}.{habit}", var, habit, hbody))
        else:
            criteria.append(_criterion(file, ckey, var, "", body))
    if not criteria and not min_grains:
        raise _error(file, key, f"product {name!r} names no criterion")
    return Product(name.strip(), list(globs), int(min_grains), criteria, note)


def load_specs(path: str | Path, variables: dict[str, bool] | None = None) -> Specs:
    """Read and validate a spec file.

    Parameters
    ----------
    path : str or Path
        The spec file.
    variables : dict of str -> bool, optional
        Variables a criterion may name (default :func:`summary_variables`).

    Returns
    -------
    Specs

    Raises
    ------
    grainhabit.workflow.WorkflowError
        On the first problem: a missing or unreadable file, bad YAML, an
        unknown key, variable or habit, a malformed limit, or a product name
        given twice.
    """
    file = str(path)
    variables = summary_variables() if variables is None else variables
    try:
        text = Path(path).read_text(encoding="utf-8")
    except FileNotFoundError:
        raise _error(file, "", "no such spec file") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise _error(file, "", f"cannot read: {exc}") from None
    try:
        data = yaml.safe_load(text)
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f"line {mark.line + 1}" if mark is not None else "YAML"
        raise _error(file, where, f"not valid YAML: {getattr(exc, 'problem', None) or exc}") from None
    if not isinstance(data, dict):
        raise _error(file, "", "expected a mapping with version and products")
    for k in data:
        if k not in ("version", "note", "products"):
            raise _error(file, str(k), "unknown key (expected one of: version, note, products)")
    if data.get("version") != 1:
        raise _error(file, "version", f"expected 1, got {data.get('version')!r}")
    note = data.get("note", "") or ""
    if not isinstance(note, str):
        raise _error(file, "note", f"expected a string, got {note!r}")
    items = data.get("products")
    if not isinstance(items, list) or not items:
        raise _error(file, "products", "expected a non-empty list of products")
    products, seen = [], set()
    for i, item in enumerate(items):
        p = _product(file, f"products[{i}]", item, variables)
        if p.name in seen:
            raise _error(file, f"products[{i}].name", f"product {p.name!r} is given twice")
        seen.add(p.name)
        products.append(p)
    return Specs(file, products, note)
