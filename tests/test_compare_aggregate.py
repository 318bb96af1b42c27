"""Tests of the compare and aggregate commands (invented test data)."""

from __future__ import annotations

import argparse
import json

import numpy as np
import pytest

from grainhabit.results import open_results, write_results
from grainhabit.plugins.survey import aggregate
from grainhabit.plugins.survey import compare
from grainhabit.plugins.survey import write_report as report
from builders import SAMPLES, make_groups, make_store


def _parse(module, argv):
    parser = argparse.ArgumentParser(prog="grainhabit")
    module.grainhabit_add_commands(subparsers=parser.add_subparsers())
    return parser.parse_args(argv)


@pytest.fixture(scope="module")
def stores(tmp_path_factory):
    base = tmp_path_factory.mktemp("cmp")
    lognormals = {
        "s400": dict(gm=400.0, gsd=1.15, habits={"cube": 0.7, "octahedron": 0.3}, alpha=(1.0, 0.2), batch="L1"),
        "s400b": dict(gm=400.0, gsd=1.15, habits={"cube": 0.7, "octahedron": 0.3}, alpha=(1.0, 0.2), batch="L2"),
        "s480": dict(gm=480.0, gsd=1.15, habits={"cube": 0.3, "octahedron": 0.7}, alpha=(2.0, 0.2), batch="L3"),
    }
    # seed 1: under the null hypothesis p is uniform, so any one draw can fall below 0.05
    # (seed 0 gives p = 0.0085 for s400 vs s400b); the false-alarm rate itself is
    # checked over many draws in test_statistics.py
    one = make_store(base / "one.zarr", lognormals, frames_per_sample=4, grains_per_frame=36, fail_one=False,
                     seed=1)
    return base, one


def test_compare_different_and_same_lognormals(stores, capsys):
    base, one = stores
    # a 20 % shift of the median size with ~140 grains in 4 frames each is found and sized; the
    # drawn alpha medians 1.0 and 2.0 (sd 0.2) differ by about 1
    args = _parse(compare, ["compare", one, "--a", "s400", "--b", "s480", "--json", "--bootstrap", "300"])
    assert args.handler(args) == 0
    diff = json.loads(capsys.readouterr().out)
    q = {r["name"]: r for r in diff["quantities"]}
    assert q["ecd_mean_nm"]["differs"] and 0 < q["ecd_mean_nm"]["ci_lo"] < 80 < q["ecd_mean_nm"]["ci_hi"]
    assert q["alpha_median"]["differs"] and q["alpha_median"]["ci_lo"] < 1.0 < q["alpha_median"]["ci_hi"]
    assert q["fraction:cube"]["differs"] and q["fraction:cube"]["difference"] < 0
    assert diff["verdict"].startswith("B differs from A") and "ECD mean: B larger by" in diff["verdict"]
    args = _parse(compare, ["compare", one, "--a", "s400", "--b", "s400b", "--json", "--bootstrap", "300"])
    assert args.handler(args) == 0
    same = json.loads(capsys.readouterr().out)
    assert not any(r["differs"] for r in same["quantities"])
    assert same["verdict"].startswith("No difference shown") and "ECD mean: same within" in same["verdict"]
    # the intervals of quantities not found different hold 0
    assert all(r["ci_lo"] <= 0 <= r["ci_hi"] for r in same["quantities"])
    args = _parse(compare, ["compare", one, "--a", "s400", "--b", "s480"])
    assert args.handler(args) == 0
    text = capsys.readouterr().out
    assert "Verdict: B differs from A" in text and "Holm" in text


HABIT_CODES = np.array([0, 1, 2, 6])  # cube, cuboctahedron, octahedron, irregular


def _process(rng, frames=6, per_frame=25, spread=0.03):
    """One sample of an invented process whose frames differ by ``spread`` (lognormal sd) in size."""
    f = np.repeat(np.arange(frames), per_frame)
    shift = np.exp(rng.normal(0, spread, frames))[f]
    codes = HABIT_CODES[rng.choice(4, f.size, p=[0.6, 0.25, 0.1, 0.05])]
    alpha = np.where(codes <= 2, rng.normal(1.8, 0.3, f.size) * shift, np.nan)
    return {"ecd": 300 * shift * rng.lognormal(0, 0.12, f.size), "codes": codes, "frame": f,
            "alpha": alpha, "alpha_lo": alpha - 0.1, "alpha_hi": alpha + 0.1}


