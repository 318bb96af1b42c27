"""Tests of the synthetic micrograph renderer and its ground truth."""
import numpy as np
import pytest
from scipy import ndimage

from grainhabit.plugins.synthetic import render as sy
from grainhabit.plugins.synthetic.render import GrainSpec

PX = 5.0
ALL_HABITS = {"cube": 0.25, "cuboctahedron": 0.2, "octahedron": 0.2, "tabular_hexagon": 0.1,
              "tabular_triangle": 0.1, "rod": 0.05, "irregular": 0.1}


def single(habit, ecd=300.0, **kw):
    return GrainSpec(habit=habit, ecd_nm=ecd, x_nm=400.0, y_nm=420.0, **kw)


ISOLATED = [
    single("cube", alpha=1.0, rotation_deg=12.0),
    single("cube", alpha=1.3, face="111", rotation_deg=5.0),
    single("cuboctahedron", alpha=2.0, rotation_deg=33.0),
    single("cuboctahedron", alpha=2.4, face="111", rotation_deg=71.0),
    single("octahedron", alpha=3.0, face="111", rotation_deg=-20.0),
    single("octahedron", alpha=3.2, face="100"),
    single("tabular_hexagon", edge_ratio=0.7, aspect=8.0, rotation_deg=10.0),
    single("tabular_triangle", edge_ratio=0.03, aspect=10.0, rotation_deg=47.0),
    single("rod", ecd=200.0, aspect=5.0, rotation_deg=28.0),
    single("irregular", shape_seed=7, rotation_deg=15.0),
]


@pytest.mark.parametrize("g", ISOLATED, ids=[f"{g.habit}-{g.face}" for g in ISOLATED])
def test_isolated_grain_truth_area_matches_ecd(g):
    # source: definition of ECD (ISO 9276-6): projected area = pi/4 * ECD^2
    f = sy.render_field([g], (160, 160), PX, noise=0.0)
    area_px = np.count_nonzero(f.labels == 1)
    assert set(np.unique(f.labels)) == {0, 1}
    assert area_px == pytest.approx(np.pi / 4 * g.ecd_nm ** 2 / PX ** 2, rel=0.02)
    # the truth is one connected region (scipy.ndimage.label as reference)
    assert ndimage.label(f.labels == 1)[1] == 1


def test_outline_polygon_area_matches_ecd():
    # source: shoelace formula on the returned outline (ISO 9276-6 ECD)
    for g in ISOLATED[:-1]:
        o = sy.grain_outline(g)
        x, y = o[:, 0], o[:, 1]
        area = 0.5 * abs(np.dot(x, np.roll(y, -1)) - np.dot(y, np.roll(x, -1)))
        assert area == pytest.approx(np.pi / 4 * g.ecd_nm ** 2, rel=1e-9)


def test_grain_centre_is_where_asked():
    g = GrainSpec("cube", 250.0, x_nm=512.5, y_nm=300.0, alpha=1.0)
    f = sy.render_field([g], (120, 160), PX, noise=0.0)
    cy, cx = ndimage.center_of_mass(f.labels == 1)
    # pixel centre convention: ((col + 0.5) px, (row + 0.5) px)
    assert (cx + 0.5) * PX == pytest.approx(512.5, abs=0.5 * PX)
    assert (cy + 0.5) * PX == pytest.approx(300.0, abs=0.5 * PX)


@pytest.fixture(scope="module")
def fields():
    out = {}
    for contrast in ("bright", "dark"):
        out[contrast] = sy.make_field(40, (384, 384), PX, ALL_HABITS, 180.0, contrast=contrast,
                                      seed=3, touching_fraction=0.3)
    return out


def test_contrast_polarity(fields):
    for contrast, f in fields.items():
        grain = f.image[f.labels > 0].mean()
        # background away from the grains (dilate the truth by 4 px)
        bg = f.image[~ndimage.binary_dilation(f.labels > 0, iterations=4)].mean()
        if contrast == "bright":
            assert grain > bg + 0.15
        else:
            assert grain < bg - 0.15
        assert f.image.dtype == np.float32 and f.labels.dtype == np.int32
        assert 0.0 <= f.image.min() and f.image.max() <= 1.0


