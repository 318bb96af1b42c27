"""Smoke tests of bench sizes, bench memory --huge and bench throughput --versus-script (tiny sizes;
no timing assertions: the figures are printed by the benchmarks themselves)."""

from __future__ import annotations

import json

import numpy as np
import pytest

from grainhabit.plugins.bench import harness as bu
from grainhabit.plugins.bench import reference_script, sizes


@pytest.fixture(scope="module")
def tiles():
    return sizes.render_tiles(2, 128, seed=4)


def test_mosaic_is_made_of_variants_under_one_ramp(tiles):
    frame = sizes.mosaic(tiles, 256, gradient=0.0)
    assert frame.shape == (256, 256) and frame.dtype == np.uint16
    from grainhabit.plugins.synthetic.render import to_uint16

    # without a ramp, block k is variant k // 2 of field k % 2
    np.testing.assert_array_equal(frame[:128, 128:], to_uint16(bu.variant(tiles[1], 0)))
    np.testing.assert_array_equal(frame[128:, 128:], to_uint16(bu.variant(tiles[1], 1)))
    ramped = sizes.mosaic(tiles, 256, gradient=0.3).astype(float)
    assert not np.array_equal(ramped, frame)
    with pytest.raises(ValueError, match="multiple"):
        sizes.mosaic(tiles, 200)


def test_sizes_cli_prints_the_table(tmp_path, capsys):
    out = tmp_path / "sizes.json"
    code = sizes.run(["--sizes", "256,128", "--tile", "128", "--fields", "1", "--json", str(out)])
    text = capsys.readouterr().out
    assert code == 0, text
    assert "s/Mpx" in text and "ms/grain" in text and "target <= 1.2x" in text
    fig = json.loads(out.read_text())
    assert set(fig["table"]) == {"128", "256"}
    assert fig["table"]["128"]["ratio"] == pytest.approx(1.0)
    assert fig["ratio"] == pytest.approx(fig["table"]["256"]["s_per_mpx"] / fig["table"]["128"]["s_per_mpx"])


def test_sizes_cli_rejects_sizes_off_the_tile_grid():
    with pytest.raises(SystemExit) as exc:
        sizes.run(["--sizes", "1000", "--tile", "128"])
    assert exc.value.code == 2


def test_script_finds_well_separated_grains():
    # reference: scikit-image's Otsu, peak_local_max and watershed, as wired in the hand-written script,
    # must find isolated grains one to one (scored as bench accuracy scores)
    from grainhabit.plugins.bench.accuracy import score_frame
    from grainhabit.plugins.synthetic.render import HABITS, make_field, to_uint16

    field = make_field(12, (384, 384), bu.PIXEL_SIZE_NM, {"cube": 1.0}, bu.ECD_NM, seed=2,
                       touching_fraction=0.0)
    assert "cube" in HABITS
    s = score_frame(field.labels, reference_script.script_labels(to_uint16(field.image)), [])
    assert s["n_truth"] >= 8 and s["tp"] >= s["n_truth"] - 1


def test_versus_script_prints_ratio_and_accuracy(tmp_path, capsys):
    from grainhabit.plugins.bench import throughput

    out = tmp_path / "vs.json"
    code = throughput.run(["--versus-script", "--frames", "1", "--size", "192", "--grains", "3", "--workers", "1",
                           "--repeat", "1", "--accuracy-frames", "1", "--json", str(out)])
    text = capsys.readouterr().out
    assert code == 0, text
    assert "throughput ratio grainhabit run / script" in text and "recall" in text
    fig = json.loads(out.read_text())
    assert fig["pipeline"][0]["frames_ok"] == 1 and set(fig["accuracy"]) == {"script", "grainhabit"}
    assert fig["ratio"] == pytest.approx(fig["script"][0]["wall"] / fig["pipeline"][0]["wall"])
    assert "CPU seconds per frame and stage" in text
    assert fig["script"][0]["cpu_stages"]["segment"] > 0 and fig["pipeline"][0]["cpu_stages"]["segment"] > 0
