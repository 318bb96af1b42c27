"""Tests of the summarise-samples step, and the small results-store builder the
report, compare and aggregate tests share.

The stores built here are invented test data: lognormal grain sizes and
regular polygon outlines, not measurements of any real emulsion.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
import xarray as xr
from scipy import stats
from skimage.draw import polygon as draw_polygon

from grainhabit.results import open_results, text_array, write_results
from grainhabit.plugins.survey import statistics as st
from grainhabit.plugins.survey import summarise_samples as summary

# --------------------------------------------------------------------------
# invented test stores in the results layout of the design contract
# --------------------------------------------------------------------------

_SIDES = {"cube": 4, "cuboctahedron": 8, "octahedron": 4, "tabular_hexagon": 6,
          "tabular_triangle": 3, "rod": 4, "irregular": 7}


def _outline(habit: str, ecd: float, cx: float, cy: float, rng) -> np.ndarray:
    """Polygon (k, 2) in nm of the habit's rough outline with area pi/4 ecd^2."""
    k = _SIDES[habit]
    t = np.linspace(0, 2 * np.pi, k, endpoint=False) + rng.uniform(0, np.pi)
    rad = np.ones(k)
    if habit == "irregular":
        rad = rng.uniform(0.6, 1.2, k)
    xy = np.c_[np.cos(t) * rad, np.sin(t) * rad]
    if habit == "rod":
        xy = xy * [2.2, 0.45]
    x, y = xy[:, 0], xy[:, 1]
    a = 0.5 * abs(np.dot(x, np.roll(y, 1)) - np.dot(y, np.roll(x, 1)))
    xy *= np.sqrt(np.pi / 4 * ecd**2 / a)
    return xy + [cx, cy]


