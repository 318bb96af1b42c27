"""End to end: a workflow through the CLI, results opened with xarray (DESIGN.md layout)."""

from __future__ import annotations

import json
import math
import warnings

import numpy as np
import pytest
import xarray as xr

from builders import run_cli, write_workflow

WF = """\
version: 1
name: e2e
input:
  paths: ["data/**/*.tif"]
output:
  results: out/survey.zarr
execution:
  scheduler: {scheduler}
  workers: 2
"""

GRAIN_VARS = ["frame", "source", "sample", "label", "centroid_x_nm", "centroid_y_nm", "area_nm2", "ecd_nm",
              "perimeter_nm", "feret_max_nm", "feret_min_nm", "feret_ratio", "form_factor", "circularity", "solidity",
              "n_corners", "edge_ratio", "habit", "habit_score", "alpha", "alpha_lo", "alpha_hi", "thickness_nm",
              "tabular_aspect_ratio", "edge_cut", "split"]
FRAME_VARS = ["source", "sample", "status", "error", "grain_count", "pixel_size_nm"]
SUMMARY_VARS = ["grain_count", "ecd_mean_nm", "ecd_cov_pct", "ecd_d10_nm", "ecd_d50_nm", "ecd_d90_nm",
                "sauter_d32_nm", "habit_number_fraction", "habit_area_fraction", "alpha_median"]


@pytest.fixture(scope="module")
def local_run(tmp_path_factory):
    """One run on a real local dask cluster (2 worker processes)."""
    from builders import write_two_batches

    root = tmp_path_factory.mktemp("e2e")
    write_two_batches(root / "data")
    wf = write_workflow(root / "wf.yaml", WF.format(scheduler="local"))
    proc = run_cli("run", wf)
    return root, proc


def test_run_exit_0_and_summary_line(local_run):
    root, proc = local_run
    assert proc.returncode == 0, proc.stderr
    assert "done: 4 frames ok, 0 failed" in proc.stderr
    assert "local cluster (2 worker processes" in proc.stderr


def test_results_layout_matches_design(local_run):
    root, _ = local_run
    path = root / "out" / "survey.zarr"
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # plain open_zarr must not warn (consolidated, variable-length text)
        grains = xr.open_zarr(path, group="grains").load()
        frames = xr.open_zarr(path, group="frames").load()
        summary = xr.open_zarr(path, group="summary").load()
    for name in GRAIN_VARS:
        assert name in grains, name
        assert grains[name].dims == ("grain",)
    for name in FRAME_VARS:
        assert name in frames, name
    for name in SUMMARY_VARS:
        assert name in summary, name
    assert summary["habit_number_fraction"].dims == ("sample", "habit")
    assert summary["ecd_mean_nm"].dims == ("sample",)
    for ds in (grains, frames, summary):
        for name, var in ds.data_vars.items():
            assert "units" in var.attrs and "long_name" in var.attrs, name
    assert list(summary["sample"].values) == ["alpha-batch", "beta-batch"]
    assert grains["habit"].dtype.kind in ("O", "T")
    assert list(frames["status"].values) == ["ok"] * 4


def test_root_attrs_carry_workflow_and_versions(local_run):
    root, _ = local_run
    import zarr

    attrs = dict(zarr.open_group(str(root / "out" / "survey.zarr"), mode="r").attrs)
    assert "name: e2e" in attrs["workflow"] and len(attrs["workflow_hash"]) == 64
    versions = json.loads(attrs["versions"])
    assert versions["grainhabit"] and "segment-grains" in versions["plugins"]
    runs = json.loads(attrs["runs"])
    assert runs[-1]["frames_ok"] == 4 and runs[-1]["exit_code"] == 0


