"""``grainhabit bench throughput --versus-script``: the pipeline against a hand-written serial script.

A facility sizing its night compares two numbers: what a short script of
standard library calls does per hour on one core, and what ``grainhabit
run`` does on the whole machine. The script is written here, as such a
script is usually written (no habit, no growth ratio, a plain distance-map
split of touching grains), one call per step:

read (tifffile) -> Gaussian smoothing (sigma 1 px) -> Otsu threshold [1]_ ->
fill holes -> Euclidean distance transform -> ``peak_local_max`` (one
peak per grain at least a quarter of the nominal grain diameter apart) ->
marker watershed of the negated distance map [2]_ -> ``regionprops_table``
(area, centroid, equivalent diameter, perimeter, axes, orientation,
eccentricity, solidity, mean intensity)

with scipy.ndimage and scikit-image, one BLAS/OpenMP thread, serially.
Beside it, in interleaved rounds (the fastest of each case is kept):
``grainhabit run`` of the default chain on a local cluster of ``--workers``
workers, timed from the call to the end of the run, cold start (cluster
start, worker preparation) included. Printed: frames per second of both,
the ratio pipeline / script (target >= 1.5, goal 2), of every round too, the
CPU seconds per frame of both, stage by stage (the run's from the CPU time of
the thread that ran each frame task), and the segmentation
accuracy of both on the same rendered fields (same seeds; recall, precision,
median ECD error and touching pairs split, scored as ``grainhabit bench
accuracy`` scores them).

References
----------
.. [1] N. Otsu, "A threshold selection method from gray-level histograms",
   IEEE Trans. Syst. Man Cybern. 9(1), 62-66, 1979, doi:10.1109/TSMC.1979.4310076
.. [2] F. Meyer and S. Beucher, "Morphological segmentation", J. Visual
   Commun. Image Represent. 1(1), 21-46, 1990, doi:10.1016/1047-3203(90)90014-M
"""

from __future__ import annotations

import time

import numpy as np

from grainhabit.plugins.bench import harness as bu

#: Target and goal of pipeline throughput / script throughput (issue: speed).
TARGET_RATIO = 1.5
GOAL_RATIO = 2.0
#: Columns the script asks regionprops_table for.
PROPERTIES = ("label", "area", "centroid", "equivalent_diameter_area", "perimeter", "major_axis_length",
              "minor_axis_length", "orientation", "eccentricity", "solidity", "intensity_mean")


def script_labels(image: np.ndarray, pixel_size_nm: float = bu.PIXEL_SIZE_NM,
                  grain_nm: float = bu.ECD_NM) -> np.ndarray:
    """The script's segmentation of one frame (smoothing to watershed).

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
        Raw frame, grains bright.
    pixel_size_nm : float
        Pixel side (nm).
    grain_nm : float
        Nominal grain diameter (nm); peaks closer than a quarter of it merge.

    Returns
    -------
    ndarray of int32, shape (rows, cols)
        0 background, 1..n grains.
    """
    from scipy import ndimage as ndi
    from skimage.feature import peak_local_max
    from skimage.filters import threshold_otsu
    from skimage.segmentation import watershed

    smooth = ndi.gaussian_filter(np.asarray(image, np.float32), 1.0)
    mask = ndi.binary_fill_holes(smooth > threshold_otsu(smooth))
    dist = ndi.distance_transform_edt(mask)
    comp, _ = ndi.label(mask)
    min_distance = max(1, int(round(0.25 * grain_nm / pixel_size_nm)))
    peaks = peak_local_max(dist, min_distance=min_distance, labels=comp, exclude_border=False)
    markers = np.zeros(mask.shape, np.int32)
    markers[tuple(peaks.T)] = np.arange(1, len(peaks) + 1)
    return watershed(-dist, markers, mask=mask).astype(np.int32)


