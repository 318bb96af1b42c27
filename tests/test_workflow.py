"""Workflow files are validated up front: one-line errors, exit 2, nothing written."""

from __future__ import annotations

import pytest

from grainhabit.manager import make_host
from grainhabit.workflow import WorkflowError, expand, validate

from builders import run_cli, write_workflow

GOOD = """\
version: 1
name: wf
input:
  paths: ["data/**/*.tif"]
  pixel_size_nm: 5.0
output:
  results: out/r.zarr
steps:
  - plugin: segment-grains
    params: {min_ecd_nm: 40}
execution:
  scheduler: serial
"""


@pytest.fixture(scope="module")
def host():
    return make_host(autoload=False)


def test_good_workflow_resolves_defaults(tmp_path, host):
    wf = write_workflow(tmp_path / "wf.yaml", GOOD)
    plan = validate(str(wf), host)
    stages = [s.stage for s in plan.frame_steps]
    assert stages[:2] == ["preprocess", "segment"]  # default preprocess filled in before the named step
    seg = [s for s in plan.frame_steps if s.name == "segment-grains"][0]
    assert seg.params["min_ecd_nm"] == 40.0 and isinstance(seg.params["min_ecd_nm"], float)
    assert plan.config["output"]["results"] == str(tmp_path / "out/r.zarr")
    assert plan.config["input"]["sample"] == "{parent}"


@pytest.mark.parametrize("change, key, words", [
    (("name: wf", "name: wf\ncolour: red"), "colour", "unknown key"),
    (("  pixel_size_nm: 5.0", "  pixel_size_nm: five"), "input.pixel_size_nm", "expected a number"),
    (("  pixel_size_nm: 5.0", "  pixel_size_nm: -1"), "input.pixel_size_nm", "> 0"),
    (("version: 1", "version: 2"), "version", "expected 1"),
    (("  - plugin: segment-grains", "  - plugin: segment-everything"), "steps[0].plugin", "unknown plugin"),
    (("{min_ecd_nm: 40}", "{min_ecd: 40}"), "steps[0].params.min_ecd", "unknown parameter"),
    (("{min_ecd_nm: 40}", "{min_ecd_nm: big}"), "steps[0].params.min_ecd_nm", "expected number"),
    (("  scheduler: serial", "  scheduler: moon"), "execution.scheduler", "expected"),
    (("  scheduler: serial", "  scheduler: serial\n  start_method: thread"), "execution.start_method",
     "expected one of auto, fork, spawn"),
    (("  results: out/r.zarr", "  report: out/rep"), "output.results", "required"),
    (('  paths: ["data/**/*.tif"]', '  paths: ["data/**/*.tif"]\n  sample: "{batch}"'), "input.sample",
     "unknown placeholder"),
])
def test_bad_workflows_name_file_and_key(tmp_path, host, change, key, words):
    wf = write_workflow(tmp_path / "bad.yaml", GOOD.replace(*change))
    with pytest.raises(WorkflowError) as err:
        validate(str(wf), host)
    msg = str(err.value)
    assert err.value.key == key
    assert str(wf) in msg and key in msg and words in msg
    assert "\n" not in msg


def test_steps_out_of_stage_order_refused(tmp_path, host):
    body = GOOD.replace("steps:\n  - plugin: segment-grains\n    params: {min_ecd_nm: 40}",
                        "steps:\n  - plugin: segment-grains\n  - plugin: flatten-background")
    wf = write_workflow(tmp_path / "order.yaml", body)
    with pytest.raises(WorkflowError, match="must come before"):
        validate(str(wf), host)


def test_yaml_syntax_error_is_one_line(tmp_path, host):
    wf = write_workflow(tmp_path / "broken.yaml", "version: 1\ninput: [unclosed\n")
    with pytest.raises(WorkflowError) as err:
        validate(str(wf), host)
    assert "not valid YAML" in str(err.value) and "\n" not in str(err.value)


def test_yaml_is_loaded_safely(tmp_path, host):
    # a python object tag must not be constructed (safe loader)
    wf = write_workflow(tmp_path / "unsafe.yaml", "version: !!python/object/apply:os.system ['echo hi']\n")
    with pytest.raises(WorkflowError, match="not valid YAML"):
        validate(str(wf), host)


def test_cli_bad_workflow_exit_2_nothing_written(tmp_path):
    wf = write_workflow(tmp_path / "bad.yaml", GOOD.replace("{min_ecd_nm: 40}", "{min_ecd_nm: big}"))
    proc = run_cli("run", wf)
    assert proc.returncode == 2
    lines = [ln for ln in proc.stderr.splitlines() if ln.strip()]
    # every problem, one line each: the bad parameter and the inputs that match nothing (no data/ here)
    assert len(lines) == 2 and "steps[0].params.min_ecd_nm" in lines[0] and "Traceback" not in proc.stderr
    assert "input.paths: no file matches" in lines[1]
    assert not (tmp_path / "out").exists()


def test_cli_check_prints_plan(tmp_path, small_survey):
    wf = write_workflow(small_survey / "wf.yaml", GOOD)
    proc = run_cli("check", wf)
    assert proc.returncode == 0, proc.stderr
    assert "4 frames" in proc.stdout and "2 samples" in proc.stdout
    assert "segment-grains" in proc.stdout and "min_ecd_nm=40.0 nm" in proc.stdout
    assert not (small_survey / "out").exists()


def test_cli_usage_errors_exit_2(tmp_path):
    proc = run_cli("run")
    assert proc.returncode == 2 and "Traceback" not in proc.stderr
    proc = run_cli("frobnicate")
    assert proc.returncode == 2
    proc = run_cli("check", tmp_path / "missing.yaml")
    assert proc.returncode == 2 and "no such file" in proc.stderr


def test_every_command_has_help():
    for cmd in ("run", "check", "ingest", "report", "plugins", "demo", "bench"):
        proc = run_cli(cmd, "--help")
        assert proc.returncode == 0, (cmd, proc.stderr)
        assert "usage:" in proc.stdout


def test_sample_template():
    assert expand("{parent}", "/data/run7/KB-01/field_01.tif", 0) == "KB-01"
    assert expand("{grandparent}-{stem}-{page}", "/data/run7/KB-01/field_01.ome.tif", 3) == "run7-field_01-3"
