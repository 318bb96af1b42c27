"""The Gaussian denoising scale of a noisy frame, chosen by how far its grains then stand above the noise.

One pixel of Gaussian smoothing suits most micrographs: the grains stand tens of
background sigmas above a flat background and their outlines stay sharp. Low-dose
TEM fields and fast SEM scans are different: the pixel noise is a third of the
grains' contrast or more, the step's grain level falls to its floor of
:data:`~grainhabit.plugins.preprocess.flatten_background.NOISE_FLOOR_SIGMAS`
background sigmas, and segmentation's noise threshold (a few sigmas per pixel)
lies above most grain pixels, although grains of tens of pixels are plain to the
eye. A wider Gaussian is the matched filter for such grains: white pixel noise
falls as ``1 / sigma`` while a grain much wider than ``sigma`` keeps its level
[1]_.

The step therefore measures, at each trial scale, the grains' level over the
background's noise, ``grain_snr`` = 95th percentile of the grain-side pixels
more than 3 sigmas out, divided by sigma (both from
:func:`~grainhabit.plugins.preprocess.flatten_background.frame_levels`), and
keeps the smallest scale at which that ratio reaches the floor (a gain beyond
what smoothing can do to white noise is not believed, :data:`PLAUSIBLE_GAIN`);
failing that, one pixel. The ratio protects what smoothing would harm:

- small grains lose their peak as fast as the noise its sigma, so their ratio
  does not grow and the frame keeps one pixel;
- noise alone stays far below the floor (the 95th percentile of a Gaussian tail
  beyond 3 sigmas is about 4 sigmas, whatever the smoothing: 3.5-5.6 on pure-noise
  frames of 128 to 300 px at every scale). A frame whose grains gain but stay
  under the floor keeps one pixel too: such gains (3.6 to 5.9 on one EMPS picture
  of faint particles) are as large as those of noise alone (3.5 to 5.6 on a
  128 px noise frame of the instrument test files);
- a background textured at scales of several pixels (stain, substrate) keeps
  its sigma under smoothing, and again the ratio does not grow.

The ratio misses one kind of frame: grains wide and plain to the eye in a
noise that is not white (a grainy film, a resampled figure: a texture a few
pixels across), which smoothing lowers by less than ``1 / sigma``; the grains'
95th percentile then gains no more than noise alone does (3.6, 5.7, 5.9 at 1, 2,
3 px on an EMPS picture of seven particles of 45 px). What tells them apart is
how much of the frame the grains lift above segmentation's noise threshold
(:data:`SEEN_SIGMAS`): on that picture none at one pixel, 4.6 % at 2 px, 5.8 %
at 3 px; on frames of noise alone at most 0.5 % (128 px frames) and 0.03 % (512 px).
So when no scale reaches the ratio, the wider scale at which the grains show on
the largest share of the frame is taken, if that share is at least
:data:`SHOWN_SHARE` and :data:`SHOWN_GAIN` times the first scale's
(:func:`pick_scale`'s ``share_by_scale``).

Only frames whose ratio at one pixel is below the floor are looked at again,
so clean frames cost nothing extra.

References
----------
.. [1] W. K. Pratt, *Digital Image Processing*, 4th ed., Wiley, 2007, ch. 10
   (noise cleaning; a low-pass filter's noise reduction against the blur of
   image detail); the ``1 / sigma`` fall of white noise under a 2-D Gaussian of
   ``sigma`` px follows from its variance ``sum g^2 = 1 / (4 pi sigma^2)``.
"""

from __future__ import annotations

from typing import Callable

#: Gaussian sigmas (px) tried, smallest first; the first is the step's usual smoothing.
TRIAL_SCALES_PX = (1.0, 2.0, 3.0)
#: The grain level (in background sigmas) at which a scale is good enough: the step's noise floor.
ENOUGH_SNR = 10.0
#: A scale s is believed only while its ratio is at most this factor times ``s / s0`` times the ratio at the
#: first scale s0: smoothing lowers white noise by ``s / s0`` at most and never lifts a grain, so a larger
#: gain means the grains and the background were told apart differently (thin gaps between packed grains
#: smoothed shut), not that the noise fell. The factor allows for the estimates' own scatter.
PLAUSIBLE_GAIN = 1.5
#: Background sigmas above the background at which a pixel shows as grain: segment-grains' default noise
#: threshold (its ``noise_k``).
SEEN_SIGMAS = 5.0
#: A share of the frame's pixels above SEEN_SIGMAS on the grain side that noise alone does not reach. Measured on
#: frames of noise alone (8 each of uniform, Gaussian, and Gaussian noise resampled 2.5 x) at 1 to 3 px: at most
#: 0.52 % on 128 px frames (few independent cells under a 3 px Gaussian, so a noisy sigma), 0.07 % at 256 px,
#: 0.03 % at 512 px; four times the worst.
SHOWN_SHARE = 0.02
#: ... and a wider scale is taken for it only when it shows at least this many times the share the first scale
#: shows: the grains then stand out of a noise the wider Gaussian lowered (on rendered discs of 22 px radius in
#: noise correlated over 1.5-3 px the share grew 3-100 times from 1 to 3 px, and the discs found from a median
#: 6 to 9 of 9); a frame whose grains show at the first scale already keeps it.
SHOWN_GAIN = 3.0


