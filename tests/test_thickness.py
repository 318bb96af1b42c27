"""Tests of known-thickness and shadow-thickness (drawn shadows are invented test data)."""
import math

import numpy as np
import pytest
from skimage.draw import polygon

from grainhabit.frame import FrameData
from grainhabit.plugins.thickness import shadow_thickness as st
from grainhabit.plugins.thickness import known_thickness as th


def _frame(habits, ecd, sample="batch-A", raw=None, labels=None):
    n = len(habits)
    raw = np.zeros((4, 4), np.float32) if raw is None else raw
    return FrameData(source="x", sample=sample, raw=raw, pixel_size_nm=10.0, labels=labels,
                     grains={"label": np.arange(1, n + 1), "habit": np.array(habits, object),
                             "ecd_nm": np.asarray(ecd, float)})


def test_aspect_ratio_is_ecd_over_thickness_for_tabular_only():
    # definition: tabular aspect ratio = ECD / thickness
    f = _frame(["tabular_hexagon", "cube", "tabular_triangle"], [1200.0, 600.0, 900.0])
    out = th.grainhabit_thickness(f, th.STEP.resolve({"thickness_nm": 150.0}))
    assert out.grains["thickness_nm"][0] == 150.0 and np.isnan(out.grains["thickness_nm"][1])
    assert out.grains["tabular_aspect_ratio"][0] == pytest.approx(8.0)
    assert out.grains["tabular_aspect_ratio"][2] == pytest.approx(6.0)
    assert np.isnan(out.grains["tabular_aspect_ratio"][1])


def test_by_sample_overrides_the_single_value():
    f = _frame(["tabular_hexagon"], [1000.0], sample="batch-B")
    p = th.STEP.resolve({"thickness_nm": 100.0, "by_sample": ["batch-A=80", "batch-B=125"]})
    out = th.grainhabit_thickness(f, p)
    assert out.grains["thickness_nm"][0] == 125.0
    assert out.grains["tabular_aspect_ratio"][0] == pytest.approx(8.0)
    f2 = _frame(["tabular_hexagon"], [1000.0], sample="batch-C")
    out = th.grainhabit_thickness(f2, th.STEP.resolve({"by_sample": ["batch-A=80"]}))
    assert np.isnan(out.grains["thickness_nm"][0]) and "batch-C" in out.notes[-1]


@pytest.mark.parametrize("bad", [["batch-A"], ["=5"], ["a=-3"], ["a=x"], ["a=1", "a=2"]])
def test_bad_by_sample_entries_are_refused(bad):
    with pytest.raises(ValueError):
        th.parse_by_sample(bad)


def test_known_thickness_needs_a_value():
    with pytest.raises(ValueError):
        th.grainhabit_thickness(_frame(["cube"], [1.0]), th.STEP.resolve({}))


def _shadowed_field(length_px, direction_deg, contrast="dark", size=220, seed=0):
    """A bright hexagonal plate with the shadow it casts: the outline swept along the direction."""
    img = np.full((size, size), 0.5)
    lab = np.zeros((size, size), np.int32)
    t = np.deg2rad(np.arange(6) * 60 + 10)
    cx = cy = size / 2
    hx, hy = cx + 30 * np.cos(t), cy + 30 * np.sin(t)
    ux, uy = math.cos(math.radians(direction_deg)), -math.sin(math.radians(direction_deg))
    shade = 0.2 if contrast == "dark" else 0.8
    for s in np.arange(0, length_px, 0.1):
        rr, cc = polygon(hy + s * uy - 0.5, hx + s * ux - 0.5, img.shape)
        img[rr, cc] = shade
    rr, cc = polygon(hy - 0.5, hx - 0.5, img.shape)
    img[rr, cc] = 0.95 if contrast == "dark" else 0.05
    lab[rr, cc] = 1
    img += np.random.default_rng(seed).normal(0, 0.01, img.shape)
    return img.astype(np.float32), lab


@pytest.mark.parametrize("direction", [0.0, 120.0, 235.0])
@pytest.mark.parametrize("contrast", ["dark", "bright"])
def test_shadow_length_on_drawn_shadow(direction, contrast):
    img, lab = _shadowed_field(25.0, direction, contrast)
    L, note = st.shadow_length_px(img, lab, 1, direction, contrast)
    assert note == ""
    assert L == pytest.approx(25.0, abs=1.0)


def test_shadow_thickness_is_length_times_tan_angle():
    # trigonometry: a step of height h shadowed at elevation e casts L = h / tan(e)
    img, lab = _shadowed_field(25.0, 30.0)
    f = _frame(["tabular_hexagon"], [600.0], raw=img, labels=lab)
    p = st.STEP.resolve({"shadow_angle_deg": 20.0, "shadow_direction_deg": 30.0})
    out = st.grainhabit_thickness(f, p)
    L = out.grains["shadow_length_nm"][0]
    assert L == pytest.approx(250.0, abs=10.0)                  # 25 px at 10 nm/px
    assert out.grains["thickness_nm"][0] == pytest.approx(L * math.tan(math.radians(20.0)))
    assert out.grains["tabular_aspect_ratio"][0] == pytest.approx(600.0 / out.grains["thickness_nm"][0])
    assert st.thickness_from_shadow(100.0, 45.0) == pytest.approx(100.0)


def test_no_shadow_gives_nan_with_reason():
    img, lab = _shadowed_field(25.0, 0.0)
    L, note = st.shadow_length_px(img, lab, 1, 180.0)            # look the wrong way
    assert np.isnan(L) and "no shadow" in note


def test_shadow_step_refuses_missing_angle():
    img, lab = _shadowed_field(10.0, 0.0)
    f = _frame(["tabular_hexagon"], [600.0], raw=img, labels=lab)
    with pytest.raises(ValueError):
        st.grainhabit_thickness(f, st.STEP.resolve({"shadow_direction_deg": 0.0}))
