"""Tests of tiled segmentation and label stitching (frames drawn in test_segment; invented data)."""

import numpy as np
import pytest
from skimage.measure import label as sk_label
from skimage.metrics import contingency_table

from grainhabit.plugins.preprocess import flatten_background as preprocess
from grainhabit.plugins.segment import segment_grains as segment
from grainhabit.plugins.segment import tiling
from grainhabit.chain_tiles import first_pixels
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
    untiled, split_u, notes_u = segment.segment_image(image, 5.0, {})
    # small cores and the smallest halo: many clusters are cut by tile edges and segmented again
    tiled, split_t, notes = segment.segment_image(image, 5.0, {"tile_px": 100, "tile_overlap_nm": 0.0,
                                                               "tile_workers": 2})
    assert untiled.max() > 20 and split_u.any()
    assert notes == notes_u  # no note of pixels lost at tile edges
    # same partition: the contingency table is a permutation (here even the numbering agrees)
    table = contingency_table(untiled, tiled).toarray()
    assert ((table[1:, 1:] > 0).sum(axis=1) == 1).all()
    np.testing.assert_array_equal(tiled, untiled)
    np.testing.assert_array_equal(split_t, split_u)


def test_cluster_larger_than_the_halo_is_segmented_whole():
    # a grain of 120 px across, tiles of 64 px with a 32 px halo: found again in a window of its own
    shape = (300, 300)
    raw, _ = draw_faceted_frame(shape, grains=((150, 150, 60, 6, 0.0), (40, 60, 12, 4, 10.0)), seed=5)
    image = preprocess.flatten(raw, 5.0)[0]
    untiled, split_u, _ = segment.segment_image(image, 5.0, {})
    tiled, split_t, notes = segment.segment_image(image, 5.0, {"tile_px": 64, "tile_overlap_nm": 0.0})
    assert notes == [] and untiled.max() >= 2
    np.testing.assert_array_equal(tiled, untiled)
    np.testing.assert_array_equal(split_t, split_u)


def test_first_pixels_match_numpy_unique():
    # reference: numpy.unique(return_index=True) gives the first row-major index of every value
    rng = np.random.default_rng(8)
    lab = sk_label(rng.random((70, 90)) > 0.6, connectivity=1)
    lab = np.where(lab > 0, (lab * 37) % (lab.max() + 5) + 1, 0)
    ids, first = np.unique(lab.ravel(), return_index=True)
    got = first_pixels(lab)
    np.testing.assert_array_equal(got[ids[ids > 0] - 1], first[ids > 0])
    absent = np.setdiff1d(np.arange(1, lab.max() + 1), ids)
    assert (got[absent - 1] == -1).all()


def _address(delay):
    import time

    from distributed import get_worker

    time.sleep(delay)
    return get_worker().address


def _fan_out_task(n):
    from grainhabit.executors import fan_out

    return fan_out(_address, [(0.3,)] * n)


def _segment_task(image, params):
    return segment.segment_image(image, 5.0, params)


@pytest.fixture(scope="module")
def two_worker_client():
    from distributed import Client, LocalCluster

    cluster = LocalCluster(n_workers=2, threads_per_worker=1, processes=False, dashboard_address=None)
    client = Client(cluster)
    yield client
    client.close()
    cluster.close()


def test_tiles_of_one_frame_run_on_every_worker(two_worker_client):
    # one frame task on a 2-worker cluster: its calls run on both workers, not only its own
    addresses = two_worker_client.submit(_fan_out_task, 6, pure=False).result(timeout=60)
    assert len(addresses) == 6
    assert set(addresses) == set(two_worker_client.scheduler_info()["workers"])


def test_tiled_on_the_cluster_equals_untiled(two_worker_client):
    shape = (480, 460)
    raw, _ = draw_faceted_frame(shape, grains=scattered_grains(60, shape, seed=6), seed=6)
    image = preprocess.flatten(raw, 5.0)[0]
    params = {"tile_overlap_nm": 0.0}
    untiled, split_u, notes_u = segment.segment_image(image, 5.0, params)
    tiled, split_t, notes = two_worker_client.submit(_segment_task, image, dict(params, tile_px=120),
                                                     pure=False).result(timeout=120)
    assert untiled.max() > 20 and notes == notes_u
    np.testing.assert_array_equal(tiled, untiled)
    np.testing.assert_array_equal(split_t, split_u)
