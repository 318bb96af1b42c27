"""Plugin authoring end to end: install, discover, validate, run, scaffold, faults.

The module fixture installs the worked example plugin (``tests/example_plugin``,
step ``segment-li``) and a package made by ``grainhabit new-plugin`` into the
test environment with ``pip install -e`` (one pip call), and uninstalls both
when the module's tests are done. Faulty plugins (an import that raises, a
plugin for hook API 99, a step that raises or returns the wrong type on some
frames) are offered through a throw-away ``*.dist-info`` folder on
``PYTHONPATH``: the same entry-point path an installed distribution takes,
without a pip call.

All frames are invented: bright squares on a dark, noisy background.
"""

from __future__ import annotations

import importlib.util
import json
import os
import shutil
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest
import tifffile

REPO = Path(__file__).resolve().parents[1]
EXAMPLE = REPO / "tests" / "example_plugin"
EXAMPLE_DIST = "grainhabit-li-threshold"
SCAFFOLD_NAME = "demo-otsu"
SCAFFOLD_DIST = f"grainhabit-{SCAFFOLD_NAME}"
PX_NM = 10.0
#: Square sides in pixels drawn into every good frame.
SIDES = (16, 20, 24, 28)


def _env(extra_path: Path | None = None) -> dict:
    env = dict(os.environ)
    env.pop("GRAINHABIT_NO_AUTOLOAD", None)  # entry points must load here
    env["PIP_DISABLE_PIP_VERSION_CHECK"] = "1"
    if extra_path is not None:
        env["PYTHONPATH"] = os.pathsep.join([str(extra_path)] + [p for p in [env.get("PYTHONPATH")] if p])
    return env


def _cli(*args, cwd, env=None, timeout=300) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "grainhabit", *map(str, args)], cwd=cwd, env=env or _env(),
                          capture_output=True, text=True, timeout=timeout)


def _pip(*args, timeout=300) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "pip", *args], capture_output=True, text=True,
                          env=_env(), timeout=timeout)


def _offline_build_ok() -> bool:
    """True if setuptools can build an editable wheel without an isolated build env."""
    import importlib.metadata

    try:  # read the version without importing setuptools (its distutils shim clashes with pytest)
        major, minor = (int(x) for x in importlib.metadata.version("setuptools").split(".")[:2])
    except importlib.metadata.PackageNotFoundError:
        return False
    return (major, minor) >= (70, 1) or importlib.util.find_spec("wheel") is not None


# -- faulty plugins, offered as entry points of a fake distribution --------------

FAULTY_STEPS = '''
"""Invented test plugin: a thickness step that misbehaves on chosen frames."""
import os
import numpy as np
from grainhabit import hookimpl
from grainhabit.params import StepInfo

GRAINHABIT_API = 1
STEP = StepInfo(name="faulty-thickness", stage="thickness", version="1.0",
                summary="Raises on boom* frames, returns a dict on wrongtype* frames (test only).")

@hookimpl
def grainhabit_thickness(frame, params):
    name = os.path.basename(frame.source)
    if name.startswith("boom"):
        raise RuntimeError("simulated fault in a third-party hook")
    if name.startswith("wrongtype"):
        return {"thickness_nm": []}
    n = frame.n_grains
    return frame.with_columns(thickness_nm=np.full(n, np.nan), tabular_aspect_ratio=np.full(n, np.nan))
'''

BROKEN_IMPORT = '''
raise RuntimeError("vendor SDK for the instrument is not installed")
'''

OLD_API = '''
from grainhabit import hookimpl
from grainhabit.params import StepInfo

GRAINHABIT_API = 99
STEP = StepInfo(name="future-step", stage="preprocess")

@hookimpl
def grainhabit_preprocess(frame, params):
    return frame
'''

RAISING_READER = '''
from grainhabit import hookimpl

GRAINHABIT_API = 1

@hookimpl
def grainhabit_list_frames(path, options):
    raise RuntimeError("this reader chokes on every file")
'''


def _fake_distribution(site: Path, dist: str, modules: dict[str, str], entry_points: dict[str, str]) -> Path:
    """Write modules plus ``<dist>.dist-info`` with entry points into ``site``."""
    site.mkdir(parents=True, exist_ok=True)
    for mod, text in modules.items():
        (site / f"{mod}.py").write_text(textwrap.dedent(text))
    info = site / f"{dist.replace('-', '_')}-0.1.dist-info"
    info.mkdir()
    (info / "METADATA").write_text(f"Metadata-Version: 2.1\nName: {dist}\nVersion: 0.1\n")
    lines = "\n".join(f"{k} = {v}" for k, v in entry_points.items())
    (info / "entry_points.txt").write_text(f"[grainhabit]\n{lines}\n")
    return site