def test_compare_false_alarm_rate_with_clustered_frames():
    # 400 pairs of samples of one process (6 frames of 25 grains, 3 % frame-to-frame size
    # spread): Holm (1979) keeps the chance that any of the ~7 quantities is called different
    # at or below 5 %; allow 5 % + 2 binomial SE (1.1 %). A per-grain KS test flags ~15 % here.
    rng = np.random.default_rng(17)
    alarms = sum(any(r["differs"] for r in compare.compare_samples(_process(rng), _process(rng), n_resamples=60,
                                                                  seed=i)["quantities"])
                 for i in range(400))
    print("family-wise false-alarm rate:", alarms / 400)
    assert alarms / 400 <= 0.072


def test_compare_bounded_alpha_is_not_compared_as_a_median():
    rng = np.random.default_rng(3)
    a, b = _process(rng), _process(rng)
    b["alpha_lo"] = np.where(np.isfinite(b["alpha"]), 0.5, np.nan)
    b["alpha_hi"] = np.where(np.isfinite(b["alpha"]), 1.5, np.nan)
    b["alpha"] = np.full(b["alpha"].size, np.nan)  # B's alphas only bounded (square outlines)
    res = compare.compare_samples(a, b, n_resamples=60)
    assert "alpha_median" not in {r["name"] for r in res["quantities"]}


def test_compare_unknown_sample_is_one_line_exit_2(stores, capsys):
    _, one = stores
    args = _parse(compare, ["compare", one, "--a", "s400", "--b", "nope"])
    assert args.handler(args) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "no grains of sample 'nope'" in err


def test_aggregate_drops_duplicated_frame_and_report_works(tmp_path, capsys):
    # store 1 (older run) and store 2 (newer run) share sample batch_A's frames:
    # same content hashes -> the newer copies are kept, the older ones dropped
    s1 = make_store(tmp_path / "a.zarr", {"batch_A": SAMPLES["batch_A"], "batch_B": SAMPLES["batch_B"]},
                    frames_per_sample=2, grains_per_frame=16, seed=1, fail_one=False,
                    run_time="2031-05-04T02:00:00")
    groups_b, attrs_b = make_groups({"batch_A": SAMPLES["batch_A"], "batch_C": SAMPLES["batch_C"]},
                                    frames_per_sample=2, grains_per_frame=16, seed=1, fail_one=False,
                                    run_time="2031-05-05T02:00:00")
    s2 = str(tmp_path / "b.zarr")
    write_results(s2, groups_b, attrs_b)
    assert str(groups_b["frames"].content_hash.values[0]) == "1-batch_A-0"
    into = str(tmp_path / "all.zarr")
    args = _parse(aggregate, ["aggregate", s1, s2, "--into", into])
    assert args.handler(args) == 0
    out = capsys.readouterr().out
    assert "2 duplicate frame(s) dropped" in out  # batch_A frames 0 and 1 are in both
    res = open_results(into)
    fr, gr, ol = res["frames"], res["grains"], res["outlines"]
    assert fr.sizes["frame"] == 6
    hashes = [str(h) for h in fr.content_hash.values]
    assert len(set(hashes)) == 6
    # the kept batch_A frames come from the newer store b
    assert gr.sizes["grain"] == 6 * 16
    gf = np.asarray(gr.frame.values)
    assert gf.min() == 0 and gf.max() == 5
    assert np.array_equal(np.unique(np.asarray(ol.grain.values)), np.arange(gr.sizes["grain"]))
    # re-indexing kept each grain's outline: its centroid matches the mean of its vertices
    g = np.asarray(ol.grain.values)
    cx = np.bincount(g, weights=np.asarray(ol.x_nm.values)) / np.bincount(g)
    np.testing.assert_allclose(cx, gr.centroid_x_nm.values)
    assert res["thumbnails"].sizes["frame"] == 6
    summ = res["summary"]
    assert set(summ.sample.values) == {"batch_A", "batch_B", "batch_C"}
    assert int(summ.grain_count.sum()) + int(summ.edge_cut_count.sum()) == gr.sizes["grain"]
    a_new = groups_b["summary"].sel(sample="batch_A")
    assert float(summ.sel(sample="batch_A").ecd_mean_nm) == pytest.approx(float(a_new.ecd_mean_nm))
    runs = json.loads(res["/"].attrs["runs"])
    assert runs[-1]["kind"] == "aggregate" and runs[-1]["duplicate_frames_dropped"] == 2
    files = report.write_report(into, tmp_path / "rep", {"gallery_frames": 2})
    assert files[0].endswith("index.html")
