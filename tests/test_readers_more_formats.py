"""Readers of more formats of the optional library: Semper UNF, Digital Surf, HyperSpy HDF5, TVIPS, JEOL, Bruker.

The files are written here by the optional library's own writers (Semper, Digital Surf, HyperSpy, TVIPS),
with a pixel size stated in nm, and read back through the reader plugins: the frames, their pixels and the
pixel size the file states (source ``instrument``). JEOL image files and Bruker composite files cannot be
written by any library at hand: for those (and all six) that foreign files are passed over; the one-line
message when the optional library is missing is tested with the other readers' in test_readers_formats.py.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
from builders import OPTS

from grainhabit.plugins.readers import bruker, digitalsurf, hspy, jeol, semper, tvips

NEW_READERS = (jeol, bruker, tvips, semper, digitalsurf, hspy)


def _read_all(mod, path, opts=OPTS):
    refs = mod.grainhabit_list_frames(path=str(path), options=opts)
    return refs, [mod.grainhabit_read_frame(ref=r, options=opts) for r in refs]


def _signal(data, scale_nm, nav=0):
    names = ("y", "x")
    axes = [{"name": "time", "size": data.shape[0], "scale": 0.1, "units": "s", "offset": 0.0, "navigate": True}
            for _ in range(nav)]
    axes += [{"name": n, "size": s, "scale": scale_nm, "units": "nm", "offset": 0.0, "navigate": False}
             for n, s in zip(names, data.shape[nav:])]
    # the keys a HyperSpy signal carries (the writers read some of them)
    return {"data": data, "axes": axes, "original_metadata": {}, "tmp_parameters": {}, "attributes": {"_lazy": False},
            "learning_results": {}, "models": {}, "package_info": {"name": "grainhabit-test", "version": "0"},
            "metadata": {"General": {"title": "field 1", "date": "2026-01-01", "time": "10:00:00"},
                         "Signal": {"signal_type": ""}}}


def _field(shape, dtype):
    rng = np.random.default_rng(1)
    return rng.integers(0, 200, shape).astype(dtype)


@pytest.mark.parametrize("module,library,name,dtype", [
    (semper, "semper", "field.unf", np.int16),
    (digitalsurf, "digitalsurf", "field.sur", np.int32),
    (hspy, "hspy", "field.hspy", np.uint16),
])
def test_an_image_written_by_the_library_is_one_frame_at_its_stated_scale(tmp_path, module, library, name, dtype):
    lib = pytest.importorskip(f"rsciio.{library}")
    if library == "hspy":
        pytest.importorskip("h5py")
    data = _field((24, 32), dtype)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        lib.file_writer(str(tmp_path / name), _signal(data, 2.5))
    refs, [f] = _read_all(module, tmp_path / name)
    assert len(refs) == 1 and refs[0].reader == module.NAME
    assert f.pixel_size_nm == pytest.approx(2.5) and f.calibration == "instrument"
    assert f.raw.shape == (24, 32)
    assert np.array_equal(f.raw, data.astype(np.float32))


def test_a_tvips_recording_is_read_from_its_first_part(tmp_path):
    lib = pytest.importorskip("rsciio.tvips")
    data = _field((3, 24, 32), np.uint16)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        lib.file_writer(str(tmp_path / "movie.tvips"), _signal(data, 3.0, nav=1))
    first = tmp_path / "movie_000.tvips"  # the writer numbers the parts
    assert first.is_file()
    refs, frames = _read_all(tvips, first)
    assert [r.source.rsplit("#", 1)[1] for r in refs] == ["0", "1", "2"]
    for k, f in enumerate(frames):
        assert np.array_equal(f.raw, data[k].astype(np.float32))
        # the library's writer leaves the header's pixel size at 0 nm: no specimen scale, said in a note
        # (the host then applies input.pixel_size_nm, as for any file without a scale)
        assert math.isnan(f.pixel_size_nm) and any("not a positive number" in n for n in f.notes)
    # a later part of the same recording lists no frames of its own (they are read through the first)
    (tmp_path / "movie_001.tvips").write_bytes(first.read_bytes()[:256])
    assert tvips.grainhabit_list_frames(path=str(tmp_path / "movie_001.tvips"), options=OPTS) == []


def test_the_new_readers_pass_over_foreign_files(tmp_path):
    (tmp_path / "notes.txt").write_text("[SemImageFile]\nPixelSize=5\n")
    (tmp_path / "disk.img").write_bytes(b"\xeb\x3c\x90" + bytes(60))  # a disk image, not JEOL's
    (tmp_path / "table.sur").write_text("surname,name\n")
    (tmp_path / "data.hspy").write_text("not HDF5")
    for path in ("notes.txt", "disk.img", "table.sur", "data.hspy", "."):
        for module in NEW_READERS:
            assert module.grainhabit_list_frames(path=str(tmp_path / path), options=OPTS) is None, (module, path)


def test_a_broken_file_of_a_recognised_format_fails_in_one_line_naming_it(tmp_path):
    pytest.importorskip("rsciio.digitalsurf")
    path = tmp_path / "broken.sur"
    path.write_bytes(b"DIGITAL SURF" + bytes(40))
    with pytest.raises(ValueError) as err:
        digitalsurf.grainhabit_list_frames(path=str(path), options=OPTS)
    msg = str(err.value)
    assert msg.startswith(f"{path}: not a readable Digital Surf SUR file") and "\n" not in msg


def test_a_lazy_image_is_read_in_the_reading_thread_whatever_scheduler_is_set():
    # Inside a worker of a cluster dask's default scheduler is the cluster's, which could not ship the Semper
    # reader's lazy graph ("Could not serialize object"): the frame failed in a run. The pixels are computed
    # in the reading thread whatever scheduler is configured (here one that refuses every graph).
    da = pytest.importorskip("dask.array")
    import dask

    from grainhabit.plugins.readers import signals

    def refuse(*args, **kwargs):
        raise RuntimeError("no graph may leave the reading thread")

    stack = np.arange(2 * 6 * 7, dtype=np.int16).reshape(2, 6, 7)
    sig = {"data": da.from_array(stack, chunks=(1, 6, 7))}
    with dask.config.set(scheduler=refuse):
        got = signals.pixels(sig, 1)
    assert np.array_equal(got, stack[1])


def test_a_jeol_element_map_is_not_taken_for_an_mrc_map(tmp_path):
    # ".map" is both an MRC suffix and JEOL's element-map suffix: a file with JEOL's image signature and no
    # MRC2014 "MAP" word at byte 208 goes to read-jeol; an MRC map (written by mrcfile) stays read-mrc's
    import mrcfile

    from grainhabit.plugins.readers import mrc

    (tmp_path / "Fe.map").write_bytes(b"4\x00\x00\x00" + bytes(300))
    assert not mrc.recognises(str(tmp_path / "Fe.map")) and jeol.recognises(str(tmp_path / "Fe.map"))
    with mrcfile.new(tmp_path / "density.map") as m:
        m.set_data(np.zeros((4, 52, 52), np.float32))  # 52 columns: its first word is JEOL's signature too
    assert mrc.recognises(str(tmp_path / "density.map")) and not jeol.recognises(str(tmp_path / "density.map"))


def test_images_of_one_scan_through_several_detectors_are_one_frame():
    # A scanning microscope's file with the HAADF and the BF image of one scan (same size, same calibration):
    # one field, its grains counted once; an image of another size and a stack of a series are frames each.
    from grainhabit.plugins.readers import signals

    def axis(name, size, scale=0.5, nav=False):
        return {"name": name, "size": size, "scale": scale, "units": "nm", "navigate": nav}

    haadf = {"data": np.zeros((8, 9)), "axes": [axis("y", 8), axis("x", 9)]}
    bf = {"data": np.ones((8, 9)), "axes": [axis("y", 8), axis("x", 9)]}
    finer = {"data": np.zeros((8, 9)), "axes": [axis("y", 8, 0.25), axis("x", 9, 0.25)]}
    series = {"data": np.zeros((2, 8, 9)), "axes": [axis("t", 2, 1.0, True), axis("y", 8), axis("x", 9)]}
    frames, skipped = signals.index([haadf, bf, finer, series])
    assert [(s, k) for s, k, _ in frames] == [(0, 0), (2, 0), (3, 0), (3, 1)]
    assert len(skipped) == 1 and "same field as signal 0" in skipped[0]
