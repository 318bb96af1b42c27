"""On a noisy frame the noise threshold's objects grow into the connected pixels above a lower level."""

import numpy as np
from scipy import ndimage as ndi
from skimage.filters import apply_hysteresis_threshold
from skimage.morphology import reconstruction

from grainhabit.plugins.segment import foreground
from grainhabit.plugins.segment.segment_grains import segment_image


def test_grown_to_is_scikit_image_hysteresis():
    # references: scikit-image's morphological reconstruction by dilation of the high mask under the low one
    # with the 3x3 square (the 8-connected components of I > low holding a pixel > high, as segmentation
    # labels its components), and scikit-image's hysteresis threshold, whose components are 4-connected:
    # everything it keeps is kept here too
    rng = np.random.default_rng(0)
    img = ndi.gaussian_filter(rng.normal(0, 1, (160, 170)), 1.5)
    low, high = 0.05, 0.2
    ours = foreground.grown_to(img > high, img > low)
    ref = reconstruction((img > high).astype(float), (img > low).astype(float), method="dilation",
                         footprint=np.ones((3, 3))) > 0
    np.testing.assert_array_equal(ours, ref)
    four = apply_hysteresis_threshold(img, low, high)
    assert not (four & ~ours).any() and ours.sum() >= four.sum()


def textured_discs(radius=15.0, noise_sd=0.12, seed=1, shape=(300, 300)):
    """A flattened frame (background 0, grains about 0.8) of rough discs in noise: many grain pixels dip
    below 5 background sigmas (a noisy TEM field after the step's smoothing)."""
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[0:shape[0], 0:shape[1]]
    img = np.zeros(shape)
    centres = [(60 + 90 * i, 60 + 90 * j) for i in range(3) for j in range(3)]
    for cy, cx in centres:
        img[(yy - cy) ** 2 + (xx - cx) ** 2 <= radius ** 2] = 0.8
    texture = ndi.gaussian_filter(rng.normal(0, 1, shape), 2.0)
    img = img * (1 + 1.2 * texture / texture.std() * 0.25)
    img = ndi.gaussian_filter(img, 1.0) + ndi.gaussian_filter(rng.normal(0, noise_sd * 2.2, shape), 1.0)
    return img.astype(np.float32), centres


def test_rough_discs_in_noise_are_found_whole(monkeypatch):
    img, centres = textured_discs()
    r = 15.0
    labels, _, _ = segment_image(img, 1.0, {})
    parts = [np.unique(labels[(np.mgrid[0:300, 0:300][0] - cy) ** 2 + (np.mgrid[0:300, 0:300][1] - cx) ** 2
                              <= (r - 3) ** 2]) for cy, cx in centres]
    # one grain per disc, of about the disc's area (handbook geometry: pi r^2)
    assert all(len(set(p) - {0}) == 1 for p in parts)
    ids = [int(labels[cy, cx]) for cy, cx in centres]
    areas = np.bincount(labels.ravel())[ids] / (np.pi * r ** 2)
    assert np.all(np.abs(areas - 1) < 0.15)
    # without the growth the same frame's discs come in pieces or smaller (the reason for it)
    monkeypatch.setattr(foreground, "NOISY_SIGMA_SHARE", 10.0)
    plain, _, _ = segment_image(img, 1.0, {})
    pieces = sum(len(set(np.unique(plain[(np.mgrid[0:300, 0:300][0] - cy) ** 2
                                         + (np.mgrid[0:300, 0:300][1] - cx) ** 2 <= (r - 3) ** 2])) - {0})
                 for cy, cx in centres)
    plain_areas = np.bincount(plain.ravel(), minlength=labels.max() + 1)
    assert pieces > len(centres) or plain_areas.sum() - plain_areas[0] < 0.85 * len(centres) * np.pi * r ** 2


def test_a_clean_frame_does_not_grow():
    assert foreground.hysteresis_level({"background": 0.0, "sigma": 0.02}) is None
    assert foreground.hysteresis_level({"background": 0.01, "sigma": 0.1}) == 0.01 + 0.25
