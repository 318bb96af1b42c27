"""Tests of the hard synthetic survey: its frames (groups, overlaps, faint plates, debris, marks, photo-like
frames) against handbook geometry, and the scoring of ``grainhabit bench accuracy --hard``.

Everything drawn here is invented test data.
"""
import json
import math

import numpy as np
import pytest
from scipy import ndimage

from grainhabit.frame import FrameData
from grainhabit.plugins.bench import accuracy
from grainhabit.plugins.synthetic import annotate, hard
from grainhabit.plugins.synthetic import render as sy
from grainhabit.plugins.synthetic.render import GrainSpec

PX = 5.0
HABITS = {h: 1.0 for h in sy.HABITS}


# ------------------------------------------------------------------ renderer additions

def test_faint_regular_hexagon_area_and_contrast():
    # regular hexagon of side a: area 3 sqrt(3) / 2 a^2 (handbook geometry)
    full = GrainSpec("tabular_hexagon", 400.0, 400.0, 400.0, edge_ratio=1.0, aspect=40.0, rotation_deg=9.0)
    faint = GrainSpec("tabular_hexagon", 400.0, 400.0, 400.0, edge_ratio=1.0, aspect=40.0, rotation_deg=9.0,
                      contrast_scale=0.4)
    o = sy.grain_outline(full)
    side = np.linalg.norm(np.roll(o, -1, axis=0) - o, axis=1)
    assert len(o) == 6 and np.ptp(side) < 1e-6 * side.mean()
    for contrast in ("bright", "dark"):
        a = sy.render_field([full], (160, 160), PX, contrast, gradient=0, blur_px=0, noise=0)
        b = sy.render_field([faint], (160, 160), PX, contrast, gradient=0, blur_px=0, noise=0)
        assert np.count_nonzero(b.labels) == pytest.approx(3 * math.sqrt(3) / 2 * side.mean() ** 2 / PX ** 2,
                                                           rel=0.02)
        assert np.array_equal(a.labels, b.labels)
        core = ndimage.binary_erosion(a.labels > 0, iterations=4)
        bg = a.image[0, 0]
        # a faint grain shows contrast_scale of the full grain's contrast, pixel for pixel
        np.testing.assert_allclose(b.image[core] - bg, 0.4 * (a.image[core] - bg), atol=1e-5)


def test_faint_square_cube_area():
    # a cube on a {100} face seen from above is a square of side s: area s^2, diagonal s sqrt(2)
    # (handbook geometry); ECD^2 pi / 4 = s^2 (ISO 9276-6)
    g = GrainSpec("cube", 360.0, 400.0, 400.0, alpha=1.0, rotation_deg=21.0, contrast_scale=0.25)
    o = sy.grain_outline(g)
    side = np.linalg.norm(np.roll(o, -1, axis=0) - o, axis=1)
    diag = np.linalg.norm(o[2] - o[0])
    assert len(o) == 4 and np.ptp(side) < 1e-6 * side.mean() and diag == pytest.approx(side[0] * math.sqrt(2))
    for contrast in ("bright", "dark"):
        f = sy.render_field([g], (160, 160), PX, contrast, gradient=0, blur_px=0, noise=0)
        assert np.count_nonzero(f.labels) == pytest.approx(side[0] ** 2 / PX ** 2, rel=0.02)


def test_faint_plate_transmission_follows_exp_mu_t():
    # bright-field transmission through a plate of thickness t: (1 - loss) exp(-mu t) of the beam
    # (mass-thickness contrast, Williams and Carter, Transmission Electron Microscopy, 2nd ed., 2009)
    g = GrainSpec("tabular_hexagon", 450.0, 400.0, 400.0, edge_ratio=1.0, aspect=30.0, contrast_scale=0.35)
    f = sy.render_field([g], (160, 160), PX, "dark", gradient=0, blur_px=0, noise=0, mu_per_nm=1 / 150,
                        bragg_loss=0.2)
    core = ndimage.binary_erosion(f.labels > 0, iterations=4)
    t = 450.0 / 30.0
    want = 0.88 * (1 + 0.35 * (0.8 * math.exp(-t / 150) - 1))
    assert float(np.median(f.image[core])) == pytest.approx(want, abs=1e-3)


def test_default_placement_unchanged_by_the_group_options():
    a = sy.random_grains(30, (384, 384), PX, HABITS, 180.0, touching_fraction=0.3, seed=4)
    b = sy.place_grains(30, (384, 384), PX, HABITS, 180.0, touching_fraction=0.3, seed=4)
    assert a[0] == b.grains and a[1] == b.pairs and b.overlaps == []


