"""Readers of MRC, bitmap exports, the Hitachi text file, and the optional library's formats.

DM3/DM4, TIA SER and Phenom ELID cannot be written by any library at hand,
so those readers are checked on real files by tests/test_readers_realfiles.py
(skipped where the files are absent); here: EMD written by the optional
library itself, the signal-to-frame logic, and the one-line message when the
optional library is missing.
"""

from __future__ import annotations

import math
import sys

import mrcfile
import numpy as np
import pytest
import tifffile
from PIL import Image
from builders import OPTS, noisy, with_info_strip

from grainhabit.plugins.readers import (bruker, digitalsurf, emd, gatan, hspy, jeol, mrc, phenom, plain, semper, sidecar,
                                        signals, tia, tiff, tvips)

READERS = (tiff, mrc, gatan, emd, tia, phenom, plain)


def _read_all(mod, path, opts=OPTS):
    refs = mod.grainhabit_list_frames(path=str(path), options=opts)
    return refs, [mod.grainhabit_read_frame(ref=r, options=opts) for r in refs]


def _write_mrc(path, sections=3, voxel=(2.0, 2.0, 2.0)):
    data = np.stack([np.full((16, 20), i, np.float32) for i in range(sections)])
    with mrcfile.new(path, overwrite=True) as m:
        m.set_data(data)
        m.voxel_size = voxel  # Å, as the header stores it (a real stack: 2 Å = 0.2 nm)
    return path


def test_mrc_every_section_is_a_frame_with_the_header_scale(tmp_path):
    refs, frames = _read_all(mrc, _write_mrc(tmp_path / "stack.mrc"))
    assert [r.source.rsplit("#", 1)[1] for r in refs] == ["0", "1", "2"]
    assert [f.raw.mean() for f in frames] == [0.0, 1.0, 2.0]
    assert all(f.pixel_size_nm == pytest.approx(0.2) and f.calibration == "instrument" for f in frames)
    assert refs[0].calibration.startswith("0.2 nm (instrument")


def test_mrc_without_cell_size_has_no_scale(tmp_path):
    _, [f] = _read_all(mrc, _write_mrc(tmp_path / "plain.mrc", sections=1, voxel=(0.0, 0.0, 0.0)))
    assert math.isnan(f.pixel_size_nm) and any("no pixel size" in n for n in f.notes)


def test_non_square_pixels_are_resampled_to_the_finer_side(tmp_path):
    # 1.0 x 0.2 nm pixels (the values of a real DM4 test file): x is stretched 5 times
    _, [f] = _read_all(mrc, _write_mrc(tmp_path / "ns.mrc", sections=1, voxel=(10.0, 2.0, 2.0)))
    assert f.pixel_size_nm == pytest.approx(0.2) and f.raw.shape == (16, 100)
    assert any("resampled to square 0.2 nm" in n for n in f.notes)


def test_non_square_pixels_too_far_from_square_are_refused(tmp_path):
    refs = mrc.grainhabit_list_frames(path=str(_write_mrc(tmp_path / "ns.mrc", 1, (20.0, 1.0, 1.0))), options=OPTS)
    with pytest.raises(ValueError, match="non-square pixels .* refused"):
        mrc.grainhabit_read_frame(ref=refs[0], options=OPTS)


@pytest.mark.parametrize("fmt", ["PNG", "JPEG", "BMP"])
def test_bitmap_exports_take_the_workflow_scale(tmp_path, fmt):
    path = tmp_path / f"export.{fmt.lower()}"
    Image.fromarray(noisy((40, 50))).save(path, format=fmt, dpi=(96, 96))
    refs, [f] = _read_all(plain, path, {**OPTS, "pixel_size_nm": 3.0})
    assert math.isnan(f.pixel_size_nm) and f.raw.shape == (40, 50)  # the host applies 3.0 nm (workflow)
    assert refs[0].calibration == "3 nm (workflow)" and refs[0].reader == "read-bitmap"


def test_grey_rgb_export_uses_one_channel(tmp_path):
    grey = noisy((30, 30))
    Image.fromarray(np.stack([grey] * 3, -1)).save(tmp_path / "g.png")
    _, [f] = _read_all(plain, tmp_path / "g.png")
    assert np.array_equal(f.raw, grey.astype(np.float32))


def test_hitachi_text_file_beside_a_tiff(tmp_path):
    # [SemImageFile] with PixelSize in nm and DataSize (the scanned image, without the strip below it)
    img = with_info_strip(noisy((56, 80)), 8)
    tifffile.imwrite(tmp_path / "s4800_01.tif", img, resolution=(96, 96), resolutionunit="INCH")
    (tmp_path / "s4800_01.txt").write_text("[SemImageFile]\nInstructName=S-4800\nDataSize=80x56\n"
                                           "PixelSize=19.84375\nMagnification=100000\n")
    _, [f] = _read_all(tiff, tmp_path / "s4800_01.tif")
    assert f.pixel_size_nm == pytest.approx(19.84375) and f.calibration == "instrument"
    assert f.raw.shape == (56, 80) and any("image height of 56 rows" in n for n in f.notes)


