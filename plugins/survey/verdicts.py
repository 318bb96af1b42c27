"""Batch verdicts against product specs, and each product's trend across nights.

:func:`judge` turns the ``summary`` group and a spec file
(:mod:`grainhabit.plugins.survey.specs`) into two results groups:

``verdicts`` (dims ``sample``, ``criterion``)
    For every sample and every criterion of its product: the value, its
    confidence interval from the summary (``<variable>_ci_lo`` /
    ``_ci_hi``), the limits and the verdict: ``pass`` where the whole
    interval lies inside the limits, ``fail`` where it lies wholly outside,
    ``undecided`` where it straddles a limit, where the summary gives no
    interval, or where the batch has fewer counted grains than the
    product's ``min_grains``. Per sample: ``product``, ``verdict_overall``
    (fail > undecided > pass) and ``grains_needed``. Samples that match no
    product have an empty product and verdict.
``trends`` (dim ``point``)
    For every product and criterion, one point per value of the trend
    field (the summarise step's first ``group_by`` field, such as the
    night; the sample itself when there is none), in sorted order, with
    the individuals-chart limits of :mod:`grainhabit.plugins.survey.control_charts`
    and the run rules each point breaks.

``grains_needed`` assumes the estimate stays where it is and the interval
narrows as 1 / sqrt(n), the behaviour of a standard error (e.g. NIST/SEMATECH
e-Handbook of Statistical Methods, 7.2.2.2, sample sizes for a mean; from
memory). With
frames as the independent units the interval narrows with the number of
frames, so read it as grains at the present grains per frame.
"""

from __future__ import annotations

import math

import numpy as np

from grainhabit.lazy import lazy_module

from . import control_charts as cc
from .intervals import t_quantile  # Student's t quantiles without loading scipy.stats in the main process
from .specs import EXACT_VARIABLES, Criterion, Specs  # noqa: F401 (Criterion: type of Product.criteria)

xr = lazy_module("xarray")

VERDICTS = ("pass", "fail", "undecided")
_RANK = {"pass": 0, "undecided": 1, "fail": 2}


def criterion_verdict(value: float, ci_lo: float, ci_hi: float, lower: float, upper: float) -> tuple[str, str]:
    """Verdict of one criterion from an estimate, its interval and the limits.

    Parameters
    ----------
    value : float
        The estimate.
    ci_lo, ci_hi : float
        Its confidence interval (equal to ``value`` for exact counts).
    lower, upper : float
        Limits, inclusive; -inf / inf where open.

    Returns
    -------
    verdict : str
        ``pass`` (interval inside the limits), ``fail`` (interval wholly
        outside) or ``undecided`` (straddles a limit, or no interval).
    reason : str
        One short phrase.
    """
    if not math.isfinite(value):
        return "undecided", "no value (no grains counted)"
    if not (math.isfinite(ci_lo) and math.isfinite(ci_hi)):
        return "undecided", "no confidence interval for this value"
    if ci_lo >= lower and ci_hi <= upper:
        return "pass", "interval inside the limits"
    if ci_hi < lower:
        return "fail", "interval below the lower limit"
    if ci_lo > upper:
        return "fail", "interval above the upper limit"
    side = "lower" if ci_lo < lower else "upper"
    if ci_lo < lower and ci_hi > upper:
        side = "both"
    return "undecided", f"interval straddles the {side} limit" if side != "both" else "interval wider than the limits"