def test_groups_touch_and_overlaps_hide_part_of_the_back_grain():
    p = sy.place_grains(50, (768, 768), PX, HABITS, 300.0, ecd_gsd=1.2, touching_fraction=0.3,
                        group_sizes=(2, 3, 4), overlap_fraction=0.1, seed=5)
    f = sy.render_field(p.grains, (768, 768), PX, "dark", noise=0)
    assert sum(len(g) for g in p.groups) in (14, 15) and {len(g) for g in p.groups} <= {2, 3, 4}
    assert len(p.overlaps) == 2
    # each group is one connected piece of the rendered contact graph (scipy.sparse.csgraph as reference)
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    e = np.array(f.touching_pairs) - 1
    graph = coo_matrix((np.ones(len(e)), (e[:, 0], e[:, 1])), shape=(50, 50))
    _, comp = connected_components(graph, directed=False)
    for g in p.groups:
        assert len({comp[m - 1] for m in g}) == 1
    # grains in no group or pair touch nothing (3 px gap)
    in_unit = {m for g in p.groups for m in g} | {m for o in p.overlaps for m in o}
    assert all(a in in_unit and b in in_unit for a, b in f.touching_pairs)
    area = np.bincount(f.labels.ravel(), minlength=51)
    for back, front in p.overlaps:
        full = lambda k: math.pi / 4 * p.grains[k - 1].ecd_nm ** 2 / PX ** 2   # ISO 9276-6 ECD
        assert p.grains[front - 1].ecd_nm <= p.grains[back - 1].ecd_nm
        assert area[front] == pytest.approx(full(front), rel=0.02)             # the front grain is whole
        hidden = 1 - area[back] / full(back)
        # two equal discs at 0.6-0.8 of the contact distance: 14-35 % hidden (lens area, handbook
        # geometry); a smaller front grain hides less
        assert 0.01 < hidden < 0.40


def test_debris_kept_off_grains_and_recorded():
    f = sy.make_field(20, (300, 300), PX, {"cube": 1.0}, 200.0, seed=2, noise=0)
    d = sy.add_artefacts(f, seed=2, n_streaks=2, n_debris=30, avoid_grains=True)
    assert np.array_equal(d.labels, f.labels) and len(d.debris_rc) == 30 and d.streaks.shape == (2, 3)
    dist = ndimage.distance_transform_edt(f.labels == 0)
    assert dist[d.debris_rc[:, 0], d.debris_rc[:, 1]].min() > 4
    # a speck is under 3 px across: above half its peak on at most 3 x 3 pixels
    img = d.image.astype(float) - f.image
    r, c = d.debris_rc[0]
    patch = img[r - 3:r + 4, c - 3:c + 4]
    assert np.count_nonzero(patch > 0.5 * patch.max()) <= 9


# ------------------------------------------------------------------ annotations

def test_text_mask_size_and_scale_bar_length():
    m = annotate.text_mask("500 nm", 2)
    assert m.shape == (14, (6 * 6 - 1) * 2)
    dots = sum(sum(row.count("#") for row in annotate.GLYPHS[ch]) for ch in "500 nm")
    assert np.count_nonzero(m) == 4 * dots
    # worked examples: a 3840 nm wide field takes a 500 nm bar, 76.8 um takes 10 um
    assert annotate.scale_bar_length_nm(3840.0) == 500.0
    assert annotate.scale_bar_length_nm(76800.0) == 10000.0
    with pytest.raises(ValueError):
        annotate.text_mask("x", 2)


def test_burn_in_keeps_clear_of_grains():
    f = sy.make_field(12, (384, 384), PX, {"cube": 1.0}, 250.0, seed=1, noise=0)
    img, marks = annotate.burn_in(f.image, f.labels, PX, seed=3, panel="b")
    assert marks.kinds == ["scale_text", "scale_bar", "panel_letter"] and marks.skipped == 0
    on = marks.labels > 0
    assert set(np.unique(img[on])) <= {0.0, 1.0} and np.array_equal(img[~on], f.image[~on])
    assert ndimage.distance_transform_edt(f.labels == 0)[on].min() > 6
    bar = marks.labels == 2
    rows, cols = np.nonzero(bar)
    assert np.ptp(cols) + 1 == round(annotate.scale_bar_length_nm(384 * PX) / PX)


# ------------------------------------------------------------------ survey frames

