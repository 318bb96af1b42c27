"""The host's datasets built in one step against the earlier one-variable-at-a-time forms.

``consolidate.build_datasets`` makes the ``grains`` and ``frames`` datasets from a dict of
variables in one ``xarray.Dataset`` call, and ``results.as_stored`` replaces the text
variables in one ``assign``; before, each variable was set on its own (``ds[name] = var``),
which merges the whole dataset again at every variable. The references below are those
earlier forms. The datasets must be identical (values, dtypes, attributes, encodings, the
order of the variables, the indexes) and so must the stores written from them, file for
file. The staged results are invented here (numbers, flags and text of no meaning).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import xarray as xr

from grainhabit.consolidate import build_datasets
from grainhabit.results import as_stored, text_array, write_groups


# --------------------------------------------------------------- references

def _reference_as_stored(ds: xr.Dataset) -> xr.Dataset:
    """``results.as_stored`` before the change: one ``__setitem__`` per text variable."""
    out = ds.copy()
    for name, var in list(out.variables.items()):
        if var.dtype.kind in ("U", "S", "O"):
            out[name] = var.copy(data=text_array(np.asarray(var.values).ravel()).reshape(var.shape))
    return out


def _one_by_one(ds: xr.Dataset) -> xr.Dataset:
    """What ``build_datasets`` made before: an empty dataset, its variables set one at a time, in order."""
    out = xr.Dataset()
    for name, var in ds.variables.items():
        out[name] = var.copy(deep=True)
    return out


# --------------------------------------------------------------- helpers

def _files(folder: Path) -> dict[str, bytes]:
    return {p.relative_to(folder).as_posix(): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


def _same(a: xr.Dataset, b: xr.Dataset) -> None:
    xr.testing.assert_identical(a, b)
    assert list(a.variables) == list(b.variables)
    assert list(a.coords) == list(b.coords) and list(a.data_vars) == list(b.data_vars)
    assert a.attrs == b.attrs and repr(a.encoding) == repr(b.encoding)
    assert {k: type(v) for k, v in a.xindexes.items()} == {k: type(v) for k, v in b.xindexes.items()}
    for k in a.variables:
        assert a[k].dtype == b[k].dtype, k
        assert type(a.variables[k]) is type(b.variables[k]), k
        assert repr(a[k].encoding) == repr(b[k].encoding), k


def _staged(n: int, rng, status="ok", extra=True) -> dict:
    """A staged frame result as a worker returns it (invented values)."""
    cols = {"ecd_nm": rng.random(n) * 500, "label": np.arange(1, n + 1, dtype=np.int32),
            "edge_cut": rng.random(n) > 0.5,
            "habit": np.array(["cube", "octahedron", ""] * n, dtype=object)[:n],
            "habit_note": np.array(["x"] * n)}
    if extra:
        cols["custom_score"] = rng.random(n)          # a column only some frames have
    return {"record": {"source": "", "sample": "", "status": status, "grain_count": n,
                       "pixel_size_nm": 2.5, "timings": {"segment": 0.25},
                       "error": "" if status == "ok" else "task: ValueError: invented"},
            "columns": cols, "outline_xy": rng.random((4 * n, 2)), "outline_offsets": np.arange(0, 4 * n + 1, 4),
            "thumb": rng.integers(0, 255, (16, 12 + n % 3), dtype=np.uint8), "thumb_factor": 8}


def _entries():
    rng = np.random.default_rng(7)
    out = []
    for i, (n, status, extra) in enumerate([(5, "ok", True), (0, "ok", False), (3, "failed", True),
                                            (7, "ok", False), (2, "ok", True)]):
        info = {"source": f"/invented/s{i % 2}/f{i}.tif", "sample": f"s{i % 2}", "content_hash": f"h{i}",
                "stage_key": f"k{i}", "batch": f"b{i}"}                 # 'batch': an extra listing field
        out.append((info, _staged(n, rng, status, extra)))
    return out


# --------------------------------------------------------------- tests

@pytest.mark.parametrize("entries", [_entries(), _entries()[1:2], []], ids=["mixed", "no grains", "none"])
def test_build_datasets_equals_setting_the_variables_one_by_one(tmp_path, entries):
    got = build_datasets(entries)
    ref = {k: (_one_by_one(v) if k in ("grains", "frames") else v) for k, v in build_datasets(entries).items()}
    assert list(got) == list(ref)
    for k in got:
        _same(got[k], ref[k])
    # the order the columns were set in before: the contract's columns, then the others as first seen
    from grainhabit.columns import FRAME_COLUMNS, GRAIN_COLUMNS

    seen = [k for _, st in entries for k in st["columns"]]
    assert list(got["grains"].variables) == list(dict.fromkeys([c.name for c in GRAIN_COLUMNS] + seen))
    if entries:
        assert list(got["frames"].variables) == [c.name for c in FRAME_COLUMNS] + ["batch"]
        assert got["grains"].sizes["grain"] == sum(e[1]["record"]["grain_count"] for e in entries
                                                   if e[1]["record"]["status"] == "ok")
        write_groups(tmp_path / "got.zarr", got)
        write_groups(tmp_path / "ref.zarr", ref)
        a, b = _files(tmp_path / "got.zarr"), _files(tmp_path / "ref.zarr")
        assert sorted(a) == sorted(b) and [k for k in a if a[k] != b[k]] == []


def test_as_stored_equals_replacing_the_text_variables_one_by_one(tmp_path):
    ds = xr.Dataset(
        {"count": ("sample", np.array([3, 4], dtype=np.int64)),
         "note": ("sample", np.array(["a", None], dtype=object)),
         "fixed": (("sample", "habit"), np.array([["x", "yy", "z"], ["", "w", "v"]])),
         "share": (("sample", "habit"), np.random.default_rng(1).random((2, 3)))},
        coords={"sample": np.array(["s1", "s2"], dtype=object), "habit": np.array(["cube", "rod", "irregular"])},
        attrs={"title": "invented"})
    ds["share"].attrs["units"] = "1"
    ds["count"].encoding["dtype"] = np.dtype("int64")
    for d in (ds, ds.drop_vars(["note", "fixed"]), xr.Dataset({"v": ("r", np.zeros(2))})):
        got, ref = as_stored(d), _reference_as_stored(d)
        _same(got, ref)
        assert got is not d
    write_groups(tmp_path / "got.zarr", {"summary": as_stored(ds)})
    write_groups(tmp_path / "ref.zarr", {"summary": _reference_as_stored(ds)})
    a, b = _files(tmp_path / "got.zarr"), _files(tmp_path / "ref.zarr")
    assert sorted(a) == sorted(b) and [k for k in a if a[k] != b[k]] == []
    assert any(k.startswith("summary/fixed/c") for k in a)
