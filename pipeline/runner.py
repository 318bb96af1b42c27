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

import contextlib
import csv
import importlib.metadata
import json
import logging
import os
import platform
import signal
import socket
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from . import __version__
from . import chain_tiles
from .early import EarlyFrames, early_frame_count
from .executors import WorkerDied, make_executor
from .frame import FrameRef
from .lock import RunLock, describe
from .logs import Progress
from .manager import Host
from .observe import RunObserver
from .inputs import find_files
from .listing import ListingIndex, index_path, listing_key, vanished_roots
from .night import StoreSnapshot, build_night, commit_night, merge_summaries, plan_night, touched_part
from .results import recover, warm_up
from .staging import clean_temporaries, frame_key, is_staged, staged_arrays, staged_view, staging_dir, write_staged
from .task import FrameJob, prepare_worker, process_frame
from .workflow import Plan, expand, find_inputs, frame_memory_bytes, template_values

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
    #: One line per sample with its product and verdict (printed to stdout at the end of ``run``).
    verdict_lines: list = field(default_factory=list)

    def line(self) -> str:
        rate = self.frames_processed / self.seconds * 60 if self.seconds > 0 else 0.0
        return (f"done: {self.frames_ok} frames ok, {self.frames_failed} failed, "
                f"{self.frames_flagged} ok but flagged by QC, {self.grains} grains, "
                f"{self.frames_processed} processed + {self.frames_reused} reused, {self.seconds:.1f} s wall, "
                f"{rate:.1f} frames/min")


def versions(host: Host) -> dict:
    """Versions of grainhabit, its plugins and the main libraries.

    Library versions come from the installed distributions' metadata, so
    no library is imported for this (a run that reads no TIFF never loads
    tifffile).
    """
    libs = {}
    for dist in _LIBRARIES:
        try:
            libs[dist] = importlib.metadata.version(dist)
        except importlib.metadata.PackageNotFoundError:
            continue
    return {"grainhabit": __version__, "python": platform.python_version(), **libs,
            "plugins": {name: rec.version for name, rec in sorted(host.records.items())}}


#: Libraries whose versions a results store records.
_LIBRARIES = ("numpy", "scipy", "scikit-image", "dask", "distributed", "xarray", "zarr", "tifffile", "imagecodecs",
              "rosettasciio", "mrcfile", "pluggy")


