"""Running a validated workflow: list, process, stage, consolidate, report.

The order of work for ``grainhabit run``:

1. take the output's lock (another live run: exit 3);
2. list every frame of every input (readers' ``grainhabit_list_frames``);
3. skip frames whose result is already staged for this processing key;
4. start the executor and prepare every worker once (plugin imports and
   tables, ``grainhabit_prepare_worker``), then run the rest as one task
   per frame, staging each result atomically as it arrives;
5. consolidate all frames, in listing order, into the results store
   (atomic swap), run the summarise steps, append a run record;
6. write the report if the workflow asks for one.
"""

from __future__ import annotations

import csv
import json
import logging
import os
import platform
import socket
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import xarray as xr

from . import __version__
from .consolidate import build_datasets
from .executors import WorkerDied, make_executor
from .frame import FrameRef
from .lock import RunLock, describe
from .logs import Progress
from .manager import Host
from .observe import RunObserver
from .results import recover, root_attrs, write_results
from .staging import clean_temporaries, frame_key, is_staged, read_staged, staging_dir, write_staged
from .task import FrameJob, prepare_worker, process_frame
from .workflow import Plan, expand, find_inputs

log = logging.getLogger("grainhabit")


@dataclass
class ListedFrame:
    """A frame of this run's inputs, with what the host derived for it."""

    ref: FrameRef
    sample: str
    fields: dict
    key: str


@dataclass
class RunOutcome:
    """What a run did (also the final summary line)."""

    exit_code: int
    frames_ok: int = 0
    frames_failed: int = 0
    frames_flagged: int = 0
    frames_reused: int = 0
    frames_processed: int = 0
    grains: int = 0
    seconds: float = 0.0
    failures: list = field(default_factory=list)
    results: str = ""
    report: str = ""

    def line(self) -> str:
        rate = self.frames_processed / self.seconds * 60 if self.seconds > 0 else 0.0
        return (f"done: {self.frames_ok} frames ok, {self.frames_failed} failed, "
                f"{self.frames_flagged} ok but flagged by QC, {self.grains} grains, "
                f"{self.frames_processed} processed + {self.frames_reused} reused, {self.seconds:.1f} s wall, "
                f"{rate:.1f} frames/min")


def versions(host: Host) -> dict:
    """Versions of grainhabit, its plugins and the main libraries."""
    import dask
    import scipy
    import skimage
    import tifffile
    import xarray
    import zarr

    return {
        "grainhabit": __version__,
        "python": platform.python_version(),
        "numpy": np.__version__, "scipy": scipy.__version__, "scikit-image": skimage.__version__,
        "dask": dask.__version__, "xarray": xarray.__version__, "zarr": zarr.__version__,
        "tifffile": tifffile.__version__,
        "plugins": {name: rec.version for name, rec in sorted(host.records.items())},
    }


