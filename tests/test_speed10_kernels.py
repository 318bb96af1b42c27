"""Tenth-round speed kernels tested against the slower forms they replace (same bits).

- ``classify_habit.best_families`` compares only the family members the spectral lower bound
  cannot rule out (``outline_bound``, the correlation theorem and Parseval's relation); its
  reference compares every member at every shift.

Test outlines: Wulff bodies drawn with scikit-image (``builders.draw_crystal_frame``), plate and
rod prisms, random polygons and the library's own signatures (all invented test data).
"""
import math

import numpy as np

from grainhabit.plugins.habit import classify_habit as cl
from grainhabit.plugins.habit import crystal as cr
from grainhabit.plugins.habit import engine as gr
from grainhabit.plugins.habit import signature as sg
from builders import body_and_rotation, draw_crystal_frame


def _drawn_outline(alpha, face, rot_deg, ecd_px=70.0):
    body, rot = body_and_rotation(alpha, face, rot_deg)
    frame = draw_crystal_frame(body, rot, ecd_px=ecd_px, noise=0.02, seed=1)
    contour, _ = gr.grain_evidence(frame.labels, *cl.interior_signal(frame), cl.frame_contours(frame)[0], 1)
    return contour


def _signatures():
    rng = np.random.default_rng(10)
    sigs = [sg.radial_signature(_drawn_outline(a, f, r), 256)
            for a, f, r in [(1.2, "100", 8.0), (2.6, "111", 40.0), (3.5, "111", 3.0), (1.8, "110", 70.0)]]
    # plates and rods themselves (exact members and in between), squashed and noisy
    for e in (0.0, 0.37, 0.5, 1.0):
        sigs.append(sg.radial_signature(cr.project(cr.tabular_prism(e, 0.1), cr.resting_rotation("111")), 256))
    for asp in (1.6, 3.3, 16.0, 30.0):
        sigs.append(sg.radial_signature(cr.project(cr.rod_prism(asp), cr.resting_rotation("100")), 256))
    lib = gr.model_library()
    for j in rng.integers(0, lib.signatures.shape[1], 12):
        sigs.append(lib.signatures[int(rng.integers(0, 7)), j] * (1 + 0.03 * rng.standard_normal(256)))
    for _ in range(20):                                   # random star-shaped polygons
        k = int(rng.integers(3, 40))
        t = np.sort(rng.uniform(0, 2 * np.pi, k))
        r = rng.uniform(0.3, 1.0, k)
        sigs.append(sg.radial_signature(np.column_stack([r * np.cos(t), r * np.sin(t)]), 256))
    sigs.append(np.full(256, 1.0 / math.sqrt(math.pi)))  # a disc
    return sigs


def test_best_families_equals_the_full_comparison():
    for sig in _signatures():
        for level in range(len(gr.ROUNDING_LEVELS)):
            assert cl.best_families(sig, level) == cl.best_families_reference(sig, level)


def test_best_families_of_a_member_is_that_member():
    _, plate, _, rod = cl.family_signatures(256, 0)
    for fam, k in ((0, 17), (1, 25)):
        sig = (plate if fam == 0 else rod)[0][k]
        got = cl.best_families(sig, 0)[fam]
        assert got[1] == k and got[0] < 1e-7


def test_best_families_of_a_signature_with_nan_takes_the_reference():
    sig = np.full(256, 0.5)
    sig[3] = np.nan
    got, ref = cl.best_families(sig, 0), cl.best_families_reference(sig, 0)
    assert all(math.isnan(g[0]) and math.isnan(r[0]) and g[1:] == r[1:] for g, r in zip(got, ref))