def test_hitachi_text_file_beside_a_bitmap(tmp_path):
    Image.fromarray(noisy((40, 64))).save(tmp_path / "a.bmp")
    (tmp_path / "a.txt").write_text("[SemImageFile]\nDataSize=64x40\nPixelSize=12.5\nMagnification=200000\n")
    _, [f] = _read_all(plain, tmp_path / "a.bmp")
    assert f.pixel_size_nm == pytest.approx(12.5) and f.calibration == "instrument"


def test_emd_written_by_the_optional_library(tmp_path):
    rsciio_emd = pytest.importorskip("rsciio.emd")
    pytest.importorskip("h5py")
    data = np.arange(24 * 32, dtype=np.uint16).reshape(24, 32)
    axes = [{"name": n, "size": s, "scale": 3.13884, "units": "nm", "offset": 0.0, "navigate": False}
            for n, s in (("y", 24), ("x", 32))]
    rsciio_emd.file_writer(str(tmp_path / "cam.emd"), {"data": data, "axes": axes, "original_metadata": {},
                                                       "metadata": {"General": {"title": "camera"}, "Signal": {}}})
    refs, [f] = _read_all(emd, tmp_path / "cam.emd")
    assert refs[0].reader == "read-emd"
    assert f.pixel_size_nm == pytest.approx(3.13884) and f.calibration == "instrument"
    assert np.array_equal(f.raw, data.astype(np.float32))


def test_signals_to_frames_stacks_and_skipped_signals():
    def axis(name, size, nav=False, units="nm", scale=0.5):
        return {"name": name, "size": size, "scale": scale, "units": units, "navigate": nav}

    image = {"data": np.zeros((8, 9)), "axes": [axis("y", 8, units="Å", scale=2.0), axis("x", 9, units="Å", scale=2.0)]}
    stack = {"data": np.zeros((3, 8, 9)), "axes": [axis("z", 3, nav=True), axis("y", 8), axis("x", 9)]}
    plot = {"data": np.zeros(512), "axes": [axis("x", 512, units="")]}
    diffraction = {"data": np.zeros((8, 8)), "axes": [axis("y", 8, units="1 / nm"), axis("x", 8, units="1 / nm")]}
    frames, skipped = signals.index([image, plot, stack, diffraction])
    assert [(s, k) for s, k, _ in frames] == [(0, 0), (2, 0), (2, 1), (2, 2), (3, 0)]
    assert len(skipped) == 1 and "1-D" in skipped[0]
    cal, _ = signals.calibration(image, "test")
    assert cal.x_nm == pytest.approx(0.2) and cal.source == "instrument"
    cal, why = signals.calibration(diffraction, "test")
    assert cal is None and "no length unit" in why


@pytest.mark.parametrize("module,library,name,start,fmt", [
    (gatan, "digitalmicrograph", "x.dm3", b"\x00\x00\x00\x03", "DM3"),
    (gatan, "digitalmicrograph", "x.dm4", b"\x00\x00\x00\x04", "DM4"),
    (tia, "tia", "x_1.ser", b"II\x97\x01", "SER"),
    (phenom, "phenom", "x.elid", b"\x00", "ELID"),
    (jeol, "jeol", "x.img", b"4\x00\x00\x00", "JEOL IMG"),
    (jeol, "jeol", "x.map", b"4\x00\x00\x00", "JEOL MAP"),
    (bruker, "bruker", "x.bcf", b"AAMVHFSS", "BCF"),
    (tvips, "tvips", "x_000.tvips", b"\x00\x01\x00\x00", "TVIPS"),
    (semper, "semper", "x.unf", b"\x0c\x00\x00\x00", "Semper UNF"),
    (digitalsurf, "digitalsurf", "x.sur", b"DIGITAL SURF", "Digital Surf SUR"),
    (hspy, "hspy", "x.hspy", b"\x89HDF\r\n\x1a\n", "HSPY"),
])
def test_missing_optional_library_gives_one_line(tmp_path, monkeypatch, module, library, name, start, fmt):
    path = tmp_path / name
    path.write_bytes(start + bytes(60))
    monkeypatch.setitem(sys.modules, f"rsciio.{library}", None)  # import fails as if not installed
    with pytest.raises(ValueError) as err:
        module.grainhabit_list_frames(path=str(path), options=OPTS)
    assert str(err.value) == f"install grainhabit[all] to read {fmt} (the optional reader library is missing)"


def test_emi_file_is_read_through_its_ser_files(tmp_path):
    (tmp_path / "scan.emi").write_bytes(b"\x00" * 32)
    with pytest.raises(ValueError, match=r"\.ser data files are missing"):
        tia.grainhabit_list_frames(path=str(tmp_path / "scan.emi"), options=OPTS)
    (tmp_path / "scan_1.ser").write_bytes(b"II\x97\x01" + bytes(60))
    assert tia.grainhabit_list_frames(path=str(tmp_path / "scan.emi"), options=OPTS) == []


