"""Workflow files: safe loading, validation and the resolved plan.

A workflow is YAML with ``version: 1`` (see README, "Workflow reference").
Everything is checked before anything runs; the first problem is raised
as :class:`WorkflowError` naming the file, the key path and what was
expected.
"""

from __future__ import annotations

import glob
import hashlib
import json
import os
import string
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import yaml

from .manager import DEFAULT_CHAIN, Host
from .params import FRAME_STAGES, STAGES, ParamError


#: Placeholders allowed in ``input.sample`` and ``input.fields`` templates.
TEMPLATE_FIELDS = ("parent", "grandparent", "stem", "name", "page")


class WorkflowError(ValueError):
    """A workflow file is invalid. ``str()`` is one line: file: key: reason."""

    def __init__(self, file: str, key: str, message: str):
        self.file, self.key, self.message = file, key, message
        where = f"{file}: {key}: " if key else f"{file}: "
        super().__init__(where + message)


# Schema: key -> (type(s), required, default). Nested dicts are sections.
_ANY_NUMBER = (int, float)
SCHEMA: dict[str, Any] = {
    "version": (int, True, None),
    "name": (str, False, None),
    "note": (str, False, None),
    "specs": (str, False, None),
    "plugins": (list, False, []),
    "input": {
        "paths": ((list, str), False, []),
        "archive": (str, False, None),
        "pixel_size_nm": (_ANY_NUMBER, False, None),
        "calibration": (str, False, "auto"),
        "sample": (str, False, "{parent}"),
        "fields": (dict, False, {}),
        "metadata_csv": (str, False, None),
        "max_pixels": (int, False, 1_000_000_000),
        "on_missing": (str, False, "keep"),
    },
    "output": {
        "results": (str, True, None),
        "report": (str, False, None),
        "log": (str, False, None),
    },
    "steps": (list, False, []),
    "execution": {
        "scheduler": (str, False, "local"),
        "workers": ((str, int), False, "auto"),
        "threads_per_worker": (int, False, 1),
        "memory_limit": (str, False, "auto"),
        "max_in_flight": (int, False, 0),
    },
}

_TYPE_WORDS = {int: "an integer", float: "a number", str: "a string", list: "a list", dict: "a mapping"}


def _words(t) -> str:
    if isinstance(t, tuple):
        if t == _ANY_NUMBER:
            return "a number"
        return " or ".join(_TYPE_WORDS.get(x, x.__name__) for x in t)
    return _TYPE_WORDS.get(t, t.__name__)


def _is(value, t) -> bool:
    types = t if isinstance(t, tuple) else (t,)
    if isinstance(value, bool):
        return bool in types
    return isinstance(value, types)


@dataclass
class StepPlan:
    """One step of the resolved chain."""

    name: str
    stage: str
    version: str
    params: dict


@dataclass
class Plan:
    """A validated workflow with every default filled in.

    Attributes
    ----------
    file : str
        Workflow path as given.
    text : str
        The workflow file's text (stored in the results).
    hash : str
        SHA-256 of ``text``.
    config : dict
        Sections with defaults applied, paths resolved against the
        workflow file's folder.
    frame_steps, survey_steps : list of StepPlan
        The per-frame chain and the summarise/report steps.
    """

    file: str
    text: str
    hash: str
    config: dict
    frame_steps: list[StepPlan] = field(default_factory=list)
    survey_steps: list[StepPlan] = field(default_factory=list)
    #: The product spec file named by ``specs:`` (a validated
    #: :class:`grainhabit.plugins.survey.specs.Specs`), or None.
    specs: Any = None

    @property
    def name(self) -> str:
        return self.config.get("name") or Path(self.file).stem

    def processing_key(self, host: Host) -> str:
        """Hash of everything that changes a frame's result.

        The per-frame steps with their parameters and versions, the
        calibration fallback, the pixel limit, and the versions of the
        plugins that read frames. Output paths, names and survey steps are
        left out, so changing a report path does not redo any frame.
        """
        inp = self.config["input"]
        readers = sorted(
            f"{r.name}={r.version}" for r in host.records.values() if "grainhabit_read_frame" in host.hooks_of(host.pm.get_plugin(r.name))
        )
        blob = json.dumps(
            {
                "steps": [[s.name, s.version, s.params] for s in self.frame_steps],
                "pixel_size_nm": inp.get("pixel_size_nm"),
                "calibration": inp.get("calibration"),
                "max_pixels": inp.get("max_pixels"),
                "readers": readers,
                "plugins": self.config.get("plugins", []),
            },
            sort_keys=True,
            default=str,
        )
        return hashlib.sha256(blob.encode()).hexdigest()[:16]


