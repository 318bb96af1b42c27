"""Smoke tests of the throughput and memory benchmarks (tiny sizes; no timing assertions).

They check that the benchmarks run, print their figures and write them as
JSON, that the helpers write readable frames with distinct content, and
that the RSS sampler sees memory held by a child process. Speed targets are
printed by the benchmarks themselves, never asserted here.
"""

from __future__ import annotations

import json
import subprocess
import sys
import time

import numpy as np
import pytest
import tifffile

from grainhabit.plugins.bench import memory as bench_memory
from grainhabit.plugins.bench import throughput as bench_throughput
from grainhabit.plugins.bench import harness as bu


@pytest.fixture(scope="module")
def tiny_images():
    return bu.render_frames(2, 160, grains=2, seed=3)


def test_grains_follow_pixels():
    assert bu.grains_for(512) == 10
    assert bu.grains_for(1024) == 42  # 40 per Mpx x 1.048576 Mpx = 41.9
    with pytest.raises(ValueError, match="size_px"):
        bu.grains_for(4)


def test_variants_are_distinct_and_keep_the_pixels(tiny_images):
    img = tiny_images[0]
    seen = set()
    for k in range(20):
        v = bu.variant(img, k)
        assert v.shape == img.shape and v.dtype == img.dtype
        seen.add(v.tobytes())
        if k < 8:  # mirror images and quarter turns only move pixels
            assert np.array_equal(np.sort(v, axis=None), np.sort(img, axis=None))
    assert len(seen) == 20
    assert np.array_equal(bu.variant(img, 0), img)
    with pytest.raises(ValueError, match="k must be"):
        bu.variant(img, -1)


def test_write_frames_and_workflow(tmp_path, tiny_images):
    from grainhabit.manager import make_host
    from grainhabit.runner import list_frames
    from grainhabit.workflow import validate

    paths = bu.write_frames(tmp_path / "data" / "s1", tiny_images, 5)
    assert [p.name for p in paths] == [f"field{i:04d}.tif" for i in range(5)]
    assert np.array_equal(tifffile.imread(paths[3]), bu.variant(tiny_images[1], 1))
    wf = bu.write_workflow(tmp_path / "wf.yaml", tmp_path / "data", tmp_path / "out" / "r.zarr", workers=1)
    host = make_host(autoload=False)
    plan = validate(str(wf), host)
    frames, problems = list_frames(plan, host, plan.processing_key(host))
    assert not problems and len(frames) == 5
    assert len({f.ref.content_hash for f in frames}) == 5
    assert {f.sample for f in frames} == {"s1"}


def test_serial_loop_runs_the_default_chain(tmp_path, tiny_images):
    paths = bu.write_frames(tmp_path / "d", tiny_images[:1])
    a = bench_throughput.serial_loop(paths)
    assert a["frames"] == 1 and a["pixels"] == 160 * 160 and a["grains"] >= 1
    assert set(a["stages"]) == set(bench_throughput.FRAME_PHASES)
    assert all(v >= 0 for v in a["stages"].values()) and a["wall"] >= sum(a["stages"].values()) * 0.99


def test_ceiling_case_runs_disjoint_shares_at_once(tmp_path, tiny_images):
    paths = bu.write_frames(tmp_path / "d", tiny_images[:1], 3)
    d = bench_throughput.ceiling_case(paths, 2)
    assert d["frames"] == 3 and d["copies"] == 2 and len(d["loops"]) == 2
    assert d["pixels"] == 3 * 160 * 160 and d["grains"] >= 3
    # the span covers the slower copy, and no more than the two copies one after the other
    assert max(d["loops"]) * 0.99 <= d["wall"] <= sum(d["loops"]) + 1.0


def test_run_clock_times_a_serial_run(tmp_path, tiny_images):
    from grainhabit.manager import make_host
    from grainhabit.runner import run
    import grainhabit.runner as runner
    from grainhabit.workflow import validate

    bu.write_frames(tmp_path / "data" / "s", tiny_images)
    wf = bu.write_workflow(tmp_path / "wf.yaml", tmp_path / "data", tmp_path / "out" / "r.zarr",
                           scheduler="serial")
    host = make_host(autoload=False)
    saved = runner.write_staged
    clock = bu.RunClock()
    outcome = run(validate(str(wf), host), host, fresh=True, tty=False, observer=clock)
    assert runner.write_staged is saved and "call_step" not in vars(host)  # restored
    assert outcome.frames_ok == 2
    for phase in ("list", "cluster_start", "stage_write", "consolidate", "summarise", "results_write"):
        assert clock.seconds[phase] >= 0
    assert clock.processing_seconds > 0 and clock.warmup_seconds == clock.warmup_seconds
    records = bu.staged_records(outcome.results)
    assert len(records) == 2 and all("classify" in r["timings"] for r in records)
    assert all(0 < r["cpu_timings"]["segment"] for r in records)  # CPU seconds of the task's thread per stage