def grains_for_decision(n: int, value: float, ci_lo: float, ci_hi: float, lower: float, upper: float,
                        frames: int = 0, confidence: float = 0.95) -> float:
    """Estimated counted grains at which a straddled limit would be decided.

    The interval's half-width w on the side of each straddled limit must
    shrink below the distance d from the estimate to that limit. With
    grains as the independent units the half-width goes as 1 / sqrt(n), so
    n' = n (w / d)^2. Where the interval was made with frames as the
    independent units (``frames`` >= 2: a Student t interval on frames - 1
    degrees of freedom), the half-width goes as t(F - 1) / sqrt(F) in the
    number of frames F; the smallest F' with
    t(F' - 1) / sqrt(F') <= (d / w) t(F - 1) / sqrt(F) is found and
    n' = n F' / F (at the present grains per frame).

    Parameters
    ----------
    n : int
        Counted grains.
    value, ci_lo, ci_hi : float
        Estimate and interval.
    lower, upper : float
        Limits (-inf / inf where open).
    frames : int
        Frames behind the interval (0: grains taken as independent).
    confidence : float
        Two-sided level of the interval (for the t quantiles).

    Returns
    -------
    float
        ``n`` where no limit is straddled; inf where the estimate sits on a
        limit; NaN where there is no estimate or interval.
    """
    if not (math.isfinite(value) and math.isfinite(ci_lo) and math.isfinite(ci_hi)) or n <= 0:
        return math.nan
    need = float(n)
    for limit in (lower, upper):
        if not (math.isfinite(limit) and ci_lo <= limit <= ci_hi):
            continue
        d = abs(value - limit)
        w = (ci_hi - value) if limit >= value else (value - ci_lo)
        if d == 0:
            return math.inf
        ratio = w / d
        if ratio <= 1:
            continue
        if frames >= 2:
            q = 0.5 + confidence / 2
            target = t_quantile(q, frames - 1) / math.sqrt(frames) / ratio
            f = frames
            while t_quantile(q, f - 1) / math.sqrt(f) > target and f < 10**6:
                f = f + 1 if f < 64 else int(f * 1.05) + 1
            need = max(need, n * f / frames)
        else:
            need = max(need, n * ratio**2 * 1.0001)
    return need


def _cell(ds, var: str, i: int, habit: str):
    if var not in ds:
        return math.nan
    v = ds[var]
    if "habit" in v.dims:
        habits = [str(h) for h in ds["habit"].values]
        if habit not in habits:
            return math.nan
        return float(v.values[i, habits.index(habit)])
    return float(v.values[i])


def _value_ci(summary, i: int, c: Criterion) -> tuple[float, float, float]:
    value = _cell(summary, c.variable, i, c.habit)
    if c.variable in EXACT_VARIABLES:
        return value, value, value
    return value, _cell(summary, c.variable + "_ci_lo", i, c.habit), _cell(summary, c.variable + "_ci_hi", i, c.habit)


