"""Step ``classify-habit``: the crystal habit of every grain, from outline and interior.

Evidence, per grain
-------------------
*Outline.* The sub-pixel outline of the grain's label (the one measure-grains
uses) is compared, by the scale- and rotation-invariant radial-signature
distance of :mod:`grainhabit.plugins.habit.fit_growth_ratio`, with three model families: Wulff shapes at
rest on {100} or {111} (cube ... octahedron), twinned {111} plates (a
triangle with cut corners, short/long edge ratio e from 0 to 1) and {100}
rods (rectangles of length/width 1.6 ... 16). Distances are in units of the
outline noise ``tau`` (:func:`grainhabit.plugins.habit.fit_growth_ratio.fit_alpha`). Feret ratio and
solidity come from the outline's convex hull.

*Interior.* The grain's pixels (rim left out) are fitted by the placed Wulff
models: in SEM contrast (bright polarity) each facet has its own uniform
brightness, in TEM contrast (dark polarity) the attenuation -ln(I/I_bg) is
linear in projected thickness. ``facet_chi2`` is how much better the best
faceted model explains the interior than a featureless one (one level and a
plane): large for an octahedron on {111} (inclined facets, or thickness
peaking in the middle), near zero for a flat plate. In TEM contrast the mean
transmission tells a thin plate (semi-transparent) from a thick 3-D grain
(nearly opaque): ``interior_transmission``.

Decision
--------
1. ``irregular`` if the outline is concave (solidity below ``min_solidity``:
   aggregates, unsplit clusters) or fits none of the families within
   ``irregular_misfit`` noise units (rounded, ripened, lumpy).
2. ``rod`` if the rod family fits best and the Feret ratio is below
   ``rod_feret_ratio``.
3. The plate family fits clearly better than any Wulff outline (Wulff
   projections are centrally symmetric; a triangle or a hexagon with three long
   and three short edges is not): ``tabular_triangle`` where the fitted edge
   ratio is below ``triangle_edge_ratio``, else ``tabular_hexagon``.
4. Otherwise the outline is a square, octagon, hexagon or 12-gon. A flat
   interior (``facet_chi2 < facet_chi2_min``) with a hexagonal outline that
   the plate family fits is ``tabular_hexagon`` (in TEM only if
   semi-transparent; an octahedron on {111} always shows inclined facets or a
   thickness peak). A flat square is a cube in SEM or when opaque in TEM (a
   perfect cube shows only its top face), but ``irregular`` when
   semi-transparent in TEM (a thin {100} plate: the fixed vocabulary has no
   class for it). A flat octagon, 12-gon or disc fits no model: ``irregular``. Everything else is polyhedral
   and named by alpha (design contract): ``cube`` alpha <= 1.5,
   ``cuboctahedron`` 1.5 < alpha < 3, ``octahedron`` alpha >= 3, taking the
   class whose best alpha scores lowest, with the octahedron preferred within
   ``octahedron_margin`` (:func:`polyhedral_class`).

The Wulff fit with the interior (:func:`grainhabit.plugins.habit.fit_growth_ratio.fit_alpha`, coarse
search) is run only when steps 1-3 do not already decide from the outline
with the smallest Wulff misfit (:func:`outline_decides`; the habit is then
provably the same). For grains the outline decides, ``facet_chi2`` comes from
the eight outline-best Wulff models (``search='quick'``) and the Wulff misfit
is the smallest one.

``habit_score`` is the relative likelihood of that class for polyhedral
grains (0.7 times it when the interior is flat), and for the other
classes a product of logistic margins of the deciding quantities (documented
in :func:`_margin`); it is a confidence in [0, 1], not a calibrated
probability.

References
----------
.. [1] ISO 9276-6:2008, descriptors of particle shape (solidity, Feret ratio).
.. [2] G. Wulff, Z. Kristallogr. 34, 449-530, 1901.
"""
from __future__ import annotations

import functools
import math

import numpy as np
from scipy.spatial import ConvexHull

from grainhabit import hookimpl
from grainhabit.params import Column, Param, StepInfo
from grainhabit.plugins.habit import crystal as cr
from grainhabit.plugins.habit.vocabulary import HABITS
from grainhabit.plugins.habit import fit_growth_ratio as gr

GRAINHABIT_API = 1


