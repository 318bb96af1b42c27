"""Frames over the frame budget run the whole chain tile by tile (invented frames).

The reference of every check here is the same chain run on the whole frame
in one piece: tiling must not change which grains are found nor, beyond
floating-point rounding, what is measured of them.
"""

import numpy as np
import pytest
import tifffile

from builders import write_tiff, write_workflow, run_cli
from grainhabit import chain_tiles
from grainhabit.manager import DEFAULT_CHAIN, make_host
from grainhabit.params import FRAME_STAGES
from grainhabit.plugins.bench.sizes import render_tiles
from grainhabit.plugins.preprocess import flatten_background as fb
from grainhabit.plugins.readers.regions import TiffRegions
from grainhabit.task import FrameJob, process_frame

PX = 5.0
#: Floats measured on a tile may differ from the whole frame's by rounding only (positions are moved from
#: tile to frame coordinates, sums run in another order): this much, relative to the value or absolute.
TOL = 1e-6


def _steps():
    return tuple((DEFAULT_CHAIN[s], s, {}) for s in FRAME_STAGES if s in DEFAULT_CHAIN)


def _ref(path):
    host = make_host()
    return host.first_answer("grainhabit_list_frames", path=str(path), options={"pixel_size_nm": PX})[0]


def _whole_and_tiled(path):
    """The chain on a frame in one piece and by tiles (a budget that holds a tile of 256 px + halo, not the frame)."""
    ref = _ref(path)
    opts = {"pixel_size_nm": PX}
    whole = process_frame(ref, "s", FrameJob(steps=_steps(), input_options=opts))
    tiled = process_frame(ref, "s", FrameJob(steps=_steps(), input_options=opts, frame_memory=13_000_000))
    return whole, tiled


@pytest.fixture(scope="module")
def field_path(tmp_path_factory):
    """A rendered 1024 px field of invented grains (the benchmarks' density), as a uint16 TIFF."""
    from grainhabit.plugins.synthetic.render import to_uint16

    img = to_uint16(render_tiles(1, 1024, seed=5)[0])
    return write_tiff(tmp_path_factory.mktemp("field") / "field.tif", img, PX)


def test_regions_cover_the_frame_once_and_stay_in_the_budget():
    shape = (1000, 1531)
    core = chain_tiles.plan_core(shape, 40_000_000)
    assert core % chain_tiles.CORE_STEP_PX == 0 and core >= chain_tiles.MIN_CORE_PX
    assert (core + 2 * chain_tiles.HALO_PX) ** 2 * chain_tiles.BYTES_PER_PIXEL <= 40_000_000
    cover = np.zeros(shape, int)
    for c, w in chain_tiles.grid(shape, core, chain_tiles.HALO_PX):
        cover[c] += 1
        assert w[0].start <= c[0].start and w[1].stop >= c[1].stop
    assert (cover == 1).all()
    with pytest.raises(chain_tiles.FrameTooLarge, match="even a tile of 256 px needs about"):
        chain_tiles.plan_core(shape, 5_000_000)


def test_flatten_levels_do_not_depend_on_how_the_frame_is_cut(field_path):
    img = tifffile.imread(field_path).astype(np.float32)
    whole = fb.frame_levels(fb.whole_frame_regions(img), img.shape, PX)
    src = TiffRegions(path=str(field_path), series=0, page=0, shape=img.shape, pixel_size_nm=PX,
                      calibration="tiff-resolution")
    sample = chain_tiles.FrameSample(shape=img.shape, pixel_size_nm=PX, source=src, core_px=320)
    cut = fb.frame_levels(sample.regions, img.shape, PX)
    for key in ("lo", "span", "a", "b", "use_vst", "offset", "sign", "level", "sigma", "polarity", "confidence"):
        assert cut[key] == whole[key], key
    np.testing.assert_array_equal(cut["surface"], whole["surface"])
    np.testing.assert_array_equal(cut["preview"], whole["preview"])
    # a window's output equals the whole frame's there, beyond the filter's reach from the window's inner edges
    out = fb.flatten(img, PX)[0]
    reach = fb.denoise_reach("gaussian", 1.0)
    win = (slice(200, 520), slice(700, 1024))
    part = fb.apply_levels(src.read(win), win, cut)
    np.testing.assert_array_equal(part[reach:-reach, reach:], out[200 + reach:520 - reach, 700 + reach:])


def test_region_reads_equal_the_whole_read(tmp_path):
    rng = np.random.default_rng(0)
    img = rng.integers(0, 4000, (300, 410)).astype(np.uint16)
    for name, kw in (("plain", {}), ("strips", {"compression": "zlib", "rowsperstrip": 16}),
                     ("tiled", {"tile": (64, 64)})):
        path = tmp_path / f"{name}.tif"
        tifffile.imwrite(path, img, **kw)
        src = TiffRegions(path=str(path), series=0, page=0, shape=img.shape, pixel_size_nm=PX, calibration="")
        win = (slice(37, 211), slice(5, 399))
        got = src.read(win)
        assert got.dtype == np.float32
        np.testing.assert_array_equal(got, img[win].astype(np.float32))
        with pytest.raises(ValueError, match="leaves the frame"):
            src.read((slice(0, 301), slice(0, 10)))


