"""Product spec files, batch verdicts, control charts and run rules (invented test data)."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
import xarray as xr
from scipy import stats

from grainhabit.plugins.survey import control_charts as cc
from grainhabit.plugins.survey import specs as sp
from grainhabit.plugins.survey import verdicts as vd
from grainhabit.workflow import WorkflowError

#: The spec file exactly as the design contract (DESIGN.md, "Product specifications and verdicts") shows it.
DESIGN_EXAMPLE = """\
version: 1
products:
  - name: cubic-300                  # the product a batch is meant to be
    samples: ["KB-01*", "KB-11*"]    # globs on sample names
    min_grains: 300                  # fewer measured grains: the batch is `undecided`
    ecd_mean_nm: {target: 300, tolerance: 20}
    ecd_cov_pct: {max: 15}
    habit_number_fraction: {cube: {min: 0.85}}
    alpha_median: {min: 1.0, max: 1.6}
"""


def _spec(tmp_path: Path, text: str) -> Path:
    p = tmp_path / "products.yaml"
    p.write_text(text)
    return p


# --------------------------------------------------------------------------
# spec files
# --------------------------------------------------------------------------


def test_design_example_loads(tmp_path):
    s = sp.load_specs(_spec(tmp_path, DESIGN_EXAMPLE))
    (p,) = s.products
    assert p.name == "cubic-300" and p.min_grains == 300
    got = {c.name: (c.lower, c.upper) for c in p.criteria}
    assert got == {"ecd_mean_nm": (280.0, 320.0), "ecd_cov_pct": (-math.inf, 15.0),
                   "habit_number_fraction[cube]": (0.85, math.inf), "alpha_median": (1.0, 1.6)}
    assert p.matches("KB-01-night3") and p.matches("KB-11") and not p.matches("KB-02")
    assert s.product_of("KB-02") is None


@pytest.mark.parametrize("change, key, words", [
    (("ecd_cov_pct: {max: 15}", "ecd_cov: {max: 15}"), "products[0].ecd_cov", "unknown key"),
    (("{cube: {min: 0.85}}", "{cubic: {min: 0.85}}"), "products[0].habit_number_fraction.cubic", "unknown habit"),
    (("{max: 15}", "{maximum: 15}"), "products[0].ecd_cov_pct.maximum", "unknown key"),
    (("{target: 300, tolerance: 20}", "{target: 300}"), "products[0].ecd_mean_nm", "go together"),
    (("{target: 300, tolerance: 20}", "{target: 300, tolerance: 0}"), "products[0].ecd_mean_nm.tolerance", "> 0"),
    (("{min: 1.0, max: 1.6}", "{min: 1.6, max: 1.0}"), "products[0].alpha_median", "above max"),
    (("{max: 15}", "{max: 15, target: 10, tolerance: 2}"), "products[0].ecd_cov_pct", "not both"),
    (("{max: 15}", "{max: fifteen}"), "products[0].ecd_cov_pct.max", "finite number"),
    (("min_grains: 300", "min_grains: -1"), "products[0].min_grains", "integer >= 0"),
    (('["KB-01*", "KB-11*"]', "[]"), "products[0].samples", "non-empty list"),
    (("version: 1", "version: 2"), "version", "expected 1"),
    (("version: 1", "version: 1\ncolour: red"), "colour", "unknown key"),
])
def test_bad_spec_files_are_refused_with_file_and_key(tmp_path, change, key, words):
    path = _spec(tmp_path, DESIGN_EXAMPLE.replace(*change))
    with pytest.raises(WorkflowError) as err:
        sp.load_specs(path)
    assert err.value.file == str(path) and err.value.key == key and words in err.value.message
    assert "\n" not in str(err.value)


def test_product_named_twice_and_bad_yaml(tmp_path):
    twice = DESIGN_EXAMPLE + DESIGN_EXAMPLE.split("products:\n")[1]
    with pytest.raises(WorkflowError, match="given twice"):
        sp.load_specs(_spec(tmp_path, twice))
    with pytest.raises(WorkflowError, match="not valid YAML"):
        sp.load_specs(_spec(tmp_path, "version: 1\nproducts: [\n"))
    with pytest.raises(WorkflowError, match="no such spec file"):
        sp.load_specs(tmp_path / "missing.yaml")


def test_spec_variables_follow_the_summary_step():
    v = sp.summary_variables()
    assert v["habit_number_fraction"] is True and v["ecd_mean_nm"] is False
    assert "monodispersity" not in v and not any(k.endswith("_ci_lo") for k in v)


WF = """\
version: 1
input:
  paths: ["data/*.tif"]
