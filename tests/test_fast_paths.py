"""Speed-ups that must not change results: each fast path against its reference.

References named beside each check: scikit-image's watershed without a mask (the band-only
flood), numpy's per-mask medians (the sorted grouping of the noise model).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys

import numpy as np
import pytest
from scipy import ndimage as ndi

from grainhabit.plugins.bench import harness as bu
from grainhabit.plugins.common import image_stats as imstats
from grainhabit.plugins.preprocess import flatten_background as pp
from grainhabit.plugins.segment import foreground as seg_fg, gaps as seg_gaps
from grainhabit.plugins.segment import levels as seg_levels, touching as seg_touching

from builders import REPO, reference_gap_lines


def _full_frame_foreground(arr, levels, w=3.0):
    """The refinement flooded over the whole frame, as scikit-image's watershed does without a mask.

    The lines between grains that do not touch (kept open by the closing, background seeds of the
    flood) are taken from scikit-image: the thick boundaries of the bodies (cores above 0.25, and
    thresholded components without a core) grown to their nearest-label regions (``expand_labels``,
    ``find_boundaries``), outside the bodies, and inside the thresholded mask only near a body.
    """
    from skimage.filters import sobel
    from skimage.morphology import disk
    from skimage.segmentation import watershed

    fg = arr > levels["noise"]
    cores = arr > max(0.25, levels["noise"])
    gaps, *_ = reference_gap_lines(fg, cores, seg_gaps.GAP_MIN_AREA_PX, seg_gaps.GAP_REACH_PX)
    pad = ndi.binary_closing(np.pad(fg, 2, mode="edge"), structure=disk(2), border_value=0)
    fg = ndi.binary_fill_holes(pad[2:-2, 2:-2] & ~gaps)
    inside = ndi.distance_transform_edt(fg)
    seeds = inside > w
    comp, n = ndi.label(fg, structure=np.ones((3, 3), bool))
    deepest = ndi.maximum(inside, comp, index=np.arange(1, n + 1))
    thin = np.zeros(n + 1, bool)
    thin[1:] = deepest <= w
    seeds |= thin[comp] & (inside >= np.concatenate([[np.inf], deepest])[comp])
    markers = np.zeros(arr.shape, np.int32)
    markers[(ndi.distance_transform_edt(~fg) > w) | gaps] = 1
    markers[seeds] = 2
    return ndi.binary_fill_holes(watershed(sobel(arr), markers) == 2)


@pytest.mark.parametrize("seed", [0, 5])
def test_band_only_refinement_equals_full_frame_watershed(seed):
    # reference library: skimage.segmentation.watershed over the whole frame (no mask)
    raw = bu.render_frames(1, 384, grains=12, seed=seed)[0]
    arr, _, _ = pp.flatten(raw, bu.PIXEL_SIZE_NM)
    levels = seg_levels.frame_levels(arr)
    fast = seg_fg.foreground(arr, bu.PIXEL_SIZE_NM, levels)
    assert fast.any()
    np.testing.assert_array_equal(fast, _full_frame_foreground(arr, levels))


def test_noise_model_recovers_poisson_gaussian_parameters():
    # worked example: var(I) = a I + b with known a, b on a ramp; the grouped medians must find them
    rng = np.random.default_rng(3)
    a, b = 0.002, 0.0004
    clean = np.tile(np.linspace(0.1, 0.9, 512), (512, 1))
    noisy = clean + rng.normal(0, 1, clean.shape) * np.sqrt(a * clean + b)
    est_a, est_b = pp.noise_model(noisy)
    assert est_a == pytest.approx(a, rel=0.1)
    assert est_b == pytest.approx(b, rel=0.25)


def test_regular_subsample_bounds():
    img = np.zeros((768, 1000))
    for n in (1000, 300_000, 10**7):
        sub = imstats.regular_subsample(img, n)
        assert sub.size <= max(n, 1) * 1.01 or sub.size == img.size
        assert sub.size >= min(img.size, n) / 4.5
    assert imstats.regular_subsample(img, 10**7) is img or imstats.regular_subsample(img, 10**7).base is img


def test_worker_host_imports_no_survey_libraries(tmp_path):
    # a dask worker builds the host and runs the default frame chain: the survey libraries xarray,
    # matplotlib and pandas stay unloaded (workers are prepared once; frame kernels may use scipy.signal,
    # which imports scipy.stats, and scipy.optimize)
    frame = bu.write_frames(tmp_path / "d", bu.render_frames(1, 192, grains=4, seed=2))[0]
    code = ("import sys, json; from grainhabit.manager import worker_host; from grainhabit.task import process_frame; "
            "h = worker_host(()); from grainhabit.plugins.bench.throughput import serial_loop; "
            f"serial_loop([{str(frame)!r}]); "
            "loaded = [m for m in ('xarray', 'matplotlib', "
            "'pandas') "
            "if m in sys.modules and type(sys.modules[m]).__name__ != '_LazyModule']; "
            "print(json.dumps({'loaded': loaded, 'hooks': len(h.pm.get_plugins())}))")
    env = dict(os.environ, GRAINHABIT_NO_AUTOLOAD="1")
    res = subprocess.run([sys.executable, "-c", code], cwd=REPO, env=env, capture_output=True, text=True,
                         check=True)
    out = json.loads(res.stdout.strip().splitlines()[-1])
    assert out["loaded"] == [] and out["hooks"] >= 15


def test_lazy_module_loads_on_first_attribute():
    from grainhabit.lazy import lazy_module

    name = "json.tool"
    sys.modules.pop(name, None)
    mod = lazy_module(name)
    assert sys.modules[name] is mod
    assert callable(mod.main)  # first attribute read imports it
    with pytest.raises(ModuleNotFoundError):
        lazy_module("grainhabit_no_such_module_xyz")


def _malloc_env():
    return os.environ.get("MALLOC_TRIM_THRESHOLD_")


def test_local_workers_keep_glibc_malloc_thresholds(monkeypatch):
    # dask's nanny default MALLOC_TRIM_THRESHOLD_=65536 fixes glibc's mmap threshold and slowed the kernels
    # 25-45 % in workers; the local cluster leaves it unset unless the environment sets it
    from grainhabit.executors import DaskExecutor

    monkeypatch.delenv("MALLOC_TRIM_THRESHOLD_", raising=False)
    ex = DaskExecutor(workers=1)
    ex.start()
    try:
        seen = list(ex.client.run(_malloc_env).values())
    finally:
        ex.close()
    assert seen == [None]
    assert "MALLOC_TRIM_THRESHOLD_" not in os.environ  # nor left behind in this process


def test_worker_advice_names_slowing_settings():
    from grainhabit.executors import worker_advice

    assert worker_advice({"a": {"malloc_trim": None, "profile": False, "tick_s": 0.5}}) == []
    lines = worker_advice({"a": {"malloc_trim": "65536", "profile": True, "tick_s": 0.02},
                           "b": {"malloc_trim": None, "profile": True, "tick_s": 0.5}})
    assert len(lines) == 3
    assert lines[0].startswith("1 of 2 workers run with MALLOC_TRIM_THRESHOLD_")
    assert lines[1].startswith("2 of 2 workers run dask's statistical profiler")
    assert lines[2].startswith("1 of 2 workers check their event loop more often")


@pytest.mark.parametrize("seed", range(6))
def test_find_peaks_matches_scipy(seed):
    # reference library: scipy.signal.find_peaks with height and prominence (flat tops included)
    from scipy.signal import find_peaks as scipy_find_peaks

    rng = np.random.default_rng(seed)
    x = np.round(rng.random(300) * 6.0) / 2.0 if seed % 2 else np.cumsum(rng.normal(0, 1, 300))
    x = np.r_[0.0, np.abs(x), 0.0]
    for h, p in ((0.0, 0.0), (1.0, 0.5), (2.0, 1.0), (0.5, 3.0)):
        np.testing.assert_array_equal(seg_touching.find_peaks(x, h, p), scipy_find_peaks(x, height=h, prominence=p)[0])
    assert seg_touching.find_peaks(np.zeros(2), 0.0, 0.0).size == 0


def _store_files(folder):
    """Relative path -> bytes of every file of a store folder."""
    from pathlib import Path

    root = Path(folder)
    return {p.relative_to(root).as_posix(): p.read_bytes() for p in sorted(root.rglob("*")) if p.is_file()}


def test_results_written_through_memory_equal_xarray_to_zarr(tmp_path):
    # reference library: xarray's Dataset.to_zarr straight into a folder (zarr's LocalStore), the way
    # results were written before the in-memory path; every file must come out byte for byte the same
    import warnings

    import xarray as xr
    import zarr

    from grainhabit.results import _prepare, open_results, write_groups

    rng = np.random.default_rng(3)
    n = 257
    grains = xr.Dataset({"ecd_nm": ("grain", rng.random(n) * 900), "habit": ("grain", np.array(["cube", "rod"] * 128 + ["octahedron"])),
                         "frame_index": ("grain", np.arange(n, dtype=np.int64)),
                         "flag": ("grain", rng.random(n) > 0.5)}, attrs={"units": "nm", "count": n})
    grains["ecd_nm"].attrs["long_name"] = "equivalent circle diameter"
    thumbs = xr.Dataset({"thumb": (("frame", "y", "x"), rng.integers(0, 255, (3, 40, 50), dtype=np.uint8))})
    groups = {"grains": grains, "thumbnails": thumbs, "empty": xr.Dataset(attrs={"note": "no rows"})}
    attrs = {"title": "invented", "runs": json.dumps([{"n": 1}])}

    write_groups(tmp_path / "fast.zarr", groups, attrs)
    ref = tmp_path / "ref.zarr"
    root = zarr.open_group(str(ref), mode="w-", zarr_format=3)
    root.attrs.update(attrs)
    for name, ds in groups.items():
        _prepare(ds).to_zarr(str(ref), group=name, mode="a", zarr_format=3, consolidated=False)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        zarr.consolidate_metadata(str(ref))

    fast, want = _store_files(tmp_path / "fast.zarr"), _store_files(ref)
    assert sorted(fast) == sorted(want)
    assert {k for k in fast if fast[k] != want[k]} == set()
    back = open_results(tmp_path / "fast.zarr")
    np.testing.assert_array_equal(back["grains"]["ecd_nm"].values, grains["ecd_nm"].values)
    assert list(back["grains"]["habit"].values[-2:]) == ["rod", "octahedron"]


def test_results_writer_refuses_an_existing_folder(tmp_path):
    from grainhabit.results import write_groups

    (tmp_path / "there.zarr").mkdir()
    (tmp_path / "there.zarr" / "keep.txt").write_text("x")
    with pytest.raises(FileExistsError):
        write_groups(tmp_path / "there.zarr", {}, {})
    assert (tmp_path / "there.zarr" / "keep.txt").read_text() == "x"


@pytest.mark.parametrize("radius", [1.0, 2.5, 3.0, 4.2])
def test_disk_erosion_equals_distance_transform_threshold(radius):
    # reference library: scipy.ndimage.distance_transform_edt; edt(mask) > r, frame edge neutral
    rng = np.random.default_rng(int(radius * 10))
    mask = ndi.gaussian_filter(rng.random((300, 280)), 4) > 0.5
    mask[:, :3] = True  # foreground along the frame's edge
    for m in (mask, ~mask):
        fast = ndi.binary_erosion(m, structure=seg_fg.disk_structure(radius), border_value=1)
        np.testing.assert_array_equal(fast, ndi.distance_transform_edt(m) > radius)


def test_deepest_pixels_of_thin_components_equal_full_frame_reference():
    # reference library: scipy.ndimage.distance_transform_edt over the whole frame and ndimage.maximum
    rng = np.random.default_rng(11)
    mask = ndi.gaussian_filter(rng.random((256, 256)), 1.2) > 0.56  # many small specks
    mask[0:3, 100:140] = True  # a thin strip on the frame's edge
    comp, n = ndi.label(mask, structure=np.ones((3, 3), bool))
    depth = ndi.distance_transform_edt(mask)
    deepest = ndi.maximum(depth, comp, index=np.arange(1, n + 1))
    thin = np.flatnonzero(deepest <= 3.0) + 1
    assert 20 < thin.size < n
    want = np.isin(comp, thin) & (depth >= np.concatenate([[np.inf], deepest])[comp])
    np.testing.assert_array_equal(seg_fg.deepest_pixels(mask, comp, thin, 3.0), want)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_fill_holes_equals_scipy(seed):
    # reference library: scipy.ndimage.binary_fill_holes (4-connected background)
    rng = np.random.default_rng(seed)
    mask = ndi.gaussian_filter(rng.random((200, 230)), 2) > 0.5 - 0.02 * seed
    mask[50:60, 50:60] = True
    mask[54:56, 54:56] = False  # a hole for sure
    mask[0, :] = seed == 1  # the frame's edge in the foreground
    np.testing.assert_array_equal(seg_fg.fill_holes(mask), ndi.binary_fill_holes(mask))
    for m in (np.zeros((5, 6), bool), np.ones((5, 6), bool)):
        np.testing.assert_array_equal(seg_fg.fill_holes(m), ndi.binary_fill_holes(m))
