"""Real instrument files (optional): every file of ../shared/realdata/instrument_files at the README's pixel size.

The folder is not part of the repository; the test skips where it is absent.
Expected values are those of the folder's README table (what each file
itself states, checked there with a general-purpose reader), within 1 %.
"""

from __future__ import annotations

import os
from pathlib import Path

import pytest

from grainhabit.manager import make_host

# ../shared/realdata beside the repository; GRAINHABIT_REALDATA names another place (a worktree elsewhere)
REALDATA = Path(os.environ.get("GRAINHABIT_REALDATA") or Path(__file__).resolve().parents[1].parent / "shared" / "realdata")
FOLDER = REALDATA / "instrument_files"

# file -> (reader, pixel size in nm as the frame is measured, frames, rows kept (None: all))
EXPECTED = {
    "IrCo8020_50000x_center.tif": ("read-tiff", 5.5, 1, 768),  # 90-row strip stated in tag 50431
    "IrCo8020_10000x_center.tif": ("read-tiff", 27.5, 1, 768),
    "Co_10000x_center.tif": ("read-tiff", 27.5, 1, 768),
    "test_tiff_Zeiss_SEM_512pix.tif": ("read-tiff", 11.65, 1, None),
    "FEI-Helios-Ebeam-8bits.tif": ("read-tiff", 3372.4, 1, 442),  # [Image] ResolutionY
    "jeol_tem_dummy.tif": ("read-tiff", 1.8208, 1, None),
    "stem_68px_private_tags.tif": ("read-tiff", 168.675, 1, None),
    "stem_68px_description_unit.tif": ("read-tiff", 168.67, 1, None),
    "multi_signal.dm3": ("read-gatan-dm", 0.017752, 1, None),
    "nonsquare_pixels.dm4": ("read-gatan-dm", 0.2, 1, None),  # x 1.0, y 0.2 nm: resampled to 0.2 nm
    "ceta_camera_512.emd": ("read-emd", 3.13884, 1, None),
    "stack_3x128.mrc": ("read-mrc", 0.2, 3, None),
}

pytestmark = pytest.mark.skipif(not FOLDER.is_dir(), reason="../shared/realdata/instrument_files is absent")

OPTIONS = {"max_pixels": 1_000_000_000, "pixel_size_nm": None, "calibration": "auto"}


@pytest.fixture(scope="module")
def host():
    return make_host(autoload=False)


@pytest.mark.parametrize("name", sorted(EXPECTED))
def test_real_file_is_read_at_its_stated_pixel_size(host, name):
    pytest.importorskip("rsciio") if name.endswith((".dm3", ".dm4", ".emd")) else None
    reader, size, n_frames, rows = EXPECTED[name]
    refs = host.first_answer("grainhabit_list_frames", path=str(FOLDER / name), options=OPTIONS)
    assert refs is not None and len(refs) == n_frames and {r.reader for r in refs} == {reader}
    for ref in refs:
        frame = host.first_answer("grainhabit_read_frame", ref=ref, options=OPTIONS)
        assert frame.calibration == ("tiff-description" if "description" in name else "instrument")
        assert frame.pixel_size_nm == pytest.approx(size, rel=0.01)
        if rows is not None:
            assert frame.raw.shape[0] == rows


def test_zeiss_info_strip_is_found_by_image_analysis(host):
    ref, = host.first_answer("grainhabit_list_frames", path=str(FOLDER / "test_tiff_Zeiss_SEM_512pix.tif"),
                             options=OPTIONS)
    frame = host.first_answer("grainhabit_read_frame", ref=ref, options=OPTIONS)
    assert 320 <= frame.raw.shape[0] < 384  # the strip (about a tenth of the height) is gone
    assert any("found by image analysis" in n for n in frame.notes)


def test_every_file_of_the_folder_is_read_or_passed_over(host):
    for path in sorted(FOLDER.iterdir()):
        refs = host.first_answer("grainhabit_list_frames", path=str(path), options=OPTIONS)
        assert (refs is None) == (path.suffix == ".txt"), path.name
