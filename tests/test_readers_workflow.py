"""input.calibration in workflows, the per-file lines of `grainhabit check`, and the host's fallback."""

from __future__ import annotations

import pytest
import tifffile
from builders import noisy, write_tescan

from builders import run_cli, write_workflow
from grainhabit.manager import make_host
from grainhabit.task import FrameJob, process_frame
from grainhabit.workflow import WorkflowError, validate

WF = """\
version: 1
input:
  paths: ["data"]
  pixel_size_nm: 4.0
{extra}output:
  results: out/r.zarr
execution:
  scheduler: serial
"""


@pytest.fixture(scope="module")
def host():
    return make_host(autoload=False)


def _data(tmp_path):
    data = tmp_path / "data"
    data.mkdir()
    write_tescan(data / "tescan.tif")
    tifffile.imwrite(data / "screen.tif", noisy((32, 32)), resolution=(72, 72), resolutionunit="INCH")
    (data / "README.txt").write_text("frames of an invented survey")
    return data


@pytest.mark.parametrize("extra, words", [
    ("  calibration: always\n", "expected 'auto' or 'override'"),
    ("  calibration: 3\n", "expected a string"),
])
def test_bad_calibration_key_is_refused(tmp_path, host, extra, words):
    wf = write_workflow(tmp_path / "wf.yaml", WF.format(extra=extra))
    with pytest.raises(WorkflowError, match=words) as err:
        validate(str(wf), host)
    assert err.value.key == "input.calibration"


def test_override_needs_a_pixel_size(tmp_path, host):
    wf = write_workflow(tmp_path / "wf.yaml", WF.format(extra="  calibration: override\n").replace(
        "  pixel_size_nm: 4.0\n", ""))
    with pytest.raises(WorkflowError, match="needs input.pixel_size_nm"):
        validate(str(wf), host)


def test_check_lists_reader_frames_and_calibration_per_file(tmp_path):
    _data(tmp_path)
    wf = write_workflow(tmp_path / "wf.yaml", WF.format(extra=""))
    proc = run_cli("check", wf)
    assert proc.returncode == 0, proc.stderr
    lines = {ln.split(": reader")[0].rsplit("/", 1)[-1]: ln for ln in proc.stdout.splitlines() if "file " in ln}
    assert "reader read-tiff, 1 frame, calibration 5.5 nm (instrument: Tescan text tag 50431" in lines["tescan.tif"]
    assert "calibration 4 nm (workflow)" in lines["screen.tif"]  # 72 dpi is a screen setting
    assert "README.txt" not in proc.stdout  # a file no reader knows inside a folder input is passed over


def test_check_under_override(tmp_path):
    _data(tmp_path)
    wf = write_workflow(tmp_path / "wf.yaml", WF.format(extra="  calibration: override\n"))
    proc = run_cli("check", wf)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.count("calibration 4 nm (workflow, input.calibration: override)") == 2


@pytest.mark.parametrize("mode, size, source", [("auto", 5.5, "instrument"), ("override", 4.0, "workflow")])
def test_frame_record_carries_size_and_source(tmp_path, host, mode, size, source):
    path = write_tescan(tmp_path / "t.tif")
    options = {"pixel_size_nm": 4.0, "calibration": mode, "max_pixels": 10**7}
    ref, = host.first_answer("grainhabit_list_frames", path=str(path), options=options)
    out = process_frame(ref, "s", FrameJob(steps=(), input_options=options, plugins=()))
    rec = out["record"]
    assert rec["status"] == "ok" and rec["pixel_size_nm"] == size and rec["calibration"] == source
    assert "info strip removed" in rec["notes"]


def test_72_dpi_tiff_without_metadata_uses_the_workflow_size(tmp_path, host):
    tifffile.imwrite(tmp_path / "s.tif", noisy((32, 32)), resolution=(72, 72), resolutionunit="INCH")
    options = {"pixel_size_nm": 4.0, "calibration": "auto", "max_pixels": 10**7}
    ref, = host.first_answer("grainhabit_list_frames", path=str(tmp_path / "s.tif"), options=options)
    rec = process_frame(ref, "s", FrameJob(steps=(), input_options=options, plugins=()))["record"]
    assert rec["pixel_size_nm"] == 4.0 and rec["calibration"] == "workflow"
    rec = process_frame(ref, "s", FrameJob(steps=(), input_options={**options, "pixel_size_nm": None},
                                           plugins=()))["record"]
    assert rec["status"] == "failed" and "no pixel size" in rec["error"]