def test_hard_field_is_deterministic_and_holds_every_condition():
    a = hard.hard_field("dark", 3, size=512, n_grains=30, ecd_nm=250.0, seed=2)
    b = hard.hard_field("dark", 3, size=512, n_grains=30, ecd_nm=250.0, seed=2)
    assert np.array_equal(a.field.image, b.field.image) and a.defocused
    assert not hard.hard_field("dark", 0, size=512, n_grains=30, ecd_nm=250.0, seed=2).defocused
    assert a.groups and a.overlaps and len(a.faint) == 2 and len(a.field.debris_rc) > 20
    assert all(a.field.grains[k - 1].contrast_scale < 1 for k in a.faint)
    assert len(a.annotations.kinds) == 3 and len(a.field.streaks) == 3


def test_photo_field_round_objects_low_contrast_uneven_light():
    h = hard.photo_field(0, size=512, ecd_px=30.0, seed=1)
    f = h.field
    n = int(f.labels.max())
    assert n == 24 and all(g.habit == "irregular" for g in f.grains)
    # ellipse area pi a b = pi ECD^2 / 4 (handbook geometry)
    area = np.bincount(f.labels.ravel())[1:]
    want = np.array([math.pi / 4 * (g.ecd_nm / f.pixel_size_nm) ** 2 for g in f.grains])
    np.testing.assert_allclose(area, want, rtol=0.06)
    # well separated: gaps of at least a quarter of the summed ECDs
    dist = ndimage.distance_transform_edt(f.labels == 0)
    assert dist[f.labels == 0].max() > 20
    bg = ndimage.binary_erosion(f.labels == 0, iterations=10) & (h.annotations.labels == 0)
    smooth = ndimage.uniform_filter(f.image.astype(float), 31)
    light_range = np.ptp(smooth[bg]) / np.median(f.image[bg])
    # object contrast against the local background level (mean of the background around it)
    free = (f.labels == 0) & (h.annotations.labels == 0)
    level = ndimage.uniform_filter(f.image * free, 81) / np.maximum(ndimage.uniform_filter(free * 1.0, 81), 1e-6)
    objects = ndimage.binary_erosion(f.labels > 0, iterations=3)
    contrast = np.abs(f.image[objects] / level[objects] - 1)
    assert light_range > 0.25 and 0.03 < float(np.median(contrast)) < 0.12


# ------------------------------------------------------------------ scoring

def _perfect(hf):
    """What an ideal chain returns for a frame: the truth labels and habits."""
    f = hf.field
    n = len(f.grains)
    area = np.bincount(f.labels.ravel(), minlength=n + 1)[1:]
    grains = {"label": np.arange(1, n + 1), "edge_cut": np.zeros(n, bool),
              "habit": np.array([g.habit for g in f.grains], object),
              "alpha": np.array([min(max(g.alpha, 1.0), 3.0) if g.habit in ("cube", "cuboctahedron", "octahedron")
                                 else np.nan for g in f.grains]),
              "ecd_nm": np.sqrt(4 * area / np.pi) * f.pixel_size_nm}
    return FrameData(source="t", sample="t", raw=f.image, pixel_size_nm=f.pixel_size_nm, labels=f.labels.copy(),
                     grains=grains)


@pytest.fixture(scope="module")
def frame():
    return hard.hard_field("bright", 0, size=512, n_grains=30, ecd_nm=250.0, seed=4)


def test_perfect_answer_scores_perfectly(frame):
    s = accuracy.score_hard_frame(frame, _perfect(frame))
    r = accuracy.summarise_hard(s)
    assert r["recall"] == 1.0 and r["precision"] == 1.0 and r["habit_accuracy"] == 1.0
    assert all(v[0] == v[1] for v in s["groups"].values()) and s["overlaps"][0] == s["overlaps"][1] > 0
    assert s["faint"] == {"whole": 2, "shattered": 0, "missed": 0}
    assert s["debris"][0] == s["debris"][1] > 0
    assert all(v == [1, 1] for v in s["annotations"].values())
    assert r["cov_err_pp"] == pytest.approx(0.0, abs=1e-9) and r["alpha_mae_cubo"] < 1e-9
    assert sum(s["extras"].values()) == 0