output:
  results: out/r.zarr
specs: {specs}
"""


def test_workflow_refuses_a_bad_spec_file_with_exit_2(tmp_path):
    from builders import run_cli, write_workflow

    (tmp_path / "data").mkdir()
    (tmp_path / "specs").mkdir()
    _spec(tmp_path / "specs", DESIGN_EXAMPLE.replace("{cube: {min", "{cubes: {min"))
    wf = write_workflow(tmp_path / "wf.yaml", WF.format(specs="specs/products.yaml"))  # relative to the workflow
    proc = run_cli("check", wf)
    assert proc.returncode == 2
    # every problem of the workflow is listed, one line each (here also: the data folder is empty)
    lines = proc.stderr.strip().splitlines()
    assert any("products.yaml" in line and "habit_number_fraction.cubes" in line for line in lines)
    assert all(line.startswith("grainhabit: ") for line in lines)
    assert not (tmp_path / "out").exists()


# --------------------------------------------------------------------------
# verdicts
# --------------------------------------------------------------------------


@pytest.mark.parametrize("value, lo, hi, verdict", [
    (300, 290, 310, "pass"),          # inside [280, 320]
    (300, 280, 320, "pass"),          # touching the limits counts as inside (limits are inclusive)
    (330, 321, 340, "fail"),          # wholly above
    (270, 260, 279.9, "fail"),        # wholly below
    (315, 305, 325, "undecided"),     # straddles the upper limit
    (300, 270, 330, "undecided"),     # wider than the limits
    (300, np.nan, np.nan, "undecided"),  # no interval
    (np.nan, np.nan, np.nan, "undecided"),
])
def test_criterion_verdict(value, lo, hi, verdict):
    assert vd.criterion_verdict(value, lo, hi, 280.0, 320.0)[0] == verdict


def test_grains_needed_matches_the_classical_sample_size_formula():
    # NIST/SEMATECH e-Handbook 7.2.2.2: to estimate a mean within +-E at confidence 1 - a with known sigma,
    # n = (z_{1-a/2} sigma / E)^2. Build a normal-theory interval at n = 50 around an estimate 8 units below
    # the upper limit: the interval straddles it, and the grains needed are those at which its half-width is 8.
    z, sigma, n, d = stats.norm.ppf(0.975), 30.0, 50, 8.0
    half = z * sigma / math.sqrt(n)
    assert half > d
    need = vd.grains_for_decision(n, 300.0, 300.0 - half, 300.0 + half, 200.0, 308.0)
    assert need == pytest.approx((z * sigma / d) ** 2, rel=1e-3)
    assert vd.grains_for_decision(n, 300.0, 290.0, 310.0, 280.0, 320.0) == n  # decided: nothing more needed
    assert vd.grains_for_decision(n, 308.0, 300.0, 316.0, 200.0, 308.0) == math.inf  # estimate on the limit


def test_grains_needed_with_frames_as_the_independent_units():
    # a Student t interval on F - 1 df from frame means with spread s: half-width t(F-1) s / sqrt(F);
    # the frames needed are the fewest F' whose half-width is within the distance d (scipy.stats.t as reference)
    s_frames, frames, per_frame, d = 12.0, 3, 30, 9.0
    half = stats.t.ppf(0.975, frames - 1) * s_frames / math.sqrt(frames)
    f_need = next(f for f in range(2, 1000) if stats.t.ppf(0.975, f - 1) * s_frames / math.sqrt(f) <= d)
    need = vd.grains_for_decision(frames * per_frame, 300.0, 300.0 - half, 300.0 + half, 200.0, 309.0, frames=frames)
    assert need == pytest.approx(f_need * per_frame)


def _summary(rows: dict) -> xr.Dataset:
    """A summary group with the variables the verdicts read (invented numbers)."""
    from grainhabit.plugins.habit.vocabulary import HABITS

    names = list(rows)
    k = len(HABITS)
    cube = [rows[s]["cube"] for s in names]
    hnf = np.zeros((len(names), k))
    hnf[:, 0] = [c[0] for c in cube]
    lo, hi = hnf.copy(), hnf.copy()
    lo[:, 0] = [c[1] for c in cube]
    hi[:, 0] = [c[2] for c in cube]
    return xr.Dataset({
        "grain_count": ("sample", np.array([rows[s]["n"] for s in names])),
        "ecd_cov_pct": ("sample", np.array([rows[s]["cov"][0] for s in names], float)),
        "ecd_cov_pct_ci_lo": ("sample", np.array([rows[s]["cov"][1] for s in names], float)),
        "ecd_cov_pct_ci_hi": ("sample", np.array([rows[s]["cov"][2] for s in names], float)),
        "ecd_mean_nm": ("sample", np.array([rows[s]["mean"] for s in names], float)),
        "habit_number_fraction": (("sample", "habit"), hnf),
        "habit_number_fraction_ci_lo": (("sample", "habit"), lo),
        "habit_number_fraction_ci_hi": (("sample", "habit"), hi),
    }, coords={"sample": np.array(names, dtype=object), "habit": np.array(HABITS, dtype=object)},
        attrs={"confidence": 0.95})


SPEC = """\
version: 1
products:
  - name: cubic
    samples: ["C-*"]
    min_grains: 100
    ecd_cov_pct: {max: 15}
    habit_number_fraction: {cube: {min: 0.8}}
  - name: sized
    samples: ["S-*"]
    ecd_mean_nm: {target: 300, tolerance: 20}
    frames_failed: {max: 0}
