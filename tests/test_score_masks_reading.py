"""``grainhabit score-masks`` reads pictures as ``grainhabit run`` does (invented test pictures).

A facility validating grainhabit on its own annotated pictures must score what a night's run would find:
the same readers (its instrument's format and calibration, an info strip cropped, drawn marks masked) and
the same pixel size. Disc areas are handbook geometry (pi r^2).
"""

from __future__ import annotations

import numpy as np
import pytest
from builders import noisy, with_info_strip, write_tiff
from PIL import Image
from skimage.draw import disk

from grainhabit.plugins.survey import score_masks

CENTRES = ((40, 40), (40, 120), (100, 80))
RADIUS = 10


def discs(shape=(160, 192)):
    """Dark discs of radius RADIUS px on a noisy grey background (uint8), and their instance mask."""
    img = noisy(shape, seed=5, mean=190, sd=6)
    truth = np.zeros(shape, np.uint16)
    for k, (r, c) in enumerate(CENTRES, 1):
        rr, cc = disk((r, c), RADIUS, shape=shape)
        img[rr, cc] = 70
        truth[rr, cc] = k
    return img, truth


def folders(tmp_path):
    (tmp_path / "img").mkdir()
    (tmp_path / "msk").mkdir()
    return tmp_path / "img", tmp_path / "msk"


def test_info_strip_is_cropped_as_in_a_run_and_its_rows_get_no_grain(tmp_path):
    img, truth = discs()
    strip_rows = 24
    picture = with_info_strip(img, strip_rows, background=20)
    mask = np.concatenate([truth, np.zeros((strip_rows, truth.shape[1]), truth.dtype)])
    imgs, msks = folders(tmp_path)
    Image.fromarray(picture).save(imgs / "a.png")
    Image.fromarray(mask).save(msks / "a.png")
    frame = score_masks.read_picture(score_masks_host(), imgs / "a.png", {"pixel_size_nm": 1.0})
    assert frame.raw.shape == img.shape  # the bitmap reader found the strip and cropped it
    assert any("info strip removed" in n for n in frame.notes)
    res = score_masks.score_folder(imgs, msks)
    assert res["recall"] == 1.0 and res["precision"] == 1.0 and res["per_frame"][0]["error"] == ""


def test_the_files_own_pixel_size_applies_unless_one_is_given(tmp_path):
    # the discs' ECD is 2 r = 20 px (pi r^2 = pi (ECD / 2)^2): 80 nm at the TIFF's stated 4 nm per pixel,
    # over a size limit of 60 nm, so kept; given 2 nm per pixel instead they are 40 nm and dropped
    img, truth = discs()
    imgs, msks = folders(tmp_path)
    write_tiff(imgs / "a.tif", img, pixel_size_nm=4.0)
    Image.fromarray(truth).save(msks / "a.png")
    steps = [("flatten-background", {}), ("segment-grains", {"min_ecd_nm": 60.0})]
    own = score_masks.score_folder(imgs, msks, steps=steps)
    given = score_masks.score_folder(imgs, msks, pixel_size_nm=2.0, steps=steps)
    assert own["recall"] == 1.0 and own["precision"] == 1.0
    assert own["ecd_error_median"] < 0.1
    assert given["recall"] == 0.0


def test_companion_files_are_skipped_and_two_pictures_for_one_mask_refused(tmp_path):
    img, truth = discs()
    imgs, msks = folders(tmp_path)
    Image.fromarray(img).save(imgs / "a.png")
    (imgs / "a.txt").write_text("PixelSize=1 nm\n")  # calibration text beside a bitmap: no picture
    Image.fromarray(truth).save(msks / "a.png")
    assert [p.name for p, _ in score_masks.pair_files(imgs, msks)] == ["a.png"]
    write_tiff(imgs / "a.tif", img)
    with pytest.raises(ValueError, match="a.png and a.tif"):
        score_masks.pair_files(imgs, msks)


def test_labels_of_a_resampled_frame_are_refused_not_misplaced():
    labels = np.zeros((50, 80), np.int32)
    assert score_masks.on_mask_grid(labels, (60, 80), "x.tif").shape == (60, 80)  # strip rows padded
    with pytest.raises(ValueError, match="x.tif: read as 50 x 40 pixels"):
        score_masks.on_mask_grid(np.zeros((50, 40), np.int32), (50, 80), "x.tif")


def score_masks_host():
    from grainhabit.manager import make_host

    return make_host()


def test_the_command_names_pictures_it_could_not_score_and_pictures_without_a_mask(tmp_path):
    # a mask drawn on another grid fails that picture in one line naming it; a picture without a mask of the
    # same name is named as not scored; the others are scored as usual
    from builders import run_cli

    img, truth = discs()
    imgs, msks = folders(tmp_path)
    for name in ("a", "b", "c"):
        Image.fromarray(img).save(imgs / f"{name}.png")
    Image.fromarray(truth).save(msks / "a.png")
    Image.fromarray(truth[:40, :40]).save(msks / "b.png")
    res = run_cli("score-masks", imgs, msks)
    assert res.returncode == 0
    err = res.stderr.splitlines()
    assert any(line.startswith("grainhabit score-masks: b.png failed: ") and "the mask is 40 x 40" in line
               for line in err)
    assert any("1 picture(s) without a mask of the same name" in line and "(c.png)" in line for line in err)
    assert "frames 2" in res.stdout and "recall 1.000" in res.stdout