def make_groups(samples: dict, frames_per_sample: int = 3, grains_per_frame: int = 25, seed: int = 0,
                px_nm: float = 8.0, size_px: int = 1000, fail_one: bool = True, run_time: str = "2031-05-04T02:00:00"):
    """Build the groups and root attrs of a small invented results store.

    ``samples`` maps sample name -> dict(gm=nm, gsd=, habits={name: prob},
    alpha=(median, sd), batch=, date=).
    """
    rng = np.random.default_rng(seed)
    g_cols = {k: [] for k in ("frame", "source", "sample", "label", "centroid_x_nm", "centroid_y_nm",
                              "area_nm2", "ecd_nm", "habit", "habit_score", "alpha", "alpha_lo", "alpha_hi",
                              "alpha_note", "thickness_nm", "tabular_aspect_ratio", "edge_cut", "split")}
    f_cols = {k: [] for k in ("source", "sample", "status", "error", "grain_count", "pixel_size_nm",
                              "calibration", "content_hash", "notes", "rows", "cols", "batch", "date")}
    vx, vy, vg = [], [], []
    thumbs, tscale, trows, tcols = [], [], [], []
    field_nm = size_px * px_nm
    f = 0
    for name, spec in samples.items():
        for j in range(frames_per_sample):
            source = f"/invented/{name}/field_{j:02d}.tif"
            failed = fail_one and j == frames_per_sample - 1 and name == list(samples)[0]
            f_cols["source"].append(source)
            f_cols["sample"].append(name)
            f_cols["status"].append("failed" if failed else "ok")
            f_cols["error"].append("segment-grains: no foreground found" if failed else "")
            f_cols["pixel_size_nm"].append(px_nm)
            f_cols["calibration"].append("workflow")
            f_cols["content_hash"].append(f"{seed}-{name}-{j}")
            f_cols["notes"].append("")
            f_cols["rows"].append(size_px)
            f_cols["cols"].append(size_px)
            f_cols["batch"].append(spec.get("batch", name))
            f_cols["date"].append(spec.get("date", "2031-05-01"))
            scale = field_nm / 256
            img = np.full((256, 256), 40, np.uint8)
            img += rng.integers(0, 20, img.shape, dtype=np.uint8)
            n = 0 if failed else grains_per_frame
            habits = list(spec["habits"])
            probs = np.array([spec["habits"][h] for h in habits], float)
            for lab in range(1, n + 1):
                ecd = rng.lognormal(np.log(spec["gm"]), np.log(spec["gsd"]))
                # jittered grid, so grains rarely overlap; the outer ring can touch the border
                side = int(np.ceil(np.sqrt(grains_per_frame)))
                cell = field_nm / side
                cx, cy = (np.array([(lab - 1) % side, (lab - 1) // side]) + 0.5) * cell + rng.uniform(-0.2, 0.2, 2) * cell
                h = habits[rng.choice(len(habits), p=probs / probs.sum())]
                poly = _outline(h, ecd, cx, cy, rng)
                edge = bool((poly.min() < 0) or (poly.max() > field_nm))
                poly = np.clip(poly, 0, field_nm)
                x, y = poly[:, 0], poly[:, 1]
                area = 0.5 * abs(np.dot(x, np.roll(y, 1)) - np.dot(y, np.roll(x, 1)))
                if h in ("cube", "cuboctahedron", "octahedron"):
                    al = float(np.clip(rng.normal(*spec["alpha"]), 0.2, 4.0))
                    note = ""
                else:
                    al = np.nan
                    note = "outline class has no alpha"
                tab = h.startswith("tabular")
                thick = ecd / rng.uniform(5, 12) if tab else np.nan
                for key, val in (("frame", f), ("source", source), ("sample", name), ("label", lab),
                                 ("centroid_x_nm", x.mean()), ("centroid_y_nm", y.mean()), ("area_nm2", area),
                                 ("ecd_nm", np.sqrt(4 * area / np.pi)), ("habit", h),
                                 ("habit_score", rng.uniform(0.5, 1)), ("alpha", al), ("alpha_lo", al - 0.1),
                                 ("alpha_hi", al + 0.1), ("alpha_note", note), ("thickness_nm", thick),
                                 ("tabular_aspect_ratio", ecd / thick if tab else np.nan),
                                 ("edge_cut", edge), ("split", False)):
                    g_cols[key].append(val)
                gi = len(g_cols["frame"]) - 1
                vx.extend(x)
                vy.extend(y)
                vg.extend([gi] * len(x))
                rr, cc = draw_polygon(y / scale, x / scale, img.shape)
                img[rr, cc] = 200
            f_cols["grain_count"].append(n)
            thumbs.append(img)
            tscale.append(scale)
            trows.append(256)
            tcols.append(256)
            f += 1
    text = {"source", "sample", "habit", "alpha_note", "status", "error", "calibration", "content_hash",
            "notes", "batch", "date"}

    def ds_of(cols, dim):
        data = {}
        for k, v in cols.items():
            arr = text_array(v) if k in text else np.asarray(v)
            data[k] = ((dim,), arr, {"units": "nm" if k.endswith("_nm") else ("" if k in text else "1"),
                                     "long_name": k.replace("_", " ")})
        return xr.Dataset(data)

    grains = ds_of(g_cols, "grain")
    frames = ds_of(f_cols, "frame")
    outlines = xr.Dataset({
        "grain": (("vertex",), np.asarray(vg, dtype=np.int64), {"units": "1", "long_name": "grain index"}),
        "x_nm": (("vertex",), np.asarray(vx), {"units": "nm", "long_name": "outline vertex x"}),
        "y_nm": (("vertex",), np.asarray(vy), {"units": "nm", "long_name": "outline vertex y"}),
    })
    thumbnails = xr.Dataset({
        "image": (("frame", "thumb_y", "thumb_x"), np.stack(thumbs), {"units": "1", "long_name": "thumbnail"}),
        "scale_nm": (("frame",), np.asarray(tscale), {"units": "nm", "long_name": "nm per thumbnail pixel"}),
        "thumb_rows": (("frame",), np.asarray(trows), {"units": "1", "long_name": "valid rows"}),
        "thumb_cols": (("frame",), np.asarray(tcols), {"units": "1", "long_name": "valid cols"}),
    })
    ok = np.asarray(f_cols["status"]) == "ok"
    groups = {"grains": grains, "frames": frames, "outlines": outlines, "thumbnails": thumbnails}
    groups.update(summary.summarise(grains, frames, {"bootstrap": 200, "group_by": ["batch"]}))
    assert ok.sum() > 0
    attrs = {
        "workflow": "version: 1\nname: invented-test-survey\n",
        "workflow_hash": f"hash{seed}",
        "versions": json.dumps({"grainhabit": "0.1.0"}),
        "runs": json.dumps([{"started": run_time, "finished": run_time, "frames": int(f)}]),
    }
    return groups, attrs


SAMPLES = {
    "batch_A": dict(gm=400.0, gsd=1.08, habits={"cube": 0.8, "cuboctahedron": 0.15, "irregular": 0.05},
                    alpha=(0.9, 0.15), batch="B01", date="2031-05-01"),
    "batch_B": dict(gm=650.0, gsd=1.35, habits={"octahedron": 0.5, "tabular_hexagon": 0.3,
                                                  "tabular_triangle": 0.1, "rod": 0.1},
                    alpha=(3.2, 0.3), batch="B02", date="2031-05-02"),
    "batch_C": dict(gm=500.0, gsd=1.15, habits={"cuboctahedron": 0.7, "cube": 0.2, "octahedron": 0.1},
                    alpha=(2.0, 0.3), batch="B03", date="2031-05-03"),
}


def make_store(path, samples=SAMPLES, **kw) -> str:
    """Write an invented results store at ``path`` with the lead's ``write_results``."""
    groups, attrs = make_groups(samples, **kw)
    write_results(path, groups, attrs)
    return str(path)


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
