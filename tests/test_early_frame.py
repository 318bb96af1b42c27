"""The run's first frame processed in a forked process while the local cluster starts (grainhabit.early)."""

from __future__ import annotations

import sys

import pytest
import xarray as xr

from builders import run_cli, write_workflow
from grainhabit.early import EarlyFrames, early_frame_count
from grainhabit.executors import DaskExecutor, SerialExecutor

WF = """\
version: 1
name: early
input:
  paths: ["data/**/*.tif"]
output:
  results: out/{name}.zarr
execution:
  scheduler: local
  workers: 2
"""


def test_one_frame_per_worker_of_a_local_forked_cluster(monkeypatch):
    monkeypatch.delenv("GRAINHABIT_EARLY_FRAME", raising=False)
    monkeypatch.setattr(sys, "platform", "linux")
    assert early_frame_count(DaskExecutor(workers=2), 12) == 2
    assert early_frame_count(DaskExecutor(workers=3), 12) == 3
    assert early_frame_count(DaskExecutor(workers=2), 4) == 1  # no more than each worker gets
    assert early_frame_count(DaskExecutor(workers=64), 128) == 1
    assert early_frame_count(DaskExecutor(workers=2), 2) == 0
    assert early_frame_count(DaskExecutor(workers=2, start_method="spawn"), 12) == 0
    assert early_frame_count(DaskExecutor(address="tcp://127.0.0.1:8786"), 12) == 0
    assert early_frame_count(DaskExecutor(batch=("slurm", {})), 12) == 0
    assert early_frame_count(SerialExecutor(), 12) == 0
    monkeypatch.setenv("GRAINHABIT_EARLY_FRAME", "0")
    assert early_frame_count(DaskExecutor(workers=2), 12) == 0


def _square(x, sample, job):
    return {"record": {"status": "ok"}, "value": x * x}


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="the early frame forks (Linux only)")
def test_lost_early_frames_go_to_the_executor(monkeypatch):
    import time

    from grainhabit import runner, task

    monkeypatch.setattr(runner, "process_frame", _square)
    monkeypatch.setattr(task, "process_frame", _square)
    monkeypatch.setattr(task, "prepare_worker", lambda job: time.sleep(60) if job == "slow" else None)
    items = [("a", (2, "s", None)), ("b", (3, "s", "slow")), ("c", (4, "s", None)), ("d", (5, "s", None))]
    early = EarlyFrames(items[:2])  # answers for "a", then waits at "b" ...
    first = dict(early.results(wait=False))
    deadline = time.monotonic() + 30
    while "a" not in first and time.monotonic() < deadline:
        time.sleep(0.05)
        first.update(early.results(wait=False))
    assert first == {"a": {"record": {"status": "ok"}, "value": 4}}
    early._proc.kill()  # ... and dies there
    got = dict(runner._with_early(SerialExecutor(), items[:1] + items[1:], early))
    got.update(first)
    assert sorted(got) == ["a", "b", "c", "d"]
    assert [got[k]["value"] for k in "abcd"] == [4, 9, 16, 25]


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="the early frame forks (Linux only)")
def test_same_results_with_and_without_the_early_frame(tmp_path):
    from builders import write_two_batches

    write_two_batches(tmp_path / "data")
    with_early = run_cli("run", write_workflow(tmp_path / "a.yaml", WF.format(name="early")),
                         env={"GRAINHABIT_EARLY_FRAME": "1"})
    assert with_early.returncode == 0, with_early.stderr
    assert "first 1 frame(s) processing in process" in with_early.stderr
    without = run_cli("run", write_workflow(tmp_path / "b.yaml", WF.format(name="cluster")),
                      env={"GRAINHABIT_EARLY_FRAME": "0"})
    assert without.returncode == 0, without.stderr
    assert "frame(s) processing in process" not in without.stderr
    for group in ("grains", "frames", "summary"):
        a = xr.open_zarr(tmp_path / "out" / "early.zarr", group=group).load()
        b = xr.open_zarr(tmp_path / "out" / "cluster.zarr", group=group).load()
        if group == "frames":
            a, b = (d.drop_vars([v for v in d.data_vars if "second" in v or "timing" in v]) for d in (a, b))
        xr.testing.assert_identical(a.drop_attrs(), b.drop_attrs())
