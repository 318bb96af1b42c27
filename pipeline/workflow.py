"""Workflow files: safe loading, validation and the resolved plan.

A workflow is YAML with ``version: 1`` (see README, "Workflow reference").
Everything is checked before anything runs; the problems are raised
together as one :class:`WorkflowError` (its ``errors`` list every one),
each naming the file, the key path and what was expected. A key given twice
in one mapping is a problem too (YAML would keep the last silently).
"""

from __future__ import annotations

import hashlib
import json
import os
import string
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import yaml

from .executors import START_METHODS
from .hpc import BATCH_SYSTEMS, check_jobqueue
from .inputs import FoundInputs, find_files
from .manager import DEFAULT_CHAIN, Host
from .params import FRAME_STAGES, STAGES, ParamError


#: Placeholders allowed in ``input.sample`` and ``input.fields`` templates.
TEMPLATE_FIELDS = ("parent", "grandparent", "stem", "name", "page")


class WorkflowError(ValueError):
    """A workflow file is invalid. ``str()`` is one line: file: key: reason.

    ``errors`` lists every problem found (this one first), each a
    WorkflowError of its own; the command line prints one line per problem.
    """

    def __init__(self, file: str, key: str, message: str):
        self.file, self.key, self.message = file, key, message
        where = f"{file}: {key}: " if key else f"{file}: "
        super().__init__(where + message)
        self.errors: list[WorkflowError] = [self]

    @classmethod
    def many(cls, errors: list["WorkflowError"]) -> "WorkflowError":
        """The first of ``errors``, carrying all of them in ``errors``."""
        first = errors[0]
        first.errors = list(errors)
        return first


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
        "frame_memory": (str, False, "auto"),
        "max_in_flight": (int, False, 0),
        "dashboard": (bool, False, False),
        "start_method": (str, False, "auto"),
        "jobqueue": (dict, False, None),
    },
}

_TYPE_WORDS = {int: "an integer", float: "a number", str: "a string", list: "a list", dict: "a mapping",
               bool: "true or false"}


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
    found : FoundInputs or None
        The input files, once found (``validate(..., check_files=True)``).
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
    found: FoundInputs | None = None

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


class _Loader(yaml.SafeLoader):
    """YAML's safe loader that also notes duplicate keys (YAML itself keeps the last silently)."""

    def __init__(self, stream):
        super().__init__(stream)
        self.duplicates: list[tuple[int, str]] = []

    def construct_mapping(self, node, deep=False):
        seen = set()
        for key_node, _ in node.value:
            try:
                key = self.construct_object(key_node, deep=True)
                hash(key)
            except Exception:  # an unhashable key: the base class reports it
                continue
            if key in seen:
                self.duplicates.append((key_node.start_mark.line + 1, str(key)))
            seen.add(key)
        return super().construct_mapping(node, deep=deep)


