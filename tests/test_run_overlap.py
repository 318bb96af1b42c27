"""What a run does beside its frames must not change what it writes.

A run on a local cluster consolidates the frames it processed from the
results it keeps in memory (``staging.staged_view``), warms xarray and zarr
up in a thread while the last frames run, and writes the store's files from
a thread of their own (``results._Spiller``). A second run that reuses every
staged frame reads them back from the staging files instead, in the main
thread only: both stores must hold the same files, byte for byte, but for the
run records of the root attributes.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pytest

from builders import run_cli, write_two_batches, write_workflow

WF = """\
version: 1
name: overlap
input:
  paths: ["data/**/*.tif"]
output:
  results: out/survey.zarr
execution:
  scheduler: local
  workers: 2
"""


def _files(folder: Path) -> dict[str, bytes]:
    return {p.relative_to(folder).as_posix(): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


def _root_without_runs(doc: bytes) -> dict:
    meta = json.loads(doc)
    meta["attributes"].pop("runs")
    return meta


def test_store_from_memory_equals_store_from_staging_files(tmp_path):
    write_two_batches(tmp_path / "data", frames=3)
    wf = write_workflow(tmp_path / "wf.yaml", WF)
    first = run_cli("run", wf, cwd=tmp_path)
    assert first.returncode == 0, first.stderr
    assert "6 processed + 0 reused" in first.stderr
    store = tmp_path / "out" / "survey.zarr"
    shutil.move(store, tmp_path / "from_memory.zarr")

    second = run_cli("run", wf, cwd=tmp_path)  # every frame staged: read back from the staging files
    assert second.returncode == 0, second.stderr
    assert "0 processed + 6 reused" in second.stderr

    a, b = _files(tmp_path / "from_memory.zarr"), _files(store)
    assert sorted(a) == sorted(b)
    assert [k for k in a if k != "zarr.json" and a[k] != b[k]] == []
    assert _root_without_runs(a["zarr.json"]) == _root_without_runs(b["zarr.json"])
    assert any(k.startswith("grains/ecd_nm/c") for k in a)  # the grains' values are among the files compared


def _result(n: int, rng) -> dict:
    """A frame result as a worker returns it: numeric, boolean and text columns (invented values)."""
    return {"record": {"source": "/x/a.tif", "sample": "a", "status": "ok", "grain_count": n,
                       "pixel_size_nm": 2.5, "timings": {"segment": 0.25}, "notes": None},
            "columns": {"ecd_nm": rng.random(n) * 500, "label": np.arange(1, n + 1, dtype=np.int32),
                        "edge_cut": rng.random(n) > 0.5,
                        "habit": np.array(["cube", "octahedron", ""] * n, dtype=object)[:n],
                        "note": np.array(["x"] * n)},
            "outline_xy": rng.random((4 * n, 2)), "outline_offsets": np.arange(0, 4 * n + 1, 4),
            "thumb": rng.integers(0, 255, (16, 12), dtype=np.uint8), "thumb_factor": 8}


@pytest.mark.parametrize("n", [0, 1, 7])
def test_staged_view_equals_the_staged_file_read_back(tmp_path, n):
    from grainhabit.staging import read_staged, staged_arrays, staged_view, write_staged

    result = _result(n, np.random.default_rng(n))
    arrays = staged_arrays(result)
    kept = staged_view(arrays)
    back = read_staged(write_staged(tmp_path, "k", result, arrays))
    assert kept["record"] == back["record"] and kept["thumb_factor"] == back["thumb_factor"]
    assert list(kept["columns"]) == list(back["columns"]) == list(result["columns"])
    pairs = [(kept["columns"][k], back["columns"][k]) for k in back["columns"]]
    pairs += [(kept[k], back[k]) for k in ("outline_xy", "outline_offsets", "thumb")]
    for mine, read in pairs:
        assert mine.dtype == read.dtype and mine.shape == read.shape
        np.testing.assert_array_equal(mine, read)
