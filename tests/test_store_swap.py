"""Replacing a results store: the replaced store is removed off the run's path, leftovers are swept.

``results.write_results(..., cleanup=[])`` (as the run calls it) swaps the new store in and leaves the
removal of the replaced one to a detached process (or a thread in ``cleanup``); ``results.recover``
restores ``<store>.previous`` only where the store itself is missing, and removes the folders of
replaced stores whose removal was cut short. The stores' content is invented here.
"""

from __future__ import annotations

import time
from pathlib import Path

import numpy as np
import xarray as xr

from grainhabit.results import REMOVING, open_results, recover, write_results


def _groups(value: float) -> dict:
    return {"grains": xr.Dataset({"ecd_nm": ("grain", np.full(3, value), {"units": "nm", "long_name": "invented"})})}


def _siblings(store: Path) -> list[str]:
    return sorted(p.name for p in store.parent.iterdir())


def test_replaced_store_is_removed_without_waiting(tmp_path):
    store = tmp_path / "out.zarr"
    write_results(store, _groups(1.0), {"night": 1})
    for night in (2, 3):
        cleanup: list = []
        write_results(store, _groups(float(night)), {"night": night}, cleanup=cleanup)
        for thread in cleanup:
            thread.join()
        got = open_results(store)
        assert got["/"].attrs["night"] == night and float(got["grains"]["ecd_nm"][0]) == night
        assert not (tmp_path / "out.zarr.previous").exists()
        deadline = time.monotonic() + 20.0
        while _siblings(store) != ["out.zarr"] and time.monotonic() < deadline:
            time.sleep(0.05)
        assert _siblings(store) == ["out.zarr"]


def test_recover_sweeps_cut_short_removals_and_restores_only_previous(tmp_path):
    store = tmp_path / "out.zarr"
    write_results(store, _groups(1.0), {"night": 1})
    left = tmp_path / f".out.zarr{REMOVING}0badc0de"
    (left / "grains").mkdir(parents=True)
    (left / "grains" / "zarr.json").write_text("{}")
    other = tmp_path / f".other.zarr{REMOVING}0badc0de"   # another store's: not touched
    other.mkdir()
    assert recover(store) is False
    assert _siblings(store) == [other.name, "out.zarr"]
    # a stop between the two renames: the store is missing, its .previous is restored
    store.rename(tmp_path / "out.zarr.previous")
    assert recover(store) is True
    assert open_results(store)["/"].attrs["night"] == 1