def judge_samples(specs: Specs, summary) -> "xr.Dataset":
    """The ``verdicts`` group of a summary (dims ``sample``, ``criterion``).

    Parameters
    ----------
    specs : Specs
        Validated spec file.
    summary : xarray.Dataset
        The ``summary`` group (dims ``sample``, ``habit``) with ``grain_count``.

    Returns
    -------
    xarray.Dataset
        See the module docstring. Samples with an empty name (inputs that
        named no sample) are left out.
    """
    samples = [str(s) for s in summary["sample"].values]
    rows = [i for i, s in enumerate(samples) if s]
    confidence = float(summary.attrs.get("confidence", 0.95))
    names: list[str] = []
    for p in specs.products:
        for c in p.criteria:
            if c.name not in names:
                names.append(c.name)
    names.insert(0, "grain_count")
    ns, nc = len(rows), len(names)
    num = {k: np.full((ns, nc), np.nan) for k in ("value", "ci_lo", "ci_hi", "limit_lo", "limit_hi")}
    verdict = np.full((ns, nc), "", dtype=object)
    note = np.full((ns, nc), "", dtype=object)
    product = np.full(ns, "", dtype=object)
    overall = np.full(ns, "", dtype=object)
    needed = np.full(ns, np.nan)
    counts = np.zeros(ns, dtype=np.int64)
    for r, i in enumerate(rows):
        n = int(summary["grain_count"].values[i])
        # frames as the independent units of the summary's intervals, where the summary says so
        frames = int(summary["ci_frames"].values[i]) if "ci_frames" in summary else 0
        counts[r] = n
        p = specs.product_of(samples[i])
        if p is None:
            continue
        product[r] = p.name
        too_few = n < p.min_grains
        j = names.index("grain_count")
        num["value"][r, j] = num["ci_lo"][r, j] = num["ci_hi"][r, j] = n
        num["limit_lo"][r, j], num["limit_hi"][r, j] = p.min_grains, np.inf
        verdict[r, j] = "undecided" if too_few else "pass"
        note[r, j] = f"too few grains ({n} < {p.min_grains})" if too_few else f"at least {p.min_grains} grains"
        need = float(p.min_grains if too_few else n)
        worst = verdict[r, j]
        for c in p.criteria:
            j = names.index(c.name)
            value, lo, hi = _value_ci(summary, i, c)
            v, why = criterion_verdict(value, lo, hi, c.lower, c.upper)
            if too_few and v != "undecided":
                why = f"{why}, but too few grains"
                v = "undecided"
            for k, x in (("value", value), ("ci_lo", lo), ("ci_hi", hi), ("limit_lo", c.lower), ("limit_hi", c.upper)):
                num[k][r, j] = x
            verdict[r, j], note[r, j] = v, why
            if v == "undecided" and c.variable not in EXACT_VARIABLES:
                need = max(need, grains_for_decision(n, value, lo, hi, c.lower, c.upper, frames, confidence))
            if _RANK[v] > _RANK[worst]:
                worst = v
        overall[r] = worst
        needed[r] = float(math.ceil(need)) if math.isfinite(need) else (np.inf if need == math.inf else np.nan)
    sample_dim, crit_dim = ("sample",), ("sample", "criterion")
    units = {"value": "", "ci_lo": "", "ci_hi": "", "limit_lo": "", "limit_hi": ""}
    long = {"value": "value of the criterion's summary variable", "ci_lo": "lower confidence limit of the value",
            "ci_hi": "upper confidence limit of the value", "limit_lo": "lower spec limit (-inf: none)",
            "limit_hi": "upper spec limit (inf: none)"}
    data = {k: (crit_dim, num[k], {"units": "as the summary variable", "long_name": long[k]}) for k in units}
    data["verdict"] = (crit_dim, verdict, {"units": "", "long_name": "pass, fail or undecided (empty: not a "
                                                                      "criterion of this sample's product)"})
    data["note"] = (crit_dim, note, {"units": "", "long_name": "why the verdict is what it is"})
    data["product"] = (sample_dim, product, {"units": "", "long_name": "product the sample is meant to be "
                                                                      "(empty: matches no product)"})
    data["verdict_overall"] = (sample_dim, overall, {"units": "", "long_name": "fail > undecided > pass over the "
                                                                              "criteria (empty: no product)"})
    data["grains_needed"] = (sample_dim, needed, {"units": "1", "long_name": "estimated counted grains at which "
                                                                             "every criterion is decided"})
    data["grain_count"] = (sample_dim, counts, {"units": "1", "long_name": "grains counted"})
    ds = xr.Dataset(data, coords={
        "sample": (sample_dim, np.array([samples[i] for i in rows], dtype=object),
                   {"units": "", "long_name": "sample name"}),
        "criterion": (("criterion",), np.array(names, dtype=object),
                      {"units": "", "long_name": "summary variable, with [habit] for per-habit variables"}),
    })
    ds.attrs.update(
        spec_file=str(specs.file), spec_note=specs.note,
        confidence=float(summary.attrs.get("confidence", 0.95)),
        rule="pass: the whole confidence interval inside the limits; fail: wholly outside; undecided: it "
             "straddles a limit, there is no interval, or fewer grains than the product's min_grains",
        grains_needed_note="interval assumed to narrow as 1/sqrt(n) with the estimate unchanged",
    )
    return ds


