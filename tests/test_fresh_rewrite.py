"""A rewrite that keeps no stored row (``grainhabit run --fresh``) reads no stored values.

When every stored frame is replaced, the stored groups are opened lazily and cut to
no rows before they are loaded (``night._full_groups``, ``consolidate.select_frames``).
The datasets, and the store written from them, must be those of the earlier form kept
here as the reference (every stored group loaded whole, then cut). The frames are small
fields drawn here (invented data); the check is on the host's bookkeeping.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import xarray as xr

from builders import draw_frame, run_cli, write_tiff, write_workflow

pytestmark = pytest.mark.filterwarnings("ignore:Degrees of freedom <= 0:RuntimeWarning",
                                        "ignore:invalid value encountered in divide:RuntimeWarning")

WF = """\
version: 1
name: fresh
input:
  paths: ["data/**/*.tif"]
output:
  results: out/r.zarr
execution:
  scheduler: serial
"""


# --------------------------------------------------------------- reference

def _reference_select_frames(groups, keep):
    """``select_frames`` before the change: reads every owner column, whatever is kept."""
    keep = np.asarray(keep, dtype=bool)
    new_frame = np.cumsum(keep) - 1
    out = dict(groups)
    out["frames"] = groups["frames"].isel(frame=np.flatnonzero(keep))
    if "thumbnails" in groups and groups["thumbnails"].sizes.get("frame", 0) == keep.size:
        out["thumbnails"] = groups["thumbnails"].isel(frame=np.flatnonzero(keep))
    grains = groups["grains"]
    frame_of = grains["frame"].values.astype(np.int64) if grains.sizes.get("grain", 0) else np.zeros(0, np.int64)
    grain_keep = keep[frame_of] if frame_of.size else np.zeros(0, bool)
    g = grains.isel(grain=np.flatnonzero(grain_keep))
    if g.sizes.get("grain", 0):
        g["frame"] = g["frame"].copy(data=new_frame[frame_of[grain_keep]].astype(np.int64))
    out["grains"] = g
    if "outlines" in groups:
        ol = groups["outlines"]
        owner = ol["grain"].values.astype(np.int64)
        vkeep = grain_keep[owner] if owner.size else np.zeros(0, bool)
        new_grain = np.cumsum(grain_keep) - 1
        o = ol.isel(vertex=np.flatnonzero(vkeep))
        if o.sizes.get("vertex", 0):
            o["grain"] = o["grain"].copy(data=new_grain[owner[vkeep]].astype(np.int64))
        out["outlines"] = o
    return out


def _reference_full_groups(results, night, new):
    """``night._full_groups`` before the change: every stored group loaded whole, then cut."""
    from grainhabit.append import APPEND_DIMS
    from grainhabit.consolidate import concat_rows, offset_indices
    from grainhabit.night import _open_group

    old = {name: (night.stored[name] if name in night.stored else _open_group(results, name)).load()
           for name in APPEND_DIMS}
    old = _reference_select_frames(old, night.keep)
    offset_indices(new, old["frames"].sizes.get("frame", 0), old["grains"].sizes.get("grain", 0))
    return concat_rows(old, new)


# --------------------------------------------------------------- helpers

def _files(folder: Path) -> dict[str, bytes]:
    return {p.relative_to(folder).as_posix(): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


def _copy_entries(entries):
    """The night's new rows, fresh copies (``offset_indices`` shifts their indices in place)."""
    import copy

    return copy.deepcopy(entries)


def _same_dataset(a: xr.Dataset, b: xr.Dataset) -> None:
    xr.testing.assert_identical(a, b)
    assert list(a.variables) == list(b.variables)
    for k in a.variables:
        assert a[k].dtype == b[k].dtype, k
        assert a[k].shape == b[k].shape, k
        assert repr(a[k].encoding) == repr(b[k].encoding), k  # repr: NaN fill values compare equal as text


# --------------------------------------------------------------- test

def test_fresh_rewrite_equals_the_store_of_loading_every_group(tmp_path, monkeypatch):
    for i in range(3):
        img = draw_frame((96, 96), discs=[(48, 48, 10 + i)], squares=[(10, 10, 14)], seed=i)
        write_tiff(tmp_path / "data" / f"s{i % 2}" / f"f{i}.tif", img, 5.0)
    wf = write_workflow(tmp_path / "wf.yaml", WF)
    first = run_cli("run", wf, cwd=tmp_path)
    assert first.returncode == 0, first.stderr

    from grainhabit import night as nt
    from grainhabit.append import set_chunking
    from grainhabit.results import write_groups

    seen = {}
    lazy_full_groups = nt._full_groups

    def both(results, night, new):
        assert night.mode == "rewrite" and not night.keep.any()
        # the stored groups were not loaded by plan_night (no values read for the summaries)
        assert not any(v._in_memory for v in night.stored["grains"].variables.values() if v.dims == ("grain",))
        ref = _reference_full_groups(results, nt.NightPlan(**{**night.__dict__, "stored": {
            k: v.copy(deep=False) for k, v in night.stored.items()}}), _copy_entries(new))
        got = lazy_full_groups(results, night, new)
        # copies: the run sets the chunking of what it writes in place afterwards
        seen["ref"] = {k: v.copy(deep=True) for k, v in ref.items()}
        seen["got"] = {k: v.copy(deep=True) for k, v in got.items()}
        return got

    monkeypatch.setattr(nt, "_full_groups", both)
    second = run_cli("run", wf, "--fresh", cwd=tmp_path)
    assert second.returncode == 0, second.stderr
    assert "3 replaced" in second.stderr and "results written" in second.stderr, second.stderr
    ref, got = seen["ref"], seen["got"]
    assert sorted(ref) == sorted(got) == ["frames", "grains", "outlines", "thumbnails"]
    for name in ref:
        _same_dataset(ref[name], got[name])
    write_groups(tmp_path / "ref.zarr", set_chunking(ref))
    write_groups(tmp_path / "got.zarr", set_chunking(got))
    a, b = _files(tmp_path / "ref.zarr"), _files(tmp_path / "got.zarr")
    assert sorted(a) == sorted(b) and [k for k in a if a[k] != b[k]] == []
    assert any(k.startswith("grains/ecd_nm/c") for k in a)
    assert got["grains"].sizes["grain"] > 0
