"""Benchmark ``grainhabit bench nightly``: a night costs what its new frames cost, not the archive.

For archives of ``--sizes`` frames (default 100, 1000 and 10000 tiny
fields in 3 samples) it measures one night that adds ``--new`` (2) frames
of a new batch (a new sample folder, as a facility's nightly batches
arrive; ``--same-samples`` adds them to the stored samples, whose summaries
are then recomputed over all their grains), and prints
that night's wall time against the same night in the ``--base`` archive
(100 frames): the ratio. Target: a 1,500-frame archive's night takes at most
1.5x (goal 1.1x) the 100-frame archive's; the bench prints the ratio of
every size and the target line for the sizes of 1,000 and more.

It also counts, with a Python audit hook on ``open``, the archive files the
night opened: a night must open its new files only (the old ones are
recognised by size, mtime and inode from the listing index) and read only
its new frames' staged results.

Setting up an archive of 10,000 processed frames by processing each would
take most of an hour on two cores, so each archive is seeded: ``--distinct``
(8) small fields (invented data, rendered by
:func:`grainhabit.plugins.bench.harness.render_frames`) are processed for real
once, every archive file is one of them with two corner pixels set to the
file's number (so every file has its own content hash), and its staged result
is a copy of the result of the field it was made from. The first night then
consolidates the whole archive from staging, as a night after a crash would;
every measured night after it is real: its new frames are rendered,
listed, processed with the default chain and added to the store.

Rounds are interleaved (each round runs one night in every archive), as the
development machine's speed drifts between minutes; the best night of each
archive over ``--repeat`` rounds is compared.
"""

from __future__ import annotations

import argparse
import logging
import os
import shutil
import sys
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np

from grainhabit import hookimpl
from grainhabit.plugins.bench import harness as bu

GRAINHABIT_API = 1

TARGET_RATIO = 1.5
GOAL_RATIO = 1.1

#: Samples of the archive: frame i lives in folder ``batch-(i % 3)``.
SAMPLES = 3


class _OpenCounter:
    """Counts ``open`` audit events under a folder while ``active`` (audit hooks cannot be removed)."""

    def __init__(self):
        self.prefix = None
        self.paths: list[str] = []
        sys.addaudithook(self._hook)

    def _hook(self, event, args):
        if event == "open" and self.prefix and args and isinstance(args[0], (str, os.PathLike)):
            path = os.fspath(args[0])
            if path.startswith(self.prefix):
                self.paths.append(path)

    def start(self, folder: Path) -> None:
        self.paths = []
        self.prefix = str(folder)

    def stop(self) -> list[str]:
        self.prefix = None
        return self.paths


def _tagged(image: np.ndarray, number: int) -> np.ndarray:
    """The field with two corner pixels set from ``number`` (a distinct file, the same grains)."""
    out = image.copy()
    out[0, 0] = number % 65536
    out[0, 1] = number // 65536
    return out


def _file(root: Path, i: int, batch: str | None = None) -> Path:
    return root / "data" / (batch or f"batch-{i % SAMPLES}") / f"field{i:06d}.tif"


def _write(root: Path, images, i: int, batch: str | None = None) -> Path:
    from grainhabit.plugins.synthetic.demo import write_frame

    path = _file(root, i, batch)
    write_frame(path, _tagged(images[i % len(images)], i), bu.PIXEL_SIZE_NM, "resolution")
    return path


def _quiet():
    log = logging.getLogger("grainhabit")
    for h in list(log.handlers):
        log.removeHandler(h)
    log.addHandler(logging.NullHandler())
    log.propagate = False
    log.setLevel(logging.WARNING)


def _seed(root: Path, n: int, images, templates: dict, host, scheduler: str) -> dict:
    """Write an archive of ``n`` files, stage each with its field's result, and run the first night."""
    from grainhabit.listing import ListingIndex, index_path, listing_key
    from grainhabit.runner import list_frames, reader_versions, run
    from grainhabit.staging import staging_dir
    from grainhabit.workflow import validate

    for i in range(n):
        _write(root, images, i)
    wf = bu.write_workflow(root / "night.yaml", root / "data", root / "out" / "r.zarr", scheduler=scheduler,
                           workers="auto", name=f"bench-nightly-{n}")
    plan = validate(str(wf), host, check_files=True)
    inp = plan.config["input"]
    index = ListingIndex(index_path(plan.config["output"]["results"]), listing_key(reader_versions(host), inp))
    frames, _ = list_frames(plan, host, plan.processing_key(host), index)
    stage = staging_dir(plan.config["output"]["results"])
    stage.mkdir(parents=True, exist_ok=True)
    for f in frames:
        number = int(Path(f.ref.path).stem[len("field"):])
        shutil.copyfile(templates[number % len(images)], stage / f"{f.key}.npz")
    t0 = time.perf_counter()
    outcome = run(plan, host, tty=False)
    return {"workflow": wf, "first_night_s": time.perf_counter() - t0, "exit": outcome.exit_code}


