"""TIFF reader: makers' metadata, OME, description text, resolution tags, compression, info strips.

Each vendor file is written here with tifffile in the maker's layout, with
values from real files of that maker (see tests/builders.py).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import tifffile
from builders import (OPTS, noisy, with_info_strip, write_fei, write_gatan_tags, write_jeol, write_tescan,
                           write_zeiss)

from grainhabit.plugins.readers import tiff


def _read_all(path, opts=OPTS):
    refs = tiff.grainhabit_list_frames(path=str(path), options=opts)
    return refs, [tiff.grainhabit_read_frame(ref=r, options=opts) for r in refs]


def _one(path, opts=OPTS):
    _, [frame] = _read_all(path, opts)
    return frame


def test_fei_text_block_pixel_size_and_stated_image_height(tmp_path):
    f = _one(write_fei(tmp_path / "fei.tif", rows=60, strip=8))
    assert f.pixel_size_nm == pytest.approx(3372.4) and f.calibration == "instrument"
    assert f.raw.shape == (60, 64)  # ResolutionY = 60 of 68 stored rows
    assert any("bottom 8 of 68 rows" in n and "image height of 60 rows" in n for n in f.notes)


def test_fei_field_width_that_contradicts_the_pixel_width_is_refused(tmp_path):
    path = write_fei(tmp_path / "fei.tif", field_factor=2.0)
    with pytest.raises(ValueError, match="fei.tif: FEI/Thermo metadata disagrees with itself"):
        tiff.grainhabit_list_frames(path=str(path), options=OPTS)


def test_zeiss_tag_field_width_over_stored_columns(tmp_path):
    # the tag's own "Pixel Size" (5.825 nm) belongs to the 1024-px acquisition store: not used
    f = _one(write_zeiss(tmp_path / "zeiss.tif", cols=64))
    assert f.pixel_size_nm == pytest.approx(11.6504, rel=1e-3) and f.calibration == "instrument"


def test_tescan_text_tag_and_stated_strip(tmp_path):
    refs, [f] = _read_all(write_tescan(tmp_path / "tescan.tif", strip=10))
    assert f.pixel_size_nm == pytest.approx(5.5) and f.calibration == "instrument"
    assert f.raw.shape == (48, 64)
    assert any("bottom 10 of 58 rows" in n for n in f.notes)
    assert "5.5 nm (instrument" in refs[0].calibration


def test_tescan_pixel_size_impossible_at_its_magnification_is_refused(tmp_path):
    # the 109.6-dpi screen value read as a scale (231.8 µm per pixel) at 50 kx would need a 740 m display
    path = write_tescan(tmp_path / "bad.tif", px_m="231.77e-6")
    ref = tiff.grainhabit_list_frames(path=str(path), options=OPTS)[0]
    assert ref.calibration.startswith("refused: pixel size 231770 nm is impossible")  # what check shows
    with pytest.raises(ValueError, match="impossible at the file's magnification"):
        tiff.grainhabit_read_frame(ref=ref, options=OPTS)


def test_jeol_xml_pitch_over_magnification(tmp_path):
    # 93 dpi image-plane pitch (273.1 µm) over 150 kx = 1.8208 nm (values of a real JEOL file)
    f = _one(write_jeol(tmp_path / "jeol.tif"))
    assert f.pixel_size_nm == pytest.approx(0.0254 / 93 / 150000 * 1e9) and f.calibration == "instrument"


def test_jeol_diffraction_has_no_specimen_scale(tmp_path):
    f = _one(write_jeol(tmp_path / "diff.tif", mode="DIFF", selector="40"))
    assert math.isnan(f.pixel_size_nm)  # and the 93 dpi tags are not taken either
    assert any("screen or print setting" in n for n in f.notes)


def test_gatan_private_tags(tmp_path):
    f = _one(write_gatan_tags(tmp_path / "gatan.tif"))
    assert f.pixel_size_nm == pytest.approx(168.67469) and f.calibration == "instrument"


def test_description_unit_with_resolution(tmp_path):
    # as an image program writes it: unit=micron in the description, pixels per micron in the tags
    tifffile.imwrite(tmp_path / "ij.tif", noisy((4, 16, 16)), imagej=True,
                     resolution=(1 / 0.16867, 1 / 0.16867), metadata={"unit": "micron", "axes": "ZYX"})
    refs, frames = _read_all(tmp_path / "ij.tif")
    assert len(refs) == 4
    assert all(f.pixel_size_nm == pytest.approx(168.67) and f.calibration == "tiff-description" for f in frames)


def test_pixel_size_written_in_description_text(tmp_path):
    tifffile.imwrite(tmp_path / "d.tif", noisy((16, 16)), description="Acquired\nPixel size = 2.5 nm\n",
                     resolution=(96, 96), resolutionunit="INCH", metadata=None)
    f = _one(tmp_path / "d.tif")
    assert f.pixel_size_nm == pytest.approx(2.5) and f.calibration == "tiff-description"


def test_ome_physical_size_wins_over_resolution_tags(tmp_path):
    img = noisy((3, 20, 30))
    tifffile.imwrite(tmp_path / "s.ome.tif", img, ome=True, resolution=(1e7 / 9.0, 1e7 / 9.0),
                     resolutionunit="CENTIMETER",
                     metadata={"axes": "TYX", "PhysicalSizeX": 3.2, "PhysicalSizeXUnit": "nm",
                               "PhysicalSizeY": 3.2, "PhysicalSizeYUnit": "nm"})
    refs, frames = _read_all(tmp_path / "s.ome.tif")
    assert [r.source.rsplit("#", 1)[1] for r in refs] == ["0", "1", "2"]
    assert all(f.pixel_size_nm == pytest.approx(3.2) and f.calibration == "ome" for f in frames)
    assert len({r.content_hash for r in refs}) == 3


def test_ome_default_unit_is_micrometre(tmp_path):
    tifffile.imwrite(tmp_path / "u.ome.tif", noisy((10, 10)), ome=True,
                     metadata={"axes": "YX", "PhysicalSizeX": 0.004, "PhysicalSizeY": 0.004})
    assert _one(tmp_path / "u.ome.tif").pixel_size_nm == pytest.approx(4.0)


def test_instrument_metadata_wins_over_ome_and_tags(tmp_path):
    blob = b"\x00jP" + b"PixelSizeX=5.5000e-9\r\nPixelSizeY=5.5000e-9\r\nMagnification=50.000e3\r\n"
    tifffile.imwrite(tmp_path / "both.ome.tif", noisy((64, 64)), ome=True, resolution=(1e7 / 9.0,) * 2,
                     resolutionunit="CENTIMETER", metadata={"axes": "YX", "PhysicalSizeX": 0.004},
                     extratags=[(50431, "B", len(blob), blob, True)])
    f = _one(tmp_path / "both.ome.tif")
    assert f.pixel_size_nm == pytest.approx(5.5) and f.calibration == "instrument"


def test_resolution_tags_in_cm_and_non_screen_inch(tmp_path):
    img = noisy((32, 48))
    tifffile.imwrite(tmp_path / "cm.tif", img, resolution=(1e7 / 2.5,) * 2, resolutionunit="CENTIMETER")
    tifffile.imwrite(tmp_path / "in.tif", img, resolution=(2.54e7 / 4.0,) * 2, resolutionunit="INCH")
    cm, inch = _one(tmp_path / "cm.tif"), _one(tmp_path / "in.tif")
    assert cm.pixel_size_nm == pytest.approx(2.5) and cm.calibration == "tiff-resolution"
    assert inch.pixel_size_nm == pytest.approx(4.0) and inch.calibration == "tiff-resolution"
    assert cm.raw.dtype == np.float32 and cm.raw.shape == (32, 48)


@pytest.mark.parametrize("dpi", [72, 93, 96, 150, 300, 600, 109.6])
def test_screen_dpi_is_never_a_scale(tmp_path, dpi):
    tifffile.imwrite(tmp_path / "s.tif", noisy((16, 16)), resolution=(dpi, dpi), resolutionunit="INCH")
    f = _one(tmp_path / "s.tif")
    assert math.isnan(f.pixel_size_nm) and f.calibration == ""  # the host applies input.pixel_size_nm
    refs = tiff.grainhabit_list_frames(path=str(tmp_path / "s.tif"), options={**OPTS, "pixel_size_nm": 4.0})
    assert refs[0].calibration == "4 nm (workflow)"


@pytest.mark.parametrize("compression", ["lzw", "zlib", "zstd", "packbits", "jpeg"])
def test_compressed_tiff(tmp_path, compression):
    img = noisy((64, 80))
    tifffile.imwrite(tmp_path / "c.tif", img, compression=compression, resolution=(1e7 / 2.0,) * 2,
                     resolutionunit="CENTIMETER")
    f = _one(tmp_path / "c.tif")
    assert f.pixel_size_nm == pytest.approx(2.0)
    if compression == "jpeg":  # lossy: close, not equal
        assert np.abs(f.raw - img).mean() < 8
    else:
        assert np.array_equal(f.raw, img.astype(np.float32))


def test_info_strip_found_by_image_analysis(tmp_path):
    img = with_info_strip(noisy((120, 160), seed=3), 14)
    tifffile.imwrite(tmp_path / "strip.tif", img)
    f = _one(tmp_path / "strip.tif")
    assert f.raw.shape == (120, 160)
    assert any("bottom 14 of 134 rows (found by image analysis)" in n for n in f.notes)


def test_foreign_files_are_answered_none_quickly(tmp_path):
    (tmp_path / "notes.txt").write_text("not an image")
    assert tiff.grainhabit_list_frames(path=str(tmp_path / "notes.txt"), options=OPTS) is None
    assert tiff.grainhabit_list_frames(path=str(tmp_path), options=OPTS) is None
    (tmp_path / "bad.tif").write_bytes(b"this is not a tiff")
    with pytest.raises(ValueError, match="bad.tif"):  # named like a TIFF: refused by name
        tiff.grainhabit_list_frames(path=str(tmp_path / "bad.tif"), options=OPTS)


def test_multipage_frames_are_distinct(tmp_path):
    pages = np.stack([np.full((8, 8), i, np.uint8) for i in range(3)])
    tifffile.imwrite(tmp_path / "stack.tif", pages, photometric="minisblack")
    refs, frames = _read_all(tmp_path / "stack.tif")
    assert [f.raw.mean() for f in frames] == [0.0, 1.0, 2.0]
    assert refs[1].source.endswith("stack.tif#1")


def test_tiff_without_tif_suffix_is_read_by_magic(tmp_path):
    tifffile.imwrite(tmp_path / "scan.001", noisy((8, 8)))
    assert len(tiff.grainhabit_list_frames(path=str(tmp_path / "scan.001"), options=OPTS)) == 1


def test_max_pixels_refused_at_listing(tmp_path):
    tifffile.imwrite(tmp_path / "big.tif", noisy((40, 40)))
    with pytest.raises(ValueError, match="max_pixels"):
        tiff.grainhabit_list_frames(path=str(tmp_path / "big.tif"), options={**OPTS, "max_pixels": 100})


def test_rgb_to_luminance_with_note(tmp_path):
    rgb = np.zeros((10, 10, 3), np.uint8)
    rgb[..., 1] = 200
    tifffile.imwrite(tmp_path / "rgb.tif", rgb, photometric="rgb")
    f = _one(tmp_path / "rgb.tif")
    # ITU-R BT.709 luma weights: Y = 0.2126 R + 0.7152 G + 0.0722 B
    assert f.raw.shape == (10, 10) and f.raw.mean() == pytest.approx(0.7152 * 200, rel=1e-5)
    assert any("luminance" in n for n in f.notes)


def test_override_uses_the_workflow_pixel_size(tmp_path):
    opts = {**OPTS, "calibration": "override", "pixel_size_nm": 7.0}
    f = _one(write_tescan(tmp_path / "t.tif"), opts)
    assert f.pixel_size_nm == 7.0 and f.calibration == "workflow"
    assert any("override" in n and "5.5 nm" in n for n in f.notes)


def test_zeiss_pixel_size_scaled_from_the_image_store_without_a_field_width(tmp_path):
    text = ("0\r\n0\r\n1\r\nDP_IMAGE_STORE\r\nStore resolution = 1024 * 768\r\nAP_MAG\r\nMag =  50.00 K X\r\n"
            "AP_PIXEL_SIZE\r\nPixel Size = 5.825 nm\r\n")
    tifffile.imwrite(tmp_path / "z.tif", noisy((48, 64)), extratags=[(34118, "s", 0, text.encode("latin-1"), True)])
    f = _one(tmp_path / "z.tif")
    assert f.pixel_size_nm == pytest.approx(5.825 * 1024 / 64) and f.calibration == "instrument"


def test_colour_planes_stored_separately_make_one_frame(tmp_path):
    # TIFF's separate planar configuration (TIFF 6.0, PlanarConfiguration = 2): the red, green and blue planes one
    # after the other are one colour image, read as one frame like the same image stored pixel by pixel
    rng = np.random.default_rng(2)
    grey = rng.integers(0, 256, (40, 50), dtype=np.uint8)
    colour = np.stack([grey, grey // 2, 255 - grey])
    tifffile.imwrite(tmp_path / "planar.tif", colour, photometric="rgb", planarconfig="separate")
    tifffile.imwrite(tmp_path / "contig.tif", np.moveaxis(colour, 0, -1), photometric="rgb")
    refs, frames = _read_all(tmp_path / "planar.tif")
    assert len(refs) == 1 and frames[0].raw.shape == (40, 50)
    _, [contig] = _read_all(tmp_path / "contig.tif")
    assert np.array_equal(frames[0].raw, contig.raw)
    assert any("luminance" in n for n in frames[0].notes)
    # two such images in one file: two frames, in order
    tifffile.imwrite(tmp_path / "two.tif", np.stack([colour, colour[:, ::-1]]), photometric="rgb",
                     planarconfig="separate")
    refs, frames = _read_all(tmp_path / "two.tif")
    assert len(refs) == 2 and np.array_equal(frames[0].raw, contig.raw)
    assert np.array_equal(frames[1].raw, contig.raw[::-1])


@pytest.mark.parametrize("pixel_nm, stored", [(1.4208, 1.4208), (1.4208, 1.4208e-9)])
def test_tvips_camera_header_pixel_size(tmp_path, pixel_nm, stored):
    # A TVIPS camera TIFF: the EM-MENU header (version 2) in tag 37706, built from tifffile's own record
    # layout (tifffile.TIFF.TVIPS_HEADER_V1/V2); its PixelSizeX/Y is in nm (1.4208 nm: the value stated for
    # the TVIPS test file in the tests of RosettaSciIO, an open EM file reader). tifffile before 2023 handed
    # it on in m: the size tells which.
    T = tifffile.TIFF
    v1, v2 = np.zeros(1, np.dtype(T.TVIPS_HEADER_V1)), np.zeros(1, np.dtype(T.TVIPS_HEADER_V2))
    v1["Version"], v2["Magic"], v2["PixelSizeX"], v2["PixelSizeY"] = 2, 0xAAAAAAAA, stored, stored
    blob = v1.tobytes() + v2.tobytes()
    tifffile.imwrite(tmp_path / "cam.tif", noisy((40, 48)), extratags=[(37706, "B", len(blob), blob, True)])
    f = _one(tmp_path / "cam.tif")
    assert f.calibration == "instrument" and f.pixel_size_nm == pytest.approx(pixel_nm, rel=1e-5)
    # a version-1 header states no pixel size: no instrument scale from it
    v1["Version"] = 1
    blob = v1.tobytes()
    tifffile.imwrite(tmp_path / "old.tif", noisy((40, 48)), extratags=[(37706, "B", len(blob), blob, True)])
    g = _one(tmp_path / "old.tif")
    assert g.calibration != "instrument" and math.isnan(g.pixel_size_nm)


def _olympus_sis(path, pixel_m, pages):
    """An Olympus soft-imaging TIFF: tag 33560 laid out as tifffile's reader expects it (a 'SIS0' header, one
    entry of type 1 pointing, by file offset, at the general block with the pixel size as a mantissa and a
    power of ten), on the first of ``pages``."""
    import struct

    header = struct.pack("<4s6xhhhhh6x32sH", b"SIS0", 0, 10, 1, 0, 126, b"field".ljust(32, b"\0"), 1)
    general = struct.pack("<10xhdd8xd2x34s32s", -9, pixel_m / 1e-9, pixel_m / 1e-9, 50000.0,
                          b"camera".ljust(34, b"\0"), b"image".ljust(32, b"\0"))
    blob = header + struct.pack("<hhI", 1, 1, 0) + general
    for k, page in enumerate(pages):
        extra = [(33560, "B", len(blob), blob, True)] if k == 0 else []
        tifffile.imwrite(path, page, append=k > 0, metadata=None, extratags=extra,
                         photometric="rgb" if page.ndim == 3 else "minisblack")
    with tifffile.TiffFile(path) as tif:
        offset = tif.pages[0].tags[33560].valueoffset
    with open(path, "r+b") as fh:  # the entry's pointer to the general block, now that its place is known
        fh.seek(offset + len(header) + 4)
        fh.write(struct.pack("<I", offset + len(header) + 8))
    return path


def test_olympus_sis_colour_preview_is_not_a_second_field(tmp_path):
    # Such a file can hold an 8-bit RGB rendering first and the 16-bit data after it (the layout described for
    # the Olympus soft-imaging test file of RosettaSciIO's tests: two images of 112 x 101 px, only the
    # second the data). tifffile reads it as one series of the first page's shape; the data page is the
    # frame, at the file's pixel size (0.023928 nm), and the preview is skipped with a note.
    preview = np.random.default_rng(0).integers(0, 255, (40, 48, 3)).astype(np.uint8)
    data = noisy((40, 48), mean=3000, sd=300, dtype=np.uint16)
    refs, frames = _read_all(_olympus_sis(tmp_path / "sis.tif", 0.023928e-9, [preview, data]))
    assert len(refs) == 1
    [f] = frames
    assert f.calibration == "instrument" and f.pixel_size_nm == pytest.approx(0.023928)
    assert np.array_equal(f.raw, data.astype(np.float32))
    assert any("colour preview" in n for n in f.notes)
    # two grey pages of one file stay two frames
    refs, frames = _read_all(_olympus_sis(tmp_path / "two.tif", 0.5e-9, [data, data[::-1].copy()]))
    assert len(frames) == 2 and np.array_equal(frames[1].raw, data[::-1].astype(np.float32))
