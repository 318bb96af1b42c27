"""``grainhabit demo``: an invented survey of eight nights, processed end to end.

The scenario is invented for demonstration: a pilot coating line, "Line
Kestrel", makes two invented products, ``kestrel-cubic-260`` (cubic grains
of about 260 nm) every night and ``kestrel-tabular-420`` (hexagonal tabular
plates of about 420 nm) on two nights, and on the last night one trial
batch of a product nobody has specified yet. Its micrographs are rendered
here from 3-D crystal shapes (:mod:`grainhabit.plugins.synthetic.render`),
so the habits in them are genuine; no real sample, instrument or process
lies behind them. The spec file :data:`SPEC_TEXT` (also shipped as
``workflows/specs/demo-products.yaml``) holds the invented products' limits.

The story the demo tells: the cubic product's size creeps up over the
last three nights: the control chart flags it (a Western Electric rule)
and the last two batches are undecided or fail on their D50; one tabular
batch came out with too many triangular plates (it fails); the trial batch
matches no product (no verdict).

The batches are written in different TIFF flavours, to exercise the
calibration paths: plain TIFF with resolution tags (cm), OME-TIFF
(physical size in µm), ImageJ TIFF (unit "nm", dark grains on a bright
background as in bright-field TEM).
"""

from __future__ import annotations

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
__version__ = "2.0"

SAFETY_NOTE = (
    "The batches and products are invented: no recipe is implied. Real precipitations use silver nitrate "
    "(corrosive, stains skin, harmful to aquatic life) and halide solutions; follow your site's chemical-safety "
    "rules, the safety data sheets and local regulations."
)

NIGHTS = tuple(f"2026-11-{d:02d}" for d in range(21, 29))  # eight invented nights

_CUBIC = {"cube": 0.92, "cuboctahedron": 0.04, "irregular": 0.04}
_TABULAR = {"tabular_hexagon": 0.80, "tabular_triangle": 0.08, "rod": 0.02, "irregular": 0.10}
_TABULAR_OFF = {"tabular_hexagon": 0.20, "tabular_triangle": 0.65, "irregular": 0.15}
_TRIAL = {"cuboctahedron": 0.55, "octahedron": 0.35, "cube": 0.05, "irregular": 0.05}

#: The invented batches: night, name, habit mix, median ECD (nm), frames, contrast, TIFF flavour.
#: The cubic product's size creeps up over the last three nights.
BATCHES = (
    (NIGHTS[0], "KB-01", _CUBIC, 258.0, 1, "bright", "resolution"),
    (NIGHTS[1], "KB-02", _CUBIC, 262.0, 1, "bright", "resolution"),
    (NIGHTS[1], "KT-01", _TABULAR, 420.0, 1, "dark", "imagej"),
    (NIGHTS[2], "KB-03", _CUBIC, 256.0, 1, "bright", "resolution"),
    (NIGHTS[3], "KB-04", _CUBIC, 261.0, 1, "bright", "resolution"),
    (NIGHTS[4], "KB-05", _CUBIC, 259.0, 1, "bright", "resolution"),
    (NIGHTS[4], "KT-02", _TABULAR_OFF, 430.0, 1, "dark", "imagej"),
    (NIGHTS[5], "KB-06", _CUBIC, 272.0, 1, "bright", "resolution"),
    (NIGHTS[6], "KB-07", _CUBIC, 284.0, 1, "bright", "resolution"),
    (NIGHTS[7], "KB-08", _CUBIC, 305.0, 1, "bright", "resolution"),
    (NIGHTS[7], "KX-01", _TRIAL, 300.0, 1, "bright", "ome"),
)

#: The invented products' spec file (``workflows/specs/demo-products.yaml`` is the same text).
SPEC_TEXT = """\
# Invented products of the invented pilot line Kestrel (grainhabit demo).
# The limits are invented too: they show the format, not what any real
# emulsion should be.
version: 1
note: "Invented products and limits of the demo's invented pilot line."
products:
  - name: kestrel-cubic-260
    samples: ["KB-*"]
    min_grains: 25
    ecd_d50_nm: {target: 265, tolerance: 30}
    ecd_cov_pct: {max: 20}
    habit_number_fraction: {cube: {min: 0.5}}
  - name: kestrel-tabular-420
    samples: ["KT-*"]
    min_grains: 15
    ecd_d50_nm: {target: 420, tolerance: 60}
    habit_number_fraction: {tabular_hexagon: {min: 0.45}}
"""