def _templates(work: Path, images, host, scheduler: str) -> dict:
    """Process the distinct fields once; return field number -> its staged result file."""
    from grainhabit.runner import run
    from grainhabit.staging import staging_dir
    from grainhabit.workflow import validate

    root = work / "templates"
    for i in range(len(images)):
        _write(root, images, i)
    wf = bu.write_workflow(root / "t.yaml", root / "data", root / "out" / "r.zarr", scheduler=scheduler,
                           workers="auto", name="bench-nightly-templates")
    plan = validate(str(wf), host, check_files=True)
    out = run(plan, host, tty=False)
    if out.exit_code != 0:
        raise RuntimeError(f"processing the {len(images)} fields failed: {out.failures[:2]}")
    import xarray as xr

    frames = xr.open_zarr(plan.config["output"]["results"], group="frames").load()
    stage = staging_dir(plan.config["output"]["results"])
    return {int(Path(str(s)).stem[len("field"):]): stage / f"{k}.npz"
            for s, k in zip(frames["source"].values, frames["stage_key"].values)}


def _night(root: Path, wf: Path, host, images, first: int, new: int, counter: _OpenCounter,
           new_batch: bool = True) -> dict:
    """Add ``new`` frames to an archive (as a new batch, or into the stored ones) and time the run."""
    from grainhabit.runner import run
    from grainhabit.workflow import validate

    batch = f"night-{first:06d}" if new_batch else None
    added = [_write(root, images, first + j, batch) for j in range(new)]
    t0 = time.perf_counter()
    counter.start(root)
    plan = validate(str(wf), host, check_files=True)
    clock = bu.RunClock()
    outcome = run(plan, host, tty=False, observer=clock)
    opened = counter.stop()
    seconds = time.perf_counter() - t0
    data = str(root / "data")
    stage = str(root / "out" / "r.zarr.staging")
    new_paths = {str(p.resolve()) for p in added}
    return {
        "seconds": seconds, "exit": outcome.exit_code, "frames": outcome.frames_ok + outcome.frames_failed,
        "processed": outcome.frames_processed,
        "old_files_opened": len({p for p in opened if p.startswith(data) and p not in new_paths}),
        "new_files_opened": len({p for p in opened if p in new_paths}),
        "staged_read": len({p for p in opened if p.startswith(stage) and p.endswith(".npz")}),
        "phases": dict(clock.seconds),
    }