def script_loop(paths, pixel_size_nm: float = bu.PIXEL_SIZE_NM) -> dict:
    """Run the whole script (read to ``regionprops_table``) over TIFF files, one thread.

    Returns
    -------
    dict
        ``wall``, ``cpu`` (s), ``cpu_stages`` (CPU s of ``read``, ``segment``
        (smoothing to watershed) and ``measure`` (``regionprops_table``) over
        all frames), ``frames``, ``grains``, ``pixels``.
    """
    import tifffile
    from skimage.measure import regionprops_table
    from threadpoolctl import threadpool_limits

    grains = pixels = 0
    stages = {"read": 0.0, "segment": 0.0, "measure": 0.0}
    t0, c0 = time.perf_counter(), time.process_time()
    with threadpool_limits(limits=1):
        for p in paths:
            c = time.process_time()
            img = tifffile.imread(p)
            c1 = time.process_time()
            labels = script_labels(img, pixel_size_nm)
            c2 = time.process_time()
            table = regionprops_table(labels, intensity_image=img, properties=PROPERTIES)
            c3 = time.process_time()
            for k, v in (("read", c1 - c), ("segment", c2 - c1), ("measure", c3 - c2)):
                stages[k] += v
            grains += len(table["label"])
            pixels += img.size
    return {"wall": time.perf_counter() - t0, "cpu": time.process_time() - c0, "cpu_stages": stages,
            "frames": len(paths), "grains": grains, "pixels": pixels}


def accuracy(fields, pixel_size_nm: float = bu.PIXEL_SIZE_NM) -> dict:
    """Segmentation accuracy of the script and of the default chain on the same rendered fields.

    Parameters
    ----------
    fields : list of SyntheticField
        Rendered fields with their truth labels and touching pairs.

    Returns
    -------
    dict
        ``script`` and ``grainhabit``: recall, precision, median ECD error
        (%) and touching pairs split, as ``grainhabit bench accuracy``
        scores them (:func:`grainhabit.plugins.bench.accuracy.score_frame`).
    """
    from grainhabit.frame import FrameData
    from grainhabit.plugins.bench.accuracy import score_frame
    from grainhabit.plugins.preprocess import flatten_background
    from grainhabit.plugins.segment import segment_grains

    from grainhabit.plugins.synthetic.render import to_uint16

    totals = {}
    for f in fields:
        raw = to_uint16(f.image)
        frame = FrameData(source="bench.tif", sample="bench", raw=raw.astype(np.float32),
                          pixel_size_nm=pixel_size_nm)
        frame = flatten_background.grainhabit_preprocess(frame=frame, params={})
        frame = segment_grains.grainhabit_segment(frame=frame, params={})
        for name, pred in (("script", script_labels(raw, pixel_size_nm)), ("grainhabit", frame.labels)):
            s = score_frame(f.labels, pred, f.touching_pairs)
            t = totals.setdefault(name, {"n_truth": 0, "n_pred": 0, "tp": 0, "tp_pred": 0, "ecd_err": [],
                                         "pairs": 0, "pairs_ok": 0})
            for k in t:
                t[k] += s[k]
    return {name: {"recall": t["tp"] / max(t["n_truth"], 1), "precision": t["tp_pred"] / max(t["n_pred"], 1),
                   "ecd_err_pct": float(np.median(t["ecd_err"])) if t["ecd_err"] else float("nan"),
                   "pairs_split": t["pairs_ok"] / t["pairs"] if t["pairs"] else float("nan"),
                   "n_truth": t["n_truth"]}
            for name, t in totals.items()}


def print_cpu_stages(script: dict, run: dict, frames: int, out) -> None:
    """Table of CPU seconds per frame and stage: the script beside the frame tasks of ``grainhabit run``.

    The run's stages are the CPU time of the thread that ran each frame task
    (the records' ``cpu_timings``); 'frame tasks' is their sum, 'whole run'
    all CPU of the run's processes (main process and workers, cold start
    included) divided by the frames.
    """
    from grainhabit.plugins.bench.throughput import FRAME_PHASES

    a, b = script.get("cpu_stages", {}), run.get("cpu_stages", {})
    print("CPU seconds per frame and stage (the run's from its frame tasks' own threads):", file=out)
    print(f"  {'stage':<12}{'script':>9}{'run':>9}", file=out)
    for k in FRAME_PHASES:
        sa = f"{a[k] / frames:>9.3f}" if k in a else f"{'-':>9}"
        print(f"  {k:<12}{sa}{b.get(k, 0.0) / frames:>9.3f}", file=out)
    print(f"  {'frame tasks':<12}{sum(a.values()) / frames:>9.3f}{sum(b.values()) / frames:>9.3f}", file=out)
    whole = run["cpu"].get("workers", float("nan")) + run["cpu"].get("main", float("nan"))
    print(f"  {'whole run':<12}{script['cpu'] / frames:>9.3f}{whole / frames:>9.3f}   (all processes, start and "
          f"close included)", file=out)