def trend_points(specs: Specs, grains, frames, key: str, params: dict) -> "xr.Dataset":
    """The ``trends`` group: each product's criteria per value of a frame field.

    Parameters
    ----------
    specs : Specs
    grains, frames : xarray.Dataset
        The ``grains`` and ``frames`` groups.
    key : str
        Frame field to trend over (e.g. ``night``), or ``sample``.
    params : dict
        Resolved parameters of the ``summarise-samples`` step (bootstrap,
        confidence, edge-cut handling), so the points match the summary.

    Returns
    -------
    xarray.Dataset
        Dim ``point``; see the module docstring.
    """
    from .summarise_samples import summarise_by

    f_sample = np.array([str(s) for s in frames["sample"].values], dtype=object) if "sample" in frames else \
        np.full(frames.sizes.get("frame", 0), "", dtype=object)
    g_sample = np.array([str(s) for s in grains["sample"].values], dtype=object)
    cols: dict[str, list] = {k: [] for k in ("product", "criterion", "group", "position", "value", "ci_lo", "ci_hi",
                                             "grain_count", "samples", "centre", "sigma", "lcl", "ucl",
                                             "limit_lo", "limit_hi", "rules")}
    for p in specs.products:
        in_p = np.array([p.matches(s) for s in f_sample], dtype=bool)
        g_in = np.array([p.matches(s) for s in g_sample], dtype=bool)
        if not in_p.any():
            continue
        fr = frames.copy()
        field_vals = np.array([str(v) for v in np.asarray(frames[key].values)], dtype=object)
        fr[key] = ("frame", np.where(in_p, field_vals, ""))
        gr = grains.isel(grain=np.flatnonzero(g_in))
        if key == "sample":
            gr = gr.copy()
        ds = summarise_by(gr, fr, key, params)
        labels = [str(v) for v in ds[key].values]
        keep = [k for k, lab in enumerate(labels) if lab and int(ds["frame_count"].values[k]) > 0]
        groups_samples = {}
        for lab in (labels[k] for k in keep):
            groups_samples[lab] = sorted(set(f_sample[in_p & (field_vals == lab)]))
        for c in p.criteria:
            vals, los, his = [], [], []
            for k in keep:
                v, lo, hi = _value_ci(ds, k, c)
                vals.append(v)
                los.append(lo)
                his.append(hi)
            limits, flags = cc.prospective(vals)
            for pos, k in enumerate(keep):
                lab = labels[k]
                cols["product"].append(p.name)
                cols["criterion"].append(c.name)
                cols["group"].append(lab)
                cols["position"].append(pos)
                cols["value"].append(vals[pos])
                cols["ci_lo"].append(los[pos])
                cols["ci_hi"].append(his[pos])
                cols["grain_count"].append(int(ds["grain_count"].values[k]))
                cols["samples"].append(", ".join(groups_samples[lab]))
                lim = limits[pos]
                cols["centre"].append(lim.centre)
                cols["sigma"].append(lim.sigma)
                cols["lcl"].append(lim.lower)
                cols["ucl"].append(lim.upper)
                cols["limit_lo"].append(c.lower)
                cols["limit_hi"].append(c.upper)
                cols["rules"].append(" ".join(str(r) for r in flags[pos]))
    text = {"product", "criterion", "group", "samples", "rules"}
    long = {
        "product": "product", "criterion": "criterion (summary variable, [habit])",
        "group": f"value of the trend field {key!r}", "position": "order of the point in the product's history",
        "value": "value of the criterion", "ci_lo": "lower confidence limit", "ci_hi": "upper confidence limit",
        "grain_count": "grains counted", "samples": "samples (batches) of this point",
        "centre": "centre line (mean of the history before this point)",
        "sigma": "short-term sigma of the history before this point, average moving range / d2",
        "lcl": "lower control limit, centre - 3 sigma", "ucl": "upper control limit, centre + 3 sigma",
        "limit_lo": "lower spec limit", "limit_hi": "upper spec limit",
        "rules": "Western Electric rules (1-4) this point breaks, space-separated",
    }
    data = {}
    for k, v in cols.items():
        if k in text:
            arr = np.array(v, dtype=object)
        elif k in ("position", "grain_count"):
            arr = np.array(v, dtype=np.int64)
        else:
            arr = np.array(v, dtype=float)
        data[k] = (("point",), arr, {"units": "1" if k in ("position", "grain_count") else "",
                                     "long_name": long[k]})
    ds = xr.Dataset(data)
    ds.attrs.update(
        trend_by=key, chart="Shewhart individuals chart; sigma from the average moving range (d2 = 2/sqrt(pi))",
        rules="; ".join(f"rule {n}: {d[0]}" for n, d in cc.RULES.items()), rules_name=cc.RULES_NAME,
        min_points_for_limits=5,
    )
    return ds


