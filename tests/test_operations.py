"""Overnight operations: resume after SIGKILL, locks, failure isolation, incremental nights, a real cluster."""

from __future__ import annotations

import json
import os
import shutil
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import psutil
import pytest
import xarray as xr

from builders import REPO, draw_frame, run_cli, run_cli_subprocess, write_tiff, write_workflow

WF = """\
version: 1
name: ops
input:
  paths: ["data/**/*.tif"]
{extra}
output:
  results: {results}
execution:
  scheduler: {scheduler}
  workers: 2
"""


def make_frames(root: Path, n: int, size: int = 192) -> None:
    rng = np.random.default_rng(5)
    for i in range(n):
        discs = [(int(rng.integers(30, size - 30)), int(rng.integers(30, size - 30)), int(rng.integers(8, 14)))
                 for _ in range(3)]
        write_tiff(root / "data" / f"s{i % 2}" / f"frame{i:02d}.tif", draw_frame((size, size), discs=discs, seed=i), 5.0)


def wf(root: Path, name: str = "wf.yaml", results: str = "out/r.zarr", scheduler: str = "serial",
       extra: str = "") -> Path:
    return write_workflow(root / name, WF.format(results=results, scheduler=scheduler, extra=extra))


def grains_of(path: Path) -> xr.Dataset:
    return xr.open_zarr(path, group="grains").load().drop_attrs()


def staged_count(root: Path, results: str = "out/r.zarr") -> int:
    d = root / (results + ".staging")
    return len(list(d.glob("*.npz"))) if d.exists() else 0


