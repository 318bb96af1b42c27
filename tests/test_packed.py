"""Packed fields: particles covering the frame with thin gaps, found and counted.

The frames are drawn here (skimage.draw discs on a hexagonal lattice, blur and
noise); they are invented test data. References: handbook geometry (the
hexagonal lattice: rows ``sqrt(3)/2`` of the spacing apart; the area of a disc
``pi r^2``; the share ``pi / (2 sqrt(3)) (2r / a)^2`` of the plane that discs of
radius ``r`` on a hexagonal lattice of spacing ``a`` cover) and the
percentile of the distance map inside a disc.
"""

import numpy as np
import pytest
from scipy import ndimage as ndi
from skimage.draw import disk, rectangle

from grainhabit.plugins.segment import packed
from builders import run_chain

SIZE = 384


def hexagonal_centres(radius, gap, size=SIZE, jitter=0.0, seed=0):
    """Centres of discs of ``radius`` on a hexagonal lattice with ``gap`` px between neighbours."""
    rng = np.random.default_rng(seed)
    a = 2 * radius + gap
    centres = []
    for i, y in enumerate(np.arange(-a, size + a, a * np.sqrt(3) / 2)):
        for x in np.arange(-a, size + a, a) + (a / 2 if i % 2 else 0.0):
            centres.append((y + rng.normal(0, jitter), x + rng.normal(0, jitter)))
    return centres


def draw_discs(centres, radii, bright=True, size=SIZE, seed=0, noise=0.03, background=0.2, level=0.8):
    """Discs at ``level`` on ``background`` (swapped for dark particles), blurred 1 px, Gaussian noise, 8 bit."""
    img = np.zeros((size, size))
    for (y, x), r in zip(centres, radii):
        rr, cc = disk((y, x), r, shape=img.shape)
        img[rr, cc] = 1.0
    img = ndi.gaussian_filter(img, 1.0)
    lo, hi = (background, level) if bright else (level, background)
    img = lo + (hi - lo) * img + np.random.default_rng(seed).normal(0, noise, img.shape)
    return np.clip(img * 255, 0, 255).astype(np.uint8)


def interior_truth(centres, radii, size=SIZE):
    """The discs lying wholly inside the frame (1 px clear of the edge)."""
    return [(y, x, r) for (y, x), r in zip(centres, radii)
            if r + 1 <= y <= size - r - 2 and r + 1 <= x <= size - r - 2]




def test_inscribed_radius_of_a_disc():
    # handbook geometry: the share of a disc farther than x from its rim is ((r - x) / r)^2, so the 95th
    # percentile of the distance map is (1 - sqrt(0.05)) r and inscribed_radius gives r back
    r = 40
    m = np.zeros((101, 101), bool)
    m[disk((50, 50), r)] = True
    d = ndi.distance_transform_edt(m)
    assert packed.inscribed_radius(d, m) == pytest.approx(r, rel=0.03)


@pytest.mark.parametrize("bright", [True, False])
def test_hexagonal_packing_found_and_counted(bright):
    radius, gap = 16, 4
    centres = hexagonal_centres(radius, gap)
    radii = [radius] * len(centres)
    raw = draw_discs(centres, radii, bright=bright)
    field = packed.packed_field(raw, min_area=30)
    assert field.packed, field.reason
    assert field.bright is bright
    # handbook: discs of radius r on a hexagonal lattice of spacing a cover pi / (2 sqrt 3) (2r / a)^2
    cover = np.pi / (2 * np.sqrt(3)) * (2 * radius / (2 * radius + gap)) ** 2
    assert field.cover == pytest.approx(cover, abs=0.05)
    lab = field.labels
    inside = interior_truth(centres, radii)
    hit = {int(lab[int(round(y)), int(round(x))]) for y, x, _ in inside}
    assert 0 not in hit and len(hit) == len(inside)   # every whole disc found, each by its own label
    areas = np.bincount(lab.ravel())[sorted(hit)]
    # handbook: the area of a disc of radius 16 is pi 16^2 = 804 px; the edge drawn at half height of a 1 px blur
    assert np.median(areas) == pytest.approx(np.pi * radius ** 2, rel=0.08)


