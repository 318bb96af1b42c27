"""Step ``shadow-thickness``: thickness of tabular grains from the shadows of a shadowed replica.

Metal shadowing at a low elevation angle e leaves, behind each grain of height
h, a streak free of metal of length L = h / tan(e) along the shadowing
direction; so h = L tan(e) (plain trigonometry). The step measures L on the
image: along several lines parallel to the shadowing direction through the
middle of the grain, it walks from the grain's far edge outwards and finds
where the profile returns from the shadow level to the background level
(half-way crossing, sub-pixel by linear interpolation); L is the median over
the lines. The shadow may print dark (the usual positive print of a replica)
or bright (``shadow_contrast``).

Writes ``thickness_nm`` and ``tabular_aspect_ratio`` (ECD / thickness) for the
tabular grains, NaN for the others and where no shadow is seen (then
``shadow_note`` says why).

References
----------
.. [1] R. C. Williams, R. W. G. Wyckoff, "Applications of metallic shadow-
   casting to microscopy", J. Appl. Phys. 17, 23-33, 1946,
   doi:10.1063/1.1707631 (height from shadow length and angle).
"""
from __future__ import annotations

import math

import numpy as np
from scipy import ndimage as ndi

from grainhabit import hookimpl
from grainhabit.params import Column, Param, StepInfo
from grainhabit.plugins.thickness.known_thickness import aspect_ratio, tabular_mask

GRAINHABIT_API = 1

STEP = StepInfo(
    name="shadow-thickness",
    stage="thickness",
    version="1.0",
    summary="Thickness of tabular grains = shadow length x tan(shadowing angle), shadow measured on the image.",
    params=(
        Param("shadow_angle_deg", float, None, unit="deg", low=0.5, high=89.5,
              doc="Elevation of the shadowing source above the substrate plane."),
        Param("shadow_direction_deg", float, None, unit="deg", low=-360.0, high=360.0,
              doc="Direction in which shadows extend from the grains, counter-clockwise on screen from +x (right)."),
        Param("shadow_contrast", str, "dark", choices=("dark", "bright"),
              doc="Whether shadows print darker or brighter than the background."),
        Param("n_lines", int, 7, low=1, high=101, doc="Profiles sampled across the grain's width."),
        Param("max_shadow_nm", float, None, unit="nm", low=0.0,
              doc="Longest shadow searched for (default: three grain ECDs)."),
        Param("min_contrast_sigma", float, 4.0, low=0.0,
              doc="A shadow must be this many background noise sd away from the background level."),
    ),
    outputs=(Column("shadow_length_nm", "nm", "measured shadow length behind the grain"),
             Column("shadow_note", "", "why no shadow length was measured")),
)


def _check_angle(name, v, lo, hi):
    if v is None or not (np.isfinite(v) and lo <= v <= hi):
        raise ValueError(f"{name} must be a number in [{lo}, {hi}], got {v!r}")
    return float(v)


def thickness_from_shadow(length_nm, angle_deg):
    """Height of a step from its shadow: h = L tan(e).

    Parameters
    ----------
    length_nm : array_like
        Shadow length (nm).
    angle_deg : float
        Shadowing elevation above the substrate (deg), in (0, 90).

    Returns
    -------
    ndarray
        Height (nm).
    """
    e = _check_angle("angle_deg", angle_deg, 1e-6, 90 - 1e-6)
    return np.asarray(length_nm, float) * math.tan(math.radians(e))