# -- invented frames ---------------------------------------------------------------


def _write_frame(path: Path, seed: int) -> None:
    rng = np.random.default_rng(seed)
    img = np.full((128, 128), 400.0)
    for (r, c), s in zip([(10, 10), (10, 70), (64, 12), (66, 70)], SIDES):
        img[r:r + s, c:c + s] = 3000.0
    img += rng.normal(0.0, 40.0, img.shape)
    path.parent.mkdir(parents=True, exist_ok=True)
    tifffile.imwrite(path, np.clip(img, 0, 65535).astype(np.uint16))


def _workflow(path: Path, steps: str, results: str = "out/results.zarr", extra: str = "",
              scheduler: str = "local") -> Path:
    path.write_text(textwrap.dedent(f"""\
        version: 1
        name: {path.stem}
        {extra}
        input:
          paths: ["data/**/*.tif"]
          pixel_size_nm: {PX_NM}
        output:
          results: {results}
        steps:
        """) + textwrap.indent(textwrap.dedent(steps), "  ") + textwrap.dedent(f"""\
        execution:
          scheduler: {scheduler}
          workers: 2
        """))
    return path


# -- the module fixture: install once, uninstall at the end ---------------------------


@pytest.fixture(scope="module")
def authoring(tmp_path_factory):
    if importlib.util.find_spec("pip") is None:
        pytest.skip("pip is not available in this environment: cannot install the example plugin")
    tmp = tmp_path_factory.mktemp("authoring")
    made = _cli("new-plugin", SCAFFOLD_NAME, "--dir", tmp / "pkgs", "--stage", "segment", cwd=tmp)
    assert made.returncode == 0, made.stderr
    scaffold = tmp / "pkgs" / SCAFFOLD_DIST
    egg_infos_before = set(EXAMPLE.glob("*.egg-info"))
    args = ["install", "--no-deps", "-q"]
    if _offline_build_ok():
        args += ["--no-build-isolation", "--no-index"]
    args += ["-e", str(EXAMPLE), "-e", str(scaffold)]
    res = _pip(*args)
    assert res.returncode == 0, f"pip install failed:\n{res.stdout}\n{res.stderr}"
    site = _fake_distribution(tmp / "site", "grainhabit-test-faults",
                              {"faulty_steps": FAULTY_STEPS, "broken_gh_plugin": BROKEN_IMPORT,
                               "old_api_plugin": OLD_API},
                              {"faulty-thickness": "faulty_steps", "broken-import": "broken_gh_plugin",
                               "old-api": "old_api_plugin"})
    try:
        yield {"tmp": tmp, "scaffold": scaffold, "made": made, "site": site}
    finally:
        _pip("uninstall", "-y", "-q", EXAMPLE_DIST, SCAFFOLD_DIST)
        for p in set(EXAMPLE.glob("*.egg-info")) - egg_infos_before:
            shutil.rmtree(p, ignore_errors=True)
        shutil.rmtree(EXAMPLE / "build", ignore_errors=True)


# -- discovery ------------------------------------------------------------------------


def test_plugins_json_lists_installed_plugins_and_names_broken_ones(authoring):
    res = _cli("plugins", "--json", cwd=authoring["tmp"], env=_env(authoring["site"]))
    assert res.returncode == 0, res.stderr
    data = json.loads(res.stdout)
    rows = {r["name"]: r for r in data["plugins"]}

    li = rows["segment-li"]  # the worked example, found by its entry point
    assert li["origin"] == f"entry point ({EXAMPLE_DIST})"
    assert li["hooks"] == ["grainhabit_segment"] and li["stage"] == "segment"
    params = {p["name"]: p for p in li["params"]}
    assert set(params) == {"min_ecd_nm", "fill_holes", "connectivity"}
    assert params["min_ecd_nm"]["unit"] == "nm" and params["min_ecd_nm"]["default"] == 40.0
    assert (params["connectivity"]["low"], params["connectivity"]["high"]) == (1, 2)

    made = rows[SCAFFOLD_NAME]  # the package new-plugin wrote, right after pip install -e
    assert made["origin"] == f"entry point ({SCAFFOLD_DIST})" and made["hooks"] == ["grainhabit_segment"]
    assert [p["name"] for p in made["params"]] == ["min_ecd_nm"]

    assert "segment-grains" in rows and "faulty-thickness" in rows  # the rest still loaded
    problems = {p["name"]: p["error"] for p in data["problems"]}
    assert "broken-import" in problems["broken-import"]
    assert "RuntimeError: vendor SDK for the instrument is not installed" in problems["broken-import"]
    assert "hook API 99" in problems["old-api"] and f"API {data['api_version']}" in problems["old-api"]
    assert "future-step" not in rows
    # a warning per broken plugin on stderr, one line each, no traceback without --debug
    warn = [ln for ln in res.stderr.splitlines() if ln.startswith("grainhabit: warning:")]
    assert len(warn) == 2 and "Traceback" not in res.stderr


