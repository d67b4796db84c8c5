"""Tests of the synthetic micrograph generator and the bundled samples.

Known answers come from outside the project: de Bruijn's theorems on Penrose tilings, Euclid's pentagon,
the Poisson distribution, Mortensen et al. (2010), and ASE's fcc Al. Seeds are fixed.
"""

from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import integrate
from scipy.spatial import cKDTree
from scipy.stats import norm

from tenfold.analysis import synthetic as S
from tenfold.analysis._errors import TenfoldInputError
from tenfold.analysis._pentagrid import pentagrid_tiling

TAU = (1 + math.sqrt(5)) / 2  # golden ratio
SAMPLES = Path(S.__file__).resolve().parent.parent / "sample_images"


@pytest.fixture(scope="module")
def big_tiling():
    # ~7600 tiles: boundary fluctuations of the ratio stay well under 1 % (about 3 % at ~3000 tiles).
    return pentagrid_tiling(40.0, rng=7)


@pytest.fixture(scope="module")
def model():
    return S.decagonal_model(width_nm=24.0, height_nm=20.0, angle_deg=11.0, rng=5)


# ---------------------------------------------------------------------------------------------------- pentagrid


def test_thick_thin_ratio_is_tau(big_tiling):
    # de Bruijn, Indag. Math. 84 (1981) 39: thick : thin rhombus frequencies -> tau in the infinite tiling.
    n_thick, n_thin = int(big_tiling.thick.sum()), int((~big_tiling.thick).sum())
    assert n_thick + n_thin >= 2000
    assert abs(n_thick / n_thin / TAU - 1) < 0.02


def test_ten_edge_directions_36_deg_apart(big_tiling):
    v = big_tiling.vertices
    d = v[big_tiling.edges[:, 1]] - v[big_tiling.edges[:, 0]]
    d = np.concatenate([d, -d])
    ang = np.mod(np.degrees(np.arctan2(d[:, 1], d[:, 0])), 360.0)
    uniq = np.unique(np.round(ang, 6) % 360.0)
    assert len(uniq) == 10
    np.testing.assert_allclose(np.diff(uniq), 36.0, atol=1e-6)


def test_all_edges_unit_length(big_tiling):
    v = big_tiling.vertices
    length = np.linalg.norm(v[big_tiling.edges[:, 1]] - v[big_tiling.edges[:, 0]], axis=1)
    np.testing.assert_allclose(length, 1.0, atol=1e-12)


def test_min_vertex_separation_is_inverse_tau(big_tiling):
    # Thin rhombus (36 deg) short diagonal: 2 sin 18 deg = 1/tau, the closest approach of two vertices.
    d, _ = cKDTree(big_tiling.vertices).query(big_tiling.vertices, k=2)
    assert d[:, 1].min() == pytest.approx(1 / TAU, abs=1e-9)


def test_rhombus_angles(big_tiling):
    # Penrose rhombi: thick 72/108 deg, thin 36/144 deg.
    v = big_tiling.vertices[big_tiling.rhombi]
    a, b = v[:, 1] - v[:, 0], v[:, 3] - v[:, 0]
    ang = np.degrees(np.arccos(np.clip(np.sum(a * b, axis=1), -1, 1)))
    acute = np.minimum(ang, 180 - ang)
    np.testing.assert_allclose(acute[big_tiling.thick], 72.0, atol=1e-6)
    np.testing.assert_allclose(acute[~big_tiling.thick], 36.0, atol=1e-6)


# ---------------------------------------------------------------------------------------------------- model


def test_ring_members_at_radius(model):
    c = model.columns
    centre = model.centres.set_index("motif_id").loc[c["motif_id"]]
    r = np.hypot(c["x_nm"].to_numpy() - centre["x_nm"].to_numpy(), c["y_nm"].to_numpy() - centre["y_nm"].to_numpy())
    ring = (c["role"] == "ring").to_numpy()
    np.testing.assert_allclose(r[ring], 0.45, atol=1e-12)
    np.testing.assert_allclose(r[~ring], 0.0, atol=1e-12)
    assert (c.loc[~ring, "species"] == 2).all()
    assert set(c.loc[ring, "species"]) == {0, 1}


