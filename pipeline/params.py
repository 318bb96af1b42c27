"""Declaring what a step plugin is and which parameters it takes.

A step plugin is a module (or object) that implements one stage hook and
carries a module-level ``STEP = StepInfo(...)``. Workflow validation,
``grainhabit check``, ``grainhabit plugins`` and the generated docs all read
this one declaration.

Examples
--------
>>> from grainhabit.params import Param, StepInfo
>>> STEP = StepInfo(
...     name="segment-grains", stage="segment", version="1.0",
...     summary="Otsu threshold and distance-transform watershed.",
...     params=(Param("min_ecd_nm", float, 40.0, unit="nm", low=0.0,
...                   doc="Grains with a smaller ECD are dropped."),))
>>> STEP.resolve({"min_ecd_nm": 55})
{'min_ecd_nm': 55.0}
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

#: Order in which the per-frame stages run. Several steps may share a stage;
#: they run in the order the workflow lists them.
FRAME_STAGES = ("preprocess", "segment", "measure", "classify", "fit_growth", "thickness")
#: Stages that run once over the consolidated results, after every frame.
SURVEY_STAGES = ("summarise", "report")
STAGES = FRAME_STAGES + SURVEY_STAGES

_TYPE_NAMES = {bool: "boolean", int: "integer", float: "number", str: "string", list: "list"}


class ParamError(ValueError):
    """A step parameter has the wrong type, range or name.

    ``key`` is the parameter name, ``expected`` says what would be accepted.
    """

    def __init__(self, key: str, message: str):
        super().__init__(message)
        self.key = key


@dataclass(frozen=True)
class Param:
    """One parameter of a step.

    Parameters
    ----------
    name : str
        Key used in the workflow's ``params:`` mapping.
    type : type
        One of ``bool``, ``int``, ``float``, ``str``, ``list``. An ``int`` is
        accepted where a ``float`` is declared.
    default : Any
        Value used when the workflow leaves the key out. ``None`` means "not
        set" (the step decides, e.g. automatic).
    unit : str
        Physical unit of the value (``"nm"``, ``"nm^2"``, ``"deg"``, ``""``).
    low, high : float, optional
        Inclusive bounds for numbers.
    choices : tuple, optional
        Allowed values for strings.
    doc : str
        One sentence: what the parameter changes.
    """

    name: str
    type: type
    default: Any = None
    unit: str = ""
    low: float | None = None
    high: float | None = None
    choices: tuple | None = None
    doc: str = ""

    def expected(self) -> str:
        """Human-readable description of an accepted value."""
        text = _TYPE_NAMES.get(self.type, self.type.__name__)
        if self.choices:
            text = "one of " + ", ".join(repr(c) for c in self.choices)
        if self.low is not None and self.high is not None:
            text += f" in [{self.low}, {self.high}]"
        elif self.low is not None:
            text += f" >= {self.low}"
        elif self.high is not None:
            text += f" <= {self.high}"
        if self.unit:
            text += f" ({self.unit})"
        return text

    def coerce(self, value: Any) -> Any:
        """Return ``value`` checked and converted to the declared type.

        Raises
        ------
        ParamError
            If the value has the wrong type or lies outside the bounds.
        """
        if value is None:
            return None
        t = self.type
        ok = False
        if t is bool:
            ok = isinstance(value, bool)
        elif t is int:
            ok = isinstance(value, int) and not isinstance(value, bool)
        elif t is float:
            ok = isinstance(value, (int, float)) and not isinstance(value, bool)
            if ok:
                value = float(value)
        elif t is str:
            ok = isinstance(value, str)
        elif t is list:
            ok = isinstance(value, list)
        else:
            ok = isinstance(value, t)
        if not ok:
            raise ParamError(self.name, f"expected {self.expected()}, got {value!r}")
        if self.choices is not None and value not in self.choices:
            raise ParamError(self.name, f"expected {self.expected()}, got {value!r}")
        if t in (int, float):
            if (self.low is not None and value < self.low) or (
                self.high is not None and value > self.high
            ):
                raise ParamError(self.name, f"expected {self.expected()}, got {value!r}")
        return value

    def as_dict(self) -> dict:
        """Plain description for ``grainhabit plugins --json``."""
        return {
            "name": self.name,
            "type": _TYPE_NAMES.get(self.type, self.type.__name__),
            "default": self.default,
            "unit": self.unit,
            "low": self.low,
            "high": self.high,
            "choices": list(self.choices) if self.choices else None,
            "doc": self.doc,
        }


@dataclass(frozen=True)
class Column:
    """A per-grain output column: name, unit and long name.

    ``units`` follows the results convention: ``"nm"``, ``"nm^2"``,
    ``"deg"``, ``"1"`` for dimensionless numbers, ``""`` for text and flags.
    """

    name: str
    units: str
    long_name: str


@dataclass(frozen=True)
class StepInfo:
    """What a step plugin is: its name, stage, version and parameters.

    Parameters
    ----------
    name : str
        Name used as ``plugin:`` in a workflow's ``steps:`` list.
    stage : str
        One of :data:`STAGES`; the plugin must implement the matching hook
        ``grainhabit_<stage>``.
    version : str
        Version of the step's algorithm. Part of the key of staged frame
        results, so bump it when the output changes.
    summary : str
        One line for listings.
    params : tuple of Param
        Declared parameters.
    outputs : tuple of Column
        Per-grain columns the step adds beyond those the results layout
        already defines, with their units and long names.
    """

    name: str
    stage: str
    version: str = "1.0"
    summary: str = ""
    params: tuple[Param, ...] = field(default_factory=tuple)
    outputs: tuple["Column", ...] = field(default_factory=tuple)

    def __post_init__(self):
        if self.stage not in STAGES:
            raise ValueError(f"step {self.name!r}: unknown stage {self.stage!r}; expected one of {STAGES}")

    def defaults(self) -> dict:
        """Mapping of every parameter to its default."""
        return {p.name: p.default for p in self.params}

    def resolve(self, given: dict | None) -> dict:
        """Return the final parameters: defaults overlaid with ``given``.

        Raises
        ------
        ParamError
            For an unknown key, or a value of the wrong type or range.
        """
        given = dict(given or {})
        known = {p.name: p for p in self.params}
        for key in given:
            if key not in known:
                names = ", ".join(sorted(known)) or "none"
                raise ParamError(key, f"unknown parameter (known: {names})")
        out = {}
        for p in self.params:
            out[p.name] = p.coerce(given[p.name]) if p.name in given else p.default
        return out
