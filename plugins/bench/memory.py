"""Benchmark ``grainhabit bench memory``: peak memory of a run does not grow with its frames.

Two runs of the default workflow, on ``--small`` (10) and ``--large`` (100)
synthetic frames (invented data), each in a fresh Python process started
by this benchmark, with the local cluster by default (``--scheduler serial``
runs the frames in that process instead). A thread here sums the resident
set size (RSS) of that process and all its descendants (dask nannies and
workers) every 50 ms (:class:`grainhabit.plugins.bench.harness.TreeRssSampler`); printed
per run: the peak of that sum, the run's main process alone, the peak while
frames are processed and after (consolidation, results writing), and the
ratio of the two runs' peaks.

Target: large / small <= 1.3. The runner keeps at most a few tasks in
flight and stages each result as it finishes, so only the consolidation at
the end holds all frames' (small) grain tables at once.

To keep it quick, ``--distinct`` (4) fields are rendered and written many
times as variants (mirror images, quarter turns, reflect-padded shifts:
:func:`grainhabit.plugins.bench.harness.variant`), so every file has its own content hash
and its own grain outlines (no per-process cache can answer a variant).
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from grainhabit import hookimpl
from grainhabit.plugins.bench import harness as bu

GRAINHABIT_API = 1
#: The name this plugin is registered under.
NAME = "bench-memory"

TARGET_RATIO = 1.3

_CHILD = "import sys; from grainhabit.plugins.bench.memory import child_main; sys.exit(child_main(sys.argv[1:]))"


def child_main(argv: list[str]) -> int:
    """Run one workflow (in the measured process) and write its figures as JSON.

    Parameters
    ----------
    argv : list of str
        ``[WORKFLOW, OUT_JSON]`` or ``[WORKFLOW, OUT_JSON, MALLOC_TRIM_BYTES]``
        (the glibc ``MALLOC_TRIM_THRESHOLD_`` the local cluster's nannies
        give their workers; grainhabit leaves it unset, dask's default is 65536).

    Returns
    -------
    int
        The run's exit code.
    """
    import resource

    from grainhabit.manager import make_host
    from grainhabit.runner import run
    from grainhabit.workflow import validate

    workflow, out_json, *rest = argv
    host = make_host()
    plan = validate(workflow, host)
    t0 = time.time()
    clock = bu.RunClock()
    with bu.worker_malloc_trim(int(rest[0]) if rest else None):
        outcome = run(plan, host, fresh=True, tty=False, observer=clock)
    ru_self = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    ru_kids = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    figures = {
        "start_wall": t0, "end_wall": time.time(), "exit_code": outcome.exit_code,
        "frames_ok": outcome.frames_ok, "frames_failed": outcome.frames_failed, "grains": outcome.grains,
        "seconds": outcome.seconds, "host": clock.seconds, "workers": clock.workers,
        "processing_start_wall": clock.marks.get("processing_start_wall"),
        "processing_end_wall": clock.marks.get("processing_end_wall"),
        # ru_maxrss is in KiB on Linux: the largest RSS of this process, and of any one waited-for descendant
        "maxrss_main_kib": ru_self, "maxrss_largest_child_kib": ru_kids,
    }
    Path(out_json).write_text(json.dumps(figures))
    return outcome.exit_code


def measure_case(workflow: Path, out_json: Path, interval: float = 0.05, timeout: float | None = None,
                 malloc_trim: int | None = None) -> dict:
    """Run :func:`child_main` in a new process and sample its process tree's RSS.

    Parameters
    ----------
    workflow : Path
        Workflow file.
    out_json : Path
        Where the child writes its figures.
    interval : float
        Sampling interval (s).
    timeout : float, optional
        Seconds before the child is killed.
    malloc_trim : int, optional
        ``MALLOC_TRIM_THRESHOLD_`` for the local workers (see :func:`child_main`).

    Returns
    -------
    dict
        The child's figures plus ``peak_tree``, ``peak_main``,
        ``peak_processing``, ``peak_after`` (bytes), ``peak_processes``,
        ``wall`` (s), ``returncode``, ``stderr`` (last lines),
        ``load_before``/``load_after``.
    """
    load0 = bu.load_average()
    t0 = time.perf_counter()
    extra = [] if malloc_trim is None else [str(int(malloc_trim))]
    proc = subprocess.Popen([sys.executable, "-c", _CHILD, str(workflow), str(out_json), *extra],
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    sampler = bu.TreeRssSampler(proc.pid, interval=interval)
    with sampler:
        try:
            _, err = proc.communicate(timeout=timeout)
        except subprocess.TimeoutExpired:
            proc.kill()
            _, err = proc.communicate()
    figures = json.loads(out_json.read_text()) if out_json.exists() else {}
    ps, pe = figures.get("processing_start_wall"), figures.get("processing_end_wall")
    others = [v for pid, v in sampler.peak_by_pid.items() if pid != proc.pid]
    figures.update(
        peak_tree=sampler.peak, peak_main=sampler.peak_root, peak_processes=sampler.peak_processes,
        peak_largest_child=max(others, default=0), peak_children=sorted(others, reverse=True),
        peak_processing=sampler.peak_between(ps, pe) if ps and pe else 0,
        peak_after=sampler.peak_between(pe, float("inf")) if pe else 0,
        samples=len(sampler.samples), wall=time.perf_counter() - t0, returncode=proc.returncode,
        stderr="\n".join((err or "").strip().splitlines()[-5:]), load_before=load0, load_after=bu.load_average())
    return figures


def run(argv: list[str]) -> int:
    """Entry point of ``grainhabit bench memory``; returns the exit code."""
    ap = argparse.ArgumentParser(prog="grainhabit bench memory",
                                 description="Peak RSS (main process + workers) of a run on few and on many "
                                             "synthetic frames (invented data), and their ratio.")
    ap.add_argument("--small", type=int, default=10, help="frames of the small run (default 10)")
    ap.add_argument("--large", type=int, default=100, help="frames of the large run (default 100)")
    ap.add_argument("--size", type=int, default=384, help="frame side in pixels (default 384)")
    ap.add_argument("--grains", type=int, default=None,
                    help=f"grains per frame (default {bu.DENSITY_PER_MPX:g} per megapixel)")
    ap.add_argument("--distinct", type=int, default=4, help="fields rendered; the rest are variants (default 4)")
    ap.add_argument("--scheduler", choices=("local", "serial"), default="local",
                    help="local cluster (default) or serial in the run's process")
    ap.add_argument("--workers", type=int, default=None, help="local workers (default: one per core)")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--json", metavar="PATH", help="write the figures to this JSON file")
    ap.add_argument("--workdir", metavar="DIR", help="write frames and results here and keep them "
                                                     "(default: a temporary folder, removed)")
    ap.add_argument("--malloc-trim", type=int, metavar="BYTES",
                    help="glibc MALLOC_TRIM_THRESHOLD_ of the local workers (default unset; dask's own is 65536)")
    ap.add_argument("--huge", type=int, metavar="PX",
                    help="instead: one frame of PX x PX px (e.g. 8192; a mosaic of rendered 1024 px fields at "
                         "the same grain density) on the local cluster; peak RSS of every worker")
    ap.add_argument("--memory-limit", metavar="SIZE",
                    help="with --huge: execution.memory_limit of the local workers (e.g. 1.5GiB); a frame whose "
                         "estimated working memory exceeds the budget it leaves is processed tile by tile")
    ap.add_argument("--frame-memory", metavar="SIZE",
                    help="with --huge: execution.frame_memory (the frame budget itself, e.g. 600MiB)")
    ap.add_argument("--check", action="store_true", help="exit 1 if the target is missed")
    args = ap.parse_args(argv)
    workers = args.workers or os.cpu_count() or 1
    if args.huge:
        return huge_frame(args.huge, workers, args)
    if not (1 <= args.small <= args.large) or args.size < 64 or args.distinct < 1 or workers < 1:
        ap.error("need 1 <= --small <= --large, --size >= 64, --distinct >= 1, --workers >= 1")
    grains = args.grains or bu.grains_for(args.size)
    root = Path(args.workdir).resolve() if args.workdir else Path(tempfile.mkdtemp(prefix="grainhabit-mem-"))
    out = sys.stdout
    cases = {}
    try:
        t0 = time.perf_counter()
        images = bu.render_frames(min(args.distinct, args.large), args.size, grains=grains, seed=args.seed)
        for name, n in (("small", args.small), ("large", args.large)):
            bu.write_frames(root / name / "bench", images, n)
        where = (f"local cluster, {workers} worker processes" if args.scheduler == "local"
                 else "serial, in the run's process")
        if args.malloc_trim is not None:
            where += f", MALLOC_TRIM_THRESHOLD_={args.malloc_trim}"
        print(f"grainhabit bench memory: {where}; {len(images)} distinct {args.size}x{args.size} px fields "
              f"({grains} grains), written as variants (invented data; {time.perf_counter() - t0:.1f} s)",
              file=out)
        print("peak RSS summed over the run's process and all its descendants, sampled every 50 ms", file=out)
        print(f"{'run':<7}{'frames':>7}{'peak MiB':>10}{'main':>8}{'processing':>12}{'after':>8}{'procs':>7}"
              f"{'wall s':>8}{'ok':>5}  load 1-min before/after", file=out)
        for name, n in (("small", args.small), ("large", args.large)):
            wf = bu.write_workflow(root / f"{name}.yaml", root / name, root / "out" / f"{name}.zarr",
                                   workers=workers, scheduler=args.scheduler, name=f"bench-memory-{name}")
            c = measure_case(wf, root / f"{name}.json", malloc_trim=args.malloc_trim)
            cases[name] = c
            print(f"{name:<7}{n:>7}{bu.mib(c['peak_tree']):>10.0f}{bu.mib(c['peak_main']):>8.0f}"
                  f"{bu.mib(c['peak_processing']):>12.0f}{bu.mib(c['peak_after']):>8.0f}{c['peak_processes']:>7}"
                  f"{c['wall']:>8.1f}{c.get('frames_ok', 0):>5}  {c['load_before'][0]:.2f}/{c['load_after'][0]:.2f}",
                  file=out)
            if c["returncode"] != 0:
                print(f"  problem: the {name} run exited with {c['returncode']}: {c['stderr']}", file=out)
        r = bu.ratio(cases["large"]["peak_tree"], cases["small"]["peak_tree"])
        ok = r <= TARGET_RATIO
        for name in ("small", "large"):
            c = cases[name]
            print(f"  {name}: largest single process (getrusage) main {c.get('maxrss_main_kib', 0) / 1024:.0f} MiB, "
                  f"any one child {c.get('maxrss_largest_child_kib', 0) / 1024:.0f} MiB; consolidate "
                  f"{c.get('host', {}).get('consolidate', float('nan')):.2f} s, results write "
                  f"{c.get('host', {}).get('results_write', float('nan')):.2f} s", file=out)
        print(f"peak RSS ratio large/small: {r:.2f}; target <= {TARGET_RATIO}: {'met' if ok else 'MISSED'}", file=out)
        print(f"{bu.load_text()} at the end", file=out)
        if args.json:
            figures = {"benchmark": "memory", "scheduler": args.scheduler, "workers": workers,
                       "malloc_trim_threshold": args.malloc_trim,
                       "size_px": args.size, "grains_per_frame": grains, "distinct": len(images),
                       "cases": cases, "ratio": r, "target": TARGET_RATIO, "ok": bool(ok)}
            bu.write_figures(args.json, figures, out)
    finally:
        if not args.workdir:
            shutil.rmtree(root, ignore_errors=True)
    failed = any(c["returncode"] != 0 for c in cases.values())
    return 1 if failed or (args.check and not ok) else 0


def huge_mosaic(size_px: int, distinct: int, seed: int, band_px: int = 1024) -> np.ndarray:
    """The ``--huge`` frame as uint16, built band by band (no float copy of the whole frame).

    Parameters
    ----------
    size_px : int
        Frame side (px); a multiple of 1024 uses rendered 1024 px fields,
        another size one field of its own size.
    distinct : int
        Rendered fields (at most 4); the rest are variants.
    seed : int

    Returns
    -------
    ndarray of uint16, shape (size_px, size_px)
        What :func:`grainhabit.plugins.bench.sizes.mosaic` makes (the same
        fields, variants and illumination ramp), rounded the same way.
    """
    from grainhabit.plugins.bench.sizes import GRADIENT, render_tiles
    from grainhabit.plugins.synthetic.render import to_uint16

    tile = 1024 if size_px % 1024 == 0 else size_px
    tiles = render_tiles(min(distinct, 4), tile, seed)
    k = size_px // tile
    theta = np.random.default_rng(seed).uniform(0, 2 * np.pi)
    # the ramp of sizes.mosaic: (cos x + sin y) over the frame, scaled to [0, 1]
    corners = [np.cos(theta) * x + np.sin(theta) * y for x in (0.0, 1.0) for y in (0.0, 1.0)]
    lo, span = min(corners), max(max(corners) - min(corners), 1e-12)
    out = np.empty((size_px, size_px), np.uint16)
    xx = np.arange(size_px, dtype=np.float32) / max(size_px - 1, 1)
    for r in range(k):
        band = np.empty((tile, size_px), np.float64)
        for c in range(k):
            i = r * k + c
            band[:, c * tile:(c + 1) * tile] = bu.variant(tiles[i % len(tiles)], i // len(tiles))
        yy = (np.arange(r * tile, (r + 1) * tile, dtype=np.float32) / max(size_px - 1, 1))[:, None]
        ramp = (np.cos(theta) * xx[None, :] + np.sin(theta) * yy - lo) / span
        band *= 1.0 + GRADIENT * (ramp - 0.5)
        out[r * tile:(r + 1) * tile] = to_uint16(band)
    return out


def huge_frame(size_px: int, workers: int, args) -> int:
    """One ``size_px`` frame through ``grainhabit run`` on the local cluster; print peak RSS per process.

    The frame is a mosaic of rendered 1024 px fields (:func:`huge_mosaic`),
    at the grain density of the other benchmarks. With ``--memory-limit``
    (the workers' memory limit) or ``--frame-memory`` (the frame budget) a
    frame over the budget runs tile by tile through the whole chain
    (:mod:`grainhabit.chain_tiles`); otherwise it is processed whole and
    only its segmentation is tiled (:mod:`grainhabit.plugins.segment.tiling`).

    Returns
    -------
    int
        1 if the run failed (a worker killed counts), else 0.
    """
    from grainhabit.chain_tiles import estimate_bytes

    if size_px < 64:
        raise SystemExit(f"grainhabit bench memory: --huge must be >= 64, got {size_px}")
    root = Path(args.workdir).resolve() if args.workdir else Path(tempfile.mkdtemp(prefix="grainhabit-mem-"))
    out = sys.stdout
    c = {"returncode": 1}
    try:
        t0 = time.perf_counter()
        bu.write_frames(root / "huge" / "bench", [huge_mosaic(size_px, args.distinct, args.seed)])
        raw_mib = bu.mib(size_px * size_px * 4)
        limits = []
        if args.memory_limit:
            limits.append(f"memory_limit: {args.memory_limit}")
        if args.frame_memory:
            limits.append(f"frame_memory: {args.frame_memory}")
        print(f"grainhabit bench memory --huge: one {size_px}x{size_px} px frame (invented data, made in "
              f"{time.perf_counter() - t0:.0f} s; {raw_mib:.0f} MiB as float32; estimated working memory "
              f"{estimate_bytes((size_px, size_px), 'uint16') / 2**30:.1f} GiB), local cluster of {workers} "
              f"workers{', ' + ', '.join(limits) if limits else ''}, {bu.load_text()}", file=out)
        wf = bu.write_workflow(root / "huge.yaml", root / "huge", root / "out" / "huge.zarr", workers=workers,
                               scheduler=args.scheduler, name="bench-memory-huge")
        if limits:
            wf.write_text(wf.read_text() + "".join(f"  {line}\n" for line in limits))
        c = measure_case(wf, root / "huge.json", malloc_trim=args.malloc_trim)
        print(f"frames ok {c.get('frames_ok', 0)}/1, grains {c.get('grains', 0)}, wall {c['wall']:.0f} s, "
              f"exit code {c['returncode']}", file=out)
        how = frame_outcome(root / "out" / "huge.zarr")
        if how:
            print(how, file=out)
        print(f"peak RSS: largest worker process {bu.mib(c['peak_largest_child']):.0f} MiB "
              f"({bu.mib(c['peak_largest_child']) / raw_mib:.1f}x the float32 frame), run's main process "
              f"{bu.mib(c['peak_main']):.0f} MiB, whole tree {bu.mib(c['peak_tree']):.0f} MiB "
              f"({c['peak_processes']} processes)", file=out)
        print("peak RSS of every process the run started, MiB: "
              + ", ".join(f"{bu.mib(v):.0f}" for v in c["peak_children"]), file=out)
        print(f"{bu.load_text()} at the end", file=out)
        bu.write_figures(args.json, {"benchmark": "memory-huge", "size_px": size_px, "workers": workers,
                                     "memory_limit": args.memory_limit, "frame_memory": args.frame_memory,
                                     "case": c})
        if c["returncode"] != 0:
            print(f"  problem: the run exited with {c['returncode']}: {c['stderr']}", file=out)
    finally:
        if not args.workdir:
            shutil.rmtree(root, ignore_errors=True)
    return 1 if c["returncode"] != 0 else 0


def frame_outcome(results: Path) -> str:
    """One line on how the frame went: its status, error, and the tiling note if it was tiled."""
    try:
        import xarray as xr

        frames = xr.open_zarr(results, group="frames").load()
    except Exception:
        return ""
    lines = []
    for i in range(frames.sizes.get("frame", 0)):
        status = str(frames["status"].values[i])
        error = str(frames["error"].values[i]) if "error" in frames else ""
        notes = str(frames["notes"].values[i]) if "notes" in frames else ""
        tiled = [n for n in notes.split("; ") if n.startswith("tiles: frame")]
        lines.append(f"frame {i}: {status}" + (f", {error}" if error else "")
                     + (f"; {tiled[0]}" if tiled else "; processed whole"))
    return "\n".join(lines)


@hookimpl
def grainhabit_benchmarks():
    """Offer ``grainhabit bench memory``."""
    return {"memory": run}