def load_yaml(path: str) -> tuple[str, dict]:
    """Read a workflow file with the safe loader.

    Raises
    ------
    WorkflowError
        If the file is missing, is not YAML, or is not a mapping.
    """
    try:
        text = Path(path).read_text(encoding="utf-8")
    except FileNotFoundError:
        raise WorkflowError(path, "", "no such file") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise WorkflowError(path, "", f"cannot read: {exc}") from None
    try:
        data = yaml.safe_load(text)
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f"line {mark.line + 1}" if mark is not None else "YAML"
        reason = getattr(exc, "problem", None) or str(exc).splitlines()[0]
        raise WorkflowError(path, where, f"not valid YAML: {reason}") from None
    if not isinstance(data, dict):
        raise WorkflowError(path, "", "expected a mapping of sections (version, input, output, ...)")
    return text, data


def _check_section(file: str, data: dict, schema: dict, prefix: str) -> dict:
    out = {}
    for key in data:
        if not isinstance(key, str) or key not in schema:
            known = ", ".join(schema)
            raise WorkflowError(file, f"{prefix}{key}", f"unknown key (expected one of: {known})")
    for key, spec in schema.items():
        path = f"{prefix}{key}"
        if isinstance(spec, dict):
            value = data.get(key, {})
            if value is None:
                value = {}
            if not isinstance(value, dict):
                raise WorkflowError(file, path, f"expected a mapping, got {type(value).__name__}")
            out[key] = _check_section(file, value, spec, path + ".")
            continue
        types, required, default = spec
        if key not in data or data[key] is None:
            if required:
                raise WorkflowError(file, path, f"required key is missing (expected {_words(types)})")
            out[key] = default
            continue
        value = data[key]
        if not _is(value, types):
            raise WorkflowError(file, path, f"expected {_words(types)}, got {value!r}")
        out[key] = value
    return out


def _check_template(file: str, key: str, template: str) -> None:
    try:
        names = [f for _, f, _, _ in string.Formatter().parse(template) if f is not None]
    except ValueError as exc:
        raise WorkflowError(file, key, f"bad template {template!r}: {exc}") from None
    for n in names:
        if n not in TEMPLATE_FIELDS:
            raise WorkflowError(file, key, f"unknown placeholder {{{n}}} (expected one of: "
                                + ", ".join("{" + f + "}" for f in TEMPLATE_FIELDS) + ")")


def _resolve_path(base: Path, p: str) -> str:
    p = os.path.expanduser(os.path.expandvars(p))
    return p if os.path.isabs(p) else str((base / p))


def plugin_specs(path: str) -> list[str]:
    """The workflow's extra ``plugins:`` (module names, or ``.py`` paths made absolute).

    Read before full validation, so that the steps those plugins provide
    are known when the ``steps:`` list is checked.

    Raises
    ------
    WorkflowError
        If the file or its ``plugins`` key is invalid.
    """
    _, data = load_yaml(path)
    specs = data.get("plugins") or []
    if not isinstance(specs, list):
        raise WorkflowError(path, "plugins", f"expected a list, got {specs!r}")
    base = Path(path).resolve().parent
    out = []
    for i, p in enumerate(specs):
        if not isinstance(p, str):
            raise WorkflowError(path, f"plugins[{i}]", f"expected a module name or .py path, got {p!r}")
        out.append(_resolve_path(base, p) if p.endswith(".py") else p)
    return out