def test_packing_under_uneven_illumination():
    # an SEM's shading: the frame's level falls by up to 1.0 from the centre to the corners (a Gaussian dome of
    # sd 120 px, more than the particles' own contrast of 0.6); the packing is found all the same
    radius, gap = 16, 4
    centres = hexagonal_centres(radius, gap)
    radii = [radius] * len(centres)
    raw = draw_discs(centres, radii, bright=True, noise=0.02).astype(float) / 255.0
    yy, xx = np.mgrid[0:SIZE, 0:SIZE] - SIZE / 2
    shaded = raw - 1.0 * (1.0 - np.exp(-(yy ** 2 + xx ** 2) / (2 * 120.0 ** 2)))
    field = packed.packed_field(shaded, min_area=30)
    assert field.packed, field.reason
    lab = field.labels
    inside = interior_truth(centres, radii)
    hit = {int(lab[int(round(y)), int(round(x))]) for y, x, _ in inside}
    assert 0 not in hit and len(hit) == len(inside)
    areas = np.bincount(lab.ravel())[sorted(hit)]
    assert np.median(areas) == pytest.approx(np.pi * radius ** 2, rel=0.1)


def test_packing_through_the_step():
    radius, gap = 14, 3
    centres = hexagonal_centres(radius, gap, jitter=0.7, seed=3)
    radii = list(np.random.default_rng(3).normal(radius, 0.7, len(centres)))
    raw = draw_discs(centres, radii, seed=3)
    out = run_chain(raw)
    assert any("packed field" in n for n in out.notes)
    inside = interior_truth(centres, radii)
    found = {int(out.labels[int(round(y)), int(round(x))]) for y, x, _ in inside}
    assert 0 not in found and len(found) == len(inside)
    # switched off, the step takes the usual path
    off = run_chain(raw, seg_params={"packed_fields": False})
    assert not any("packed field" in n for n in off.notes)


def test_scattered_grains_are_not_a_packed_field():
    rng = np.random.default_rng(5)
    centres = [tuple(rng.uniform(20, SIZE - 20, 2)) for _ in range(40)]
    raw = draw_discs(centres, [10] * len(centres), seed=5)
    field = packed.packed_field(raw, min_area=30)
    assert not field.packed
    assert field.labels.max() == 0


def test_crossing_rods_are_not_a_packed_field():
    # dense dark rods on a bright support: the support's pockets are the thick class, but not round
    rng = np.random.default_rng(7)
    img = np.full((SIZE, SIZE), 0.8)
    for _ in range(60):
        y, x = rng.uniform(0, SIZE, 2)
        if rng.random() < 0.5:
            rr, cc = rectangle((y, x), extent=(8, 90), shape=img.shape)
        else:
            rr, cc = rectangle((y, x), extent=(90, 8), shape=img.shape)
        img[rr, cc] = 0.2
    raw = np.clip((ndi.gaussian_filter(img, 1.0) + rng.normal(0, 0.03, img.shape)) * 255, 0, 255).astype(np.uint8)
    assert not packed.packed_field(raw, min_area=30).packed


@pytest.mark.parametrize("dtype", [np.uint16, np.float32])
def test_block_average_equals_the_mean_of_blocks(dtype):
    # reference: numpy's mean over the reshaped blocks, on a frame whose side is no multiple of the block
    rng = np.random.default_rng(2)
    img = (rng.random((203, 157)) * 60000).astype(dtype)
    f = 4
    ref = img[:200, :156].astype(np.float64).reshape(50, 4, 39, 4).mean(axis=(1, 3))
    np.testing.assert_allclose(packed.block_average(img, f), ref, rtol=1e-12)