"""


def test_judge_samples(tmp_path):
    specs = sp.load_specs(_spec(tmp_path, SPEC))
    summ = _summary({
        "C-pass": dict(n=400, cov=(11, 10, 12.5), cube=(0.9, 0.86, 0.93), mean=300),
        "C-fail": dict(n=400, cov=(19, 17, 21), cube=(0.9, 0.86, 0.93), mean=300),
        "C-open": dict(n=400, cov=(14, 12.5, 16), cube=(0.9, 0.86, 0.93), mean=300),
        "C-few": dict(n=60, cov=(11, 10, 12.5), cube=(0.9, 0.82, 0.95), mean=300),
        "S-1": dict(n=400, cov=(11, 10, 12), cube=(0, 0, 0), mean=301),
        "other": dict(n=50, cov=(11, 10, 12), cube=(0, 0, 0), mean=301),
        "": dict(n=0, cov=(np.nan,) * 3, cube=(np.nan,) * 3, mean=np.nan),  # an input that named no sample
    })
    summ["frames_failed"] = ("sample", np.array([0, 0, 0, 0, 1, 0, 0]))
    v = vd.judge_samples(specs, summ)
    assert list(v["sample"].values) == ["C-pass", "C-fail", "C-open", "C-few", "S-1", "other"]
    overall = dict(zip(v["sample"].values, v["verdict_overall"].values))
    assert overall == {"C-pass": "pass", "C-fail": "fail", "C-open": "undecided", "C-few": "undecided",
                       "S-1": "fail", "other": ""}
    prod = dict(zip(v["sample"].values, v["product"].values))
    assert prod["other"] == "" and prod["S-1"] == "sized"
    cv = v["verdict"].sel(sample="S-1")
    # ecd_mean_nm has no interval in this summary: undecided, never a pass on the bare estimate
    assert str(cv.sel(criterion="ecd_mean_nm").values) == "undecided"
    assert str(cv.sel(criterion="frames_failed").values) == "fail"  # a count is exact: its own interval
    assert str(v["verdict"].sel(sample="C-pass", criterion="ecd_mean_nm").values) == ""  # not its product's
    few = v.sel(sample="C-few")
    assert str(few["verdict"].sel(criterion="grain_count").values) == "undecided"
    assert "too few grains" in str(few["note"].sel(criterion="ecd_cov_pct").values)
    assert float(few["grains_needed"]) == 100
    assert float(v["grains_needed"].sel(sample="C-pass")) == 400
    assert float(v["grains_needed"].sel(sample="C-open")) > 400
    lines = vd.verdict_lines(summ, v)
    assert len(lines) == 6 and all(line.startswith("verdict ") for line in lines)
    assert "FAIL" in lines[1] and "ecd_cov_pct" in lines[1] and "matches no product" in lines[5]


# --------------------------------------------------------------------------
# control charts and run rules
# --------------------------------------------------------------------------


def test_d2_is_the_mean_range_of_two_normal_values():
    # |Z1 - Z2| for independent standard normals is half-normal with scale sqrt(2) (scipy as the reference)
    assert cc.D2_SPAN2 == pytest.approx(stats.halfnorm(scale=math.sqrt(2)).mean(), rel=1e-12)
    assert cc.D2_SPAN2 == pytest.approx(1.128, abs=5e-4)  # the tabulated d2 for subgroups of 2


def test_individuals_limits_recover_sigma_of_a_stable_process():
    x = np.random.default_rng(4).normal(50.0, 2.0, 20000)
    lim = cc.individuals_limits(x)
    assert lim.centre == pytest.approx(50.0, abs=0.05) and lim.sigma == pytest.approx(2.0, rel=0.02)
    assert lim.upper - lim.centre == pytest.approx(3 * lim.sigma)
    assert math.isnan(cc.individuals_limits([1.0, 2.0, 3.0]).sigma)  # fewer than 5 points: no limits


@pytest.mark.parametrize("values, point, rule", [
    ([0, 0, 0, 0, 0.5, -0.5, 3.2], 6, 1),                 # one point beyond 3 sigma
    ([0, 0, 0.3, 2.2, 0.1, 2.5], 5, 2),                   # two of three beyond 2 sigma, same side
    ([0, 0, -1.2, -1.5, 0.2, -1.1, -1.3], 6, 3),          # four of five beyond 1 sigma, same side
    ([0.1, 0.4, 0.2, 0.9, 0.3, 0.2, 0.6, 0.5], 7, 4),     # eight in a row on one side
])
def test_each_run_rule_on_its_textbook_pattern(values, point, rule):
    flags = cc.run_rules(values, 0.0, 1.0)
    assert rule in flags[point]
    assert not any(rule in f for f in flags[:point])


def test_two_beyond_2_sigma_on_opposite_sides_break_no_rule():
    assert cc.run_rules([0, 2.5, -2.5, 0], 0.0, 1.0) == [[], [], [], []]


def test_false_alarm_rates_of_a_stable_process_match_the_normal_distribution():
    # per-point probability that a rule fires on independent N(0, 1) values, from scipy.stats:
    # rule 1: 2 P(Z > 3); rule 2: 2 p (1 - (1 - p)^2), p = P(Z > 2); rule 3: 2 q P(Bin(4, q) >= 3), q = P(Z > 1);
    # rule 4: 2 (1/2)^8
    p, q = stats.norm.sf(2), stats.norm.sf(1)
    expect = {1: 2 * stats.norm.sf(3), 2: 2 * p * (1 - (1 - p) ** 2), 3: 2 * q * stats.binom.sf(2, 4, q),
              4: 2 * 0.5 ** 8}
    x = np.random.default_rng(11).normal(size=300_000)
    flags = cc.run_rules(x, 0.0, 1.0)
    for rule, e in expect.items():
        got = sum(rule in f for f in flags) / x.size
        assert got == pytest.approx(e, rel=0.12), (rule, got, e)


# --------------------------------------------------------------------------
# through a real run
# --------------------------------------------------------------------------

RUN_WF = """\
version: 1
name: verdict-run
input:
  paths: ["data/**/*.tif"]
