"""Benchmark ``grainhabit bench sizes``: does a frame's cost grow with its pixels and grains, not faster?

Invented frames of 1024, 2048, 4096 and 8192 px (by default) at one grain
density go through the default per-frame chain (the kernel loop of
``grainhabit bench throughput``: TIFF read, then every default step with its
default parameters, one BLAS/OpenMP thread) in this process. Every frame is
a mosaic of ``tile`` px fields rendered by :mod:`grainhabit.plugins.synthetic.render` (with
no illumination ramp of their own), each field a mirror, quarter turn or
small shift of a few rendered ones (:func:`grainhabit.plugins.bench.harness.variant`),
and one smooth illumination ramp across the whole mosaic: the grain density,
size distribution and noise are the same at every size, and an 8192 px
frame costs a few renders instead of one render of 2,700 grains (which
takes minutes).

The process reuses freed frame-sized arrays as a worker does
(:func:`grainhabit.executors.keep_freed_memory`). Cost is CPU time of this process, so that another program on a shared
machine changes it less than the wall clock; both are printed. The tiles of
a frame above the segment step's ``tile_px`` run one after another here
(``tile_workers: 1``): in a run they are spread over the cluster's workers,
and two threads of one process on two busy cores cost about 30 % more CPU
for the same tiles (measured on a 4096 px frame, 10.8 against 8.1 s). Sizes are run in
interleaved rounds (``--rounds``, default 2), smallest first, and the
cheapest round of each size is kept. Printed per size: grains found, CPU
seconds, seconds per megapixel and per grain, the cost per megapixel
relative to the smallest size, and the CPU seconds per megapixel of every
stage.

Target (issue: huge frames): the largest frame costs at most 1.2x the
smallest per megapixel. ``--check`` makes the exit code 1 when it is missed.
"""

from __future__ import annotations

import argparse
import shutil
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from grainhabit import hookimpl
from grainhabit.plugins.bench import harness as bu

GRAINHABIT_API = 1

SIZES = (1024, 2048, 4096, 8192)
#: Largest / smallest frame's CPU seconds per megapixel, at most.
TARGET_RATIO = 1.2
#: Peak-to-peak relative amplitude of the mosaic's illumination ramp (as the renderer's default).
GRADIENT = 0.3


def render_tiles(n: int, tile_px: int, seed: int = 0) -> list[np.ndarray]:
    """``n`` rendered fields of ``tile_px`` px without an illumination ramp (float, nominal [0, 1]).

    Parameters
    ----------
    n : int
        Fields (seeds ``seed .. seed + n - 1``).
    tile_px : int
        Side of each field (px).
    seed : int

    Returns
    -------
    list of ndarray of float64, shape (tile_px, tile_px)
    """
    from grainhabit.plugins.synthetic.render import HABITS, make_field

    habits = {h: 1.0 for h in HABITS}
    g = bu.grains_for(tile_px)
    return [make_field(g, (tile_px, tile_px), bu.PIXEL_SIZE_NM, habits, bu.ECD_NM, seed=seed + i,
                       gradient=0.0).image for i in range(n)]


