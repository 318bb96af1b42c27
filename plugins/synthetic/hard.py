"""The hard synthetic survey: frames drawn under the conditions that trouble grain finders, with exact truth.

Three kinds of frame (invented test data, not measurements of any sample):

``'bright'`` and ``'dark'``
    Fields of :mod:`grainhabit.plugins.synthetic.render` (every habit; secondary-electron look, or
    bright-field transmission look with mass-thickness contrast ``exp(-mu t)``) with all of:

    - 30 % of the grains in touching groups of 2, 3 or 4 (:data:`GROUP_FRACTION`, :data:`GROUP_SIZES`);
    - 5 % of the grains lying partly over another (:data:`OVERLAP_FRACTION` of the grains in such
      pairs, the smaller one in front);
    - faint thin plates (:data:`FAINT_FRACTION` of the grains; tabular, 1.3-2.5 times the median
      ECD, ECD/thickness 25-50, showing 15-50 % of a normal grain's contrast);
    - half the signal-to-noise ratio (:data:`NOISE_FACTOR` times the noise amplitude);
    - one frame in four defocused (:data:`DEFOCUS_EVERY`, blur :data:`DEFOCUS_FACTOR` times larger);
    - charging streaks and debris specks under 3 px on the background
      (:func:`~grainhabit.plugins.synthetic.render.add_artefacts`);
    - a scale bar, its length and a panel letter burnt in
      (:func:`~grainhabit.plugins.synthetic.annotate.burn_in`).

``'photo'``
    A photograph-like frame (:func:`photo_field`): 24 well-separated round objects of low contrast
    (4-10 % of the local level) under uneven illumination (vignetting, a ramp and broad patches,
    together far larger than the objects' contrast), blur, noise, 8-bit levels, and the same
    annotations.

Each frame comes with its truth (:class:`HardField`): grain labels and habits, touching groups,
overlapping pairs, faint plates, debris specks, streaks and annotation marks, all from the
renderer's own geometry. Everything is seeded; the same arguments give the same frame.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field, replace

import numpy as np
from scipy import ndimage

from grainhabit.plugins.synthetic import annotate
from grainhabit.plugins.synthetic import render as rd

__all__ = ["GROUP_FRACTION", "GROUP_SIZES", "OVERLAP_FRACTION", "FAINT_FRACTION", "NOISE_FACTOR",
           "DEFOCUS_EVERY", "DEFOCUS_FACTOR", "KINDS", "HardField", "faint_plates", "hard_field",
           "photo_field"]

#: Fraction of the grains placed in touching groups.
GROUP_FRACTION = 0.30
#: Sizes of the touching groups (drawn with equal odds).
GROUP_SIZES = (2, 3, 4)
#: Fraction of the grains in partly overlapping pairs (half of them, 5 %, lie over another).
OVERLAP_FRACTION = 0.10
#: Fraction of the grains that are faint thin plates.
FAINT_FRACTION = 0.06
#: Noise amplitude relative to the plain benchmark (2: half the signal-to-noise ratio).
NOISE_FACTOR = 2.0
#: Every this-many-th frame (index % DEFOCUS_EVERY == DEFOCUS_EVERY - 1) is defocused.
DEFOCUS_EVERY = 4
#: Blur of a defocused frame relative to a focused one.
DEFOCUS_FACTOR = 2.5
#: The kinds of frame.
KINDS = ("bright", "dark", "photo")


@dataclass
class HardField:
    """A frame of the hard survey and its truth.

    Attributes
    ----------
    field : SyntheticField
        Image (everything drawn and burnt in), grain labels (1..n in the order of
        ``field.grains``), debris specks and streaks.
    kind : str
        One of :data:`KINDS`.
    groups : list of tuple of int
        Labels of each touching group (2-4 grains) as placed.
    overlaps : list of tuple of int
        ``(back, front)`` labels of the partly overlapping pairs.
    faint : list of int
        Labels of the faint thin plates.
    annotations : Annotations
        The burnt-in marks (:mod:`grainhabit.plugins.synthetic.annotate`).
    defocused : bool
        Whether the frame is one of the defocused ones.
    """

    field: rd.SyntheticField
    kind: str
    groups: list = field(default_factory=list)
    overlaps: list = field(default_factory=list)
    faint: list = field(default_factory=list)
    annotations: annotate.Annotations | None = None
    defocused: bool = False


def faint_plates(k: int, ecd_median_nm: float, rng: np.random.Generator) -> list:
    """Faint thin tabular plates (position not yet set).

    Parameters
    ----------
    k : int
        How many.
    ecd_median_nm : float
        Median ECD of the field's other grains (nm).
    rng : numpy.random.Generator

    Returns
    -------
    list of GrainSpec
        Hexagonal plates (two in three; edge ratio 0.4-1) and triangular ones
        (edge ratio 0-0.08), ECD 1.3-2.5 times ``ecd_median_nm``, ECD/thickness
        25-50, ``contrast_scale`` 0.15-0.5 (choices of this generator).
    """
    out = []
    for _ in range(int(k)):
        hexagon = rng.random() < 2 / 3
        out.append(rd.GrainSpec(
            habit="tabular_hexagon" if hexagon else "tabular_triangle",
            ecd_nm=float(ecd_median_nm * rng.uniform(1.3, 2.5)), x_nm=0.0, y_nm=0.0,
            rotation_deg=float(rng.uniform(0, 360)),
            edge_ratio=float(rng.uniform(0.4, 1.0) if hexagon else rng.uniform(0.0, 0.08)),
            aspect=float(rng.uniform(25.0, 50.0)), contrast_scale=float(rng.uniform(0.15, 0.5))))
    return out


def _drop_covered_debris(f: rd.SyntheticField, marks: np.ndarray) -> rd.SyntheticField:
    """Leave out specks that a burnt-in mark covers (they are no longer seen)."""
    if not len(f.debris_rc):
        return f
    near = ndimage.binary_dilation(marks > 0, np.ones((7, 7), bool))
    keep = ~near[f.debris_rc[:, 0], f.debris_rc[:, 1]]
    return replace(f, debris_rc=f.debris_rc[keep])


def hard_field(kind: str, index: int, *, size: int = 768, pixel_size_nm: float = 5.0, n_grains: int = 50,
               ecd_nm: float = 300.0, ecd_gsd: float = 1.2, noise: float = 0.02, gradient: float = 0.3,
               blur_px: float = 1.0, seed: int = 0) -> HardField:
    """One frame of the hard survey.

    Parameters
    ----------
    kind : {'bright', 'dark', 'photo'}
        Contrast (``'photo'``: :func:`photo_field` with objects of median ECD ``45 size / 768`` px;
        the grain arguments are not used).
    index : int
        Frame number within the survey (>= 0): sets the seed, the defocused frames and the panel letter.
    size : int
        Frame side (pixels).
    pixel_size_nm, n_grains, ecd_nm, ecd_gsd : float
        Grain field: pixel size (nm), number of grains including the faint plates, median ECD (nm),
        geometric standard deviation of the ECD.
    noise, gradient, blur_px : float
        The plain benchmark's noise amplitude (multiplied here by :data:`NOISE_FACTOR`),
        illumination ramp and blur (pixels; :data:`DEFOCUS_FACTOR` times more on defocused frames).
    seed : int

    Returns
    -------
    HardField
    """
    if kind not in KINDS:
        raise ValueError(f"kind must be one of {KINDS}, got {kind!r}")
    index = int(index)
    if index < 0:
        raise ValueError(f"index must be >= 0, got {index!r}")
    if kind == "photo":
        return photo_field(index, size=size, ecd_px=45.0 * size / 768, seed=seed)
    fseed = int(seed) + index
    rng = np.random.default_rng((fseed, 0x4A2D))
    plates = faint_plates(max(1, int(round(FAINT_FRACTION * n_grains))), ecd_nm, rng)
    n_random = int(n_grains) - len(plates)
    if n_random < 0:
        raise ValueError(f"n_grains must be >= {len(plates)}, got {n_grains!r}")
    habits = {h: 1.0 for h in rd.HABITS}
    place = rd.place_grains(n_random, (size, size), pixel_size_nm, habits, ecd_nm, ecd_gsd=ecd_gsd,
                            touching_fraction=GROUP_FRACTION, seed=fseed, group_sizes=GROUP_SIZES,
                            overlap_fraction=OVERLAP_FRACTION, extra_grains=plates)
    defocused = index % DEFOCUS_EVERY == DEFOCUS_EVERY - 1
    f = rd.render_field(place.grains, (size, size), pixel_size_nm, kind, gradient=gradient,
                        blur_px=blur_px * (DEFOCUS_FACTOR if defocused else 1.0),
                        noise=noise * NOISE_FACTOR, seed=fseed)
    f = rd.add_artefacts(f, seed=fseed, avoid_grains=True)
    img, marks = annotate.burn_in(f.image, f.labels, pixel_size_nm, seed=fseed, panel="abcd"[index % 4])
    f = _drop_covered_debris(replace(f, image=img), marks.labels)
    faint = [i + 1 for i, g in enumerate(place.grains) if g.contrast_scale < 1.0]
    return HardField(field=f, kind=kind, groups=place.groups, overlaps=place.overlaps, faint=faint,
                     annotations=marks, defocused=defocused)


def _illumination(rows: int, cols: int, rng: np.random.Generator) -> np.ndarray:
    """Uneven illumination: vignetting, a ramp and three broad patches (relative, about 1)."""
    y, x = np.mgrid[0:rows, 0:cols].astype(float)
    y = 2 * y / max(rows - 1, 1) - 1
    x = 2 * x / max(cols - 1, 1) - 1
    x0, y0 = rng.uniform(-0.4, 0.4, 2)                    # off-centre optical axis
    light = 1.0 - rng.uniform(0.35, 0.5) * ((x - x0) ** 2 + (y - y0) ** 2) / 2
    ang = rng.uniform(0, 2 * np.pi)
    light *= 1.0 + rng.uniform(0.2, 0.35) * (math.cos(ang) * x + math.sin(ang) * y) / 2
    for _ in range(3):
        cx, cy = rng.uniform(-1, 1, 2)
        s = rng.uniform(0.25, 0.45)
        light *= 1.0 + rng.choice([-1, 1]) * rng.uniform(0.04, 0.08) * np.exp(
            -((x - cx) ** 2 + (y - cy) ** 2) / (2 * s * s))
    return light


def photo_field(index: int, *, size: int = 768, n_objects: int = 24, ecd_px: float = 45.0,
                pixel_size_nm: float = 100.0, seed: int = 0) -> HardField:
    """A low-contrast photograph-like frame of well-separated round objects under uneven light.

    Parameters
    ----------
    index : int
        Frame number (seed and panel letter).
    size : int
        Frame side (pixels).
    n_objects : int
        Round objects (slightly elliptical discs).
    ecd_px : float
        Median ECD of the objects (pixels); geometric standard deviation 1.15.
    pixel_size_nm : float
        Pixel size (nm); the default (100 nm) is a light-microscope scale, far from the grain frames'.
    seed : int

    Returns
    -------
    HardField
        Truth habit ``'irregular'`` for every object (round: no facets).

    Notes
    -----
    An object is an ellipse of axis ratio 0.85-1 and area ``pi ECD^2 / 4``
    (ellipse area ``pi a b``, handbook geometry); two objects' centres are
    at least 0.75 times the sum of their ECDs apart (a clear gap of half the
    mean ECD at least), and an object's centre keeps 10 px plus half its ECD
    from the border (an object that finds no such place in 2000 tries is left
    out). It changes the local level by ``s c (0.7 + 0.3 sqrt(1 - rho^2))``
    (a dome-like shading; ``rho`` the elliptical radius, ``c`` 4-10 %, ``s``
    darker or lighter, once per frame). Then blur 1.2 px, Gaussian noise of
    sd 0.012 and 8-bit levels.
    """
    fseed = int(seed) + int(index)
    rng = np.random.default_rng((fseed, 0x9F07))
    rows = cols = int(size)
    ecd = ecd_px * np.exp(rng.normal(0.0, math.log(1.15), size=int(n_objects)))
    centres: list[tuple[float, float]] = []
    kept = []
    for d in sorted(ecd, reverse=True):
        lo, hi = 10 + d / 2, size - 10 - d / 2
        for _ in range(2000):
            c = rng.uniform(lo, hi, 2)
            if all(math.hypot(c[0] - p[0], c[1] - p[1]) >= 0.75 * (d + e)
                   for p, e in zip(centres, kept)):
                centres.append((float(c[0]), float(c[1])))
                kept.append(float(d))
                break
    light = _illumination(rows, cols, rng)
    sign = -1.0 if rng.random() < 0.5 else 1.0
    c_amp = rng.uniform(0.04, 0.10)
    change = np.zeros((rows, cols))
    labels = np.zeros((rows, cols), np.int32)
    grains = []
    ss = 4
    sub = (np.arange(ss) + 0.5) / ss - 0.5
    for k, ((cx, cy), d) in enumerate(zip(centres, kept), start=1):
        q = rng.uniform(0.85, 1.0)
        a, b = d / 2 / math.sqrt(q), d / 2 * math.sqrt(q)          # pi a b = pi d^2 / 4
        th = rng.uniform(0, np.pi)
        r0, r1 = max(int(cy - a) - 2, 0), min(int(cy + a) + 3, rows)
        c0, c1 = max(int(cx - a) - 2, 0), min(int(cx + a) + 3, cols)
        yy, xx = np.mgrid[r0:r1, c0:c1].astype(float)

        def rho2(py, px_):
            u = (px_ - cx) * math.cos(th) + (py - cy) * math.sin(th)
            v = -(px_ - cx) * math.sin(th) + (py - cy) * math.cos(th)
            return (u / a) ** 2 + (v / b) ** 2

        # pixel (r, c) covers [c, c + 1) x [r, r + 1); its centre is (c + 0.5, r + 0.5)
        inside_c = rho2(yy + 0.5, xx + 0.5) < 1.0
        labels[r0:r1, c0:c1][inside_c] = k
        acc = np.zeros(yy.shape)
        for dy in sub:
            for dx in sub:
                r2 = rho2(yy + 0.5 + dy, xx + 0.5 + dx)
                acc += np.where(r2 < 1.0, 0.7 + 0.3 * np.sqrt(np.clip(1.0 - r2, 0.0, None)), 0.0)
        change[r0:r1, c0:c1] += sign * c_amp * rng.uniform(0.85, 1.15) * acc / ss ** 2
        grains.append(rd.GrainSpec(habit="irregular", ecd_nm=float(d * pixel_size_nm),
                                   x_nm=float(cx * pixel_size_nm), y_nm=float(cy * pixel_size_nm),
                                   rotation_deg=float(np.rad2deg(th))))
    img = 0.6 * light * (1.0 + change)
    img = ndimage.gaussian_filter(img, 1.2, mode="nearest")
    img = img + rng.normal(0.0, 0.012, img.shape)
    img = np.round(np.clip(img, 0.0, 1.0) * 255.0) / 255.0
    f = rd.SyntheticField(image=img.astype(np.float32), labels=labels, grains=grains,
                          pixel_size_nm=float(pixel_size_nm), contrast="photo", touching_pairs=[])
    img, marks = annotate.burn_in(f.image, f.labels, pixel_size_nm, seed=fseed, panel="abcd"[int(index) % 4])
    return HardField(field=replace(f, image=img), kind="photo", annotations=marks)
