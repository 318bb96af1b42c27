"""Synthetic micrographs of crystal grains with exact ground truth.

Grains are 3-D bodies from :mod:`grainhabit.plugins.habit.crystal` (Wulff polyhedra, twinned
plates, rods) or rounded lumpy blobs, resting on the substrate, seen from
above. Two kinds of contrast are drawn:

``'bright'``
    secondary-electron (SEM) look: grains bright on a dark substrate, each
    facet's brightness set by its tilt (secant law) and a directional detector
    term, bright lines along facet edges and outline rims.
``'dark'``
    bright-field transmission (TEM) look: transmitted intensity
    ``exp(-mu * thickness)`` on a bright background, so thick grains are dark
    and thin plates pale.

Then a smooth illumination gradient, a Gaussian blur and Poisson + Gaussian
noise. Everything is seeded with :class:`numpy.random.Generator`; the same
inputs give the same field. The images are invented test data, not
measurements of any real sample.

Coordinates follow the project convention: x along columns (right), y along
rows (down), in nm, origin at the top-left corner of the top-left pixel; a
pixel's centre is at ``((col + 0.5) px, (row + 0.5) px)``. Inside a grain the
lab frame of :mod:`grainhabit.plugins.habit.crystal` is used with lab y pointing up the image
(``y_lab = y_centre - y``), so what is drawn is what a viewer above sees, and
``rotation_deg`` turns a grain counter-clockwise on screen.

References
----------
(Cited from memory.)

.. [1] L. Reimer, "Scanning Electron Microscopy", 2nd ed., Springer, 1998,
   doi:10.1007/978-3-540-38967-5 (secondary-electron yield ~ 1/cos(tilt);
   edge effect).
.. [2] D. B. Williams and C. B. Carter, "Transmission Electron Microscopy",
   2nd ed., Springer, 2009, doi:10.1007/978-0-387-76501-3 (mass-thickness
   contrast, exp(-mu t)).
.. [3] ISO 9276-6:2008, "Representation of results of particle size
   analysis - Part 6: Descriptive and quantitative representation of particle
   shape and morphology" (equivalent circle diameter).
"""
from __future__ import annotations

import functools
import math
from dataclasses import dataclass, field, replace

import numpy as np
from scipy import ndimage
from scipy.spatial import ConvexHull

from grainhabit.plugins.habit import crystal as cr
from grainhabit.plugins.habit.vocabulary import HABITS
from grainhabit.plugins.habit.vocabulary import POLYHEDRAL_HABITS as _POLYHEDRAL
from grainhabit.plugins.habit.vocabulary import TYPICAL_ALPHA as _DEFAULT_ALPHA

__all__ = [
    "HABITS",
    "GrainSpec",
    "SyntheticField",
    "render_field",
    "random_grains",
    "make_field",
    "to_uint16",
    "grain_outline",
    "touching_label_pairs",
    "Placement",
    "place_grains",
    "bench_render",
    "add_artefacts",
]


# brightness model (nominal [0, 1] units)
_BG_BRIGHT = 0.12        # dark substrate in secondary-electron contrast
_BG_DARK = 0.88          # bright background in bright-field transmission
_SE_BASE = 0.42          # a facet facing the beam
_SE_EXPONENT = 0.6       # softened secant law  sec(tilt)^p
_SE_DIRECTIONAL = 0.12   # detector on the upper left of the screen
_SE_DETECTOR = np.array([-1.0, 1.0]) / math.sqrt(2.0)   # lab (x, y), y up
_SE_FACET_EDGE = 0.18
_SE_RIM = 0.22
_EDGE_WIDTH_PX = 0.7


@dataclass
class GrainSpec:
    """One grain of a synthetic field.

    Attributes
    ----------
    habit : str
        One of :data:`HABITS`.
    ecd_nm : float
        Equivalent circle diameter of the visible outline when isolated (nm).
    x_nm, y_nm : float
        Centre in frame coordinates (x right along columns, y down along rows).
    rotation_deg : float
        In-plane rotation, counter-clockwise on screen.
    alpha : float
        Growth parameter for polyhedral habits (NaN: 1, 2, 3 for cube,
        cuboctahedron, octahedron). Must agree with the habit: cube <= 1.5,
        cuboctahedron in (1.5, 3), octahedron >= 3.
    face : str
        Resting face of polyhedral habits: '100', '111' (or '110').
    edge_ratio : float
        Tabular plates: short/long edge of the outline (tabular_triangle < 0.1).
    aspect : float
        Rod: length/width; tabular: ECD/thickness.
    z_order : int
        Larger is in front where grains overlap.
    shape_seed : int
        Seed of the random outline of an ``'irregular'`` grain.
    contrast_scale : float
        In (0, 1]: the fraction of its full contrast that the grain shows
        (1 for a normal grain; below 1 for a faint, electron-transparent thin
        plate). ``'bright'``: the grain is laid over the background with this
        opacity; ``'dark'``: its loss of transmitted intensity is scaled by it.
    """

    habit: str
    ecd_nm: float
    x_nm: float
    y_nm: float
    rotation_deg: float = 0.0
    alpha: float = float("nan")
    face: str = "100"
    edge_ratio: float = 1.0
    aspect: float = 5.0
    z_order: int = 0
    shape_seed: int = 0
    contrast_scale: float = 1.0


@dataclass
class SyntheticField:
    """A rendered field and its ground truth.

    Attributes
    ----------
    image : ndarray of float32, shape (rows, cols)
        Nominal range [0, 1].
    labels : ndarray of int32, shape (rows, cols)
        Visible outline of each grain (the front grain occludes), 1..n in the
        order of ``grains``; 0 is background. A pixel belongs to the grain
        that is seen at its centre.
    grains : list of GrainSpec
    pixel_size_nm : float
    contrast : str
        'bright' or 'dark'.
    touching_pairs : list of tuple of int
        Sorted 1-based label pairs that share a boundary in ``labels``.
    debris_rc : ndarray of int, shape (k, 2)
        (row, col) centres of the debris specks added by
        :func:`add_artefacts` (empty otherwise).
    streaks : ndarray of int, shape (k, 3)
        (first row, rows, start column) of each charging streak added by
        :func:`add_artefacts` (empty otherwise).
    """

    image: np.ndarray
    labels: np.ndarray
    grains: list
    pixel_size_nm: float
    contrast: str
    touching_pairs: list = field(default_factory=list)
    debris_rc: np.ndarray = field(default_factory=lambda: np.zeros((0, 2), dtype=int))
    streaks: np.ndarray = field(default_factory=lambda: np.zeros((0, 3), dtype=int))