def validate(path: str, host: Host, overrides: dict | None = None) -> Plan:
    """Load and validate a workflow file against the schema and the plugins.

    Parameters
    ----------
    path : str
        Workflow file.
    host : Host
        Plugin manager whose steps the workflow may name.
    overrides : dict, optional
        ``{"execution": {"scheduler": ...}}`` and the like from the command
        line, applied after validation of the file.

    Returns
    -------
    Plan

    Raises
    ------
    WorkflowError
        On the first problem found.
    """
    text, data = load_yaml(path)
    cfg = _check_section(path, data, SCHEMA, "")
    if cfg["version"] != 1:
        raise WorkflowError(path, "version", f"expected 1, got {cfg['version']!r}")
    base = Path(path).resolve().parent
    inp, out, ex = cfg["input"], cfg["output"], cfg["execution"]
    if isinstance(inp["paths"], str):
        inp["paths"] = [inp["paths"]]
    for i, p in enumerate(inp["paths"]):
        if not isinstance(p, str):
            raise WorkflowError(path, f"input.paths[{i}]", f"expected a string, got {p!r}")
    if not inp["paths"] and not inp["archive"]:
        raise WorkflowError(path, "input", "give input.paths or input.archive")
    if inp["paths"] and inp["archive"]:
        raise WorkflowError(path, "input", "give input.paths or input.archive, not both")
    inp["paths"] = [_resolve_path(base, p) for p in inp["paths"]]
    if inp["archive"]:
        inp["archive"] = _resolve_path(base, inp["archive"])
    if inp["metadata_csv"]:
        inp["metadata_csv"] = _resolve_path(base, inp["metadata_csv"])
    if inp["pixel_size_nm"] is not None and inp["pixel_size_nm"] <= 0:
        raise WorkflowError(path, "input.pixel_size_nm", f"expected a number > 0 (nm), got {inp['pixel_size_nm']!r}")
    if inp["calibration"] not in ("auto", "override"):
        raise WorkflowError(path, "input.calibration", f"expected 'auto' or 'override', got {inp['calibration']!r}")
    if inp["calibration"] == "override" and inp["pixel_size_nm"] is None:
        raise WorkflowError(path, "input.calibration", "'override' needs input.pixel_size_nm (the size to apply)")
    if inp["max_pixels"] <= 0:
        raise WorkflowError(path, "input.max_pixels", f"expected an integer > 0, got {inp['max_pixels']!r}")
    if inp["on_missing"] not in ("keep", "drop"):
        raise WorkflowError(path, "input.on_missing", f"expected 'keep' or 'drop', got {inp['on_missing']!r}")
    _check_template(path, "input.sample", inp["sample"])
    for k, v in inp["fields"].items():
        if not isinstance(v, str) or not str(k).isidentifier():
            raise WorkflowError(path, f"input.fields.{k}", "expected name: template string")
        _check_template(path, f"input.fields.{k}", v)
    for key in ("results", "report", "log"):
        if out[key]:
            out[key] = _resolve_path(base, out[key])
    for i, p in enumerate(cfg["plugins"]):
        if not isinstance(p, str):
            raise WorkflowError(path, f"plugins[{i}]", f"expected a module name or .py path, got {p!r}")
    cfg["plugins"] = [_resolve_path(base, p) if p.endswith(".py") else p for p in cfg["plugins"]]

    for section, values in (overrides or {}).items():
        for k, v in values.items():
            if v is not None:
                cfg[section][k] = v
    w = ex["workers"]
    if not (w == "auto" or (isinstance(w, int) and not isinstance(w, bool) and w >= 1)):
        raise WorkflowError(path, "execution.workers", f"expected 'auto' or an integer >= 1, got {w!r}")
    sch = ex["scheduler"]
    if not (sch in ("local", "serial") or sch.startswith("tcp://") or sch.startswith("tls://")):
        raise WorkflowError(path, "execution.scheduler", f"expected 'local', 'serial' or tcp://HOST:PORT, got {sch!r}")

    plan = Plan(path, text, hashlib.sha256(text.encode()).hexdigest(), cfg)
    if cfg["specs"]:
        # product specs: checked in full now, like the workflow itself (exit 2 on any problem)
        from grainhabit.plugins.survey.specs import load_specs

        cfg["specs"] = _resolve_path(base, cfg["specs"])
        plan.specs = load_specs(cfg["specs"])
    _resolve_steps(plan, cfg["steps"], host)
    return plan