def test_chain_by_tiles_equals_the_whole_frame(field_path):
    whole, tiled = _whole_and_tiled(field_path)  # 16 tiles
    a, b = whole["record"], tiled["record"]
    assert a["status"] == b["status"] == "ok", (a["error"], b["error"])
    assert "processed in 16 tiles of 256 px" in b["notes"]
    assert "tiles: frame" not in a["notes"]
    assert b["grain_count"] == a["grain_count"] > 20
    ca, cb = whole["columns"], tiled["columns"]
    assert set(ca) == set(cb)
    for k in ca:
        va, vb = np.asarray(ca[k]), np.asarray(cb[k])
        if va.dtype.kind == "f":
            np.testing.assert_allclose(vb, va, rtol=TOL, atol=TOL, equal_nan=True, err_msg=k)
        else:
            np.testing.assert_array_equal(vb, va, err_msg=k)
    np.testing.assert_array_equal(tiled["outline_offsets"], whole["outline_offsets"])
    np.testing.assert_allclose(tiled["outline_xy"], whole["outline_xy"], rtol=TOL, atol=TOL)
    np.testing.assert_array_equal(tiled["thumb"], whole["thumb"])
    assert b["pixel_size_nm"] == a["pixel_size_nm"] and b["polarity"] == a["polarity"]


def test_cluster_cut_by_a_tile_edge_is_processed_again(tmp_path):
    # a row of five touching squares from column ~199 to ~355, astride the boundary of the first two cores
    # (256 px; windows reach to column 384 and from 128): it starts in the first core but comes within the
    # 64 px margin of that window's edge, so it is processed again in a window of its own
    from builders import draw_faceted_frame

    row = tuple((128, 215 + 30 * i, 22, 4, 0.0) for i in range(5))
    img, _ = draw_faceted_frame((512, 512), grains=row + ((400, 100, 18, 4, 20.0),), seed=3)
    path = write_tiff(tmp_path / "pair.tif", (np.clip(img, 0, 1) * 60000).astype(np.uint16), PX)
    whole, tiled = _whole_and_tiled(path)
    assert tiled["record"]["status"] == "ok", tiled["record"]["error"]
    assert "1 cluster(s) cut by tile edges processed again" in tiled["record"]["notes"]
    assert tiled["record"]["grain_count"] == whole["record"]["grain_count"] >= 2
    for k in ("area_nm2", "centroid_x_nm", "centroid_y_nm", "split"):
        np.testing.assert_allclose(np.asarray(tiled["columns"][k], float), np.asarray(whole["columns"][k], float),
                                   rtol=TOL, atol=TOL, err_msg=k)


def test_frame_that_cannot_be_tiled_fails_in_one_line_and_the_run_goes_on(tmp_path):
    from PIL import Image

    data = tmp_path / "data" / "s1"
    data.mkdir(parents=True)
    # a PNG of 1200 x 1200 px needs about 69 MB by the estimate, over a 64 MiB budget, and the PNG
    # reader cannot read regions
    rng = np.random.default_rng(1)
    Image.fromarray(rng.integers(0, 255, (1200, 1200)).astype(np.uint8)).save(data / "big.png")
    small = (np.clip(render_tiles(1, 256, seed=2)[0], 0, 1) * 60000).astype(np.uint16)
    write_tiff(data / "small.tif", small, PX)
    wf = write_workflow(tmp_path / "wf.yaml", f"""
        version: 1
        input:
          paths: ["{(tmp_path / 'data').as_posix()}/**/*"]
          pixel_size_nm: {PX}
        output:
          results: {(tmp_path / 'out.zarr').as_posix()}
        execution:
          scheduler: serial
          frame_memory: 64MiB
    """)
    res = run_cli("run", wf)
    assert res.returncode == 1, res.stderr
    import xarray as xr

    frames = xr.open_zarr(tmp_path / "out.zarr", group="frames").load()
    status = dict(zip([str(s).rsplit("/", 1)[-1] for s in frames["source"].values], frames["status"].values))
    assert status == {"big.png": "failed", "small.tif": "ok"}
    err = str(frames["error"].values[list(status).index("big.png")])
    assert "\n" not in err and "cannot read it by regions" in err and "big.png" in err


def test_frame_memory_key_is_checked(tmp_path):
    wf = write_workflow(tmp_path / "wf.yaml", f"""
        version: 1
        input:
          paths: ["{tmp_path.as_posix()}/*.tif"]
          pixel_size_nm: {PX}
        output:
          results: {(tmp_path / 'out.zarr').as_posix()}
        execution:
          frame_memory: lots
    """)
    res = run_cli("check", wf)
    assert res.returncode == 2
    assert "execution.frame_memory" in res.stderr