def test_packing_of_particles_with_bright_rims():
    # an SEM's edge effect: each particle a bright rim (5 px) round a darker middle, the middle only a little
    # brighter than the gaps; on every other particle the rim is broken (an open ring). The plain cut takes
    # the rims for particles and fails; the field is found all the same, one part per particle, of about
    # the disc's area pi r^2 (handbook)
    radius, gap = 16, 4
    centres = hexagonal_centres(radius, gap)
    img = np.full((SIZE, SIZE), 0.15)
    yy, xx = np.mgrid[0:SIZE, 0:SIZE]
    for k, (y, x) in enumerate(centres):
        d = np.hypot(yy - y, xx - x)
        img[d <= radius] = 0.45
        rim = (d <= radius) & (d > radius - 5)
        if k % 2:
            rim &= ~((xx - x > 0) & (np.abs(yy - y) < 4))  # an opening in the ring
        img[rim] = 0.9
    img = ndi.gaussian_filter(img, 1.0) + np.random.default_rng(5).normal(0, 0.02, img.shape)
    raw = np.clip(img * 255, 0, 255).astype(np.uint8)
    field = packed.packed_field(raw, min_area=30)
    assert field.packed, field.reason
    assert field.bright
    inside = interior_truth(centres, [radius] * len(centres))
    hit = {int(field.labels[int(round(y)), int(round(x))]) for y, x, _ in inside}
    assert 0 not in hit and len(hit) == len(inside)
    areas = np.bincount(field.labels.ravel())[sorted(hit)]
    assert np.median(areas) == pytest.approx(np.pi * radius ** 2, rel=0.15)


def raft_frame(radius=9, gap=3, rows=6, cols=8, gap_level=0.65, size=256, seed=0):
    """A preprocessed frame (background 0, particles 1): an island of discs on a hexagonal lattice whose
    thin gaps lie at ``gap_level`` (a raft: one object to any threshold below that level)."""
    a = 2 * radius + gap
    centres = [(60 + i * a * np.sqrt(3) / 2, 40 + j * a + (a / 2 if i % 2 else 0.0))
               for i in range(rows) for j in range(cols)]
    discs = np.zeros((size, size), bool)
    for y, x in centres:
        rr, cc = disk((y, x), radius, shape=discs.shape)
        discs[rr, cc] = True
    island = ndi.binary_closing(discs, np.ones((2 * gap + 3,) * 2, bool))
    img = np.where(discs, 1.0, np.where(island, gap_level, 0.0))
    img = ndi.gaussian_filter(img, 1.0) + np.random.default_rng(seed).normal(0, 0.03, img.shape)
    return img.astype(np.float32), centres


def test_raft_divided_into_its_particles():
    # 48 discs of radius 9 px on a hexagonal lattice (3 px gaps at 0.65 of the particles' level), one object
    # to the threshold: divided into one part per disc, each of about pi r^2 (handbook geometry)
    from grainhabit.plugins.segment.segment_grains import segment_image
    img, centres = raft_frame()
    labels, split, notes = segment_image(img, 1.0)
    hit = {int(labels[int(round(y)), int(round(x))]) for y, x in centres}
    assert 0 not in hit and len(hit) == len(centres) == int(labels.max())
    assert any("raft" in n for n in notes)
    areas = np.bincount(labels.ravel())[1:]
    assert np.median(areas) == pytest.approx(np.pi * 9 ** 2, rel=0.2)
    assert split.all()


def test_large_grain_with_texture_is_no_raft():
    # one square grain of 120 px with a mottled interior (smoothed noise of sd 0.1): no valleys to divide at
    from grainhabit.plugins.segment.segment_grains import segment_image
    rng = np.random.default_rng(1)
    img = np.zeros((256, 256))
    img[60:180, 60:180] = 1.0 + ndi.gaussian_filter(rng.normal(0, 0.3, (120, 120)), 2.0)
    img = ndi.gaussian_filter(img, 1.0) + rng.normal(0, 0.03, img.shape)
    labels, _, notes = segment_image(img.astype(np.float32), 1.0)
    assert labels.max() == 1
    assert not any("raft" in n for n in notes)