STEP = StepInfo(
    name="classify-habit",
    stage="classify",
    version="1.0",
    summary="Crystal habit from outline shape and interior facets or thickness contrast.",
    params=(
        Param("min_solidity", float, 0.93, low=0.0, high=1.0,
              doc="Outlines less convex than this (area / convex-hull area) are irregular."),
        Param("irregular_misfit", float, 6.0, low=0.0,
              doc="Outline misfit (in outline-noise units) above which no model family fits."),
        Param("rod_feret_ratio", float, 0.6, low=0.0, high=1.0,
              doc="Rods have a Feret ratio (min/max) below this."),
        Param("plate_margin", float, 4.0, low=0.0,
              doc="Squared-misfit units by which the plate family must beat the Wulff outlines."),
        Param("triangle_edge_ratio", float, 0.1, low=0.0, high=1.0,
              doc="Plates with a short/long edge ratio below this are tabular_triangle."),
        Param("facet_chi2_min", float, 12.0, low=0.0,
              doc="Interior facet evidence (chi-square units) above which a grain counts as faceted."),
        Param("plate_transmission", float, 0.3, low=0.0, high=1.0,
              doc="TEM: a flat grain transmitting more than this fraction of the background is a thin plate."),
        Param("octahedron_margin", float, 0.5, low=0.0,
              doc="Score margin within which the octahedron is preferred to an alpha just under 3."),
        Param("erode_px", int, 2, unit="px", low=0,
              doc="Pixels left out along the outline before reading the interior."),
    ),
    outputs=(
        Column("outline_class", "", "best outline family: wulff, plate or rod"),
        Column("outline_misfit_ratio", "1", "best outline misfit over the outline noise"),
        Column("facet_chi2", "1", "interior evidence for facets over a featureless interior"),
        Column("interior_transmission", "1", "TEM: mean interior transmission I / I_bg (NaN in SEM)"),
        Column("plate_edge_ratio", "1", "short/long edge ratio of the best-fitting plate outline"),
        Column("rod_aspect", "1", "length/width of the best-fitting rod outline"),
    ),
)


# --------------------------------------------------------------- model families

@functools.lru_cache(maxsize=4)
def family_signatures(n_angles: int = 256):
    """Radial signatures of the plate and rod families.

    Parameters
    ----------
    n_angles : int

    Returns
    -------
    plate_e : ndarray, shape (p,)
        Edge ratios of the plates (0 triangle ... 1 regular hexagon).
    plate_sig : ndarray, shape (p, n_angles)
    rod_aspect : ndarray, shape (q,)
        Length / width of the rods.
    rod_sig : ndarray, shape (q, n_angles)
    """
    e = np.linspace(0.0, 1.0, 51)
    rot = cr.resting_rotation("111")
    psig = np.array([gr.radial_signature(cr.project(cr.tabular_prism(v, 0.1), rot), n_angles)
                     for v in e])
    asp = np.geomspace(1.6, 16.0, 40)
    r100 = cr.resting_rotation("100")
    rsig = np.array([gr.radial_signature(cr.project(cr.rod_prism(v), r100), n_angles) for v in asp])
    return e, psig, asp, rsig


_SPECTRA: dict = {}


def _best_family(sig, fam_sig):
    """Smallest signature distance over a family and its index.

    Notes
    -----
    The minimum over shifts of :func:`grainhabit.plugins.habit.fit_growth_ratio.shift_distances` for
    every family member at once: one inverse FFT of the observed spectrum
    times the stored conjugate spectra of the family (computed once per
    family array).
    """
    fam_sig = np.asarray(fam_sig, float)
    key = (id(fam_sig), fam_sig.shape)
    hit = _SPECTRA.get(key)
    if hit is None or hit[0] is not fam_sig:
        hit = (fam_sig, np.conj(np.fft.rfft(fam_sig, axis=1)), np.einsum("ij,ij->i", fam_sig, fam_sig))
        if len(_SPECTRA) > 16:
            _SPECTRA.clear()
        _SPECTRA[key] = hit
    _, spec, sq = hit
    a = np.asarray(sig, float)
    cc = np.fft.irfft(np.fft.rfft(a)[None, :] * spec, a.size, axis=1)
    d2 = (a @ a + sq[:, None] - 2.0 * cc) / a.size
    d = np.sqrt(np.maximum(d2.min(axis=1), 0.0))
    i = int(np.argmin(d))
    return float(d[i]), i


