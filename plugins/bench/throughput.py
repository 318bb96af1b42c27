"""Benchmark ``grainhabit bench throughput``: frames per second, and where the time goes.

Synthetic fields (the renderer of ``grainhabit bench accuracy``; invented
data) are written as TIFF files, then timed in one run, one after another:

(a) a plain serial loop over the same kernels without the pipeline (after
    one untimed warm-up frame, a mirrored copy of the first, so that imports
    are not counted): the
    file read by the TIFF reader plugin and thumbnailed, as in a worker, then the default chain's step functions
    (``grainhabit_preprocess`` of flatten-background, ... ,
    ``grainhabit_fit_growth`` of fit-growth-ratio) called directly with their
    default parameters, one BLAS/OpenMP thread (as a dask worker has); no
    dask, no staging, no zarr;
(b) :func:`grainhabit.runner.run` on a workflow with ``execution.workers: 1``
    (local cluster, ``fresh``);
(c) the same with all workers (default: one per core);
(d) the machine's ceiling: as many copies of loop (a) as (c) has workers, at
    once, in separate processes, each over its share of the frames (no dask,
    no pipeline). Two busy cores of a virtual machine seldom give twice the
    work of one (shared caches, memory bandwidth, the host's scheduling); on
    the development machine even a pure-Python loop ran 10-25 % slower per
    copy with both cores busy. ``(a) / (d)`` is the best any parallel runner
    could do here, and ``net(c) / (d)`` what the pipeline loses to it.

Printed: frames/s and megapixels/s of each; the time per frame of every
stage (from the staged records' ``timings`` for (b) and (c)); the host's
own phases (listing, cluster start, worker preparation, staging,
consolidation, summarise, results writing, cluster close; timed by
:class:`grainhabit.plugins.bench.harness.RunClock`);
the pipeline's overhead per worker, ``net(b) / (a) - 1``; the speed-up of
all workers over the serial loop, ``(a) / net(c)``, beside the ceiling
``(a) / (d)``; and the scaling efficiency ``net(b) / net(c) / workers``.
``net`` leaves out the local cluster's start, the preparation of its
workers (plugin imports and tables, once per worker process, as the loop's
untimed warm-up frame leaves out the loop's) and the cluster's close: a
fixed cost per run, printed on its own; the figures with it are printed
too.

Targets (as ratios within one run, on the 2-core development machine): all
workers >= 0.9 x workers (1.8 on 2 cores) times the serial loop; overhead
per worker <= 10 %; median task well over 100 ms; with ``--scaling`` also
4x frames within 4.4x the time and 4x pixels (2x the side, 4x the grains)
within 4.4x the time. The machine's load average is printed beside every
figure: on a shared machine the ratios are only as good as the load was
steady; ``--repeat N`` (default 3) runs N interleaved rounds of (a)-(d)
and reports the fastest of each case (the usual way to time on a noisy
machine), and prints the ratios of every round beside them. The default
workload, 32 frames of 1024 x 1024 px, takes about 80 s per round on the
development machine; what a run costs beyond its frames (results writing,
summary, consolidation, about 1 s) weighs less in it than in a short run,
as it does in a night of thousands of frames. ``--check`` makes the exit
code 1 when a target is missed.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from grainhabit import hookimpl
from grainhabit.plugins.bench import harness as bu

GRAINHABIT_API = 1
#: The name this plugin is registered under.
NAME = "bench-throughput"

#: Per-frame stages in the order of the task's ``timings``.
FRAME_PHASES = ("read", "preprocess", "segment", "measure", "classify", "fit_growth")
#: The host's own phases (per run), as :class:`grainhabit.plugins.bench.harness.RunClock` names them.
HOST_PHASES = ("list", "cluster_start", "worker_prepare", "stage_write", "consolidate", "summarise",
               "results_write", "cluster_close", "other")

TARGETS = {"speedup_per_worker": 0.9, "overhead_max": 0.10, "task_min_s": 0.1, "scaling_max": 4.4}


def default_chain() -> list[tuple[str, object, dict]]:
    """The default chain's step functions with their default parameters.

    Returns
    -------
    list of (stage, function, params)
        ``function(frame=..., params=...)`` is the plugin's
        ``grainhabit_<stage>``.

    Raises
    ------
    RuntimeError
        If the host's default chain names another step than these modules
        provide (the loop would time something else than the pipeline).
    """
    from grainhabit.manager import DEFAULT_CHAIN
    from grainhabit.plugins.habit import classify_habit as classify
    from grainhabit.plugins.habit import fit_growth_ratio as growth
    from grainhabit.plugins.measure import measure_grains as measure
    from grainhabit.plugins.preprocess import flatten_background as preprocess
    from grainhabit.plugins.segment import segment_grains as segment

    chain = []
    for stage, mod in (("preprocess", preprocess), ("segment", segment), ("measure", measure),
                       ("classify", classify), ("fit_growth", growth)):
        if DEFAULT_CHAIN.get(stage) != mod.STEP.name:
            raise RuntimeError(f"default chain has {DEFAULT_CHAIN.get(stage)!r} for {stage}, "
                               f"the loop would run {mod.STEP.name!r}")
        chain.append((stage, getattr(mod, f"grainhabit_{stage}"), mod.STEP.resolve({})))
    return chain


def serial_loop(paths, pixel_size_nm: float = bu.PIXEL_SIZE_NM) -> dict:
    """Time the kernels alone: read each TIFF, run the default chain, keep nothing.

    Each frame is read as a worker reads it: by the TIFF reader plugin
    (calibration, info strip and drawn-mark checks), then thumbnailed
    (:func:`grainhabit.task.thumbnail`); the files are listed before the
    clock starts (a run lists them in its main process).

    Parameters
    ----------
    paths : sequence of path-like
        TIFF files.
    pixel_size_nm : float
        Pixel size given to frames whose file has none (nm).

    Returns
    -------
    dict
        ``wall``, ``cpu`` and ``cpu_system`` (s, whole loop), ``stages`` and
        ``cpu_stages`` (stage -> total wall and CPU s), ``frames``,
        ``grains``, ``pixels``.
    """
    from threadpoolctl import threadpool_limits

    from grainhabit.executors import keep_freed_memory
    from grainhabit.manager import make_host
    from grainhabit.task import thumbnail

    keep_freed_memory()  # as every frame task does in a worker
    chain = default_chain()
    host = make_host(autoload=False)
    options = {"pixel_size_nm": float(pixel_size_nm)}
    refs = [host.first_answer("grainhabit_list_frames", path=str(p), options=options)[0] for p in paths]
    stages = {k: 0.0 for k in FRAME_PHASES}
    cpu_stages = {k: 0.0 for k in FRAME_PHASES}
    grains = pixels = 0
    t_start, c_start = time.perf_counter(), time.process_time()
    sys0 = resource.getrusage(resource.RUSAGE_SELF).ru_stime
    with threadpool_limits(limits=1):
        for ref in refs:
            t0, c0 = time.perf_counter(), time.process_time()
            frame = host.first_answer("grainhabit_read_frame", ref=ref, options=options)
            if not (frame.pixel_size_nm and np.isfinite(frame.pixel_size_nm)):
                frame = frame.replace(pixel_size_nm=float(pixel_size_nm))
            frame = frame.replace(sample="bench")
            thumbnail(frame.raw)
            stages["read"] += time.perf_counter() - t0
            cpu_stages["read"] += time.process_time() - c0
            for stage, func, params in chain:
                t0, c0 = time.perf_counter(), time.process_time()
                frame = func(frame=frame, params=params)
                stages[stage] += time.perf_counter() - t0
                cpu_stages[stage] += time.process_time() - c0
            grains += frame.n_grains
            pixels += frame.raw.size
    return {"wall": time.perf_counter() - t_start, "cpu": time.process_time() - c_start,
            "cpu_system": resource.getrusage(resource.RUSAGE_SELF).ru_stime - sys0, "stages": stages,
            "cpu_stages": cpu_stages, "frames": len(paths), "grains": grains, "pixels": pixels}


def _ceiling_child(paths) -> dict:
    """One copy of the serial loop in a pool process; wall-clock start and end (s since the epoch)."""
    start = time.time()
    res = serial_loop(paths)
    res.update(start=start, end=time.time())
    return res


def _ceiling_warm(path) -> None:
    """Pool initializer: run the chain once (imports, first calls) before the timed part."""
    serial_loop([path])


def ceiling_case(paths, copies: int, warm_path=None) -> dict:
    """Time ``copies`` serial loops at once, in separate processes, over disjoint shares of the frames.

    Each process first runs the chain once on ``warm_path``, untimed, as the
    timed loop (a) is preceded by such a warm-up in this process.

    Parameters
    ----------
    paths : sequence of path-like
        TIFF files; copy ``i`` takes ``paths[i::copies]``.
    copies : int
        Processes (one per worker of the pipeline case it is compared with).
    warm_path : path-like, optional
        Frame each process runs once, untimed, first (default ``paths[0]``).

    Returns
    -------
    dict
        ``wall`` (s, first loop start to last loop end, imports left out),
        ``loops`` (wall s of each copy), ``frames``, ``grains``, ``pixels``,
        ``cpu`` (s, all copies).
    """
    import multiprocessing

    shares = [list(paths[i::copies]) for i in range(copies)]
    ctx = multiprocessing.get_context("spawn")
    warm_path = paths[0] if warm_path is None else warm_path
    with ctx.Pool(copies, initializer=_ceiling_warm, initargs=(warm_path,)) as pool:
        # one trivial round first, so that every process has imported the kernels before the clock starts
        pool.map(time.sleep, [0.2] * copies, chunksize=1)
        parts = pool.map(_ceiling_child, shares, chunksize=1)
    return {"wall": max(p["end"] for p in parts) - min(p["start"] for p in parts),
            "loops": [p["wall"] for p in parts], "frames": sum(p["frames"] for p in parts),
            "grains": sum(p["grains"] for p in parts), "pixels": sum(p["pixels"] for p in parts),
            "cpu": sum(p["cpu"] for p in parts), "copies": copies}


def pipeline_case(workflow: Path, host, workers: int, malloc_trim: int | None = None) -> dict:
    """Run a workflow once (``fresh``) with ``workers`` local workers and collect the figures.

    ``malloc_trim``, if given, is the glibc ``MALLOC_TRIM_THRESHOLD_`` the
    local cluster's nannies put in their workers' environment (dask's own
    default is 65536 bytes).

    Returns
    -------
    dict
        ``wall`` (s, the whole :func:`grainhabit.runner.run`), ``fixed``
        (cluster start + worker preparation + close), ``net`` (wall -
        fixed), ``processing`` (workers ready to last frame staged), ``host`` (phase -> s), ``stages``
        and ``cpu_stages`` (stage -> total wall and CPU s over the frames, from the staged records),
        ``task`` (median, min, max, total s of the frame tasks),
        ``idle_worker_s`` (workers x processing - task total), ``cpu``
        (``workers``, ``main`` s), ``frames``, ``frames_ok``, ``grains``,
        ``pixels``, ``exit_code``, ``load`` before and after.
    """
    from grainhabit.runner import run
    from grainhabit.workflow import validate

    plan = validate(str(workflow), host, {"execution": {"workers": int(workers)}})
    load0 = bu.load_average()
    t0 = time.perf_counter()
    clock = bu.RunClock()
    with bu.worker_malloc_trim(malloc_trim):
        outcome = run(plan, host, fresh=True, tty=False, observer=clock)
    wall = time.perf_counter() - t0
    records = bu.staged_records(outcome.results)
    stages = {k: float(sum(r["timings"].get(k, 0.0) for r in records)) for k in FRAME_PHASES}
    cpu_stages = {k: float(sum(r.get("cpu_timings", {}).get(k, 0.0) for r in records)) for k in FRAME_PHASES}
    task = [float(r["seconds"]) for r in records]
    s = clock.seconds
    fixed = s.get("cluster_start", 0.0) + s.get("worker_prepare", 0.0) + s.get("cluster_close", 0.0)
    processing = clock.processing_seconds
    host_s = {k: float(s.get(k, 0.0)) for k in HOST_PHASES if k != "other"}
    accounted = (fixed + (processing if processing == processing else 0.0) + host_s["list"]
                 + host_s["consolidate"] + host_s["summarise"] + host_s["results_write"])
    host_s["other"] = max(0.0, wall - accounted)
    n_workers = clock.workers or int(workers)
    return {
        "workers": n_workers, "wall": wall, "fixed": fixed, "net": wall - fixed, "processing": processing,
        "warmup": clock.warmup_seconds,
        "host": host_s, "stages": stages, "cpu_stages": cpu_stages,
        "task": {"median": statistics.median(task) if task else float("nan"),
                 "min": min(task, default=float("nan")), "max": max(task, default=float("nan")),
                 "total": float(sum(task))},
        "idle_worker_s": n_workers * processing - float(sum(task)),
        "cpu": dict(clock.cpu), "frames": len(records), "frames_ok": outcome.frames_ok,
        "grains": outcome.grains, "pixels": int(sum(r.get("rows", 0) * r.get("cols", 0) for r in records)),
        "exit_code": outcome.exit_code, "load_before": load0, "load_after": bu.load_average(),
    }


def _rates(frames: int, pixels: int, seconds: float) -> tuple[float, float]:
    return bu.ratio(frames, seconds), bu.ratio(pixels / 1e6, seconds)


def _print_cases(a: dict, cases: list[tuple[str, dict]], d: dict, out) -> None:
    print(f"{'':<27}{'wall s':>8}{'net s':>8}{'frames/s':>10}{'Mpx/s':>8}{'cpu s':>8}{'of sys':>8}"
          f"  load 1-min before/after", file=out)
    fps, mps = _rates(a["frames"], a["pixels"], a["wall"])
    print(f"{'(a) serial loop':<27}{a['wall']:>8.1f}{a['wall']:>8.1f}{fps:>10.3f}{mps:>8.3f}{a['cpu']:>8.1f}"
          f"{a['cpu_system']:>8.1f}  {a['load_before'][0]:.2f}/{a['load_after'][0]:.2f}", file=out)
    for label, c in cases:
        fps, mps = _rates(c["frames"], c["pixels"], c["net"])
        cpu = c["cpu"].get("workers", float("nan")) + c["cpu"].get("main", float("nan"))
        cpu_sys = c["cpu"].get("workers_system", float("nan")) + c["cpu"].get("main_system", float("nan"))
        print(f"{label:<27}{c['wall']:>8.1f}{c['net']:>8.1f}{fps:>10.3f}{mps:>8.3f}{cpu:>8.1f}{cpu_sys:>8.1f}"
              f"  {c['load_before'][0]:.2f}/{c['load_after'][0]:.2f}", file=out)
    if d["copies"] > 1:
        fps, mps = _rates(d["frames"], d["pixels"], d["wall"])
        label = f"(d) {d['copies']} loops at once"
        print(f"{label:<27}"
              f"{d['wall']:>8.1f}{d['wall']:>8.1f}{fps:>10.3f}{mps:>8.3f}{d['cpu']:>8.1f}{'':>8}"
              f"  {d['load_before'][0]:.2f}/{d['load_after'][0]:.2f}", file=out)
    print("(net: without the local cluster's start, worker preparation and close; cpu: main process + all its "
          "descendants, workers ready to close; (d): the machine's ceiling, copies of (a) in separate processes)",
          file=out)


def _print_stages(a: dict, cases: list[tuple[str, dict]], out) -> None:
    heads = ["loop"] + [f"{c['workers']}w" for _, c in cases]
    print("\nper frame, seconds (frame stages run in the worker; 'task' is the whole frame task):", file=out)
    print(f"  {'stage':<14}" + "".join(f"{h:>9}" for h in heads), file=out)
    for k in FRAME_PHASES:
        vals = [a["stages"][k] / a["frames"]] + [c["stages"][k] / max(c["frames"], 1) for _, c in cases]
        print(f"  {k:<14}" + "".join(f"{v:>9.3f}" for v in vals), file=out)
    vals = [a["wall"] / a["frames"]] + [c["task"]["total"] / max(c["frames"], 1) for _, c in cases]
    print(f"  {'task':<14}" + "".join(f"{v:>9.3f}" for v in vals), file=out)
    print("host phases, seconds per run (stage_write overlaps the workers; 'other' is the rest of the run):",
          file=out)
    print(f"  {'phase':<14}" + "".join(f"{h:>9}" for h in heads[1:]), file=out)
    for k in HOST_PHASES:
        print(f"  {k:<14}" + "".join(f"{c['host'][k]:>9.3f}" for _, c in cases), file=out)
    print(f"  {'idle workers':<14}" + "".join(f"{c['idle_worker_s']:>9.3f}" for _, c in cases)
          + "   (workers x processing span - task time: dispatch, worker start-up, imports)", file=out)


def _verdict(ok: bool) -> str:
    return "met" if ok else "MISSED"


def run(argv: list[str]) -> int:
    """Entry point of ``grainhabit bench throughput``; returns the exit code."""
    ap = argparse.ArgumentParser(prog="grainhabit bench throughput",
                                 description="Frames per second of a plain kernel loop, the pipeline with one "
                                             "worker and with all workers, and as many plain loops at once "
                                             "(the machine's ceiling), on synthetic frames (invented data); "
                                             "time per stage and the host's overheads.")
    ap.add_argument("--frames", type=int, default=None, help="frames (default 32; 12 with --versus-script)")
    ap.add_argument("--size", type=int, default=None,
                    help="frame side in pixels (default 1024; 2048 with --versus-script)")
    ap.add_argument("--grains", type=int, default=None,
                    help=f"grains per frame (default {bu.DENSITY_PER_MPX:g} per megapixel, about 42 at 1024 px; "
                         "135 with --versus-script)")
    ap.add_argument("--workers", type=int, default=None, help="workers of run (c) (default: one per core)")
    ap.add_argument("--seed", type=int, default=0, help="first seed of the rendered fields (default 0)")
    ap.add_argument("--repeat", type=int, default=3,
                    help="interleaved rounds of (a)-(d); the fastest of each case is reported (default 3)")
    ap.add_argument("--json", metavar="PATH", help="write the figures to this JSON file")
    ap.add_argument("--scaling", action="store_true",
                    help="also run 4x the frames and 4x the pixels with all workers and check <= 4.4x the time")
    ap.add_argument("--workdir", metavar="DIR", help="write frames and results here and keep them "
                                                     "(default: a temporary folder, removed)")
    ap.add_argument("--start-method", choices=("auto", "fork", "spawn"), default="auto",
                    help="how the local cluster starts its workers (the workflow's execution.start_method; "
                         "default auto: fork on Linux)")
    ap.add_argument("--malloc-trim", type=int, metavar="BYTES",
                    help="glibc MALLOC_TRIM_THRESHOLD_ of the local workers (default: unset, glibc's own "
                         "thresholds; 65536, dask's own default, makes every large array a fresh mmap)")
    ap.add_argument("--versus-script", action="store_true",
                    help="instead: a hand-written serial script (read, Gaussian smoothing, Otsu, fill holes, "
                         "distance transform, peak_local_max, watershed, regionprops_table) against grainhabit run "
                         "with all workers, cold start included; throughput ratio and accuracy of both")
    ap.add_argument("--accuracy-frames", type=int, default=2,
                    help="with --versus-script: fields scored for accuracy (default 2; 0 skips)")
    ap.add_argument("--check", action="store_true", help="exit 1 if a target is missed")
    args = ap.parse_args(argv)
    versus = args.versus_script
    args.frames = args.frames if args.frames is not None else (12 if versus else 32)
    args.size = args.size if args.size is not None else (2048 if versus else 1024)
    if versus and args.grains is None:
        args.grains = 135
    workers = args.workers or os.cpu_count() or 1
    if (args.frames < 1 or args.size < 64 or workers < 1 or args.repeat < 1
            or (args.grains is not None and args.grains < 1)):
        ap.error("--frames, --workers, --repeat and --grains must be >= 1, --size >= 64")
    from grainhabit.manager import make_host

    out = sys.stdout
    if versus:
        from grainhabit.plugins.bench.reference_script import versus_script

        root = Path(args.workdir).resolve() if args.workdir else Path(tempfile.mkdtemp(prefix="grainhabit-bench-"))
        try:
            res = versus_script(args, root, workers, out)
            if args.json:
                Path(args.json).parent.mkdir(parents=True, exist_ok=True)
                Path(args.json).write_text(json.dumps(res, indent=2, default=float))
        finally:
            if not args.workdir:
                shutil.rmtree(root, ignore_errors=True)
        return 1 if (args.check and not res["ok"]) else 0
    grains = args.grains or bu.grains_for(args.size)
    root = Path(args.workdir).resolve() if args.workdir else Path(tempfile.mkdtemp(prefix="grainhabit-bench-"))
    figures = {"benchmark": "throughput", "frames": args.frames, "size_px": args.size,
               "malloc_trim_threshold": args.malloc_trim,
               "grains_per_frame": grains, "workers": workers, "cores": os.cpu_count(),
               "load_start": bu.load_average()}
    try:
        t0 = time.perf_counter()
        images = bu.render_frames(args.frames, args.size, grains=grains, seed=args.seed)
        paths = bu.write_frames(root / "data" / "bench", images)
        print(f"grainhabit bench throughput: {args.frames} synthetic frames of {args.size}x{args.size} px, "
              f"{grains} grains each (invented data; rendered in {time.perf_counter() - t0:.1f} s), "
              f"{bu.load_text()}", file=out)
        if args.malloc_trim is not None:
            print(f"local workers run with MALLOC_TRIM_THRESHOLD_={args.malloc_trim} (grainhabit's default: unset); "
                  "the serial loop with glibc's own default", file=out)
        host = make_host()

        # warm-up frame, untimed: imports and first calls; a mirrored field, so that no result of the timed
        # frames is memoised by it
        warm = bu.write_frames(root / "warm" / "bench", images[:1], 1, start=1)
        serial_loop(warm)
        one = bu.write_workflow(root / "one.yaml", root / "data", root / "out" / "one.zarr", workers=1,
                                name="bench-one", start_method=args.start_method)
        every = bu.write_workflow(root / "all.yaml", root / "data", root / "out" / "all.zarr", workers=workers,
                                  name="bench-all", start_method=args.start_method)
        rounds = {"a": [], "b": [], "c": [], "d": []}
        for _ in range(args.repeat):  # interleaved rounds: a slow spell of the machine hits every case alike
            l0 = bu.load_average()
            a = serial_loop(paths)
            a.update(load_before=l0, load_after=bu.load_average())
            rounds["a"].append(a)
            with bu.without_early_frames():  # (b) is one process against the loop: the overhead per worker
                rounds["b"].append(pipeline_case(one, host, 1, args.malloc_trim))
            if workers > 1:  # else (c) would repeat (b)
                rounds["c"].append(pipeline_case(every, host, workers, args.malloc_trim))
                l0 = bu.load_average()
                d = ceiling_case(paths, workers, warm[0])
                d.update(load_before=l0, load_after=bu.load_average())
                rounds["d"].append(d)
        a = min(rounds["a"], key=lambda x: x["wall"])
        b = min(rounds["b"], key=lambda x: x["net"])
        c = min(rounds["c"], key=lambda x: x["net"]) if workers > 1 else b
        d = min(rounds["d"], key=lambda x: x["wall"]) if workers > 1 else dict(a, copies=1)
        if args.repeat > 1:
            print(f"best of {args.repeat} interleaved rounds per case; all rounds: "
                  + "; ".join(f"({k}) " + ", ".join(f"{x.get('net', x['wall']):.1f}" for x in v)
                              for k, v in rounds.items() if v) + " s", file=out)
            print("each round on its own: overhead net(b)/(a) - 1 "
                  + ", ".join(f"{100 * (b_['net'] / a_['wall'] - 1):+.1f} %" for a_, b_ in zip(rounds["a"], rounds["b"]))
                  + ("; all workers (a)/net(c) " + ", ".join(f"{a_['wall'] / c_['net']:.2f}x"
                                                           for a_, c_ in zip(rounds["a"], rounds["c"]))
                     + "; ceiling (a)/(d) " + ", ".join(f"{a_['wall'] / d_['wall']:.2f}x"
                                                       for a_, d_ in zip(rounds["a"], rounds["d"]))
                     if rounds["c"] else ""), file=out)
        bad = [(lbl, x) for lbl, x in (("1 worker", b), ("all workers", c)) if x["frames_ok"] != args.frames]
        cases = [("(b) pipeline, 1 worker", b)] + ([(f"(c) pipeline, {c['workers']} workers", c)]
                                                    if c is not b else [])
        _print_cases(a, cases, d, out)
        def both(key, sub=None):
            vals = [(x[key] if sub is None else x[key][sub], lbl) for lbl, x in
                    (("1 worker", b), (f"{c['workers']} workers", c))][: 1 if c is b else 2]
            return ", ".join(f"{v:.2f} s ({lbl})" for v, lbl in vals)

        print(f"fixed per run, left out of 'net': local cluster start-up {both('host', 'cluster_start')}; "
              f"worker preparation (imports, plugin host, tables) {both('host', 'worker_prepare')}; "
              f"close {both('host', 'cluster_close')}", file=out)
        print(f"first result's latency beyond its task (dispatch, transfer, first calls): {both('warmup')}",
              file=out)
        _print_stages(a, cases, out)

        r = {
            "overhead_per_worker": b["net"] / a["wall"] - 1,
            "overhead_per_worker_with_startup": b["wall"] / a["wall"] - 1,
            "overhead_per_worker_without_warmup": (b["net"] - b["warmup"]) / a["wall"] - 1,
            "cpu_overhead_per_worker": bu.ratio(b["cpu"].get("workers", np.nan) + b["cpu"].get("main", np.nan),
                                                a["cpu"]) - 1,
            "speedup_all_vs_loop": a["wall"] / c["net"],
            "speedup_all_vs_loop_with_startup": a["wall"] / c["wall"],
            "speedup_all_vs_loop_without_warmup": a["wall"] / (c["net"] - c["warmup"]),
            "ceiling_speedup": a["wall"] / d["wall"],
            "pipeline_vs_ceiling": d["wall"] / c["net"],
            "scaling_efficiency": b["net"] / c["net"] / c["workers"],
            "scaling_efficiency_processing": b["processing"] / c["processing"] / c["workers"],
            "task_median_s": c["task"]["median"], "task_min_s": min(b["task"]["min"], c["task"]["min"]),
        }
        need = TARGETS["speedup_per_worker"] * c["workers"]
        checks = {"speedup": r["speedup_all_vs_loop"] >= need,
                  "overhead": r["overhead_per_worker"] <= TARGETS["overhead_max"],
                  "task": r["task_median_s"] > TARGETS["task_min_s"]}
        print(f"\noverhead of the pipeline per worker, net(b)/(a) - 1: {100 * r['overhead_per_worker']:+.1f} % "
              f"(without the first result's latency {100 * r['overhead_per_worker_without_warmup']:+.1f} %; "
              f"with the fixed start/close {100 * r['overhead_per_worker_with_startup']:+.1f} %; in CPU seconds "
              f"{100 * r['cpu_overhead_per_worker']:+.1f} %); target <= {100 * TARGETS['overhead_max']:.0f} %: "
              f"{_verdict(checks['overhead'])}", file=out)
        print(f"all {c['workers']} workers vs the serial loop, (a)/net(c): {r['speedup_all_vs_loop']:.2f}x "
              f"(without the first result's latency {r['speedup_all_vs_loop_without_warmup']:.2f}x; "
              f"with the fixed start/close {r['speedup_all_vs_loop_with_startup']:.2f}x); target >= {need:.1f}x: "
              f"{_verdict(checks['speedup'])}", file=out)
        if d["copies"] > 1:
            print(f"machine ceiling, {d['copies']} plain loops at once, (a)/(d): {r['ceiling_speedup']:.2f}x "
                  f"(copies took {', '.join(f'{x:.1f}' for x in d['loops'])} s); the pipeline reaches "
                  f"{100 * r['pipeline_vs_ceiling']:.0f} % of it, (d)/net(c)"
                  + ("; the target is beyond this machine in this run" if r["ceiling_speedup"] < need else ""),
                  file=out)
        print(f"scaling efficiency net(b)/net(c)/{c['workers']}: {r['scaling_efficiency']:.2f} "
              f"(processing span only {r['scaling_efficiency_processing']:.2f})", file=out)
        print(f"frame task: median {r['task_median_s']:.2f} s, shortest {r['task_min_s']:.2f} s; "
              f"target well over {TARGETS['task_min_s']:g} s: {_verdict(checks['task'])}", file=out)

        scaling = {}
        if args.scaling:
            scaling = _run_scaling(args, root, host, images, workers, c, out)
            checks.update({k: v["ok"] for k, v in scaling.items()})
        for lbl, x in bad:
            print(f"problem: {lbl}: only {x['frames_ok']} of {args.frames} frames ok (exit code "
                  f"{x['exit_code']})", file=out)
        figures.update(serial_loop=a, one_worker=b, all_workers=c, ceiling=d, rounds=rounds, ratios=r,
                       scaling=scaling, checks=checks,
                       targets=TARGETS, load_end=bu.load_average())
        print(f"{bu.load_text()} at the end", file=out)
        bu.write_figures(args.json, figures, out)
    finally:
        if not args.workdir:
            shutil.rmtree(root, ignore_errors=True)
    if bad:
        return 1
    return 1 if (args.check and not all(checks.values())) else 0


def _run_scaling(args, root: Path, host, images, workers: int, base: dict, out) -> dict:
    """4x frames (variants of the same fields) and 4x pixels, all workers; ratios to ``base``."""
    res = {}
    frames4 = bu.write_frames(root / "data4" / "bench", images, 4 * args.frames)
    c4 = pipeline_case(bu.write_workflow(root / "frames4.yaml", root / "data4", root / "out" / "frames4.zarr",
                                         workers=workers, name="bench-frames4"), host, workers,
                       args.malloc_trim)
    grains4 = 4 * args.grains if args.grains else bu.grains_for(2 * args.size)
    big = bu.render_frames(args.frames, 2 * args.size, grains=grains4, seed=args.seed + 1000)
    bu.write_frames(root / "datapx" / "bench", big)
    cp = pipeline_case(bu.write_workflow(root / "pixels4.yaml", root / "datapx", root / "out" / "pixels4.zarr",
                                         workers=workers, name="bench-pixels4"), host, workers,
                       args.malloc_trim)
    print("\nscaling (all workers, net of the fixed start/close):", file=out)
    for key, label, case, work in (("frames_x4", f"4x frames ({len(frames4)})", c4, 4.0),
                                   ("pixels_x4", f"4x pixels ({2 * args.size} px side)", cp, 4.0)):
        t = case["net"] / base["net"]
        g = bu.ratio(case["grains"], base["grains"])
        ok = t <= TARGETS["scaling_max"] and case["frames_ok"] == case["frames"]
        print(f"  {label:<26} net {case['net']:.1f} s = {t:.2f}x the base run (grains x{g:.2f}); "
              f"target <= {TARGETS['scaling_max']}x: {_verdict(ok)}; "
              f"load {case['load_before'][0]:.2f}/{case['load_after'][0]:.2f}", file=out)
        print(f"  {'':<26} host phases: " + ", ".join(f"{k} {case['host'][k]:.2f} s" for k in HOST_PHASES),
              file=out)
        res[key] = {"case": case, "time_ratio": t, "grain_ratio": g, "work_ratio": work, "ok": bool(ok)}
    return res


@hookimpl
def grainhabit_benchmarks():
    """Offer ``grainhabit bench throughput``."""
    return {"throughput": run}