output:
  results: out/survey.zarr
  report: out/report
specs: products.yaml
execution:
  scheduler: serial
"""

RUN_SPEC = """\
version: 1
products:
  - name: alpha-product
    samples: ["alpha-*"]
    min_grains: 100            # the run finds a handful: undecided
    ecd_d50_nm: {min: 10, max: 10000}
  - name: beta-product
    samples: ["beta-*"]
    ecd_d50_nm: {max: 20}      # the grains are 150-400 nm: fails
"""


def test_run_judges_batches_and_prints_one_line_per_sample(small_survey):
    from builders import run_cli, write_workflow

    (small_survey / "data" / "alpha-batch" / "broken.tif").write_bytes(b"not a tiff at all")
    (small_survey / "products.yaml").write_text(RUN_SPEC)
    wf = write_workflow(small_survey / "wf.yaml", RUN_WF)
    proc = run_cli("run", wf)
    assert proc.returncode == 1, proc.stderr  # a frame failed; the verdicts do not change the exit code
    lines = proc.stdout.strip().splitlines()
    assert len(lines) == 2 and all(line.startswith("verdict ") for line in lines)
    assert "alpha-batch" in lines[0] and "alpha-product" in lines[0] and "UNDECIDED" in lines[0]
    assert "too few grains" in lines[0]
    assert "beta-batch" in lines[1] and "FAIL" in lines[1] and "ecd_d50_nm" in lines[1]
    store = small_survey / "out" / "survey.zarr"
    v = xr.open_zarr(store, group="verdicts").load()
    assert dict(zip(map(str, v["sample"].values), map(str, v["verdict_overall"].values))) == {
        "alpha-batch": "undecided", "beta-batch": "fail"}
    assert set(v["criterion"].values) == {"grain_count", "ecd_d50_nm"}
    for name in ("value", "ci_lo", "ci_hi", "limit_lo", "limit_hi", "verdict", "product", "grains_needed"):
        assert name in v and v[name].attrs["long_name"]
    t = xr.open_zarr(store, group="trends").load()
    assert set(map(str, t["product"].values)) == {"alpha-product", "beta-product"}
    frames = xr.open_zarr(store, group="frames").load()
    samples = dict(zip(map(str, frames["source"].values), map(str, frames["sample"].values)))
    assert samples[str(small_survey / "data" / "alpha-batch" / "broken.tif")] == "alpha-batch"  # no phantom
    page = (small_survey / "out" / "report" / "index.html").read_text()
    assert "beta-product" in page and "broken.tif" in page  # the failed frame is listed near the top


def test_prospective_limits_flag_a_drift_at_its_first_point():
    # a stable history (sd 1 around 100, invented) followed by a step of 6 sigma: judged against the nights
    # before it, the first drifted point breaks rule 1 (beyond 3 sigma); limits taken over the whole history
    # (drift included) are so wide that the same point breaks nothing (Shewhart individuals chart)
    rng = np.random.default_rng(3)
    values = list(100 + rng.normal(0, 1, 10)) + [106.0, 106.5, 107.0]
    limits, flags = cc.prospective(values)
    assert all(math.isnan(lim.sigma) for lim in limits[:5]) and flags[:5] == [[]] * 5
    assert 1 in flags[10]
    whole = cc.individuals_limits(values)
    assert 1 not in cc.run_rules(values, whole.centre, whole.sigma)[10]
    assert limits[10].centre == pytest.approx(np.mean(values[:10]))