# -- parameter validation ---------------------------------------------------------------


def test_bad_parameter_of_a_plugin_is_refused_with_file_and_key(authoring):
    wd = authoring["tmp"] / "badparam"
    wd.mkdir()
    _write_frame(wd / "data" / "a" / "f0.tif", 0)
    wf = _workflow(wd / "bad.yaml", """\
        - plugin: segment-li
          params: {connectivity: 3}
        """)
    res = _cli("check", wf, cwd=wd)
    assert res.returncode == 2
    line = res.stderr.strip()
    assert "\n" not in line and str(wf) in line
    assert "steps[0].params.connectivity" in line and "expected integer in [1, 2], got 3" in line
    assert not (wd / "out").exists()


# -- execution on dask workers, with faults in one plugin --------------------------------


def test_example_plugin_runs_on_dask_workers_and_faults_stay_in_their_frame(authoring):
    import xarray as xr

    wd = authoring["tmp"] / "run"
    for name, seed in [("batch-a/f0", 1), ("batch-b/f1", 2), ("batch-b/boom", 3), ("batch-b/wrongtype", 4)]:
        _write_frame(wd / "data" / f"{name}.tif", seed)
    wf = _workflow(wd / "survey.yaml", """\
        - plugin: segment-li
          params: {min_ecd_nm: 60.0}
        - plugin: faulty-thickness
        """)
    res = _cli("run", wf, cwd=wd, env=_env(authoring["site"]))
    log = res.stderr
    assert res.returncode == 1, log  # finished, some frames failed
    assert "local cluster (2 worker processes" in log
    assert "broken-import" in log and "hook API 99" in log  # reported, the run went on

    store = str(wd / "out" / "results.zarr")
    frames = xr.open_zarr(store, group="frames").load()
    status = {Path(str(s)).stem: (str(st), str(e)) for s, st, e in
              zip(frames["source"].values, frames["status"].values, frames["error"].values)}
    assert status["boom"] == ("failed", "faulty-thickness: RuntimeError: simulated fault in a third-party hook")
    assert status["wrongtype"][0] == "failed"
    assert status["wrongtype"][1].startswith("faulty-thickness: TypeError:")
    assert "dict" in status["wrongtype"][1] and "FrameData" in status["wrongtype"][1]
    assert [status[k][0] for k in ("f0", "f1")] == ["ok"] * 2
    notes = " ".join(str(n) for n in frames["notes"].values)
    assert "segment-li: Li threshold" in notes

    grains = xr.open_zarr(store, group="grains").load()
    assert grains.sizes["grain"] == 2 * len(SIDES)
    # Handbook geometry: a square of side s has ECD = 2 s / sqrt(pi) (ISO 9276-6), so the
    # equivalent side ECD * sqrt(pi) / 2 of the drawn squares steps by exactly 4 px. Li's level
    # sits below the middle of the (1 px Gaussian) blurred edge, so each edge may come out up to
    # one pixel further out: the offset lies in [0, 2] px.
    ecd = np.sort(grains["ecd_nm"].values.reshape(2, len(SIDES)), axis=1)
    side_px = ecd * np.sqrt(np.pi) / 2 / PX_NM
    np.testing.assert_allclose(np.diff(side_px, axis=1), np.diff(SIDES) * np.ones((2, 1)), atol=0.25)
    offset = side_px - np.array(SIDES)
    assert np.all((offset >= 0.0) & (offset <= 2.0)), offset
    assert {str(v) for v in grains["sample"].values} == {"batch-a", "batch-b"}
    assert "habit" in grains  # the built-in stages after segment-li ran too


# -- the scaffold -------------------------------------------------------------------------------


def test_new_plugin_output_and_all_generated_tests_pass(authoring, tmp_path):
    from grainhabit.plugins.scaffold.new_plugin import KINDS, write_package

    made, scaffold = authoring["made"], authoring["scaffold"]
    assert f"created {scaffold}" in made.stdout and "pip install -e" in made.stdout
    module = SCAFFOLD_DIST.replace("-", "_")
    assert sorted(p.name for p in scaffold.iterdir() if not p.name.endswith(".egg-info")) == sorted(
        [".gitignore", "README.md", "pyproject.toml", module, f"test_{module}.py"])
    text = (scaffold / "pyproject.toml").read_text()
    assert "[project.entry-points.grainhabit]" in text and f'{SCAFFOLD_NAME} = "{module}"' in text
    # every kind of package the command can write has a test that passes as generated
    for kind in KINDS:
        if kind != "segment":
            write_package(f"gen-{kind.replace('_', '-')}", tmp_path, kind)
    res = subprocess.run([sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider", "--rootdir",
                          str(tmp_path), str(tmp_path), str(scaffold)],
                         cwd=tmp_path, capture_output=True, text=True, env=_env(), timeout=300)
    assert res.returncode == 0, res.stdout[-3000:]
    assert f"{2 * len(KINDS) - 1} passed" in res.stdout or " passed" in res.stdout


