"""Which frames the ink test of drawn marks applies to (segment-grains ``ink_marks``).

A grain clipped to white in a file as the microscope wrote it is a grain: its reader has already masked
the marks drawn in the stored values (plugins/readers/overlays.py). A figure's export carries its marks
in the picture, and there the ink test drops them.
"""

import numpy as np
import pytest
from scipy import ndimage as ndi

from grainhabit.frame import FrameData
from grainhabit.manager import make_host


def _frame(calibration):
    # eight grey discs and one L-shaped particle clipped to white (255), on a noisy background of 60
    rng = np.random.default_rng(0)
    img = np.full((256, 256), 60.0, np.float32)
    yy, xx = np.mgrid[:256, :256]
    for r, c in ((40, 40), (40, 120), (40, 200), (128, 40), (128, 200), (210, 40), (210, 120), (210, 200)):
        img[(yy - r) ** 2 + (xx - c) ** 2 <= 15 ** 2] = 150.0
    clipped = np.zeros(img.shape, bool)
    clipped[105:150, 105:120] = True
    clipped[135:150, 105:150] = True
    img = ndi.gaussian_filter(img, 1.0) + rng.normal(0, 3, img.shape).astype(np.float32)
    img[clipped] = 255.0
    img = np.clip(img, 0, 255).astype(np.float32)
    return FrameData(source="ink.tif", sample="s", raw=img, pixel_size_nm=5.0, calibration=calibration), clipped


def _found(frame, params):
    host = make_host()
    out = host.call_step("flatten-background", frame=frame, params={})
    out = host.call_step("segment-grains", frame=out, params=params)
    return out.labels


@pytest.mark.parametrize("calibration, params, kept", [
    ("instrument", {}, True),                       # auto: the file's reader has judged its marks
    ("workflow", {}, False),                        # auto: a picture of unknown origin, ink judged here
    ("instrument", {"ink_marks": "on"}, False),
    ("workflow", {"ink_marks": "off"}, True),
])
def test_clipped_particle_kept_or_dropped_by_ink(calibration, params, kept):
    frame, clipped = _frame(calibration)
    labels = _found(frame, params)
    assert labels.max() >= 8  # the eight discs are found either way
    on_clipped = np.unique(labels[clipped])
    assert (on_clipped.max() > 0) == kept
