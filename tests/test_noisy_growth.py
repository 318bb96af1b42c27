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


def test_a_component_whose_parts_are_all_below_the_threshold_stays_one_grain():
    # two overlapping discs whose pixels lie mostly between 2.5 and 5 background sigmas, each with a small core
    # above 5 (a noisy frame's grains): the splitter cuts the pair at its neck, and the pocket test (a split
    # part mostly below the threshold is background enclosed between grains) would drop both parts; with no
    # part left there is no grain to enclose a pocket, so the component is kept whole
    from grainhabit.plugins.segment import segment_grains as sg
    from grainhabit.plugins.segment.levels import frame_levels

    yy, xx = np.mgrid[0:120, 0:160]
    img = np.zeros((120, 160))
    r = 18.0
    d = 1.8 * r
    for cx in (56.0, 56.0 + d):
        dist2 = (yy - 60.0) ** 2 + (xx - cx) ** 2
        img[dist2 <= r ** 2] = 0.42
        img[dist2 <= 4.0 ** 2] = 0.65
    img = ndi.gaussian_filter(img, 1.0).astype(np.float32)
    levels = frame_levels(img, 5.0, faint_k=4.0)
    levels.update(background=0.0, sigma=0.1, noise=0.5, faint=0.4)  # a noisy frame's levels (sigma 0.1)
    labels, _, flags = sg.label_grains(img, 1.0, levels, method="auto", min_ecd_nm=6.0, min_ecd_px=6.0,
                                       min_peak=0.3)
    left, right = int(labels[60, 56]), int(labels[60, 92])
    assert left > 0 and left == right and labels.max() == 1
    assert not flags["split"][left]
    # its area that of the two discs' union (handbook geometry: circle-circle intersection), within 10 %
    lens = 2 * r ** 2 * np.arccos(d / (2 * r)) - d / 2 * np.sqrt(4 * r ** 2 - d ** 2)
    assert abs((labels == left).sum() / (2 * np.pi * r ** 2 - lens) - 1) < 0.10