def test_tree_sampler_counts_a_child_process():
    # a child holding 150 MiB must raise the tree's RSS by about that much above this process alone
    code = "import time; b = bytearray(150 * 2**20); b[::4096] = b'x' * len(b[::4096]); time.sleep(1.5)"
    proc = subprocess.Popen([sys.executable, "-c", code])
    try:
        with bu.TreeRssSampler(interval=0.05) as s:
            time.sleep(1.2)
    finally:
        proc.wait()
    assert s.peak_processes >= 2
    assert s.peak - s.peak_root > 140 * 2**20


def test_throughput_cli_prints_and_writes_figures(tmp_path, capsys):
    out = tmp_path / "tp.json"
    code = bench_throughput.run(["--frames", "1", "--size", "128", "--grains", "1", "--workers", "1",
                                 "--repeat", "2", "--json", str(out)])
    text = capsys.readouterr().out
    assert code == 0, text
    for words in ("(a) serial loop", "(b) pipeline, 1 worker", "frames/s", "Mpx/s", "cluster start-up",
                  "classify", "consolidate", "results_write", "overhead of the pipeline per worker",
                  "scaling efficiency", "frame task: median", "load ", "worker preparation",
                  "each round on its own: overhead"):
        assert words in text
    fig = json.loads(out.read_text())
    assert fig["one_worker"]["frames_ok"] == 1 and fig["serial_loop"]["frames"] == 1
    assert fig["one_worker"]["host"]["cluster_start"] > 0 and fig["one_worker"]["host"]["worker_prepare"] > 0
    assert len(fig["rounds"]["a"]) == len(fig["rounds"]["b"]) == 2
    assert set(fig["ratios"]) >= {"overhead_per_worker", "speedup_all_vs_loop", "scaling_efficiency"}


def test_memory_cli_prints_and_writes_figures(tmp_path, capsys):
    out = tmp_path / "mem.json"
    code = bench_memory.run(["--small", "1", "--large", "2", "--size", "128", "--grains", "1", "--distinct", "1",
                             "--scheduler", "serial", "--json", str(out)])
    text = capsys.readouterr().out
    assert code == 0, text
    assert "peak RSS ratio large/small" in text and "serial" in text
    fig = json.loads(out.read_text())
    assert fig["cases"]["small"]["frames_ok"] == 1 and fig["cases"]["large"]["frames_ok"] == 2
    assert fig["cases"]["large"]["peak_tree"] > 50 * 2**20  # a Python process with numpy and the plugins
    assert fig["ratio"] == pytest.approx(fig["cases"]["large"]["peak_tree"] / fig["cases"]["small"]["peak_tree"])


def test_bad_arguments_exit_2():
    for mod, argv in ((bench_throughput, ["--frames", "0"]), (bench_memory, ["--small", "5", "--large", "2"])):
        with pytest.raises(SystemExit) as exc:
            mod.run(argv)
        assert exc.value.code == 2


def test_benchmarks_are_registered():
    from grainhabit.cli import _benchmarks
    from grainhabit.manager import make_host

    names = _benchmarks(make_host(autoload=False))
    assert names["throughput"] is bench_throughput.run and names["memory"] is bench_memory.run


def test_profile_cli_ranks_functions(tmp_path, capsys):
    from grainhabit.plugins.bench import profile as bench_profile

    raw = tmp_path / "p.prof"
    assert bench_profile.run(["--frames", "1", "--size", "128", "--top", "3", "--save", str(raw)]) == 0
    text = capsys.readouterr().out
    assert "per frame, ms: read" in text and "largest own time" in text and "largest cumulative time" in text
    # the whole chain sits under the serial loop, so it tops the cumulative ranking
    cum = text.split("largest cumulative time")[1].splitlines()[1]
    assert "serial_loop" in cum
    import pstats

    assert pstats.Stats(str(raw)).total_calls > 1000


@pytest.mark.parametrize("method", ["spawn", "fork"])
def test_versus_script_runs_grainhabit_in_a_fresh_process(method, tmp_path):
    if method == "fork" and not sys.platform.startswith("linux"):
        pytest.skip("fork is used on Linux only")
    from builders import run_cli

    res = run_cli("bench", "throughput", "--versus-script", "--frames", "2", "--size", "512", "--grains", "10",
                  "--repeat", "1", "--accuracy-frames", "0", "--start-method", method,
                  "--workdir", str(tmp_path / "w"))
    assert res.returncode in (0, 1), res.stderr  # 1: the speed target is missed at this size
    out = res.stdout
    assert f"2 workers ({method}ed), cold start included" in out
    assert "each round runs in a new Python process" in out
    assert "its phases, s: list" in out and "results write" in out
    assert "(20 grains, 2/2 frames ok)" in out
    wf = (tmp_path / "w" / "all.yaml").read_text()
    assert f"start_method: {method}" in wf
