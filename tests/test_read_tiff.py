"""TIFF reading and calibration precedence (OME-XML > ImageJ > resolution tags > workflow)."""

from __future__ import annotations

import numpy as np
import pytest
import tifffile

from grainhabit.plugins.readers import tiff as read_tiff

OPTS = {"max_pixels": 10_000_000}


def _read_all(path, opts=OPTS):
    refs = read_tiff.grainhabit_list_frames(path=str(path), options=opts)
    return refs, [read_tiff.grainhabit_read_frame(ref=r, options=opts) for r in refs]


def test_resolution_tags_cm_and_inch(tmp_path):
    img = np.zeros((32, 48), np.uint16)
    tifffile.imwrite(tmp_path / "cm.tif", img, resolution=(1e7 / 2.5, 1e7 / 2.5), resolutionunit="CENTIMETER")
    tifffile.imwrite(tmp_path / "in.tif", img, resolution=(2.54e7 / 4.0, 2.54e7 / 4.0), resolutionunit="INCH")
    (_, [cm]), (_, [inch]) = _read_all(tmp_path / "cm.tif"), _read_all(tmp_path / "in.tif")
    assert cm.pixel_size_nm == pytest.approx(2.5) and cm.calibration == "resolution"
    assert inch.pixel_size_nm == pytest.approx(4.0)
    assert cm.raw.dtype == np.float32 and cm.raw.shape == (32, 48)


def test_no_resolution_unit_means_no_calibration(tmp_path):
    tifffile.imwrite(tmp_path / "none.tif", np.zeros((8, 8), np.uint8), resolution=(72, 72), resolutionunit="NONE")
    _, [f] = _read_all(tmp_path / "none.tif")
    assert np.isnan(f.pixel_size_nm)  # the host then applies input.pixel_size_nm or refuses


def test_ome_physical_size_with_unit_wins_over_tags(tmp_path):
    # OME-XML says 0.5 nm via Angstrom-free unit conversion: 0.0005 um; resolution tags say something else
    img = np.zeros((3, 20, 30), np.uint16)
    tifffile.imwrite(tmp_path / "s.ome.tif", img, ome=True, resolution=(1e7 / 9.0, 1e7 / 9.0),
                     resolutionunit="CENTIMETER",
                     metadata={"axes": "TYX", "PhysicalSizeX": 3.2, "PhysicalSizeXUnit": "nm",
                               "PhysicalSizeY": 3.2, "PhysicalSizeYUnit": "nm"})
    refs, frames = _read_all(tmp_path / "s.ome.tif")
    assert [r.source.rsplit("#", 1)[1] for r in refs] == ["0", "1", "2"]
    assert all(f.pixel_size_nm == pytest.approx(3.2) and f.calibration == "ome" for f in frames)
    assert len({r.content_hash for r in refs}) == 3


def test_ome_default_unit_is_micrometre(tmp_path):
    tifffile.imwrite(tmp_path / "u.ome.tif", np.zeros((10, 10), np.uint8), ome=True,
                     metadata={"axes": "YX", "PhysicalSizeX": 0.004, "PhysicalSizeY": 0.004})
    _, [f] = _read_all(tmp_path / "u.ome.tif")
    assert f.pixel_size_nm == pytest.approx(4.0)


def test_imagej_unit_and_resolution(tmp_path):
    tifffile.imwrite(tmp_path / "ij.tif", np.zeros((4, 16, 16), np.uint16), imagej=True,
                     resolution=(1 / 0.0025, 1 / 0.0025), metadata={"unit": "micron", "axes": "ZYX"})
    refs, frames = _read_all(tmp_path / "ij.tif")
    assert len(refs) == 4
    assert all(f.pixel_size_nm == pytest.approx(2.5) and f.calibration == "imagej" for f in frames)


def test_multipage_frames_are_distinct(tmp_path):
    pages = np.stack([np.full((8, 8), i, np.uint8) for i in range(3)])
    tifffile.imwrite(tmp_path / "stack.tif", pages, photometric="minisblack")
    refs, frames = _read_all(tmp_path / "stack.tif")
    assert [f.raw.mean() for f in frames] == [0.0, 1.0, 2.0]
    assert refs[1].source.endswith("stack.tif#1")


def test_rgb_to_luminance_with_note(tmp_path):
    rgb = np.zeros((10, 10, 3), np.uint8)
    rgb[..., 1] = 200
    tifffile.imwrite(tmp_path / "rgb.tif", rgb, photometric="rgb")
    _, [f] = _read_all(tmp_path / "rgb.tif")
    # ITU-R BT.709 luma weights: Y = 0.2126 R + 0.7152 G + 0.0722 B
    assert f.raw.shape == (10, 10) and f.raw.mean() == pytest.approx(0.7152 * 200, rel=1e-5)
    assert any("luminance" in n for n in f.notes)


@pytest.mark.parametrize("dtype", [np.uint8, np.uint16, np.float32])
def test_bit_depths(tmp_path, dtype):
    img = (np.arange(64).reshape(8, 8) % 7).astype(dtype)
    tifffile.imwrite(tmp_path / "d.tif", img)
    _, [f] = _read_all(tmp_path / "d.tif")
    np.testing.assert_array_equal(f.raw, img.astype(np.float32))


def test_bigtiff(tmp_path):
    tifffile.imwrite(tmp_path / "big.tif", np.ones((16, 16), np.uint16), bigtiff=True)
    _, [f] = _read_all(tmp_path / "big.tif")
    assert f.raw.sum() == 256


def test_pixel_limit_refuses_before_reading(tmp_path):
    tifffile.imwrite(tmp_path / "huge.tif", np.zeros((100, 100), np.uint8))
    with pytest.raises(ValueError, match="exceeds input.max_pixels"):
        read_tiff.grainhabit_list_frames(path=str(tmp_path / "huge.tif"), options={"max_pixels": 5000})


def test_not_a_tiff_is_refused_by_name(tmp_path):
    bad = tmp_path / "bad.tif"
    bad.write_bytes(b"this is not a tiff")
    with pytest.raises(ValueError, match="bad.tif"):
        read_tiff.grainhabit_list_frames(path=str(bad), options=OPTS)
    assert read_tiff.grainhabit_list_frames(path=str(tmp_path / "x.png"), options=OPTS) is None


def test_non_square_pixels_refused(tmp_path):
    tifffile.imwrite(tmp_path / "ns.tif", np.zeros((8, 8), np.uint8), resolution=(1e7 / 2, 1e7 / 3),
                     resolutionunit="CENTIMETER")
    refs = read_tiff.grainhabit_list_frames(path=str(tmp_path / "ns.tif"), options=OPTS)
    with pytest.raises(ValueError, match="non-square"):
        read_tiff.grainhabit_read_frame(ref=refs[0], options=OPTS)