def hull_shape(contour) -> tuple[float, float, float]:
    """Solidity and Feret diameters of a closed outline.

    Parameters
    ----------
    contour : array_like, shape (k, 2)

    Returns
    -------
    solidity : float
        Enclosed area / convex-hull area.
    feret_min, feret_max : float
        Smallest caliper width (flush with a hull edge) and largest vertex
        distance, in the contour's unit.
    """
    c = np.asarray(contour, float)
    _, area = gr.polygon_centroid(c)
    hull = ConvexHull(c)
    h = c[hull.vertices]
    fmax = float(np.max(np.linalg.norm(h[:, None] - h[None], axis=-1)))
    e = np.roll(h, -1, axis=0) - h
    nrm = np.column_stack([-e[:, 1], e[:, 0]]) / np.linalg.norm(e, axis=1, keepdims=True)
    proj = h @ nrm.T
    fmin = float(np.min(proj.max(axis=0) - proj.min(axis=0)))
    return float(area / hull.volume), fmin, fmax


def _margin(value, threshold, width):
    """Logistic confidence that ``value`` lies above ``threshold``: 1 / (1 + exp(-(v - t) / w))."""
    z = (value - threshold) / width
    return float(1.0 / (1.0 + math.exp(-max(min(z, 50.0), -50.0))))


def class_scores(fit: gr.AlphaFit, library: gr.ModelLibrary, face: str | None = None) -> np.ndarray:
    """Best score of the fit within each alpha class: cube, cuboctahedron, octahedron.

    Parameters
    ----------
    fit : AlphaFit
    library : ModelLibrary
    face : str, optional
        Only models resting on this face ('100' or '111'); default both.

    Returns
    -------
    ndarray, shape (3,)
        min of S(alpha) (profiled over faces) over alpha <= 1.5, 1.5 < alpha < 3
        and alpha >= 3 (design contract); inf where the class has no model.
    """
    grid = library.grid
    prof = np.full(grid.size, np.inf)
    gi = np.searchsorted(grid, library.alphas - 1e-9)
    sc = fit.score if face is None else np.where(np.asarray(library.faces) == face, fit.score, np.inf)
    np.minimum.at(prof, gi, sc)
    cls = np.where(grid <= 1.5, 0, np.where(grid < 3.0, 1, 2))
    return np.array([prof[cls == k].min() if np.any(cls == k) else np.inf for k in range(3)])


def polyhedral_class(fit: gr.AlphaFit, library: gr.ModelLibrary, octahedron_margin: float = 0.5
                     ) -> tuple[str, float]:
    """Name a Wulff fit by alpha (design contract) with a relative-likelihood score.

    Parameters
    ----------
    fit : AlphaFit
    library : ModelLibrary
    octahedron_margin : float
        The octahedron (alpha >= 3, one body) is taken when its score is within
        this of the best: outline blur rounds the six corners of an
        octahedron's hexagon, which a barely truncated (alpha just under 3)
        model then fits marginally better.

    Returns
    -------
    habit : str
        'cube' (alpha <= 1.5), 'cuboctahedron' (1.5 < alpha < 3) or 'octahedron'.
    score : float
        exp(-S_c / 2) / sum_k exp(-S_k / 2) of the chosen class, S_k the class
        scores of :func:`class_scores`.
    """
    s = class_scores(fit, library)
    k = int(np.argmin(s))
    if k == 1 and s[2] <= s[1] + octahedron_margin:
        k = 2
    w = np.exp(-0.5 * (s - s.min()))
    return ("cube", "cuboctahedron", "octahedron")[k], float(w[k] / w.sum())


# ------------------------------------------------------------------ per grain

def outline_decides(ratios, solidity, feret_ratio, params) -> bool:
    """Whether the outline alone fixes the habit as irregular, rod or tabular.

    Parameters
    ----------
    ratios : array_like, shape (3,)
        Outline misfits over the outline noise of the best Wulff outline
        (the smallest, interior left out), the plate and the rod family.
    solidity, feret_ratio : float
    params : dict
        Resolved parameters of this step.

    Returns
    -------
    bool

    Notes
    -----
    The interior fit can only move the Wulff misfit up (its best model
    trades outline fit for interior fit), never down. Each test of
    :func:`classify_grain` that ends in irregular, rod or a tabular class
    stays true when the Wulff misfit grows, and the tests before it keep
    their outcome, so when one passes here the full fit would give the same
    habit: it is then skipped.
    """
    r = np.asarray(ratios, float)
    p = params
    best = int(np.argmin(r))
    return bool(solidity < p["min_solidity"] or r[best] > p["irregular_misfit"]
                or (best == 2 and feret_ratio < p["rod_feret_ratio"])
                or r[0] ** 2 - r[1] ** 2 > p["plate_margin"])