def test_pentagon_diagonal_over_edge_is_tau(model):
    # Euclid, Elements XIII: diagonal / side of a regular pentagon = the golden ratio.
    c = model.columns.set_index("id")
    pent = model.motifs[model.motifs["kind"] == "pentagon"].head(20)
    for members in pent["members"]:
        xy = c.loc[[int(i) for i in members.split()], ["x_nm", "y_nm"]].to_numpy()
        d = np.linalg.norm(xy[:, None] - xy[None], axis=2)[np.triu_indices(5, 1)]
        d = np.sort(d)
        np.testing.assert_allclose(d[5:].mean() / d[:5].mean(), TAU, rtol=1e-12)
        np.testing.assert_allclose(d[:5], 2 * 0.45 * math.sin(math.radians(36)), rtol=1e-12)


def test_orientations_global_and_pentagons_opposite(model):
    m = model.motifs
    rings, pents = m[m["kind"] == "ring10"], m[m["kind"] == "pentagon"]
    np.testing.assert_allclose(rings["orientation_deg"], 11.0, atol=1e-9)
    sp1 = pents[pents["species"] == 1]["orientation_deg"]
    sp0 = pents[pents["species"] == 0]["orientation_deg"]
    np.testing.assert_allclose(sp1, 11.0, atol=1e-9)
    np.testing.assert_allclose(sp0, 47.0, atol=1e-9)  # rotated by 36 deg = half the pentagon period


def test_ring_member_along_tiling_edge(model):
    angles = np.mod(model.tiling_edges["angle_deg"].to_numpy() - 11.0, 36.0)
    assert np.all(np.minimum(angles, 36.0 - angles) < 1e-9)
    np.testing.assert_allclose(model.tiling_edges["length_nm"], 2.0, atol=1e-12)


def test_rings_do_not_overlap(model):
    xy = model.columns[["x_nm", "y_nm"]].to_numpy()
    d, _ = cKDTree(xy).query(xy, k=2)
    # Closest pair: neighbours within one ring, 2 r sin 18 deg; rings on a thin-rhombus short diagonal are
    # edge/tau - 2 r = 0.336 nm apart at their nearest members, which is more.
    assert d[:, 1].min() == pytest.approx(2 * 0.45 * math.sin(math.radians(18)), abs=1e-9)


def test_columns_inside_field_with_margin(model):
    c = model.columns
    assert c["x_nm"].min() >= 0.15 - 1e-12 and c["x_nm"].max() <= 24.0 - 0.15 + 1e-12
    assert c["y_nm"].min() >= 0.15 - 1e-12 and c["y_nm"].max() <= 20.0 - 0.15 + 1e-12
    assert len(model.centres) * 11 == len(c)
    # Penrose vertex density with edge 2 nm: one vertex per mean tile area (tau sin72 + sin36)/(1 + tau) * 4 nm^2.
    area = (24.0 - 2 * 0.6) * (20.0 - 2 * 0.6)
    mean_tile = (TAU * math.sin(math.radians(72)) + math.sin(math.radians(36))) / (1 + TAU) * 4.0
    assert len(model.centres) == pytest.approx(area / mean_tile, rel=0.08)


def test_vacancies_recorded():
    m = S.decagonal_model(width_nm=20.0, height_nm=20.0, vacancy_fraction=0.1, rng=3)
    full = S.decagonal_model(width_nm=20.0, height_nm=20.0, vacancy_fraction=0.0, rng=3)
    n_ring = int((full.columns["role"] == "ring").sum())
    assert len(full.columns) - len(m.columns) == round(0.1 * n_ring)
    rings = m.motifs[m.motifs["kind"] == "ring10"]
    per_ring = m.columns[m.columns["role"] == "ring"].groupby("motif_id").size().reindex(rings["motif_id"], fill_value=0)
    np.testing.assert_array_equal(rings["n_members"].to_numpy(), per_ring.to_numpy())
    np.testing.assert_array_equal(rings["complete"].to_numpy(), per_ring.to_numpy() == 10)
    assert (~rings["complete"]).sum() > 0
    # members lists name existing column ids only
    ids = set(m.columns["id"])
    assert all(int(i) in ids for s in m.motifs["members"] for i in s.split())
    np.testing.assert_array_equal(m.columns["id"], np.arange(len(m.columns)))


