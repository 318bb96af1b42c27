"""``grainhabit demo``: an invented survey, processed end to end.

The scenario is invented for demonstration: a pilot coating line, "Line
Kestrel", ran three trial precipitation batches that were meant to give
cubic (KB-01), cuboctahedral/octahedral (KB-02) and tabular (KB-03) grains.
Its micrographs are rendered here from 3-D crystal shapes
(:mod:`grainhabit.plugins.synthetic.render`), so the habits in them are genuine; no real
sample, instrument or process lies behind them.

Each batch is written in a different TIFF flavour, to exercise the
calibration paths: KB-01 as plain TIFF with resolution tags (cm), KB-02 as
OME-TIFF (physical size in µm), KB-03 as ImageJ TIFF (unit "nm") and in
bright-field TEM contrast (dark grains on a bright background).
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

import numpy as np
import tifffile

from grainhabit import hookimpl

GRAINHABIT_API = 1
#: The name this plugin is registered under.
NAME = "demo"
__version__ = "1.0"

SAFETY_NOTE = (
    "The batches are invented: no recipe is implied. Real precipitations use silver nitrate (corrosive, "
    "stains skin, harmful to aquatic life) and halide solutions; follow your site's chemical-safety rules, "
    "the safety data sheets and local regulations."
)

#: The invented batches: name, habit mix, median ECD (nm), contrast, TIFF flavour.
BATCHES = (
    ("KB-01", {"cube": 0.92, "cuboctahedron": 0.04, "irregular": 0.04}, 260.0, "bright", "resolution"),
    ("KB-02", {"cuboctahedron": 0.55, "octahedron": 0.35, "cube": 0.05, "irregular": 0.05}, 300.0, "bright", "ome"),
    ("KB-03", {"tabular_hexagon": 0.70, "tabular_triangle": 0.15, "rod": 0.05, "irregular": 0.10}, 420.0,
     "dark", "imagej"),
)

WORKFLOW_TEMPLATE = """\
# Invented demo survey (grainhabit demo): three trial batches of an invented
# pilot coating line, rendered from 3-D crystal shapes. Not real data.
version: 1
name: kestrel-demo
note: "Invented demo data: trial batches of an invented pilot coating line, rendered from 3-D crystal shapes."
input:
  paths: ["{data}/**/*.tif"]
  sample: "{{parent}}"        # the batch folder names the sample
output:
  results: {results}
  report: {report}
execution:
  scheduler: local
  workers: auto
"""


def write_frame(path: Path, image_u16: np.ndarray, pixel_size_nm: float, flavour: str) -> None:
    """Write one frame as TIFF with the calibration in the given flavour.

    ``resolution``: XResolution in pixels per cm; ``ome``: OME-XML
    PhysicalSizeX in µm; ``imagej``: ImageJ ``unit='nm'`` with
    XResolution in pixels per nm.
    """
    path.parent.mkdir(parents=True, exist_ok=True)
    if flavour == "resolution":
        ppcm = 1e7 / pixel_size_nm
        tifffile.imwrite(path, image_u16, resolution=(ppcm, ppcm), resolutionunit="CENTIMETER",
                         description="invented demo frame (grainhabit demo)")
    elif flavour == "ome":
        um = pixel_size_nm / 1000.0
        tifffile.imwrite(path.with_name(path.stem + ".ome.tif"), image_u16, ome=True,
                         metadata={"axes": "YX", "PhysicalSizeX": um, "PhysicalSizeXUnit": "µm",
                                   "PhysicalSizeY": um, "PhysicalSizeYUnit": "µm"})
    elif flavour == "imagej":
        per_nm = 1.0 / pixel_size_nm
        tifffile.imwrite(path, image_u16, imagej=True, resolution=(per_nm, per_nm), metadata={"unit": "nm"})
    else:
        raise ValueError(f"unknown TIFF flavour {flavour!r}")


def make_survey(out: Path, frames_per_batch: int = 3, size_px: int = 768, pixel_size_nm: float = 4.0,
                grains_per_frame: int = 30, seed: int = 2026) -> list[Path]:
    """Render the invented survey's frames into ``out``; return the files."""
    from grainhabit.plugins.synthetic.render import make_field, to_uint16

    files = []
    for b, (name, habits, ecd, contrast, flavour) in enumerate(BATCHES):
        n = grains_per_frame if ecd < 400 else int(grains_per_frame * 0.6)
        for i in range(frames_per_batch):
            field = make_field(n, (size_px, size_px), pixel_size_nm, habits, ecd, contrast=contrast,
                               seed=seed + 100 * b + i)
            path = out / name / f"{name.lower()}_field{i + 1:02d}.tif"
            write_frame(path, to_uint16(field.image), pixel_size_nm, flavour)
            files.append(path)
    return files