def _resolve_steps(plan: Plan, steps: list, host: Host) -> None:
    file = plan.file
    known = host.steps()
    problems = {p.name: p.message for p in host.problems}
    listed: list[StepPlan] = []
    for i, item in enumerate(steps):
        key = f"steps[{i}]"
        if not isinstance(item, dict):
            raise WorkflowError(file, key, "expected a mapping with 'plugin' and optional 'params'")
        for k in item:
            if k not in ("plugin", "params"):
                raise WorkflowError(file, f"{key}.{k}", "unknown key (expected plugin, params)")
        name = item.get("plugin")
        if not isinstance(name, str):
            raise WorkflowError(file, f"{key}.plugin", f"expected a step name, got {name!r}")
        if name not in known:
            hint = problems.get(name)
            if hint:
                raise WorkflowError(file, f"{key}.plugin", hint)
            raise WorkflowError(file, f"{key}.plugin", f"unknown plugin {name!r} (known: {', '.join(sorted(known))})")
        params = item.get("params") or {}
        if not isinstance(params, dict):
            raise WorkflowError(file, f"{key}.params", f"expected a mapping, got {params!r}")
        info = known[name]
        try:
            resolved = info.resolve(params)
        except ParamError as exc:
            raise WorkflowError(file, f"{key}.params.{exc.key}", str(exc)) from None
        listed.append(StepPlan(name, info.stage, info.version, resolved))
    # order check: stages must follow the fixed order
    order = [STAGES.index(s.stage) for s in listed]
    for i in range(1, len(order)):
        if order[i] < order[i - 1]:
            raise WorkflowError(
                file, f"steps[{i}]",
                f"stage {listed[i].stage!r} must come before {listed[i - 1].stage!r} (order: {', '.join(STAGES)})",
            )
    named_stages = {s.stage for s in listed}
    chain: list[StepPlan] = []
    for stage in STAGES:
        if stage in named_stages:
            chain.extend(s for s in listed if s.stage == stage)
        elif stage in DEFAULT_CHAIN and DEFAULT_CHAIN[stage] in known:
            info = known[DEFAULT_CHAIN[stage]]
            chain.append(StepPlan(info.name, stage, info.version, info.resolve({})))
    plan.frame_steps = [s for s in chain if s.stage in FRAME_STAGES]
    plan.survey_steps = [s for s in chain if s.stage not in FRAME_STAGES]


def find_inputs(plan: Plan, folder_files: set | None = None) -> tuple[list[str], list[str]]:
    """Expand ``input.paths`` (globs, folders) or take ``input.archive``.

    Every file found is offered to the readers, which decide what they can
    open; the host keeps no list of image suffixes. Files inside a folder
    input (hidden files left out) are added to ``folder_files`` if given, so
    that the caller can pass over the ones no reader recognises (a README
    beside the frames), while a file named or globbed on its own that no
    reader recognises is an input problem.

    Returns
    -------
    files : list of str
        Existing files, sorted, without duplicates.
    unmatched : list of str
        Patterns that matched nothing.
    """
    inp = plan.config["input"]
    if inp["archive"]:
        return ([inp["archive"]], [] if os.path.exists(inp["archive"]) else [inp["archive"]])
    files, unmatched, seen = [], [], set()
    for pattern in inp["paths"]:
        hits = sorted(glob.glob(pattern, recursive=True)) if glob.has_magic(pattern) else (
            [pattern] if os.path.exists(pattern) else [])
        found = []
        for hit in hits:
            if os.path.isdir(hit):
                for root, _, names in os.walk(hit):
                    inside = [os.path.join(root, n) for n in sorted(names) if not n.startswith(".")]
                    found.extend(inside)
                    if folder_files is not None:
                        folder_files.update(inside)
            else:
                found.append(hit)
        if not found:
            unmatched.append(pattern)
        for f in sorted(found):
            if f not in seen:
                seen.add(f)
                files.append(f)
    return files, unmatched


def template_values(source_path: str, page: int) -> dict:
    """Values for the ``input.sample`` / ``input.fields`` placeholders."""
    p = Path(source_path)
    name = p.name
    stem = name
    for compound in (".ome.tiff", ".ome.tif"):  # OME-TIFF's two-part suffix
        if stem.lower().endswith(compound):
            stem = stem[: -len(compound)]
            break
    else:
        stem = p.stem
    return {
        "parent": p.parent.name,
        "grandparent": p.parent.parent.name,
        "stem": stem,
        "name": name,
        "page": page,
    }


def expand(template: str, source_path: str, page: int) -> str:
    """Fill a sample/field template for one frame."""
    return template.format(**template_values(source_path, page))
