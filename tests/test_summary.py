"""Tests of the summarise-samples step on small invented results stores (tests/builders.py).

The stores are invented test data: lognormal grain sizes and
regular polygon outlines, not measurements of any real emulsion.
"""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr

from grainhabit.results import open_results
from grainhabit.plugins.survey import statistics as st
from grainhabit.plugins.survey import summarise_samples as summary

from builders import SAMPLES, make_store

# --------------------------------------------------------------------------
# tests
# --------------------------------------------------------------------------


def _tiny(ecd, habit, area=None, edge=None, alpha=None, sample=None, frame=None):
    n = len(ecd)
    ecd = np.asarray(ecd, float)
    grains = xr.Dataset({
        "ecd_nm": ("grain", ecd),
        "area_nm2": ("grain", np.pi / 4 * ecd**2 if area is None else np.asarray(area, float)),
        "habit": ("grain", np.asarray(habit, dtype=object)),
        "alpha": ("grain", np.full(n, np.nan) if alpha is None else np.asarray(alpha, float)),
        "edge_cut": ("grain", np.zeros(n, bool) if edge is None else np.asarray(edge, bool)),
        "sample": ("grain", np.asarray(sample or ["s"] * n, dtype=object)),
        "frame": ("grain", np.asarray(frame or [0] * n)),
    })
    nf = int(max(frame or [0])) + 1
    frames = xr.Dataset({
        "sample": ("frame", np.asarray(sorted(set(sample or ["s"])) * nf, dtype=object)[:nf]),
        "status": ("frame", np.asarray(["ok"] * nf, dtype=object)),
        "batch": ("frame", np.asarray([f"b{i % 2}" for i in range(nf)], dtype=object)),
    })
    return grains, frames


def test_summary_matches_statistics_functions_and_excludes_edge_cut():
    # hand example: five grains, one edge-cut; ISO 9276-2 D[3,2] computed by hand below
    ecd = [100.0, 200.0, 300.0, 400.0, 5000.0]
    grains, frames = _tiny(ecd, ["cube", "cube", "octahedron", "rod", "cube"], edge=[0, 0, 0, 0, 1])
    ds = summary.summarise(grains, frames, {"bootstrap": 0})["summary"]
    s = ds.sel(sample="s")
    assert int(s.grain_count) == 4 and int(s.edge_cut_count) == 1
    # ISO 9276-2: D[3,2] = sum x^3 / sum x^2 = (1 + 8 + 27 + 64) e6 / (1 + 4 + 9 + 16) e4
    assert float(s.sauter_d32_nm) == pytest.approx(100e6 / 30e4 * 1.0)
    assert float(s.ecd_mean_nm) == pytest.approx(250.0)
    # sample sd (ddof = 1) of 100..400 = sqrt(50000/3)
    assert float(s.ecd_cov_pct) == pytest.approx(100 * np.sqrt(50000 / 3) / 250)
    nf = s.habit_number_fraction.sel(habit=["cube", "octahedron", "rod"]).values
    np.testing.assert_allclose(nf, [0.5, 0.25, 0.25])
    assert list(ds.habit.values) == list(st.HABITS)
    for name, var in ds.variables.items():
        assert "units" in var.attrs and "long_name" in var.attrs, name


def test_empty_sample_and_all_nan_alpha_give_nan_without_warnings(recwarn):
    grains, frames = _tiny([300.0, 310.0], ["cube", "cube"], edge=[1, 1], frame=[0, 1])
    ds = summary.summarise(grains, frames, {"bootstrap": 50, "group_by": ["batch"]})
    s = ds["summary"].sel(sample="s")
    assert int(s.grain_count) == 0
    assert np.isnan(float(s.ecd_mean_nm)) and np.isnan(float(s.alpha_median))
    assert str(s.monodispersity.values) == "no data" and not bool(s.monodisperse)
    assert np.isnan(s.habit_number_fraction.values).all()
    assert set(ds["summary_by_batch"].batch.values) == {"b0", "b1"}
    assert len(recwarn) == 0, [str(w.message) for w in recwarn]


def test_group_by_unknown_field_is_refused():
    grains, frames = _tiny([300.0], ["cube"])
    with pytest.raises(ValueError, match="no field 'lot'"):
        summary.summarise(grains, frames, {"group_by": ["lot"]})


def test_store_round_trip_and_verdicts(tmp_path, recwarn):
    path = make_store(tmp_path / "r.zarr")
    res = open_results(path)
    ds = res["summary"]
    assert set(ds.sample.values) == set(SAMPLES)
    assert "summary_by_batch" in res and res["summary_by_batch"].sizes["batch"] == 3
    # batch_A was drawn with sigma_g = 1.08 (COV about 8 %), batch_B with 1.35 (about 30 %)
    assert str(ds.monodispersity.sel(sample="batch_A").values) == "monodisperse"
    assert str(ds.monodispersity.sel(sample="batch_B").values) == "polydisperse"
    lo, hi = ds.ecd_cov_pct_ci_lo.values, ds.ecd_cov_pct_ci_hi.values
    assert np.all(lo < ds.ecd_cov_pct.values) and np.all(ds.ecd_cov_pct.values < hi)
    np.testing.assert_allclose(ds.habit_number_fraction.sum("habit"), 1.0)
    np.testing.assert_allclose(ds.habit_area_fraction.sum("habit"), 1.0)
    assert not [w for w in recwarn if "zarr" in str(w.filename) or "xarray" in str(w.filename)]


def test_hook_and_step_declaration():
    assert summary.GRAINHABIT_API == 1
    assert summary.STEP.stage == "summarise" and summary.STEP.name == "summarise-samples"
    p = summary.STEP.resolve({"group_by": ["batch"], "bootstrap": 10})
    grains, frames = _tiny([300.0, 320.0, 340.0], ["cube"] * 3)
    out = summary.grainhabit_summarise(grains=grains, frames=frames, summary={}, params=p)
    assert set(out) == {"summary", "summary_by_batch"}
