"""Step ``summarise-samples``: per-sample (and per-group) statistics of the grains.

Reads the consolidated ``grains`` and ``frames`` tables and returns the
``summary`` group (dims ``sample`` and ``habit``) with the variables the
design contract names, their spread and bootstrap confidence intervals, and
one ``summary_by_<key>`` group for each frame field listed in ``group_by``
(e.g. ``batch`` or ``date``). The science is in :mod:`grainhabit.plugins.survey.statistics`.

Edge-cut grains are left out unless ``include_edge_cut`` is set: their
visible outline under-reports their size.
"""

from __future__ import annotations

import zlib

import numpy as np

from grainhabit import hookimpl
from grainhabit.lazy import lazy_module
from grainhabit.params import Param, StepInfo

from grainhabit.plugins.habit.vocabulary import CUBE_ALPHA_MAX, OCTAHEDRON_ALPHA
from grainhabit.plugins.survey import statistics as st
from grainhabit.plugins.survey.results_tables import text_values

xr = lazy_module("xarray")  # imported on first use: workers never need it

GRAINHABIT_API = 1


#: How the confidence intervals are made (stored as the ``ci_note`` attribute).
CI_NOTE = (
    "Frames are the independent units: grains of one frame share focus, contrast and local growth conditions. "
    "Mean ECD: clustered (ratio-estimator) standard error; COV, D10/D50/D90, D[3,2], alpha median: frame "
    "(cluster) bootstrap standard error, scaled by F/(F-1); both floored at the independent-grain error, with "
    "Student t quantiles on F - 1 degrees of freedom (F = ci_frames; one frame: grains taken as independent). "
    "Fractions: Clopper-Pearson on the effective number of grains (Korn-Graubard), exact at 0 and 1."
)

STEP = StepInfo(
    name="summarise-samples",
    stage="summarise",
    version="1.0",
    summary="Size distribution, spread, habit fractions and alpha per sample, with bootstrap CIs.",
    params=(
        Param("group_by", list, [], doc="Frame fields (e.g. batch, date) to summarise by as well, one group each."),
        Param("monodisperse_cov_pct", float, st.MONODISPERSE_COV_PCT, unit="%", low=0.0,
              doc="Size COV at or below which a sample is called monodisperse (15 %: common practice, from memory)."),
        Param("bootstrap", int, 1000, low=0, doc="Bootstrap resamples for the confidence intervals; 0 turns them off."),
        Param("seed", int, 0, low=0, doc="Seed of the bootstrap random generator."),
        Param("confidence", float, 0.95, low=0.5, high=0.999, doc="Two-sided confidence level of the intervals."),
        Param("alpha_min_determined", float, 0.5, low=0.0, high=1.0,
              doc="Least fraction of grains with a determined alpha (not only bounded) for alpha_median to be given."),
        Param("include_edge_cut", bool, False, doc="Count grains that touch the frame border too."),
    ),
)

