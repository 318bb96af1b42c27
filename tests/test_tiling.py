"""Tests of tiled segmentation and label stitching (frames drawn in test_segment; invented data)."""

import numpy as np
from skimage.measure import label as sk_label
from skimage.metrics import contingency_table

from grainhabit.plugins.preprocess import flatten_background as preprocess
from grainhabit.plugins.segment import segment_grains as segment
from grainhabit.plugins.segment import tiling
from builders import draw_faceted_frame


def scattered_grains(n, shape, seed):
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(n):
        out.append((rng.uniform(0, shape[0]), rng.uniform(0, shape[1]), rng.uniform(8, 18),
                    int(rng.choice([0, 3, 4, 6])), rng.uniform(0, 90)))
    return tuple(out)


def test_tile_cores_partition_the_frame():
    cover = np.zeros((500, 333), int)
    for core, tile in tiling.tile_grid(cover.shape, 128, 20):
        cover[core] += 1
        assert tile[0].start <= core[0].start and tile[0].stop >= core[0].stop
    assert (cover == 1).all()


def test_renumber_raster_matches_skimage_order():
    # reference library: skimage.measure.label numbers components in raster order
    rng = np.random.default_rng(3)
    mask = rng.random((60, 80)) > 0.7
    ref = sk_label(mask, connectivity=1)
    scrambled = np.where(ref > 0, (ref * 7919) % 10007 + 1, 0)
    out, old = tiling.renumber_raster(scrambled)
    np.testing.assert_array_equal(out, ref)
    assert len(old) == ref.max()


def test_tiled_equals_untiled():
    shape = (480, 460)
    raw, _ = draw_faceted_frame(shape, grains=scattered_grains(60, shape, seed=4), seed=4)
    image = preprocess.flatten(raw, 5.0)[0]
    params = {"tile_overlap_nm": 500.0}  # 100 px, more than the largest cluster
    untiled, split_u, _ = segment.segment_image(image, 5.0, params)
    tiled, split_t, notes = segment.segment_image(image, 5.0, dict(params, tile_px=140, tile_workers=2))
    assert untiled.max() > 20 and split_u.any()
    assert notes == []
    # same partition: the contingency table is a permutation (here even the numbering agrees)
    table = contingency_table(untiled, tiled).toarray()
    assert ((table[1:, 1:] > 0).sum(axis=1) == 1).all()
    np.testing.assert_array_equal(tiled, untiled)
    np.testing.assert_array_equal(split_t, split_u)


def test_too_small_overlap_is_reported():
    shape = (300, 300)
    raw, _ = draw_faceted_frame(shape, grains=((150, 150, 60, 6, 0.0),), seed=5)
    image = preprocess.flatten(raw, 5.0)[0]
    labels, _, notes = segment.segment_image(image, 5.0, {"tile_px": 140, "tile_overlap_nm": 50.0})
    assert any("tile_overlap_nm" in n for n in notes)
