"""Groups encoded without zarr's event loop (``grainhabit.zarr_direct``) against xarray's own ``to_zarr``.

``results.write_groups`` encodes the groups of the plain kinds a run stores
itself and leaves the rest to xarray. The reference is the store xarray and
zarr write (``write_groups(..., direct=False)``, every group through
``Dataset.to_zarr``): the two stores must be the same file for file, byte
for byte. The stores' content is invented here (numbers, flags and text of
no meaning).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import xarray as xr

from builders import make_groups
from grainhabit.append import set_chunking
from grainhabit.consolidate import build_datasets
from grainhabit.results import as_stored, open_results, write_groups
from grainhabit.zarr_direct import encode_group


def _files(folder: Path) -> dict[str, bytes]:
    return {p.relative_to(folder).as_posix(): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


def _copy(groups: dict) -> dict:
    out = {}
    for name, ds in groups.items():
        ds = ds.copy(deep=True)
        for var in ds.variables.values():
            var.encoding = {}
        out[name] = ds
    return set_chunking(out)


def _both_ways(tmp_path: Path, groups: dict, attrs: dict | None = None) -> dict[str, bytes]:
    """Write ``groups`` directly and through xarray; assert the stores equal; return the files."""
    write_groups(tmp_path / "direct.zarr", _copy(groups), attrs, direct=True)
    write_groups(tmp_path / "xarray.zarr", _copy(groups), attrs, direct=False)
    a, b = _files(tmp_path / "direct.zarr"), _files(tmp_path / "xarray.zarr")
    assert sorted(a) == sorted(b)
    assert [k for k in a if a[k] != b[k]] == []
    return a


def _staged(n: int, rng, status="ok", thumb_side=16) -> dict:
    """A staged frame result as a worker returns it (invented values), with columns of every plain kind."""
    cols = {"ecd_nm": rng.random(n) * 500, "label": np.arange(1, n + 1, dtype=np.int64),
            "edge_cut": rng.random(n) > 0.5, "split": np.zeros(n, bool),
            "habit": np.array(["cube", "octahedron", ""] * n, dtype=object)[:n],
            "habit_note": np.array([""] * n, dtype=object),             # empty text throughout: no chunk
            "thickness_nm": np.full(n, np.nan),                          # NaN throughout: no chunk
            "n_corners": np.zeros(n, np.int64),                          # zeros throughout: no chunk
            "alpha": np.where(rng.random(n) > 0.5, rng.random(n) * 3, np.nan),
            "note": np.array(["ü grain, µm", "", "x"] * n, dtype=object)[:n]}
    return {"record": {"source": "", "sample": "", "status": status, "grain_count": n,
                       "pixel_size_nm": 2.5, "error": "" if status == "ok" else "task: ValueError: invented"},
            "columns": cols, "outline_xy": rng.random((4 * n, 2)), "outline_offsets": np.arange(0, 4 * n + 1, 4),
            "thumb": rng.integers(0, 255, (thumb_side, thumb_side - n % 3), dtype=np.uint8), "thumb_factor": 8}


def _entries(n_frames: int, seed: int = 3):
    rng = np.random.default_rng(seed)
    out = []
    for i in range(n_frames):
        status = "failed" if i % 5 == 4 else "ok"
        info = {"source": f"/invented/s{i % 2}/f{i}.tif", "sample": f"s{i % 2}", "content_hash": f"h{i}",
                "stage_key": f"k{i}"}
        out.append((info, _staged(int(rng.integers(0, 9)), rng, status)))
    return out


@pytest.mark.parametrize("n_frames", [12, 8, 1, 0])
def test_run_groups_direct_equal_xarray(tmp_path, n_frames):
    """Groups as a run builds them: several thumbnail chunks (12 frames), exactly one (8), an edge chunk, none."""
    groups = build_datasets(_entries(n_frames))
    for name, ds in groups.items():
        assert encode_group(as_stored(_copy({name: ds})[name])) is not None, name
    files = _both_ways(tmp_path, groups, {"title": "invented", "count": 3, "ratio": 0.5, "list": [1, "a"]})
    if n_frames == 12:
        assert "thumbnails/image/c/1/0/0" in files and "grains/thickness_nm/c/0" not in files
        assert "grains/habit/c/0" in files and "grains/habit_note/c/0" not in files


def test_survey_store_direct_equal_xarray(tmp_path):
    """An invented survey store: summary groups with two dims and index coordinates, group attributes."""
    groups, attrs = make_groups({"A": dict(gm=400.0, gsd=1.1, habits={"cube": 0.9, "rod": 0.1}, alpha=(0.9, 0.1)),
                                 "B": dict(gm=600.0, gsd=1.3, habits={"octahedron": 1.0}, alpha=(3.2, 0.2))},
                                frames_per_sample=5, grains_per_frame=9)
    direct = [name for name, ds in _copy(groups).items() if encode_group(as_stored(ds)) is not None]
    assert {"grains", "frames", "outlines", "thumbnails", "summary"} <= set(direct)
    _both_ways(tmp_path, groups, attrs)
    back = open_results(tmp_path / "direct.zarr")
    xr.testing.assert_identical(back["grains"], open_results(tmp_path / "xarray.zarr")["grains"])


@pytest.mark.parametrize("change", ["float32", "int32", "nonindex_coord", "scalar", "encoding", "numpy_attr",
                                    "nan_attr", "fill_attr"])
def test_other_kinds_go_through_xarray(tmp_path, change):
    """What the direct encoding does not write is left to xarray, and the store is the same either way."""
    ds = xr.Dataset({"v": ("row", np.arange(5, dtype=np.float64), {"units": "1", "long_name": "v"}),
                     "t": ("row", np.array(["a", "b", "", "d", "e"], dtype=object), {"units": "", "long_name": "t"})},
                    attrs={"note": "invented"})
    if change == "float32":
        ds["v"] = ds["v"].astype(np.float32)
    elif change == "int32":
        ds["v"] = ds["v"].astype(np.int32)
    elif change == "nonindex_coord":
        ds = ds.assign_coords(tag=("row", np.arange(5)))
    elif change == "scalar":
        ds["s"] = xr.Variable((), 2.0)
    elif change == "numpy_attr":
        ds.attrs["n"] = np.int64(3)
    elif change == "nan_attr":
        ds["v"].attrs["limit"] = float("nan")
    elif change == "fill_attr":
        ds["v"].attrs["_FillValue"] = -1.0
    groups = _copy({"g": ds})
    if change == "encoding":
        groups["g"]["v"].encoding["dtype"] = np.dtype("float32")
    assert encode_group(as_stored(groups["g"])) is None
    write_groups(tmp_path / "direct.zarr", groups, direct=True)
    write_groups(tmp_path / "xarray.zarr", _copy({"g": ds}) if change != "encoding" else groups, direct=False)
    a, b = _files(tmp_path / "direct.zarr"), _files(tmp_path / "xarray.zarr")
    assert sorted(a) == sorted(b) and [k for k in a if a[k] != b[k]] == []


def test_stored_groups_read_back_and_written_again(tmp_path):
    """A store read back (its variables' encodings dropped, as a rewrite's new rows have none) writes again equal."""
    groups, attrs = make_groups({"A": dict(gm=400.0, gsd=1.1, habits={"cube": 1.0}, alpha=(0.9, 0.1))},
                                frames_per_sample=3, grains_per_frame=4, fail_one=False)
    write_groups(tmp_path / "first.zarr", _copy(groups), attrs, direct=False)
    back = open_results(tmp_path / "first.zarr")
    root = dict(back.pop("/").attrs)
    write_groups(tmp_path / "again.zarr", _copy(back), root, direct=True)
    a, b = _files(tmp_path / "first.zarr"), _files(tmp_path / "again.zarr")
    assert sorted(a) == sorted(b) and [k for k in a if a[k] != b[k]] == []


def test_zarr_settings_that_change_the_files_go_through_xarray(tmp_path):
    """With zarr set to write chunks of the fill value, the direct encoding steps aside (same store as xarray's)."""
    import zarr

    groups = build_datasets(_entries(3))
    with zarr.config.set({"array.write_empty_chunks": True}):
        assert encode_group(as_stored(_copy({"grains": groups["grains"]})["grains"])) is None
        files = _both_ways(tmp_path, groups)
    assert "grains/thickness_nm/c/0" in files  # NaN throughout, written as zarr was told
