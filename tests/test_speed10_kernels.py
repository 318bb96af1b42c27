"""Tenth-round speed kernels tested against the slower forms they replace (same bits).

flatten-background's trial smoothing scales share one raw pass (``flatten_background.raw_levels``:
normalisation percentiles and noise model); the reference makes that pass at every scale. Test frames:
noisy discs drawn here (invented test data).
"""
import numpy as np

from grainhabit.plugins.preprocess import flatten_background as fb
from grainhabit.plugins.preprocess import smoothing_scale as ss

from builders import noisy_discs


def _same_levels(a, b):
    assert a.keys() == b.keys()
    for k in a:
        if isinstance(a[k], np.ndarray):
            assert np.array_equal(a[k], b[k]), k
        elif isinstance(a[k], dict):  # per-scale scores and shares (a share not measured is NaN in both)
            _same_levels(a[k], b[k])
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
