"""Fixtures of the tests; the builders they use live in builders.py."""

from __future__ import annotations

import pytest

from builders import draw_frame, write_tiff


@pytest.fixture
def small_survey(tmp_path):
    """Two samples of two frames each: discs and squares of known size, 5 nm pixels."""
    data = tmp_path / "data"
    for s, sample in enumerate(("alpha-batch", "beta-batch")):
        for i in range(2):
            img = draw_frame(discs=[(60, 60, 20), (60, 180, 15 + 3 * s)],
                             squares=[(150, 40, 40), (150, 160, 30 + 2 * i)], seed=10 * s + i)
            write_tiff(data / sample / f"f{i}.tif", img, 5.0)
    return tmp_path