def test_calibrated_area_and_ecd_of_exact_shapes(local_run):
    """Squares of 40 px at 5 nm: area = (200 nm)^2 exactly (handbook geometry: A = s^2), ECD = sqrt(4A/pi)
    (ISO 9276-6 definition); discs of radius r px: area ~ pi (5 r)^2 nm^2 within digitisation error."""
    root, _ = local_run
    g = xr.open_zarr(root / "out" / "survey.zarr", group="grains").load()

    def near(x_px, y_px):
        sel = ((g["frame"] == 0) & (np.abs(g["centroid_x_nm"] - 5 * x_px) < 10)
               & (np.abs(g["centroid_y_nm"] - 5 * y_px) < 10))
        return g.isel(grain=np.flatnonzero(sel.values))

    big_square = near(60, 170)
    assert big_square.sizes["grain"] == 1
    assert big_square["area_nm2"].item() == pytest.approx(200.0 ** 2, rel=0.02)
    assert big_square["ecd_nm"].item() == pytest.approx(math.sqrt(4 * 200.0 ** 2 / math.pi), rel=0.01)
    # feret of a square: min = side, max = side * sqrt(2) (handbook geometry). Through the whole chain on a
    # noisy frame the segmented corners come out rounded by about a pixel, which shortens the diagonal by
    # about 2 px; the measure step alone is checked to within 1 px in test_measure.py.
    assert big_square["feret_min_nm"].item() == pytest.approx(200.0, abs=7.5)
    assert big_square["feret_max_nm"].item() == pytest.approx(200.0 * math.sqrt(2), abs=12.5)
    disc = near(60.5, 60.5)
    assert disc.sizes["grain"] == 1
    assert disc["area_nm2"].item() == pytest.approx(math.pi * (5 * 20) ** 2, rel=0.03)


def test_rerun_reuses_staged_frames(local_run):
    root, _ = local_run
    wf = write_workflow(root / "wf_serial.yaml", WF.format(scheduler="serial"))
    before = xr.open_zarr(root / "out" / "survey.zarr", group="grains").load()
    proc = run_cli("run", wf)
    assert proc.returncode == 0, proc.stderr
    assert "0 processed + 4 reused" in proc.stderr
    after = xr.open_zarr(root / "out" / "survey.zarr", group="grains").load()
    xr.testing.assert_identical(before.drop_attrs(), after.drop_attrs())


def test_spawned_workers_give_the_forked_workers_results(local_run):
    # execution.start_method: the fixture's run forks its workers on Linux (auto); fresh interpreters
    # must find the same grains to the bit (both compute with one BLAS thread)
    root, _ = local_run
    body = WF.format(scheduler="local").replace("out/survey.zarr", "out/spawned.zarr") + "  start_method: spawn\n"
    proc = run_cli("run", write_workflow(root / "wf_spawn.yaml", body))
    assert proc.returncode == 0, proc.stderr
    forked = xr.open_zarr(root / "out" / "survey.zarr", group="grains").load()
    spawned = xr.open_zarr(root / "out" / "spawned.zarr", group="grains").load()
    xr.testing.assert_identical(forked.drop_attrs(), spawned.drop_attrs())


def test_failed_frame_is_recorded_and_run_goes_on(tmp_path, small_survey):
    bad = small_survey / "data" / "alpha-batch" / "broken.tif"
    bad.write_bytes(b"not a tiff at all")
    nocal = small_survey / "data" / "beta-batch" / "nocal.tif"
    from builders import draw_frame, write_tiff

    write_tiff(nocal, draw_frame(discs=[(50, 50, 10)]), None)
    wf = write_workflow(small_survey / "wf.yaml", WF.format(scheduler="serial"))
    proc = run_cli("run", wf)
    assert proc.returncode == 1
    frames = xr.open_zarr(small_survey / "out" / "survey.zarr", group="frames").load()
    status = dict(zip(map(str, frames["source"].values), map(str, frames["status"].values)))
    errors = dict(zip(map(str, frames["source"].values), map(str, frames["error"].values)))
    assert status[str(bad)] == "failed" and "not a readable TIFF" in errors[str(bad)]
    assert status[str(nocal)] == "failed" and "pixel_size_nm" in errors[str(nocal)]
    assert sum(s == "ok" for s in status.values()) == 4
    assert "failed frame" in proc.stderr