# name -> (units, long_name); dims are ("sample",) unless listed in _HABIT_VARS
_VARS = {
    "grain_count": ("1", "grains counted (edge-cut grains excluded unless included)"),
    "frame_count": ("1", "frames of this group"),
    "ci_frames": ("1", "frames holding the counted grains: the independent units of the confidence intervals"),
    "frames_failed": ("1", "frames that failed"),
    "edge_cut_count": ("1", "grains touching the frame border"),
    "edge_cut_fraction": ("1", "fraction of grains touching the frame border"),
    "ecd_mean_nm": ("nm", "number-based arithmetic mean ECD"),
    "ecd_sd_nm": ("nm", "sample standard deviation of ECD (ddof = 1)"),
    "ecd_cov_pct": ("%", "coefficient of variation of ECD, 100 sd / mean"),
    "ecd_d10_nm": ("nm", "number-based ECD x10,0 (ISO 9276-1)"),
    "ecd_d50_nm": ("nm", "number-based median ECD x50,0 (ISO 9276-1)"),
    "ecd_d90_nm": ("nm", "number-based ECD x90,0 (ISO 9276-1)"),
    "ecd_d10_area_nm": ("nm", "projected-area-based ECD x10,2 (ISO 9276-1)"),
    "ecd_d50_area_nm": ("nm", "projected-area-based median ECD x50,2 (ISO 9276-1)"),
    "ecd_d90_area_nm": ("nm", "projected-area-based ECD x90,2 (ISO 9276-1)"),
    "ecd_d10_volume_nm": ("nm", "volume-based ECD x10,3 (ISO 9276-1)"),
    "ecd_d50_volume_nm": ("nm", "volume-based median ECD x50,3 (ISO 9276-1)"),
    "ecd_d90_volume_nm": ("nm", "volume-based ECD x90,3 (ISO 9276-1)"),
    "sauter_d32_nm": ("nm", "Sauter mean diameter D[3,2] of ECD (ISO 9276-2)"),
    "de_brouckere_d43_nm": ("nm", "De Brouckere mean diameter D[4,3] of ECD (ISO 9276-2)"),
    "ecd_geo_mean_nm": ("nm", "geometric mean ECD (lognormal fit)"),
    "ecd_geo_sd": ("1", "geometric standard deviation of ECD (lognormal fit)"),
    "habit_count": ("1", "grains per habit"),
    "habit_unknown_count": ("1", "grains whose habit is not in the vocabulary"),
    "habit_number_fraction": ("1", "habit fraction by number"),
    "habit_area_fraction": ("1", "habit fraction by projected area"),
    "alpha_median": ("1", "median of the determined values of the growth-rate parameter alpha"),
    "alpha_iqr": ("1", "interquartile range of the determined values of alpha"),
    "alpha_count": ("1", "grains with a determined alpha"),
    "alpha_bounded_count": ("1", "grains whose alpha is only bounded (alpha NaN, alpha_lo / alpha_hi finite)"),
    "alpha_determined_fraction": ("1", "fraction of the grains with alpha information whose alpha is determined"),
    "alpha_cube_range_fraction": ("1", f"fraction of the grains with alpha information known to have alpha <= "
                                       f"{CUBE_ALPHA_MAX:g} (alpha or alpha_hi)"),
    "alpha_octahedron_range_fraction": ("1", f"fraction of the grains with alpha information known to have alpha >= "
                                             f"{OCTAHEDRON_ALPHA:g} (alpha or alpha_lo)"),
    "tabular_aspect_ratio_mean": ("1", "mean aspect ratio of tabular grains"),
    "tabular_count": ("1", "tabular grains with a measured aspect ratio"),
    "monodisperse": ("", "size COV at or below the monodispersity threshold"),
    "monodispersity": ("", "verdict: monodisperse, polydisperse, borderline (CI straddles the threshold), no data"),
}
_HABIT_VARS = {"habit_count", "habit_number_fraction", "habit_area_fraction"}
_CI_OF = ("ecd_mean_nm", "ecd_cov_pct", "ecd_d10_nm", "ecd_d50_nm", "ecd_d90_nm", "sauter_d32_nm",
          "habit_number_fraction", "habit_area_fraction", "alpha_median", "alpha_determined_fraction",
          "alpha_cube_range_fraction", "alpha_octahedron_range_fraction")
_INT_VARS = {"grain_count", "frame_count", "frames_failed", "edge_cut_count", "habit_count",
             "habit_unknown_count", "alpha_count", "alpha_bounded_count", "tabular_count", "ci_frames"}


def _column(ds: xr.Dataset, name: str, n: int, fill, dtype=float) -> np.ndarray:
    if name in ds.variables:
        return np.asarray(ds[name].values)
    return np.full(n, fill, dtype=dtype)


def _frame_field(grains: xr.Dataset, frames: xr.Dataset, key: str) -> tuple[np.ndarray, np.ndarray]:
    """Value of frame field ``key`` for every frame and for every grain (as text)."""
    if key not in frames.variables:
        known = ", ".join(sorted(str(k) for k in frames.data_vars)) or "none"
        raise ValueError(f"group_by: frames have no field {key!r} (fields: {known})")
    per_frame = text_values(np.asarray(frames[key].values).ravel())
    n_frames = frames.sizes.get("frame", per_frame.size)
    fidx = np.asarray(_column(grains, "frame", grains.sizes.get("grain", 0), -1, int), dtype=int)
    if "frame" in frames.coords and not np.array_equal(np.asarray(frames["frame"].values), np.arange(n_frames)):
        lookup = {int(v): i for i, v in enumerate(np.asarray(frames["frame"].values))}
        fidx = np.array([lookup.get(int(f), -1) for f in fidx], dtype=int)
    bad = (fidx < 0) | (fidx >= n_frames)
    if bad.any():
        raise ValueError(f"grains refer to frame {int(fidx[bad][0])}, frames has {n_frames}")
    return per_frame, per_frame[fidx] if fidx.size else np.array([], dtype=object)


def _rng(seed: int, dim: str, label: str) -> np.random.Generator:
    # depends on the group's own name only, so adding samples leaves others' limits unchanged
    return np.random.default_rng([int(seed), zlib.crc32(f"{dim}:{label}".encode())])