def load_yaml(path: str, duplicates: list | None = None) -> tuple[str, dict]:
    """Read a workflow file with the safe loader.

    Parameters
    ----------
    path : str
        Workflow file.
    duplicates : list, optional
        Receives a :class:`WorkflowError` for every key given twice in one
        mapping (then the file's own values are ambiguous); without it the
        first duplicate is raised.

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
    loader = _Loader(text)
    try:
        data = loader.get_single_data()
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f"line {mark.line + 1}" if mark is not None else "YAML"
        reason = getattr(exc, "problem", None) or str(exc).splitlines()[0]
        raise WorkflowError(path, where, f"not valid YAML: {reason}") from None
    finally:
        loader.dispose()
    dups = [WorkflowError(path, f"line {line}", f"key {key!r} is given twice in the same mapping")
            for line, key in loader.duplicates]
    if dups and duplicates is None:
        raise dups[0]
    if duplicates is not None:
        duplicates.extend(dups)
    if not isinstance(data, dict):
        raise WorkflowError(path, "", "expected a mapping of sections (version, input, output, ...)")
    return text, data


def _check_section(file: str, data: dict, schema: dict, prefix: str, errs: list) -> dict:
    """Defaults filled in; every problem appended to ``errs`` (a bad value is replaced by its default)."""
    out = {}
    for key in data:
        if not isinstance(key, str) or key not in schema:
            known = ", ".join(schema)
            errs.append(WorkflowError(file, f"{prefix}{key}", f"unknown key (expected one of: {known})"))
    for key, spec in schema.items():
        path = f"{prefix}{key}"
        if isinstance(spec, dict):
            value = data.get(key, {})
            if value is None:
                value = {}
            if not isinstance(value, dict):
                errs.append(WorkflowError(file, path, f"expected a mapping, got {type(value).__name__}"))
                value = {}
            out[key] = _check_section(file, value, spec, path + ".", errs)
            continue
        types, required, default = spec
        if key not in data or data[key] is None:
            if required:
                errs.append(WorkflowError(file, path, f"required key is missing (expected {_words(types)})"))
            out[key] = default
            continue
        value = data[key]
        if not _is(value, types):
            errs.append(WorkflowError(file, path, f"expected {_words(types)}, got {value!r}"))
            value = default
        out[key] = value
    return out


def _check_template(file: str, key: str, template: str, errs: list) -> None:
    try:
        names = [f for _, f, _, _ in string.Formatter().parse(template) if f is not None]
    except ValueError as exc:
        errs.append(WorkflowError(file, key, f"bad template {template!r}: {exc}"))
        return
    for n in names:
        if n not in TEMPLATE_FIELDS:
            errs.append(WorkflowError(file, key, f"unknown placeholder {{{n}}} (expected one of: "
                                      + ", ".join("{" + f + "}" for f in TEMPLATE_FIELDS) + ")"))


def _resolve_path(base: Path, p: str) -> str:
    """``p`` made absolute against the workflow's folder, ``..`` and ``.`` taken out (links are kept)."""
    p = os.path.expanduser(os.path.expandvars(p))
    return os.path.normpath(p if os.path.isabs(p) else str(base / p))


def plugin_specs(path: str) -> list[str]:
    """The workflow's extra ``plugins:`` (module names, or ``.py`` paths made absolute).

    Read before full validation, so that the steps those plugins provide
    are known when the ``steps:`` list is checked.

    Raises
    ------
    WorkflowError
        If the file or its ``plugins`` key is invalid.
    """
    _, data = load_yaml(path, duplicates=[])  # duplicate keys are reported by validate() with the rest
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


