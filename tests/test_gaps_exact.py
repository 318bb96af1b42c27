"""The windowed dividing lines of gaps.py against the slower form they replaced (kept here as the reference).

The reference is the project's earlier windowed code, which computed scipy's feature transform
(``scipy.ndimage.distance_transform_edt`` with indices) in every window; the fields are invented.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage as ndi

from grainhabit.plugins.segment import gaps

_EIGHT = np.ones((3, 3), bool)


def _lines_near_mask_reference(bodies, mask, reach_px, near_px):
    # the earlier form: the feature transform in every window
    rows, cols = mask.shape
    b = gaps._BLOCK
    zone = gaps.dilate_disk(mask, near_px)
    nby, nbx = -(-rows // b), -(-cols // b)
    padded = np.zeros((nby * b, nbx * b), bool)
    padded[:rows, :cols] = zone
    lab, _ = ndi.label(gaps.block_any(padded, b), structure=_EIGHT)
    out = np.zeros(mask.shape, bool)
    first = int(np.ceil(near_px)) + 3
    for j, box in enumerate(ndi.find_objects(lab), start=1):
        if box is None:
            continue
        by0, bx0 = box[0].start * b, box[1].start * b
        by1, bx1 = min(box[0].stop * b, rows), min(box[1].stop * b, cols)
        own_box = np.repeat(np.repeat(lab[box] == j, b, axis=0), b, axis=1)[:by1 - by0, :bx1 - bx0]
        own_box &= zone[by0:by1, bx0:bx1]
        margin = first
        while True:
            y0, y1 = max(by0 - margin, 0), min(by1 + margin, rows)
            x0, x1 = max(bx0 - margin, 0), min(bx1 + margin, cols)
            win = (slice(y0, y1), slice(x0, x1))
            own = np.zeros((y1 - y0, x1 - x0), bool)
            own[by0 - y0:by1 - y0, bx0 - x0:bx1 - x0] = own_box
            lines, ft = gaps.nearest_body_lines(bodies[win], mask[win], reach_px)
            if (y0, y1, x0, x1) == (0, rows, 0, cols):
                break
            check = own.copy()
            check[1:] |= own[:-1]
            check[:-1] |= own[1:]
            check[:, 1:] |= own[:, :-1]
            check[:, :-1] |= own[:, 1:]
            if ft is not None:
                r, c = np.nonzero(check)
                big = rows + cols
                beyond = np.minimum(np.minimum(r + 1 if y0 > 0 else big, y1 - y0 - r if y1 < rows else big),
                                    np.minimum(c + 1 if x0 > 0 else big, x1 - x0 - c if x1 < cols else big))
                d2 = (ft[0][r, c] - r).astype(np.int64) ** 2 + (ft[1][r, c] - c).astype(np.int64) ** 2
                if np.all(d2 < beyond.astype(np.int64) ** 2):
                    break
            margin *= 2
        out[win] |= lines & own
    return out


def _field(seed, size=200):
    # invented field: blurred grains of random brightness (some faint), touching and apart, noise specks
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[:size, :size]
    image = np.zeros((size, size))
    for _ in range(int(rng.integers(1, 25))):
        cy, cx = rng.uniform(-5, size + 5, 2)
        r = rng.uniform(2, 18)
        image = np.maximum(image, rng.uniform(0.15, 1.2) * (np.hypot(yy - cy, xx - cx) < r))
    image = ndi.gaussian_filter(image, rng.uniform(0.5, 2.5)) + rng.normal(0, rng.uniform(0, 0.05), image.shape)
    return image


@pytest.mark.parametrize("seed", range(40))
def test_gap_lines_equal_the_feature_transform_in_every_window(seed, monkeypatch):
    # reference: the earlier windowed form above (scipy.ndimage.distance_transform_edt in every window), given
    # the same bodies by gap_lines itself
    image = _field(seed)
    for low, high, near in ((0.1, 0.25, 6.0), (0.05, 0.3, 3.5), (0.12, 0.12, 9.0)):
        mask, cores = image > low, image > high
        got = gaps.gap_lines(mask, cores, near_px=near)
        with monkeypatch.context() as m:
            m.setattr(gaps, "_lines_near_mask", _lines_near_mask_reference)
            want = gaps.gap_lines(mask, cores, near_px=near)
        np.testing.assert_array_equal(got, want)