def print_summary(results: str, out=sys.stdout) -> None:
    """Print the per-sample summary table of a results store."""
    from grainhabit.results import open_results

    groups = open_results(results)
    s = groups["summary"]
    habits = [str(h) for h in s["habit"].values]
    print(f"\n{'sample':<8}{'grains':>7}{'ECD mean':>10}{'COV %':>7}{'D50':>7}{'D32':>7}{'alpha':>7}"
          "  main habits by number (by area)", file=out)
    for i, sample in enumerate(s["sample"].values):
        nf = s["habit_number_fraction"].values[i]
        af = s["habit_area_fraction"].values[i]
        order = np.argsort(-np.nan_to_num(nf))[:3]
        main = ", ".join(f"{habits[j]} {100 * nf[j]:.0f}% ({100 * af[j]:.0f}%)" for j in order if nf[j] > 0)
        alpha = s["alpha_median"].values[i]
        print(f"{str(sample):<8}{int(s['grain_count'].values[i]):>7}{s['ecd_mean_nm'].values[i]:>10.0f}"
              f"{s['ecd_cov_pct'].values[i]:>7.1f}{s['ecd_d50_nm'].values[i]:>7.0f}{s['sauter_d32_nm'].values[i]:>7.0f}"
              f"{alpha:>7.2f}  {main}", file=out)
    print("(sizes in nm; statistics exclude edge-cut grains)", file=out)


def _cmd_demo(args) -> int:
    from grainhabit.manager import make_host
    from grainhabit.logs import setup
    from grainhabit.runner import run
    from grainhabit.workflow import validate

    out = Path(args.out).resolve()
    t0 = time.monotonic()
    print("grainhabit demo: an INVENTED survey of the invented pilot line 'Kestrel' (three trial batches).")
    print("  " + SAFETY_NOTE)
    files = make_survey(out / "data", frames_per_batch=args.frames)
    print(f"  rendered {len(files)} frames into {out / 'data'} ({time.monotonic() - t0:.1f} s)")
    wf = out / "workflow.yaml"
    wf.write_text(WORKFLOW_TEMPLATE.format(data="data", results="results/survey.zarr", report="results/report"))
    host = args.host if getattr(args, "host", None) is not None else make_host()
    overrides = {"execution": {"workers": args.workers, "scheduler": args.scheduler}}
    plan = validate(str(wf), host, overrides)
    (out / "results").mkdir(parents=True, exist_ok=True)
    setup(log_file=str(out / "results" / "survey.log"))
    outcome = run(plan, host, fresh=True)
    print_summary(outcome.results)
    print(f"\nresults: {outcome.results}")
    if outcome.report:
        print(f"report:  {outcome.report}")
    print(f"workflow: {wf} (run it again with: grainhabit run {os.path.relpath(wf)})")
    print(f"{outcome.line()}; demo total {time.monotonic() - t0:.1f} s")
    return outcome.exit_code


@hookimpl
def grainhabit_add_commands(subparsers):
    p = subparsers.add_parser(
        "demo", help="render an invented survey and run the default workflow on it",
        description="Render a small INVENTED survey (three trial batches of an invented pilot coating line, "
                    "grains rendered from 3-D crystal shapes), run the default workflow on it and print the "
                    "per-sample summary and where the results and report are.")
    p.add_argument("--out", default="grainhabit-demo", help="folder to write into (default ./grainhabit-demo)")
    p.add_argument("--frames", type=int, default=3, help="frames per batch (default 3)")
    p.add_argument("--workers", type=int, default=None, help="local worker processes (default: all cores)")
    p.add_argument("--scheduler", default=None, help="'local' (default), 'serial' or tcp://HOST:PORT")
    p.set_defaults(handler=_cmd_demo)