def test_failures_are_counted(frame):
    found = _perfect(frame)
    lab = found.labels
    nxt = int(lab.max()) + 1
    # shatter the first faint plate into three strips
    plate = frame.faint[0]
    rr, cc = np.nonzero(lab == plate)
    cut = np.quantile(cc, [1 / 3, 2 / 3])
    lab[(lab == plate) & (np.arange(lab.shape[1])[None, :] >= cut[0])] = nxt
    lab[(lab == nxt) & (np.arange(lab.shape[1])[None, :] >= cut[1])] = nxt + 1
    # merge the first touching group into one grain
    group = frame.groups[0]
    lab[np.isin(lab, group[1:])] = group[0]
    # the scale bar found as a grain, and a speck too
    lab[frame.annotations.labels == frame.annotations.kinds.index("scale_bar") + 1] = nxt + 2
    r, c = frame.field.debris_rc[0]
    lab[r - 1:r + 2, c - 1:c + 2] = nxt + 3
    from dataclasses import replace

    s = accuracy.score_hard_frame(frame, replace(found, labels=lab, grains={}))
    assert s["faint"]["shattered"] == 1 and s["faint"]["whole"] == 1
    assert s["groups"][len(group)][0] == s["groups"][len(group)][1] - 1
    assert s["annotations"]["scale_bar"] == [0, 1] and s["annotations"]["scale_text"] == [1, 1]
    assert s["debris"][0] == s["debris"][1] - 1
    assert s["extras"]["annotation"] == 1 and s["extras"]["debris"] == 1
    # the three strips; the merged group is matched to one member or counted as a merge (or fragment)
    assert 3 <= s["extras"]["fragment"] + s["extras"]["merge"] <= 4
    r = accuracy.summarise_hard(s)
    assert r["recall"] < 1 and r["precision"] < 1


def test_cli_hard_survey_prints_and_writes(tmp_path, capsys):
    out = tmp_path / "hard.json"
    code = accuracy.run(["--hard", "--frames", "1", "--size", "256", "--grains", "12", "--ecd", "150",
                         "--contrast", "dark", "--json", str(out)])
    text = capsys.readouterr().out
    assert code == 0 and "[dark]" in text and "faint plates" in text and "COV of ECD" in text
    fig = json.loads(out.read_text())
    assert set(fig) == {"dark"} and 0 <= fig["dark"]["recall"] <= 1 and fig["dark"]["n_truth"] == 12
    with pytest.raises(SystemExit):
        accuracy.run(["--contrast", "photo"])


def test_habit_accuracy_by_size_band_adds_up_to_the_confusion_matrix(frame):
    # The bands' counts are a partition of the matched grains scored for habit: they add up to the
    # confusion matrix's total, and for the truth's own labels and habits every grain is right.
    assert accuracy.size_band(5.0) == "under 20 px" and accuracy.size_band(20.0) == "20-40 px"
    assert accuracy.size_band(79.9) == "40-80 px" and accuracy.size_band(300.0) == "80 px and over"
    s = accuracy.score_hard_frame(frame, _perfect(frame))
    cells = list(s["habit_by_size"].values())
    assert sum(c[1] for c in cells) == int(s["confusion"].sum()) > 0
    assert sum(c[0] for c in cells) == int(np.trace(s["confusion"])) == sum(c[1] for c in cells)


def test_habit_errors_are_split_by_confidence(frame):
    # A wrong habit named with habit_score above 0.5 is a confident error, one at or below 0.5 a
    # hedged one, a faceted grain left irregular is counted apart; right habits count in none, and
    # the three add up to the errors of the confusion matrix.
    from dataclasses import replace

    found = _perfect(frame)
    g = dict(found.grains)
    n = len(g["label"])
    g["habit"] = g["habit"].copy()
    g["habit_score"] = np.full(n, 0.9)
    inside = [t for t in range(1, n + 1) if t not in accuracy.border_labels(frame.field.labels)]
    faceted = [t for t in inside if g["habit"][t - 1] != "irregular"]
    for t, score in ((faceted[0], 0.9), (faceted[1], 0.25)):
        g["habit"][t - 1] = "rod" if g["habit"][t - 1] != "rod" else "cube"
        g["habit_score"][t - 1] = score
    g["habit"][faceted[2] - 1] = "irregular"                      # left undetermined, whatever its score
    s = accuracy.score_hard_frame(frame, replace(found, grains=g))
    assert s["habit_errors"] == {"confident": 1, "low_score": 1, "irregular": 1}
    assert sum(s["habit_errors"].values()) == int(s["confusion"].sum() - np.trace(s["confusion"]))
    r = accuracy.summarise_hard(s)
    assert r["habit_errors"] == {"confident": 1, "low_score": 1, "irregular": 1}
    text = accuracy.format_hard("bright", {**r, "seconds": 0.0, "focused": {}, "defocused": {"frames": 0}})
    assert "1 another habit named with habit_score > 0.5" in text and "1 named at or below" in text
    assert "1 left irregular" in text