def _one_group(ecd, area, codes, alpha, alpha_lo, alpha_hi, aspect, frame, params, rng) -> dict:
    """Statistics of one group of grains (already filtered): name -> value.

    ``frame`` is each grain's frame: the confidence intervals treat frames,
    not grains, as the independent units (see :func:`grainhabit.plugins.survey.statistics.clustered_bootstrap`).
    """
    k = len(st.HABITS)
    n = int(ecd.size)
    conf = float(params["confidence"])
    B = int(params["bootstrap"])
    out: dict = {"grain_count": n, "ci_frames": int(np.unique(frame).size)}
    m, sd, cov = st.mean_sd_cov(ecd)
    out.update(ecd_mean_nm=m, ecd_sd_nm=sd, ecd_cov_pct=cov)
    for r, tag in ((0, ""), (2, "_area"), (3, "_volume")):
        d10, d50, d90 = st.d_values(ecd, r) if n else (np.nan,) * 3
        out[f"ecd_d10{tag}_nm"], out[f"ecd_d50{tag}_nm"], out[f"ecd_d90{tag}_nm"] = d10, d50, d90
    out["sauter_d32_nm"] = st.sauter_diameter(ecd)
    out["de_brouckere_d43_nm"] = st.de_brouckere_diameter(ecd)
    out["ecd_geo_mean_nm"], out["ecd_geo_sd"] = st.lognormal_fit(ecd)
    out["habit_count"] = np.bincount(codes[codes >= 0], minlength=k)
    out["habit_unknown_count"] = int((codes < 0).sum())
    out["habit_number_fraction"], out["habit_area_fraction"] = st.habit_fractions(codes, area, k)
    out["tabular_aspect_ratio_mean"], out["tabular_count"] = st.tabular_aspect_ratio_mean(aspect, codes)
    out.update(_alpha_stats(alpha, alpha_lo, alpha_hi, frame, params))

    for name in _CI_OF:
        if name.startswith("alpha_"):
            continue  # set by _alpha_stats
        shape_nan = np.full(k, np.nan) if name in _HABIT_VARS else np.nan
        out[name + "_ci_lo"] = shape_nan
        out[name + "_ci_hi"] = np.copy(shape_nan)
    if n >= 2:
        spread = st.clustered_mean(ecd, frame)
        out["ecd_mean_nm_ci_lo"], out["ecd_mean_nm_ci_hi"] = st.t_interval(spread, conf, low=0)
        known = codes >= 0
        nk = int(known.sum())
        if nk >= 1:
            onehot = (codes[known][:, None] == np.arange(k)[None, :]).astype(float)
            sp = st.clustered_mean(onehot, frame[known], binary=True)
            out["habit_number_fraction_ci_lo"], out["habit_number_fraction_ci_hi"] = st.proportion_ci(
                out["habit_number_fraction"], sp.se**2, nk, sp.df, conf)
    if B > 0 and n >= 2:
        known = codes >= 0
        onehot = (codes[:, None] == np.arange(k)[None, :]).astype(float)
        boot = {"cov": st.weighted_cov_stat(ecd),
                "d": st.weighted_quantile_stat(ecd, [0.1, 0.5, 0.9]),
                "d32": st.weighted_moment_mean_stat(ecd, 3, 2)}
        if known.sum() >= 2:
            boot["area"] = (st.weighted_ratio_stat(onehot[known] * area[known][:, None], area[known]), known)
        det = np.isfinite(alpha)
        if np.isfinite(out["alpha_median"]) and det.sum() >= 2:
            boot["alpha"] = (st.weighted_quantile_stat(alpha[det], 0.5), det)
        sp = st.clustered_bootstrap(boot, n, frame, n_resamples=B, rng=rng)
        out["ecd_cov_pct_ci_lo"], out["ecd_cov_pct_ci_hi"] = st.t_interval(sp["cov"], conf, low=0)
        lo, hi = st.t_interval(sp["d"], conf, low=0)
        for j, name in enumerate(("ecd_d10_nm", "ecd_d50_nm", "ecd_d90_nm")):
            out[name + "_ci_lo"], out[name + "_ci_hi"] = float(lo[j]), float(hi[j])
        out["sauter_d32_nm_ci_lo"], out["sauter_d32_nm_ci_hi"] = st.t_interval(sp["d32"], conf, low=0)
        if "area" in sp:
            out["habit_area_fraction_ci_lo"], out["habit_area_fraction_ci_hi"] = st.proportion_ci(
                out["habit_area_fraction"], sp["area"].se**2, int(known.sum()), sp["area"].df, conf)
        if "alpha" in sp:
            out["alpha_median_ci_lo"], out["alpha_median_ci_hi"] = st.t_interval(sp["alpha"], conf)
    out["monodisperse"], out["monodispersity"] = st.monodispersity(
        out["ecd_cov_pct"], out["ecd_cov_pct_ci_lo"], out["ecd_cov_pct_ci_hi"], params["monodisperse_cov_pct"])
    return out