def test_labels_are_one_to_n_in_order(fields):
    f = fields["bright"]
    assert set(np.unique(f.labels)) == set(range(len(f.grains) + 1))
    for k, g in enumerate(f.grains, start=1):
        cy, cx = ndimage.center_of_mass(f.labels == k)
        # the label's mass lies near its grain's centre (an occluded grain moves a little)
        assert np.hypot((cx + 0.5) * PX - g.x_nm, (cy + 0.5) * PX - g.y_nm) < 0.5 * g.ecd_nm


def test_deterministic_with_seed():
    a = sy.make_field(15, (200, 200), PX, ALL_HABITS, 150.0, seed=11)
    b = sy.make_field(15, (200, 200), PX, ALL_HABITS, 150.0, seed=11)
    c = sy.make_field(15, (200, 200), PX, ALL_HABITS, 150.0, seed=12)
    assert np.array_equal(a.image, b.image) and np.array_equal(a.labels, b.labels)
    assert a.grains == b.grains
    assert not np.array_equal(a.labels, c.labels)


def test_touching_pairs_share_a_boundary():
    grains, pairs = sy.random_grains(40, (384, 384), PX, ALL_HABITS, 180.0, touching_fraction=0.3,
                                     seed=5)
    assert len(pairs) == 6          # round(0.3 * 40 / 2)
    f = sy.render_field(grains, (384, 384), PX, noise=0.0)
    touching = set(f.touching_pairs)
    for a, b in pairs:
        assert (a, b) in touching
        # both grains stay visible; the smaller one is in front
        assert np.count_nonzero(f.labels == a) > 0 and np.count_nonzero(f.labels == b) > 0
    # and no other grains touch: isolated grains keep a gap
    assert touching == set(pairs)
    # independent check of contact: a label's one-pixel dilation meets its partner
    for a, b in pairs:
        ring = ndimage.binary_dilation(f.labels == a) & ~(f.labels == a)
        assert np.any(f.labels[ring] == b)


def test_isolated_grains_keep_gap_and_margin():
    grains, pairs = sy.random_grains(30, (300, 300), PX, {"cube": 1.0}, 150.0,
                                     touching_fraction=0.0, seed=2)
    assert pairs == []
    f = sy.render_field(grains, (300, 300), PX, noise=0.0)
    lab = f.labels
    # nothing on the border rows/columns (default margin 3 px)
    assert not np.any(lab[:3]) and not np.any(lab[-3:]) and not np.any(lab[:, :3]) \
        and not np.any(lab[:, -3:])
    # each grain's 2-px dilation meets no other grain
    for k in range(1, len(grains) + 1):
        grown = ndimage.binary_dilation(lab == k, iterations=2)
        assert set(np.unique(lab[grown])) <= {0, k}


def test_random_grains_size_distribution_and_habits():
    # source: lognormal distribution: median = exp(mean of ln ECD), gsd = exp(sd of ln ECD)
    grains, _ = sy.random_grains(400, (2000, 2000), 2.0, {"cube": 3, "octahedron": 1}, 60.0,
                                 ecd_gsd=1.2, touching_fraction=0.0, seed=9)
    ln = np.log([g.ecd_nm for g in grains])
    assert np.exp(np.median(ln)) == pytest.approx(60.0, rel=0.05)
    assert np.exp(np.std(ln, ddof=1)) == pytest.approx(1.2, rel=0.05)
    frac_cube = np.mean([g.habit == "cube" for g in grains])
    assert frac_cube == pytest.approx(0.75, abs=0.06)
    for g in grains:
        if g.habit == "cube":
            assert 0.6 <= g.alpha <= 1.4 and g.face == "100"
        else:
            assert 3.0 <= g.alpha <= 3.6 and g.face == "111"


def interior(labels, k, erode_px):
    return ndimage.binary_erosion(labels == k, iterations=erode_px)


