"""Nights over a growing archive: what a night opens and writes, paths, up-front refusals, interruptions.

The frames are small synthetic fields drawn here (invented data); the checks are on the host's
behaviour (files opened, rows stored, exit codes), not on image science.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

from builders import draw_frame, run_cli, write_tiff, write_workflow

# The tiny invented samples have habits with a single grain, whose sample standard deviation (ddof=1) the
# statistics plugin reports as NaN, with numpy's warnings; they say nothing about what is tested here.
pytestmark = pytest.mark.filterwarnings("ignore:Degrees of freedom <= 0:RuntimeWarning",
                                        "ignore:invalid value encountered in divide:RuntimeWarning")

WF = """\
version: 1
name: night
input:
  paths: {paths}
{extra}
output:
  results: {results}
execution:
  scheduler: {scheduler}
  workers: 2
"""


def frame(root: Path, i: int, folder: str = "data") -> Path:
    img = draw_frame((96, 96), discs=[(48, 48, 10 + i % 5)], seed=i)
    return write_tiff(root / folder / f"s{i % 2}" / f"f{i:03d}.tif", img, 5.0)


def workflow(root: Path, name="wf.yaml", paths='["data/**/*.tif"]', results="out/r.zarr", scheduler="serial",
             extra="") -> Path:
    return write_workflow(root / name, WF.format(paths=paths, results=results, scheduler=scheduler, extra=extra))


class Opens:
    """Paths opened (Python's ``open`` audit event) under a folder while recording."""

    _instance = None

    def __init__(self):
        self.prefix = None
        self.paths: list[str] = []
        sys.addaudithook(self._hook)

    @classmethod
    def get(cls) -> "Opens":
        if cls._instance is None:
            cls._instance = cls()
        return cls._instance

    def _hook(self, event, args):
        if event == "open" and self.prefix and args and isinstance(args[0], (str, os.PathLike)):
            p = os.fspath(args[0])
            if p.startswith(self.prefix):
                self.paths.append(p)

    def during(self, folder: Path, func, *args):
        self.paths, self.prefix = [], str(folder)
        try:
            return func(*args)
        finally:
            self.prefix = None


def sources(results: Path) -> list[str]:
    return sorted(str(s) for s in xr.open_zarr(results, group="frames")["source"].values)


# -- a night costs its new frames ----------------------------------------------------------------------


def test_second_night_opens_only_new_files_and_appends_in_place(tmp_path):
    for i in range(4):
        frame(tmp_path, i)
    w = workflow(tmp_path)
    assert run_cli("run", w).returncode == 0
    store = tmp_path / "out" / "r.zarr"
    inode = store.stat().st_ino
    before = xr.open_zarr(store, group="grains").load()
    new = [frame(tmp_path, i) for i in (4, 5)]
    opens = Opens.get()
    res = opens.during(tmp_path, run_cli, "run", w)
    assert res.returncode == 0, res.stderr
    assert "2 processed + 4 reused" in res.stderr
    assert "4 input files unchanged since the last run (not opened), 2 listed by the readers" in res.stderr
    data = {p for p in opens.paths if p.startswith(str(tmp_path / "data"))}
    assert data == {str(p.resolve()) for p in new}  # no old file opened
    staged = {p for p in opens.paths if p.endswith(".npz")}
    assert len(staged) == 0  # no staged result read back: the new frames are consolidated from memory
    assert "results appended" in res.stderr
    assert store.stat().st_ino == inode  # updated in place, not a new store swapped in
    after = xr.open_zarr(store, group="grains").load()
    assert after.sizes["grain"] == before.sizes["grain"] + 2
    xr.testing.assert_identical(after.isel(grain=slice(0, before.sizes["grain"])).drop_attrs(),
                                before.drop_attrs())  # the stored rows are untouched
    frames = xr.open_zarr(store, group="frames").load()
    assert frames.sizes["frame"] == 6 and sorted(after["frame"].values.tolist()) == list(range(6))
    summary = xr.open_zarr(store, group="summary").load()
    assert int(summary["grain_count"].sum()) == 6  # the summary covers every grain, old and new


def test_appended_store_equals_a_store_written_in_one_night(tmp_path):
    for i in range(3):
        frame(tmp_path, i)
    nightly = workflow(tmp_path, "a.yaml", results="a/r.zarr")
    assert run_cli("run", nightly).returncode == 0
    frame(tmp_path, 3)  # sample s1 gets a frame, s0 none, s9 is new
    write_tiff(tmp_path / "data" / "s9" / "f004.tif", draw_frame((96, 96), discs=[(40, 40, 9), (70, 70, 12)]), 5.0)
    res = run_cli("run", nightly)
    assert res.returncode == 0 and "results appended" in res.stderr, res.stderr
    assert "summaries recomputed for the 2 samples that got frames tonight (s1, s9)" in res.stderr  # s0's kept
    once = workflow(tmp_path, "b.yaml", results="b/r.zarr")
    assert run_cli("run", once).returncode == 0
    # a night's frames follow the stored ones, so the rows come in another order: compare by source
    from grainhabit.results import open_results

    a, b = open_results(tmp_path / "a" / "r.zarr"), open_results(tmp_path / "b" / "r.zarr")

    def by_source(groups):
        fr = groups["frames"].drop_vars("seconds").drop_attrs()
        order = np.argsort(fr["source"].values.astype(str))
        gr = groups["grains"].drop_attrs()
        g_order = np.lexsort((gr["label"].values, gr["source"].values.astype(str)))
        th = groups["thumbnails"].drop_attrs().isel(frame=order)
        return fr.isel(frame=order), gr.isel(grain=g_order).drop_vars("frame"), th

    for x, y in zip(by_source(a), by_source(b)):
        xr.testing.assert_identical(x, y)
    xr.testing.assert_identical(a["summary"].drop_attrs(), b["summary"].drop_attrs())
    # every grain's frame index and every outline's grain index point at the right rows
    for g in (a, b):
        src = g["frames"]["source"].values[g["grains"]["frame"].values]
        assert (src == g["grains"]["source"].values).all()
        assert np.unique(g["outlines"]["grain"].values).tolist() == list(range(g["grains"].sizes["grain"]))


def test_changed_file_is_listed_again_and_its_row_replaced(tmp_path):
    for i in range(3):
        frame(tmp_path, i)
    w = workflow(tmp_path)
    assert run_cli("run", w).returncode == 0
    time.sleep(0.01)
    write_tiff(tmp_path / "data" / "s0" / "f000.tif", draw_frame((96, 96), discs=[(30, 30, 8), (60, 60, 8)]), 5.0)
    res = run_cli("run", w)
    assert res.returncode == 0, res.stderr
    assert "2 input files unchanged since the last run (not opened), 1 listed by the readers" in res.stderr
    assert "1 processed + 2 reused" in res.stderr and "results written" in res.stderr
    frames = xr.open_zarr(tmp_path / "out" / "r.zarr", group="frames").load()
    assert frames.sizes["frame"] == 3
    row = [i for i, s in enumerate(frames["source"].values) if str(s).endswith("f000.tif")][0]
    assert int(frames["grain_count"].values[row]) == 2


def test_interrupted_append_leaves_the_committed_state(tmp_path, monkeypatch):
    from grainhabit import append

    for i in range(2):
        frame(tmp_path, i)
    w = workflow(tmp_path)
    assert run_cli("run", w).returncode == 0
    store = tmp_path / "out" / "r.zarr"
    root_doc = (store / "zarr.json").read_bytes()
    frame(tmp_path, 2)
    real = append._write_atomic

    def die_at_the_commit(target, data, made):
        if target == store / "zarr.json":
            raise OSError("disk full (simulated)")
        real(target, data, made)

    monkeypatch.setattr(append, "_write_atomic", die_at_the_commit)
    assert run_cli("run", w).returncode == 1
    assert (store / "zarr.json").read_bytes() == root_doc
    # every group reads as the committed state: 2 frames, 2 grains, consistent lengths
    for group, dim, n in (("grains", "grain", 2), ("frames", "frame", 2), ("thumbnails", "frame", 2)):
        assert xr.open_zarr(store, group=group).load().sizes[dim] == n
    monkeypatch.setattr(append, "_write_atomic", real)
    res = run_cli("run", w)
    assert res.returncode == 0, res.stderr
    assert xr.open_zarr(store, group="frames").sizes["frame"] == 3
    assert xr.open_zarr(store, group="grains").load()["frame"].values.tolist() == [0, 1, 2]


# -- paths -------------------------------------------------------------------------------------------


def test_same_files_under_two_spellings_are_one_set_of_frames(tmp_path):
    for i in range(3):
        frame(tmp_path, i)
    (tmp_path / "workflows").mkdir()
    one = workflow(tmp_path / "workflows", "a.yaml", paths='["../data/**/*.tif"]', results="../out/r.zarr")
    assert run_cli("run", one).returncode == 0
    other = workflow(tmp_path, "b.yaml", paths='["data/**/*.tif", "workflows/../data/s0/*.tif"]')
    res = run_cli("run", other)
    assert res.returncode == 0, res.stderr
    assert "0 processed + 3 reused" in res.stderr and "3 frames ok" in res.stderr
    got = sources(tmp_path / "out" / "r.zarr")
    assert len(got) == 3 and all(s == os.path.realpath(s) and ".." not in s for s in got)


def test_recursive_glob_does_not_follow_a_symlink_loop(tmp_path):
    for i in range(4):
        frame(tmp_path, i)
    (tmp_path / "data" / "s0" / "back").symlink_to(tmp_path / "data", target_is_directory=True)
    (tmp_path / "alias").symlink_to(tmp_path / "data", target_is_directory=True)
    res = run_cli("run", workflow(tmp_path, paths='["data/**/*.tif", "alias/**/*.tif"]'))
    assert res.returncode == 0, res.stderr
    assert "4 frames ok" in res.stderr
    assert sources(tmp_path / "out" / "r.zarr") == sorted(str((tmp_path / "data").resolve() / f"s{i % 2}" /
                                                               f"f{i:03d}.tif") for i in range(4))


# -- refused up front --------------------------------------------------------------------------------


def test_check_lists_every_problem_and_run_refuses_the_same(tmp_path):
    body = WF.format(paths='["nothing/**/*.tif"]', results="blocked/r.zarr", scheduler="serial",
                     extra="  metadata_csv: missing.csv\n  pixel_size_nm: 5.0\n  pixel_size_nm: 6.0")
    (tmp_path / "blocked").write_text("a file where the output folder should be")
    w = write_workflow(tmp_path / "bad.yaml", body.replace("name: night", "name: night\ncolour: red"))
    for cmd in ("check", "run"):
        res = run_cli(cmd, w)
        assert res.returncode == 2, (cmd, res.stderr)
        lines = res.stderr.strip().splitlines()
        text = "\n".join(lines)
        assert all(ln.startswith("grainhabit: bad workflow: ") for ln in lines), text
        for key in ("colour", "input.paths", "input.metadata_csv", "output.results"):
            assert f": {key}: " in text, (cmd, key, text)
        assert "'pixel_size_nm' is given twice" in text
        assert "Traceback" not in res.stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == ["bad.yaml", "blocked"]  # nothing written


@pytest.mark.parametrize("case", ["no-input", "no-csv", "unwritable", "pseudo-fs"])
def test_each_up_front_refusal_is_exit_2_naming_the_key(tmp_path, case):
    frame(tmp_path, 0)
    paths, extra, results = '["data/**/*.tif"]', "", "out/r.zarr"
    if case == "no-input":
        paths = '["data/**/*.png"]'
    elif case == "no-csv":
        extra = "  metadata_csv: batches.csv"
    elif case == "pseudo-fs":
        # permission bits say yes (to root everywhere), but nothing can be created under /proc
        if not Path("/proc/self").is_dir():
            pytest.skip("no /proc on this system")
        results = "/proc/grainhabit-test/r.zarr"
    else:
        (tmp_path / "ro").write_text("x")
        results = "ro/sub/r.zarr"
    w = workflow(tmp_path, paths=paths, extra=extra, results=results)
    key = {"no-input": "input.paths", "no-csv": "input.metadata_csv", "unwritable": "output.results",
           "pseudo-fs": "output.results"}[case]
    for cmd in ("check", "run"):
        res = run_cli(cmd, w)
        assert res.returncode == 2 and f": {key}: " in res.stderr, (cmd, res.stderr)
    assert not (tmp_path / "out").exists()


def test_unmounted_share_leaves_the_store_untouched_whatever_on_missing_says(tmp_path):
    for i in range(3):
        frame(tmp_path, i, folder="share")
    frame(tmp_path, 9, folder="local")
    w = workflow(tmp_path, paths='["share/**/*.tif", "local/**/*.tif"]', extra="  on_missing: drop")
    assert run_cli("run", w).returncode == 0
    store = tmp_path / "out" / "r.zarr"
    snapshot = {p: p.read_bytes() for p in store.rglob("*") if p.is_file()}
    (tmp_path / "share").rename(tmp_path / "share-unmounted")
    frame(tmp_path, 10, folder="local")  # a new frame elsewhere does not make the night go ahead
    for cmd in ("check", "run"):
        res = run_cli(cmd, w)
        assert res.returncode == 2, res.stderr
        assert "input.paths[0]" in res.stderr and "none of the 3 files" in res.stderr
        assert "left untouched" in res.stderr
    assert {p: p.read_bytes() for p in store.rglob("*") if p.is_file()} == snapshot
    (tmp_path / "share-unmounted").rename(tmp_path / "share")
    res = run_cli("run", w)
    assert res.returncode == 0 and "5 frames ok" in res.stderr


# -- text read back ----------------------------------------------------------------------------------


def test_text_columns_read_back_as_users_expect(tmp_path):
    for i in range(2):
        frame(tmp_path, i)
    assert run_cli("run", workflow(tmp_path)).returncode == 0
    store = tmp_path / "out" / "r.zarr"
    from grainhabit.results import open_group, open_results

    grains = open_group(store, "grains")
    habits = grains["habit"].values
    assert habits.dtype == object and habits.astype(str).dtype.kind == "U"
    assert set(habits.astype(str)) <= {"cube", "cuboctahedron", "octahedron", "tabular_hexagon", "tabular_triangle",
                                       "rod", "irregular", ""}
    assert open_results(store)["frames"]["status"].values.astype(str).tolist() == ["ok", "ok"]
    # plain xarray: comparison and pandas work on the stored variable-length strings
    plain = xr.open_zarr(store, group="frames").load()
    assert bool((plain["status"] == "ok").all())
    df = plain.to_dataframe()
    assert df["status"].tolist() == ["ok", "ok"] and df["sample"].str.startswith("s").all()
    assert plain["source"].values.astype(object).tolist() == grains["source"].values.tolist()


# -- interruptions, dashboard ------------------------------------------------------------------------


def test_ctrl_c_on_a_local_cluster_is_one_line_logged_and_exit_130(tmp_path):
    for i in range(16):
        write_tiff(tmp_path / "data" / f"s{i % 2}" / f"g{i:02d}.tif",
                   draw_frame((320, 320), discs=[(100, 100, 30), (220, 220, 25)], seed=i), 5.0)
    w = workflow(tmp_path, scheduler="local")
    env = dict(os.environ, GRAINHABIT_NO_AUTOLOAD="1")
    # a terminal's Ctrl-C signals the whole foreground process group: the run and its dask workers
    proc = subprocess.Popen([sys.executable, "-m", "grainhabit", "run", str(w)], env=env, start_new_session=True,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    staging = tmp_path / "out" / "r.zarr.staging"
    deadline = time.monotonic() + 240
    while time.monotonic() < deadline and proc.poll() is None and not (
            staging.exists() and any(staging.glob("*.npz"))):
        time.sleep(0.05)
    os.killpg(proc.pid, signal.SIGINT)
    _, err = proc.communicate(timeout=180)
    assert proc.returncode == 130, err
    assert "Traceback" not in err and "KeyboardInterrupt" not in err, err
    assert [ln for ln in err.splitlines() if "interrupted" in ln] == [
        "grainhabit: interrupted; staged frames are kept and the next run resumes"]
    assert not [ln for ln in err.splitlines() if not ln.startswith(("20", "grainhabit: ", "["))], err
    assert "WARNING interrupted" in (tmp_path / "out" / "r.zarr.log").read_text()
    assert "8787" not in err


def test_no_dashboard_port_unless_asked(tmp_path, recwarn):
    from grainhabit.executors import make_executor

    ex = make_executor({"scheduler": "local", "workers": 1})
    ex.start()
    try:
        assert ex.cluster.scheduler.http_server is not None
        port = ex.cluster.scheduler.http_server.port
        assert port != 8787
    finally:
        ex.close()
    assert not [w for w in recwarn if "already in use" in str(w.message)]


# -- batch systems -------------------------------------------------------------------------------------


def test_slurm_job_script_from_the_workflow(tmp_path):
    pytest.importorskip("dask_jobqueue")
    from grainhabit.hpc import WORKER_CONFIG, job_script
    from grainhabit.manager import make_host
    from grainhabit.workflow import validate

    frame(tmp_path, 0)
    extra = ""
    body = WF.format(paths='["data/**/*.tif"]', results="out/r.zarr", scheduler="slurm", extra=extra) + (
        "  jobqueue:\n    cores: 8\n    memory: 16GB\n    walltime: '02:00:00'\n    queue: batch\n"
        "    account: lab-7\n    jobs: 3\n    job_script_prologue: ['source /srv/grainhabit/.venv/bin/activate']\n")
    w = write_workflow(tmp_path / "hpc.yaml", body.replace("  workers: 2\n", ""))
    plan = validate(str(w), make_host(autoload=False), check_files=True)
    ex = plan.config["execution"]
    script = job_script(ex["scheduler"], ex["jobqueue"])
    lines = script.splitlines()
    # the SLURM directives dask-jobqueue writes for these settings (its documented job script)
    assert lines[0].startswith("#!") and "#SBATCH -p batch" in lines and "#SBATCH -t 02:00:00" in lines
    assert "#SBATCH --cpus-per-task=8" in lines and "#SBATCH -A lab-7" in lines
    assert "source /srv/grainhabit/.venv/bin/activate" in lines
    worker = [ln for ln in lines if "distributed.cli.dask_worker" in ln]
    assert len(worker) == 1 and "--nworkers 8" in worker[0] and "--nthreads 1" in worker[0]
    exported = [ln for ln in lines if ln.startswith("export DASK_INTERNAL_INHERIT_CONFIG=")]
    import dask.config

    assert dask.config.deserialize(exported[0].split("=", 1)[1]) == WORKER_CONFIG
    assert lines.index(exported[0]) < lines.index(worker[0])


def test_batch_settings_are_checked_up_front(tmp_path):
    frame(tmp_path, 0)
    body = WF.format(paths='["data/**/*.tif"]', results="out/r.zarr", scheduler="pbs", extra="")
    w = write_workflow(tmp_path / "hpc.yaml", body + "  jobqueue:\n    cores: 0\n    colour: red\n")
    res = run_cli("check", w)
    assert res.returncode == 2
    for key in ("execution.jobqueue.cores", "execution.jobqueue.colour", "execution.jobqueue.memory"):
        assert f": {key}: " in res.stderr, res.stderr
    w = write_workflow(tmp_path / "local.yaml", WF.format(paths='["data/**/*.tif"]', results="out/r.zarr",
                                                          scheduler="local", extra="") + "  jobqueue: {cores: 2}\n")
    res = run_cli("check", w)
    assert res.returncode == 2 and "execution.jobqueue: only used with a batch-system scheduler" in res.stderr
    assert not (tmp_path / "out").exists()


def test_nightly_benchmark_prints_the_ratio_table(tmp_path, capsys):
    from grainhabit.cli import _benchmarks
    from grainhabit.manager import make_host

    bench = _benchmarks(make_host(autoload=False))["nightly"]
    code = bench(["--sizes", "3,9", "--base", "3", "--repeat", "1", "--distinct", "2", "--workdir", str(tmp_path)])
    out = capsys.readouterr().out
    assert code == 0, out
    rows = [ln.split() for ln in out.splitlines() if ln.strip() and ln.split()[0] in ("3", "9")]
    table = {r[0]: r for r in rows if len(r) == 7}
    assert set(table) == {"3", "9"} and float(table["3"][2]) == 1.0 and float(table["9"][2]) > 0
    assert table["9"][4] == "0" and table["9"][5] == "0" and table["9"][6] == "0"  # no old file, no staged read
    assert (tmp_path / "archive-9" / "out" / "r.zarr").exists()
