"""Small habit kernels against the slower forms they replace (numpy's median, the class test by
np.unique), bit for bit. Test data: random numbers and random
polygons (invented), drawn grains through the test builders."""
import numpy as np
import pytest

from grainhabit.plugins.habit import engine as gr
from grainhabit.plugins.habit import interior as gi
from grainhabit.plugins.habit.vocabulary import CUBE_ALPHA_MAX, OCTAHEDRON_ALPHA


def test_median_of_equals_numpy_median():
    rng = np.random.default_rng(4)
    for _ in range(3000):
        k = int(rng.integers(1, 400))
        v = rng.standard_normal(k) * rng.choice([1.0, 1e-3, 1e5]) + rng.choice([0.0, 1e3])
        if rng.uniform() < 0.3:
            v = np.round(v, 1)                                  # many ties
        if rng.uniform() < 0.2:
            v = v.astype(np.float32)
        got, ref = gi.median_of(v), float(np.median(v))
        assert got == ref and type(got) is float
    assert np.isnan(gi.median_of(np.array([1.0, np.nan, 2.0])))
    assert gi.median_of(np.array([3, 1, 2])) == 2.0             # integers go to numpy's median


def _settles_before(fit, library, tolerance=4.0):
    # the form replaced: the classes of the near models by np.unique, built per call
    near = fit.score <= tolerance + gr._INTERIOR_GATE
    cls = np.where(library.alphas <= CUBE_ALPHA_MAX, 0, np.where(library.alphas < OCTAHEDRON_ALPHA, 1, 2))
    return bool(np.isnan(fit.alpha) and np.unique(cls[near]).size == 1)


def test_outline_settles_equals_the_previous_form():
    lib = gr.model_library()
    rng = np.random.default_rng(1)
    m = lib.alphas.size
    for _ in range(500):
        score = rng.exponential(rng.choice([2.0, 20.0, 200.0]), m)
        score[rng.integers(0, m)] = 0.0
        if rng.uniform() < 0.2:
            score[:] = np.inf
        fit = gr.AlphaFit(float(rng.choice([np.nan, 2.0])), 1.0, 2.0, 2.0, "100", 0.0, 0.1, "", score)
        for tol in (0.0, 4.0, 9.0):
            assert gr.outline_settles(fit, lib, tol) == _settles_before(fit, lib, tol)


def test_slot_reductions_equal_numpy_along_the_last_axis():
    # the minimum and the or of a short last axis (the candidate rotations of each shape): the same
    # numbers as numpy's reductions, bit for bit (signed zeros, infinities and NaN included), on
    # (u, 4) and (g, u, 4) arrays
    rng = np.random.default_rng(8)
    for shape in ((303, 4), (7, 303, 4), (5, 1), (9, 3), (2, 0, 4)):
        for _ in range(30):
            a = rng.standard_normal(shape) * rng.choice([1.0, 1e9])
            a[rng.uniform(size=shape) < 0.3] = np.inf
            a[rng.uniform(size=shape) < 0.1] = 0.0
            a[rng.uniform(size=shape) < 0.1] = -0.0
            if rng.uniform() < 0.3:
                a[rng.uniform(size=shape) < 0.05] = np.nan
            ref = a.min(axis=-1)
            got = gr.slot_min(a)
            assert got.shape == ref.shape and np.array_equal(got, ref, equal_nan=True)
            assert np.array_equal(got.view(np.int64) == ref.view(np.int64), ~(np.isnan(ref)) | np.isnan(got))
            b = rng.uniform(size=shape) < rng.choice([0.05, 0.5])
            assert np.array_equal(gr.slot_any(b), b.any(axis=-1))
    ints = rng.integers(0, 256, (50, 4))
    assert np.array_equal(gr.slot_min(ints), ints.min(axis=-1))


@pytest.mark.parametrize("args", [(), (0.5, 4.0, 0.1, 180), (0.6, 3.5, 0.05, 64)])
def test_profile_over_faces_equals_minimum_at(args):
    # the least score of each grid cell by the columns of the library's members table against
    # np.minimum.at into infinities (the form replaced), one row and many rows at once
    lib = gr.model_library(*args)
    rng = np.random.default_rng(2)
    for _ in range(100):
        sc = rng.exponential(5.0, (3, lib.alphas.size))
        sc[rng.uniform(size=sc.shape) < 0.4] = np.inf
        for row in sc:
            ref = np.full(lib.grid.size, np.inf)
            np.minimum.at(ref, lib.grid_index, row)
            assert np.array_equal(lib.profile_over_faces(row), ref)
        ref = np.full((3, lib.grid.size), np.inf)
        np.minimum.at(ref, (np.arange(3)[:, None], lib.grid_index[None, :]), sc)
        assert np.array_equal(lib.profile_over_faces(sc), ref)
    members = lib.grid_members
    assert sorted(members[members < lib.alphas.size].tolist()) == list(range(lib.alphas.size))