def test_model_deterministic():
    a = S.decagonal_model(width_nm=15.0, height_nm=12.0, vacancy_fraction=0.05, rng=42)
    b = S.decagonal_model(width_nm=15.0, height_nm=12.0, vacancy_fraction=0.05, rng=42)
    pd.testing.assert_frame_equal(a.columns, b.columns)
    pd.testing.assert_frame_equal(a.motifs, b.motifs)


@pytest.mark.parametrize("kwargs", [
    dict(width_nm=-1.0, height_nm=10.0),
    dict(width_nm=10.0, height_nm=10.0, ring_radius_nm=0.7),
    dict(width_nm=10.0, height_nm=10.0, vacancy_fraction=1.0),
    dict(width_nm=10.0, height_nm=10.0, z_eff=(40, 22, 70)),
    dict(width_nm=0.8, height_nm=0.8),  # no ring of radius 0.45 nm fits
])
def test_model_bad_input(kwargs):
    with pytest.raises(TenfoldInputError):
        S.decagonal_model(**kwargs)


def test_species_counts_follow_z_power():
    # HAADF intensity ~ Z^1.7 (common practice).
    c = S.counts_from_z([22.0, 40.0, 70.0], brightest_counts=1000.0)
    np.testing.assert_allclose(c, 1000.0 * (np.array([22.0, 40.0, 70.0]) / 70.0) ** 1.7)


# ---------------------------------------------------------------------------------------------------- renderer


def _oracle(x, y, n, shape, s):
    """Slow, obvious per-pixel integral of unit Gaussians (normal CDF differences)."""
    img = np.zeros(shape)
    for xi, yi, ni in zip(x, y, n):
        for r in range(shape[0]):
            py = norm.cdf(r + 0.5, yi, s) - norm.cdf(r - 0.5, yi, s)
            for c in range(shape[1]):
                img[r, c] += ni * py * (norm.cdf(c + 0.5, xi, s) - norm.cdf(c - 0.5, xi, s))
    return img


def test_render_matches_slow_oracle():
    x, y, n = np.array([3.2, 9.7, 0.4]), np.array([4.9, 6.1, 11.6]), np.array([100.0, 250.0, 80.0])
    got = S.expected_image(x, y, n, shape=(13, 12), sigma_px=1.3, background=0.0)
    np.testing.assert_allclose(got, _oracle(x, y, n, (13, 12), 1.3), atol=1e-4)


def test_render_conserves_counts():
    rng = np.random.default_rng(0)
    x, y = rng.uniform(15, 185, 300), rng.uniform(15, 145, 300)
    n = rng.uniform(100, 5000, 300)
    img = S.expected_image(x, y, n, shape=(160, 200), sigma_px=2.0, background=7.0)
    assert float((img.astype(np.float64) - 7.0).sum()) == pytest.approx(n.sum(), rel=1e-3)


def test_rendered_centroid_is_input_position():
    # Pixel (row 0, col 0) centre at x = 0, y = 0; x along columns.
    img = S.expected_image([10.3], [17.8], [1e4], shape=(36, 24), sigma_px=1.5, background=0.0).astype(float)
    rows, cols = np.indices(img.shape)
    assert (img * cols).sum() / img.sum() == pytest.approx(10.3, abs=1e-5)
    assert (img * rows).sum() / img.sum() == pytest.approx(17.8, abs=1e-5)


def test_poisson_noise_mean_and_variance():
    # Poisson: mean = variance = lambda. 65536 pixels: SE(mean) = 0.028, SE(var) ~ 0.28 for lambda = 50.
    img = S.render_image([], [], [], shape=(256, 256), sigma_px=1.0, background=50.0, rng=123)
    assert img.mean() == pytest.approx(50.0, abs=0.15)
    assert img.var() == pytest.approx(50.0, abs=1.5)
    assert np.all(img == np.round(img))


