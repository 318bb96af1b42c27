"""What ``check`` and ``run`` refuse on disk before anything is written.

:func:`check_files` looks at what a schema-valid workflow names on disk:

- inputs: ``input.paths`` that match no file at all, or an ``input.archive``
  that is not there;
- an input root that found files in earlier runs and finds none of them now
  (a share that is not mounted): the store is left as it is, whatever
  ``input.on_missing`` says;
- ``input.metadata_csv`` that is missing, unreadable or has no ``file`` column;
- outputs (``output.results``, ``output.report``, ``output.log``) that
  cannot be written: a parent that is a file, or no write permission in the
  folder that would hold them (the results store also needs its own
  folder's parent, where the lock, the staging folder and the listing
  index live).

Every problem becomes one :class:`grainhabit.workflow.WorkflowError` naming
the key; ``grainhabit check`` and ``grainhabit run`` print them all and exit
2 (nothing written).
"""

from __future__ import annotations

import csv
import os
from pathlib import Path

from .inputs import find_files
from .listing import ListingIndex, index_path, vanished_roots


def _error(plan, key: str, message: str):
    from .workflow import WorkflowError

    return WorkflowError(plan.file, key, message)


def unwritable(path: str, kind: str = "file") -> str | None:
    """Why ``path`` cannot be created or written, or None if it can.

    Parameters
    ----------
    path : str
        A file or folder to be written (it may not exist yet).
    kind : str
        ``"file"`` or ``"folder"`` (what ``path`` must be if it exists).
    """
    p = Path(path)
    if p.exists():
        if kind == "folder" and not p.is_dir():
            return f"{p} exists and is not a folder"
        if kind == "file" and p.is_dir():
            return f"{p} is a folder"
        if not os.access(p, os.W_OK):
            return f"no permission to write {p}"
        return None
    parent = p.parent
    while not parent.exists():
        if parent.parent == parent:
            break
        parent = parent.parent
    if not parent.is_dir():
        return f"{parent} is a file, not a folder"
    if not os.access(parent, os.W_OK | os.X_OK):
        return f"no permission to create {p} (in {parent})"
    return _probe(parent, p)


def _probe(folder: Path, target: Path) -> str | None:
    """Create and remove an empty folder in ``folder``: why that fails, or None.

    ``os.access`` answers from the permission bits alone: it says yes to root
    everywhere and to folders of pseudo file systems (``/proc``, ``/sys``)
    where nothing can be created. The probe leaves nothing behind.
    """
    import tempfile

    try:
        os.rmdir(tempfile.mkdtemp(prefix=".grainhabit-probe-", dir=folder))
    except OSError as exc:
        return f"cannot create {target} (in {folder}): {exc.strerror or exc}"
    return None


def _check_csv(path: str) -> str | None:
    try:
        with open(path, newline="", encoding="utf-8") as fh:
            header = next(csv.reader(fh), None)
    except FileNotFoundError:
        return f"no such file: {path}"
    except (OSError, UnicodeDecodeError) as exc:
        return f"cannot read {path}: {exc.__class__.__name__}: {exc}"
    if not header or "file" not in header:
        return f"{path}: needs a 'file' column (a frame's file name or path)"
    return None


def check_files(plan) -> list:
    """Problems on disk of a schema-valid plan (see the module docstring); sets ``plan.found``.

    Parameters
    ----------
    plan : grainhabit.workflow.Plan

    Returns
    -------
    list of WorkflowError
        Empty if the run may go ahead.
    """
    errs = []
    inp, out = plan.config["input"], plan.config["output"]
    if inp["archive"]:
        if not os.path.exists(inp["archive"]):
            errs.append(_error(plan, "input.archive", f"no such archive: {inp['archive']}"))
    elif inp["paths"]:
        found = find_files(inp["paths"])
        plan.found = found
        if not found.files:
            shown = ", ".join(inp["paths"])
            errs.append(_error(plan, "input.paths", f"no file matches ({shown})"))
        index = ListingIndex(index_path(out["results"]), key="")
        for i, before in vanished_roots(index, inp["paths"], found.per_root):
            errs.append(_error(plan, f"input.paths[{i}]",
                               f"none of the {before} files found here by earlier runs is found now "
                               f"({inp['paths'][i]}; is the share mounted?); the results store is left untouched"))
    if inp["metadata_csv"]:
        why = _check_csv(inp["metadata_csv"])
        if why:
            errs.append(_error(plan, "input.metadata_csv", why))
    results = out["results"]
    why = unwritable(results, "folder") or unwritable(str(Path(results).parent / ".grainhabit-probe"), "file")
    if why:
        errs.append(_error(plan, "output.results", f"cannot be written: {why}"))
    if out["report"]:
        why = unwritable(out["report"], "folder")
        if why:
            errs.append(_error(plan, "output.report", f"cannot be written: {why}"))
    log_file = out["log"] or (results.rstrip("/") + ".log")
    why = unwritable(log_file, "file")
    if why and not (not out["log"] and errs and errs[-1].key == "output.results"):
        errs.append(_error(plan, "output.log", f"cannot be written: {why}"))
    return errs