def test_sigkill_then_resume_gives_identical_table(tmp_path):
    make_frames(tmp_path, 10)
    reference = wf(tmp_path, "ref.yaml", results="ref/r.zarr")
    assert run_cli("run", reference).returncode == 0
    expected = grains_of(tmp_path / "ref" / "r.zarr")

    w = wf(tmp_path)
    env = dict(os.environ, GRAINHABIT_NO_AUTOLOAD="1")
    proc = subprocess.Popen([sys.executable, "-m", "grainhabit", "run", str(w)], env=env, start_new_session=True,
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + 240
    while staged_count(tmp_path) < 3 and time.monotonic() < deadline and proc.poll() is None:
        time.sleep(0.05)
    os.killpg(proc.pid, signal.SIGKILL)
    proc.wait()
    done_before = staged_count(tmp_path)
    assert 0 < done_before < 10, "the run must be killed mid-way"
    assert not (tmp_path / "out" / "r.zarr").exists() or True

    res = run_cli("run", w)
    assert res.returncode == 0, res.stderr
    assert "took over a stale lock" in res.stderr
    assert f"{10 - done_before} processed + {done_before} reused" in res.stderr
    got = grains_of(tmp_path / "out" / "r.zarr")
    xr.testing.assert_identical(expected, got)
    keys = list(zip(got["frame"].values.tolist(), got["label"].values.tolist()))
    assert len(keys) == len(set(keys))  # no duplicate grain


def test_fresh_ignores_staged(tmp_path):
    make_frames(tmp_path, 2)
    w = wf(tmp_path)
    assert run_cli("run", w).returncode == 0
    res = run_cli("run", w, "--fresh")
    assert "2 processed + 0 reused" in res.stderr


def _live_lock(results: Path) -> subprocess.Popen:
    """A process holding the results lock (it sleeps)."""
    code = ("import sys, time; from grainhabit.lock import RunLock; l = RunLock(sys.argv[1]).acquire(); "
            "print('held', flush=True); time.sleep(60)")
    p = subprocess.Popen([sys.executable, "-c", code, str(results)], stdout=subprocess.PIPE, text=True, cwd=REPO)
    assert p.stdout.readline().strip() == "held"
    return p


def test_second_run_exits_3_naming_holder(tmp_path):
    make_frames(tmp_path, 1)
    holder = _live_lock(tmp_path / "out" / "r.zarr")
    try:
        t0 = time.monotonic()
        res = run_cli("run", wf(tmp_path))
        assert res.returncode == 3
        line = res.stderr.strip().splitlines()[-1]
        assert f"PID {holder.pid}" in line and socket.gethostname() in line and "started" in line
        assert time.monotonic() - t0 < 20
        assert not (tmp_path / "out" / "r.zarr").exists()
    finally:
        holder.kill()
        holder.wait()


def test_stale_lock_is_taken_over(tmp_path):
    make_frames(tmp_path, 1)
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    lock = tmp_path / "out" / "r.zarr.lock"
    lock.parent.mkdir(parents=True)
    lock.write_text(json.dumps({"host": socket.gethostname(), "pid": dead.pid, "started": "2026-01-01T03:00:00"}))
    res = run_cli("run", wf(tmp_path))
    assert res.returncode == 0, res.stderr
    assert "took over a stale lock" in res.stderr and str(dead.pid) in res.stderr
    assert not lock.exists()


FLAKY = '''
"""Test plugin: fails on one frame, by raising or by killing its worker process."""
import os
from grainhabit import hookimpl
from grainhabit.params import Param, StepInfo
GRAINHABIT_API = 1
STEP = StepInfo(name="flaky-thickness", stage="thickness", version="0.1", summary="fails on purpose",
                params=(Param("victim", str, "frame01", doc="stem of the frame to fail on"),
                        Param("mode", str, "raise", choices=("raise", "die"), doc="how to fail")))

@hookimpl
def grainhabit_thickness(frame, params):
    if params["victim"] in frame.source:
        if params["mode"] == "die":
            os._exit(13)
        raise RuntimeError("deliberate failure for " + params["victim"])
    return frame
'''


def test_plugin_exception_fails_that_frame_only(tmp_path):
    make_frames(tmp_path, 4)
    (tmp_path / "flaky.py").write_text(FLAKY)
    w = write_workflow(tmp_path / "raise.yaml", """\
        version: 1
        plugins: [flaky.py]
        input:
          paths: ["data/**/*.tif"]
        steps:
          - plugin: flaky-thickness
        output:
          results: out/r.zarr
        execution:
          scheduler: serial
        """)
    res = run_cli("run", w)
    assert res.returncode == 1, res.stderr
    frames = xr.open_zarr(tmp_path / "out" / "r.zarr", group="frames").load()
    failed = [(str(s), str(e)) for s, e, st in zip(frames["source"].values, frames["error"].values,
                                                   frames["status"].values) if str(st) == "failed"]
    assert len(failed) == 1 and "frame01" in failed[0][0]
    assert failed[0][1].startswith("flaky-thickness: RuntimeError: deliberate failure")
    log = (tmp_path / "out" / "r.zarr.log").read_text()
    assert "Traceback" in log and "deliberate failure" in log  # full traceback in the log file


def test_dead_worker_retried_once_then_failed(tmp_path):
    make_frames(tmp_path, 4)
    (tmp_path / "flaky.py").write_text(FLAKY)
    w = write_workflow(tmp_path / "die.yaml", """\
        version: 1
        plugins: [flaky.py]
        input:
          paths: ["data/**/*.tif"]
        steps:
          - plugin: flaky-thickness
            params: {mode: die, victim: frame02}
        output:
          results: out/r.zarr
        execution:
          scheduler: local
          workers: 2
        """)
    res = run_cli("run", w)
    assert res.returncode == 1, res.stderr
    frames = xr.open_zarr(tmp_path / "out" / "r.zarr", group="frames").load()
    status = {Path(str(s)).stem: (str(st), str(e)) for s, st, e in
              zip(frames["source"].values, frames["status"].values, frames["error"].values)}
    assert status["frame02"][0] == "failed" and "worker process died" in status["frame02"][1]
    assert sum(v[0] == "ok" for v in status.values()) == 3


def test_incremental_night_new_changed_deleted(tmp_path):
    make_frames(tmp_path, 3)
    w = wf(tmp_path)
    assert run_cli("run", w).returncode == 0
    write_tiff(tmp_path / "data" / "s1" / "frame09.tif", draw_frame((192, 192), discs=[(90, 90, 12)]), 5.0)  # new
    write_tiff(tmp_path / "data" / "s0" / "frame00.tif", draw_frame((192, 192), discs=[(50, 50, 10)]), 5.0)  # changed
    (tmp_path / "data" / "s0" / "frame02.tif").unlink()  # deleted
    res = run_cli("run", w)
    assert res.returncode == 0, res.stderr
    assert "2 processed + 1 reused" in res.stderr
    assert "no longer found" in res.stderr and "kept" in res.stderr
    frames = xr.open_zarr(tmp_path / "out" / "r.zarr", group="frames").load()
    assert sorted(Path(str(s)).stem for s in frames["source"].values) == ["frame00", "frame01", "frame02", "frame09"]
    dropped = w.read_text().replace('  paths: ["data/**/*.tif"]', '  paths: ["data/**/*.tif"]\n  on_missing: drop')
    w.write_text(dropped)
    res = run_cli("run", w)
    frames = xr.open_zarr(tmp_path / "out" / "r.zarr", group="frames").load()
    assert sorted(Path(str(s)).stem for s in frames["source"].values) == ["frame00", "frame01", "frame09"]


def test_log_json_lines(tmp_path):
    make_frames(tmp_path, 2)
    res = run_cli("run", wf(tmp_path), "--log-json")
    lines = [json.loads(ln) for ln in res.stderr.splitlines() if ln.startswith("{")]
    assert lines and all({"time", "level", "message"} <= set(d) for d in lines)
    final = [d for d in lines if d.get("summary")]
    assert final and final[-1]["exit_code"] == 0 and "frames ok" in final[-1]["message"]


def test_sigint_exits_130_and_keeps_staged(tmp_path):
    make_frames(tmp_path, 10)
    w = wf(tmp_path)
    env = dict(os.environ, GRAINHABIT_NO_AUTOLOAD="1")
    proc = subprocess.Popen([sys.executable, "-m", "grainhabit", "run", str(w)], env=env,
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 240
    while staged_count(tmp_path) < 2 and time.monotonic() < deadline and proc.poll() is None:
        time.sleep(0.05)
    proc.send_signal(signal.SIGINT)
    _, err = proc.communicate(timeout=120)
    assert proc.returncode == 130, err
    assert "interrupted" in err and staged_count(tmp_path) >= 2
    assert not (tmp_path / "out" / "r.zarr.lock").exists()


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture
def dask_cluster(tmp_path):
    """A real dask.distributed scheduler and two worker processes on 127.0.0.1, started with dask's own CLI."""
    port = _free_port()
    addr = f"tcp://127.0.0.1:{port}"
    env = dict(os.environ, GRAINHABIT_NO_AUTOLOAD="1")
    dask_cli = [sys.executable, "-m", "distributed.cli.dask_scheduler"]
    procs = [subprocess.Popen(dask_cli + ["--host", "127.0.0.1", "--port", str(port), "--no-dashboard"],
                              env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, cwd=tmp_path)]
    time.sleep(1.0)
    for i in range(2):
        procs.append(subprocess.Popen([sys.executable, "-m", "distributed.cli.dask_worker", addr, "--nthreads", "1",
                                       "--no-dashboard", "--name", f"w{i}"], env=env, cwd=tmp_path,
                                      stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL))
    from distributed import Client

    with Client(addr, timeout="60s") as c:
        c.wait_for_workers(2, timeout=120)
    yield addr
    for p in procs[::-1]:
        p.terminate()
    for p in procs:
        try:
            p.wait(timeout=20)
        except subprocess.TimeoutExpired:
            p.kill()


def test_distributed_run_equals_local_run(tmp_path, dask_cluster):
    make_frames(tmp_path, 4)
    assert run_cli("run", wf(tmp_path, "serial.yaml", results="serial/r.zarr")).returncode == 0
    res = run_cli("run", wf(tmp_path, "dist.yaml", results="dist/r.zarr"), "--scheduler", dask_cluster)
    assert res.returncode == 0, res.stderr
    assert f"cluster {dask_cluster} (2 workers)" in res.stderr
    # workers started with dask's defaults get the advice on their slowing settings
    assert "2 of 2 workers run with MALLOC_TRIM_THRESHOLD_ set" in res.stderr
    xr.testing.assert_identical(grains_of(tmp_path / "serial" / "r.zarr"), grains_of(tmp_path / "dist" / "r.zarr"))
    frames = xr.open_zarr(tmp_path / "dist" / "r.zarr", group="frames").load()
    assert set(frames["status"].values.tolist()) == {"ok"}


READY = '''
"""Test plugin: a thickness step that refuses to run in a process its prepare hook has not prepared."""
import os
from grainhabit import hookimpl
from grainhabit.params import Param, StepInfo
GRAINHABIT_API = 1
STEP = StepInfo(name="needs-ready", stage="thickness", version="0.1", summary="checks the worker was prepared",
                params=(Param("marks", str, "", doc="folder for one file per prepared process"),
                        Param("broken", bool, False, doc="raise in the prepare hook")))
_READY = []

@hookimpl
def grainhabit_prepare_worker(steps):
    if STEP.name not in steps:
        return
    if steps[STEP.name]["broken"]:
        raise RuntimeError("table file missing")
    if os.environ.get("READY_TEST_DIE") == "1":
        os._exit(13)
    _READY.append(os.getpid())
    with open(os.path.join(steps[STEP.name]["marks"], f"ready-{os.getpid()}"), "a") as fh:
        fh.write("x")

@hookimpl
def grainhabit_thickness(frame, params):
    if not params["broken"] and os.getpid() not in _READY:
        raise RuntimeError("not prepared")
    return frame
'''


def ready_workflow(root: Path, frames: int, params: str = "") -> tuple[Path, Path]:
    """Frames, the needs-ready plugin and a 2-worker local workflow using it; (workflow, marks folder)."""
    make_frames(root, frames)
    (root / "ready.py").write_text(READY)
    marks = root / "marks"
    marks.mkdir()
    extra = f"plugins: [ready.py]\nsteps:\n  - plugin: needs-ready\n    params: {{marks: {marks.as_posix()}{params}}}"
    return wf(root, scheduler="local", extra=extra), marks


def test_every_worker_is_prepared_once_before_its_frames(tmp_path):
    workflow, marks = ready_workflow(tmp_path, 6)
    res = run_cli("run", workflow)
    assert res.returncode == 0, res.stderr
    assert "2 of 2 workers ready" in res.stderr
    files = sorted(marks.iterdir())
    # one per worker process, once, and one for the process that runs the first frames while the cluster
    # starts (grainhabit.early: one frame per worker, 2 of these 6)
    assert "first 2 frame(s) processing in process" in res.stderr
    assert len(files) == 3 and all(f.read_text() == "x" for f in files)
    frames = xr.open_zarr(tmp_path / "out" / "r.zarr", group="frames").load()
    assert set(frames["status"].values.tolist()) == {"ok"}  # needs-ready raises in an unprepared process


def test_a_failing_prepare_hook_is_a_warning_not_a_failed_run(tmp_path):
    workflow, _ = ready_workflow(tmp_path, 2, ", broken: true")
    res = run_cli("run", workflow)
    assert res.returncode == 0, res.stderr
    assert "preparing worker" in res.stderr and "needs-ready" in res.stderr and "table file missing" in res.stderr


def test_a_worker_dying_in_prepare_does_not_hold_up_the_run(tmp_path):
    # dask keeps a task bound to a dead worker's address waiting for ever: the preparation runs
    # outside the task scheduler, so the run goes on with the restarted workers
    workflow, _ = ready_workflow(tmp_path, 2)
    res = run_cli("run", workflow, env={"READY_TEST_DIE": "1"})
    assert "preparing worker" in res.stderr and "0 of 2 workers ready" in res.stderr
    # the restarted workers were never prepared, so needs-ready fails their frames: recorded, not hung
    assert res.returncode == 1
    frames = xr.open_zarr(tmp_path / "out" / "r.zarr", group="frames").load()
    assert set(frames["status"].values.tolist()) == {"failed"}
    assert all("not prepared" in str(e) for e in frames["error"].values)