def run_bench(argv: list[str]) -> int:
    """Entry point of ``grainhabit bench nightly``; returns the exit code."""
    ap = argparse.ArgumentParser(prog="grainhabit bench nightly",
                                 description="Wall time of a night that adds a few frames, in archives of "
                                             "growing size (synthetic, invented frames), against the same night "
                                             "in a small archive.")
    ap.add_argument("--sizes", default="100,1000,10000", help="archive sizes in frames (default 100,1000,10000)")
    ap.add_argument("--base", type=int, default=100, help="archive size the others are compared with (default 100)")
    ap.add_argument("--new", type=int, default=2, help="frames a night adds (default 2)")
    ap.add_argument("--size", type=int, default=64, help="frame side in pixels (default 64)")
    ap.add_argument("--distinct", type=int, default=8, help="fields processed for real to seed the archives")
    ap.add_argument("--repeat", type=int, default=3, help="interleaved rounds; the best night is kept (default 3)")
    ap.add_argument("--scheduler", choices=("serial", "local"), default="serial",
                    help="serial (default: the host's own cost, without a cluster's start) or local")
    ap.add_argument("--same-samples", action="store_true",
                    help="put a night's frames into the archive's samples (default: a new batch folder each night, "
                         "as a facility's nightly batches arrive)")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--workdir", metavar="DIR", help="keep archives and results here (default: a temporary folder)")
    ap.add_argument("--check", action="store_true", help="exit 1 if the target is missed")
    args = ap.parse_args(argv)
    try:
        sizes = sorted({int(s) for s in args.sizes.split(",") if s.strip()} | {args.base})
    except ValueError:
        ap.error("--sizes takes integers separated by commas")
    if min(sizes) < 1 or args.new < 1 or args.repeat < 1 or args.size < 32 or args.distinct < 1:
        ap.error("need sizes >= 1, --new >= 1, --repeat >= 1, --size >= 32, --distinct >= 1")
    from grainhabit.manager import make_host

    work = Path(args.workdir).resolve() if args.workdir else Path(tempfile.mkdtemp(prefix="grainhabit-nightly-"))
    out = sys.stdout
    counter = _OpenCounter()
    _quiet()
    warnings.filterwarnings("ignore", category=RuntimeWarning)  # statistics of one-grain samples
    try:
        host = make_host()
        t0 = time.perf_counter()
        images = bu.render_frames(args.distinct, args.size, grains=1, seed=args.seed, ecd_nm=args.size * bu.PIXEL_SIZE_NM / 3)
        templates = _templates(work, images, host, args.scheduler)
        where = "into the stored samples" if args.same_samples else "as a new batch (sample)"
        print(f"grainhabit bench nightly: {args.scheduler} scheduler; archives of {', '.join(map(str, sizes))} "
              f"frames of {args.size}x{args.size} px in {SAMPLES} samples (invented; {args.distinct} fields "
              f"processed, the rest seeded from them: {time.perf_counter() - t0:.1f} s); a night adds {args.new} "
              f"frames {where}", file=out)
        archives = {}
        for n in sizes:
            root = work / f"archive-{n}"
            t1 = time.perf_counter()
            archives[n] = dict(_seed(root, n, images, templates, host, args.scheduler), root=root, next=n, nights=[])
            print(f"  archive of {n}: written, staged and consolidated in {time.perf_counter() - t1:.1f} s "
                  f"(first night {archives[n]['first_night_s']:.1f} s)", file=out, flush=True)
        for r in range(args.repeat):
            for n in sizes:
                a = archives[n]
                night = _night(a["root"], a["workflow"], host, images, a["next"], args.new, counter,
                               new_batch=not args.same_samples)
                a["next"] += args.new
                a["nights"].append(night)
        base = min(archives[args.base]["nights"], key=lambda d: d["seconds"])["seconds"]
        print(f"{'archive':>8}{'night s':>9}{'ratio':>7}{'rounds s':>22}{'old files opened':>18}"
              f"{'staged read':>13}{'exit':>6}", file=out)
        missed = False
        phases = []
        for n in sizes:
            nights = archives[n]["nights"]
            best = min(nights, key=lambda d: d["seconds"])
            ratio = best["seconds"] / base if base > 0 else float("nan")
            rounds = "/".join(f"{d['seconds']:.2f}" for d in nights)
            old = max(d["old_files_opened"] for d in nights)
            staged = max(d["staged_read"] for d in nights)
            code = max(d["exit"] for d in nights)
            print(f"{n:>8}{best['seconds']:>9.2f}{ratio:>7.2f}{rounds:>22}{old:>18}{staged:>13}{code:>6}", file=out)
            phases.append((n, best["phases"]))
            if n >= 1000 and n <= 1500 and ratio > TARGET_RATIO:
                missed = True
            if old or code:
                missed = True
        names = [k for k in ("list", "cluster_start", "worker_prepare", "stage_write", "consolidate", "summarise",
                             "results_write", "cluster_close") if any(k in p for _, p in phases)]
        print("phases of the best night, s: " + ", ".join(names), file=out)
        for n, p in phases:
            print(f"{n:>8}  " + "  ".join(f"{p.get(k, 0.0):.2f}" for k in names), file=out)
        print(f"target: a night in an archive of 1,000-1,500 frames <= {TARGET_RATIO}x (goal {GOAL_RATIO}x) the "
              f"night in {args.base} frames, no old file opened: {'MISSED' if missed else 'met'}", file=out)
        print(f"{bu.load_text()} at the end", file=out)
        return 1 if (missed and args.check) else 0
    finally:
        if not args.workdir:
            shutil.rmtree(work, ignore_errors=True)


@hookimpl
def grainhabit_benchmarks():
    """Offer ``grainhabit bench nightly``."""
    return {"nightly": run_bench}
