"""A faint stain or film fold round a grain is not the grain; a faint plate touching a grain is one.

The frames are drawn here (skimage.draw discs, rectangles and a winding band, blurred
1 px, Gaussian noise): invented test data. Reference: handbook geometry (the area of a
disc, pi r^2, and of a rectangle).
"""

import numpy as np
import pytest
from scipy import ndimage as ndi
from skimage.draw import disk, rectangle

from grainhabit.plugins.segment import foreground
from builders import run_chain

SIZE = 256


def finish(signal, seed, noise=0.01, background=0.85):
    """Dark objects in transmission: background 0.85 minus the signal, blurred 1 px, noise, 8 bit."""
    img = background - ndi.gaussian_filter(signal, 1.0) + np.random.default_rng(seed).normal(0, noise, signal.shape)
    return np.clip(img * 255, 0, 255).astype(np.uint8)




def winding_band(shape, centre, radius, width, seed):
    """A wavy band of the given width running past ``centre`` at about ``radius`` (a film fold)."""
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[:shape[0], :shape[1]]
    phase = rng.uniform(0, 2 * np.pi)
    path = centre[0] + radius * np.sin((xx - centre[1]) / 40.0 + phase) * 0.5
    band = np.abs(yy - path) < width / 2
    return band


def test_grain_on_a_film_fold_keeps_its_own_outline():
    # a dark particle (signal 0.6, radius 20 px) lying across a faint fold (signal 0.1, 30 px wide, frame-long)
    r = 20
    signal = np.zeros((SIZE, SIZE))
    signal[winding_band(signal.shape, (128, 128), 40, 30, seed=1)] = 0.1
    rr, cc = disk((128, 128), r, shape=signal.shape)
    signal[rr, cc] = 0.6
    out = run_chain(finish(signal, seed=1))
    k = out.labels[128, 128]
    assert k > 0
    # handbook: pi 20^2 = 1257 px; without the rule the fold's pixels deep inside the component stay with it
    assert (out.labels == k).sum() == pytest.approx(np.pi * r ** 2, rel=0.12)


def test_faint_plate_touching_a_bright_grain_is_kept():
    # a faint square plate (signal 0.12, 50 x 50 px) touching a dark particle (signal 0.6, radius 18 px)
    signal = np.zeros((SIZE, SIZE))
    rr, cc = rectangle((100, 60), extent=(50, 50), shape=signal.shape)
    signal[rr, cc] = 0.12
    rr, cc = disk((125, 128), 18, shape=signal.shape)
    signal[rr, cc] = 0.6
    out = run_chain(finish(signal, seed=2, noise=0.008))
    plate = out.labels[125, 80]
    assert plate > 0 and plate != out.labels[125, 128]
    # handbook: the plate's area 50 x 50 = 2500 px (its corner near the particle may go to the particle)
    assert (out.labels == plate).sum() == pytest.approx(2500, rel=0.15)


def test_diffuse_parts_keeps_compact_parts():
    m = np.zeros((120, 120), bool)
    m[10:40, 10:40] = True                   # compact square, 900 px: a faint grain
    x = np.arange(5, 115)
    for dy in range(3):                      # a winding band 3 px wide: diffuse (a straight one is rod-shaped)
        m[(62 + 8 * np.sin(x / 8.0)).astype(int) + dy, x] = True
    m[80:110, 70:100] = True
    m[85:105, 75:95] = False                 # a ring: far from convex
    m[5:9, 100:104] = True                   # too small to judge: diffuse
    d = foreground.diffuse_parts(m)
    assert not d[10:40, 10:40].any()
    assert d[(62 + 8 * np.sin(x / 8.0)).astype(int), x].all() and d[80, 70:100].all() and d[5:9, 100:104].all()


def test_enclosed_crevices_are_not_stains():
    # the same winding band: kept while it never meets the outer skirt (a dark crevice inside a rough
    # grain), dropped as diffuse once it does (a fold reaching the component's edge)
    x = np.arange(10, 50)
    band = np.zeros((60, 60), bool)
    for dy in range(3):
        band[(22 + 6 * np.sin(x / 5.0)).astype(int) + dy, x] = True
    outer = np.zeros((60, 60), bool)
    outer[0, :] = True
    assert not foreground.diffuse_parts(band, outer).any()
    outer[:, 10] = band[:, 10]              # the skirt, grown by 1.5 px, overlaps its end
    assert foreground.diffuse_parts(band, outer)[band].all()
