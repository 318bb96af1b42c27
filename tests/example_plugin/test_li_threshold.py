"""Tests of the example plugin ``segment-li`` (run: ``pytest test_li_threshold.py``).

The frames are invented: bright squares on a dark, noisy background.
"""

import numpy as np
import pytest
from skimage.filters import threshold_li
from skimage.measure import label, regionprops

from grainhabit_li_threshold import STEP, grainhabit_segment, li_labels
from grainhabit.frame import FrameData
from grainhabit.params import ParamError

PX = 10.0  # nm per pixel


def _squares(seed=0):
    """Four squares (sides 6, 12, 16 and 20 px), one cut by the border, with noise."""
    rng = np.random.default_rng(seed)
    img = np.zeros((96, 96))
    img[10:22, 10:22] = 1.0      # 12 px
    img[40:56, 60:76] = 1.0      # 16 px
    img[70:90, 20:40] = 1.0      # 20 px
    img[0:6, 80:86] = 1.0        # 6 px, touches the top border
    return img + rng.normal(0.0, 0.05, img.shape)


def test_labels_match_scikit_image_reference():
    # Reference: scikit-image threshold_li + label with the same connectivity
    # (general-purpose reference library), small regions dropped by ECD.
    img = _squares()
    labels, t = li_labels(img, PX, min_ecd_nm=0.0, fill_holes=False, connectivity=2)
    assert t == pytest.approx(threshold_li(img))
    ref = label(img > threshold_li(img), connectivity=2)
    assert labels.max() == ref.max()
    np.testing.assert_array_equal(labels > 0, ref > 0)


def test_square_ecd_is_handbook_value():
    # Handbook geometry: a square of side s has area s^2 and ECD = 2 s / sqrt(pi) (ISO 9276-6).
    img = _squares()
    labels, _ = li_labels(img, PX, min_ecd_nm=80.0)
    areas = sorted(r.area for r in regionprops(labels))
    # the 6 px square (ECD 67.7 nm) is dropped by min_ecd_nm = 80 nm
    assert areas == [144, 256, 400]
    ecd = 2 * np.sqrt(np.array(areas) * PX**2 / np.pi)
    np.testing.assert_allclose(ecd, 2 * np.array([12, 16, 20]) * PX / np.sqrt(np.pi))


def test_hook_returns_segment_columns():
    img = _squares().astype(np.float32)
    frame = FrameData(source="invented.tif", sample="s", raw=img, pixel_size_nm=PX, image=img)
    out = grainhabit_segment(frame=frame, params=STEP.resolve({"min_ecd_nm": 0.0}))
    assert out is not frame and frame.labels is None  # the input is not mutated
    assert out.labels.dtype == np.int32
    np.testing.assert_array_equal(out.grains["label"], [1, 2, 3, 4])
    assert out.grains["split"].tolist() == [False] * 4
    # scan order: the border square (row 0) comes first
    assert out.grains["edge_cut"].tolist() == [True, False, False, False]
    assert "Li threshold" in out.notes[-1]


def test_needs_preprocessed_image_and_valid_params():
    frame = FrameData(source="x", sample="s", raw=np.zeros((8, 8), np.float32), pixel_size_nm=PX)
    with pytest.raises(ValueError, match="preprocess"):
        grainhabit_segment(frame=frame, params=STEP.defaults())
    with pytest.raises(ParamError, match=r"\[1, 2\]"):
        STEP.resolve({"connectivity": 3})
    with pytest.raises(ValueError, match="pixel_size_nm"):
        li_labels(np.ones((4, 4)), 0.0)


def test_flat_image_gives_no_grains():
    labels, t = li_labels(np.full((16, 16), 0.3), PX)
    assert labels.max() == 0 and np.isnan(t)
