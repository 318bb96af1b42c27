"""Tenth-round speed kernels tested against the slower forms they replace (same bits).

- ``classify_habit.best_families`` compares only the family members the spectral lower bound
  cannot rule out (``outline_bound``, the correlation theorem and Parseval's relation); its
  reference compares every member at every shift.
- flatten-background's trial smoothing scales share one raw pass (``flatten_background.raw_levels``:
  normalisation percentiles and noise model); the reference makes that pass at every scale.

Test outlines: Wulff bodies drawn with scikit-image (``builders.draw_crystal_frame``), plate and
rod prisms, random polygons and the library's own signatures (all invented test data).
"""
import math

import numpy as np

from grainhabit.plugins.habit import classify_habit as cl
from grainhabit.plugins.habit import crystal as cr
from grainhabit.plugins.habit import engine as gr
from grainhabit.plugins.habit import signature as sg
from grainhabit.plugins.preprocess import flatten_background as fb
from grainhabit.plugins.preprocess import smoothing_scale as ss

from builders import drawn_outline, noisy_discs




def _signatures():
    rng = np.random.default_rng(10)
    sigs = [sg.radial_signature(drawn_outline(a, f, r), 256)
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


def _same_levels(a, b):
    assert a.keys() == b.keys()
    for k in a:
        if isinstance(a[k], np.ndarray):
            assert np.array_equal(a[k], b[k]), k
        else:
            assert a[k] == b[k] or (a[k] != a[k] and b[k] != b[k]), k


def test_frame_levels_with_the_raw_pass_handed_in_are_the_same():
    frame, _ = noisy_discs(seed=4)
    regions = fb.whole_frame_regions(frame)
    first = fb.raw_levels(regions, frame.shape)
    for smooth in (1.0, 2.0, 3.0):
        for polarity in ("auto", "dark"):
            ref = fb.frame_levels(regions, frame.shape, 1.0, smooth_px=smooth, polarity=polarity)
            got = fb.frame_levels(regions, frame.shape, 1.0, smooth_px=smooth, polarity=polarity, raw_pass=first)
            _same_levels(ref, got)


def test_levels_at_best_scale_take_the_raw_pass_once_and_give_the_same_levels(monkeypatch):
    # a noisy frame of wide discs (wider scales tried) and a clean one (one scale)
    for frame in (noisy_discs(seed=5)[0], noisy_discs(noise_sd=2.0, seed=6)[0]):
        regions = fb.whole_frame_regions(frame)
        args = (regions, frame.shape, 1.0, 4000.0, "gaussian", "auto")
        ref = ss.levels_at_best_scale(fb.frame_levels, *args)
        calls = []

        def counted(*a, **k):
            calls.append(1)
            return fb.raw_levels(*a, **k)

        got = ss.levels_at_best_scale(fb.frame_levels, *args, raw_levels=counted)
        _same_levels(ref, got)
        assert len(calls) == 1
    assert len(ref["smooth_scores"]) == 1 and len(
        ss.levels_at_best_scale(fb.frame_levels, fb.whole_frame_regions(noisy_discs(seed=5)[0]),
                                (320, 320), 1.0, 4000.0, "gaussian", "auto")["smooth_scores"]) > 1


def test_flatten_of_a_noisy_frame_is_unchanged_by_the_shared_raw_pass(monkeypatch):
    frame, _ = noisy_discs(seed=7)
    got = fb.flatten(frame, 1.0, smooth_px=None)
    # the reference: every trial scale makes its own raw pass
    real = ss.levels_at_best_scale
    monkeypatch.setattr(ss, "levels_at_best_scale", lambda *a, raw_levels=None, **k: real(*a, **k))
    ref = fb.flatten(frame, 1.0, smooth_px=None)
    assert np.array_equal(got[0], ref[0]) and got[1:] == ref[1:]