def test_archive_frames_are_read_by_regions(tmp_path):
    from builders import draw_frame
    from grainhabit.plugins.readers import archive

    img = draw_frame(shape=(300, 260), discs=[(50, 50, 10), (200, 180, 14)])
    write_tiff(tmp_path / "in" / "s1" / "a.tif", img, PX)
    arch = tmp_path / "arch.zarr"
    assert run_cli("ingest", tmp_path / "in", "--into", arch, "--chunk", "128").returncode == 0
    ref = archive.grainhabit_list_frames(path=str(arch), options={"max_pixels": 0})[0]
    whole = archive.grainhabit_read_frame(ref=ref, options={})
    src = archive.grainhabit_open_regions(ref=ref, options={})
    assert src.shape == whole.raw.shape and src.pixel_size_nm == whole.pixel_size_nm == PX
    assert src.calibration == whole.calibration
    win = (slice(100, 290), slice(7, 201))
    np.testing.assert_array_equal(src.read(win), whole.raw[win])


def test_bench_huge_frame_is_the_sizes_mosaic_built_band_by_band():
    from grainhabit.plugins.bench.memory import huge_mosaic
    from grainhabit.plugins.bench.sizes import mosaic

    np.testing.assert_array_equal(huge_mosaic(2048, 2, seed=1), mosaic(render_tiles(2, 1024, 1), 2048, seed=1))


def test_tiles_spread_over_a_local_cluster_give_the_serial_whole_frame_result(tmp_path):
    import xarray as xr
    from grainhabit.plugins.synthetic.render import to_uint16

    # 1280 px: about 82 MB by the estimate, over a 64 MiB frame budget: tiled on the cluster's two workers
    img = to_uint16(render_tiles(1, 1280, seed=8)[0])
    write_tiff(tmp_path / "data" / "s1" / "big.tif", img, PX)
    tables = {}
    for name, execution in (("whole", ["scheduler: serial"]),
                            ("tiled", ["scheduler: local", "workers: 2", "frame_memory: 64MiB"])):
        wf = tmp_path / f"{name}.yaml"
        wf.write_text("\n".join([
            "version: 1", "input:", f'  paths: ["{(tmp_path / "data").as_posix()}/**/*.tif"]',
            "output:", f"  results: {(tmp_path / f'{name}.zarr').as_posix()}", "execution:",
            *(f"  {line}" for line in execution)]) + "\n")
        res = run_cli("run", wf)
        assert res.returncode == 0, res.stderr
        frames = xr.open_zarr(tmp_path / f"{name}.zarr", group="frames").load()
        assert ("tiles: frame" in str(frames["notes"].values[0])) == (name == "tiled")
        tables[name] = xr.open_zarr(tmp_path / f"{name}.zarr", group="grains").load()
    a, b = tables["whole"], tables["tiled"]
    assert a.sizes["grain"] == b.sizes["grain"] > 20
    for k in ("area_nm2", "centroid_x_nm", "centroid_y_nm", "ecd_nm", "alpha_lo"):
        np.testing.assert_allclose(b[k].values, a[k].values, rtol=TOL, atol=TOL, equal_nan=True, err_msg=k)
    np.testing.assert_array_equal(b["habit"].values, a["habit"].values)


def test_a_noisy_frame_gets_the_same_smoothing_scale_and_grains_by_tiles(tmp_path):
    # dark discs under noise as strong as their contrast (invented): flatten-background chooses a wider
    # Gaussian (smoothing_scale); the tiles must get the scale the whole frame gets, and the same grains
    rng = np.random.default_rng(7)
    yy, xx = np.mgrid[0:768, 0:768]
    img = np.full((768, 768), 2000.0)
    for cy in range(60, 768, 110):
        for cx in range(60, 768, 110):
            img[(yy - cy) ** 2 + (xx - cx) ** 2 <= 14 ** 2] -= 400.0
    img = np.clip(img + rng.normal(0, 400.0, img.shape), 0, 65535).astype(np.uint16)
    path = write_tiff(tmp_path / "noisy.tif", img, PX)
    from grainhabit.plugins.preprocess.smoothing_scale import levels_at_best_scale
    levels = levels_at_best_scale(fb.frame_levels, fb.whole_frame_regions(img.astype(np.float32)), img.shape, PX,
                                  4000.0, "gaussian", "auto")
    assert levels["smooth_scores"][1.0] < 10 and levels["smooth_px"] > 1.0
    whole, tiled = _whole_and_tiled(path)
    a, b = whole["record"], tiled["record"]
    assert a["status"] == b["status"] == "ok", (a["error"], b["error"])
    assert "tiles of 256 px" in b["notes"]
    # the whole frame: the 49 discs drawn (since segment-grains 2.27 a blob of the noise, a fifth of a disc's
    # area and dim, goes with the debris); a frame processed tile by tile through the chain goes without the
    # frame-wide population rules (README, "Frames larger than a worker's memory") and may keep such a blob
    assert a["grain_count"] == 49
    assert b["grain_count"] in (49, 50)
    ecd_whole = np.sort(whole["columns"]["ecd_nm"])
    ecd_tiled = np.sort(tiled["columns"]["ecd_nm"])[-49:]  # the discs: the blob is the smallest object
    np.testing.assert_allclose(ecd_tiled, ecd_whole, rtol=TOL, atol=TOL)
