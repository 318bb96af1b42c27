"""The plate and rod family distances of classify-habit from each row's largest correlation (classify_habit.py).

Reference: the previous form of ``classify_habit.best_families``, kept below: its own ``rfft`` of the
signature, the (rows, n) squared distances formed in place in two passes, and their least value per row.
The kernel now takes the spectrum the outline match already made and forms the least distance of a row
from its largest correlation: with n a power of two the scaling by -2 / n is exact and reverses the
order, and adding the row's (|a|^2 + |b|^2) / n rounds monotonically, so fl(-2/n max C + s) is the least
of fl(-2/n C + s) over the shifts. Every result must be equal to the last bit. Signatures: drawn grains
of the three views, perturbed library shapes, a library shape itself (exact ties) and random stars
(invented test data); the match spectra are checked against ``numpy.fft.rfft`` of each signature.
"""
import numpy as np
import pytest

from grainhabit.plugins.habit import classify_habit as cl
from grainhabit.plugins.habit import engine as gr
from grainhabit.plugins.habit import outline_batch as ob
from grainhabit.plugins.habit import signature as sg
from builders import drawn_outline


def _previous_best_families(sig, level=0):
    """best_families before: its own rfft, the distances in place in two passes, the least of each row."""
    a = np.asarray(sig, float)
    spec, sq, cut = cl._families_stacked(a.size, int(level))
    n = a.size
    cc = np.fft.irfft(np.fft.rfft(a)[None, :] * spec, n, axis=1)
    if n & (n - 1) == 0:
        np.multiply(cc, -2.0 / n, out=cc)
        np.add(cc, ((a @ a + sq) / n)[:, None], out=cc)
        d2 = np.maximum(cc.min(axis=1), 0.0)
    else:
        d2 = np.maximum(((a @ a + sq[:, None] - 2.0 * cc) / n).min(axis=1), 0.0)
    return cl.family_minima(d2, cut)


def _star(rng):
    k = int(rng.integers(3, 50))
    t = np.sort(rng.uniform(0, 2 * np.pi, k))
    r = float(rng.uniform(5, 60)) * (1.0 + 0.5 * rng.uniform(-1, 1, k))
    return np.column_stack([r * np.cos(t), r * np.sin(t)])


def _signatures(n, seed):
    rng = np.random.default_rng(seed)
    sigs = [gr.radial_signature(drawn_outline(a, f, r), n)
            for a, f, r in [(1.2, "100", 8.0), (2.6, "111", 40.0), (3.3, "111", 2.0), (1.9, "110", 65.0)]]
    sigs += [gr.radial_signature(_star(rng), n) for _ in range(12)]
    if n == 256:
        lib = gr.model_library()
        for j in rng.integers(0, lib.signatures.shape[1], 8):
            sigs.append(lib.signatures[int(rng.integers(0, 7)), j] * (1 + 0.02 * rng.standard_normal(n)))
        sigs.append(lib.signatures[0, 0].copy())             # a model itself: exact ties between shifts
        _, plate, _, _ = cl.family_signatures(n, 0)
        sigs.append(np.fft.irfft(np.conj(plate[1][3]), n))   # a plate family member itself (distance 0)
    return sigs


@pytest.mark.parametrize("n", [256, 128, 180, 255])
def test_family_distances_equal_the_previous_form(n):
    for sig in _signatures(n, n):
        for level in range(len(gr.ROUNDING_LEVELS)):
            ref = _previous_best_families(sig, level)
            assert cl.best_families(sig, level) == ref
            assert cl.best_families(sig, level, np.fft.rfft(sig)) == ref


def test_match_spectra_are_those_of_each_signature():
    # the spectrum best_families is handed comes from the batched match (one rfft of all signatures,
    # each row transformed on its own) or a one-grain match: numpy.fft.rfft of the signature itself
    lib = gr.model_library()
    rng = np.random.default_rng(4)
    contours = [drawn_outline(1.5, "111", 20.0), drawn_outline(2.0, "100", 5.0)] + \
               [_star(rng) + rng.uniform(-300, 300, 2) for _ in range(20)]
    matches = ob.match_outlines(contours, lib, 1.0, 0.25, 0.003, 1.0, gr.outline_reach(4.0), gr.VIEWS)
    for m in matches:
        assert np.array_equal(cl._spectrum_of(m), np.fft.rfft(m.signature))
    one = gr.match_outline(contours[0], lib, 1.0, 0.25, 0.003, 1.0, within=gr.outline_reach(4.0))
    assert np.array_equal(cl._spectrum_of(one), np.fft.rfft(one.signature))