def classify_grain(contour_lab, interior, params, pixel_scale=1.0, transmission=float("nan")):
    """Habit of one grain.

    Parameters
    ----------
    contour_lab : ndarray, shape (k, 2)
        Outline in lab axes (y up), pixels.
    interior : Interior or None
        From :func:`grainhabit.plugins.habit.fit_growth_ratio.grain_interior`.
    params : dict
        Resolved parameters of this step.
    pixel_scale : float
        Pixel length in the contour's unit.
    transmission : float
        TEM mean transmission I / I_bg inside the grain (NaN for SEM).

    Returns
    -------
    dict
        ``habit``, ``habit_score`` and the extra columns of this step.
    """
    p = params
    kw = gr.fit_kwargs(None)
    kw["pixel_scale"] = pixel_scale
    lib = kw["library"]
    # outline first: the best Wulff outline (no interior) with facet evidence
    # from the outline-best models only
    fit = gr.fit_alpha_cached(contour_lab, interior, **{**kw, "search": "quick"})
    _, area = gr.polygon_centroid(contour_lab)
    tau = max(0.25 * pixel_scale / math.sqrt(area), 0.003)
    sig = fit.signature
    pe, psig, ra, rsig = family_signatures(lib.signatures.shape[1])
    d_plate, ip = _best_family(sig, psig)
    d_rod, ir = _best_family(sig, rsig)
    solidity, fmin, fmax = hull_shape(contour_lab)
    feret_ratio = fmin / fmax
    if not outline_decides(np.array([fit.outline_misfit, d_plate, d_rod]) / tau, solidity, feret_ratio, p):
        fit = gr.fit_alpha_cached(contour_lab, interior, **kw)
    d_wulff = fit.outline_misfit
    ratios = np.array([d_wulff, d_plate, d_rod]) / tau
    best = int(np.argmin(ratios))
    out = {
        "outline_class": ("wulff", "plate", "rod")[best],
        "outline_misfit_ratio": float(ratios[best]),
        "facet_chi2": fit.facet_chi2,
        "interior_transmission": transmission,
        "plate_edge_ratio": float(pe[ip]),
        "rod_aspect": float(ra[ir]),
        "_fit": fit,
    }
    fchi = fit.facet_chi2 if np.isfinite(fit.facet_chi2) else 0.0
    faceted = fchi >= p["facet_chi2_min"]
    if solidity < p["min_solidity"] or ratios[best] > p["irregular_misfit"]:
        s = max(1.0 - _margin(solidity, p["min_solidity"], 0.01),
                _margin(ratios[best], p["irregular_misfit"], 0.5))
        return {**out, "habit": "irregular", "habit_score": s}
    if best == 2 and feret_ratio < p["rod_feret_ratio"]:
        s = 1.0 - _margin(feret_ratio, p["rod_feret_ratio"], 0.05)
        return {**out, "habit": "rod", "habit_score": s}
    plate_gain = ratios[0] ** 2 - ratios[1] ** 2       # how much better the plate outline fits
    if plate_gain > p["plate_margin"]:
        s = _margin(plate_gain, p["plate_margin"], 2.0)
        if pe[ip] < p["triangle_edge_ratio"]:
            return {**out, "habit": "tabular_triangle", "habit_score": s}
        return {**out, "habit": "tabular_hexagon", "habit_score": s}
    thin = np.isfinite(transmission) and transmission > p["plate_transmission"]
    flat_score = 1.0 - _margin(fchi, p["facet_chi2_min"], 0.25 * p["facet_chi2_min"] + 1e-9)
    if not faceted and interior is not None:
        # a featureless interior: a flat plate, or a cube seen on its top face;
        # a flat octagon or 12-gon (or a disc) fits neither
        if ratios[1] <= p["irregular_misfit"] and plate_gain > -p["plate_margin"]:
            if thin or not np.isfinite(transmission):
                return {**out, "habit": "tabular_hexagon", "habit_score": flat_score}
        cs = class_scores(fit, lib)
        square = class_scores(fit, lib, "100")[0] <= kw["tolerance"]     # square outline
        if not square:
            return {**out, "habit": "irregular", "habit_score": flat_score}
        if thin:
            return {**out, "habit": "irregular",
                    "habit_score": flat_score * _margin(transmission, p["plate_transmission"], 0.05)}
        w = np.exp(-0.5 * (cs - cs.min()))
        return {**out, "habit": "cube", "habit_score": 0.7 * float(w[0] / w.sum())}
    habit, share = polyhedral_class(fit, lib, p["octahedron_margin"])
    if not faceted:
        share *= 0.7          # a flat top face: a cube, but the plate cannot be ruled out
    return {**out, "habit": habit, "habit_score": share}


