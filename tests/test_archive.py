"""grainhabit ingest: chunked zarr archive, calibration kept, reruns add only new or changed frames."""

from __future__ import annotations

import numpy as np
import zarr

from grainhabit.plugins.readers import archive

from builders import draw_frame, run_cli, write_tiff


def test_ingest_then_add_only_new_or_changed(tmp_path):
    data = tmp_path / "in"
    write_tiff(data / "s1" / "a.tif", draw_frame(discs=[(50, 50, 10)]), 5.0)
    write_tiff(data / "s1" / "b.tif", draw_frame(discs=[(80, 80, 12)]), None)
    arch = tmp_path / "arch.zarr"
    proc = run_cli("ingest", data, "--into", arch, "--pixel-size-nm", "7.5", "--chunk", "128")
    assert proc.returncode == 0, proc.stderr
    assert "2 frames added" in proc.stdout
    root = zarr.open_group(str(arch), mode="r")
    arrays = {root["frames"][e["array"]].attrs["source"]: root["frames"][e["array"]]
              for e in root.attrs["index"].values()}
    a = arrays[str(data / "s1" / "a.tif")]
    assert a.chunks == (128, 128) and a.attrs["pixel_size_nm"] == 5.0 and a.attrs["calibration"] == "tiff-resolution"
    b = arrays[str(data / "s1" / "b.tif")]
    assert b.attrs["pixel_size_nm"] == 7.5 and b.attrs["calibration"] == "workflow"
    np.testing.assert_array_equal(a[...], draw_frame(discs=[(50, 50, 10)]))

    proc = run_cli("ingest", data, "--into", arch)
    assert "0 frames added, 0 changed, 2 unchanged" in proc.stdout
    write_tiff(data / "s1" / "b.tif", draw_frame(discs=[(90, 90, 12)]), 5.0)   # changed
    write_tiff(data / "s2" / "c.tif", draw_frame(discs=[(40, 40, 9)]), 5.0)    # new
    proc = run_cli("ingest", data, "--into", arch)
    assert "1 frames added, 1 changed, 1 unchanged" in proc.stdout
    refs = archive.grainhabit_list_frames(path=str(arch), options={"max_pixels": 0})
    assert len(refs) == 3
    frame = archive.grainhabit_read_frame(ref=[r for r in refs if r.source.endswith("b.tif")][0], options={})
    np.testing.assert_array_equal(frame.raw, draw_frame(discs=[(90, 90, 12)]).astype(np.float32))
    assert frame.pixel_size_nm == 5.0


def test_ingest_refuses_a_foreign_store(tmp_path):
    other = tmp_path / "other.zarr"
    zarr.open_group(str(other), mode="w")
    write_tiff(tmp_path / "in" / "a.tif", draw_frame(), 5.0)
    proc = run_cli("ingest", tmp_path / "in", "--into", other)
    assert proc.returncode == 2 and "not a grainhabit archive" in proc.stderr