def _alpha_stats(alpha, alpha_lo, alpha_hi, frame, params) -> dict:
    """alpha statistics of one group: determined values only; bounds as fractions of known ranges."""
    conf = float(params["confidence"])
    det, bnd = st.alpha_states(alpha, alpha_lo, alpha_hi)
    info = det | bnd
    n_info = int(info.sum())
    out = {"alpha_count": int(det.sum()), "alpha_bounded_count": int(bnd.sum())}
    names = ("alpha_median", "alpha_determined_fraction", "alpha_cube_range_fraction",
             "alpha_octahedron_range_fraction")
    for name in names + ("alpha_iqr",):
        out[name] = np.nan
    for name in names:
        out[name + "_ci_lo"] = out[name + "_ci_hi"] = np.nan
    if n_info == 0:
        return out
    fi = frame[info]
    sp = st.clustered_mean(det[info].astype(float), fi, binary=True)
    out["alpha_determined_fraction"] = float(sp.estimate)
    out["alpha_determined_fraction_ci_lo"], out["alpha_determined_fraction_ci_hi"] = st.proportion_ci(
        sp.estimate, sp.se**2, n_info, sp.df, conf)
    for name, below, limit in (("alpha_cube_range_fraction", True, CUBE_ALPHA_MAX),
                               ("alpha_octahedron_range_fraction", False, OCTAHEDRON_ALPHA)):
        yes, undecided = st.alpha_in_range(alpha[info], alpha_lo[info], alpha_hi[info], limit, below)
        sy = st.clustered_mean(yes.astype(float), fi, binary=True)
        out[name] = float(sy.estimate)
        out[name + "_ci_lo"] = st.proportion_ci(sy.estimate, sy.se**2, n_info, sy.df, conf)[0]
        su = st.clustered_mean((yes | undecided).astype(float), fi, binary=True) if undecided.any() else sy
        out[name + "_ci_hi"] = st.proportion_ci(su.estimate, su.se**2, n_info, su.df, conf)[1]
    if out["alpha_determined_fraction"] >= float(params["alpha_min_determined"]) and det.sum() >= 1:
        # the median's interval comes from the sample's frame bootstrap (see _one_group)
        out["alpha_median"], out["alpha_iqr"], _ = st.alpha_median_iqr(alpha[det])
    return out


def _attrs_of(name: str) -> dict:
    base = name[:-6] if name.endswith(("_ci_lo", "_ci_hi")) else name
    units, long_name = _VARS[base]
    if base != name:
        side = "lower" if name.endswith("_ci_lo") else "upper"
        long_name = f"{side} confidence limit of the {long_name} (frames as independent units)"
    return {"units": units, "long_name": long_name}


