"""Command ``grainhabit new-plugin``: start a third-party plugin package.

``grainhabit new-plugin NAME [--dir DIR] [--stage STAGE]`` writes the folder
``DIR/grainhabit-NAME`` holding a small installable package:

- ``pyproject.toml`` with the entry point ``NAME`` in the group ``grainhabit``;
- ``grainhabit_NAME/__init__.py``: ``GRAINHABIT_API``, a ``STEP`` declaration
  with parameters and one working hook implementation for the stage (or the
  two reader hooks for ``--stage reader``);
- ``test_grainhabit_NAME.py``: its test, which passes as generated;
- ``README.md`` and ``.gitignore``.

After ``pip install -e DIR/grainhabit-NAME`` the step shows up in
``grainhabit plugins`` at once. The templates live in
``templates/`` beside this module, which only fills them in.
"""

from __future__ import annotations

import os
import re
import shutil
import string
import sys
import tempfile
from importlib import resources
from pathlib import Path

from grainhabit import hookimpl
from grainhabit.hookspecs import API_VERSION
from grainhabit.params import STAGES

GRAINHABIT_API = 1
#: The name this plugin is registered under.
NAME = "new-plugin"

#: Kinds of plugin the command can start: every stage, plus a frame reader.
KINDS = STAGES + ("reader",)
DEFAULT_KIND = "segment"

_NAME_RE = re.compile(r"^[a-z][a-z0-9]*(-[a-z0-9]+)*$")
_MAX_NAME = 40

#: Per kind: what it is, the package summary, how to use it in a workflow.
_KIND_TEXT = {
    "preprocess": ("preprocess step", "Gaussian smoothing and percentile scaling of each frame.",
                   "steps:\n  - plugin: {name}\n    params: {{smooth_nm: 10, polarity: bright}}"),
    "segment": ("segment step", "Grains by Otsu threshold and connected regions.",
                "steps:\n  - plugin: {name}\n    params: {{min_ecd_nm: 40}}"),
    "measure": ("measure step", "Rim sharpness of each grain (mean gradient on its boundary).",
                "steps:\n  - plugin: measure-grains      # the built-in morphology first\n"
                "  - plugin: {name}"),
    "classify": ("classify step", "Elongated grains called rod by their Feret ratio.",
                 "steps:\n  - plugin: classify-habit      # the built-in habits first\n"
                 "  - plugin: {name}\n    params: {{max_feret_ratio: 0.4}}"),
    "fit_growth": ("fit_growth step", "Bounds of the growth-rate parameter alpha from the habit alone.",
                   "steps:\n  - plugin: {name}\n    params: {{cube_max_alpha: 1.5}}"),
    "thickness": ("thickness step", "Thickness measured elsewhere given to tabular grains, with aspect ratio.",
                  "steps:\n  - plugin: {name}\n    params: {{thickness_nm: 120}}"),
    "summarise": ("summarise step", "Frames and mean grains per frame of each sample.",
                  "steps:\n  - plugin: summarise-samples   # the built-in summary first\n"
                  "  - plugin: {name}"),
    "report": ("report step (exporter)", "Grain table exported as CSV for another system.",
               "output:\n  report: /data/results/report     # report steps run only with output.report\n"
               "steps:\n  - plugin: write-report        # keep the built-in report too\n"
               "  - plugin: {name}"),
    "reader": ("frame reader", "Frames stored as 2-D NumPy .npy files with a JSON sidecar calibration.",
               "input:\n  paths: [\"/data/incoming/**/*.npy\"]"),
}


def _check_name(name: str, taken: set[str] = frozenset()) -> str:
    """Return ``name`` if it can name a step and a package; raise ValueError otherwise."""
    if not isinstance(name, str) or not _NAME_RE.match(name) or len(name) > _MAX_NAME:
        raise ValueError(f"bad NAME {name!r}: use at most {_MAX_NAME} lower-case letters, digits and single "
                         "hyphens, starting with a letter (e.g. li-threshold)")
    if name.startswith("grainhabit"):
        raise ValueError(f"bad NAME {name!r}: leave out the prefix 'grainhabit' (it is added to the package name)")
    if name in taken:
        raise ValueError(f"bad NAME {name!r}: a registered plugin already has this name")
    return name


def _template(rel: str) -> str:
    return resources.files(__package__).joinpath("templates", *rel.split("/")).read_text(encoding="utf-8")


def package_names(name: str) -> dict[str, str]:
    """Distribution, module and folder names derived from a step name.

    Parameters
    ----------
    name : str
        Step name, e.g. ``"li-threshold"``.

    Returns
    -------
    dict
        ``dist`` (``grainhabit-li-threshold``), ``module``
        (``grainhabit_li_threshold``), ``folder`` (same as ``dist``).
    """
    _check_name(name)
    dist = f"grainhabit-{name}"
    return {"dist": dist, "module": dist.replace("-", "_"), "folder": dist}