def test_new_plugin_refuses_bad_names_and_existing_folders(tmp_path, capsys):
    import argparse

    from grainhabit.plugins.scaffold.new_plugin import _cmd_new_plugin, write_package

    for bad in ("Bad_Name", "9lives", "double--hyphen", "grainhabit-x", "x" * 41, ""):
        with pytest.raises(ValueError, match="bad NAME"):
            write_package(bad, tmp_path)
    first = write_package("keep-me", tmp_path, "measure")
    marker = first / "README.md"
    marker.write_text("my own notes")
    with pytest.raises(FileExistsError, match="exists already"):
        write_package("keep-me", tmp_path, "segment")
    assert marker.read_text() == "my own notes"
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".new-plugin-")]
    rc = _cmd_new_plugin(argparse.Namespace(name="Bad_Name", dir=str(tmp_path), stage="segment", host=None))
    err = capsys.readouterr().err
    assert rc == 2 and err.count("\n") == 1 and err.startswith("grainhabit new-plugin: bad NAME 'Bad_Name'")


# -- plugins named by a workflow's plugins: list ------------------------------------------------


def test_workflow_plugin_whose_import_fails_is_refused_by_name(tmp_path, monkeypatch, capsys):
    from grainhabit.cli import main

    monkeypatch.setenv("GRAINHABIT_NO_AUTOLOAD", "1")
    _write_frame(tmp_path / "data" / "a" / "f0.tif", 0)
    for command in ("check", "run"):
        (tmp_path / f"broken_{command}.py").write_text(BROKEN_IMPORT)
        wf = _workflow(tmp_path / f"{command}.yaml", "- plugin: segment-grains\n",
                       extra=f"plugins: [broken_{command}.py]", scheduler="serial")
        assert main([command, str(wf)]) == 2
        err = capsys.readouterr().err.strip()
        assert "\n" not in err and str(wf) in err and ": plugins: " in err
        assert f"broken_{command}.py" in err and "RuntimeError: vendor SDK for the instrument is not installed" in err
    assert not (tmp_path / "out" / "results.zarr").exists()


def test_failed_plugin_file_stays_failed_in_the_same_process(tmp_path):
    from grainhabit.manager import make_host

    path = tmp_path / "broken_twice.py"
    path.write_text(BROKEN_IMPORT)
    for _ in range(2):
        host = make_host(extra=(str(path),), autoload=False)
        assert [p.origin for p in host.problems] == ["workflow"]


def test_plugin_for_another_api_version_is_refused(tmp_path):
    from grainhabit.manager import make_host

    path = tmp_path / "old_api_local.py"
    path.write_text(OLD_API)
    host = make_host(extra=(str(path),), autoload=False)
    assert "future-step" not in host.steps()
    (prob,) = [p for p in host.problems if p.origin == "workflow"]
    assert "old_api_local" in prob.message and "hook API 99" in prob.message and "API 1" in prob.message


def test_step_from_workflow_plugin_file_is_usable(tmp_path, monkeypatch, capsys):
    from grainhabit.cli import main

    monkeypatch.setenv("GRAINHABIT_NO_AUTOLOAD", "1")
    (tmp_path / "faulty_local.py").write_text(FAULTY_STEPS)
    _write_frame(tmp_path / "data" / "a" / "f0.tif", 0)
    wf = _workflow(tmp_path / "wf.yaml", "- plugin: faulty-thickness\n", extra="plugins: [faulty_local.py]",
                   scheduler="serial")
    assert main(["check", str(wf)]) == 0, capsys.readouterr().err
    assert "thickness  faulty-thickness 1.0" in capsys.readouterr().out


def test_raising_reader_does_not_hide_the_built_in_readers(tmp_path):
    from grainhabit.manager import make_host
    from grainhabit.runner import list_frames
    from grainhabit.workflow import validate

    (tmp_path / "raising_reader.py").write_text(RAISING_READER)
    _write_frame(tmp_path / "data" / "a" / "f0.tif", 0)
    wf = _workflow(tmp_path / "wf.yaml", "- plugin: segment-grains\n", scheduler="serial")
    host = make_host(extra=(str(tmp_path / "raising_reader.py"),), autoload=False)
    plan = validate(str(wf), host)
    frames, problems = list_frames(plan, host, plan.processing_key(host))
    assert len(frames) == 1, problems
