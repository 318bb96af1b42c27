"""Issue 19 (branch speed23): the thumbnail's block mean of integer frames against numpy's float32 mean.

Reference: ``numpy.mean(axis=(1, 3))`` of the float32 frame in blocks (the form the thumbnail used before),
on invented frames of 8- and 16-bit integers, and the whole thumbnail against that form.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from grainhabit import task


def _reference_thumbnail(image, side=task.THUMB_SIDE):
    img = np.asarray(image, dtype=np.float32)
    f = max(1, math.ceil(max(img.shape) / side))
    r, c = (img.shape[0] // f) * f, (img.shape[1] // f) * f
    if r == 0 or c == 0:
        small, f = img, 1
    else:
        small = img[:r, :c].reshape(r // f, f, c // f, f).mean(axis=(1, 3))
    finite = small[np.isfinite(small)]
    lo, hi = (np.percentile(finite, [0.5, 99.5]) if finite.size else (0.0, 1.0))
    scaled = np.clip((small - lo) / max(hi - lo, 1e-12), 0, 1)
    return (np.nan_to_num(scaled) * 255 + 0.5).astype(np.uint8), float(f)


@pytest.mark.parametrize("dtype", [np.uint16, np.int16, np.uint8, np.int8])
def test_integer_block_mean_equals_numpy_float32_mean(dtype):
    rng = np.random.default_rng(1)
    info = np.iinfo(dtype)
    for shape, f in (((64, 48), 2), ((100, 75), 3), ((257, 130), 8), ((160, 160), 16), ((33, 90), 5)):
        extremes = rng.choice([info.min, info.max], size=shape).astype(dtype)
        noise = rng.integers(info.min, int(info.max) + 1, size=shape).astype(dtype)
        for raw in (extremes, noise):
            r, c = (shape[0] // f) * f, (shape[1] // f) * f
            want = raw.astype(np.float32)[:r, :c].reshape(r // f, f, c // f, f).mean(axis=(1, 3))
            got = task._integer_block_mean(raw, f)
            assert got is not None and got.dtype == want.dtype
            np.testing.assert_array_equal(got, want)


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_block_mean_of_whole_float_values_equals_numpy_float32_mean(dtype):
    # what the readers give: float copies of stored 16-bit integers
    rng = np.random.default_rng(3)
    for shape, f in (((2048, 2048), 8), ((100, 75), 3), ((160, 160), 16), ((64, 64), 1)):
        raw = rng.integers(0, 65536, size=shape).astype(dtype)
        raw[:3, :5] = 65535
        r, c = (shape[0] // f) * f, (shape[1] // f) * f
        want = raw.astype(np.float32)[:r, :c].reshape(r // f, f, c // f, f).mean(axis=(1, 3))
        got = task._integer_block_mean(raw, f)
        assert got is not None
        np.testing.assert_array_equal(got, want)


def test_integer_block_mean_declines_where_float32_sums_could_round():
    assert task._integer_block_mean(np.zeros((64, 64), np.uint16), 17) is None
    assert task._integer_block_mean(np.zeros((64, 64), np.uint32), 2) is None
    assert task._integer_block_mean(np.full((64, 64), 65535.0, np.float32), 17) is None
    frac = np.zeros((64, 64), np.float32)
    frac[5, 5] = 0.5
    assert task._integer_block_mean(frac, 2) is None
    for bad in (np.nan, np.inf, -np.inf, 2.0 ** 40):
        b = np.zeros((64, 64), np.float32)
        b[7, 3] = bad
        assert task._integer_block_mean(b, 2) is None


def test_thumbnail_equals_previous_form():
    rng = np.random.default_rng(2)
    frames = [rng.integers(0, 65536, size=(2048, 2048)).astype(np.uint16),
              rng.integers(0, 256, size=(300, 500)).astype(np.uint8),
              rng.normal(size=(200, 300)).astype(np.float32), rng.integers(0, 65536, size=(5000, 90)).astype(np.uint16),
              rng.integers(0, 65536, size=(2048, 2048)).astype(np.float32), np.round(rng.normal(size=(90, 90)) * 100),
              np.zeros((10, 10), np.uint16)]
    for raw in frames:
        got, want = task.thumbnail(raw), _reference_thumbnail(raw)
        np.testing.assert_array_equal(got[0], want[0])
        assert got[1] == want[1]