def render_fields(n: int, size_px: int, grains: int, seed: int) -> list:
    """The fields of :func:`grainhabit.plugins.bench.harness.render_frames`, with their truth."""
    from grainhabit.plugins.synthetic.render import HABITS, make_field

    habits = {h: 1.0 for h in HABITS}
    return [make_field(grains, (size_px, size_px), bu.PIXEL_SIZE_NM, habits, bu.ECD_NM, seed=seed + i)
            for i in range(n)]


def fresh_pipeline_case(workflow, workers: int, malloc_trim: int | None = None) -> dict:
    """:func:`~grainhabit.plugins.bench.throughput.pipeline_case` in a new Python process.

    The process imports grainhabit and builds its plugin host (not timed, as the
    script's imports are not), then times the whole run: cluster start, workers,
    frames, and every import the run itself makes on the way (xarray's first dataset
    loads dask.array and, where installed, pint). A run in the benchmark's own
    process would find those already loaded by an earlier round, and its forked
    workers would start from everything the benchmark has loaded.

    Returns
    -------
    dict
        The figures of ``pipeline_case`` (through JSON: tuples come back as lists).
    """
    import json
    import subprocess
    import sys
    import tempfile
    from pathlib import Path

    with tempfile.TemporaryDirectory() as tmp:
        answer = Path(tmp) / "figures.json"
        code = "from grainhabit.plugins.bench.reference_script import _child_round; _child_round()"
        proc = subprocess.run([sys.executable, "-c", code, str(workflow), str(int(workers)),
                               "" if malloc_trim is None else str(int(malloc_trim)), str(answer)],
                              capture_output=True, text=True)
        if proc.returncode != 0 or not answer.exists():
            tail = (proc.stderr or "").strip().splitlines()[-1:] or ["no output"]
            raise RuntimeError(f"grainhabit run in a fresh process failed (exit {proc.returncode}): {tail[0]}")
        return json.loads(answer.read_text())


def _child_round() -> None:
    """Entry of :func:`fresh_pipeline_case`'s process: argv = workflow, workers, malloc_trim, answer file."""
    import json
    import sys
    from pathlib import Path

    from grainhabit.manager import make_host
    from grainhabit.plugins.bench.throughput import pipeline_case

    workflow, workers, trim, answer = sys.argv[1:5]
    figures = pipeline_case(Path(workflow), make_host(), int(workers), int(trim) if trim else None)
    Path(answer).write_text(json.dumps(figures))