def _read_sidecar(path: str | None) -> dict[str, dict]:
    """Sidecar CSV of frame metadata: a ``file`` column (name or path) plus fields."""
    if not path:
        return {}
    with open(path, newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    if rows and "file" not in rows[0]:
        raise ValueError(f"{path}: the metadata CSV needs a 'file' column")
    return {r["file"]: {k: v for k, v in r.items() if k != "file"} for r in rows}


def reader_versions(host: Host) -> list[str]:
    """``name=version`` of every plugin that reads frames (part of the listing and processing keys)."""
    return sorted(f"{r.name}={r.version}" for r in host.records.values()
                  if "grainhabit_read_frame" in host.hooks_of(host.pm.get_plugin(r.name)))


def list_frames(plan: Plan, host: Host, processing_key: str,
                index: ListingIndex | None = None) -> tuple[list[ListedFrame], list[tuple[str, str]]]:
    """List the frames of the workflow's inputs.

    Parameters
    ----------
    plan, host, processing_key
        The validated workflow, its plugins and :meth:`Plan.processing_key`.
    index : ListingIndex, optional
        Remembered listings: a file whose size, mtime and inode are those
        remembered is not opened again; every file listed is recorded in it.

    Returns
    -------
    frames : list of ListedFrame
        In listing order (resolved paths sorted per input pattern, then pages).
    problems : list of (path, reason)
        Inputs that could not be listed (patterns that matched nothing,
        unreadable files); they become failed frames.
    """
    inp = plan.config["input"]
    in_folders: set = set()
    files, unmatched = find_inputs(plan, in_folders)
    roots = plan.found.root_of if plan.found is not None else {}
    problems = [(p, "no file matches this input pattern") for p in unmatched]
    sidecar = _read_sidecar(inp.get("metadata_csv"))
    frames = []
    for path in files:
        root = inp["paths"][roots[path]] if path in roots else ""
        st = None
        refs = None
        if index is not None:
            try:
                st = os.stat(path)
            except OSError:
                st = None
            refs = index.lookup(path, st) if st is not None else None
        if refs is None:
            try:
                refs = host.first_answer("grainhabit_list_frames", path=path, options=inp)
            except Exception as exc:
                problems.append((path, f"{exc.__class__.__name__}: {exc}"))
                if index is not None:
                    index.remember(path, None, None, root)
                continue
            if index is not None:
                index.misses += 1
                index.remember(path, st, refs, root)
        elif index is not None:
            index.remember(path, st, refs, root)
        if refs is None:
            if path in in_folders:
                log.debug("input %s: no reader recognises this file; passed over", path)
            else:
                problems.append((path, "no reader plugin recognises this file"))
            continue
        for ref in refs:
            src_path = ref.source.split("#")[0] if "#" in ref.source else ref.source
            values = template_values(src_path, ref.page)
            sample = inp["sample"].format(**values)
            fields = {k: t.format(**values) for k, t in inp["fields"].items()}
            extra = (sidecar.get(values["name"]) or sidecar.get(src_path) or {}) if sidecar else {}
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
    with RunLock(results) as lock, _Closer() as closer:
        if lock.took_over:
            log.warning("took over a stale lock (%s)", describe(lock.took_over))
        if recover(results):
            log.warning("%s: restored the previous results after an interrupted consolidation", results)
        stage = staging_dir(results)
        if clean_temporaries(stage):
            log.info("removed half-written staged files left by an interrupted run")
        pkey = plan.processing_key(host)
        inp = plan.config["input"]
        index = None
        if not inp["archive"]:
            index = ListingIndex(index_path(results), listing_key(reader_versions(host), inp))
            if plan.found is None:
                plan.found = find_files(inp["paths"])
            vanished = vanished_roots(index, inp["paths"], plan.found.per_root)
            if vanished:
                for i, before in vanished:
                    log.error("input.paths[%d] (%s): none of the %d files found there by earlier runs is found "
                              "now (is the share mounted?); the results store is left untouched", i,
                              inp["paths"][i], before)
                outcome.exit_code = 2
                outcome.failures = [(inp["paths"][i], "input root vanished") for i, _ in vanished]
                outcome.seconds = time.monotonic() - t_start
                return outcome
        with obs.phase("list"):
            frames, problems = list_frames(plan, host, pkey, index)
        if index is not None and (index.hits or index.misses):
            log.info("%d input files unchanged since the last run (not opened), %d listed by the readers",
                     index.hits, index.misses)
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
        kept: dict[str, dict] = {}  # staged results of tonight's frames, as read_staged would give them
        processed: set = set()
        steps = tuple((s.name, s.stage, s.params) for s in plan.frame_steps)
        job = FrameJob(steps=steps, input_options=dict(plan.config["input"]), plugins=tuple(plan.config["plugins"]),
                       frame_memory=frame_memory_bytes(plan.config["execution"].get("frame_memory", "auto")))
        warm = None
        snapshot = StoreSnapshot(results)  # the stored groups the consolidation reads (read ahead below)
        if todo:
            upload = [p for p in plan.config["plugins"] if p.endswith(".py")]
            executor = obs.executor(make_executor(plan.config["execution"], upload=upload))
            progress = Progress(len(todo), log, tty=tty)
            by_key = {}
            items = []
            for f in todo:
                by_key.setdefault(f.key, f)
            for key, f in by_key.items():
                items.append((key, (f.ref, f.sample, job)))
            early = None
            try:
                # the first frames in a forked process while the cluster starts (a core is idle meanwhile)
                n_early = early_frame_count(executor, len(items))
                tiled = any(chain_tiles.tile_budget(args[0], job.frame_memory) for _, args in items[:n_early])
                if n_early and not tiled:
                    early = EarlyFrames(items[:n_early])
                    log.info("first %d frame(s) processing in process %d while the cluster starts", n_early, early.pid)
                executor.start()
                log.info("processing %d frames on %s", len(todo), executor.description)
                for line in executor.advice:
                    log.warning("%s", line)
                ready = executor.prepare(prepare_worker, job)
                for res in ready:
                    for err in res.get("errors", ()):
                        log.warning("preparing worker %s: %s", res.get("pid"), err)
                took = [r["seconds"] for r in ready if not r.get("errors")]
                log.info("%d of %d workers ready (imports and plugin tables: %.1f s at most)", len(took),
                         len(ready), max(took, default=0.0))
                progress.t0 = time.monotonic()
                # once fewer frames are left than the workers can run at once, a core is idle until the last
                # frame ends: the main process warms up for the consolidation there (never in-process frames)
                slots = max(1, int(getattr(executor, "n_workers", 1) or 1) * int(getattr(executor, "threads", 1) or 1))
                warm_after = None if getattr(executor, "in_process", True) else max(0, len(items) - slots + 1)
                if warm_after == 0:
                    warm = _Background(_warm_for_consolidation, host, snapshot)
                for done, (key, res) in enumerate(_with_early(executor, items, early), start=1):
                    if done == warm_after:
                        warm = _Background(_warm_for_consolidation, host, snapshot)
                    f = by_key[key]
                    processed.add(key)
                    if isinstance(res, Exception):
                        reason = str(res) if isinstance(res, WorkerDied) else f"task: {res.__class__.__name__}: {res}"
                        transient[key] = _failed_result(f.ref.source, f.sample, reason)
                        log.error("frame %s failed: %s", f.ref.source, reason)
                        progress.update(False, 0)
                        continue
                    rec = res["record"]
                    with obs.phase("stage_write"):
                        arrays = staged_arrays(res)
                        write_staged(stage, key, res, arrays)
                        kept[key] = staged_view(arrays)  # as read back from the file: consolidated from memory
                    outcome.frames_processed += 1
                    if rec["status"] != "ok":
                        log.error("frame %s failed: %s", f.ref.source, rec["error"])
                        if res.get("traceback"):
                            log.debug("traceback of %s:\n%s", f.ref.source, res["traceback"])
                    progress.update(rec["status"] == "ok", rec.get("grain_count", 0))
            finally:
                if early is not None:
                    early.stop()
                progress.close()
                closer.close(executor)  # beside consolidation; the run waits for it before it returns

        with obs.phase("consolidate"):
            if warm is not None:
                warm.join()  # the stored groups read ahead there (and the warm-up), if not done yet
            night = plan_night(results, frames, problems, {**kept, **transient}, stage, processed,
                               plan.config["input"]["on_missing"], _failed_result, fresh=fresh,
                               sample_of=lambda path: _problem_sample(plan, path), snapshot=snapshot)
            built = build_night(results, night, extra_columns=_declared_columns(host, plan))
        grains, frames_ds = built["grains"], built["frames"]
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
        part = touched_part(results, night, built)  # append nights: only the samples that got frames
        part_summary: dict = {}
        for step in [s for s in plan.survey_steps if s.stage == "summarise"]:
            try:
                with obs.phase("summarise"):
                    out = None
                    if part is not None:
                        got = host.call_step(step.name, grains=part.grains, frames=part.frames,
                                             summary=part_summary, params=step.params)
                        out = merge_summaries(results, got, part.samples) if isinstance(got, dict) else None
                        if out is None:
                            part = None
                            log.info("summaries computed over all samples (step %s gives groups that cannot be "
                                     "merged per sample)", step.name)
                        else:
                            part_summary.update(got)
                    if out is None:
                        out = host.call_step(step.name, grains=grains, frames=frames_ds, summary=summary,
                                             params=step.params)
                if not isinstance(out, dict) or "summary" not in out:
                    raise TypeError(f"returned {type(out).__name__}; expected a dict with a 'summary' dataset")
                summary.update(out)
            except Exception as exc:
                survey_errors.append(f"{step.name}: {exc.__class__.__name__}: {exc}")
                log.error("summarise step %s", survey_errors[-1])
                log.debug("traceback of %s", step.name, exc_info=True)
        if plan.specs is not None and "summary" in summary:
            try:
                summary.update(_judge(plan, {"summary": summary["summary"], "grains": grains, "frames": frames_ds}))
            except Exception as exc:
                survey_errors.append(f"verdicts: {exc.__class__.__name__}: {exc}")
                log.error("%s", survey_errors[-1])
                log.debug("traceback of the verdicts", exc_info=True)
        outcome.verdict_lines = _verdict_lines(summary)
        outcome.failures.extend(("(survey)", e) for e in survey_errors)
        if part is not None:
            log.info("summaries recomputed for the %d samples that got frames tonight (%s); the others kept",
                     len(part.samples), ", ".join(part.samples[:5]) + (", ..." if len(part.samples) > 5 else ""))

        previous_runs = _previous_runs(snapshot)
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
                 "spec_file": plan.config.get("specs") or "", "spec_text": _spec_text(plan),
                 "conventions": "origin at the top-left corner of the top-left pixel; x along columns, y along rows; nm"}
        with obs.phase("results_write"), interrupts_deferred():
            how = commit_night(results, night, built, summary, attrs, extra_columns=_declared_columns(host, plan),
                               cleanup=closer.cleanup)
            if index is not None:
                index.save()
        c = night.counts
        log.info("results %s %s (%d frames added, %d replaced, %d removed, %d unchanged)", how, results,
                 c.get("added", 0), c.get("replaced", 0), c.get("removed", 0), c.get("unchanged", 0))

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


