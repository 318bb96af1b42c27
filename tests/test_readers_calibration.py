"""Calibration rules shared by the readers: units, screen densities, plausibility, non-square pixels, override."""

from __future__ import annotations

import math

import numpy as np
import pytest
from builders import OPTS

from grainhabit.frame import FrameRef
from grainhabit.plugins.readers import calibration as cal
from grainhabit.plugins.readers.common import finish


def test_units_to_nm():
    # SI prefixes (BIPM SI brochure): 1 Å = 0.1 nm, 1 µm = 1000 nm
    assert cal.unit_to_nm("µm") == 1e3 and cal.unit_to_nm("micron") == 1e3 and cal.unit_to_nm("Å") == 0.1
    assert cal.unit_to_nm(" nm ") == 1.0 and cal.unit_to_nm(b"\xb5m".decode("latin-1")) == 1e3
    assert cal.unit_to_nm("pixel") is None and cal.unit_to_nm(None) is None


@pytest.mark.parametrize("ppi", [72, 93, 96, 109.6, 150, 300, 600, 1200, 2400, 4800])
def test_screen_and_print_densities_are_never_a_scale(ppi):
    assert cal.is_screen_dpi(ppi)


@pytest.mark.parametrize("nm", [0.2, 5.5, 168.67, 3372.4])
def test_specimen_scales_in_inches_are_accepted(nm):
    assert not cal.is_screen_dpi(2.54e7 / nm)  # 3372.4 nm (a low-magnification SEM frame) is 7532 ppi


def test_pixel_size_impossible_at_the_stated_magnification():
    good = cal.make(5.5, 5.5, "instrument", "", 50000, "sem")  # 768 px -> 0.21 m: a display width
    cal.check_plausible(good, 768, "f.tif")
    bad = cal.make(231771.0, 231771.0, "instrument", "", 50000, "sem")  # 8900 m
    with pytest.raises(ValueError, match="impossible at the file's magnification 50000x"):
        cal.check_plausible(bad, 768, "f.tif")
    cal.check_plausible(cal.make(231771.0, 231771.0, "instrument"), 768, "f.tif")  # no magnification: no check


def test_resampled_non_square_pixels_keep_lengths_in_nm():
    # a bar 20 nm long along x on a grid of 1.0 x 0.2 nm pixels stays 20 nm long on the square 0.2 nm grid
    img = np.zeros((50, 40), np.float32)
    img[20:30, 10:30] = 1.0  # 20 px x 1.0 nm wide, 10 rows x 0.2 nm high
    out, size, note = cal.resample_square(img, cal.make(1.0, 0.2, "instrument"))
    assert size == pytest.approx(0.2) and out.shape == (50, 200)
    width_nm = (out[25] > 0.5).sum() * size
    height_nm = (out[:, 100] > 0.5).sum() * size
    assert width_nm == pytest.approx(20.0, abs=2 * size) and height_nm == pytest.approx(2.0, abs=2 * size)
    assert "1 x 0.2 nm" in note


def test_finish_override_replaces_the_file_scale_and_says_so():
    ref = FrameRef(source="f.tif", path="f.tif", reader="t")
    c = cal.make(5.5, 5.5, "instrument", "text tag")
    frame = finish(ref, np.zeros((8, 8), np.uint16), c, {**OPTS, "calibration": "override", "pixel_size_nm": 4.0})
    assert frame.pixel_size_nm == 4.0 and frame.calibration == "workflow"
    assert any("override" in n for n in frame.notes)
    auto = finish(ref, np.zeros((8, 8), np.uint16), None, OPTS)
    assert math.isnan(auto.pixel_size_nm) and auto.calibration == ""