def test_noise_deterministic_with_seed():
    a = S.render_image([5.0], [5.0], [300.0], shape=(12, 12), sigma_px=1.0, background=3.0, rng=9)
    b = S.render_image([5.0], [5.0], [300.0], shape=(12, 12), sigma_px=1.0, background=3.0, rng=9)
    np.testing.assert_array_equal(a, b)


def test_shear_moves_positions():
    # Documented fast-scan model: x' = x + shear * y.
    img = S.expected_image([20.0], [40.0], [1e4], shape=(64, 64), sigma_px=1.5, background=0.0, shear=0.05)
    rows, cols = np.indices(img.shape)
    img = img.astype(float)
    assert (img * cols).sum() / img.sum() == pytest.approx(22.0, abs=1e-5)
    assert (img * rows).sum() / img.sum() == pytest.approx(40.0, abs=1e-5)


def test_dark_columns():
    bright = S.expected_image([8.0], [8.0], [1000.0], shape=(17, 17), sigma_px=1.5, background=0.0)
    dark = S.expected_image([8.0], [8.0], [1000.0], shape=(17, 17), sigma_px=1.5, background=200.0,
                            dark_columns=True)
    np.testing.assert_allclose(dark, 200.0 - bright, atol=1e-4)
    assert dark.argmin() == 8 * 17 + 8
    with pytest.raises(TenfoldInputError, match="background"):
        S.render_image([8.0], [8.0], [1000.0], shape=(17, 17), sigma_px=1.5, background=10.0, dark_columns=True)


def test_render_edge_cases():
    x, y, n = np.array([-0.5, 30.0]), np.array([-0.5, 5.0]), np.array([100.0, 100.0])
    x0, y0 = x.copy(), y.copy()
    img = S.expected_image(x, y, n, shape=(10, 10), sigma_px=1.0, background=1.0)  # one on the corner, one outside
    np.testing.assert_array_equal(x, x0)
    np.testing.assert_array_equal(y, y0)
    # A column on the image corner (-0.5, -0.5) keeps a quarter of its counts; the one outside adds nothing.
    assert float(img.sum() - 100.0) == pytest.approx(25.0, rel=1e-3)
    for bad in (dict(shape=(0, 5)), dict(sigma_px=0.0), dict(background=-1.0)):
        kw = dict(shape=(10, 10), sigma_px=1.0, background=1.0) | bad
        with pytest.raises(TenfoldInputError):
            S.expected_image(x, y, n, **kw)
    with pytest.raises(TenfoldInputError):
        S.expected_image([np.nan], [1.0], [1.0], shape=(5, 5), sigma_px=1.0, background=0.0)


# ---------------------------------------------------------------------------------------------------- CRLB


def test_crlb_reduces_to_s2_over_n():
    # No background, vanishing pixels: var = s^2 / N (Mortensen et al., Nature Methods 7 (2010) 377, eq. 5).
    assert S.crlb_position_px(400.0, 1.5, 0.0, pixel=1e-6, estimator="mle") == pytest.approx(1.5 / 20.0, rel=1e-9)
    # Least squares carries the extra 16/9 (Mortensen et al. 2010, eq. 6).
    assert S.crlb_position_px(400.0, 1.5, 0.0, pixel=1e-6, estimator="lsq") == pytest.approx(1.5 / 20.0 * 4 / 3,
                                                                                              rel=1e-9)


def test_crlb_lsq_matches_mortensen_eq6():
    n, s, b, a = 2000.0, 1.5, 10.0, 1.0
    sa2 = s**2 + a**2 / 12
    var = sa2 / n * (16 / 9 + 8 * np.pi * sa2 * b / (n * a**2))  # Mortensen et al. (2010) eq. (6), F = 1
    assert S.crlb_position_px(n, s, b, a, estimator="lsq") == pytest.approx(math.sqrt(var), rel=1e-12)