# ------------------------------------------------------------------ validation

def _check_spec(g: GrainSpec) -> None:
    if g.habit not in HABITS:
        raise ValueError(f"habit must be one of {HABITS}, got {g.habit!r}")
    if not (np.isfinite(g.ecd_nm) and g.ecd_nm > 0):
        raise ValueError(f"ecd_nm must be finite and > 0, got {g.ecd_nm!r}")
    if not (np.isfinite(g.x_nm) and np.isfinite(g.y_nm) and np.isfinite(g.rotation_deg)):
        raise ValueError(f"x_nm, y_nm and rotation_deg must be finite, got {g!r}")
    if g.habit in _POLYHEDRAL:
        a = _alpha_of(g)
        ok = {"cube": a <= 1.5, "cuboctahedron": 1.5 < a < 3.0, "octahedron": a >= 3.0}[g.habit]
        if not (a > 0 and ok):
            raise ValueError(f"alpha={g.alpha!r} does not fit habit {g.habit!r} "
                             "(cube <= 1.5 < cuboctahedron < 3 <= octahedron)")
        if g.face not in ("100", "111", "110"):
            raise ValueError(f"face must be '100', '111' or '110', got {g.face!r}")
    if not (np.isfinite(g.contrast_scale) and 0.0 < g.contrast_scale <= 1.0):
        raise ValueError(f"contrast_scale must be in (0, 1], got {g.contrast_scale!r}")
    if g.habit.startswith("tabular"):
        if not (0.0 <= g.edge_ratio <= 1.0):
            raise ValueError(f"edge_ratio must be in [0, 1], got {g.edge_ratio!r}")
        if g.habit == "tabular_triangle" and g.edge_ratio >= 0.1:
            raise ValueError(f"tabular_triangle needs edge_ratio < 0.1, got {g.edge_ratio!r}")
        if not (np.isfinite(g.aspect) and g.aspect > 0):
            raise ValueError(f"aspect (ECD/thickness) must be > 0, got {g.aspect!r}")
    if g.habit == "rod" and not (np.isfinite(g.aspect) and g.aspect >= 1):
        raise ValueError(f"rod aspect (length/width) must be >= 1, got {g.aspect!r}")


def _alpha_of(g: GrainSpec) -> float:
    return _DEFAULT_ALPHA[g.habit] if not np.isfinite(g.alpha) else float(g.alpha)


def _check_shape(shape) -> tuple[int, int]:
    try:
        rows, cols = (int(v) for v in shape)
    except (TypeError, ValueError):
        raise ValueError(f"shape must be (rows, cols), got {shape!r}") from None
    if rows < 1 or cols < 1:
        raise ValueError(f"shape must be positive, got {shape!r}")
    return rows, cols


def _check_px(pixel_size_nm: float) -> float:
    if not (np.isfinite(pixel_size_nm) and pixel_size_nm > 0):
        raise ValueError(f"pixel_size_nm must be finite and > 0, got {pixel_size_nm!r}")
    return float(pixel_size_nm)


# ----------------------------------------------------------------------- bodies