def versus_script(args, root, workers: int, out) -> dict:
    """Interleaved rounds of the script and ``grainhabit run``; print throughputs, ratio and accuracy.

    Parameters
    ----------
    args : argparse.Namespace
        ``frames``, ``size``, ``grains``, ``seed``, ``repeat``,
        ``accuracy_frames``, ``malloc_trim`` of ``grainhabit bench throughput``.
    root : Path
        Working folder.
    workers : int
        Local workers of the pipeline run.
    out : file

    Returns
    -------
    dict
        Figures (``script``, ``pipeline`` rounds, ``ratio``, ``accuracy``, ``ok``).
    """
    from grainhabit.plugins.synthetic.render import to_uint16

    t0 = time.perf_counter()
    fields = render_fields(args.frames, args.size, args.grains, args.seed)
    paths = bu.write_frames(root / "data" / "bench", [to_uint16(f.image) for f in fields])
    print(f"grainhabit bench throughput --versus-script: {args.frames} synthetic frames of {args.size}x{args.size} "
          f"px, {args.grains} grains each (invented data; rendered in {time.perf_counter() - t0:.1f} s), "
          f"{bu.load_text()}", file=out)
    warm = bu.write_frames(root / "warm" / "bench", [to_uint16(fields[0].image)], 1, start=1)
    script_loop(warm)  # imports and first calls, untimed (a script's own start-up is not charged to it)
    flow = bu.write_workflow(root / "all.yaml", root / "data", root / "out" / "all.zarr", workers=workers,
                             name="bench-versus", start_method=args.start_method)
    scripts, runs = [], []
    for r in range(args.repeat):
        l0 = bu.load_average()
        s = script_loop(paths)
        s.update(load_before=l0, load_after=bu.load_average())
        scripts.append(s)
        c = fresh_pipeline_case(flow, workers, args.malloc_trim)
        runs.append(c)
        print(f"  round {r + 1}: script {s['wall']:.1f} s ({s['grains']} grains), grainhabit run "
              f"{c['wall']:.1f} s with cold start ({c['grains']} grains, {c['frames_ok']}/{c['frames']} frames ok); "
              f"ratio {s['wall'] / c['wall']:.2f}x; load {s['load_before'][0]:.2f}/{c['load_after'][0]:.2f}",
              file=out, flush=True)
    s = min(scripts, key=lambda x: x["wall"])
    c = min(runs, key=lambda x: x["wall"])
    ratio = s["wall"] / c["wall"]
    fps_s, fps_c = args.frames / s["wall"], args.frames / c["wall"]
    print(f"hand-written serial script, 1 core: {fps_s:.3f} frames/s ({s['wall']:.1f} s, best of {args.repeat})",
          file=out)
    from grainhabit.executors import start_method

    print(f"grainhabit run, {c['workers']} workers ({start_method(args.start_method)}ed), cold start included: "
          f"{fps_c:.3f} frames/s ({c['wall']:.1f} s; "
          f"cluster start {c['host'].get('cluster_start', 0.0):.1f} s, worker preparation "
          f"{c['host'].get('worker_prepare', 0.0):.1f} s)", file=out)
    from grainhabit.plugins.bench.throughput import HOST_PHASES

    print("  its phases, s: " + ", ".join(f"{k.replace('_', ' ')} {c['host'].get(k, 0.0):.2f}" for k in HOST_PHASES)
          + f"; frames (workers ready to the last result) {c['processing']:.2f}", file=out)
    from grainhabit.plugins.habit.disk_cache import cache_folder

    folder = cache_folder()
    print("  (each round runs in a new Python process, its workers forked or spawned from it; the habit model tables "
          + (f"are read from the disk cache in {folder}, as on any machine after its first run)" if folder else
             "are built by every worker: GRAINHABIT_CACHE=off)"), file=out)
    ok = ratio >= TARGET_RATIO
    print(f"throughput ratio grainhabit run / script: {ratio:.2f}x (each round: "
          + ", ".join(f"{a['wall'] / b['wall']:.2f}x" for a, b in zip(scripts, runs))
          + f"); target >= {TARGET_RATIO}x: {'met' if ok else 'MISSED'}, goal {GOAL_RATIO}x: "
          f"{'met' if ratio >= GOAL_RATIO else 'not met'}", file=out)
    cpu_run = c["cpu"].get("workers", float("nan")) + c["cpu"].get("main", float("nan"))
    cpu_ratio = c["workers"] * s["cpu"] / cpu_run
    print(f"CPU seconds per frame: script {s['cpu'] / args.frames:.2f}, grainhabit run {cpu_run / args.frames:.2f} "
          f"(workers and main process); on {c['workers']} cores nobody else uses, the ratio would be at most "
          f"{cpu_ratio:.2f}x ({c['workers']} x script CPU / run CPU; a shared machine gives each process its share)",
          file=out)
    print_cpu_stages(s, c, args.frames, out)
    acc = accuracy(fields[: max(0, args.accuracy_frames)]) if args.accuracy_frames > 0 else {}
    if acc:
        print(f"accuracy on the first {min(args.accuracy_frames, len(fields))} of these fields (seeds {args.seed}..), "
              "IoU >= 0.5, border grains left out:", file=out)
        for name, a in acc.items():
            print(f"  {name:<11} recall {a['recall']:.3f}  precision {a['precision']:.3f}  median ECD error "
                  f"{a['ecd_err_pct']:.2f} %  touching pairs split {a['pairs_split']:.2f}  ({a['n_truth']} grains)",
                  file=out)
    print(f"{bu.load_text()} at the end", file=out)
    return {"script": scripts, "pipeline": runs, "ratio": ratio, "cpu_ratio": cpu_ratio, "accuracy": acc, "ok": ok,
            "target": TARGET_RATIO, "goal": GOAL_RATIO}


__all__ = ["script_labels", "script_loop", "accuracy", "print_cpu_stages", "render_fields", "versus_script"]