def test_crlb_mle_integral_matches_quadrature():
    # Mortensen et al. (2010) eq. (5) evaluated by direct numerical integration.
    n, s, b, a = 800.0, 1.5, 20.0, 1.0
    sa2 = s**2 + a**2 / 12
    tau = 2 * np.pi * sa2 * b / (n * a**2)
    integral, _ = integrate.quad(lambda t: np.log(t) / (1 + t / tau), 0, 1)
    expected = math.sqrt(sa2 / n / (1 + integral))
    assert S.crlb_position_px(n, s, b, a, estimator="mle") == pytest.approx(expected, rel=1e-8)
    # MLE never does worse than least squares.
    assert S.crlb_position_px(n, s, b, a, estimator="mle") < S.crlb_position_px(n, s, b, a, estimator="lsq")


def test_crlb_bad_input():
    with pytest.raises(TenfoldInputError):
        S.crlb_position_px(0.0, 1.0, 0.0)
    with pytest.raises(TenfoldInputError):
        S.crlb_position_px(10.0, 1.0, 0.0, estimator="median")


# ---------------------------------------------------------------------------------------------------- samples


def test_make_sample_truth_after_shear(model):
    img, truth = S.make_sample(model, pixel_size_nm=0.05, sigma_nm=0.07, counts_by_species=(200, 500, 1000),
                               background=5.0, rng=1, shape=(400, 500), shear=0.02)
    assert img.shape == (400, 500) and img.dtype == np.float32
    c = truth.columns
    np.testing.assert_allclose(c["x_px"], model.columns["x_nm"] / 0.05 + 0.02 * model.columns["y_nm"] / 0.05)
    np.testing.assert_allclose(c["y_px"], model.columns["y_nm"] / 0.05)
    np.testing.assert_allclose(c["x_nm"], c["x_px"] * 0.05)
    np.testing.assert_array_equal(c["counts"], np.array([200.0, 500.0, 1000.0])[c["species"]])
    assert truth.params["sigma_px"] == pytest.approx(1.4)


def test_make_sample_shear_leaving_image_raises(model):
    with pytest.raises(TenfoldInputError, match="shear"):
        S.make_sample(model, pixel_size_nm=0.05, sigma_nm=0.07, counts_by_species=(1, 2, 3), background=1.0,
                      rng=1, shear=0.2)


def test_write_sample_round_trip(tmp_path):
    import tifffile

    m = S.decagonal_model(width_nm=8.0, height_nm=6.0, rng=2)
    paths = S.write_sample(tmp_path, "demo", m, pixel_size_nm=0.04, sigma_nm=0.06,
                           counts_by_species={0: 100, 1: 300, 2: 800}, background=10.0, rng=4, label="FX-D10 test")
    with tifffile.TiffFile(paths["image"]) as tf:
        img = tf.asarray()
        xres = tf.pages[0].tags["XResolution"].value
        assert tf.imagej_metadata["unit"] == "nm"
    assert img.dtype == np.uint16 and img.shape == (150, 200)
    assert xres[0] / xres[1] == pytest.approx(25.0)  # px per nm
    cols = pd.read_csv(paths["columns"])
    assert list(cols.columns[:9]) == ["id", "x_px", "y_px", "x_nm", "y_nm", "species", "z_eff", "role", "motif_id"]
    assert len(cols) == len(m.columns)
    params = json.loads(paths["truth"].read_text())
    assert params["pixel_size_nm"] == 0.04 and params["noise_seed"] == 4 and params["seed"] == 2
    assert params["generator_version"] == S.GENERATOR_VERSION
    for key in ("motifs", "centres", "tiling_edges", "tiles"):
        assert len(pd.read_csv(paths[key])) > 0
    with pytest.raises(TenfoldInputError, match="exists"):
        S.write_sample(tmp_path, "demo", m, pixel_size_nm=0.04, sigma_nm=0.06, counts_by_species=(1, 2, 3),
                       background=1.0, rng=4)


