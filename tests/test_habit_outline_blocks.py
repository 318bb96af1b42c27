"""Look-alike windows of the batched outline match taken block by block (plugins/habit/outline_batch.py).

Reference: the previous form of ``outline_batch.match_outlines``, which kept the (pairs, n) distance rows
of every compared (grain, shape) pair, concatenated them, and ran ``engine.candidates_of_rows`` once over
all of them. The rows are now reduced (row minimum and look-alike windows) block by block as each inverse
FFT block is made. Both are row by row, so every shift, distance and valid slot must be equal bit for bit,
whatever the block size (one row, a block edge inside a grain's rows, one block). The one-grain match
``engine.match_outline`` is checked against the batch in tests/test_outline_batch.py; the bound against
brute-force shifts in tests/test_outline_bound.py. Outlines: drawn grains and random star polygons
(invented test data).
"""
import numpy as np
import pytest

from grainhabit.plugins.habit import classify_habit as cl
from grainhabit.plugins.habit import engine as gr
from grainhabit.plugins.habit import outline_batch as ob
from builders import body_and_rotation, draw_crystal_frame


def _outlines(seed):
    """Drawn grains of the three views and random star polygons of many sizes and places (invented)."""
    rng = np.random.default_rng(seed)
    out = []
    for a, f, r, ecd in [(1.0, "100", 3.0, 70.0), (2.3, "111", 11.0, 90.0), (3.5, "111", 5.0, 25.0),
                         (1.8, "110", 20.0, 50.0)]:
        body, rot = body_and_rotation(a, f, r)
        out.append(cl.frame_contours(draw_crystal_frame(body, rot, ecd_px=ecd, noise=0.02, seed=1))[0])
    for _ in range(24):
        k = int(rng.integers(3, 60))
        t = np.sort(rng.uniform(0, 2 * np.pi, k))
        rad = float(rng.uniform(5, 80)) * (1.0 + 0.6 * rng.uniform(-1, 1, k))
        out.append(np.column_stack([rad * np.cos(t), rad * np.sin(t)]) + rng.uniform(-500, 500, 2))
    return out


def _previous_candidates(matches, lib):
    """Shifts, distances and valid slots of every compared pair: all distance rows at once, one windows call."""
    tab = lib.tables
    n = lib.signatures.shape[-1]
    rows, grains = [], []
    for i, m in enumerate(matches):
        r = np.flatnonzero(m.compared.state.comp)
        spec = np.fft.rfft(m.signature)
        rows.append(gr._distance_rows(spec, m.signature @ m.signature, tab.sig_fft[m.level, r],
                                      tab.sig_sq[m.level, r], n))
        grains.append(np.column_stack([np.full(r.size, i), r]))
    d = np.concatenate(rows)
    gi_ri = np.concatenate(grains)
    sh, di, va = gr.candidates_of_rows(d, tab.turn_win[gi_ri[:, 1]], tab.turn_off[gi_ri[:, 1]],
                                       tab.turn_ok[gi_ri[:, 1]])
    return gi_ri, sh, di, va, d.min(axis=1)


@pytest.mark.parametrize("rows_at_once", [1, 97, 256, 100_000])
@pytest.mark.parametrize("within", [0.0, gr.outline_reach(4.0), 200.0])
def test_block_by_block_windows_equal_all_rows_at_once(rows_at_once, within, monkeypatch):
    lib = gr.model_library()
    contours = _outlines(seed=11)
    monkeypatch.setattr(ob, "ROWS_AT_ONCE", rows_at_once)
    got = ob.match_outlines(contours, lib, 1.0, 0.25, 0.003, 1.0, within, gr.VIEWS)
    gi_ri, sh, di, va, least = _previous_candidates(got, lib)
    assert gi_ri.shape[0] > len(contours)                  # several pairs per outline, blocks cut inside grains
    for k, (i, r) in enumerate(gi_ri):
        m = got[i]
        assert np.array_equal(m.shifts[r], sh[k])
        assert np.array_equal(m.dist[r], di[k])
        assert np.array_equal(m.valid[r], va[k])
        assert m.compared.state.dmin[r] == least[k]
    for i, m in enumerate(got):
        # the pairs left out keep the match's empty slots
        left = ~m.compared.state.comp
        assert np.all(np.isinf(m.dist[left])) and not m.valid[left].any() and not m.shifts[left].any()