def shadow_length_px(image, labels, label, direction_deg, contrast="dark", background=None,
                     noise_sd=None, n_lines=7, max_px=None, min_contrast_sigma=4.0):
    """Length (pixels) of the shadow cast by one grain along a direction.

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
        Intensities (any units).
    labels : ndarray of int, shape (rows, cols)
    label : int
        The grain.
    direction_deg : float
        Shadow direction, counter-clockwise on screen from +x.
    contrast : {'dark', 'bright'}
    background, noise_sd : float, optional
        Background level and its noise sd (default: median and 1.4826 MAD of
        the unlabelled pixels).
    n_lines : int
        Profiles across the middle 60 % of the grain's width.
    max_px : float, optional
        Longest shadow searched (default three times the grain's ECD).
    min_contrast_sigma : float

    Returns
    -------
    length : float
        Median shadow length over the profiles (NaN if none is seen).
    note : str
        '' or the reason for NaN.
    """
    img = np.asarray(image, float)
    lab = np.asarray(labels)
    if img.shape != lab.shape or img.ndim != 2:
        raise ValueError(f"image and labels must be 2-D of one shape, got {img.shape} and {lab.shape}")
    if contrast not in ("dark", "bright"):
        raise ValueError(f"contrast must be 'dark' or 'bright', got {contrast!r}")
    rr, cc = np.nonzero(lab == label)
    if rr.size == 0:
        return float("nan"), "label not found"
    bgpix = img[lab == 0]
    if background is None:
        background = float(np.median(bgpix))
    if noise_sd is None:
        noise_sd = float(1.4826 * np.median(np.abs(bgpix - np.median(bgpix))))
    sign = -1.0 if contrast == "dark" else 1.0
    ecd = math.sqrt(4 * rr.size / math.pi)
    max_px = 3 * ecd if max_px is None else float(max_px)
    t = math.radians(direction_deg)
    u = np.array([math.cos(t), -math.sin(t)])          # (x, y down) pixel axes
    v = np.array([-u[1], u[0]])
    x, y = cc + 0.5, rr + 0.5
    cx, cy = x.mean(), y.mean()
    pv = (x - cx) * v[0] + (y - cy) * v[1]
    pu = (x - cx) * u[0] + (y - cy) * u[1]
    lo, hi = np.percentile(pv, [20, 80])
    offsets = np.linspace(lo, hi, n_lines) if n_lines > 1 else np.array([0.5 * (lo + hi)])
    step = 0.25
    s = np.arange(pu.min() - 2, pu.max() + max_px + 2, step)
    lengths, notes = [], []
    for o in offsets:
        px = cx + o * v[0] + s * u[0]
        py = cy + o * v[1] + s * u[1]
        coords = np.vstack([py - 0.5, px - 0.5])        # (row, col) of pixel centres
        labs = ndi.map_coordinates(lab, coords, order=0, mode="constant", cval=-1)
        own = np.flatnonzero(labs == label)
        if own.size == 0:
            continue
        k0 = own[-1] + 1
        prof = sign * (ndi.map_coordinates(img, coords, order=1, mode="nearest") - background)
        after = prof[k0:]
        other = np.flatnonzero((labs[k0:] != 0) & (labs[k0:] != label))
        # shadow level: the strongest deviation just behind the edge (first 3 px)
        head = after[: int(3 / step) + 1]
        if head.size == 0:
            continue
        level = float(np.median(np.sort(head)[-max(1, head.size // 2):]))
        if level < min_contrast_sigma * noise_sd:
            notes.append("no shadow seen")
            continue
        half = 0.5 * level
        # enter the shadow first (right at the edge the profile mixes grain and shadow)
        inside = np.flatnonzero(after >= half)
        if inside.size == 0:
            notes.append("no shadow seen")
            continue
        j0 = inside[0]
        below = j0 + np.flatnonzero(after[j0:] < half)
        if below.size == 0 or (other.size and other[0] < below[0]):
            notes.append("shadow runs into another grain or out of range")
            continue
        j = below[0]
        # linear interpolation of the half-way crossing between samples j-1 and j;
        # the grain edge lies half a step before sample 0
        f = (after[j - 1] - half) / (after[j - 1] - after[j])
        lengths.append((j - 1 + f) * step + 0.5 * step)
    if not lengths:
        return float("nan"), notes[0] if notes else "no profile crosses the grain"
    return float(np.median(lengths)), ""


@hookimpl
def grainhabit_thickness(frame, params):
    """Write ``thickness_nm``, ``tabular_aspect_ratio``, ``shadow_length_nm``; see the module docstring."""
    p = STEP.resolve(params)
    angle = _check_angle("shadow_angle_deg", p["shadow_angle_deg"], 0.5, 89.5)
    if p["shadow_direction_deg"] is None:
        raise ValueError("shadow-thickness needs shadow_direction_deg")
    if frame.labels is None:
        raise ValueError("shadow-thickness needs frame.labels: run a segment step first")
    img = frame.raw if frame.raw is not None and np.shape(frame.raw) == np.shape(frame.labels) else frame.image
    n = frame.n_grains
    tab = tabular_mask(frame)
    length = np.full(n, np.nan)
    note = np.full(n, "", dtype=object)
    px = float(frame.pixel_size_nm)
    bgpix = np.asarray(img, float)[frame.labels == 0]
    bg = float(np.median(bgpix)) if bgpix.size else 0.0
    sd = float(1.4826 * np.median(np.abs(bgpix - bg))) if bgpix.size else 0.0
    max_px = None if p["max_shadow_nm"] is None else p["max_shadow_nm"] / px
    for i in range(n):
        if not tab[i]:
            note[i] = "not tabular"
            continue
        L, why = shadow_length_px(img, frame.labels, int(frame.grains["label"][i]),
                                  p["shadow_direction_deg"], p["shadow_contrast"], bg, sd,
                                  p["n_lines"], max_px, p["min_contrast_sigma"])
        length[i] = L * px
        note[i] = why
    t = thickness_from_shadow(length, angle)
    return frame.with_columns(thickness_nm=t, shadow_length_nm=length, shadow_note=note,
                              tabular_aspect_ratio=aspect_ratio(frame.grains["ecd_nm"], t,
                                                                frame.grains["habit"]))