@pytest.mark.parametrize("name", list(S.BUNDLE))
def test_bundled_sample_matches_its_truth(name):
    import tifffile

    spec = S.BUNDLE[name]
    params = json.loads((SAMPLES / f"{name}_truth.json").read_text())
    img = tifffile.imread(SAMPLES / f"{name}.tif").astype(float)
    assert list(img.shape) == params["shape"]
    model = S.decagonal_model(**spec["model"])
    cols = pd.read_csv(SAMPLES / f"{name}_columns.csv")
    assert len(cols) == len(model.columns)
    shear = params["shear"]
    ps = params["pixel_size_nm"]
    np.testing.assert_allclose(cols["x_px"], (model.columns["x_nm"] + shear * model.columns["y_nm"]) / ps, atol=1e-5)
    # The file is a Poisson draw from the expected image: normalised residuals have mean 0 and variance 1.
    expected = S.expected_image(model.columns["x_nm"] / ps, model.columns["y_nm"] / ps,
                                np.asarray(params["counts_by_species"])[model.columns["species"]],
                                shape=img.shape, sigma_px=params["sigma_px"], background=params["background_per_px"],
                                dark_columns=params["dark_columns"], shear=shear).astype(float)
    z = (img - expected) / np.sqrt(expected)
    assert abs(z.mean()) < 0.01
    assert z.var() == pytest.approx(1.0, abs=0.02)


def test_bundle_readme_lists_every_sample():
    text = (SAMPLES / "README.md").read_text()
    for name in S.BUNDLE:
        assert f"`{name}.tif`" in text


# ---------------------------------------------------------------------------------------------------- crystals


def test_fcc_al_001_columns_square_lattice_a_over_2():
    pytest.importorskip("ase")
    a = 0.40495  # Al, room temperature, nm (from memory of handbook tables: CRC Handbook / Wyckoff)
    df = S.fcc_al_001_columns(a_nm=a, width_nm=3.0, height_nm=2.5)
    xy = df[["x_nm", "y_nm"]].to_numpy()
    d, _ = cKDTree(xy).query(xy, k=5)
    # Projected along [001], fcc columns form a square lattice of side a/2, four nearest neighbours (interior).
    np.testing.assert_allclose(d[:, 1], a / 2, atol=1e-9)
    interior = (xy[:, 0] > 0.3) & (xy[:, 0] < 2.6) & (xy[:, 1] > 0.3) & (xy[:, 1] < 2.1)
    np.testing.assert_allclose(d[interior, 1:5], a / 2, atol=1e-9)
    assert (df["n_atoms"] == 1).all() and (df["z_sum"] == 13).all()


def test_crystal_columns_sums_atoms_along_axis():
    ase_build = pytest.importorskip("ase.build")
    atoms = ase_build.bulk("Al", "fcc", a=4.0495, cubic=True).repeat((2, 2, 3))
    df = S.crystal_columns(atoms, axis="z")
    assert len(df) == 16  # 4 projected columns per cubic cell, 2 x 2 cells
    assert (df["n_atoms"] == 3).all() and (df["z_sum"] == 39).all()


def test_crystal_columns_duck_typed_and_bad_axis():
    class Two:
        def get_positions(self):
            return np.array([[1.0, 2.0, 0.0], [1.0, 2.0, 5.0], [3.0, 0.0, 0.0]])

        def get_atomic_numbers(self):
            return np.array([8, 26, 8])

    df = S.crystal_columns(Two(), axis="z")
    assert df[["n_atoms", "z_sum"]].to_dict("list") == {"n_atoms": [1, 2], "z_sum": [8, 34]}
    np.testing.assert_allclose(df[["x_nm", "y_nm"]].to_numpy(), [[0.3, 0.0], [0.1, 0.2]], atol=1e-15)
    with pytest.raises(TenfoldInputError):
        S.crystal_columns(Two(), axis="w")
    with pytest.raises(TenfoldInputError):
        S.crystal_columns(object())


def test_import_is_light():
    code = ("import sys, tenfold.analysis.synthetic; "
            "bad = [m for m in ('ase', 'matplotlib', 'napari', 'tifffile') if m in sys.modules]; print(bad)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "[]"