def validate(path: str, host: Host, overrides: dict | None = None, check_files: bool = False) -> Plan:
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
    check_files : bool
        Also check what the workflow names on disk, as ``run`` and ``check``
        do before anything is written (:func:`grainhabit.preflight.check_files`):
        inputs that match no file at all, a missing metadata CSV, outputs
        that cannot be written, an input root whose files have all vanished.
        The inputs found are kept in ``Plan.found`` for the run.

    Returns
    -------
    Plan

    Raises
    ------
    WorkflowError
        If anything is wrong: ``str()`` is the first problem; ``.errors``
        lists every problem found (one line each).
    """
    errs: list[WorkflowError] = []
    text, data = load_yaml(path, duplicates=errs)
    cfg = _check_section(path, data, SCHEMA, "", errs)
    if cfg["version"] is not None and cfg["version"] != 1:
        errs.append(WorkflowError(path, "version", f"expected 1, got {cfg['version']!r}"))
    base = Path(path).resolve().parent
    inp, out, ex = cfg["input"], cfg["output"], cfg["execution"]
    if isinstance(inp["paths"], str):
        inp["paths"] = [inp["paths"]]
    paths_ok = True
    for i, p in enumerate(inp["paths"]):
        if not isinstance(p, str):
            errs.append(WorkflowError(path, f"input.paths[{i}]", f"expected a string, got {p!r}"))
            paths_ok = False
    if not inp["paths"] and not inp["archive"]:
        errs.append(WorkflowError(path, "input", "give input.paths or input.archive"))
        paths_ok = False
    if inp["paths"] and inp["archive"]:
        errs.append(WorkflowError(path, "input", "give input.paths or input.archive, not both"))
        paths_ok = False
    inp["paths"] = [_resolve_path(base, p) for p in inp["paths"] if isinstance(p, str)]
    if inp["archive"]:
        inp["archive"] = _resolve_path(base, inp["archive"])
    if inp["metadata_csv"]:
        inp["metadata_csv"] = _resolve_path(base, inp["metadata_csv"])
    if inp["pixel_size_nm"] is not None and inp["pixel_size_nm"] <= 0:
        errs.append(WorkflowError(path, "input.pixel_size_nm",
                                  f"expected a number > 0 (nm), got {inp['pixel_size_nm']!r}"))
    if inp["calibration"] not in ("auto", "override"):
        errs.append(WorkflowError(path, "input.calibration",
                                  f"expected 'auto' or 'override', got {inp['calibration']!r}"))
    elif inp["calibration"] == "override" and inp["pixel_size_nm"] is None:
        errs.append(WorkflowError(path, "input.calibration", "'override' needs input.pixel_size_nm (the size to apply)"))
    if inp["max_pixels"] <= 0:
        errs.append(WorkflowError(path, "input.max_pixels", f"expected an integer > 0, got {inp['max_pixels']!r}"))
    if inp["on_missing"] not in ("keep", "drop"):
        errs.append(WorkflowError(path, "input.on_missing", f"expected 'keep' or 'drop', got {inp['on_missing']!r}"))
    _check_template(path, "input.sample", inp["sample"], errs)
    for k, v in inp["fields"].items():
        if not isinstance(v, str) or not str(k).isidentifier():
            errs.append(WorkflowError(path, f"input.fields.{k}", "expected name: template string"))
            continue
        _check_template(path, f"input.fields.{k}", v, errs)
    for key in ("results", "report", "log"):
        if out[key]:
            out[key] = _resolve_path(base, out[key])
    for i, p in enumerate(cfg["plugins"]):
        if not isinstance(p, str):
            errs.append(WorkflowError(path, f"plugins[{i}]", f"expected a module name or .py path, got {p!r}"))
    cfg["plugins"] = [_resolve_path(base, p) if p.endswith(".py") else p for p in cfg["plugins"]
                      if isinstance(p, str)]

    for section, values in (overrides or {}).items():
        for k, v in values.items():
            if v is not None:
                cfg[section][k] = v
    _check_execution(path, ex, errs)

    plan = Plan(path, text, hashlib.sha256(text.encode()).hexdigest(), cfg)
    if cfg["specs"]:
        # product specs: checked in full now, like the workflow itself (exit 2 on any problem)
        from grainhabit.plugins.survey.specs import load_specs

        cfg["specs"] = _resolve_path(base, cfg["specs"])
        try:
            plan.specs = load_specs(cfg["specs"])
        except WorkflowError as exc:
            errs.extend(exc.errors)
    _resolve_steps(plan, cfg["steps"], host, errs)
    if check_files and paths_ok and out["results"]:
        from .preflight import check_files as _check_files

        errs.extend(_check_files(plan))
    if errs:
        raise WorkflowError.many(errs)
    return plan


def _check_execution(path: str, ex: dict, errs: list) -> None:
    """The ``execution`` section's values (types were checked by the schema)."""
    w = ex["workers"]
    if not (w == "auto" or (isinstance(w, int) and not isinstance(w, bool) and w >= 1)):
        errs.append(WorkflowError(path, "execution.workers", f"expected 'auto' or an integer >= 1, got {w!r}"))
    try:
        frame_memory_bytes(ex.get("frame_memory", "auto"))
    except ValueError as exc:
        errs.append(WorkflowError(path, "execution.frame_memory", str(exc)))
    if ex.get("start_method", "auto") not in START_METHODS:
        errs.append(WorkflowError(path, "execution.start_method",
                                  f"expected one of {', '.join(START_METHODS)}, got {ex['start_method']!r}"))
    sch = ex["scheduler"]
    if not (sch in ("local", "serial") or sch in BATCH_SYSTEMS or sch.startswith("tcp://")
            or sch.startswith("tls://")):
        errs.append(WorkflowError(path, "execution.scheduler",
                                  f"expected 'local', 'serial', tcp://HOST:PORT or a batch system "
                                  f"({', '.join(BATCH_SYSTEMS)}), got {sch!r}"))
    if sch in BATCH_SYSTEMS:
        for key, reason in check_jobqueue(sch, ex["jobqueue"]):
            errs.append(WorkflowError(path, key, reason))
    elif ex["jobqueue"] is not None:
        errs.append(WorkflowError(path, "execution.jobqueue",
                                  f"only used with a batch-system scheduler ({', '.join(BATCH_SYSTEMS)})"))