def scales_for(smooth_px: float | None) -> tuple:
    """The scales :func:`levels_at_best_scale` tries: :data:`TRIAL_SCALES_PX` when the smoothing is left to
    the step (``smooth_px`` None), else the one scale asked for (px)."""
    return TRIAL_SCALES_PX if smooth_px is None else (float(smooth_px),)


def pick_scale(snr_by_scale: dict[float, float], enough: float = ENOUGH_SNR,
               plausible_gain: float = PLAUSIBLE_GAIN, share_by_scale: dict[float, float] | None = None,
               shown: float = SHOWN_SHARE) -> float:
    """The smoothing scale to keep, from the grain-to-noise ratio at each trial scale.

    Parameters
    ----------
    snr_by_scale : dict
        ``{sigma_px: grain_snr}``; must hold the smallest scale, which serves
        unless another is better.
    enough : float
        A ratio at which a scale is good enough.
    plausible_gain : float
        A wider scale ``s`` whose ratio exceeds ``plausible_gain * s / s0``
        times the smallest scale ``s0``'s is not considered (see
        :data:`PLAUSIBLE_GAIN`).
    share_by_scale : dict, optional
        ``{sigma_px: share}``: the fraction of the frame's pixels more than
        :data:`SEEN_SIGMAS` background sigmas out on the grain side, at the
        scales of ``snr_by_scale``.
    shown : float
        A share at which grains show (:data:`SHOWN_SHARE`).

    Returns
    -------
    float
        Among the smallest scale and the plausible wider ones, the smallest
        reaching ``enough``; else the plausible wider scale at which the
        grains show on the largest share of the frame, if that share is at
        least ``shown`` and :data:`SHOWN_GAIN` times the smallest scale's;
        else the smallest scale.
    """
    first = min(snr_by_scale)
    scales = [s for s in sorted(snr_by_scale)
              if s == first or snr_by_scale[s] <= plausible_gain * (s / first) * snr_by_scale[first]]
    good = next((s for s in scales if snr_by_scale[s] >= enough), None)
    if good is not None:
        return good
    wider = [s for s in scales if s != first]
    if share_by_scale and wider:
        best = max(wider, key=lambda s: share_by_scale.get(s, 0.0))
        shown_best = share_by_scale.get(best, 0.0)
        if shown_best >= shown and shown_best >= SHOWN_GAIN * share_by_scale.get(first, 0.0):
            return best
    return first


def levels_at_best_scale(frame_levels: Callable[..., dict], regions, shape: tuple, pixel_size_nm: float,
                         background_nm: float, denoise_method: str, polarity: str,
                         scales=TRIAL_SCALES_PX, raw_levels: Callable[..., dict] | None = None) -> dict:
    """The step's frame levels at the denoising scale :func:`pick_scale` chooses.

    Parameters
    ----------
    frame_levels : callable
        :func:`grainhabit.plugins.preprocess.flatten_background.frame_levels`
        (passed in: this module is imported by it).
    regions, shape, pixel_size_nm, background_nm, denoise_method, polarity
        As for ``frame_levels``.
    scales : sequence of float
        Trial Gaussian sigmas (px), smallest first.
    raw_levels : callable, optional
        :func:`grainhabit.plugins.preprocess.flatten_background.raw_levels`: ``frame_levels``' first
        pass (normalisation and noise model from the raw values), which no scale changes; taken once
        and handed to every ``frame_levels`` call (``raw_pass``). None: each call makes its own.

    Returns
    -------
    dict
        ``frame_levels``' result at the chosen scale (its ``smooth_px`` says
        which), with ``smooth_scores``: the ratio at each scale tried.

    Notes
    -----
    Only Gaussian denoising has a scale to choose; other methods take the
    first scale (and a frame denoised already, ``frame_levels``' ``whole``, is levelled at it). The wider scales are tried only when the first leaves the
    ratio below ``ENOUGH_SNR``, one at a time, stopping at the first
    plausible one that reaches it.
    """
    once = {} if raw_levels is None else {"raw_pass": raw_levels(regions, shape)}
    lv = frame_levels(regions, shape, pixel_size_nm, background_nm, denoise_method, scales[0], polarity, **once)
    scores = {scales[0]: lv["grain_snr"]}
    shares = {scales[0]: lv["grain_share"]}
    tried = {scales[0]: lv}
    if denoise_method == "gaussian" and lv["grain_snr"] < ENOUGH_SNR:
        for s in scales[1:]:
            for earlier in tried.values():
                # one denoised frame held at a time (a whole frame of float32 each); the step denoises again
                # for the output when the chosen levels have none
                earlier.pop("denoised", None)
            tried[s] = frame_levels(regions, shape, pixel_size_nm, background_nm, denoise_method, s, polarity,
                                    **once)
            scores[s] = tried[s]["grain_snr"]
            shares[s] = tried[s]["grain_share"]
            if pick_scale(scores) == s and scores[s] >= ENOUGH_SNR:
                break
    chosen = tried[pick_scale(scores, share_by_scale=shares)]
    chosen["smooth_scores"] = scores
    chosen["smooth_shares"] = shares
    return chosen