def mosaic(tiles: list[np.ndarray], size_px: int, gradient: float = GRADIENT, seed: int = 0) -> np.ndarray:
    """A square frame of ``size_px`` px tiled with variants of ``tiles``, under one illumination ramp.

    Parameters
    ----------
    tiles : list of ndarray, shape (t, t)
        Fields without a ramp of their own; ``size_px`` must be a multiple of t.
    size_px : int
        Frame side (px).
    gradient : float
        The frame is multiplied by ``1 + gradient * (ramp - 1/2)``, ``ramp``
        rising linearly from 0 to 1 along a direction drawn from ``seed``.
    seed : int

    Returns
    -------
    ndarray of uint16, shape (size_px, size_px)
        Block ``k`` (row-major) is ``variant(tiles[k % m], k // m)``.
    """
    from grainhabit.plugins.synthetic.render import to_uint16

    t = tiles[0].shape[0]
    if size_px % t:
        raise ValueError(f"size_px {size_px} is not a multiple of the tile side {t}")
    k = size_px // t
    out = np.empty((size_px, size_px), np.float64)
    for i in range(k * k):
        r, c = divmod(i, k)
        out[r * t:(r + 1) * t, c * t:(c + 1) * t] = bu.variant(tiles[i % len(tiles)], i // len(tiles))
    theta = np.random.default_rng(seed).uniform(0, 2 * np.pi)
    yy, xx = np.mgrid[0:size_px, 0:size_px].astype(np.float32) / max(size_px - 1, 1)
    ramp = np.cos(theta) * xx + np.sin(theta) * yy
    ramp = (ramp - ramp.min()) / max(float(np.ptp(ramp)), 1e-12)
    out *= 1.0 + gradient * (ramp - 0.5)
    return to_uint16(out)


def time_frame(path, chain) -> dict:
    """CPU and wall seconds of the default chain on one TIFF (kernel loop, one BLAS thread).

    Returns
    -------
    dict
        ``cpu``, ``wall`` (s), ``stages`` (stage -> CPU s), ``grains``, ``pixels``.
    """
    import tifffile
    from threadpoolctl import threadpool_limits

    from grainhabit.frame import FrameData

    stages = {}
    w0, c_start = time.perf_counter(), time.process_time()
    with threadpool_limits(limits=1):
        c0 = time.process_time()
        raw = np.asarray(tifffile.imread(path), dtype=np.float32)
        frame = FrameData(source=str(path), sample="bench", raw=raw, pixel_size_nm=bu.PIXEL_SIZE_NM)
        stages["read"] = time.process_time() - c0
        for stage, func, params in chain:
            if stage == "segment":
                params = dict(params, tile_workers=1)  # the tiles' cost, not their latency (see the module notes)
            c0 = time.process_time()
            frame = func(frame=frame, params=params)
            stages[stage] = time.process_time() - c0
    return {"cpu": time.process_time() - c_start, "wall": time.perf_counter() - w0, "stages": stages,
            "grains": frame.n_grains, "pixels": raw.size}


def run(argv: list[str]) -> int:
    """Entry point of ``grainhabit bench sizes``; returns the exit code."""
    ap = argparse.ArgumentParser(prog="grainhabit bench sizes",
                                 description="CPU seconds per megapixel and per grain of the default chain on "
                                             "invented frames of growing size at one grain density.")
    ap.add_argument("--sizes", default=",".join(map(str, SIZES)),
                    help=f"frame sides in px, comma-separated, multiples of --tile (default {','.join(map(str, SIZES))})")
    ap.add_argument("--tile", type=int, default=1024, help="side of the rendered fields of the mosaic (default 1024)")
    ap.add_argument("--fields", type=int, default=4, help="distinct rendered fields (default 4)")
    ap.add_argument("--rounds", type=int, default=2, help="interleaved rounds; the cheapest is kept (default 2)")
    ap.add_argument("--seed", type=int, default=0, help="first seed of the rendered fields (default 0)")
    ap.add_argument("--json", metavar="PATH", help="write the figures to this JSON file")
    ap.add_argument("--check", action="store_true", help=f"exit 1 if the largest frame costs more than "
                                                          f"{TARGET_RATIO}x the smallest per megapixel")
    args = ap.parse_args(argv)
    try:
        sizes = sorted({int(s) for s in args.sizes.split(",") if s.strip()})
    except ValueError:
        ap.error(f"--sizes must be integers separated by commas, got {args.sizes!r}")
    if not sizes or args.tile < 64 or args.fields < 1 or args.rounds < 1 or any(s % args.tile for s in sizes):
        ap.error("--sizes must be multiples of --tile (>= 64); --fields and --rounds >= 1")
    from grainhabit.executors import keep_freed_memory
    from grainhabit.plugins.bench.throughput import default_chain

    keep_freed_memory()  # as every frame task does in a worker
    out = sys.stdout
    root = Path(tempfile.mkdtemp(prefix="grainhabit-sizes-"))
    try:
        t0 = time.perf_counter()
        tiles = render_tiles(args.fields, args.tile, args.seed)
        paths = {}
        for s in sizes:
            paths[s] = bu.write_frames(root / f"s{s}", [mosaic(tiles, s, seed=args.seed)], prefix="frame")[0]
        print(f"grainhabit bench sizes: invented frames of {', '.join(map(str, sizes))} px at "
              f"{bu.DENSITY_PER_MPX:g} grains per megapixel (mosaics of {args.fields} rendered {args.tile} px "
              f"fields; made in {time.perf_counter() - t0:.0f} s), default chain in this process, "
              f"{bu.load_text()}", file=out)
        chain = default_chain()
        time_frame(bu.write_frames(root / "warm", [bu.variant(mosaic(tiles[:1], args.tile), 5)],
                                   prefix="warm")[0], chain)
        rounds = {s: [] for s in sizes}
        for r in range(args.rounds):
            for s in sizes:
                res = time_frame(paths[s], chain)
                res["load"] = bu.load_average()
                rounds[s].append(res)
                print(f"  round {r + 1}: {s} px {res['cpu']:.1f} CPU s, {res['wall']:.1f} s wall, "
                      f"load {res['load'][0]:.2f}", file=out, flush=True)
        best = {s: min(v, key=lambda x: x["cpu"]) for s, v in rounds.items()}
        base = best[sizes[0]]["cpu"] / (best[sizes[0]]["pixels"] / 1e6)
        stage_names = list(best[sizes[0]]["stages"])
        print(f"\ncheapest of {args.rounds} rounds; CPU seconds of this process:", file=out)
        print(f"{'size px':>8}{'grains':>8}{'CPU s':>9}{'wall s':>9}{'s/Mpx':>8}{'ms/grain':>10}{'x smallest':>11}"
              f"   s/Mpx by stage: " + " ".join(stage_names), file=out)
        table = {}
        for s in sizes:
            b = best[s]
            mpx = b["pixels"] / 1e6
            per_mpx = b["cpu"] / mpx
            table[s] = {"grains": b["grains"], "cpu": b["cpu"], "wall": b["wall"], "s_per_mpx": per_mpx,
                        "ms_per_grain": 1000 * b["cpu"] / max(b["grains"], 1), "ratio": per_mpx / base,
                        "stages_s_per_mpx": {k: v / mpx for k, v in b["stages"].items()}}
            t = table[s]
            print(f"{s:>8}{t['grains']:>8}{t['cpu']:>9.1f}{t['wall']:>9.1f}{per_mpx:>8.3f}{t['ms_per_grain']:>10.1f}"
                  f"{t['ratio']:>10.2f}x   " + " ".join(f"{v:.3f}" for v in t["stages_s_per_mpx"].values()),
                  file=out)
        ratio = table[sizes[-1]]["ratio"]
        ok = ratio <= TARGET_RATIO
        print(f"\n{sizes[-1]} px frame per megapixel: {ratio:.2f}x the {sizes[0]} px frame; target <= "
              f"{TARGET_RATIO}x: {'met' if ok else 'MISSED'}; {bu.load_text()} at the end", file=out)
        bu.write_figures(args.json, {"benchmark": "sizes", "table": table, "rounds": rounds, "ratio": ratio,
                                     "target": TARGET_RATIO})
    finally:
        shutil.rmtree(root, ignore_errors=True)
    return 1 if (args.check and not ok) else 0


@hookimpl
def grainhabit_benchmarks():
    """Offer ``grainhabit bench sizes``."""
    return {"sizes": run}


__all__ = ["render_tiles", "mosaic", "time_frame", "run"]