def test_every_reader_passes_over_foreign_files(tmp_path):
    (tmp_path / "notes.txt").write_text("[SemImageFile]\nPixelSize=5\n")
    (tmp_path / "table.csv").write_text("a,b\n1,2\n")
    (tmp_path / "fake.dm3").write_bytes(b"not a dm3 file")
    for path in ("notes.txt", "table.csv", "fake.dm3", "."):
        for module in READERS:
            assert module.grainhabit_list_frames(path=str(tmp_path / path), options=OPTS) is None, (module, path)


def test_jeol_sem_text_file_beside_a_tiff(tmp_path):
    # $KEY value lines: a 160-px scale bar of 5 µm -> 31.25 nm per pixel; the scanned image is 80 x 56 px
    tifffile.imwrite(tmp_path / "jsm_01.tif", with_info_strip(noisy((56, 80)), 12))
    (tmp_path / "jsm_01.txt").write_text("$CM_FORMAT JEOL/SEM\n$CM_MAG 20000\n$CM_FULL_SIZE 80 56\n"
                                         "$$SM_MICRON_BAR 160\n$$SM_MICRON_MARKER 5um\n")
    _, [f] = _read_all(tiff, tmp_path / "jsm_01.tif")
    assert f.pixel_size_nm == pytest.approx(31.25) and f.calibration == "instrument"
    assert f.raw.shape == (56, 80)


def test_sem_text_file_as_an_input_lists_no_frames(tmp_path):
    (tmp_path / "a.txt").write_text("[SemImageFile]\nPixelSize=12.5\n")
    with pytest.raises(ValueError, match="image .* is missing"):
        sidecar.grainhabit_list_frames(path=str(tmp_path / "a.txt"), options=OPTS)
    Image.fromarray(noisy((8, 8))).save(tmp_path / "a.bmp")
    assert sidecar.grainhabit_list_frames(path=str(tmp_path / "a.txt"), options=OPTS) == []
    (tmp_path / "notes.txt").write_text("no SEM keys here")
    assert sidecar.grainhabit_list_frames(path=str(tmp_path / "notes.txt"), options=OPTS) is None


def test_tescan_hdr_file_beside_a_tiff_without_the_tag(tmp_path):
    img = with_info_strip(noisy((48, 64), dtype=np.uint16, mean=9000, sd=900), 10, background=20000)
    tifffile.imwrite(tmp_path / "vega_01.tif", img)
    (tmp_path / "vega_01-tif.hdr").write_text("[MAIN]\r\nImageStripSize=10\r\nMagnification=50.000e3\r\n"
                                              "PixelSizeX=5.5000e-9\r\nPixelSizeY=5.5000e-9\r\n")
    _, [f] = _read_all(tiff, tmp_path / "vega_01.tif")
    assert f.pixel_size_nm == pytest.approx(5.5) and f.calibration == "instrument" and f.raw.shape == (48, 64)
    assert sidecar.grainhabit_list_frames(path=str(tmp_path / "vega_01-tif.hdr"), options=OPTS) == []


def test_colour_records_become_rgb():
    rec = np.zeros((4, 5), dtype=[("R", "u1"), ("G", "u1"), ("B", "u1"), ("A", "u1")])
    rec["G"] = 200
    out = signals.pixels({"data": rec}, 0)
    assert out.shape == (4, 5, 3) and out[..., 1].max() == 200


def test_pixels_without_a_finite_value_are_filled_and_excluded(tmp_path):
    # a corrected float image with dead pixels stored as NaN and a division by zero stored as inf (invented):
    # the frame is read, its non-finite pixels take the grey level around them and are marked invalid
    img = np.full((64, 80), 100.0, np.float32)
    img[20:40, 30:50] = 180.0
    img[5:8, 5:9] = np.nan
    img[50, 60] = np.inf
    img[25, 35] = -np.inf
    tifffile.imwrite(tmp_path / "corrected.tif", img)
    _, [f] = _read_all(tiff, tmp_path / "corrected.tif")
    assert np.all(np.isfinite(f.raw))
    bad = ~np.isfinite(img)
    assert f.valid is not None and np.array_equal(~f.valid, bad)
    assert np.all(f.raw[5:8, 5:9] == 100.0) and f.raw[50, 60] == 100.0 and f.raw[25, 35] == 180.0
    assert any("14 px without a finite value" in n for n in f.notes)
    # the same through MRC, whose float sections are the common case
    with mrcfile.new(tmp_path / "dead.mrc", overwrite=True) as m:
        m.set_data(img[None])
        m.voxel_size = (5.0, 5.0, 5.0)
    _, [g] = _read_all(mrc, tmp_path / "dead.mrc")
    assert np.array_equal(~g.valid, bad) and np.all(np.isfinite(g.raw))


def test_a_frame_without_any_finite_pixel_is_refused_in_one_line(tmp_path):
    tifffile.imwrite(tmp_path / "empty.tif", np.full((16, 16), np.nan, np.float32))
    with pytest.raises(ValueError, match=r"empty\.tif: no pixel holds a finite value") as err:
        _read_all(tiff, tmp_path / "empty.tif")
    assert "\n" not in str(err.value)