class _PolyBody:
    """A convex polyhedron in the lab frame, scaled to its ECD (nm).

    Planes are kept as affine maps of ``P = [x, y, 1]`` so that one matrix
    product evaluates all of them at many points.
    """

    def __init__(self, poly: cr.Polyhedron, rotation: np.ndarray, ecd_nm: float):
        area = cr.projected_area(poly, rotation)
        k = math.sqrt(math.pi / 4 * ecd_nm ** 2 / area)
        nl = poly.face_normals @ rotation.T
        d = poly.face_offsets * k
        self.outline = cr.project(poly, rotation) * k          # (k, 2) lab, CCW
        e = np.roll(self.outline, -1, axis=0) - self.outline
        m = np.column_stack([e[:, 1], -e[:, 0]])               # outward for CCW
        m /= np.linalg.norm(m, axis=1, keepdims=True)
        # rim distance  h_i - m_i . p  (positive inside the convex outline)
        self._rim = np.vstack([-m[:, 0], -m[:, 1], np.sum(m * self.outline, axis=1)])
        up = nl[:, 2] > 1e-9
        dn = nl[:, 2] < -1e-9
        # z of each plane at (x, y): (d - n_x x - n_y y) / n_z
        planes = np.vstack([-nl[:, 0], -nl[:, 1], d])
        self._zup = planes[:, up] / nl[up, 2]
        self._zdn = planes[:, dn] / nl[dn, 2]
        self.up_normals = nl[up]
        grad = self._zup[:2].T                                 # (m_up, 2) dz/dx, dz/dy
        gdiff = np.linalg.norm(grad[:, None, :] - grad[None, :, :], axis=-1)
        with np.errstate(divide="ignore"):
            self._inv_gdiff = np.where(gdiff > 1e-9, 1.0 / gdiff, 0.0)

    rim_exact = True

    def rim(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        """Signed distance proxy to the outline (> 0 inside; exact inside, and
        its magnitude never exceeds the true distance outside)."""
        # planes along the first axis: reductions over axis 0 run element-wise
        P = np.vstack([x, y, np.ones_like(x)])
        return (self._rim.T @ P).min(axis=0)

    def detail(self, x: np.ndarray, y: np.ndarray):
        """Thickness, top normal and facet-edge distance at inside points (N,)."""
        P = np.vstack([x, y, np.ones_like(x)])
        zup = self._zup.T @ P                                  # (m_up, N)
        k = np.argmin(zup, axis=0)
        z_top = zup.min(axis=0)
        z_bot = (self._zdn.T @ P).max(axis=0) if self._zdn.shape[1] else np.zeros_like(x)
        thick = np.maximum(z_top - z_bot, 0.0)
        # distance (in x, y) to the nearest facet edge: for the top face k and
        # another upward face j the edge line is z_j = z_k; its distance is
        # (z_j - z_k) / |grad z_j - grad z_k|, and the minimum over j is exact
        # for a convex facet
        if zup.shape[0] > 1:
            inv = self._inv_gdiff[:, k]                        # (m_up, N), 0 for j == k
            facet = np.where(inv > 0, (zup - z_top) * inv, np.inf).min(axis=0)
        else:
            facet = np.full(x.shape, np.inf)
        return thick, self.up_normals[k], facet


class _BlobBody:
    """Rounded lumpy grain: smoothed random radial outline, lens-shaped profile."""

    _K = np.arange(2, 6)

    def __init__(self, ecd_nm: float, rotation_deg: float, seed: int):
        rng = np.random.default_rng((int(seed), 0x1A5B))
        self.amp = rng.uniform(0.02, 0.10, self._K.size) * (2.0 / self._K)
        self.amp[0] = rng.uniform(0.05, 0.18)     # some elongation
        self.phase = rng.uniform(0, 2 * np.pi, self._K.size) - np.deg2rad(rotation_deg) * self._K
        # area of the polar curve r = R0 (1 + sum a_k cos(k t + p_k)) is
        # pi R0^2 (1 + sum a_k^2 / 2); choose R0 for the wanted ECD
        self.r0 = 0.5 * ecd_nm / math.sqrt(1.0 + 0.5 * float(np.sum(self.amp ** 2)))
        self.height = 0.3 * ecd_nm          # half of the centre thickness
        t = np.linspace(0, 2 * np.pi, 360, endpoint=False)
        r = self._radius(t)
        self.outline = np.column_stack([r * np.cos(t), r * np.sin(t)])

    def _radius(self, theta):
        # sum of cos(k t + p) through the complex exponential, one power per k
        z = np.exp(1j * np.asarray(theta, float))
        acc = np.zeros(z.shape)
        zk = z * z
        for a, p in zip(self.amp, self.phase):
            acc += a * (zk * np.exp(1j * p)).real
            zk = zk * z
        return self.r0 * (1.0 + acc)

    rim_exact = False

    def rim(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        """Radial distance to the outline (> 0 inside; >= the true distance)."""
        return self._radius(np.arctan2(y, x)) - np.hypot(x, y)

    def detail(self, x: np.ndarray, y: np.ndarray):
        rho = np.hypot(x, y)
        theta = np.arctan2(y, x)
        r = self._radius(theta)
        u = rho / r
        root = np.sqrt(np.clip(1.0 - u * u, 1e-6, None))
        thick = 2.0 * self.height * root
        slope = np.minimum(self.height * u / (r * root), 6.0)   # |dz/d rho|, tilt < 80.5 deg
        normal = np.column_stack([slope * np.cos(theta), slope * np.sin(theta), np.ones_like(slope)])
        normal /= np.linalg.norm(normal, axis=1, keepdims=True)
        return thick, normal, np.full(x.shape, np.inf)


def _make_body(g: GrainSpec):
    return _body_cached(g.habit, float(g.ecd_nm), float(g.rotation_deg), float(_alpha_or_nan(g)),
                        str(g.face), float(g.edge_ratio), float(g.aspect), int(g.shape_seed))


def _alpha_or_nan(g: GrainSpec) -> float:
    return _alpha_of(g) if g.habit in _POLYHEDRAL else float("nan")


@functools.lru_cache(maxsize=2048)
def _body_cached(habit, ecd_nm, rotation_deg, alpha, face, edge_ratio, aspect, shape_seed):
    # bodies are never mutated after construction, so sharing them is safe
    rot_in = cr.in_plane_rotation(rotation_deg)
    if habit in _POLYHEDRAL:
        return _PolyBody(cr.wulff_polyhedron(alpha), rot_in @ cr.resting_rotation(face), ecd_nm)
    if habit.startswith("tabular"):
        return _PolyBody(cr.tabular_prism(edge_ratio, 1.0 / aspect),
                         rot_in @ cr.resting_rotation("111"), ecd_nm)
    if habit == "rod":
        return _PolyBody(cr.rod_prism(aspect), rot_in @ cr.resting_rotation("100"), ecd_nm)
    return _BlobBody(ecd_nm, rotation_deg, shape_seed)


def grain_outline(g: GrainSpec) -> np.ndarray:
    """Outline of an isolated grain in frame coordinates (nm).

    Parameters
    ----------
    g : GrainSpec

    Returns
    -------
    ndarray, shape (k, 2)
        Polygon (x, y) in frame coordinates; counter-clockwise on screen
        (clockwise in the y-down frame). Its area is ``pi/4 * ecd^2`` up to
        the polygon sampling of irregular grains.
    """
    _check_spec(g)
    o = _make_body(g).outline
    return np.column_stack([g.x_nm + o[:, 0], g.y_nm - o[:, 1]])


# -------------------------------------------------------------------- shading

def _se_brightness(normal, facet_dist, rim_dist, width_nm):
    """Secondary-electron brightness of visible surface points."""
    cos_t = np.clip(normal[..., 2], 0.05, 1.0)
    val = _SE_BASE * cos_t ** (-_SE_EXPONENT)
    val += _SE_DIRECTIONAL * (normal[..., 0] * _SE_DETECTOR[0] + normal[..., 1] * _SE_DETECTOR[1])
    val += _SE_FACET_EDGE * np.exp(-(facet_dist / width_nm) ** 2)
    val += _SE_RIM * np.exp(-(np.maximum(rim_dist, 0.0) / width_nm) ** 2)
    return np.minimum(val, 1.0)


def touching_label_pairs(labels: np.ndarray) -> list[tuple[int, int]]:
    """Pairs of different non-zero labels that are 4-neighbours somewhere.

    Parameters
    ----------
    labels : ndarray of int, shape (rows, cols)

    Returns
    -------
    list of tuple of int
        Sorted ``(a, b)`` with ``a < b``.
    """
    lab = np.asarray(labels)
    if lab.ndim != 2:
        raise ValueError(f"labels must be 2-D, got shape {lab.shape}")
    pairs = []
    for a, b in ((lab[:, :-1], lab[:, 1:]), (lab[:-1, :], lab[1:, :])):
        m = (a != b) & (a > 0) & (b > 0)
        if m.any():
            pairs.append(np.sort(np.column_stack([a[m], b[m]]), axis=1))
    if not pairs:
        return []
    u = np.unique(np.concatenate(pairs), axis=0)
    return [(int(p), int(q)) for p, q in u]


# -------------------------------------------------------------------- renderer

def render_field(grains, shape, pixel_size_nm, contrast="bright", *, gradient=0.3, blur_px=1.0,
                 noise=0.02, seed=0, supersample=4, mu_per_nm=1.0 / 150.0,
                 bragg_loss=0.2) -> SyntheticField:
    """Render grains into a micrograph with exact truth labels.

    Parameters
    ----------
    grains : sequence of GrainSpec
        Label i + 1 is ``grains[i]``.
    shape : (int, int)
        (rows, cols) of the image.
    pixel_size_nm : float
        Pixel size (nm).
    contrast : {'bright', 'dark'}
        Secondary-electron look (bright grains) or bright-field transmission
        look (dark grains).
    gradient : float
        Peak-to-peak relative amplitude of a smooth illumination ramp
        (multiplies the image by ``1 + gradient * (ramp - 1/2)``).
    blur_px : float
        Standard deviation of the Gaussian blur (pixels); 0 for none.
    noise : float
        Noise amplitude: Poisson noise with ``1 / noise^2`` counts at
        intensity 1 (relative sd ``noise`` there) plus Gaussian read noise of
        sd ``noise / 2``; 0 for none.
    seed : int
        Seed of the gradient direction and the noise.
    supersample : int
        Sub-samples per pixel along each axis for anti-aliasing (>= 1).
    mu_per_nm : float
        Attenuation coefficient for ``'dark'`` (1/nm), mass-thickness term.
    bragg_loss : float
        For ``'dark'``: fraction of the beam that any crystalline material
        scatters out of the objective aperture regardless of thickness (a
        crude stand-in for diffraction contrast), in [0, 1). It gives grains a
        defined outline even where a wedge-shaped edge is very thin.

    Returns
    -------
    SyntheticField

    Notes
    -----
    Each grain is evaluated only inside its bounding box, and super-sampled
    only in pixels near its rim or a facet edge (elsewhere the pixel-centre
    value is used). ``'bright'``: the
    facet seen from above at a sub-sample has brightness
    ``b0 sec(tilt)^p + c (n_xy . s)`` plus Gaussian ridges along facet edges
    and the rim; grains are composited front over back (``z_order``; on a
    tie the later grain in the list is in front).
    ``'dark'``: sub-sample transmittances ``(1 - b) exp(-mu t)`` are averaged per pixel
    and multiplied in, so overlapping grains attenuate together. Labels are
    the grain seen at each pixel centre, the front one where grains overlap.
    """
    rows, cols = _check_shape(shape)
    px = _check_px(pixel_size_nm)
    if contrast not in ("bright", "dark"):
        raise ValueError(f"contrast must be 'bright' or 'dark', got {contrast!r}")
    ss = int(supersample)
    if ss < 1 or ss != supersample:
        raise ValueError(f"supersample must be an integer >= 1, got {supersample!r}")
    for name, v in (("gradient", gradient), ("blur_px", blur_px), ("noise", noise),
                    ("mu_per_nm", mu_per_nm)):
        if not (np.isfinite(v) and v >= 0):
            raise ValueError(f"{name} must be finite and >= 0, got {v!r}")
    if not (0.0 <= bragg_loss < 1.0):
        raise ValueError(f"bragg_loss must be in [0, 1), got {bragg_loss!r}")
    keep = 1.0 - float(bragg_loss)
    grains = list(grains)
    for g in grains:
        _check_spec(g)

    bright = contrast == "bright"
    img = np.full((rows, cols), _BG_BRIGHT if bright else _BG_DARK, dtype=np.float64)
    labels = np.zeros((rows, cols), dtype=np.int32)
    width_nm = _EDGE_WIDTH_PX * px
    sub = ((np.arange(ss) + 0.5) / ss - 0.5) * px
    off_x = np.tile(sub, ss)           # sub-sample offsets from a pixel centre (lab)
    off_y = -np.repeat(sub, ss)
    # pixels whose centre lies within `reach` of an edge are super-sampled:
    # half a pixel diagonal, plus the ridge width for 'bright'
    reach = (math.sqrt(0.5) + (2.5 * _EDGE_WIDTH_PX if bright else 0.05)) * px

    order = sorted(range(len(grains)), key=lambda i: (grains[i].z_order, i))
    for i in order:
        g = grains[i]
        body = _make_body(g)
        fx = g.x_nm + body.outline[:, 0]
        fy = g.y_nm - body.outline[:, 1]
        c0 = max(int(np.floor(fx.min() / px)) - 2, 0)
        c1 = min(int(np.ceil(fx.max() / px)) + 2, cols)
        r0 = max(int(np.floor(fy.min() / px)) - 2, 0)
        r1 = min(int(np.ceil(fy.max() / px)) + 2, rows)
        if c1 <= c0 or r1 <= r0:
            continue
        h, w = r1 - r0, c1 - c0
        # pixel centres first: labels, and the pixels far from any edge, whose
        # value is the centre value (exact for 'dark', where thickness is
        # linear on a facet); only pixels near the rim or a facet edge are
        # super-sampled
        xc = (c0 + np.arange(w) + 0.5) * px - g.x_nm
        yc = g.y_nm - (r0 + np.arange(h) + 0.5) * px
        Xc, Yc = np.tile(xc, h), np.repeat(yc, w)
        rim_c = body.rim(Xc, Yc)
        in_c = rim_c > 0
        labels[r0:r1, c0:c1][in_c.reshape(h, w)] = i + 1
        cov = in_c.astype(float)
        val = np.zeros(h * w)
        ic = np.flatnonzero(in_c)
        thick, normal, facet = body.detail(Xc[ic], Yc[ic])
        rim_thr = reach if body.rim_exact else 1.5 * reach
        near = np.abs(rim_c) < rim_thr
        near[ic[facet < reach]] = True
        if bright:
            val[ic] = _se_brightness(normal, facet, rim_c[ic], width_nm)
        else:
            val[ic] = keep * np.exp(-mu_per_nm * thick) - 1.0  # transmittance - 1
        if ss > 1 and near.any():
            jn = np.flatnonzero(near)
            Xs = (Xc[jn, None] + off_x[None, :]).ravel()
            Ys = (Yc[jn, None] + off_y[None, :]).ravel()
            rim_s = body.rim(Xs, Ys)
            ins = np.flatnonzero(rim_s > 0)
            ts, ns, fs = body.detail(Xs[ins], Ys[ins])
            vs = np.zeros(Xs.shape)
            if bright:
                vs[ins] = _se_brightness(ns, fs, rim_s[ins], width_nm)
            else:
                vs[ins] = keep * np.exp(-mu_per_nm * ts) - 1.0
            inside_s = np.zeros(Xs.shape)
            inside_s[ins] = 1.0
            cov[jn] = inside_s.reshape(-1, ss * ss).mean(axis=1)
            val[jn] = vs.reshape(-1, ss * ss).mean(axis=1)
        cov = cov.reshape(h, w)
        val = val.reshape(h, w)
        block = img[r0:r1, c0:c1]
        s = float(g.contrast_scale)
        if bright:
            img[r0:r1, c0:c1] = block * (1.0 - s * cov) + s * val
        else:
            img[r0:r1, c0:c1] = block * (1.0 + s * val)

    rng = np.random.default_rng(seed)
    if gradient > 0:
        ang = rng.uniform(0, 2 * np.pi)
        yy, xx = np.mgrid[0:rows, 0:cols]
        ramp = np.cos(ang) * xx / max(cols - 1, 1) + np.sin(ang) * yy / max(rows - 1, 1)
        ramp = (ramp - ramp.min()) / max(np.ptp(ramp), 1e-12)
        img *= 1.0 + gradient * (ramp - 0.5)
    if blur_px > 0:
        img = ndimage.gaussian_filter(img, sigma=blur_px, mode="nearest")
    if noise > 0:
        scale = 1.0 / noise ** 2
        img = rng.poisson(np.clip(img, 0, None) * scale) / scale
        img += rng.normal(0.0, noise / 2.0, size=img.shape)
    img = np.clip(img, 0.0, 1.0).astype(np.float32)
    return SyntheticField(image=img, labels=labels, grains=grains, pixel_size_nm=px,
                          contrast=contrast, touching_pairs=touching_label_pairs(labels))


def add_artefacts(field: SyntheticField, seed: int = 0, n_streaks: int = 3, streak_amplitude: float = 0.15,
                  n_debris: int = 40, debris_amplitude: float = 0.5, avoid_grains: bool = False
                  ) -> SyntheticField:
    """Add charging streaks and debris specks to a rendered field; the truth labels stay as they were.

    Parameters
    ----------
    field : SyntheticField
        A field from :func:`render_field`.
    seed : int
        Seed of the artefacts' positions.
    n_streaks : int
        Horizontal charging streaks: 1-3 rows from a random start column to
        the right edge, brightness ``a exp(-(x - x0) / L)`` with ``L`` a
        quarter of the width (a charged spot discharging along the scan line;
        common practice, from memory, of the look of SEM charging).
    streak_amplitude : float
        ``a`` as a fraction of the intensity range (added in both contrasts).
    n_debris : int
        Specks of dirt: Gaussian spots of sigma 0.4-0.8 px (under 3 px across),
        with the grains' contrast.
    debris_amplitude : float
        Peak of a speck relative to a grain's contrast.
    avoid_grains : bool
        Put specks only where no grain lies within 4 pixels of the speck's
        centre, so that a speck is always background in the truth (positions
        are redrawn, at most 50 times per speck, then the speck is left out).

    Returns
    -------
    SyntheticField
        A copy with the new image, ``debris_rc`` the speck centres and
        ``streaks`` the streaks.
    """
    rng = np.random.default_rng(seed + 7919)
    img = field.image.astype(np.float64).copy()
    rows, cols = img.shape
    streaks = []
    for _ in range(int(n_streaks)):
        r0 = int(rng.integers(0, rows))
        h = int(rng.integers(1, 4))
        x0 = int(rng.integers(0, cols // 2))
        x = np.arange(cols) - x0
        prof = np.where(x >= 0, streak_amplitude * np.exp(-np.clip(x, 0, None) / (cols / 4.0)), 0.0)
        img[r0:r0 + h] += prof[None, :]
        streaks.append((r0, h, x0))
    sign = 1.0 if field.contrast == "bright" else -1.0
    level = 0.5 if field.contrast == "bright" else 0.6
    yy, xx = np.mgrid[-3:4, -3:4]
    near = ndimage.binary_dilation(field.labels > 0, np.ones((9, 9), bool)) if avoid_grains else None
    debris = []
    for _ in range(int(n_debris)):
        r, c = int(rng.integers(3, rows - 3)), int(rng.integers(3, cols - 3))
        if near is not None:
            for _ in range(50):
                if not near[r, c]:
                    break
                r, c = int(rng.integers(3, rows - 3)), int(rng.integers(3, cols - 3))
            else:
                continue
        sig = rng.uniform(0.4, 0.8)
        img[r - 3:r + 4, c - 3:c + 4] += sign * debris_amplitude * level * np.exp(-(yy ** 2 + xx ** 2) / (2 * sig ** 2))
        debris.append((r, c))
    img = np.clip(img, 0.0, 1.0).astype(np.float32)
    return replace(field, image=img, debris_rc=np.array(debris, dtype=int).reshape(-1, 2),
                   streaks=np.array(streaks, dtype=int).reshape(-1, 3))


# ---------------------------------------------------------------- random fields

def _habit_params(habit: str, rng: np.random.Generator) -> dict:
    """Random shape parameters typical of each habit (choices of this generator)."""
    if habit == "cube":
        return {"alpha": rng.uniform(0.6, 1.4), "face": "100"}
    if habit == "octahedron":
        return {"alpha": rng.uniform(3.0, 3.6), "face": "111"}
    if habit == "cuboctahedron":
        alpha = rng.uniform(1.6, 2.9)
        # rests on a {100} or a {111} face, with odds equal to the share of
        # that family in the surface area (an assumption of this generator)
        p = cr.wulff_polyhedron(alpha)
        fam = np.array([cr.face_family(m) for m in p.face_miller])
        s100 = p.face_areas[fam == "100"].sum() / p.surface_area
        return {"alpha": alpha, "face": "100" if rng.random() < s100 else "111"}
    if habit == "tabular_hexagon":
        return {"edge_ratio": rng.uniform(0.4, 1.0), "aspect": rng.uniform(5.0, 15.0)}
    if habit == "tabular_triangle":
        return {"edge_ratio": rng.uniform(0.0, 0.08), "aspect": rng.uniform(5.0, 15.0)}
    if habit == "rod":
        return {"aspect": rng.uniform(3.0, 8.0)}
    return {"shape_seed": int(rng.integers(0, 2 ** 31 - 1))}


def _convex_separated(a: np.ndarray, b: np.ndarray, gap: float) -> bool:
    """True if convex polygons a, b (k, 2) are at least ``gap`` apart along one of
    their edge normals (separating-axis test; conservative for ``gap > 0``)."""
    for poly in (a, b):
        e = np.roll(poly, -1, axis=0) - poly
        axes = np.column_stack([-e[:, 1], e[:, 0]])
        axes /= np.linalg.norm(axes, axis=1, keepdims=True)
        pa, pb = a @ axes.T, b @ axes.T
        if np.any((pa.max(axis=0) + gap <= pb.min(axis=0)) | (pb.max(axis=0) + gap <= pa.min(axis=0))):
            return True
    return False


def _inradius(poly: np.ndarray) -> float:
    """Distance from the origin to the nearest edge line of a convex polygon around it."""
    e = np.roll(poly, -1, axis=0) - poly
    m = np.column_stack([e[:, 1], -e[:, 0]])
    m /= np.linalg.norm(m, axis=1, keepdims=True)
    return float(np.abs(np.sum(m * poly, axis=1)).min())


def _hull(points: np.ndarray) -> np.ndarray:
    return points[ConvexHull(points).vertices]


@dataclass
class Placement:
    """Grains placed by :func:`place_grains` and how they were grouped.

    Attributes
    ----------
    grains : list of GrainSpec
        Label i + 1 of a rendered field is ``grains[i]``.
    pairs : list of tuple of int
        Sorted 1-based label pairs placed in contact: each grain of a group
        with the grain it was set against (touching groups and overlapping
        pairs alike).
    groups : list of tuple of int
        Sorted 1-based labels of each touching group of two or more grains.
    overlaps : list of tuple of int
        ``(back, front)`` 1-based labels of each pair placed so that the front
        grain lies partly over the back one.
    """

    grains: list
    pairs: list
    groups: list = field(default_factory=list)
    overlaps: list = field(default_factory=list)


def random_grains(n, shape, pixel_size_nm, habits, ecd_median_nm, ecd_gsd=1.15,
                  touching_fraction=0.15, seed=0, margin_nm=None):
    """Random grains placed in a field, mostly apart, some as touching pairs.

    Parameters
    ----------
    n : int
        Number of grains.
    shape : (int, int)
        (rows, cols) of the field.
    pixel_size_nm : float
    habits : dict of str -> float
        Habit -> weight (normalised here), e.g. ``{'cube': 0.8, 'rod': 0.2}``.
    ecd_median_nm : float
        Median ECD (nm) of a lognormal size distribution.
    ecd_gsd : float
        Its geometric standard deviation (>= 1; 1.1-1.3 resembles a fairly
        monodisperse emulsion, common practice, from memory).
    touching_fraction : float
        About this fraction of the grains is placed as touching or
        overlapping pairs, in [0, 1].
    seed : int
    margin_nm : float, optional
        Minimum distance of each grain's outline from the frame border (nm).
        Negative lets grains be cut by the border (their centres stay inside
        the field). Default: 3 pixels.

    Returns
    -------
    grains : list of GrainSpec
    pairs : list of tuple of int
        1-based label pairs (indices into ``grains`` plus one) placed touching.

    Notes
    -----
    The same as :func:`place_grains` with its default groups (pairs only),
    which describes the placement.
    """
    p = place_grains(n, shape, pixel_size_nm, habits, ecd_median_nm, ecd_gsd=ecd_gsd,
                     touching_fraction=touching_fraction, seed=seed, margin_nm=margin_nm)
    return p.grains, p.pairs


def _contact_distance(a: np.ndarray, b: np.ndarray, u: np.ndarray) -> float:
    """Centre distance along unit vector ``u`` at which convex hulls a, b (about
    their centres) just meet (bisection, 30 halvings)."""
    lo_d = 0.0
    hi_d = float(np.linalg.norm(a, axis=1).max() + np.linalg.norm(b, axis=1).max())
    for _ in range(30):
        mid = 0.5 * (lo_d + hi_d)
        if _convex_separated(a, b + mid * u, 0.0):
            hi_d = mid
        else:
            lo_d = mid
    return lo_d


def place_grains(n, shape, pixel_size_nm, habits, ecd_median_nm, ecd_gsd=1.15, touching_fraction=0.15,
                 seed=0, margin_nm=None, *, group_sizes=(2,), overlap_fraction=0.0,
                 extra_grains=()) -> Placement:
    """Random grains placed in a field: apart, in touching groups, or lying partly over another.

    Parameters
    ----------
    n, shape, pixel_size_nm, habits, ecd_median_nm, ecd_gsd, seed, margin_nm
        As in :func:`random_grains`.
    touching_fraction : float
        About this fraction of the ``n`` random grains is placed in touching
        groups, in [0, 1].
    group_sizes : tuple of int
        Sizes (>= 2) of the touching groups, drawn with equal odds while
        grains for groups are left (a last group takes a size that fits).
    overlap_fraction : float
        About this fraction of the ``n`` random grains is placed as pairs in
        which the smaller grain lies partly over the larger, in [0, 1].
    extra_grains : sequence of GrainSpec
        Given grains (their position is ignored) placed apart like isolated
        grains, after the ``n`` random ones in the draw; e.g. faint thin plates.

    Returns
    -------
    Placement

    Notes
    -----
    Grains are placed unit by unit (a single grain, a group or a pair) at
    random free spots (random sequential addition, largest unit first);
    units keep a gap of at least 3 pixels between the convex hulls of their
    outlines. Distances are along a random direction as fractions ``f`` of
    the contact distance of the two convex hulls (where they just meet):

    - pairs of the default ``group_sizes=(2,)`` with no overlaps (the
      original scheme): ``f (r1 + r2)``, ``f`` uniform in [0.7, 0.95] and
      ``r = ECD / 2``, cut to [0.85, 0.95] of the contact distance where the
      outlines would not meet;
    - touching groups otherwise: each next grain is set against a random
      grain of the group at ``f`` in [0.85, 0.95], and must not overlap the
      other grains of the group (20 tries; else it is placed alone);
    - overlapping pairs: ``f`` in [0.6, 0.8] (for two equal discs the front
      one hides 14-35 % of the back one's area, lens-area geometry).

    The smaller grain of two in contact is in front (``z_order``). Alpha
    ranges: cube [0.6, 1.4], cuboctahedron [1.6, 2.9], octahedron [3.0, 3.6];
    resting face {100} for cubes, {111} for octahedra, either for
    cuboctahedra.

    Raises
    ------
    ValueError
        If the grains cannot be placed (field too crowded) or an argument is
        out of range.
    """
    rows, cols = _check_shape(shape)
    px = _check_px(pixel_size_nm)
    n = int(n)
    if n < 0:
        raise ValueError(f"n must be >= 0, got {n!r}")
    if not isinstance(habits, dict) or not habits:
        raise ValueError(f"habits must be a non-empty dict habit -> weight, got {habits!r}")
    bad = [h for h in habits if h not in HABITS]
    if bad:
        raise ValueError(f"unknown habits {bad}; expected some of {HABITS}")
    w = np.array([float(habits[h]) for h in habits])
    if np.any(~np.isfinite(w)) or np.any(w < 0) or w.sum() <= 0:
        raise ValueError(f"habit weights must be >= 0 with a positive sum, got {habits!r}")
    if not (np.isfinite(ecd_median_nm) and ecd_median_nm > 0):
        raise ValueError(f"ecd_median_nm must be > 0, got {ecd_median_nm!r}")
    if not (np.isfinite(ecd_gsd) and ecd_gsd >= 1):
        raise ValueError(f"ecd_gsd must be >= 1, got {ecd_gsd!r}")
    if not (0 <= touching_fraction <= 1):
        raise ValueError(f"touching_fraction must be in [0, 1], got {touching_fraction!r}")
    if not (0 <= overlap_fraction <= 1):
        raise ValueError(f"overlap_fraction must be in [0, 1], got {overlap_fraction!r}")
    try:
        group_sizes = tuple(int(k) for k in group_sizes)
    except (TypeError, ValueError):
        raise ValueError(f"group_sizes must be integers >= 2, got {group_sizes!r}") from None
    if not group_sizes or min(group_sizes) < 2:
        raise ValueError(f"group_sizes must be integers >= 2, got {group_sizes!r}")
    extra = list(extra_grains)
    for e in extra:
        _check_spec(e)
    margin = 3 * px if margin_nm is None else float(margin_nm)
    gap = 3 * px
    width, height = cols * px, rows * px

    rng = np.random.default_rng((int(seed), 0x6E41))
    names = list(habits)
    hab = rng.choice(len(names), size=n, p=w / w.sum())
    ecd = ecd_median_nm * np.exp(rng.normal(0.0, math.log(ecd_gsd), size=n))
    specs = []
    for i in range(n):
        h = names[hab[i]]
        specs.append(GrainSpec(habit=h, ecd_nm=float(ecd[i]), x_nm=0.0, y_nm=0.0,
                               rotation_deg=float(rng.uniform(0, 360)), **_habit_params(h, rng)))
    specs += [replace(e, x_nm=0.0, y_nm=0.0) for e in extra]
    n_all = len(specs)
    # convex hulls of the outlines about each centre, in frame orientation (y down)
    hulls = []
    for sp in specs:
        o = _make_body(sp).outline
        hulls.append(_hull(np.column_stack([o[:, 0], -o[:, 1]])))
    radius = np.array([np.linalg.norm(h, axis=1).max() for h in hulls]) if hulls else np.zeros(0)
    inradius = np.array([_inradius(h) for h in hulls]) if hulls else np.zeros(0)
    lo_xy = np.array([h.min(axis=0) for h in hulls]).reshape(-1, 2)
    hi_xy = np.array([h.max(axis=0) for h in hulls]).reshape(-1, 2)

    legacy = group_sizes == (2,) and overlap_fraction == 0
    idx = rng.permutation(n)
    # a unit: (members, kind, offsets of the members from the first one or None, contact edges)
    if legacy:
        n_pairs = min(int(round(touching_fraction * n / 2)), n // 2)
        units = [(tuple(idx[2 * k:2 * k + 2]), "pair", None, []) for k in range(n_pairs)]
        units += [((i,), "single", [np.zeros(2)], []) for i in idx[2 * n_pairs:]]
    else:
        units = []
        n_over = min(int(round(overlap_fraction * n / 2)), n // 2)
        chunks = [(tuple(idx[2 * k:2 * k + 2]), "overlap") for k in range(n_over)]
        k = 2 * n_over
        left = min(int(round(touching_fraction * n)), n - k)
        while True:
            fits = [g for g in group_sizes if g <= left]
            if not fits:
                break
            size = int(fits[int(rng.integers(len(fits)))])
            chunks.append((tuple(idx[k:k + size]), "group"))
            k += size
            left -= size
        for members, kind in chunks:
            lo_f, hi_f = (0.6, 0.8) if kind == "overlap" else (0.85, 0.95)
            off = {members[0]: np.zeros(2)}
            edges, alone = [], []
            for m in members[1:]:
                for _ in range(20):
                    anchor = list(off)[int(rng.integers(len(off)))]
                    ang = rng.uniform(0, 2 * np.pi)
                    u = np.array([math.cos(ang), math.sin(ang)])
                    o = off[anchor] + rng.uniform(lo_f, hi_f) * _contact_distance(hulls[anchor], hulls[m], u) * u
                    if all(_convex_separated(hulls[j] + off[j], hulls[m] + o, 0.0) for j in off if j != anchor):
                        off[m] = o
                        edges.append((anchor, m))
                        break
                else:
                    alone.append(m)
            kept = tuple(off)
            units.append((kept, kind if len(kept) > 1 else "single", [off[j] for j in kept], edges))
            units += [((m,), "single", [np.zeros(2)], []) for m in alone]
        units += [((i,), "single", [np.zeros(2)], []) for i in idx[k:]]
    units += [((n + j,), "single", [np.zeros(2)], []) for j in range(len(extra))]
    units.sort(key=lambda u: -sum(radius[list(u[0])]))                 # big first packs better

    placed: list[int] = []
    centre = np.zeros((n_all, 2))
    done = []
    batch = 128

    def in_bounds(xy, k):
        """Candidate centres (B, 2) whose grain k keeps the margin (centres inside)."""
        lo = np.maximum(margin - lo_xy[k], 0.0)
        hi = np.minimum(np.array([width, height]) - margin - hi_xy[k], [width, height])
        return np.all((xy >= lo) & (xy <= hi), axis=1)

    def screen(xy, k, pxy, pk):
        """Vectorised pre-test of candidate centres (B, 2) of grain k against the
        placed grains: (certainly too close, neighbours to test exactly)."""
        if not len(pk):
            return np.zeros(len(xy), bool), np.zeros((len(xy), 0), bool)
        dist = np.hypot(xy[:, None, 0] - pxy[None, :, 0], xy[:, None, 1] - pxy[None, :, 1])
        hit = (dist < inradius[pk] + inradius[k] + gap).any(axis=1)
        near = dist < radius[pk] + radius[k] + gap
        return hit, near

    def exact_clear(c, k, near_row, pxy, pk):
        return all(_convex_separated(hulls[k] + c, hulls[pk[j]] + pxy[j], gap)
                   for j in np.flatnonzero(near_row))

    for members, kind, offs, edges in units:
        a = members[0]
        if kind == "pair":                            # the original pair scheme, draw for draw
            b = members[1]
            ang = rng.uniform(0, 2 * np.pi)
            u = np.array([math.cos(ang), math.sin(ang)])
            dist = rng.uniform(0.7, 0.95) * 0.5 * (specs[a].ecd_nm + specs[b].ecd_nm)
            lo_d = _contact_distance(hulls[a], hulls[b], u)
            if dist > 0.95 * lo_d:
                dist = rng.uniform(0.85, 0.95) * lo_d
            offs = [np.zeros(2), dist * u]
            edges = [(a, b)]
        pk = np.array(placed, dtype=int)
        pxy = centre[pk]
        found = None
        lo = np.maximum(margin - lo_xy[a], 0.0)
        hi = np.minimum(np.array([width, height]) - margin - hi_xy[a], [width, height])
        if np.all(lo <= hi):
            for _ in range(40):
                cand = rng.uniform(lo, hi, size=(batch, 2))
                ok = np.ones(len(cand), bool)
                for m, o in zip(members, offs):
                    ok &= in_bounds(cand + o, m)
                cand = cand[ok]
                tests = [screen(cand + o, m, pxy, pk) for m, o in zip(members, offs)]
                hit = np.any([t[0] for t in tests], axis=0)
                for c in np.flatnonzero(~hit):          # first candidate that is clear
                    if all(exact_clear(cand[c] + o, m, t[1][c], pxy, pk)
                           for m, o, t in zip(members, offs, tests)):
                        found = cand[c]
                        break
                if found is not None:
                    break
        if found is None:
            raise ValueError(f"could not place {n_all} grains of median ECD {ecd_median_nm} nm in a "
                             f"{rows}x{cols} field at {px} nm/px; use fewer or smaller grains")
        for m, o in zip(members, offs):
            centre[m] = found + o
            placed.append(m)
        done.append((members, kind, edges))

    perm = rng.permutation(n_all)             # label order independent of placement order
    new_index = np.empty(n_all, dtype=int)
    new_index[perm] = np.arange(n_all)
    out = []
    for i in perm:
        out.append(replace(specs[i], x_nm=float(centre[i, 0]), y_nm=float(centre[i, 1])))

    def lab(i):
        return int(new_index[i]) + 1

    label_pairs, groups, overlaps = [], [], []
    for members, kind, edges in done:
        if kind == "single":
            continue
        if kind == "pair":
            a, b = members
            front = a if specs[a].ecd_nm <= specs[b].ecd_nm else b
            out[new_index[front]].z_order = 1
        else:                                 # smaller grains in front
            for rank, m in enumerate(sorted(members, key=lambda j: (-specs[j].ecd_nm, j))):
                out[new_index[m]].z_order = rank
        label_pairs += [tuple(sorted((lab(p), lab(q)))) for p, q in edges]
        if kind == "overlap":
            back, front = sorted(members, key=lambda j: (-specs[j].ecd_nm, j))
            overlaps.append((lab(back), lab(front)))
        else:
            groups.append(tuple(sorted(lab(m) for m in members)))
    return Placement(grains=out, pairs=sorted(label_pairs), groups=sorted(groups), overlaps=sorted(overlaps))


def make_field(n, shape, pixel_size_nm, habits, ecd_median_nm, contrast="bright", seed=0, **kw
               ) -> SyntheticField:
    """Random grains (:func:`random_grains`) rendered (:func:`render_field`) in one call.

    Keyword arguments ``ecd_gsd``, ``touching_fraction`` and ``margin_nm`` go
    to :func:`random_grains`, the rest to :func:`render_field`. The field's
    ``touching_pairs`` are those that touch in the rendered labels.
    """
    place_keys = ("ecd_gsd", "touching_fraction", "margin_nm")
    place = {k: kw.pop(k) for k in place_keys if k in kw}
    grains, _ = random_grains(n, shape, pixel_size_nm, habits, ecd_median_nm, seed=seed, **place)
    return render_field(grains, shape, pixel_size_nm, contrast, seed=seed, **kw)


def to_uint16(image) -> np.ndarray:
    """Quantise a nominal [0, 1] image to uint16 (clipped, rounded).

    Parameters
    ----------
    image : array_like of float

    Returns
    -------
    ndarray of uint16
        ``round(clip(image, 0, 1) * 65535)``.
    """
    a = np.asarray(image, dtype=np.float64)
    if not np.all(np.isfinite(a)):
        raise ValueError("image contains non-finite values")
    return np.round(np.clip(a, 0.0, 1.0) * 65535.0).astype(np.uint16)


def bench_render(argv: list[str] | None = None) -> int:
    """Speed benchmark: place and render a random field in both contrasts.

    Parameters
    ----------
    argv : list of str, optional
        Command-line arguments (``--help`` lists them).

    Returns
    -------
    int
        Exit code (0).
    """
    import argparse
    import time

    ap = argparse.ArgumentParser(prog="grainhabit bench render",
                                 description="Time synthetic field placement and rendering.")
    ap.add_argument("--size", type=int, default=1024, help="field size in pixels (square)")
    ap.add_argument("--grains", type=int, default=150)
    ap.add_argument("--pixel-size", type=float, default=5.0, help="nm per pixel")
    ap.add_argument("--ecd", type=float, default=250.0, help="median ECD in nm")
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--seed", type=int, default=1)
    args = ap.parse_args(argv)
    habits = {h: 1.0 for h in HABITS}
    shape = (args.size, args.size)
    for r in range(args.repeat):
        _body_cached.cache_clear()
        t = [(time.perf_counter(), time.process_time())]
        grains, _ = random_grains(args.grains, shape, args.pixel_size, habits, args.ecd,
                                  seed=args.seed + r)
        t.append((time.perf_counter(), time.process_time()))
        _body_cached.cache_clear()
        t.append((time.perf_counter(), time.process_time()))
        render_field(grains, shape, args.pixel_size, "bright", seed=args.seed + r)
        t.append((time.perf_counter(), time.process_time()))
        render_field(grains, shape, args.pixel_size, "dark", seed=args.seed + r)
        t.append((time.perf_counter(), time.process_time()))
        wall = [t[k + 1][0] - t[k][0] for k in (0, 2, 3)]
        cpu = [t[k + 1][1] - t[k][1] for k in (0, 2, 3)]
        print(f"run {r + 1}: {args.size}x{args.size} px, {args.grains} grains; wall (cpu) s: "
              f"place {wall[0]:.2f} ({cpu[0]:.2f}), bright {wall[1]:.2f} ({cpu[1]:.2f}) "
              f"with bodies built, dark {wall[2]:.2f} ({cpu[2]:.2f}) with bodies cached")
    return 0
