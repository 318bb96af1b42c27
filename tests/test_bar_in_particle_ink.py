"""A scale bar drawn in the particles' own ink, its caption in bold print, and the pieces of its letters.

Invented frames made here; the caption is drawn by matplotlib's Agg renderer (bold serif).
"""

import numpy as np
import pytest
from scipy import ndimage as ndi

from grainhabit.plugins.preprocess import flatten_background
from grainhabit.plugins.segment import segment_grains
from grainhabit.plugins.segment.mark_shapes import bars_with_captions, line_pieces

from builders import draw_text


def particle_ink_frame(caption=True, seed=5, size=20, blur=1.0):
    """Black TEM particles on a grey film, a black bar 10 px x 90 px and (optionally) "50 nm" above it.

    The particles are as black as the ink, so no ink test can tell the bar from them; the caption's bold
    serif glyphs, blurred as a resampled figure is, run together into a few solid blobs.
    """
    rng = np.random.default_rng(seed)
    shape = (320, 320)
    yy, xx = np.mgrid[0:shape[0], 0:shape[1]]
    centres = [(70, 80), (80, 220), (170, 120), (180, 250)]
    grains = np.zeros(shape, bool)
    for cy, cx in centres:
        grains |= (yy - cy) ** 2 + (xx - cx) ** 2 <= 24 ** 2
    ink = np.zeros(shape, bool)
    ink[292:302, 200:290] = True
    if caption:
        ink |= draw_text(shape, "50 nm", (203, 292 - 1.6 * size), size, "black")
    img = np.where(grains | ink, 5.0, 190.0)
    img = ndi.gaussian_filter(img, blur) + rng.normal(0, 4.0, shape)
    raw = np.clip(np.round(img), 0, 255).astype(np.float32)
    return raw, centres, ink


@pytest.mark.parametrize("size, blur", [(20, 1.0), (26, 1.5), (32, 2.0)])
def test_black_bar_with_bold_caption_goes_and_the_particles_stay(size, blur):
    # up to segment-grains 2.24 a piece of the "5" (its upper bowl, cut off by the splitter) stayed a grain
    # in most sizes and blurs of this frame
    raw, centres, ink = particle_ink_frame(size=size, blur=blur)
    out, pol, _ = flatten_background.flatten(raw, 1.0)
    assert pol == "dark"
    labels, _, notes = segment_grains.segment_image(out, 1.0, raw=raw)
    found = {int(labels[c]) for c in centres}
    assert 0 not in found and len(found) == 4
    assert labels.max() == 4, "the bar and its caption are no grains"
    assert not labels[ink].any()


def test_the_same_bar_without_a_caption_is_left_to_the_other_tests():
    # no caption: this rule does not judge a lone bar (a rod lying along the frame's axis looks the same)
    raw, _, ink = particle_ink_frame(caption=False)
    labels = np.zeros(raw.shape, np.int32)
    labels[ink] = 1
    assert bars_with_captions(labels)[0].size == 0


def test_a_row_of_parallel_rods_along_the_axis_is_no_captioned_bar():
    # rods 90 px x 10 px lying one above another (a packed raft of nanorods): the objects beside each one
    # are as long as it, no caption
    labels = np.zeros((200, 200), np.int32)
    for k, top in enumerate(range(20, 180, 16), start=1):
        labels[top:top + 10, 50:140] = k
    dropped, boxes = bars_with_captions(labels)
    assert dropped.size == 0 and boxes == []


@pytest.mark.parametrize("above", [True, False])
def test_a_caption_of_two_words_above_or_below_its_bar(above):
    # the layout of a printed scale bar (common practice): the caption's words on one baseline beside the
    # bar, each narrower than half of it
    labels = np.zeros((120, 200), np.int32)
    labels[60:70, 40:140] = 1                      # the bar, 100 px x 10 px
    row = slice(38, 56) if above else slice(74, 92)
    labels[row, 60:85] = 2                         # "50"
    labels[row, 92:122] = 3                        # "nm"
    dropped, boxes = bars_with_captions(labels)
    assert dropped.tolist() == [1, 2, 3]
    assert boxes == [(60, 70, 40, 140)]


def test_pieces_inside_the_band_of_a_dropped_line_go_with_it():
    labels = np.zeros((100, 200), np.int32)
    labels[40:60, 20:34] = 1      # "5", dropped
    labels[40:60, 38:52] = 2      # "0", dropped
    labels[44:50, 56:62] = 3      # a piece cut off an "n" beside them: inside the line's band
    labels[30:62, 150:180] = 4    # a particle further along, taller than the line
    labels[70:90, 20:40] = 5      # a particle below the line
    assert line_pieces(labels, np.array([1, 2])).tolist() == [3]
    # one glyph alone makes no line
    assert line_pieces(labels, np.array([1])).size == 0