def summarise_by(grains: xr.Dataset, frames: xr.Dataset, dim: str, params: dict) -> xr.Dataset:
    """Summary statistics of the grains grouped by one frame field.

    Parameters
    ----------
    grains : xarray.Dataset
        ``grains`` group (dim ``grain``) with at least ``ecd_nm``.
    frames : xarray.Dataset
        ``frames`` group (dim ``frame``).
    dim : str
        Field to group by (``"sample"`` or any text field of ``frames``);
        becomes the dataset's dimension.
    params : dict
        Resolved parameters of :data:`STEP`.

    Returns
    -------
    xarray.Dataset
        Dims ``dim`` (every value found in ``frames``, sorted) and ``habit``.
    """
    n_grain = grains.sizes.get("grain", 0)
    if dim == "sample" and "sample" in grains.variables:
        per_frame = text_values(_column(frames, "sample", frames.sizes.get("frame", 0), "", object))
        per_grain = text_values(np.asarray(grains["sample"].values))
    else:
        per_frame, per_grain = _frame_field(grains, frames, dim)
    labels = sorted(set(per_frame.tolist()) | set(per_grain.tolist()))

    ecd = np.asarray(_column(grains, "ecd_nm", n_grain, np.nan), dtype=float)
    area = np.asarray(_column(grains, "area_nm2", n_grain, np.nan), dtype=float)
    area = np.where(np.isfinite(area), area, np.pi / 4 * ecd**2)
    codes = st.habit_codes(_column(grains, "habit", n_grain, "", object))
    alpha = np.asarray(_column(grains, "alpha", n_grain, np.nan), dtype=float)
    alpha_lo = np.asarray(_column(grains, "alpha_lo", n_grain, np.nan), dtype=float)
    alpha_hi = np.asarray(_column(grains, "alpha_hi", n_grain, np.nan), dtype=float)
    frame = np.asarray(_column(grains, "frame", n_grain, 0, int))
    aspect = np.asarray(_column(grains, "tabular_aspect_ratio", n_grain, np.nan), dtype=float)
    edge = np.asarray(_column(grains, "edge_cut", n_grain, False, bool), dtype=bool)
    status = text_values(_column(frames, "status", per_frame.size, "ok", object))
    valid = np.isfinite(ecd) & (ecd > 0) & np.isfinite(area) & (area >= 0)
    use = valid & (~edge if not params["include_edge_cut"] else True)

    rows = []
    for label in labels:
        g = per_grain == label
        sel = g & use
        row = _one_group(ecd[sel], area[sel], codes[sel], alpha[sel], alpha_lo[sel], alpha_hi[sel], aspect[sel],
                         frame[sel], params, _rng(params["seed"], dim, label))
        fr = per_frame == label
        row["frame_count"] = int(fr.sum())
        row["frames_failed"] = int((fr & (status == "failed")).sum())
        n_g = int((g & valid).sum())
        row["edge_cut_count"] = int((g & valid & edge).sum())
        row["edge_cut_fraction"] = row["edge_cut_count"] / n_g if n_g else np.nan
        rows.append(row)

    k = len(st.HABITS)
    data = {}
    names = list(_VARS) + [f"{v}_ci_{s}" for v in _CI_OF for s in ("lo", "hi")]
    for name in names:
        base = name[:-6] if name.endswith(("_ci_lo", "_ci_hi")) else name
        if base in _HABIT_VARS:
            dtype = int if name in _INT_VARS else float
            vals = np.array([r[name] for r in rows], dtype=dtype).reshape(len(rows), k)
            data[name] = ((dim, "habit"), vals, _attrs_of(name))
        else:
            if name == "monodispersity":
                vals = text_values([r[name] for r in rows])
            elif name == "monodisperse":
                vals = np.array([r[name] for r in rows], dtype=bool)
            else:
                vals = np.array([r[name] for r in rows], dtype=int if name in _INT_VARS else float)
            data[name] = ((dim,), vals, _attrs_of(name))
    ds = xr.Dataset(
        data,
        coords={
            dim: ((dim,), text_values(labels), {"units": "", "long_name": f"{dim} name"}),
            "habit": (("habit",), text_values(st.HABITS), {"units": "", "long_name": "crystal habit"}),
        },
    )
    ds.attrs.update(
        grouped_by=dim,
        edge_cut_included=int(bool(params["include_edge_cut"])),
        monodisperse_cov_pct=float(params["monodisperse_cov_pct"]),
        monodisperse_note="threshold on the size COV; 10-15 % or less is called monodisperse (common practice, from memory)",
        d_values_basis="ecd_dXX_nm are number-based (r = 0); _area_ (r = 2) and _volume_ (r = 3) variants are weighted",
        bootstrap_resamples=int(params["bootstrap"]),
        bootstrap_method="frame (cluster) bootstrap, Student t on frames - 1 degrees of freedom",
        ci_note=CI_NOTE,
        bootstrap_seed=int(params["seed"]),
        confidence=float(params["confidence"]),
    )
    return ds


def summarise(grains: xr.Dataset, frames: xr.Dataset, params: dict | None = None) -> dict[str, xr.Dataset]:
    """Compute ``summary`` and one ``summary_by_<key>`` per ``group_by`` key.

    Parameters
    ----------
    grains, frames : xarray.Dataset
        The ``grains`` and ``frames`` groups of a results store.
    params : dict, optional
        Parameters of :data:`STEP` (resolved with its defaults).

    Returns
    -------
    dict of str -> xarray.Dataset
    """
    params = STEP.resolve(params)
    params["group_by"] = list(params.get("group_by") or [])
    for key in params["group_by"]:
        if not isinstance(key, str) or not key:
            raise ValueError(f"group_by: field names must be non-empty strings, got {key!r}")
    out = {"summary": summarise_by(grains, frames, "sample", params)}
    for key in params["group_by"]:
        if key == "sample":
            continue
        out[f"summary_by_{key}"] = summarise_by(grains, frames, key, params)
    return out


@hookimpl
def grainhabit_summarise(grains, frames, summary, params):
    """Per-sample and per-group statistics; see :func:`summarise`."""
    return summarise(grains, frames, params)