def _read_sidecar(path: str | None) -> dict[str, dict]:
    """Sidecar CSV of frame metadata: a ``file`` column (name or path) plus fields."""
    if not path:
        return {}
    with open(path, newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    if rows and "file" not in rows[0]:
        raise ValueError(f"{path}: the metadata CSV needs a 'file' column")
    return {r["file"]: {k: v for k, v in r.items() if k != "file"} for r in rows}


def list_frames(plan: Plan, host: Host, processing_key: str) -> tuple[list[ListedFrame], list[tuple[str, str]]]:
    """List the frames of the workflow's inputs.

    Returns
    -------
    frames : list of ListedFrame
        In listing order (sorted paths, then pages).
    problems : list of (path, reason)
        Inputs that could not be listed (patterns that matched nothing,
        unreadable files); they become failed frames.
    """
    inp = plan.config["input"]
    in_folders: set = set()
    files, unmatched = find_inputs(plan, in_folders)
    problems = [(p, "no file matches this input pattern") for p in unmatched]
    sidecar = _read_sidecar(inp.get("metadata_csv"))
    frames = []
    for path in files:
        try:
            refs = host.first_answer("grainhabit_list_frames", path=path, options=inp)
        except Exception as exc:
            problems.append((path, f"{exc.__class__.__name__}: {exc}"))
            continue
        if refs is None:
            if path in in_folders:
                log.debug("input %s: no reader recognises this file; passed over", path)
            else:
                problems.append((path, "no reader plugin recognises this file"))
            continue
        for ref in refs:
            src_path = ref.source.split("#")[0] if "#" in ref.source else ref.source
            sample = expand(inp["sample"], src_path, ref.page)
            fields = {k: expand(t, src_path, ref.page) for k, t in inp["fields"].items()}
            extra = sidecar.get(Path(src_path).name) or sidecar.get(src_path) or {}
            fields.update(extra)
            key = frame_key(ref.content_hash, ref.source, sample, processing_key)
            frames.append(ListedFrame(ref, sample, fields, key))
    return frames, problems


def _failed_result(source: str, sample: str, reason: str) -> dict:
    return {"record": {"source": source, "sample": sample, "status": "failed", "error": reason,
                       "grain_count": 0, "pixel_size_nm": float("nan")},
            "columns": {}, "outline_xy": np.zeros((0, 2)), "outline_offsets": np.zeros(1, np.int64),
            "thumb": np.zeros((0, 0), np.uint8), "thumb_factor": 1.0}


def run(plan: Plan, host: Host, fresh: bool = False, tty: bool | None = None,
        observer: RunObserver | None = None) -> RunOutcome:
    """Run a validated workflow. See the module docstring for the order.

    ``observer`` (a :class:`grainhabit.observe.RunObserver`) is told the
    run's phases; benchmarks time them through it.

    Raises
    ------
    grainhabit.lock.LockHeld
        If another live run holds the output's lock (nothing is written).
    KeyboardInterrupt
        On Ctrl-C or SIGTERM; what was staged is kept for the next run.
    """
    obs = observer or RunObserver()
    t_start = time.monotonic()
    started = time.strftime("%Y-%m-%dT%H:%M:%S%z")
    results = plan.config["output"]["results"]
    outcome = RunOutcome(exit_code=0, results=results)
    with RunLock(results) as lock:
        if lock.took_over:
            log.warning("took over a stale lock (%s)", describe(lock.took_over))
        if recover(results):
            log.warning("%s: restored the previous results after an interrupted consolidation", results)
        stage = staging_dir(results)
        if clean_temporaries(stage):
            log.info("removed half-written staged files left by an interrupted run")
        pkey = plan.processing_key(host)
        with obs.phase("list"):
            frames, problems = list_frames(plan, host, pkey)
        log.info("workflow %s: %d frames listed from %s", plan.name, len(frames),
                 plan.config["input"]["archive"] or ", ".join(plan.config["input"]["paths"]))
        for path, reason in problems:
            log.error("input %s: %s", path, reason)

        todo = [f for f in frames if fresh or not is_staged(stage, f.key)]
        outcome.frames_reused = len(frames) - len(todo)
        if outcome.frames_reused:
            log.info("%d frames already staged for this workflow: reused (use --fresh to redo)",
                     outcome.frames_reused)
        transient: dict[str, dict] = {}
        steps = tuple((s.name, s.stage, s.params) for s in plan.frame_steps)
        job = FrameJob(steps=steps, input_options=dict(plan.config["input"]), plugins=tuple(plan.config["plugins"]))
        if todo:
            upload = [p for p in plan.config["plugins"] if p.endswith(".py")]
            executor = obs.executor(make_executor(plan.config["execution"], upload=upload))
            executor.start()
            log.info("processing %d frames on %s", len(todo), executor.description)
            for line in executor.advice:
                log.warning("%s", line)
            ready = executor.prepare(prepare_worker, job)
            for res in ready:
                for err in res.get("errors", ()):
                    log.warning("preparing worker %s: %s", res.get("pid"), err)
            took = [r["seconds"] for r in ready if not r.get("errors")]
            log.info("%d of %d workers ready (imports and plugin tables: %.1f s at most)", len(took), len(ready),
                     max(took, default=0.0))
            progress = Progress(len(todo), log, tty=tty)
            by_key = {}
            try:
                items = []
                for f in todo:
                    by_key.setdefault(f.key, f)
                for key, f in by_key.items():
                    items.append((key, (f.ref, f.sample, job)))
                for key, res in executor.map_unordered(process_frame, items):
                    f = by_key[key]
                    if isinstance(res, Exception):
                        reason = str(res) if isinstance(res, WorkerDied) else f"task: {res.__class__.__name__}: {res}"
                        transient[key] = _failed_result(f.ref.source, f.sample, reason)
                        log.error("frame %s failed: %s", f.ref.source, reason)
                        progress.update(False, 0)
                        continue
                    rec = res["record"]
                    with obs.phase("stage_write"):
                        write_staged(stage, key, res)
                    outcome.frames_processed += 1
                    if rec["status"] != "ok":
                        log.error("frame %s failed: %s", f.ref.source, rec["error"])
                        if res.get("traceback"):
                            log.debug("traceback of %s:\n%s", f.ref.source, res["traceback"])
                    progress.update(rec["status"] == "ok", rec.get("grain_count", 0))
            finally:
                progress.close()
                executor.close()

        with obs.phase("consolidate"):
            groups = _consolidate(frames, problems, transient, results, stage, plan, host)
        grains, frames_ds = groups["grains"], groups["frames"]
        ok_frames = [i for i, s in enumerate(frames_ds["status"].values) if str(s) == "ok"]
        outcome.frames_ok = len(ok_frames)
        if "qc" in frames_ds:
            outcome.frames_flagged = sum(1 for i in ok_frames if str(frames_ds["qc"].values[i]))
        outcome.frames_failed = int(frames_ds.sizes.get("frame", 0)) - outcome.frames_ok
        outcome.grains = int(grains.sizes.get("grain", 0))
        outcome.failures = [(str(s), str(e)) for s, e, st in zip(frames_ds["source"].values,
                                                                  frames_ds["error"].values,
                                                                  frames_ds["status"].values) if str(st) != "ok"]
        summary: dict = {}
        survey_errors: list[str] = []
        for step in [s for s in plan.survey_steps if s.stage == "summarise"]:
            try:
                with obs.phase("summarise"):
                    out = host.call_step(step.name, grains=grains, frames=frames_ds, summary=summary,
                                         params=step.params)
                if not isinstance(out, dict) or "summary" not in out:
                    raise TypeError(f"returned {type(out).__name__}; expected a dict with a 'summary' dataset")
                summary.update(out)
            except Exception as exc:
                survey_errors.append(f"{step.name}: {exc.__class__.__name__}: {exc}")
                log.error("summarise step %s", survey_errors[-1])
                log.debug("traceback of %s", step.name, exc_info=True)
        groups.update(summary)
        outcome.failures.extend(("(survey)", e) for e in survey_errors)

        previous_runs = _previous_runs(results)
        outcome.seconds = time.monotonic() - t_start
        outcome.exit_code = 1 if (outcome.frames_failed or survey_errors) else 0
        record = {"started": started, "finished": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
                  "host": socket.gethostname(), "pid": os.getpid(), "workflow": plan.file,
                  "workflow_hash": plan.hash, "frames_ok": outcome.frames_ok, "frames_failed": outcome.frames_failed,
                  "frames_processed": outcome.frames_processed, "frames_reused": outcome.frames_reused,
                  "grains": outcome.grains, "seconds": round(outcome.seconds, 3), "exit_code": outcome.exit_code,
                  "grainhabit": __version__}
        attrs = {"title": f"grainhabit results of workflow {plan.name}", "workflow": plan.text,
                 "workflow_hash": plan.hash, "workflow_file": plan.file, "processing_key": pkey,
                 "versions": json.dumps(versions(host)), "runs": json.dumps(previous_runs + [record]),
                 "data_note": plan.config.get("note") or "",
                 "conventions": "origin at the top-left corner of the top-left pixel; x along columns, y along rows; nm"}
        with obs.phase("results_write"):
            write_results(results, groups, attrs)
        log.info("results written to %s", results)

        report_dir = plan.config["output"]["report"]
        if report_dir:
            for step in [s for s in plan.survey_steps if s.stage == "report"]:
                try:
                    with obs.phase("report"):
                        files = host.call_step(step.name, results=results, out_dir=report_dir, params=step.params)
                except Exception as exc:
                    msg = f"{step.name}: {exc.__class__.__name__}: {exc}"
                    log.error("report step %s", msg)
                    log.debug("traceback of %s", step.name, exc_info=True)
                    outcome.failures.append(("(report)", msg))
                    outcome.exit_code = 1
                    continue
                if files:
                    outcome.report = str(files[0])
            if outcome.report:
                log.info("report written to %s", outcome.report)
    outcome.seconds = time.monotonic() - t_start
    return outcome


def _consolidate(frames, problems, transient, results, stage, plan, host) -> dict:
    """Datasets of the input problems, every listed frame in order, then kept frames of missing files."""
    entries = []
    for path, reason in problems:
        entries.append(({"source": path, "sample": "", "content_hash": "", "stage_key": ""},
                        _failed_result(path, "", reason)))
    listed_sources = set()
    for f in frames:
        listed_sources.add(f.ref.source)
        staged = transient.get(f.key)
        if staged is None:
            staged = read_staged(stage / f"{f.key}.npz")
        info = {"source": f.ref.source, "sample": f.sample, "content_hash": f.ref.content_hash,
                "stage_key": f.key, **f.fields}
        entries.append((info, staged))
    entries.extend(_missing_frames(results, listed_sources, stage, plan.config["input"]["on_missing"]))
    return build_datasets(entries, extra_columns=_declared_columns(host, plan))


def _previous_runs(results: str) -> list:
    try:
        runs = root_attrs(results).get("runs", [])
        return runs if isinstance(runs, list) else []
    except Exception:
        return []


#: Text variables of the frames group that come from the frame's own record, not from the listing.
_RECORD_TEXT = ("status", "error", "calibration", "notes", "polarity", "qc")


def _missing_frames(results: str, listed: set, stage: Path, on_missing: str) -> list:
    """Frames of the previous results whose files are no longer found."""
    if not os.path.exists(results):
        return []
    try:
        prev = xr.open_zarr(results, group="frames").load()
    except Exception:
        return []
    out = []
    gone = [i for i, s in enumerate(prev["source"].values) if str(s) not in listed
            and "stage_key" in prev and str(prev["stage_key"].values[i])]
    if not gone:
        return []
    if on_missing == "drop":
        log.warning("%d frames of earlier runs are no longer found in the inputs: dropped (input.on_missing=drop)",
                    len(gone))
        return []
    kept = 0
    for i in gone:
        key = str(prev["stage_key"].values[i])
        p = stage / f"{key}.npz"
        if not p.exists():
            continue
        # the listing's view of the frame: identity plus the workflow's per-frame text fields
        info = {k: str(prev[k].values[i]) for k in prev.data_vars
                if prev[k].dtype.kind in ("U", "O", "T") and k not in _RECORD_TEXT}
        out.append((info, read_staged(p)))
        kept += 1
    log.warning("%d frames of earlier runs are no longer found in the inputs: kept (input.on_missing=keep)", kept)
    return out


def _declared_columns(host: Host, plan: Plan):
    cols = []
    steps = host.steps()
    for s in plan.frame_steps:
        cols.extend(steps[s.name].outputs)
    return cols