WORKFLOW_TEMPLATE = """\
# Invented demo survey (grainhabit demo): eight nights of an invented pilot
# coating line, rendered from 3-D crystal shapes. Not real data.
version: 1
name: kestrel-demo
note: "Invented demo data: eight nights of an invented pilot coating line, rendered from 3-D crystal shapes."
input:
  paths: ["{data}/**/*.tif"]
  sample: "{{parent}}"        # the batch folder names the sample
  fields:
    night: "{{grandparent}}"  # the night folder above it
output:
  results: {results}
  report: {report}
specs: {specs}                # the invented products' limits
steps:
  - plugin: summarise-samples
    params: {{group_by: [night]}}
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


def make_survey(out: Path, frames_per_batch: int | None = None, size_px: int = 768, pixel_size_nm: float = 4.0,
                grains_per_frame: int = 30, seed: int = 2026) -> list[Path]:
    """Render the invented survey's frames into ``out/<night>/<batch>/``; return the files.

    ``frames_per_batch`` overrides every batch's own number of frames.
    """
    from grainhabit.plugins.synthetic.render import make_field, to_uint16

    files = []
    for b, (night, name, habits, ecd, frames, contrast, flavour) in enumerate(BATCHES):
        n = grains_per_frame if ecd < 400 else int(grains_per_frame * 0.8)
        for i in range(frames_per_batch or frames):
            field = make_field(n, (size_px, size_px), pixel_size_nm, habits, ecd, contrast=contrast,
                               seed=seed + 100 * b + i)
            path = out / night / name / f"{name.lower()}_field{i + 1:02d}.tif"
            write_frame(path, to_uint16(field.image), pixel_size_nm, flavour)
            files.append(path)
    return files


def print_summary(results: str, out=sys.stdout) -> None:
    """Print the per-sample summary table of a results store."""
    from grainhabit.results import open_results

    groups = open_results(results)
    s = groups["summary"]
    habits = [str(h) for h in s["habit"].values]
    print(f"\n{'sample':<8}{'grains':>7}{'ECD mean':>10}{'COV %':>7}{'D50':>7}{'D32':>7}"
          "  main habits by number (by area)", file=out)
    for i, sample in enumerate(s["sample"].values):
        nf = s["habit_number_fraction"].values[i]
        af = s["habit_area_fraction"].values[i]
        order = np.argsort(-np.nan_to_num(nf))[:3]
        main = ", ".join(f"{habits[j]} {100 * nf[j]:.0f}% ({100 * af[j]:.0f}%)" for j in order if nf[j] > 0)
        print(f"{str(sample):<8}{int(s['grain_count'].values[i]):>7}{s['ecd_mean_nm'].values[i]:>10.0f}"
              f"{s['ecd_cov_pct'].values[i]:>7.1f}{s['ecd_d50_nm'].values[i]:>7.0f}{s['sauter_d32_nm'].values[i]:>7.0f}"
              f"  {main}", file=out)
    print("(sizes in nm; statistics exclude edge-cut grains)", file=out)


def write_inputs(out: Path, frames_per_batch: int | None = None) -> Path:
    """Render the frames and write the workflow and spec file; return the workflow's path."""
    make_survey(out / "data", frames_per_batch=frames_per_batch)
    (out / "products.yaml").write_text(SPEC_TEXT, encoding="utf-8")
    wf = out / "workflow.yaml"
    wf.write_text(WORKFLOW_TEMPLATE.format(data="data", results="results/survey.zarr", report="results/report",
                                           specs="products.yaml"), encoding="utf-8")
    return wf


def _cmd_demo(args) -> int:
    from grainhabit.logs import setup
    from grainhabit.manager import make_host
    from grainhabit.runner import run
    from grainhabit.workflow import validate

    out = Path(args.out).resolve()
    t0 = time.monotonic()
    print("grainhabit demo: an INVENTED survey of the invented pilot line 'Kestrel' (eight nights, two invented "
          "products and one trial batch).")
    print("  " + SAFETY_NOTE)
    wf = write_inputs(out, args.frames)
    n = len(list((out / "data").glob("**/*.tif")))
    print(f"  rendered {n} frames into {out / 'data'} ({time.monotonic() - t0:.1f} s)")
    host = args.host if getattr(args, "host", None) is not None else make_host()
    overrides = {"execution": {"workers": args.workers, "scheduler": args.scheduler}}
    plan = validate(str(wf), host, overrides)
    (out / "results").mkdir(parents=True, exist_ok=True)
    setup(log_file=str(out / "results" / "survey.log"))
    outcome = run(plan, host, fresh=True)
    print_summary(outcome.results)
    print()
    for line in outcome.verdict_lines:
        print(line)
    print(f"\nresults: {outcome.results}")
    if outcome.report:
        size = os.path.getsize(outcome.report)
        print(f"report:  {outcome.report} ({size / 1e6:.1f} MB, one self-contained file)")
    print(f"workflow: {wf} (run it again with: grainhabit run {os.path.relpath(wf)})")
    print(f"{outcome.line()}; demo total {time.monotonic() - t0:.1f} s")
    return outcome.exit_code


@hookimpl
def grainhabit_add_commands(subparsers):
    p = subparsers.add_parser(
        "demo", help="render an invented survey and run the default workflow on it",
        description="Render a small INVENTED survey (eight nights of an invented pilot coating line, grains "
                    "rendered from 3-D crystal shapes), run the workflow with the invented products' spec file, "
                    "and print the per-sample summary, the batch verdicts and where the results and report are.")
    p.add_argument("--out", default="grainhabit-demo", help="folder to write into (default ./grainhabit-demo)")
    p.add_argument("--frames", type=int, default=None,
                   help="frames per batch (default: one each)")
    p.add_argument("--workers", type=int, default=None, help="local worker processes (default: all cores)")
    p.add_argument("--scheduler", default=None, help="'local' (default), 'serial' or tcp://HOST:PORT")
    p.set_defaults(handler=_cmd_demo)