def render_package(name: str, kind: str = DEFAULT_KIND) -> dict[str, str]:
    """The files of a new plugin package, as relative path -> text.

    Parameters
    ----------
    name : str
        Step name (lower-case letters, digits, single hyphens).
    kind : str
        One of :data:`KINDS`.

    Returns
    -------
    dict of str -> str
        Relative paths (``/``-separated) to file contents.

    Raises
    ------
    ValueError
        If the name or kind is not valid.
    """
    _check_name(name)
    if kind not in KINDS:
        raise ValueError(f"bad stage {kind!r}: expected one of {', '.join(KINDS)}")
    names = package_names(name)
    what, summary, usage = _KIND_TEXT[kind]
    module = names["module"]
    values = {
        "name": name, "dist": names["dist"], "module": module, "stage": kind, "kind": what,
        "summary": summary, "api": str(API_VERSION), "column": "rim_gradient_per_nm",
        "group": "summary_" + name.replace("-", "_"),
        "step_comment": "" if kind == "reader" else " and its STEP",
        "usage": ("## Use it in a workflow\n\n```yaml\n" + usage.format(name=name) + "\n```"),
    }

    def fill(rel: str) -> str:
        return string.Template(_template(rel)).substitute(values)

    return {
        "pyproject.toml": fill("pyproject.toml.tmpl"),
        "README.md": fill("README.md.tmpl"),
        ".gitignore": fill("gitignore.tmpl"),
        f"{module}/__init__.py": fill(f"stages/{kind}.py.tmpl"),
        f"test_{module}.py": fill(f"stages/test_{kind}.py.tmpl"),
    }


def write_package(name: str, directory: str | os.PathLike = ".", kind: str = DEFAULT_KIND,
                  taken: set[str] = frozenset()) -> Path:
    """Write a new plugin package into ``directory/grainhabit-NAME``.

    The files are written into a temporary folder next to the target and
    moved into place in one rename, so an interrupted call leaves nothing
    half-written.

    Parameters
    ----------
    name : str
        Step name.
    directory : path-like
        Existing or new parent folder.
    kind : str
        One of :data:`KINDS`.
    taken : set of str
        Names already registered (refused).

    Returns
    -------
    pathlib.Path
        The new package folder.

    Raises
    ------
    ValueError
        For a bad name or kind.
    FileExistsError
        If the package folder exists already (it is never overwritten).
    """
    _check_name(name, taken)
    files = render_package(name, kind)
    parent = Path(directory).expanduser().resolve()
    target = parent / package_names(name)["folder"]
    if target.exists():
        raise FileExistsError(f"{target} exists already; nothing was written (choose another NAME or --dir)")
    parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=".new-plugin-", dir=parent))
    try:
        for rel, text in files.items():
            path = tmp.joinpath(*rel.split("/"))
            path.parent.mkdir(parents=True, exist_ok=True)
            path.write_text(text, encoding="utf-8")
        os.rename(tmp, target)  # fails if target appeared meanwhile: never overwrites
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return target


def _cmd_new_plugin(args) -> int:
    host = getattr(args, "host", None)
    taken = set(host.records) | set(host.steps()) if host is not None else set()
    try:
        target = write_package(args.name, args.dir, args.stage, taken)
    except (ValueError, FileExistsError, OSError) as exc:
        print(f"grainhabit new-plugin: {exc}", file=sys.stderr)
        return 2
    module = package_names(args.name)["module"]
    what = _KIND_TEXT[args.stage][0]
    print(f"created {target} ({what} {args.name!r})")
    print("next:")
    print(f"  pip install -e {target}")
    print(f"  grainhabit plugins          # lists {args.name}")
    print(f"  pytest {target / ('test_' + module + '.py')}")
    print(f"then edit {target / module / '__init__.py'}")
    return 0


@hookimpl
def grainhabit_add_commands(subparsers):
    """Add ``grainhabit new-plugin``."""
    p = subparsers.add_parser(
        "new-plugin", help="start a plugin package of your own (step, reader or exporter)",
        description="Write DIR/grainhabit-NAME: an installable plugin package with an entry point, one "
                    "working hook implementation with its STEP declaration and parameters, its test and "
                    "a README. An existing folder is never overwritten.")
    p.add_argument("name", metavar="NAME", help="step name: lower-case letters, digits, single hyphens "
                   "(e.g. li-threshold)")
    p.add_argument("--dir", default=".", help="parent folder of the new package (default: current folder)")
    p.add_argument("--stage", default=DEFAULT_KIND, choices=KINDS, metavar="STAGE",
                   help=f"what the plugin does: one of {', '.join(KINDS)} (default {DEFAULT_KIND})")
    p.set_defaults(handler=_cmd_new_plugin)
