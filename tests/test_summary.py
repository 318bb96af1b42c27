"""Tests of the summarise-samples step on small invented results stores (tests/builders.py).

The stores are invented test data: lognormal grain sizes and
regular polygon outlines, not measurements of any real emulsion.
"""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr
from scipy import stats

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


def test_alpha_bounds_are_never_a_median():
    # 30 cubes whose square outline only bounds alpha <= 1.5, 10 cuboctahedra with alpha
    # determined: the median uses the determined values only and is withheld while most are
    # bounds; the cube range fraction is 30 of 40 with its Clopper-Pearson interval
    # (scipy.stats.binomtest, one frame)
    n_b, n_d = 30, 10
    nan = np.nan
    alpha = [nan] * n_b + list(np.linspace(1.9, 2.3, n_d))
    grains, frames = _tiny([300.0] * (n_b + n_d), ["cube"] * n_b + ["cuboctahedron"] * n_d, alpha=alpha)
    grains["alpha_lo"] = ("grain", np.r_[np.full(n_b, 0.5), np.asarray(alpha[n_b:]) - 0.1])
    grains["alpha_hi"] = ("grain", np.r_[np.full(n_b, 1.5), np.asarray(alpha[n_b:]) + 0.1])
    s = summary.summarise(grains, frames, {"bootstrap": 50})["summary"].sel(sample="s")
    assert int(s.alpha_count) == n_d and int(s.alpha_bounded_count) == n_b
    assert float(s.alpha_determined_fraction) == pytest.approx(0.25)
    assert np.isnan(float(s.alpha_median)) and np.isnan(float(s.alpha_median_ci_lo))
    ref = stats.binomtest(30, 40).proportion_ci(0.95, method="exact")
    assert float(s.alpha_cube_range_fraction) == pytest.approx(0.75)
    assert float(s.alpha_cube_range_fraction_ci_lo) == pytest.approx(ref.low)
    assert float(s.alpha_cube_range_fraction_ci_hi) == pytest.approx(ref.high)
    ref0 = stats.binomtest(0, 40).proportion_ci(0.95, method="exact")
    assert float(s.alpha_octahedron_range_fraction) == 0.0
    assert float(s.alpha_octahedron_range_fraction_ci_hi) == pytest.approx(ref0.high)
    # mostly determined: the median of the determined values, with an interval around it
    s2 = summary.summarise(grains, frames, {"bootstrap": 50, "alpha_min_determined": 0.2})["summary"].sel(sample="s")
    assert float(s2.alpha_median) == pytest.approx(2.1)
    assert float(s2.alpha_median_ci_lo) < 2.1 < float(s2.alpha_median_ci_hi)


def test_absent_habit_gets_an_exact_interval_not_zero_width():
    # 0 of 50 grains: Clopper-Pearson [0, 0.071] (scipy.stats.binomtest, method "exact")
    grains, frames = _tiny(list(np.linspace(280.0, 320.0, 50)), ["cube"] * 50)
    s = summary.summarise(grains, frames, {"bootstrap": 50})["summary"].sel(sample="s")
    ref = stats.binomtest(0, 50).proportion_ci(0.95, method="exact")
    octa = s.sel(habit="octahedron")
    assert float(octa.habit_number_fraction) == 0.0
    assert float(octa.habit_number_fraction_ci_lo) == 0.0
    assert float(octa.habit_number_fraction_ci_hi) == pytest.approx(ref.high) and round(ref.high, 3) == 0.071
    assert float(octa.habit_area_fraction_ci_hi) == pytest.approx(ref.high)
    cube = s.sel(habit="cube")
    assert float(cube.habit_number_fraction_ci_lo) == pytest.approx(stats.binomtest(50, 50).proportion_ci().low)
    assert int(s.ci_frames) == 1


def test_intervals_resample_frames():
    # grains of 6 frames whose mean sizes differ by 10 %: the interval of the mean ECD must
    # reflect the spread of the frame means (Davison and Hinkley 1997, 3.8), so it is at
    # least t(5) * sem(frame means) (scipy.stats) wide on each side, far more than the
    # independent-grain interval
    rng = np.random.default_rng(1)
    frame = np.repeat(np.arange(6), 30)
    ecd = 300 * np.exp(rng.normal(0, 0.1, 6))[frame] * rng.lognormal(0, 0.05, frame.size)
    grains, frames = _tiny(list(ecd), ["cube"] * ecd.size, frame=list(frame))
    s = summary.summarise(grains, frames, {"bootstrap": 300})["summary"].sel(sample="s")
    means = np.array([ecd[frame == i].mean() for i in range(6)])
    half = stats.t.ppf(0.975, 5) * stats.sem(means)
    assert float(s.ecd_mean_nm_ci_hi) - float(s.ecd_mean_nm) == pytest.approx(half, rel=1e-6)
    assert half > 3 * 1.96 * stats.sem(ecd)
    for name in ("ecd_cov_pct", "ecd_d50_nm", "sauter_d32_nm"):
        assert float(s[name + "_ci_lo"]) < float(s[name]) < float(s[name + "_ci_hi"]), name
    assert int(s.ci_frames) == 6


def test_group_by_unknown_field_is_refused():
    grains, frames = _tiny([300.0], ["cube"])
    with pytest.raises(ValueError, match="no field 'lot'"):
        summary.summarise(grains, frames, {"group_by": ["lot"]})


def test_store_round_trip_and_verdicts(tmp_path, recwarn):
    # six frames a sample (one of batch_A's fails): the COV intervals rest on 5-6 frames
    path = make_store(tmp_path / "r.zarr", frames_per_sample=6)
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
