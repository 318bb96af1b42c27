"""Benchmark ``grainhabit bench profile``: where the default chain spends its time.

Synthetic fields (the renderer of ``grainhabit bench accuracy``; invented
data) go through the serial kernel loop of ``grainhabit bench throughput``
(read, then every default per-frame step, one BLAS/OpenMP thread) under the
standard library's deterministic profiler, :mod:`cProfile`, after one
untimed warm-up frame (a mirrored copy of the first, so that imports and
memoised fits are not counted). Printed: the wall and CPU time per frame of
every stage, then the functions with the largest own time and the largest cumulative
time, in milliseconds per frame. ``--save PATH`` keeps the raw profile for
:mod:`pstats` or a viewer such as snakeviz.

cProfile charges a small cost to every Python call, so per-frame totals run
5-15 % above ``bench throughput``'s; the ranking is what it is for.
"""

from __future__ import annotations

import argparse
import cProfile
import pstats
import shutil
import sys
import tempfile
from pathlib import Path

from grainhabit import hookimpl
from grainhabit.plugins.bench import harness as bu

GRAINHABIT_API = 1
#: The name this plugin is registered under.
NAME = "bench-profile"


def profile_chain(paths, warm) -> tuple[pstats.Stats, dict]:
    """Profile the serial kernel loop over ``paths`` after one warm-up frame.

    Parameters
    ----------
    paths : sequence of path-like
        TIFF files, timed.
    warm : sequence of path-like
        Run first, untimed.

    Returns
    -------
    stats : pstats.Stats
        The profile of the timed loop.
    loop : dict
        :func:`grainhabit.plugins.bench.throughput.serial_loop`'s figures (stage totals in s).
    """
    from grainhabit.plugins.bench.throughput import serial_loop

    serial_loop(warm)
    prof = cProfile.Profile()
    prof.enable()
    loop = serial_loop(paths)
    prof.disable()
    return pstats.Stats(prof), loop


def top_functions(stats: pstats.Stats, key: str, n: int, frames: int) -> list[tuple[str, float, float, int]]:
    """The ``n`` functions with the largest ``key`` time.

    Parameters
    ----------
    stats : pstats.Stats
    key : {"tottime", "cumtime"}
        Own time, or time including callees.
    n : int
    frames : int
        Divides the times (per frame).

    Returns
    -------
    list of (name, own ms per frame, cumulative ms per frame, calls per frame)
        ``name`` is ``module:line(function)`` with the path shortened to
        the package.
    """
    rows = []
    for (file, line, func), (_, ncalls, tt, ct, _) in stats.stats.items():
        rows.append((_short(file, line, func), 1000 * tt / frames, 1000 * ct / frames, ncalls / frames))
    col = 1 if key == "tottime" else 2
    rows.sort(key=lambda r: r[col], reverse=True)
    return rows[:n]


def _short(file: str, line: int, func: str) -> str:
    if file == "~":
        return func  # a built-in
    parts = Path(file).parts
    for anchor in ("site-packages", "main", "lib"):
        if anchor in parts:
            parts = parts[len(parts) - parts[::-1].index(anchor):]
            break
    return f"{'/'.join(parts[-3:])}:{line}({func})"


def run(argv: list[str]) -> int:
    """Entry point of ``grainhabit bench profile``; returns the exit code."""
    ap = argparse.ArgumentParser(prog="grainhabit bench profile",
                                 description="Profile the default per-frame chain (cProfile) on synthetic "
                                             "frames (invented data): time per stage, then the costliest "
                                             "functions in ms per frame.")
    ap.add_argument("--frames", type=int, default=8, help="frames (default 8)")
    ap.add_argument("--size", type=int, default=768, help="frame side in pixels (default 768)")
    ap.add_argument("--seed", type=int, default=0, help="first seed of the rendered fields (default 0)")
    ap.add_argument("--top", type=int, default=20, help="functions listed per ranking (default 20)")
    ap.add_argument("--save", metavar="PATH", help="write the raw profile (pstats format) here")
    args = ap.parse_args(argv)
    if args.frames < 1 or args.size < 64 or args.top < 1:
        ap.error("--frames and --top must be >= 1, --size >= 64")
    out = sys.stdout
    root = Path(tempfile.mkdtemp(prefix="grainhabit-profile-"))
    try:
        images = bu.render_frames(args.frames, args.size, seed=args.seed)
        paths = bu.write_frames(root / "data" / "bench", images)
        warm = bu.write_frames(root / "warm" / "bench", images[:1], 1, start=1)
        stats, loop = profile_chain(paths, warm)
        if args.save:
            stats.dump_stats(args.save)
        n = loop["frames"]
        print(f"grainhabit bench profile: {n} synthetic frames of {args.size}x{args.size} px "
              f"(invented data), {loop['grains'] / n:.0f} grains per frame, one thread, under cProfile",
              file=out)
        print("per frame, ms: " + ", ".join(f"{k} {1000 * v / n:.0f}" for k, v in loop["stages"].items())
              + f"; whole frame {1000 * loop['wall'] / n:.0f}", file=out)
        print("per frame, ms of CPU: " + ", ".join(f"{k} {1000 * v / n:.0f}" for k, v in loop["cpu_stages"].items())
              + f"; whole frame {1000 * loop['cpu'] / n:.0f} (CPU time moves less than wall time on a shared "
              f"machine)", file=out)
        for key, title in (("tottime", "own time"), ("cumtime", "cumulative time")):
            print(f"\nlargest {title}, ms per frame (own, cumulative, calls per frame):", file=out)
            for name, tt, ct, calls in top_functions(stats, key, args.top, n):
                print(f"  {tt:8.1f} {ct:8.1f} {calls:9.1f}  {name}", file=out)
        if args.save:
            print(f"\nraw profile written to {args.save} (python -m pstats {args.save})", file=out)
    finally:
        shutil.rmtree(root, ignore_errors=True)
    return 0


@hookimpl
def grainhabit_benchmarks():
    """Offer ``grainhabit bench profile``."""
    return {"profile": run}


__all__ = ["profile_chain", "top_functions", "run"]
