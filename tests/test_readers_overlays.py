"""Info strips and drawn marks: cropped or masked, never grains; grains clipped in grey value are kept."""

from __future__ import annotations

import numpy as np
from builders import noisy, with_info_strip
from skimage.draw import disk

from grainhabit.plugins.readers import overlays


def test_info_strip_found_below_a_noisy_image():
    img = with_info_strip(noisy((200, 256), seed=1), 22)
    assert overlays.find_info_strip(img) == 22


def test_no_strip_in_a_plain_micrograph_or_a_blank_frame():
    assert overlays.find_info_strip(noisy((200, 256), seed=2)) == 0
    blank = with_info_strip(np.zeros((200, 256), np.uint8), 20)  # nothing to tell the strip from
    assert overlays.find_info_strip(blank) == 0
    assert overlays.find_info_strip(noisy((200, 256)).astype(np.float32)) == 0


def test_scale_bar_and_text_are_masked_clipped_grains_are_not():
    img = noisy((200, 200), seed=4, mean=100, sd=10)
    img[180:184, 20:100] = 255  # scale bar: 80 x 4 px in the top grey value
    for c0 in range(120, 180, 10):  # "text": 1-px strokes
        img[175:190, c0] = 255
        img[182, c0:c0 + 6] = 255
    rr, cc = disk((60, 60), 15)
    img[rr, cc] = 255  # a grain clipped at the top of the grey range: solid, kept
    rr, cc = disk((60, 140), 12)
    img[rr, cc] = 20
    rr, cc = disk((60, 140), 2)
    img[rr, cc] = 0  # a dark grain's core at the bottom of the range: surrounded by dark, kept
    img[100:131, 20:51] = 150
    img[100, 20:51] = img[130, 20:51] = img[100:131, 20] = img[100:131, 50] = 255  # a grain's clipped rim
    marks = overlays.annotation_mask(img)
    assert marks[181, 50] and marks[180, 125]
    assert not marks[60, 60] and not marks[60, 140] and not marks[100, 35]
    assert marks[:160].sum() == 0


def test_marks_are_filled_with_their_surroundings():
    img = noisy((100, 100), seed=5, mean=100, sd=5)
    img[80:84, 10:70] = 255
    marks = overlays.annotation_mask(img)
    filled = overlays.fill_marks(img, marks)
    assert abs(float(filled[80:84, 10:70].mean()) - 100) < 10 and filled.dtype == img.dtype


def test_clipped_bright_bottom_with_grains_is_not_a_strip():
    # a transmission field whose illumination ramp saturates the bottom rows, with grains reaching into
    # them: the clipped background is flat in half of each row, but no info strip (invented test data)
    rows, cols = 400, 400
    ramp = np.linspace(40000, 90000, rows)[:, None] * np.ones((1, cols))
    img = np.clip(ramp + np.random.default_rng(1).normal(0, 800, (rows, cols)), 0, 65535)
    rr, cc = disk((385, 120), 60, shape=img.shape)
    img[rr, cc] = 20000 + np.random.default_rng(2).normal(0, 800, rr.size)
    rr, cc = disk((380, 300), 50, shape=img.shape)
    img[rr, cc] = 25000
    assert overlays.find_info_strip(img.astype(np.uint16)) == 0


def _jpeg(img: np.ndarray, quality: int = 75) -> np.ndarray:
    """``img`` after a round trip through JPEG (Pillow), as a figure exported for a paper carries it."""
    import io

    from PIL import Image

    buf = io.BytesIO()
    Image.fromarray(img).save(buf, format="JPEG", quality=quality)
    buf.seek(0)
    return np.asarray(Image.open(buf).convert("L"))


def test_info_strip_of_a_jpeg_figure_is_found_within_its_compression_noise():
    # a smooth SEM-like field (noise sd 3 levels) over a black data bar with white text, saved as JPEG: the
    # bar's fill is no longer one value, so the exact walk finds nothing; the lossy walk finds the bar's top
    # within a row (invented test data)
    field = ndimage_smooth(noisy((240, 320), seed=7, mean=80, sd=12))
    img = with_info_strip(field, 30, background=5, ink=250)
    img[241:, :] = 5  # no frame line: the bar starts where the field ends
    for c0 in range(10, 300, 14):  # text: 2-px strokes
        img[250:262, c0:c0 + 2] = 250
        img[255:257, c0:c0 + 8] = 250
    lossy = _jpeg(img)
    assert overlays.exact_info_strip(lossy) == 0
    assert abs(overlays.find_info_strip(lossy) - 30) <= 1


def test_smooth_background_under_particles_with_a_caption_is_no_strip():
    # the dark, smooth background between large particles along the bottom of a JPEG figure, with a caption
    # written on it: flat within the compression noise, of its own colour, holding something drawn; but the
    # particles end along a wavy line, not a straight full-width edge (invented test data)
    rows, cols = 256, 320
    img = noisy((rows, cols), seed=8, mean=150, sd=12)
    edge = 200 + 15 * np.sin(2 * np.pi * np.arange(cols) / 80.0)
    below = np.arange(rows)[:, None] >= edge[None, :]
    img[below] = ndimage_smooth(noisy((rows, cols), seed=9, mean=20, sd=12))[below]
    for c0 in range(20, 200, 12):  # the caption
        img[236:248, c0:c0 + 2] = 250
        img[241:243, c0:c0 + 7] = 250
    lossy = _jpeg(img)
    assert overlays.find_info_strip(lossy) == 0
    straight = img.copy()  # the same with the particles ending along a straight row: a strip
    straight[200:] = np.where(below[200:], img[200:], ndimage_smooth(noisy((rows, cols), seed=9, mean=20, sd=12))[200:])
    straight[:200] = noisy((200, cols), seed=8, mean=150, sd=12)
    assert abs(overlays.find_info_strip(_jpeg(straight)) - 56) <= 2


def ndimage_smooth(img: np.ndarray) -> np.ndarray:
    """``img`` smoothed by a 2 px Gaussian (scipy), as a noise-reduced SEM field looks."""
    from scipy import ndimage

    return np.clip(ndimage.gaussian_filter(img.astype(float), 2.0), 0, 255).astype(np.uint8)