def test_octahedron_facets_differ_tabular_plate_uniform():
    octa = GrainSpec("octahedron", 400.0, 250.0, 250.0, alpha=3.0, face="111", rotation_deg=10)
    plate = GrainSpec("tabular_hexagon", 400.0, 750.0, 250.0, edge_ratio=0.8, aspect=10.0)
    f = sy.render_field([octa, plate], (100, 200), PX, "bright", noise=0.01, seed=1)
    io, ip = interior(f.labels, 1, 4), interior(f.labels, 2, 4)
    vo, vp = f.image[io], f.image[ip]
    # octahedron on (111): flat top triangle and three faces tilted by
    # arccos(1/3) = 70.5 deg (handbook geometry) -> several brightness levels
    hist, _ = np.histogram(vo, bins=20, range=(0, 1))
    assert np.count_nonzero(hist > 0.05 * vo.size) >= 2
    assert vo.std() > 4 * vp.std()
    assert vp.std() < 0.03


def test_dark_contrast_thin_plates_pale_thick_grains_dark():
    # source: Beer-Lambert attenuation I = I0 exp(-mu t) (mass-thickness contrast)
    cube = GrainSpec("cube", 300.0, 250.0, 250.0, alpha=1.0)
    plate = GrainSpec("tabular_hexagon", 300.0, 750.0, 250.0, edge_ratio=1.0, aspect=10.0)
    mu, loss = 1 / 150.0, 0.2
    f = sy.render_field([cube, plate], (100, 200), PX, "dark", noise=0.0, gradient=0.0,
                        blur_px=0.0, mu_per_nm=mu, bragg_loss=loss)
    bg = 0.88 * (1 - loss)
    ic, ip = interior(f.labels, 1, 2), interior(f.labels, 2, 2)
    # cube thickness = its edge = ECD * sqrt(pi)/2; plate thickness = ECD / 10
    assert f.image[ic].mean() == pytest.approx(bg * np.exp(-mu * 300 * np.sqrt(np.pi) / 2), rel=1e-3)
    assert f.image[ip].mean() == pytest.approx(bg * np.exp(-mu * 30.0), rel=1e-3)


def test_front_grain_occludes():
    back = GrainSpec("cube", 300.0, 250.0, 250.0, alpha=1.0, z_order=0)
    front = GrainSpec("cube", 200.0, 420.0, 250.0, alpha=1.0, rotation_deg=20.0, z_order=1)
    f = sy.render_field([back, front], (100, 150), PX, noise=0.0)
    assert np.count_nonzero(f.labels == 2) == pytest.approx(np.pi / 4 * 200 ** 2 / PX ** 2, rel=0.02)
    assert np.count_nonzero(f.labels == 1) < 0.95 * np.pi / 4 * 300 ** 2 / PX ** 2
    assert f.touching_pairs == [(1, 2)]


def test_to_uint16():
    q = sy.to_uint16(np.array([-0.1, 0.0, 0.5, 1.0, 2.0], dtype=np.float32))
    assert q.dtype == np.uint16
    assert q.tolist() == [0, 0, 32768, 65535, 65535]


def test_bad_inputs_raise():
    with pytest.raises(ValueError, match="habit"):
        sy.render_field([single("prism")], (50, 50), PX)
    with pytest.raises(ValueError, match="alpha"):
        sy.render_field([single("cube", alpha=2.5)], (50, 50), PX)
    with pytest.raises(ValueError, match="edge_ratio"):
        sy.render_field([single("tabular_triangle", edge_ratio=0.5)], (50, 50), PX)
    with pytest.raises(ValueError, match="contrast"):
        sy.render_field([], (50, 50), PX, contrast="phase")
    with pytest.raises(ValueError, match="habits"):
        sy.random_grains(5, (100, 100), PX, {"sphere": 1.0}, 50.0)
    with pytest.raises(ValueError, match="could not place"):
        sy.random_grains(200, (100, 100), PX, {"cube": 1.0}, 100.0)


def test_negative_margin_allows_edge_cut_grains():
    grains, _ = sy.random_grains(15, (200, 200), PX, {"cube": 1.0}, 120.0, touching_fraction=0.0,
                                 margin_nm=-1e6, seed=4)
    f = sy.render_field(grains, (200, 200), PX, noise=0.0)
    border = np.concatenate([f.labels[0], f.labels[-1], f.labels[:, 0], f.labels[:, -1]])
    assert np.count_nonzero(np.unique(border)) >= 3
    # every grain is still seen (its centre lies inside the field)
    assert set(np.unique(f.labels)) == set(range(len(grains) + 1))
