"""Tests of the flatten-background step (frames drawn in test_segment; invented data)."""

import numpy as np
import pytest

from grainhabit.frame import FrameData
from grainhabit.plugins.preprocess import flatten_background as preprocess
from builders import draw_faceted_frame

GRAINS = ((80, 80, 40, 6, 0.0), (80, 200, 35, 4, 20.0), (190, 130, 45, 3, 5.0))


def frame_of(raw, px=5.0):
    return FrameData(source="t.tif", sample="s", raw=raw, pixel_size_nm=px)


@pytest.mark.parametrize("contrast", ["bright", "dark"])
def test_polarity_detected_and_grains_bright(contrast):
    raw, truth = draw_faceted_frame((260, 260), grains=GRAINS, contrast=contrast, seed=11)
    out = preprocess.grainhabit_preprocess(frame=frame_of(raw), params={})
    assert out.polarity == contrast
    assert out.image.dtype == np.float32 and out.image.shape == raw.shape
    assert -0.25 <= out.image.min() and out.image.max() <= 1.0
    assert not any("low confidence" in n for n in out.notes)
    # flat background near 0 across the illumination ramp, grains near 1
    bg = out.image[truth == 0]
    left, right = out.image[:, :20][truth[:, :20] == 0], out.image[:, -20:][truth[:, -20:] == 0]
    assert np.median(bg) < 0.05 and abs(np.mean(left) - np.mean(right)) < 0.03
    assert np.median(out.image[truth > 0]) > 0.6


def test_forced_polarity_is_used():
    raw, _ = draw_faceted_frame((200, 200), grains=GRAINS[:1], contrast="bright", seed=12)
    out = preprocess.grainhabit_preprocess(frame=frame_of(raw), params={"polarity": "dark"})
    assert out.polarity == "dark" and out.notes == ()


def test_no_grains_gives_low_confidence_note():
    raw, _ = draw_faceted_frame((200, 200), grains=(), seed=13)
    out = preprocess.grainhabit_preprocess(frame=frame_of(raw), params={})
    assert any("low confidence" in n for n in out.notes)
    # pure noise is not stretched to grain level
    assert np.percentile(out.image, 99.9) < 0.4


def test_large_grain_is_not_flattened_away():
    # one grain covering about a quarter of the frame, plus the illumination ramp
    raw, truth = draw_faceted_frame((240, 240), grains=((120, 120, 75, 6, 0.0),), seed=14)
    out = preprocess.grainhabit_preprocess(frame=frame_of(raw), params={"background_nm": 500.0})
    assert np.median(out.image[truth > 0]) > 0.6
    assert np.median(out.image[truth == 0]) < 0.05


def test_background_scale_is_in_nm():
    raw, _ = draw_faceted_frame((200, 200), grains=GRAINS[:2], seed=15)
    a = preprocess.flatten(raw, 5.0, background_nm=1000.0)[0]
    b = preprocess.flatten(raw, 10.0, background_nm=2000.0)[0]
    c = preprocess.flatten(raw, 5.0, background_nm=2000.0)[0]
    np.testing.assert_array_equal(a, b)  # same scale in pixels
    assert not np.array_equal(a, c)


def test_noise_model_recovers_poisson_gaussian_mix():
    # Poisson counts have variance equal to their mean (handbook statistics);
    # with gain g and read noise s: var(I) = g * I + s^2
    rng = np.random.default_rng(0)
    mean = np.repeat(np.linspace(20, 400, 512)[None, :], 512, axis=0)
    gain, read = 0.01, 0.05
    img = gain * rng.poisson(mean) + rng.normal(0.0, read, mean.shape)
    a, b = preprocess.noise_model(img)
    assert a == pytest.approx(gain, rel=0.1)
    assert b == pytest.approx(read ** 2, rel=0.3)


def test_anscombe_stabilises_poisson_variance():
    # Anscombe (1948): 2 sqrt(x + 3/8) of Poisson counts has variance close to 1 for mean >~ 10
    rng = np.random.default_rng(1)
    for lam in (10.0, 50.0, 300.0):
        x = rng.poisson(lam, 200_000).astype(float)
        v = np.var(preprocess.anscombe(x, 1.0, 0.0))
        assert v == pytest.approx(1.0, abs=0.05)
    y = np.linspace(5, 100, 20)
    np.testing.assert_allclose(preprocess.inverse_anscombe(preprocess.anscombe(y, 0.5, 0.1), 0.5, 0.1), y)


def test_noise_sigma_of_white_noise():
    # reference: the standard deviation the noise was drawn with
    rng = np.random.default_rng(2)
    assert preprocess.noise_sigma(rng.normal(0.0, 0.1, (256, 256))) == pytest.approx(0.1, rel=0.05)


@pytest.mark.parametrize("method", ["bilateral", "nlmeans", "none"])
def test_other_denoisers_keep_polarity(method):
    raw, truth = draw_faceted_frame((160, 160), grains=GRAINS[:1], contrast="dark", seed=16)
    out = preprocess.grainhabit_preprocess(frame=frame_of(raw), params={"denoise": method})
    assert out.polarity == "dark" and np.median(out.image[truth > 0]) > 0.6


def test_bad_input_is_refused():
    with pytest.raises(ValueError, match="2-D"):
        preprocess.flatten(np.zeros((4, 4, 3)), 5.0)
    with pytest.raises(ValueError, match="pixel_size_nm"):
        preprocess.grainhabit_preprocess(frame=frame_of(np.zeros((32, 32), np.float32), px=float("nan")),
                                         params={})
