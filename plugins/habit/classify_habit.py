"""Step ``classify-habit``: the crystal habit of every grain, and the alpha fit it rests on.

Evidence, per grain
-------------------
*Outline.* The sub-pixel outline of the grain's label is compared, by the
scale- and rotation-invariant radial-signature distance of
:mod:`engine`, with four model families: Wulff shapes seen along [100],
[111] or [110] (cube ... octahedron), twinned {111} plates (a triangle with
cut corners, short/long edge ratio e from 0 to 1), {100} rods (rectangles of
length/width 1.6 ... 16) and the disc. Distances are in units of the outline
noise ``tau`` (:func:`engine.match_outline`). Feret ratio and solidity come
from the outline's convex hull.

*Interior.* The grain's pixels (rim left out) are fitted by the placed Wulff
models (:func:`engine.fit_alpha`): facet brightness following the facet tilt
in secondary-electron contrast, attenuation following the projected
thickness in transmission contrast. ``facet_chi2`` is how much better the
best model explains the interior than a featureless one (one level and a
plane, a round body, or a smooth cubic surface: a bead or a lump shaded by a
detector off to one side is smooth, facets leave steps at their edges): large
for an octahedron on {111} (inclined facets, or thickness peaking in the
middle), near zero for a flat plate or a cube's top face.

Decision
--------
1. ``irregular`` if the outline is concave (solidity below ``min_solidity``:
   aggregates, unsplit clusters) or fits none of the families within
   ``irregular_misfit`` noise units (rounded, ripened, lumpy).
2. ``irregular`` (``outline_class`` "smooth") if the outline is rounded: a
   smooth curve of harmonics up to 5 (:func:`engine.smooth_residual`) fits it
   better than every model family by more than ``smooth_margin`` squared-misfit
   units and the interior shows no facets. Polygons need harmonics far above
   the fifth for their corners (a square's fundamental is the fourth, a
   hexagon's the sixth); a lumpy rounded grain does not, and a Wulff outline
   seen along [110] (a rectangle) otherwise fits such a grain as a cube.
   ``smooth_margin`` (12) is two squared-misfit units for each of the six free
   parameters the curve has beyond a family's alpha and rotation (Akaike's
   criterion; an assumption of this step).
0. ``irregular`` with ``habit_score`` 0 if the grain's outline is under
   ``min_resolved_px`` (8 px ECD): segment-grains keeps grains from 4 px for
   their number and size, but at 4-8 px the outline's pixel steps are as large
   as what tells the habits apart (on the Tescan 10000x survey file of
   ``../shared/realdata``, crystals of 5-6 px were named ``rod`` with scores
   0.65-0.96 before this rule: 74 of 382 grains).
3. ``irregular`` with a low ``habit_score`` if the grain is too small for
   its shape to be resolved: the disc fits its outline within ``tolerance``
   of the best model family and its interior shows no facets. This follows
   from the outline noise (a pixel-scale quantity) and the grain's size,
   not from a size threshold.
4. ``rod`` if the rod family fits best and the Feret ratio is below
   ``rod_feret_ratio``.
5. The plate family fits clearly better than any Wulff outline (Wulff
   projections along [100] and [111] are centrally symmetric; a triangle or
   a hexagon with three long and three short edges is not):
   ``tabular_triangle`` where the fitted edge ratio is below
   ``triangle_edge_ratio`` or a plate of such a ratio fits within ``tolerance``
   of the best plate (the triangle is the plate family's end member: a
   hexagonal plate needs evidence of its truncation, as a cuboctahedron does;
   :func:`triangle_within_tolerance`), else ``tabular_hexagon``.
6. A hexagonal outline with a flat interior (no facets, and no relief:
   ``relief_chi2``, the evidence against one level plus a plane, below
   ``facet_chi2_min``) that the plate family fits is ``tabular_hexagon``
   where the best Wulff view is along [111] or [110] (a body seen along
   [110] lies on an edge: inclined facets on both sides; classify-habit 2.6). An
   octahedron on {111} shows inclined facets in secondary-electron contrast;
   in transmission its projected thickness falls to zero at the rim over two
   thirds of its area, a dome that the round body explains as well as the
   facets (so ``facet_chi2`` stays low) but a flat plate does not.
6b. ``irregular`` with ``habit_score`` <= 0.25 ("undetermined") where only a body seen along [110]
   fits the outline (no view along [100] or [111] within ``tolerance``) and, in secondary-electron
   contrast, the placed models explain the interior no better than a featureless surface
   (``facet_chi2`` below ``tolerance``): such a body rests on an edge where two of its faces meet,
   lit differently (:data:`EDGE_VIEWS`; classify-habit 2.7).
7. Everything else is polyhedral and named by alpha (thresholds in
   :mod:`vocabulary`): ``cube`` alpha <= 1.5, ``cuboctahedron``
   1.5 < alpha < 3, ``octahedron`` alpha >= 3; a cuboctahedron needs
   evidence of its truncation, i.e. neither end member fits within
   ``tolerance`` (:func:`engine.polyhedral_class`). The same rule holds in
   both contrasts: a flat square is a cube whether it is bright on dark or
   dark on bright. An octahedron that a truncated body fits as well is only
   bounded (alpha NaN, ``alpha_lo`` below 3): its ``habit_score`` is at most
   0.5 and ``habit_note`` gives the largest alpha whose truncation the
   outline of a grain of its size could show
   (:func:`engine.resolvable_alpha`: about 2.5 at 40 px and 2.7 at 80 px on
   {111}); above it a cuboctahedron cannot be told from an octahedron.

A grain cut from a touching neighbour (``split``) is not judged rounded as a
whole (its cut is a straight edge). Where its cut outline fits nothing, it is
judged by the outline its true edges imply (:func:`free_edge`):

- if the true edges are a smooth curve within the outline noise (harmonics up
  to 5 fitted to the signature samples on the true edges, :func:`free_samples`),
  it stays ``irregular`` (a rounded grain has no corners to complete);
- else the smallest convex outline of two-fold (central) or three-fold
  symmetry that holds the true edges (:func:`engine.complete_by_symmetry`;
  every Wulff projection along [100], [111] and [110] and every rod is
  centrally symmetric, a twinned plate three-fold), the clearly smaller one
  (by ``COMPLETION_AREA_MARGIN``) first, so a cut cube stays a cube and a cut
  triangle a triangle. The completion is taken only if its model explains it
  about as well as a smooth curve explains the true edges (within
  ``smooth_margin``), if it adds no more than a straight cut of a body of that
  symmetry could have removed (at most fold / (fold - 1) times the visible
  area), and a three-fold one only for a plate with a flat interior whose true edges do not meet at
  right angles (:func:`right_angled_edges`, classify-habit 2.8: cubes left joined);
- a body seen along [111] projects to an outline of six-fold symmetry (a
  three-fold axis and a centre of inversion): the regular hexagon of the
  octahedron, the 12-gon of a cuboctahedron. A cut octahedron completed by
  central symmetry about a centre a little off becomes a hexagon with unequal
  edges that no model fits, so the six-fold completion is tried too (unless the
  two-fold one is a {100} view or fits within tolerance) and replaces the two-fold one where its
  model fits better; it stands for a truncated octahedron or an octahedron on
  {111}, or a hexagonal plate (:func:`_completed`).

The same completion is tried for a split grain whose cut outline looks polyhedral
without showing facets, or is an octahedron that a truncated body fits as well
(the cut hides the corners whose truncation tells them apart), where the cut
outline misfits its model by more than the tolerance and by more than a smooth
curve misfits its true edges (the test a completion must pass); the cut
outline's own habit stays where it fits its outline at least as well as the
completion does (a grain cut along its true contact keeps the outline it has).

A cut plate that still fits the plate family takes its edge ratio from the
outline completed three-fold (a corner cut by the neighbour looks like a short
edge), unless its two-fold completion is clearly smaller and a body seen along
[100]: a square cut at a corner is a pentagon that the plate family fits
(:func:`_square_completion`). Its area and ECD stay those of the visible part
(measure-grains).

The plate and rod family outlines are rounded like the Wulff models (the
rounding level of :func:`engine.match_outline`), and the plate's edge ratio is
refined between the grid's members (:func:`best_families`).

The full interior fit is run only where steps 1, 4 and 5 do not decide from the
outline (the habit is then provably the same, :func:`outline_decides`). Where
the outline is rounded (step 2) or unresolved (step 3), the facet evidence
comes from the eight outline-best models placed over the interior
(``search='quick'``, a lower bound on the full search's), and a rounded grain
that shows facets there gets the full fit if the outline does not decide it.

The fit's result is written to the frame (``fit_alpha``, ``fit_alpha_lo``,
``fit_alpha_hi``, ``fit_note``, ``rest_face``, ``fit_rotation_deg``,
``outline_misfit``), where ``fit-growth-ratio`` reads it: one fit per grain,
one parameter set (this step's), nothing kept between steps or frames.

``habit_score`` is the relative likelihood of the class for polyhedral
grains, and for the other classes a product of logistic margins of the
deciding quantities (:func:`_margin`); a confidence in [0, 1], not a
calibrated probability.

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
from grainhabit.plugins.habit import disk_cache
from grainhabit.plugins.habit import engine as en
from grainhabit.plugins.habit.interior import diamond_morphology
from grainhabit.plugins.habit import outline_batch
from grainhabit.plugins.habit.vocabulary import POLYHEDRAL_HABITS, TABULAR_HABITS

GRAINHABIT_API = 1

#: Smallest equivalent circle diameter (px) at which a grain's habit is judged. A square of 8 px ECD has
#: edges of 7 px, a rod of aspect 2 a width of 5-6 px: below that the outline's pixel steps are as large
#: as the features that tell the habits apart (this project's choice). segment-grains keeps grains from
#: 4 px for their number and size; their habit is left undetermined.
MIN_RESOLVED_PX = 8.0

#: Best Wulff views whose bodies cannot look flat: an octahedron or truncated body on {111} shows inclined
#: facets (in transmission a thickness falling to its rim), and so does any body seen along [110], which
#: rests on an edge. A featureless, flat hexagon the plate family fits is a plate where the best view is one
#: of these (a view along [100] is a cube's flat top face).
FLAT_PLATE_VIEWS = ("111", "110")

#: Views along which a body rests on an edge, not a face: two inclined facets meet along the edge on top
#: (in transmission the thickness rises to a ridge). Where only such a view fits a grain's outline (no view
#: of :data:`FACE_VIEWS` within ``tolerance``) and its placed models explain its interior no better than a
#: featureless surface does (``facet_chi2`` below ``tolerance``: no trace of the facets), the two pieces of
#: evidence disagree and the habit is left undetermined (``irregular``, ``habit_score`` <= 0.25;
#: classify-habit 2.7). Lumps of 20-40 px fitted a cube seen along [110] (a rectangle with rounded corners)
#: with scores 0.5-1.0. Secondary-electron contrast only: there a facet's brightness follows its tilt and
#: rendered bodies on an edge show ``facet_chi2`` of 29 and more at 25-80 px; in transmission the facets
#: show only as kinks of the thickness, and rendered bodies on an edge of 80-100 px give ``facet_chi2``
#: near 0 (a smooth surface follows their thickness ridge), so the interior says nothing there.
EDGE_VIEWS = ("110",)

#: Views along which a body rests on one of its faces.
FACE_VIEWS = ("100", "111")

STEP = StepInfo(
    name="classify-habit",
    stage="classify",
    version="2.8",
    summary="Crystal habit from outline shape and interior facets or thickness contrast, with the alpha fit.",
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
        Param("smooth_margin", float, 12.0, low=0.0,
              doc="Squared-misfit units by which a smooth curve (harmonics up to 5) must beat every model "
                  "family for a grain without facets to be a rounded irregular one."),
        Param("facet_chi2_min", float, 12.0, low=0.0,
              doc="Interior facet evidence (chi-square units) above which a grain counts as faceted."),
        Param("min_resolved_px", float, MIN_RESOLVED_PX, unit="px", low=0.0,
              doc="Grains with a smaller equivalent circle diameter (pixels of their outline) are irregular "
                  "with habit_score 0: too few pixels to resolve a habit (0: judge every grain)."),
    ) + en.FIT_PARAMS,
    outputs=(
        Column("outline_class", "", "best outline family: wulff, plate, rod, disc or smooth"),
        Column("outline_misfit_ratio", "1", "best outline misfit over the outline noise"),
        Column("facet_chi2", "1", "interior evidence for facets over a featureless interior"),
        Column("relief_chi2", "1", "interior evidence against a flat interior (facets, a thickness dome)"),
        Column("plate_edge_ratio", "1", "short/long edge ratio of the best-fitting plate outline"),
        Column("rod_aspect", "1", "length/width of the best-fitting rod outline"),
        Column("habit_note", "", "why the habit is irregular, where the outline alone does not say"),
        Column("fit_alpha", "1", "alpha of the Wulff fit where determined (NaN where only bounded)"),
        Column("fit_alpha_lo", "1", "lower end of the alpha range of the Wulff fit"),
        Column("fit_alpha_hi", "1", "upper end of the alpha range of the Wulff fit"),
        Column("fit_note", "", "what bounds the fitted alpha range"),
        Column("rest_face", "", "view of the best Wulff model: 100, 111 or 110"),
        Column("fit_rotation_deg", "deg", "in-plane rotation of the best model, counter-clockwise on screen"),
        Column("outline_misfit", "1", "RMS radial-signature distance of the best model / sqrt(area)"),
    ),
)


#: Grains whose interior fits :func:`classify_frame` runs in step (their requests solved together,
#: :func:`engine.run_together`); bounds the grain interiors held at once on large frames. Every round
#: of a step costs its solves' fixed overhead whatever the number of grains in it, so a frame of a few
#: hundred grains goes in one step (256: 0.94-0.96 of the CPU time of steps of 64 on 2048 px frames of
#: 135-168 grains, the same columns; the interiors of a frame's grains are disjoint sets of its pixels).
GRAINS_IN_STEP = 256

#: Relative area by which the three-fold completion of a split grain must be smaller than the
#: central-symmetric one to be tried first (:func:`classify_frame`).
COMPLETION_AREA_MARGIN = 0.05
#: A split grain is not completed three-fold where its true edges meet at right angles: at least this share
#: of their length runs at 90 degrees to the dominant direction (within EDGE_FAMILY_DEG), more than runs at 60
#: or 120 degrees to it (:func:`right_angled_edges`).
RIGHT_ANGLE_SHARE = 0.15
EDGE_FAMILY_DEG = 12.0
#: Spacing (px) of the outline samples whose chords give the edges' directions (pixel steps averaged out).
EDGE_CHORD_PX = 4.0


# --------------------------------------------------------------- model families

@functools.lru_cache(maxsize=16)
@disk_cache.on_disk
def family_signatures(n_angles: int = 256, level: int = 0):
    """Radial signatures and spectra of the plate and rod families (built once per size and rounding).

    Parameters
    ----------
    n_angles : int
    level : int
        Corner rounding of the outlines: :data:`engine.ROUNDING_LEVELS` ``[level]`` times the
        ECD, as the Wulff models are rounded (:func:`engine.match_outline` picks the level
        of a grain from its size); 0 leaves the corners sharp.

    Returns
    -------
    plate_e : ndarray, shape (p,)
        Edge ratios of the plates (0 triangle ... 1 regular hexagon).
    plate : tuple
        (signatures (p, n_angles), conjugate spectra, squared norms).
    rod_aspect : ndarray, shape (q,)
        Length / width of the rods.
    rod : tuple
        As ``plate``.
    """
    rho = en.ROUNDING_LEVELS[int(level)]

    def sig(poly):
        poly = np.asarray(poly, float)
        unit = poly * math.sqrt((math.pi / 4) / en.polygon_centroid(poly)[1])      # unit ECD
        return en.radial_signature(en.rounded_outline(unit, rho), n_angles)

    e = np.linspace(0.0, 1.0, 51)
    rot = cr.resting_rotation("111")
    psig = np.array([sig(cr.project(cr.tabular_prism(v, 0.1), rot)) for v in e])
    asp = np.geomspace(1.6, 16.0, 40)
    r100 = cr.resting_rotation("100")
    rsig = np.array([sig(cr.project(cr.rod_prism(v), r100)) for v in asp])

    def spectra(s):
        return s, np.conj(np.fft.rfft(s, axis=1)), np.einsum("ij,ij->i", s, s)

    return e, spectra(psig), asp, spectra(rsig)


def best_family(sig, family) -> tuple[float, int]:
    """Smallest signature distance over a model family and its index.

    Parameters
    ----------
    sig : ndarray, shape (n,)
        Observed radial signature.
    family : tuple
        (signatures, conjugate spectra, squared norms) from :func:`family_signatures`.

    Returns
    -------
    distance : float
        min over members and cyclic shifts of :func:`engine.shift_distances`.
    index : int
        The member that attains it.
    """
    _, spec, sq = family
    a = np.asarray(sig, float)
    cc = np.fft.irfft(np.fft.rfft(a)[None, :] * spec, a.size, axis=1)
    d2 = (a @ a + sq[:, None] - 2.0 * cc) / a.size
    d = np.sqrt(np.maximum(d2.min(axis=1), 0.0))
    i = int(np.argmin(d))
    return float(d[i]), i


@functools.lru_cache(maxsize=16)
def _families_stacked(n_angles: int, level: int = 0):
    """Plate and rod families of :func:`family_signatures` in one (spectra, norms, first row of each)."""
    _, plate, _, rod = family_signatures(n_angles, level)
    spec = np.concatenate([plate[1], rod[1]])
    sq = np.concatenate([plate[2], rod[2]])
    return spec, sq, (0, len(plate[2]), len(sq))


def best_families(sig, level: int = 0, spectrum=None) -> tuple[tuple[float, int, float], tuple[float, int, float]]:
    """:func:`best_family` of the plate and the rod family at once (one pair of FFTs).

    Parameters
    ----------
    sig : ndarray, shape (n,)
        Observed radial signature.
    level : int
        Corner rounding of the family outlines (:func:`family_signatures`).
    spectrum : ndarray, shape (n // 2 + 1,), optional
        ``numpy.fft.rfft(sig)`` where the caller has it (the outline match made it); computed here
        otherwise.

    Returns
    -------
    (distance, index, position) of the plate family, then of the rod family: ``position``
    is the index refined between grid members, the vertex of the parabola through the
    squared distances of the best member and its two neighbours (the index itself at
    either end of the family or where the three do not curve upwards).
    """
    a = np.asarray(sig, float)
    spec, sq, cut = _families_stacked(a.size, int(level))
    n = a.size
    cc = np.fft.irfft((np.fft.rfft(a) if spectrum is None else spectrum)[None, :] * spec, n, axis=1)
    if n & (n - 1) == 0:
        # the least of (|a|^2 + |b|^2 - 2 C) / n over the shifts, from the largest C of each row: the
        # scaling by -2 / n (a power of two) is exact and reverses the order, and adding a row's
        # (|a|^2 + |b|^2) / n rounds monotonically, so the least distance of a row is
        # fl(-2/n max C + (|a|^2 + |b|^2) / n), the float of the whole-row form (engine.outline_candidates)
        d2 = np.maximum(cc.max(axis=1) * (-2.0 / n) + (a @ a + sq) / n, 0.0)
    else:
        d2 = np.maximum(((a @ a + sq[:, None] - 2.0 * cc) / n).min(axis=1), 0.0)
    return family_minima(d2, cut)


def plate_distances(sig, level: int = 0, spectrum=None) -> tuple[np.ndarray, np.ndarray]:
    """Least squared signature distance of every member of the plate family (over all rotations).

    Parameters
    ----------
    sig : ndarray, shape (n,)
        Observed radial signature (unit ECD).
    level : int
        Corner rounding of the family outlines (:func:`family_signatures`).
    spectrum : ndarray, shape (n // 2 + 1,), optional
        ``numpy.fft.rfft(sig)`` where the caller has it.

    Returns
    -------
    edge_ratio : ndarray, shape (p,)
        Short/long edge ratio of each plate (0 triangle ... 1 regular hexagon).
    d2 : ndarray, shape (p,)
        Its least squared distance (mean over the signature's angles, unit ECD squared); the
        least of them is the square of :func:`best_families`' plate distance.
    """
    a = np.asarray(sig, float)
    n = a.size
    pe, plate, _, _ = family_signatures(n, int(level))
    cc = np.fft.irfft((np.fft.rfft(a) if spectrum is None else spectrum)[None, :] * plate[1], n, axis=1)
    return pe, np.maximum(((a @ a + plate[2][:, None] - 2.0 * cc) / n).min(axis=1), 0.0)


def triangle_within_tolerance(match, params) -> bool:
    """Whether a triangular plate (edge ratio below ``triangle_edge_ratio``) explains the outline
    within ``tolerance`` of the best plate.

    A triangle is the end member of the plate family as the octahedron is of the Wulff bodies:
    a hexagonal plate needs evidence of its truncation. Blur and thresholding round a triangle's
    tips, and a tip rounded more than the models' rounding level (a defocused frame) or cut by a
    neighbour reads as a short edge: the best edge ratio of such a triangle lies above the
    threshold while the triangles fit within the outline noise.

    Parameters
    ----------
    match : engine.OutlineMatch
        The outline's match (signature, rounding level, misfit unit ``tau``).
    params : dict
        Resolved parameters of this step (``triangle_edge_ratio``, ``tolerance``).
    """
    pe, d2 = plate_distances(match.signature, match.level, _spectrum_of(match))
    tri = pe < params["triangle_edge_ratio"]
    if not tri.any():
        return False
    return bool((d2[tri].min() - d2.min()) / match.tau ** 2 < params["tolerance"])


def family_minima(d2: np.ndarray, cut) -> tuple:
    """The best member of each family from the squared distances of all members.

    Parameters
    ----------
    d2 : ndarray, shape (members,)
        Least squared signature distance of every member, the families one after the other.
    cut : sequence of int
        Where each family starts, and the end of the last.

    Returns
    -------
    tuple of (distance, index, position), one per family: ``position`` is the index refined between
    members, the vertex of the parabola through the squared distances of the best member and its two
    neighbours (the index itself at either end of the family or where the three do not curve upwards).
    """
    d = np.sqrt(d2)
    out = []
    for lo, hi in zip(cut[:-1], cut[1:]):
        i = int(np.argmin(d[lo:hi]))
        pos = float(i)
        if 0 < i < hi - lo - 1:
            y0, y1, y2 = d2[lo + i - 1], d2[lo + i], d2[lo + i + 1]
            curve = y0 - 2.0 * y1 + y2
            if curve > 0:
                pos = i + float(np.clip(0.5 * (y0 - y2) / curve, -0.5, 0.5))
        out.append((float(d[lo + i]), i, pos))
    return tuple(out)


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
    _, area = en.polygon_centroid(c)
    hull = ConvexHull(c)
    h = c[hull.vertices]
    fmax = float(np.max(np.linalg.norm(h[:, None] - h[None], axis=-1)))
    e = np.roll(h, -1, axis=0) - h
    nrm = np.column_stack([-e[:, 1], e[:, 0]]) / np.linalg.norm(e, axis=1, keepdims=True)
    proj = h @ nrm.T
    fmin = float(np.min(proj.max(axis=0) - proj.min(axis=0)))
    return float(area / hull.volume), fmin, fmax


def solidity_noise(contour, area, pixel_scale, params) -> float:
    """How far an outline's solidity moves when its points move by the outline noise (the width of the
    concave test's margin in ``habit_score``).

    Where the outline's points scatter by ``d`` about the true edge, its convex hull runs along their
    outward excursions and its area along their mean, so the hull exceeds the area by about ``d`` times
    the perimeter ``P`` (a band of width ``d`` along the edge; the first-order term of Steiner's formula
    for a parallel body) and the solidity falls by about ``d P / A``. With ``d`` the outline noise
    (``outline_noise_px``) that is the solidity's uncertainty; it grows as the grain shrinks (``4 d /
    ECD`` for a disc): a rod of 16 px whose outline dents by a pixel is not confidently concave. At
    least 0.01 (the width used before classify-habit 2.7). Changes ``habit_score`` only, never a habit.

    Parameters
    ----------
    contour : ndarray, shape (k, 2)
        Closed outline in its unit.
    area : float
        Its enclosed area in that unit squared.
    pixel_scale : float
        Pixel length in the contour's unit.
    params : dict
        Resolved parameters of this step (``outline_noise_px``).

    Returns
    -------
    float
    """
    c = np.asarray(contour, float)
    perimeter = float(np.hypot(*(np.roll(c, -1, axis=0) - c).T).sum())
    return max(0.01, params["outline_noise_px"] * pixel_scale * perimeter / max(area, 1e-12))


def _margin(value, threshold, width):
    """Logistic confidence that ``value`` lies above ``threshold``: 1 / (1 + exp(-(v - t) / w))."""
    z = (value - threshold) / width
    return float(1.0 / (1.0 + math.exp(-max(min(z, 50.0), -50.0))))


# ------------------------------------------------------------------ per grain

def outline_decides(ratios, solidity, feret_ratio, params) -> bool:
    """Whether the outline alone fixes the habit as irregular, rod or tabular.

    Parameters
    ----------
    ratios : array_like, shape (3,)
        Outline misfits over the outline noise of the best Wulff outline
        (interior left out), the plate and the rod family.
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


def classify_grain(contour_lab, interior, params, pixel_scale=1.0, hull=None, split=False):
    """Habit of one grain, with the Wulff fit it rests on: :func:`classify_grain_steps`, run on its own."""
    return en.run_steps(classify_grain_steps(contour_lab, interior, params, pixel_scale, hull, split))


def outline_evidence(contour_lab, params, pixel_scale=1.0):
    """The outline comparisons of :func:`classify_grain_steps`: the Wulff library and the plate and rod families.

    Parameters
    ----------
    contour_lab : ndarray, shape (k, 2)
        Outline in lab axes (y up), pixels.
    params : dict
        Resolved parameters of this step.
    pixel_scale : float
        Pixel length in the contour's unit.

    Returns
    -------
    match : engine.OutlineMatch
        :func:`engine.match_outline` of the outline with the step's model library.
    families : tuple
        :func:`best_families` of its signature at its rounding level.
    """
    p = params
    lib = en.fit_options(p)["library"]
    # only the shapes the fits can read are compared at every shift (the same fits and the same columns;
    # engine.outline_candidates_within). The interior gate's reach from the start: about half the grains
    # fit their interior, and taking a match of the tolerance's reach on to the gate's costs more
    # (bookkeeping of the rounds) than comparing the gate's shapes at once saves on the others
    match = en.match_outline(contour_lab, lib, pixel_scale, p["outline_noise_px"], p["outline_noise_floor"],
                             p["corner_radius_px"], within=en.outline_reach(p["tolerance"]))
    return match, best_families(match.signature, match.level, _spectrum_of(match))


def _spectrum_of(match):
    """``numpy.fft.rfft`` of a match's signature where its comparison keeps it (the same floats), else None."""
    return None if match.compared is None else match.compared.spec


#: Outlines matched together by :func:`outline_evidence_many` (the inverse FFTs go by blocks of
#: ``outline_batch.ROWS_AT_ONCE`` rows, so a larger number costs no cache).
OUTLINES_AT_ONCE = 64


def outline_evidence_many(contours, params, pixel_scale=1.0) -> list:
    """:func:`outline_evidence` of many outlines (the same numbers; :func:`outline_batch.match_outlines`).

    Parameters
    ----------
    contours : sequence of ndarray, shape (k_i, 2)
        Outlines in lab axes (y up), pixels.
    params : dict
        Resolved parameters of this step.
    pixel_scale : float
        Pixel length in the contours' unit.

    Returns
    -------
    list of tuple
        ``(match, families)`` of each outline, as :func:`outline_evidence` gives them.
    """
    p = params
    lib = en.fit_options(p)["library"]
    out = []
    for start in range(0, len(contours), OUTLINES_AT_ONCE):
        matches = outline_batch.match_outlines(contours[start:start + OUTLINES_AT_ONCE], lib, pixel_scale,
                                               p["outline_noise_px"], p["outline_noise_floor"],
                                               p["corner_radius_px"], en.outline_reach(p["tolerance"]), en.VIEWS)
        out += [(m, best_families(m.signature, m.level, _spectrum_of(m))) for m in matches]
    return out


def classify_grain_steps(contour_lab, interior, params, pixel_scale=1.0, hull=None, split=False, outline=None,
                         outline_fit=None):
    """Habit of one grain, with the Wulff fit it rests on (a generator of interior-fit requests).

    The placements of its interior fits are yielded as requests (:func:`engine.fit_alpha_steps`):
    :func:`classify_grain` evaluates them one by one, :func:`classify_frame` those of all the
    frame's grains together (:func:`engine.run_together`); the result is the same.

    Parameters
    ----------
    contour_lab : ndarray, shape (k, 2)
        Outline in lab axes (y up), pixels.
    interior : Interior, None or callable
        From :func:`engine.grain_evidence`; or the ``get_interior`` of
        :func:`engine.grain_evidence_lazy`, called only where the interior is
        used (not for a grain whose habit and fit its outline settles).
    params : dict
        Resolved parameters of this step.
    pixel_scale : float
        Pixel length in the contour's unit.
    hull : (float, float), optional
        Solidity and Feret ratio (min/max) of the grain's outline when
        measure-grains has them already; else from :func:`hull_shape`.
    split : bool
        The grain was cut from a touching neighbour: a cut outline is not judged
        rounded as a whole (:func:`classify_frame` judges its true edges).
    outline : tuple, optional
        :func:`outline_evidence` of ``contour_lab`` (with these parameters and
        ``pixel_scale``) where the caller has it already; else computed here.
    outline_fit : AlphaFit, optional
        :func:`engine.fit_alpha` of ``contour_lab`` without interior on ``outline``'s match
        (the step's fit options) where the caller has it (:func:`outline_batch.outline_fits`).

    Returns
    -------
    habit : str
    habit_score : float
    columns : dict
        The evidence columns of this step for this grain.
    fit : AlphaFit
        (as the generator's return value)
    """
    p = params
    kw = en.fit_options(p)
    lib = kw["library"]
    match, families = outline_evidence(contour_lab, p, pixel_scale) if outline is None else outline
    tau = match.tau
    # outline first: the best Wulff outline alone
    fit = en.fit_alpha(contour_lab, None, **kw, match=match) if outline_fit is None else outline_fit
    sig = match.signature
    pe, plate, ra, rod = family_signatures(lib.signatures.shape[-1], match.level)
    (d_plate, ip, fp), (d_rod, ir, fr) = families
    edge_ratio = float(np.interp(fp, np.arange(pe.size), pe))
    d_disc = float(np.sqrt(np.mean((sig - 1.0 / math.sqrt(math.pi)) ** 2)))
    if hull is None:
        solidity, fmin, fmax = hull_shape(contour_lab)
        feret_ratio = fmin / fmax
    else:
        solidity, feret_ratio = hull
    o_ratios = np.array([fit.outline_misfit, d_plate, d_rod, d_disc]) / tau
    unresolved = o_ratios[3] ** 2 - o_ratios[:3].min() ** 2 < p["tolerance"]
    # a rounded outline: a smooth curve fits it better than any model family
    smooth_gain = o_ratios[:3].min() ** 2 - (en.smooth_residual(sig) / tau) ** 2
    rounded = smooth_gain > p["smooth_margin"] and solidity >= p["min_solidity"] and not split
    lazy = callable(interior)
    if interior is not None:
        full = not outline_decides(o_ratios[:3], solidity, feret_ratio, p) \
            and not en.outline_settles(fit, lib, p["tolerance"])
        if lazy and (rounded or full or unresolved):
            interior, lazy = interior(), False
    if interior is not None and not lazy:
        if rounded:
            # facet evidence from the outline-best models first: a rounded grain without
            # facets is irregular whatever the full search would find for its alpha
            fit = yield from en.fit_alpha_steps(contour_lab, interior, **{**kw, "search": "quick"}, match=match)
            if full and fit.facet_chi2 >= p["facet_chi2_min"]:
                fit = yield from en.fit_alpha_steps(contour_lab, interior, **kw, match=match)
        elif full:
            fit = yield from en.fit_alpha_steps(contour_lab, interior, **kw, match=match)
        elif unresolved:
            # facet evidence from the outline-best models, for the resolution test
            fit = yield from en.fit_alpha_steps(contour_lab, interior, **{**kw, "search": "quick"}, match=match)
    edge_fchi = fit.facet_chi2
    if fit.face in EDGE_VIEWS and not np.isfinite(edge_fchi) and interior is not None \
            and not outline_decides(o_ratios[:3], solidity, feret_ratio, p):
        # a body on an edge that the outline alone settles: its facet evidence (for the test below) from
        # the outline-best models, without changing the outline's fit
        if lazy:
            interior, lazy = interior(), False
        if getattr(interior, "mode", None) == "facets":
            quick = yield from en.fit_alpha_steps(contour_lab, interior, **{**kw, "search": "quick"}, match=match)
            edge_fchi = quick.facet_chi2
    ratios = np.array([fit.outline_misfit, d_plate, d_rod, d_disc]) / tau
    best = int(np.argmin(ratios[:3]))
    cols = {
        "outline_class": ("wulff", "plate", "rod")[best],
        "outline_misfit_ratio": float(ratios[best]),
        "facet_chi2": fit.facet_chi2,
        "relief_chi2": fit.relief_chi2,
        "plate_edge_ratio": edge_ratio,
        "rod_aspect": float(ra[ir]),
        "habit_note": "",
    }
    fchi = fit.facet_chi2 if np.isfinite(fit.facet_chi2) else 0.0
    faceted = fchi >= p["facet_chi2_min"]
    if solidity < p["min_solidity"] or ratios[best] > p["irregular_misfit"]:
        s = max(1.0 - _margin(solidity, p["min_solidity"], solidity_noise(contour_lab, match.area, pixel_scale, p)),
                _margin(ratios[best], p["irregular_misfit"], 0.5))
        cols["habit_note"] = "concave outline" if solidity < p["min_solidity"] else "fits no model family"
        return "irregular", s, cols, fit
    if rounded and not faceted:
        cols["outline_class"] = "smooth"
        cols["habit_note"] = ("rounded: a smooth outline (harmonics up to 5) fits better than any model family, "
                              "and the interior shows no facets")
        return "irregular", _margin(smooth_gain, p["smooth_margin"], 2.0), cols, fit
    # resolution: is the disc (a shape without corners) as good an explanation as the best family?
    disc_gap = ratios[3] ** 2 - ratios[best] ** 2
    if disc_gap < p["tolerance"] and not faceted:
        cols["outline_class"] = "disc"
        cols["habit_note"] = "unresolved: the outline fits a disc as well as any model, the interior shows no facets"
        return "irregular", 0.25 * (1.0 - _margin(disc_gap, p["tolerance"], 1.0)), cols, fit
    if best == 2 and feret_ratio < p["rod_feret_ratio"]:
        return "rod", 1.0 - _margin(feret_ratio, p["rod_feret_ratio"], 0.05), cols, fit
    plate_gain = ratios[0] ** 2 - ratios[1] ** 2       # how much better the plate outline fits
    if plate_gain > p["plate_margin"]:
        s = _margin(plate_gain, p["plate_margin"], 2.0)
        if edge_ratio < p["triangle_edge_ratio"] or triangle_within_tolerance(match, p):
            return "tabular_triangle", s, cols, fit
        return "tabular_hexagon", s, cols, fit
    relief = fit.relief_chi2 if np.isfinite(fit.relief_chi2) else 0.0
    flat_score = 1.0 - _margin(max(fchi, relief), p["facet_chi2_min"], 0.25 * p["facet_chi2_min"] + 1e-9)
    if lazy and not faceted and relief < p["facet_chi2_min"]:
        interior = interior()
    if not faceted and relief < p["facet_chi2_min"] and interior is not None \
            and ratios[1] <= p["irregular_misfit"] and plate_gain > -p["plate_margin"] and fit.face in FLAT_PLATE_VIEWS:
        # a featureless, flat hexagon: a plate (an octahedron shows its facets, or in
        # transmission the thickness falling towards its rim; so does any body seen along [110],
        # which rests on an edge, not a face)
        return "tabular_hexagon", flat_score, cols, fit
    if fit.face in EDGE_VIEWS and getattr(interior, "mode", None) == "facets" \
            and np.isfinite(edge_fchi) and edge_fchi < p["tolerance"] \
            and min(en.class_scores(fit, lib, f).min() for f in FACE_VIEWS) > p["tolerance"]:
        # only a body lying on an edge explains the outline, and in secondary-electron contrast such a
        # body shows the inclined facets meeting along the edge, but the interior is explained as well
        # (within tolerance) without them: the outline and the interior disagree
        cols["habit_note"] = ("undetermined: only a body lying on an edge (seen along [110]) fits the outline, "
                              "and the interior shows no trace of its inclined facets")
        cols["facet_chi2"] = edge_fchi
        return "irregular", 0.25 * (1.0 - _margin(edge_fchi, p["tolerance"], 0.5)), cols, fit
    habit, share = en.polyhedral_class(fit, lib, p["tolerance"])
    cls = en.class_scores(fit, lib)
    if habit == "octahedron" and cls[1] <= cls[2] + p["tolerance"]:
        # a truncated body fits as well: say how much truncation this outline could show
        limit = en.resolvable_alpha(lib, fit.face, match.tau, match.level, p["tolerance"])
        ecd_px = math.sqrt(4.0 * match.area / math.pi) / pixel_scale
        cols["habit_note"] = (f"octahedron or a cuboctahedron of alpha > {limit:.2f}: the outline of a "
                              f"{ecd_px:.0f} px grain on {{{fit.face}}} resolves no truncation above that")
        share = min(share, 0.5)
    return habit, share, cols, fit


def interior_signal(frame):
    """Interior signal image and the engine's mode for the frame's polarity.

    The image is handed on in its own data type where that casts safely to float64 (integers,
    float32): each grain converts only its own crop (:func:`engine.grain_evidence`). The
    conversion is element by element, so these are the numbers of converting the whole frame
    first, without a float64 pass over the frame (about 40 ms on a 2048 px frame).
    """
    raw = frame.raw if frame.raw is not None and np.shape(frame.raw) == np.shape(frame.labels) else None
    src = raw if raw is not None else frame.image
    if frame.polarity == "dark" and raw is None:
        # the preprocessed image is inverted (grains bright): back to transmission-like values
        return 1.0 - np.asarray(src, float), "thickness"
    src = np.asarray(src)
    if not np.can_cast(src.dtype, np.float64, "safe"):
        src = np.asarray(src, float)
    return src, "thickness" if frame.polarity == "dark" else "facets"


def frame_contours(frame) -> list:
    """Sub-pixel contour (pixel coordinates) of every grain row of the frame."""
    from grainhabit.plugins.common.contours import grain_contours

    labs = np.asarray(frame.grains["label"], int)
    allc = grain_contours(frame.labels, int(frame.labels.max()), window=5)
    return [allc[lab - 1] if 0 < lab <= len(allc) else np.empty((0, 2)) for lab in labs]


def free_edge(labels, contour_px, label, reach_px=2):
    """Which outline vertices lie on the grain's true edge, not along a cut to a neighbour.

    Parameters
    ----------
    labels : ndarray of int, shape (rows, cols)
    contour_px : ndarray, shape (k, 2)
        Outline in pixel coordinates (x = col + 0.5 at pixel centres).
    label : int
    reach_px : int
        A vertex within this many pixels of another grain is on the cut.

    Returns
    -------
    ndarray of bool, shape (k,)
    """
    from scipy import ndimage as ndi

    c = np.asarray(contour_px, float)
    r0 = max(int(np.floor(c[:, 1].min())) - reach_px - 1, 0)
    c0 = max(int(np.floor(c[:, 0].min())) - reach_px - 1, 0)
    r1 = min(int(np.ceil(c[:, 1].max())) + reach_px + 2, labels.shape[0])
    c1 = min(int(np.ceil(c[:, 0].max())) + reach_px + 2, labels.shape[1])
    crop = labels[r0:r1, c0:c1]
    # scipy's iterated dilation, as the diamond of radius reach_px in one step (interior.diamond_morphology:
    # the same pixels, tested against scipy)
    near = diamond_morphology((crop != label) & (crop != 0), int(reach_px), erode=False) if reach_px >= 1 \
        else ndi.binary_dilation((crop != label) & (crop != 0), iterations=reach_px)
    rr = np.clip(np.floor(c[:, 1]).astype(int) - r0, 0, crop.shape[0] - 1)
    cc = np.clip(np.floor(c[:, 0]).astype(int) - c0, 0, crop.shape[1] - 1)
    return ~near[rr, cc]


def _flat_steps(contour_lab, interior, params):
    """Whether a grain's interior is flat: no facets and no relief (:attr:`engine.AlphaFit.relief_chi2`).

    A generator of interior-fit requests (:func:`engine.fit_alpha_steps`) returning a bool.
    """
    fit = yield from en.fit_alpha_steps(contour_lab, interior, **{**en.fit_options(params), "search": "quick"})
    return not (fit.relief_chi2 >= params["facet_chi2_min"])


def free_samples(contour_lab, free, n_angles: int) -> np.ndarray:
    """Which radial-signature samples of an outline lie on its true edges.

    Parameters
    ----------
    contour_lab : ndarray, shape (k, 2)
        Outline in lab axes (y up).
    free : ndarray of bool, shape (k,)
        Vertices on the grain's true edges (:func:`free_edge`).
    n_angles : int
        Samples of the signature (:func:`engine.radial_signature`).

    Returns
    -------
    ndarray of bool, shape (n_angles,)
        Sample j (direction 2 pi j / n from the outline's centroid) takes the flag of the
        vertex nearest to it in angle.
    """
    c = np.asarray(contour_lab, float)
    cen, _ = en.polygon_centroid(c)
    n = int(n_angles)
    a = (np.arctan2(c[:, 1] - cen[1], c[:, 0] - cen[0]) % (2 * np.pi)) * (n / (2 * np.pi))
    order = np.argsort(a)
    a, fr = a[order], np.asarray(free, bool)[order]
    j = np.arange(n)
    hi = np.searchsorted(a, j) % a.size
    lo = (hi - 1) % a.size
    d_hi = np.abs((a[hi] - j + n / 2) % n - n / 2)
    d_lo = np.abs((a[lo] - j + n / 2) % n - n / 2)
    return np.where(d_hi < d_lo, fr[hi], fr[lo])


def _square_completion(outline_px, free, three, labels, signal, mode, lab, p):
    """A cut outline named a plate that is a cut {100} view (a generator of interior-fit requests).

    A square that loses a corner to a neighbour is a pentagon, and the plate family, free in its edge
    ratio and of three-fold symmetry, fits such an asymmetric outline better than any centrally
    symmetric Wulff outline; its three-fold completion is a hexagon the plates fit too. Completed by
    central symmetry it is the square again. As :func:`_completed` takes the clearly smaller of the
    two- and three-fold completions first (a body of either symmetry that a straight cut took a piece
    of is the smallest such outline holding its true edges), the two-fold completion is taken here where
    it is smaller than the three-fold one ``three`` by ``COMPLETION_AREA_MARGIN``, adds no more than a
    straight cut of a two-fold body could have removed, and is a body seen along [100] (an outline of
    four-fold symmetry, which no plate has). Returns the habit tuple of
    :func:`classify_grain_steps` of that completion, or None (classify-habit 2.7).
    """
    vis = en.polygon_centroid(outline_px)[1]
    q = en.complete_by_symmetry(outline_px, free, 2)
    area = en.polygon_centroid(q)[1]
    if not (area < (1.0 - COMPLETION_AREA_MARGIN) * en.polygon_centroid(three)[1] and area <= 2.0 * vis):
        return None
    contour2, get_interior = en.grain_evidence_lazy(labels, signal, mode, q, lab, p["erode_px"])
    if contour2 is None or len(contour2) < 8:
        return None
    # the outline first (no interior read): a completion that is no {100} view by its outline is none
    outline2 = outline_evidence(contour2, p)
    first = yield from classify_grain_steps(contour2, None, p, outline=outline2)
    if not (first[0] in POLYHEDRAL_HABITS and first[3].face == "100"):
        return None
    res = yield from classify_grain_steps(contour2, get_interior if p["interior"] else None, p, outline=outline2)
    if res[0] in POLYHEDRAL_HABITS and res[3].face == "100":
        return res
    return None


def right_angled_edges(outline_px, free) -> bool:
    """Whether a split grain's true edges meet at right angles rather than at 60 or 120 degrees.

    Parameters
    ----------
    outline_px : array_like, shape (k, 2)
        Closed outline (px).
    free : array_like of bool, shape (k,)
        Vertices on the grain's true edges (:func:`free_edge`).

    Returns
    -------
    bool
        The outline, sampled every :data:`EDGE_CHORD_PX` along its length, gives chords on the true
        edges; weighted by length, their directions (modulo 180 degrees) are histogrammed and the
        dominant one found (1-degree bins summed over +-6). True where the chords within
        :data:`EDGE_FAMILY_DEG` of the dominant direction + 90 degrees hold at least
        :data:`RIGHT_ANGLE_SHARE` of the length and more than those within it of + 60 and + 120.

    Notes
    -----
    A twinned {111} plate's edges run in three directions 60 degrees apart (a triangle, a hexagon with
    alternating edges), a {100} face's in two at right angles. Two or three cubes left joined (EMPS
    f664201c62, a packed SEM field) made an outline whose three-fold completion a triangular plate
    fitted at score 1.0; their edges meet at right angles. On the hard survey's split plates completed
    three-fold the right-angle share is 0-0.16 against 0.2-0.6 at 60/120 degrees.
    """
    c = np.asarray(outline_px, float)
    f = np.asarray(free, bool)
    seg = np.diff(np.vstack([c, c[:1]]), axis=0)
    s = np.r_[0.0, np.cumsum(np.hypot(seg[:, 0], seg[:, 1]))]
    if s[-1] <= 0:
        return False
    n = max(int(s[-1] / EDGE_CHORD_PX), 8)
    t = np.linspace(0.0, s[-1], n, endpoint=False)
    x = np.interp(t, s, np.r_[c[:, 0], c[0, 0]])
    y = np.interp(t, s, np.r_[c[:, 1], c[0, 1]])
    on = f[np.minimum(np.searchsorted(s, t, side="right") - 1, len(c) - 1)]
    dx, dy = np.roll(x, -1) - x, np.roll(y, -1) - y
    w = np.hypot(dx, dy) * (on & np.roll(on, -1))
    if not w.sum() > 0:
        return False
    ang = np.degrees(np.arctan2(dy, dx)) % 180.0
    hist = np.bincount(ang.astype(int) % 180, weights=w, minlength=180)
    dominant = int(np.argmax(sum(np.roll(hist, k) for k in range(-6, 7))))

    def share(offset):
        d = np.abs((ang - dominant - offset + 90.0) % 180.0 - 90.0)
        return float(w[d <= EDGE_FAMILY_DEG].sum() / w.sum())

    right = share(90.0)
    return right >= RIGHT_ANGLE_SHARE and right > share(60.0) + share(120.0)


def _completed(outline_px, free, smooth_free, labels, signal, mode, lab, p, current, plates=True):
    """Habit of a split grain from the outline its true edges imply (a generator of interior-fit requests).

    The true edges are completed by two-fold, three-fold and six-fold rotational symmetry
    (:func:`engine.complete_by_symmetry`). A completion is a candidate when

    - it adds no more than a straight cut of a ``fold``-fold body could have taken away: a cut
      that removes a share s < 1 / fold of the body (the premise of the completion) leaves
      1 - s of its area, so the completed area is below fold / (fold - 1) times the visible one;
    - its model explains it about as well as a smooth curve explains the true edges (within
      ``smooth_margin``; a lumpy grain completed by symmetry looks polyhedral);
    - a three-fold completion is a plate with a flat interior (a twinned plate) whose true edges do not
      meet at right angles (:func:`right_angled_edges`), a six-fold one a
      truncated octahedron or an octahedron resting on a {111} face, or a hexagonal plate (the
      outlines of six-fold symmetry; a cube has no {111} face to rest on);
    - a two-fold completion is no body on {111} or along [110] (:data:`FLAT_PLATE_VIEWS`) with a
      flat interior (classify-habit 2.6: a cut plate with three long and three short edges, made
      centrally symmetric, fitted a cuboctahedron on an edge; its three-fold completion comes next).

    The two-fold and three-fold completions are tried in order of area, the clearly smaller one
    (by ``COMPLETION_AREA_MARGIN``) first: a cut square completed three-fold, or a cut triangle
    completed by central symmetry, grows far beyond its true edges, and the plate family, free in
    its edge ratio, fits any three-fold hull of straight edges. An outline of six-fold symmetry is
    also centrally symmetric, so the six-fold completion is the more constrained of the two: it
    replaces the two-fold one where its model fits its outline better (a cut regular hexagon,
    an octahedron on {111}, completed by central symmetry about a centre a little off becomes a
    hexagon with unequal edges). The habit of the cut outline itself (``current``, where it is not
    irregular) stays where it fits its outline at least as well as the chosen completion (a grain
    cut along its true contact keeps the outline it has). Returns ``current`` where no
    completion is a candidate. ``plates`` False (the interior is known not to be flat) leaves the
    three-fold completion out: it could only stand for a flat plate.
    """
    vis = en.polygon_centroid(outline_px)[1]
    bar = current[2]["outline_misfit_ratio"] if current[0] != "irregular" else math.inf

    def candidate(fold, q, beat):
        if en.polygon_centroid(q)[1] > vis * fold / (fold - 1):
            return None
        if fold == 3 and right_angled_edges(outline_px, free):
            return None  # edges at right angles: cubes left joined, no twinned plate
        contour2, get_interior = en.grain_evidence_lazy(labels, signal, mode, q, lab, p["erode_px"])
        if contour2 is None or len(contour2) < 8:
            return None
        # the outline alone first: the interior fit only moves the outline misfit up, so a
        # completion whose outline misfit does not beat ``beat`` cannot win (and no interior is read)
        outline2 = outline_evidence(contour2, p)
        if not _outline_misfit_ratio(outline2) < beat:
            return None
        interior2 = get_interior() if p["interior"] else None
        res = yield from classify_grain_steps(contour2, interior2, p, outline=outline2)
        if res[0] == "irregular" or res[2]["outline_misfit_ratio"] ** 2 - smooth_free ** 2 > p["smooth_margin"]:
            return None
        if fold == 3 and not (res[0] in TABULAR_HABITS and interior2 is not None
                              and (yield from _flat_steps(contour2, interior2, p))):
            return None
        if fold == 2 and res[0] in POLYHEDRAL_HABITS and res[3].face in FLAT_PLATE_VIEWS \
                and np.isfinite(res[3].relief_chi2) and res[3].relief_chi2 < p["facet_chi2_min"] \
                and not (res[3].facet_chi2 >= p["facet_chi2_min"]):
            # a flat interior rules out a body on {111} or on an edge ([110]): the two-fold completion of a
            # cut plate (three long and three short edges made centrally symmetric) is no such body; the
            # three-fold completion comes next
            return None
        if fold == 6 and not ((res[0] in ("cuboctahedron", "octahedron") and res[3].face == "111")
                              or res[0] == "tabular_hexagon"):
            return None
        return res

    done = [(en.complete_by_symmetry(outline_px, free, fold), fold) for fold in ((2, 3) if plates else (2,))]
    if plates and en.polygon_centroid(done[1][0])[1] < \
            (1.0 - COMPLETION_AREA_MARGIN) * en.polygon_centroid(done[0][0])[1]:
        done = done[::-1]
    done_by = {fold: q for q, fold in done}
    best, best_fold = None, 0
    for q, fold in done:
        best = yield from candidate(fold, q, bar)
        if best is not None:
            best_fold = fold
            break
    if best is None or (best_fold == 2 and not (best[0] in POLYHEDRAL_HABITS and best[3].face == "100")
                        and best[2]["outline_misfit_ratio"] ** 2 > p["tolerance"]):
        # six-fold only where the two-fold completion is no view along [100] (a cut square completed
        # two-fold is a cube on {100}, an outline of four-fold symmetry that no six-fold one can be)
        # and does not already fit its model within the tolerance of a perfect fit
        beat = bar if best is None else min(bar, best[2]["outline_misfit_ratio"])
        # the centre of the body is that of the two-fold completion (a centrally symmetric outline's
        # centroid), to within the search's first grids
        six = yield from candidate(6, en.complete_by_symmetry(outline_px, free, 6,
                                                              centre=en.polygon_centroid(done_by[2])[0]), beat)
        if six is not None and (best is None or
                                six[2]["outline_misfit_ratio"] < best[2]["outline_misfit_ratio"]):
            best, best_fold = six, 6
    if best is None or best[2]["outline_misfit_ratio"] >= bar:
        return current
    habit, score, ev, fit = best
    ev["habit_note"] = f"split grain: outline completed by its {best_fold}-fold symmetry" + \
        (f"; {ev['habit_note']}" if ev["habit_note"] else "")
    return habit, score, ev, fit


def _outline_misfit_ratio(outline) -> float:
    """Best outline misfit over the Wulff, plate and rod families, in outline-noise units.

    ``outline`` is the :func:`outline_evidence` of a closed outline.
    """
    match, ((d_plate, _, _), (d_rod, _, _)) = outline
    d_wulff = float(match.dist[match.valid].min())
    return min(d_wulff, d_plate, d_rod) / match.tau


def _grain_steps(frame, i, outline_px, labels, signal, mode, split, measured, p, evidence=None):
    """Habit, score, evidence columns and fit of grain row ``i`` (None if its outline is too small).

    A generator of interior-fit requests (:func:`classify_grain_steps`); see :func:`classify_frame`.
    ``evidence`` is ``(contour, interior, outline, outline_fit)`` of the grain where the caller has them
    (:func:`engine.grain_evidence_lazy`, :func:`outline_evidence`, :func:`outline_batch.outline_fits`;
    ``outline`` or ``outline_fit`` may be None); else they are computed here.
    """
    g = frame.grains
    lab = int(frame.grains["label"][i])
    if evidence is None:
        contour, interior = en.grain_evidence_lazy(labels, signal, mode, outline_px, lab, p["erode_px"])
        outline = outline_fit = None
    else:
        contour, interior, outline, outline_fit = evidence
    if contour is None or len(contour) < 8:
        return None
    hull = (float(g["solidity"][i]), float(g["feret_ratio"][i])) if measured else None
    if hull is not None and not all(np.isfinite(hull)):
        hull = None
    habit, score, ev, fit = yield from classify_grain_steps(contour, interior if p["interior"] else None, p,
                                                            hull=hull, split=bool(split[i]), outline=outline,
                                                            outline_fit=outline_fit)
    fchi0 = ev["facet_chi2"] if np.isfinite(ev["facet_chi2"]) else 0.0
    if split[i] and (habit == "irregular" or (habit in POLYHEDRAL_HABITS and fchi0 < p["facet_chi2_min"])
                     or (habit == "octahedron" and score <= 0.5)):
        # cut from a touching neighbour: where its true edges are a smooth curve within the
        # outline noise (and the interior shows no facets) it is a rounded grain, whatever
        # its cut outline resembles, with no corners to complete; else, where the cut outline
        # fits nothing, judge the outline its true edges imply (a symmetric body)
        free = free_edge(labels, outline_px, lab)
        n_ang = p["n_angles"]
        keep = free_samples(contour, free, n_ang)
        if outline is not None and outline[0].signature.size == n_ang:
            # the outline's match holds its signature and area (the same numbers: match_outline and
            # outline_batch.match_outlines take them as radial_signature and polygon_centroid do)
            area0, sig0 = outline[0].area, outline[0].signature
        else:
            area0, sig0 = en.polygon_centroid(contour)[1], en.radial_signature(contour, n_ang)
        tau = max(p["outline_noise_px"] / math.sqrt(area0), p["outline_noise_floor"])
        smooth_free = en.smooth_residual(sig0, keep=keep) / tau
        if keep.mean() >= 0.5 and smooth_free <= 1.0:
            if habit != "irregular":
                habit, score = "irregular", _margin(1.0, smooth_free, 0.25)
            ev["outline_class"] = "smooth"
            ev["habit_note"] = ("rounded: the true edges of this split grain are a smooth curve (harmonics up "
                                "to 5) within the outline noise")
            free = None
    elif split[i] and habit in TABULAR_HABITS:
        # a plate cut from a neighbour: a cut corner looks like a short edge; take the edge ratio
        # from the outline its true edges imply (three-fold symmetry)
        free = None
        edge = free_edge(labels, outline_px, lab)
        q = en.complete_by_symmetry(outline_px, edge, 3)
        square = yield from _square_completion(outline_px, edge, q, labels, signal, mode, lab, p)
        if square is not None:
            habit, score, ev, fit = square
            ev["habit_note"] = ("split grain: outline completed by its 2-fold symmetry, clearly smaller than its "
                                "3-fold completion" + (f"; {ev['habit_note']}" if ev["habit_note"] else ""))
        else:
            contour2, interior2 = en.grain_evidence(labels, signal, mode, q, lab, p["erode_px"])
            if contour2 is not None and len(contour2) >= 8:
                res = yield from classify_grain_steps(contour2, None, p)
                if res[0] in TABULAR_HABITS:
                    habit, score, ev, fit = res
                    ev["habit_note"] = "split plate: edge ratio of the outline completed by its 3-fold symmetry"
    else:
        free = None
    if free is not None and habit != "irregular" and (
            ev["outline_misfit_ratio"] ** 2 <= p["tolerance"]
            or ev["outline_misfit_ratio"] ** 2 - smooth_free ** 2 <= p["smooth_margin"]):
        # the cut outline fits its model within the tolerance of a perfect fit, or as well as a
        # smooth curve fits its true edges (the test a completion must pass): a grain cut along its
        # true contact, which no completion could explain better
        free = None
    if free is not None:
        relief = max(np.nan_to_num(ev["facet_chi2"]), np.nan_to_num(ev["relief_chi2"]))
        habit, score, ev, fit = yield from _completed(outline_px, free, smooth_free, labels, signal, mode, lab,
                                                      p, (habit, score, ev, fit),
                                                      plates=not relief >= p["facet_chi2_min"])
    return habit, score, ev, fit


def outline_ecd_px(contour, geometry=None) -> float:
    """Equivalent circle diameter (px) of the area a grain's outline polygon encloses (ISO 9276-6); inf for a
    missing outline or one of under 3 points (never judged too small here: it has no habit to judge).
    ``geometry`` is ``engine.polygon_centroid(contour)`` where the caller has it."""
    if contour is None or len(contour) < 3:
        return math.inf
    return math.sqrt(4.0 * abs((en.polygon_centroid(contour) if geometry is None else geometry)[1]) / math.pi)


def outline_geometry(contour):
    """``engine.polygon_centroid`` of a grain's outline (pixel coordinates), None for a missing outline or one of
    under 3 points."""
    if contour is None or len(contour) < 3:
        return None
    return en.polygon_centroid(contour)


def classify_frame(frame, params=None) -> dict:
    """Habit, evidence and fit columns for every grain of a frame (see the module docstring)."""
    p = STEP.resolve(params)
    n = frame.n_grains
    cols = {"habit": np.full(n, "irregular", dtype=object), "habit_score": np.zeros(n)}
    for c in STEP.outputs:
        cols[c.name] = np.full(n, "", dtype=object) if c.units == "" else np.full(n, np.nan)
    if n == 0:
        return cols
    if frame.labels is None:
        raise ValueError("classify-habit needs frame.labels: run a segment step first")
    contours = frame_contours(frame)
    signal, mode = interior_signal(frame)
    labels = np.asarray(frame.labels)
    split = np.asarray(frame.grains.get("split", np.zeros(n, bool)), bool)
    g = frame.grains
    measured = "solidity" in g and "feret_ratio" in g
    # the grains' interior fits run in step, GRAINS_IN_STEP at a time: each round's placements of
    # those grains in one solve (a bound on the interiors held at once)
    # the outlines of the grains in step are compared with the library together (outline_evidence_many:
    # the same matches as one grain at a time)
    results = []
    unresolved = set()
    for start in range(0, n, GRAINS_IN_STEP):
        rows = range(start, min(start + GRAINS_IN_STEP, n))
        # a grain under min_resolved_px is not judged: no evidence is read for it
        # each outline's centroid and area once, for its size and its interior
        geo = [outline_geometry(contours[i]) for i in rows]
        small = {k for k, i in enumerate(rows) if outline_ecd_px(contours[i], geo[k]) < p["min_resolved_px"]}
        unresolved.update(start + k for k in small)
        evidence = [(None, None) if k in small else
                    en.grain_evidence_lazy(labels, signal, mode, contours[i], int(g["label"][i]), p["erode_px"],
                                           geo[k])
                    for k, i in enumerate(rows)]
        usable = [k for k, (contour, _) in enumerate(evidence) if contour is not None and len(contour) >= 8]
        found = outline_evidence_many([evidence[k][0] for k in usable], p)
        outlines = dict(zip(usable, found))
        # and their outline-only fits (outline_batch.outline_fits: the same fits as one at a time)
        fits = {} if any(o is None for o in found) else \
            dict(zip(usable, outline_batch.outline_fits([o[0] for o in found], en.fit_options(p)["library"],
                                                        p["tolerance"])))
        results += en.run_together([_grain_steps(frame, i, contours[i], labels, signal, mode, split, measured, p,
                                                 evidence=(*evidence[k], outlines.get(k), fits.get(k)))
                                    for k, i in enumerate(rows)])
    for i, res in enumerate(results):
        if res is None:
            cols["habit_note"][i] = (f"under {p['min_resolved_px']:g} px across: too small to resolve a habit"
                                     if i in unresolved else "outline too small")
            continue
        habit, score, ev, fit = res
        cols["habit"][i], cols["habit_score"][i] = habit, score
        for k, v in ev.items():
            cols[k][i] = v
        cols["fit_alpha"][i], cols["fit_alpha_lo"][i], cols["fit_alpha_hi"][i] = fit.alpha, fit.alpha_lo, fit.alpha_hi
        cols["fit_note"][i] = fit.note
        cols["rest_face"][i] = fit.face
        cols["fit_rotation_deg"][i] = fit.rotation_deg
        cols["outline_misfit"][i] = fit.outline_misfit
    return cols


@hookimpl
def grainhabit_classify(frame, params):
    """Add ``habit``, ``habit_score``, the evidence and the fit columns; see the module docstring."""
    return frame.with_columns(**classify_frame(frame, params))


@hookimpl
def grainhabit_prepare_worker(steps):
    """Build the model library of this step's parameters and the plate/rod signatures once per worker."""
    if STEP.name not in steps:
        return
    lib = en.fit_options(STEP.resolve(steps[STEP.name]))["library"]
    for level in range(len(en.ROUNDING_LEVELS)):
        _families_stacked(lib.signatures.shape[-1], level)