def _with_early(executor, items: list, early: EarlyFrames | None):
    """``executor.map_unordered(process_frame, items)``, the first items' results taken from ``early`` instead.

    The early frames' results are given as they come, between the cluster's
    results; those whose process died without answering go to the cluster
    after the others.
    """
    if early is None:
        yield from executor.map_unordered(process_frame, items)
        return
    for key, res in executor.map_unordered(process_frame, items[len(early.items):]):
        yield key, res
        yield from early.results(wait=False)
    yield from early.results(wait=True)
    lost = early.lost()
    if lost:
        yield from executor.map_unordered(process_frame, lost)


def _warm_for_consolidation(host: Host, snapshot: StoreSnapshot | None = None) -> None:
    """What the main process first does after the last frame, done early on throwaway data.

    Runs in a :class:`_Background` thread once fewer frames are left than
    the workers can run at once, so that it takes a core the last frames
    leave idle (the main process only waits for their results meanwhile):
    reading the stored groups the consolidation compares the night with
    (:meth:`grainhabit.night.StoreSnapshot.read_ahead`), the imports and
    first calls of xarray and zarr (:func:`grainhabit.results.warm_up`),
    the distributions' metadata read for the store's ``versions``
    attribute, and the verdict module that prints the closing lines.
    Nothing it does changes what the run writes.
    """
    if snapshot is not None:
        snapshot.read_ahead()
    warm_up()
    versions(host)
    importlib.import_module("grainhabit.plugins.survey.verdicts")


