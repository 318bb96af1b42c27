"""Outline tracing made faster, tested equal to the kernel it replaces.

The reference below is the crack finder as it stood before (full-frame masks of grain pixels,
kept here, not in the package); label images are drawn (skimage.draw; invented test data) and
random, and the outlines are checked against ``skimage.measure.find_contours`` as the module
describes them.
"""
import numpy as np
import pytest

from grainhabit.plugins.common import contours as co


def _previous_crack_codes(labels):
    """The flat crack codes (pixel * 4 + direction) of the earlier _trace_cracks, sorted."""
    lab = np.pad(labels, 1)
    width = lab.shape[1]
    nz = lab != 0
    horiz = lab[:, :-1] != lab[:, 1:]
    vert = lab[:-1, :] != lab[1:, :]
    i_e = np.flatnonzero(horiz & nz[:, :-1])
    i_w = np.flatnonzero(horiz & nz[:, 1:])
    i_s = np.flatnonzero(vert & nz[:-1, :])
    i_n = np.flatnonzero(vert & nz[1:, :])
    found = [
        (i_e // (width - 1) * width + i_e % (width - 1)) * 4 + 0,
        i_s * 4 + 1,
        (i_w // (width - 1) * width + i_w % (width - 1) + 1) * 4 + 2,
        (i_n + width) * 4 + 3,
    ]
    return np.sort(np.concatenate(found))


def _label_images():
    from skimage.draw import disk, polygon

    rng = np.random.default_rng(7)
    out = []
    for dtype in (np.int32, np.int64, np.uint16):
        lab = np.zeros((120, 150), dtype)
        for i in range(1, 25):
            r, c = rng.integers(0, 120), rng.integers(0, 150)
            if i % 2:
                rr, cc = disk((r, c), rng.uniform(2, 14), shape=lab.shape)
            else:
                rr, cc = polygon(r + rng.normal(0, 9, 5), c + rng.normal(0, 9, 5), shape=lab.shape)
            lab[rr, cc] = i                      # overlaps: touching grains and grains in pieces
        out.append(lab)
    # grains on every border and corner, single pixels, a label with a hole
    lab = np.zeros((9, 11), np.int32)
    lab[0, :3] = 1
    lab[:, -1] = 2
    lab[-1, 0] = 3
    lab[4, 5] = 4
    lab[2:7, 2:7] = 5
    lab[4, 4] = 0
    out.append(lab)
    out.append(rng.integers(0, 4, (40, 50)).astype(np.int32))   # noise: many tiny pieces
    out.append(np.ones((5, 6), np.int32))                       # one grain filling the frame
    out.append(np.array([[0, 1, 1, 0, 2]], np.int32))            # one row
    out.append(np.array([[1], [1], [0], [3]], np.int32))         # one column
    out.append(np.array([[4]], np.int32))                        # one pixel
    return out


@pytest.mark.parametrize("case", range(9))
def test_cracks_equal_the_full_frame_mask_kernel(case):
    lab = _label_images()[case]
    succ, L, x, y, k = co._trace_cracks(lab)
    width = lab.shape[1] + 2
    rows = np.rint(y + 0.5 - 0.5 * co._DROW[k]).astype(np.int64)
    cols = np.rint(x + 0.5 - 0.5 * co._DCOL[k]).astype(np.int64)
    codes = (rows * width + cols) * 4 + k
    assert np.array_equal(codes, _previous_crack_codes(lab))
    assert np.array_equal(np.sort(succ), np.arange(len(succ)))      # a successor permutation
    assert np.array_equal(L, np.pad(lab, 1).ravel()[rows * width + cols])


def test_outlines_follow_skimage_find_contours():
    # reference library: skimage.measure.find_contours(mask, 0.5, fully_connected="high"), the outer
    # contour of each simply connected grain of the drawn frame, as a set of vertices
    from scipy import ndimage as ndi
    from skimage.measure import find_contours

    lab = _label_images()[0]
    outl = co.trace_outlines(lab, window=0)
    checked = 0
    for i in range(1, int(lab.max()) + 1):
        mask = lab == i
        if not mask.any() or ndi.label(mask, np.ones((3, 3)))[1] != 1 or ndi.label(~mask)[1] != 1:
            continue
        ref = max(find_contours(np.pad(mask, 1).astype(float), 0.5, fully_connected="high"), key=len)
        want = {(round(c - 0.5, 6), round(r - 0.5, 6)) for r, c in ref[:-1]}
        got = {(round(a, 6), round(b, 6)) for a, b in outl.raw_xy[outl.offsets[i - 1]:outl.offsets[i]]}
        assert got == want
        checked += 1
    assert checked >= 5


def _previous_rank_cycles(succ):
    """Cycle id and position by pointer jumping, the list ranking over the live members only (before)."""
    n = len(succ)
    root = np.arange(n)
    nxt = succ.copy()
    span = 1
    while span < n:
        root = np.minimum(root, root[nxt])
        nxt = nxt[nxt]
        span *= 2
        if np.array_equal(root[succ], root):
            break
    is_root = root == np.arange(n)
    nxt = np.where(is_root[succ], -1, succ)
    dist = np.where(nxt >= 0, 1, 0)
    cur = nxt.copy()
    while np.any(cur >= 0):
        live = cur >= 0
        dist[live] += dist[cur[live]]
        cur[live] = cur[cur[live]]
    return root, dist


def test_rank_cycles_equal_the_live_member_ranking():
    # random permutations (cycles of every length, fixed points) and the cracks of drawn frames
    rng = np.random.default_rng(3)
    cases = [rng.permutation(n) for n in (1, 2, 3, 17, 1000, 5000)]
    cases += [co._trace_cracks(lab)[0] for lab in _label_images()]
    for succ in cases:
        got, ref = co._rank_cycles(succ), _previous_rank_cycles(succ)
        assert np.array_equal(got[0], ref[0])
        assert np.array_equal(got[1], ref[1])
        # by definition: the root is the smallest member of the cycle, and dist steps along succ from a
        # member reach the end of its list (the member just before the root)
        root, dist = got
        pos = np.arange(len(succ))
        for step in range(int(dist.max())):
            pos = np.where(step < dist, succ[pos], pos)
        assert np.array_equal(succ[pos], root)
        assert np.all(root <= np.arange(len(succ)))
