"""Parts of a cut split again on their own (segment-grains 2.7, touching._split_parts_alone).

Everything drawn here is invented test data (scikit-image discs).
"""

from __future__ import annotations

import numpy as np
import pytest
from skimage.draw import disk

from grainhabit.plugins.segment import touching


def chain(n: int, radius: int = 8, step: int = 14, wiggle: int = 0, seed: int = 0) -> np.ndarray:
    """``n`` discs of ``radius`` px in a row, centres ``step`` px apart (touching at a neck of
    2 sqrt(r^2 - (step/2)^2) = 7.7 px for r 8, step 14: handbook chord length)."""
    rng = np.random.default_rng(seed)
    m = np.zeros((2 * radius + 40, step * (n - 1) + 2 * radius + 20), bool)
    for i in range(n):
        dy = int(rng.integers(-wiggle, wiggle + 1)) if wiggle else 0
        rr, cc = disk((radius + 20 + dy, 10 + radius + step * i), radius, shape=m.shape)
        m[rr, cc] = True
    return m


@pytest.mark.parametrize("n,wiggle", [(4, 0), (4, 3), (5, 2), (6, 0), (12, 3)])
def test_every_disc_of_a_short_chain_is_a_grain(n, wiggle):
    parts = touching.split_component(chain(n, wiggle=wiggle), 28.0, 0.08)
    assert len(parts) == n
    # each part about one disc's area, pi r^2 less what the cuts take (handbook)
    areas = sorted(int(p.sum()) for p in parts)
    assert areas[0] > 0.6 * np.pi * 8 ** 2 and areas[-1] < 1.2 * np.pi * 8 ** 2


def test_a_pair_left_by_the_chain_floor_is_split_on_its_own(monkeypatch):
    # without the second pass the heap's floor (a tenth of the whole) leaves pairs of a chain of four joined
    monkeypatch.setattr(touching, "_split_parts_alone", lambda parts, *args: parts)
    assert len(touching.split_component(chain(4), 28.0, 0.08)) < 4


def test_a_convex_grain_is_not_cut_again():
    m = np.zeros((60, 60), bool)
    rr, cc = disk((30, 30), 20, shape=m.shape)
    m[rr, cc] = True
    assert len(touching._split_parts_alone([m], 28.0, 0.08, None)) == 1