def _resolve_steps(plan: Plan, steps: list, host: Host, errs: list) -> None:
    file = plan.file
    known = host.steps()
    problems = {p.name: p.message for p in host.problems}
    listed: list[StepPlan] = []
    for i, item in enumerate(steps):
        key = f"steps[{i}]"
        if not isinstance(item, dict):
            errs.append(WorkflowError(file, key, "expected a mapping with 'plugin' and optional 'params'"))
            continue
        for k in item:
            if k not in ("plugin", "params"):
                errs.append(WorkflowError(file, f"{key}.{k}", "unknown key (expected plugin, params)"))
        name = item.get("plugin")
        if not isinstance(name, str):
            errs.append(WorkflowError(file, f"{key}.plugin", f"expected a step name, got {name!r}"))
            continue
        if name not in known:
            hint = problems.get(name) or f"unknown plugin {name!r} (known: {', '.join(sorted(known))})"
            errs.append(WorkflowError(file, f"{key}.plugin", hint))
            continue
        params = item.get("params") or {}
        if not isinstance(params, dict):
            errs.append(WorkflowError(file, f"{key}.params", f"expected a mapping, got {params!r}"))
            continue
        info = known[name]
        try:
            resolved = info.resolve(params)
        except ParamError as exc:
            errs.append(WorkflowError(file, f"{key}.params.{exc.key}", str(exc)))
            continue
        listed.append(StepPlan(name, info.stage, info.version, resolved))
    # order check: stages must follow the fixed order
    order = [STAGES.index(s.stage) for s in listed]
    for i in range(1, len(order)):
        if order[i] < order[i - 1]:
            errs.append(WorkflowError(
                file, f"steps[{i}]",
                f"stage {listed[i].stage!r} must come before {listed[i - 1].stage!r} (order: {', '.join(STAGES)})",
            ))
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
    reader recognises is an input problem. Paths are resolved and a folder
    is never entered twice through a symbolic link (:mod:`grainhabit.inputs`).

    Returns
    -------
    files : list of str
        Existing files, resolved, without duplicates.
    unmatched : list of str
        Patterns that matched nothing.
    """
    inp = plan.config["input"]
    if inp["archive"]:
        return ([inp["archive"]], [] if os.path.exists(inp["archive"]) else [inp["archive"]])
    found = plan.found if plan.found is not None else find_files(inp["paths"])
    if folder_files is not None:
        folder_files.update(found.in_folders)
    return list(found.files), [inp["paths"][i] for i in found.unmatched]


def template_values(source_path: str, page: int) -> dict:
    """Values for the ``input.sample`` / ``input.fields`` placeholders.

    String operations only (no pathlib objects): a night lists every file of
    the archive, so this runs once per frame.
    """
    folder, name = os.path.split(source_path)
    upper, parent = os.path.split(folder)
    grandparent = os.path.basename(upper)
    for compound in (".ome.tiff", ".ome.tif"):  # OME-TIFF's two-part suffix
        if name.lower().endswith(compound):
            stem = name[: -len(compound)]
            break
    else:
        root, ext = os.path.splitext(name)
        stem = root if ext else name
    return {
        "parent": parent,
        "grandparent": grandparent,
        "stem": stem,
        "name": name,
        "page": page,
    }


def expand(template: str, source_path: str, page: int) -> str:
    """Fill a sample/field template for one frame."""
    return template.format(**template_values(source_path, page))


def frame_memory_bytes(value: str) -> int:
    """``execution.frame_memory`` in bytes: ``auto`` (0: the worker's memory limit) or a size like ``2GiB``.

    Raises
    ------
    ValueError
        For text that is no size, or a size under 64 MiB.
    """
    text = str(value).strip()
    if text.lower() == "auto":
        return 0
    from dask.utils import parse_bytes

    try:
        n = int(parse_bytes(text))
    except (ValueError, TypeError):
        raise ValueError(f"expected 'auto' or a size such as '2GiB', got {value!r}") from None
    if n < 64 * 2**20:
        raise ValueError(f"expected at least 64MiB, got {value!r}")
    return n
