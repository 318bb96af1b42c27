"""Benchmark ``grainhabit bench realdata``: the grain finder on real micrographs with hand-drawn masks.

Scores the default preprocess and segment steps with
:func:`grainhabit.plugins.survey.score_masks.score_folder` (centroid inside
the particle's mask, at most one grain per particle, border objects left
out, median ECD error; frames with particles, no grain and no QC flag are
*silently empty*); pictures are read as ``grainhabit run`` reads them (an info
strip cropped, drawn marks masked, the file's own calibration). By default it reads the EMPS training images kept beside
the repository (``../shared/realdata/emps_train``: images and instance masks;
B. Yildirim and J. M. Cole, J. Chem. Inf. Model. 61 (2021) 1136,
doi:10.1021/acs.jcim.0c01455), scored in pixels; any other folder pair can
be given. The data never enter the repository; without them the benchmark
says so and exits 0.

``--outline outer`` scores outlines drawn to the foot of the edge, the way
hand-drawn masks are (segment-grains' ``outline`` parameter): the default
half-height outlines are a median 1.3 px inside the EMPS masks.

Targets: recall >= 0.90, precision >= 0.90, median ECD error <= 5 %, no
silently empty frame. ``--check`` makes the exit code 1 when one is missed.
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path

from grainhabit import hookimpl

GRAINHABIT_API = 1

TARGETS = {"recall": 0.90, "precision": 0.90, "ecd_error_median": 0.05, "silently_empty": 0}
#: Where the shared real data sit, relative to the repository root.
DEFAULT_DATA = Path(__file__).resolve().parents[2].parent / "shared" / "realdata" / "emps_train"


def run(argv) -> int:
    """Entry point of ``grainhabit bench realdata``; returns the exit code."""
    from grainhabit.plugins.survey.score_masks import format_summary, score_folder, unscored_lines

    ap = argparse.ArgumentParser(prog="grainhabit bench realdata",
                                 description="Recall, precision and ECD error of the default chain on real "
                                             "micrographs with instance masks.")
    ap.add_argument("--images", default=str(DEFAULT_DATA / "images"), help="folder of pictures")
    ap.add_argument("--masks", default=str(DEFAULT_DATA / "segmaps"), help="folder of instance masks")
    ap.add_argument("--every", type=int, default=1, help="every N-th picture only (default 1: all)")
    ap.add_argument("--offset", type=int, default=0,
                    help="start the every-N-th selection at this picture (default 0), for a second subset")
    ap.add_argument("--pixel-size-nm", type=float, default=None,
                    help="pixel size used instead of the files' own (default: each file's own, 1 where a file "
                         "states none: pixels)")
    ap.add_argument("--outline", choices=("half-height", "outer"), default="half-height",
                    help="segment-grains' outline convention (default half-height; outer: drawn to the edge's foot, "
                         "as hand-drawn masks are)")
    ap.add_argument("--json", default=None, help="also write the per-frame result to this JSON file")
    ap.add_argument("--check", action="store_true", help="exit 1 if a target is missed")
    args = ap.parse_args(argv)
    if not Path(args.images).is_dir() or not Path(args.masks).is_dir():
        print(f"real-data benchmark skipped: {args.images} or {args.masks} is not there")
        return 0
    if not 0 <= args.offset < args.every:
        print(f"--offset must be in 0..{args.every - 1}, got {args.offset}")
        return 2
    steps = [("flatten-background", {}), ("segment-grains", {"outline": args.outline})]
    res = score_folder(Path(args.images), Path(args.masks), args.pixel_size_nm, args.every, steps=steps,
                       offset=args.offset)
    print(f"grain finding on {args.images} (every {args.every}, offset {args.offset}, {args.outline} outlines):")
    print(format_summary(res))
    for line in unscored_lines(res, args.masks):
        print(f"  {line}")
    ok = (res["recall"] >= TARGETS["recall"] and res["precision"] >= TARGETS["precision"]
          and res["ecd_error_median"] <= TARGETS["ecd_error_median"]
          and res["silently_empty"] <= TARGETS["silently_empty"])
    print("targets (recall, precision >= 0.90; median ECD error <= 5 %; no silently empty frame): "
          + ("met" if ok else "MISSED"))
    if args.json:
        Path(args.json).write_text(json.dumps(res, indent=1, allow_nan=True))
    return 1 if (args.check and not ok) else 0


@hookimpl
def grainhabit_benchmarks():
    """Offer ``grainhabit bench realdata``."""
    return {"realdata": run}
