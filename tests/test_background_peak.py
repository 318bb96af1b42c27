"""The background level and noise when grains cover most of the frame (packed fields).

Frames are drawn by the tests (invented data): a hexagonal lattice of discs whose area fraction is
known from handbook geometry, ``pi r^2 / ((sqrt(3) / 2) d^2)`` for discs of radius ``r`` on a
triangular lattice of spacing ``d``.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage as ndi
from skimage.draw import disk

from grainhabit.frame import FrameData
from grainhabit.plugins.common.image_stats import histogram_mode
from grainhabit.plugins.preprocess import background_peak as bp
from grainhabit.plugins.preprocess import flatten_background as pp
from grainhabit.plugins.segment import segment_grains as segment


def packed_discs(spacing=32, radius=14, size=320, background=0.2, level=0.8, noise=0.02, bright=True, seed=0):
    """A frame of discs on a triangular lattice; returns the frame, the centres and the area fraction."""
    img = np.full((size, size), background)
    centres = []
    row_step = spacing * np.sqrt(3.0) / 2.0
    for i, y in enumerate(np.arange(radius + 2, size - radius - 2, row_step)):
        x0 = radius + 2 + (spacing / 2.0 if i % 2 else 0.0)
        for x in np.arange(x0, size - radius - 2, spacing):
            rr, cc = disk((y, x), radius, shape=img.shape)
            img[rr, cc] = level
            centres.append((y, x))
    img = ndi.gaussian_filter(img, 1.0)  # a little blur, as in any micrograph
    if not bright:
        img = 1.0 - img
    img = img + np.random.default_rng(seed).normal(0.0, noise, img.shape)
    # handbook geometry: area fraction of a triangular lattice of discs
    fraction = np.pi * radius ** 2 / (np.sqrt(3.0) / 2.0 * spacing ** 2)
    return (np.clip(img, 0, 1) * 60000).astype(np.float32), np.array(centres), fraction


def test_packed_lattice_covers_seventy_percent():
    img, centres, fraction = packed_discs()
    assert fraction == pytest.approx(0.694, abs=0.001)
    # the drawn frame agrees with the handbook fraction away from the frame's edge strips
    inner = img[40:-40, 40:-40] > 30000
    assert inner.mean() == pytest.approx(fraction, abs=0.04)


def test_background_peak_finds_the_background_under_packed_grains():
    img, _, _ = packed_discs()
    v = img.ravel() / 60000.0
    # the main mode is the grains' level (they cover most of the frame) ...
    assert histogram_mode(v) == pytest.approx(0.8, abs=0.03)
    # ... the background peak is the drawn background, its noise the drawn noise
    m, s = bp.background_peak(v, 1)
    assert m == pytest.approx(0.2, abs=0.01)
    assert s == pytest.approx(0.02, rel=0.25)
    # dark grains on a bright background: the same with the sides swapped
    m, s = bp.background_peak(1.0 - v, -1)
    assert m == pytest.approx(0.8, abs=0.01)
    assert s == pytest.approx(0.02, rel=0.25)


def test_single_peak_is_not_cut_in_two():
    # background alone (no grains): Otsu's threshold cuts its peak near the middle; the mode stays put
    v = np.random.default_rng(3).normal(0.0, 1.0, 200_000)
    m, s = bp.background_peak(v, 1)
    assert m == pytest.approx(0.0, abs=0.15)
    assert s == pytest.approx(1.0, rel=0.1)


def test_half_width_sigma_ignores_a_long_tail():
    # a normal peak (sd 1) plus a third as many values spread far on the measured side: the half width
    # at half maximum gives sd = FWHM / 2.3548 (handbook, normal distribution); the median absolute
    # deviation of that side is inflated by the tail
    rng = np.random.default_rng(5)
    v = np.concatenate([rng.normal(0.0, 1.0, 150_000), -rng.uniform(0.0, 12.0, 50_000)])
    mad = bp.one_sided_sigma(v, 0.0, -1)
    hw = bp.half_width_sigma(v, 0.0, -1, mad)
    assert mad > 1.5
    assert hw == pytest.approx(1.0, rel=0.1)


@pytest.mark.parametrize("bright", [True, False])
def test_packed_field_flattens_to_background_zero(bright):
    img, _, _ = packed_discs(bright=bright)
    out, pol, _ = pp.flatten(img, 5.0)
    assert pol == ("bright" if bright else "dark")
    truth = np.zeros(img.shape, bool)
    _, centres, _ = packed_discs()
    for y, x in centres:
        rr, cc = disk((y, x), 10, shape=img.shape)
        truth[rr, cc] = True
    gaps = ~ndi.binary_dilation(truth, iterations=7)
    assert abs(float(np.median(out[gaps]))) < 0.05
    assert float(np.median(out[truth])) > 0.8


def test_packed_field_grains_found():
    img, centres, _ = packed_discs()
    out, _, _ = pp.flatten(img, 5.0)
    frame = FrameData(source="packed.tif", sample="s", raw=img, pixel_size_nm=5.0, image=out)
    res = segment.grainhabit_segment(frame=frame, params={})
    labels = res.labels
    hit = {int(labels[int(round(y)), int(round(x))]) for y, x in centres}
    hit.discard(0)
    # every disc found once, nothing else
    assert len(hit) >= 0.95 * len(centres)
    assert labels.max() <= len(centres)


def test_data_bar_is_not_the_background():
    # squares covering most of the frame on a background at 0.5, and a flat black data bar along the
    # bottom edge (12 % of the rows): both the gaps and the bar make peaks below the grains'; the bar's
    # is the lowest and distinct, but lies in a strip, so the background is the gaps' level
    rng = np.random.default_rng(2)
    img = 0.5 + rng.normal(0.0, 0.01, (200, 240))
    for y in range(4, 170, 42):
        for x in range(4, 236, 42):
            img[y:y + 36, x:x + 36] = 0.9 + rng.normal(0.0, 0.01, (36, 36))[: 200 - y, : 240 - x]
    img[176:] = 0.05 + rng.normal(0.0, 0.002, (24, 240))
    assert histogram_mode(img.ravel()) == pytest.approx(0.9, abs=0.02)
    m, s = bp.background_peak(img, 1)
    assert m == pytest.approx(0.5, abs=0.01)
    assert s == pytest.approx(0.01, rel=0.3)
    assert not bp.spread_out(img, np.ones(img.shape, bool), 0.05, 0.002)
    assert bp.spread_out(img, np.ones(img.shape, bool), 0.5, 0.01)



def test_an_illumination_ramp_with_few_small_grains_flattens_whole():
    # The hard survey's renderer (invented data): a bright-field frame with a linear illumination ramp of
    # 0.3 across it, 50 grains of median ECD 80 nm at 5 nm per pixel (16 px; under 2 % of the frame), a
    # scale bar and a letter. A linear ramp is a plane, which the surface's first-order terms fit exactly;
    # Otsu's classes of the block means split the ramp itself in two here, and the narrow clip fitted to
    # one side left the other drifting off by a plane (the right third's background at 0.34 of the grain
    # level before flatten-background 1.9, and a third of the frame taken for one grain). The background must
    # come out flat: the medians of its left and right thirds within 0.05 of the grain level.
    from grainhabit.plugins.synthetic import hard

    hf = hard.hard_field("dark", 1, size=768, pixel_size_nm=5.0, n_grains=50, ecd_nm=80.0, ecd_gsd=1.2,
                         noise=0.02, gradient=0.3, blur_px=1.0, seed=0)
    out, polarity, _ = pp.flatten(hf.field.image, 5.0)
    assert polarity == "dark"
    bg = ~ndi.binary_dilation(hf.field.labels > 0, iterations=3)
    third = out.shape[1] // 3
    left = np.median(out[:, :third][bg[:, :third]])
    right = np.median(out[:, -third:][bg[:, -third:]])
    assert abs(left) < 0.05 and abs(right) < 0.05


def test_tilted_away_tells_a_plane_from_a_bend():
    # Worked example on a 64 x 64 grid of block residuals: the narrow surface differs from the wide one by a
    # plane (a tilt: a plane fits it exactly) and leaves the right half of the blocks off the band, which
    # the wide one keeps: tilted away. The same count with a change shaped like a bump under a cluster of
    # grains (a Gaussian, which no plane explains) is not; nor is a tilt that leaves more blocks in the band.
    rng = np.random.default_rng(0)
    yy, xx = np.mgrid[:64, :64] / 63.0
    wide = rng.normal(0, 0.003, (64, 64))
    tilt = 0.05 * xx
    narrow = wide - tilt + tilt[:, :32].mean()
    assert pp.tilted_away(wide, narrow, -tilt, 0.005)
    bump = 0.05 * np.exp(-((xx - 0.7) ** 2 + (yy - 0.5) ** 2) / 0.02)
    assert not pp.tilted_away(wide, narrow, bump, 0.005)
    assert not pp.tilted_away(narrow, wide, -tilt, 0.005)