class _Background:
    """Runs ``func(*args)`` in a daemon thread; :meth:`join` waits for it, and logs (never raises) its error."""

    def __init__(self, func, *args):
        self._error = None

        def target():
            try:
                func(*args)
            except BaseException as exc:  # a warm-up that fails costs only the time it saves
                self._error = exc

        self._thread = threading.Thread(target=target, name=f"grainhabit-{func.__name__}", daemon=True)
        self._thread.start()

    def join(self) -> None:
        self._thread.join()
        if self._error is not None:
            log.debug("background %s: %s: %s", self._thread.name, self._error.__class__.__name__, self._error)


class _Closer:
    """Closes the executor in a thread of its own, and waits for that when the ``with`` block ends.

    A local cluster takes about half a second to close (its worker processes
    exit, the nannies wait for them); the main process meanwhile consolidates
    the frames, summarises and writes the results store, so on a machine with
    a free core the close costs the run no time. Leaving the ``with`` block,
    normally or by an exception (Ctrl-C), always waits for the close, so the
    run never returns with workers still alive. It waits as well for the
    threads in :attr:`cleanup` (where a replaced results store is removed by
    a thread, not a detached process: :func:`grainhabit.results.discard`),
    before the store's lock is released.
    """

    def __init__(self):
        self._thread = None
        self.cleanup: list[threading.Thread] = []

    def __enter__(self):
        return self

    def close(self, executor) -> None:
        self._thread = threading.Thread(target=executor.close, name="grainhabit-close-executor", daemon=True)
        self._thread.start()

    def __exit__(self, *exc):
        if self._thread is not None:
            self._thread.join()
        for thread in self.cleanup:
            thread.join()
        return False


def _judge(plan: Plan, groups: dict) -> dict:
    """``verdicts`` and ``trends`` groups from the workflow's product specs (built-in survey plugin)."""
    from grainhabit.plugins.survey.verdicts import judge

    params = next((s.params for s in plan.survey_steps if s.stage == "summarise"), {})
    return judge(plan.specs, groups, params)


def _verdict_lines(groups: dict) -> list[str]:
    if "summary" not in groups:
        return []
    from grainhabit.plugins.survey.verdicts import verdict_lines

    return verdict_lines(groups["summary"], groups.get("verdicts"))


def _problem_sample(plan: Plan, path: str) -> str:
    """Sample of an input that could not be listed: the one its path names; none for an unmatched pattern."""
    return expand(plan.config["input"]["sample"], path, 0) if os.path.isfile(path) else ""


def _spec_text(plan: Plan) -> str:
    try:
        return Path(plan.config["specs"]).read_text(encoding="utf-8") if plan.config.get("specs") else ""
    except OSError:
        return ""


@contextlib.contextmanager
def interrupts_deferred():
    """Hold Ctrl-C and SIGTERM back while the results store is written; raise KeyboardInterrupt after it.

    Writing the store takes a second or so; an interruption in the middle
    would leave zarr's I/O tasks half done (the store itself stays
    consistent, see :mod:`grainhabit.append`), so it waits for the commit.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    caught = []
    previous = {sig: signal.signal(sig, lambda signum, frame: caught.append(signum))
                for sig in (signal.SIGINT, signal.SIGTERM)}
    try:
        yield
    finally:
        for sig, handler in previous.items():
            signal.signal(sig, handler)
    if caught:
        raise KeyboardInterrupt


def _previous_runs(snapshot: StoreSnapshot) -> list:
    runs = snapshot.root_attrs().get("runs", [])
    return runs if isinstance(runs, list) else []


def _declared_columns(host: Host, plan: Plan):
    cols = []
    steps = host.steps()
    for s in plan.frame_steps:
        cols.extend(steps[s.name].outputs)
    return cols