def trend_field(summary_params: dict | None, frames) -> str:
    """The field trends run over: the first ``group_by`` field found in ``frames``, else ``sample``."""
    for key in (summary_params or {}).get("group_by") or []:
        if key != "sample" and key in frames.variables:
            return str(key)
    return "sample"


def judge(specs: Specs, groups: dict, summary_params: dict | None = None) -> dict:
    """``verdicts`` and ``trends`` groups of a run's consolidated groups.

    Parameters
    ----------
    specs : Specs
    groups : dict of str -> xarray.Dataset
        With ``grains``, ``frames`` and ``summary``.
    summary_params : dict, optional
        Parameters of the summarise step that made ``summary``.

    Returns
    -------
    dict of str -> xarray.Dataset
    """
    from .summarise_samples import STEP as SUMMARY_STEP

    params = SUMMARY_STEP.resolve({k: v for k, v in (summary_params or {}).items()
                                   if k in {p.name for p in SUMMARY_STEP.params}})
    out = {"verdicts": judge_samples(specs, groups["summary"])}
    key = trend_field(params, groups["frames"])
    if groups["grains"].sizes.get("grain", 0):
        out["trends"] = trend_points(specs, groups["grains"], groups["frames"], key, params)
    return out


def verdict_lines(summary, verdicts=None) -> list[str]:
    """One line per sample for stdout (cron mail): its product and verdict.

    Parameters
    ----------
    summary : xarray.Dataset
        The ``summary`` group (for the samples and their grain counts).
    verdicts : xarray.Dataset, optional
        The ``verdicts`` group; without it every sample is listed as having
        no spec.
    """
    lines = []
    samples = [str(s) for s in summary["sample"].values]
    width = max([len(s) for s in samples] + [6])
    vs = [str(s) for s in verdicts["sample"].values] if verdicts is not None else []
    pwidth = max([len(str(p)) for p in verdicts["product"].values] + [1]) if verdicts is not None else 1
    for i, s in enumerate(samples):
        if not s:
            continue
        n = int(summary["grain_count"].values[i])
        head = f"verdict {s:<{width}}  "
        if s not in vs:
            lines.append(f"{head}{'-':<{pwidth}}  no spec file: no verdict ({n} grains)")
            continue
        r = vs.index(s)
        prod = str(verdicts["product"].values[r])
        v = str(verdicts["verdict_overall"].values[r])
        if not prod:
            lines.append(f"{head}{'-':<{pwidth}}  matches no product: no verdict ({n} grains)")
            continue
        crits = [str(c) for c in verdicts["criterion"].values]
        notes = [str(x) for x in verdicts["note"].values[r]]
        why = []
        if "too few grains" in notes[crits.index("grain_count")]:
            why.append(notes[crits.index("grain_count")])
        else:
            for j, c in enumerate(crits):
                if str(verdicts["verdict"].values[r, j]) == v and v != "pass":
                    lo, hi = float(verdicts["ci_lo"].values[r, j]), float(verdicts["ci_hi"].values[r, j])
                    why.append(f"{c} {float(verdicts['value'].values[r, j]):.4g} [{lo:.4g}, {hi:.4g}] "
                               f"({notes[j]})")
        extra = ""
        need = float(verdicts["grains_needed"].values[r])
        if v == "undecided" and math.isfinite(need):
            extra = f"; about {int(need)} grains would decide it"
        detail = "; ".join(why[:3]) + ("; ..." if len(why) > 3 else "")
        lines.append(f"{head}{prod:<{pwidth}}  {v.upper():<9} {n} grains" + (f": {detail}" if detail else "")
                     + extra)
    return lines