def _transmission(frame, index, boxes=None):
    """TEM mean interior transmission I / I_bg of grain ``index`` (NaN for SEM).

    ``boxes``: ``scipy.ndimage.find_objects(frame.labels)`` when already
    computed (one pass for the whole frame).
    """
    if frame.polarity != "dark" or frame.raw is None or np.shape(frame.raw) != np.shape(frame.labels):
        return float("nan")
    from scipy import ndimage as ndi

    lab = int(frame.grains["label"][index])
    if boxes is None:
        boxes = ndi.find_objects(np.asarray(frame.labels))
    if not 0 < lab <= len(boxes) or boxes[lab - 1] is None:
        return float("nan")
    r, c = boxes[lab - 1]
    pad = 6
    r0, r1 = max(r.start - pad, 0), min(r.stop + pad, frame.labels.shape[0])
    c0, c1 = max(c.start - pad, 0), min(c.stop + pad, frame.labels.shape[1])
    lc = frame.labels[r0:r1, c0:c1]
    raw = np.asarray(frame.raw[r0:r1, c0:c1], float)
    mask = lc == lab
    inner = ndi.binary_erosion(mask, iterations=2)
    ring = (lc == 0) & ~ndi.binary_dilation(mask, iterations=2)
    if not inner.any() or not ring.any():
        return float("nan")
    bg = float(np.median(raw[ring]))
    return float(np.mean(raw[inner]) / bg) if bg > 0 else float("nan")


def classify_frame(frame, params=None) -> dict:
    """Habit columns for every grain of a frame (see the module docstring)."""
    p = STEP.resolve(params)
    n = frame.n_grains
    cols = {
        "habit": np.full(n, "irregular", dtype=object), "habit_score": np.zeros(n),
        "outline_class": np.full(n, "", dtype=object), "outline_misfit_ratio": np.full(n, np.nan),
        "facet_chi2": np.full(n, np.nan), "interior_transmission": np.full(n, np.nan),
        "plate_edge_ratio": np.full(n, np.nan), "rod_aspect": np.full(n, np.nan),
    }
    if n == 0:
        return cols
    if frame.labels is None:
        raise ValueError("classify-habit needs frame.labels: run a segment step first")
    gr.clear_fit_cache()  # the fits of this frame's grains are remembered for fit-growth-ratio, no older ones
    contours = gr.contours_for(frame)
    boxes = None
    if frame.polarity == "dark":
        from scipy import ndimage as ndi
        boxes = ndi.find_objects(np.asarray(frame.labels))
    for i in range(n):
        contour, interior = gr.grain_evidence(frame, contours, i, p["erode_px"])
        if contour is None or len(contour) < 8:
            cols["habit_score"][i] = 0.0
            continue
        res = classify_grain(contour, interior, p, 1.0, _transmission(frame, i, boxes))
        for k in cols:
            cols[k][i] = res[k]
    return cols


@hookimpl
def grainhabit_classify(frame, params):
    """Add ``habit``, ``habit_score`` and the evidence columns; see the module docstring."""
    return frame.with_columns(**classify_frame(frame, params))


@hookimpl
def grainhabit_prepare_worker(steps):
    """Build the Wulff model library, its plane tables and the plate/rod signatures once per worker."""
    if STEP.name not in steps:
        return
    lib = gr.prepare_fit(None)  # the library classify_grain fits with (the fit step's defaults)
    family_signatures(lib.signatures.shape[1])
