"""A particle seen by its bright rim keeps its dim face (segment-grains 2.15, interiors_rejoined).

Frames are drawn here (invented data): preprocessed images (background 0, grains about 1) of discs
whose rim is bright and whose face is as dark as the substrate, as secondary-electron images show
spheres (the edge effect). Outside reference: handbook disc geometry, area pi r^2, drawn with
``skimage.draw.disk``.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage as ndi
from skimage.draw import disk

from grainhabit.plugins.segment import segment_grains as sg
from grainhabit.plugins.segment.segment_grains import segment_image


def _rim_particles(seed, radius=24, rim=5, face=0.03):
    """A rim-bright disc touching a solid one (radius 18 px) and a second rim-bright disc alone, on
    noise of sd 0.03; returns the image and the centres of the two rim-bright discs and the solid one."""
    rng = np.random.default_rng(seed)
    shape = (160, 220)
    img = rng.normal(0.0, 0.03, shape)
    rims = [(55, 55), (115, 170)]
    solid = (55, 55 + radius + 18)
    for r, c in rims:
        outer = np.zeros(shape, bool)
        outer[disk((r, c), radius, shape=shape)] = True
        inner = np.zeros(shape, bool)
        inner[disk((r, c), radius - rim, shape=shape)] = True
        img[outer & ~inner] += 1.0
        img[inner] += face
    img[disk(solid, 18, shape=shape)] += 1.0
    return ndi.gaussian_filter(img, 1.0).astype(np.float32), rims + [solid]


@pytest.mark.parametrize("seed", [0, 1])
def test_rim_bright_particles_keep_their_faces(seed):
    img, centres = _rim_particles(seed)
    labels, _, _ = segment_image(img, 1.0, {})
    found = [int(labels[r, c]) for r, c in centres]
    # every particle found as one grain holding its centre (its face), of about its disc's area
    assert all(found) and len(set(found)) == len(centres)
    for k, radius in zip(found, (24, 24, 18)):
        area = int(np.count_nonzero(labels == k))
        disc_area = np.pi * radius ** 2  # handbook: pi r^2
        assert abs(area - disc_area) < 0.12 * disc_area, (k, area, disc_area)


def test_gap_enclosed_by_a_heap_is_no_face():
    # four touching discs round a gap at the substrate's level: the gap touches every grain, or stays a
    # small share off their centre, and is never given to one of them
    rng = np.random.default_rng(3)
    shape = (140, 140)
    img = rng.normal(0.0, 0.03, shape)
    for r, c in ((45, 45), (45, 95), (95, 45), (95, 95)):
        img[disk((r, c), 26, shape=shape)] += 1.0
    img = ndi.gaussian_filter(img, 1.0).astype(np.float32)
    labels, _, _ = segment_image(img, 1.0, {})
    assert labels[70, 70] == 0


def test_faces_are_lost_without_the_rejoin(monkeypatch):
    # the test above is not idle: without interiors_rejoined the faces are dropped as enclosed pockets
    img, centres = _rim_particles(0)
    monkeypatch.setattr(sg, "interiors_rejoined", lambda parts, kept, component: kept)
    labels, _, _ = segment_image(img, 1.0, {})
    r, c = centres[0]
    assert labels[r, c] == 0
