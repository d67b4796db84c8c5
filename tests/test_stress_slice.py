"""Tests of the stress-matrix generator, the crowded-column Cramer-Rao bound and the scoring (issue 10).

Known answers from outside the project: Mortensen et al. (2010) eq. (5) for an isolated Gaussian spot; the
textbook Fisher information of Poisson data, I = J^T diag(1/mu) J (Kay 1993, ch. 3), as a dense oracle; Euclid's
regular pentagon and decagon (diagonal / side = tau; decagon circumradius / side = tau); the square, hexagonal
and perovskite lattices' neighbour shells; Poisson statistics. No finder targets are asserted here.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy.spatial import cKDTree

from tenfold.analysis import synthetic as S
from tenfold.analysis._errors import TenfoldInputError

TAU = (1 + math.sqrt(5)) / 2  # golden ratio


# ------------------------------------------------------------------------------------------------------ the bound


@pytest.mark.parametrize("sigma, counts, background", [(1.3, 500.0, 0.0), (1.5, 1000.0, 10.0), (3.0, 2000.0, 50.0),
                                                       (4.0, 300.0, 5.0)], ids=["b0", "s1.5", "s3", "s4"])
def test_isolated_bound_agrees_with_mortensen(sigma, counts, background):
    # Mortensen et al., Nature Methods 7 (2010) 377, eq. (5): the MLE bound of a pixelated Gaussian on a background.
    b = S.crlb_columns_px([40.3], [39.8], [counts], shape=(81, 81), sigma_px=sigma, background=background)
    expect = S.crlb_position_px(counts, sigma, background, estimator="mle")
    assert b.crlb_px[0] == pytest.approx(expect, rel=1e-3)
    assert b.crlb_x_px[0] == pytest.approx(expect, rel=2e-3)
    assert b.crlb_y_px[0] == pytest.approx(expect, rel=2e-3)


def test_far_apart_columns_each_get_the_isolated_bound():
    x, y = np.array([20.0, 60.0]), np.array([20.0, 20.0])
    b = S.crlb_columns_px(x, y, [800.0, 200.0], shape=(41, 81), sigma_px=2.0, background=4.0)
    expect = S.crlb_position_px(np.array([800.0, 200.0]), 2.0, 4.0, estimator="mle")
    np.testing.assert_allclose(b.crlb_px, expect, rtol=1e-3)
    assert list(b.n_group) == [1, 1]


def _dense_oracle(x, y, n, shape, sigma, background, *, probe=((1.0, 1.0),), dark=False):
    """Full Fisher matrix J^T diag(1/mu) J of all columns' (x, y, N) and one background, by central differences."""
    sign = -1.0 if dark else 1.0

    def sig(xx, yy, nn):
        return S.column_signal(xx, yy, nn, shape=shape, sigma_px=sigma, probe=probe)

    mu = background + sign * sig(x, y, n)
    rows = []
    for i in range(len(x)):
        for which, h in ((0, 1e-4), (1, 1e-4), (2, 1.0)):
            p, m = [x.copy(), y.copy(), n.copy()], [x.copy(), y.copy(), n.copy()]
            p[which][i] += h
            m[which][i] -= h
            rows.append(sign * (sig(*p) - sig(*m)).ravel() / (2 * h))
    rows.append(np.ones(mu.size))
    jac = np.array(rows)
    cov = np.linalg.inv((jac / mu.ravel()) @ jac.T)
    d = cov.diagonal()
    return np.sqrt(0.5 * (d[0:-1:3] + d[1:-1:3]))


# Four touching columns whose patches reach past every image edge, so the group's background box is the image.
_X, _Y = np.array([8.2, 12.9, 10.1, 15.0]), np.array([8.6, 9.6, 12.9, 11.5])
_N = np.array([800.0, 300.0, 500.0, 300.0])


@pytest.mark.parametrize("dark", [False, True], ids=["bright", "dark"])
def test_crowded_bound_matches_dense_fisher_oracle(dark):
    bg = 900.0 if dark else 5.0
    got = S.crlb_columns_px(_X, _Y, _N, shape=(20, 22), sigma_px=1.5, background=bg, dark_columns=dark)
    np.testing.assert_allclose(got.crlb_px, _dense_oracle(_X, _Y, _N, (20, 22), 1.5, bg, dark=dark), rtol=2e-3)
    assert (got.crlb_px > got.crlb_isolated_px).all()  # neighbours' unknown parameters cost precision


def test_core_tail_bound_matches_dense_oracle_inside_the_patch():
    # tail components of 3 and 8 core sigmas: derivatives are kept inside the core patch only (documented), so the
    # bound may sit slightly above the oracle's, never below it
    probe = S.stress_probe("core_tail", tail_fraction=0.3)
    got = S.crlb_columns_px(_X, _Y, _N, shape=(20, 22), sigma_px=1.5, background=5.0, probe=probe).crlb_px
    ref = _dense_oracle(_X, _Y, _N, (20, 22), 1.5, 5.0, probe=probe)
    assert np.all(got >= ref * (1 - 1e-3))
    np.testing.assert_allclose(got, ref, rtol=0.05)


def test_bound_grows_as_neighbours_close_in():
    out = []
    for sep in (8.0, 4.0, 2.5):
        b = S.crlb_columns_px([20.0, 20.0 + sep], [20.0, 20.0], [1000.0, 1000.0], shape=(41, 48), sigma_px=1.5,
                              background=5.0)
        out.append(b.crlb_px[0])
    assert out[0] < out[1] < out[2]
    # 5.3 sigma apart the two spots share almost no light: within 0.5 % of the isolated bound
    assert out[0] == pytest.approx(S.crlb_position_px(1000.0, 1.5, 5.0), rel=5e-3)


def test_bound_empty_and_bad_input():
    assert len(S.crlb_columns_px([], [], [], shape=(10, 10), sigma_px=1.0, background=1.0)) == 0
    with pytest.raises(TenfoldInputError, match="counts"):
        S.crlb_columns_px([5.0], [5.0], [0.0], shape=(10, 10), sigma_px=1.0, background=1.0)


# -------------------------------------------------------------------------------------------------- the renderer


def test_stress_render_equals_plain_renderer_with_shear():
    # Gaussian probe, flat background: the stress renderer must reproduce render_image at the truth positions
    cond = S.StressCondition(structure="decagonal", size_px=256, shear=0.03, px_per_sigma=2.0)
    expected, truth, params = S.stress_sample(cond, rng=3, noise=False)
    plain = S.expected_image(truth.x_px, truth.y_px, truth.counts, shape=expected.shape,
                             sigma_px=params["sigma_px"], background=params["background_mean"])
    np.testing.assert_allclose(expected, plain, rtol=1e-5, atol=1e-3)


def test_total_counts_and_peak_height():
    sig = S.column_signal([50.3, 70.8], [49.6, 66.1], [1000.0, 3000.0], shape=(120, 120), sigma_px=4.0)
    assert sig.sum() == pytest.approx(4000.0, rel=1e-4)  # patches end at 4.5 sigma: 2e-5 of the light is cut
    probe = S.stress_probe("core_tail", tail_fraction=0.3)
    tail = S.column_signal([150.0], [150.0], [1000.0], shape=(301, 301), sigma_px=2.0, probe=probe)
    assert tail.sum() == pytest.approx(1000.0, rel=1e-3)  # 8-sigma tail = 16 px; 150 px from the edges
    # continuous peak 1000 * sum w / (2 pi s^2); the pixel integral at the centre is lower by ~1/(12 s^2) per axis
    assert tail[150, 150] == pytest.approx(1000.0 * S.peak_per_count(probe, 2.0), rel=0.03)


def test_broad_component_fft_path_matches_exact_patch():
    # 7 px > the 6 px switch: bilinear deposit + FFT; compare with the exact pixel-integrated renderer
    x, y, n = np.array([40.3, 71.7]), np.array([50.2, 44.9]), np.array([5000.0, 2000.0])
    fft = S.column_signal(x, y, n, shape=(100, 110), sigma_px=7.0)
    exact = S.expected_image(x, y, n, shape=(100, 110), sigma_px=7.0, background=0.0)
    assert np.abs(fft - exact).max() < 0.01 * exact.max()


def test_row_jitter_moves_each_row():
    shift = np.linspace(-0.5, 0.5, 41)
    img = S.column_signal([20.0], [20.0], [1e5], shape=(41, 41), sigma_px=2.0, row_shift_px=shift)
    rows = slice(14, 27)  # within 3 sigma of the column, where the row holds enough light
    centroid = (img[rows] * np.arange(41)).sum(axis=1) / img[rows].sum(axis=1)
    np.testing.assert_allclose(centroid, 20.0 - shift[rows], atol=1e-6)


def test_poisson_noise_and_integer_rescalings():
    cond = S.StressCondition(structure="square", size_px=128, peak_counts=200.0)
    exp, _, _ = S.stress_sample(cond, rng=5, noise=False)
    img, _, _ = S.stress_sample(cond, rng=5)
    resid = (img - exp) / np.sqrt(exp)
    assert abs(resid.mean()) < 0.02 and resid.std() == pytest.approx(1.0, abs=0.02)  # Poisson: var = mean
    big, _, p1000 = S.stress_sample(S.StressCondition(**{**cond.__dict__, "rescale": "x1000"}), rng=5)
    assert big.dtype == np.int32 and p1000["value_scale"] == 1000.0
    np.testing.assert_array_equal(big, img.astype(np.int64) * 1000)
    small, _, p8 = S.stress_sample(S.StressCondition(**{**cond.__dict__, "rescale": "uint8"}), rng=5)
    assert small.dtype == np.uint8 and small.min() == 0 and small.max() == 255
    np.testing.assert_allclose(small, np.round((img - img.min()) * p8["value_scale"]), atol=0.5)


def test_gradient_dark_and_snr():
    cond = S.StressCondition(structure="fivefold", size_px=256, gradient=3.0, dark=True, spacing_nm=0.2957)
    exp, truth, p = S.stress_sample(cond, rng=1, noise=False)
    bg = S.stress_background(cond, p)
    assert bg.max() / bg.min() == pytest.approx(3.0, rel=1e-9)
    assert bg.mean() == pytest.approx(p["bright_level"], rel=1e-9)
    assert exp.min() >= p["background_mean"] - 1e-9  # the deepest dip sits the background above zero
    a_dim = p["peaks_by_species"][0]
    assert p["snr_dim"] == pytest.approx(a_dim / math.sqrt(p["bright_level"] + a_dim))


# ---------------------------------------------------------------------------------------------------- geometry


def _nn(xy, k=2):
    return cKDTree(xy).query(xy, k=k)[0][:, 1:]


def test_decagon_radius_over_spacing_is_tau_and_pentagons():
    df = S.stress_structure("decagonal", width_nm=12, height_nm=12, spacing_nm=0.3, rng=2)
    ring = df[df.role == "ring"]
    r = np.hypot(ring.x_nm - ring.centre_x_nm, ring.y_nm - ring.centre_y_nm)
    np.testing.assert_allclose(r, TAU * 0.3, rtol=1e-9)  # Euclid: decagon circumradius / side = tau
    assert _nn(df[["x_nm", "y_nm"]].to_numpy()).min() == pytest.approx(0.3, rel=1e-9)
    one = ring[ring.cluster_id == ring.cluster_id.iloc[0]]
    sp1 = one[one.species == 1][["x_nm", "y_nm"]].to_numpy()
    d = np.sort(np.unique(np.round(np.linalg.norm(sp1[:, None] - sp1[None], axis=-1), 9)))[1:]
    assert d[1] / d[0] == pytest.approx(TAU, rel=1e-9)  # pentagon diagonal / side (Euclid XIII)
    assert (ring.groupby("cluster_id").size() == 10).all()


def test_shared_rings_share_an_edge():
    df = S.stress_structure("shared_rings", width_nm=10, height_nm=10, spacing_nm=0.3, rng=0)
    xy = df[["x_nm", "y_nm"]].to_numpy()
    assert _nn(xy).min() == pytest.approx(0.3, rel=1e-6)
    shared = df[df.role == "shared"]
    assert len(shared) > 0 and len(shared) % 2 == 0
    # every cluster centre sees its own ring of ten at the ring radius, shared columns included
    centres = df[df.role == "centre"][["x_nm", "y_nm"]].to_numpy()
    counts = cKDTree(xy).query_ball_point(centres, TAU * 0.3 + 1e-6, return_length=True) - 1
    inner = (centres > 1.5).all(1) & (centres < 8.5).all(1)
    assert (counts[inner] == 10).all()
    # a shared column lies at the ring radius from the mean of its two centres' ... and from each centre:
    d = cKDTree(centres).query(shared[["x_nm", "y_nm"]].to_numpy(), k=2)[0]
    np.testing.assert_allclose(d, TAU * 0.3, rtol=1e-6)


def test_fivefold_radii_and_turn():
    df = S.stress_structure("fivefold", width_nm=12, height_nm=12, spacing_nm=0.2957, angle_deg=0.0, rng=4)
    r = np.hypot(df.x_nm - df.centre_x_nm, df.y_nm - df.centre_y_nm)
    k = S._fivefold_spacing() / 0.2957
    np.testing.assert_allclose(r[df.species == 1], 0.48 / k, rtol=1e-9)
    np.testing.assert_allclose(r[df.species == 0], 0.30 / k, rtol=1e-9)
    ang = np.degrees(np.arctan2(df.y_nm - df.centre_y_nm, df.x_nm - df.centre_x_nm))
    np.testing.assert_allclose(np.mod(ang[df.species == 1] + 1e-6, 72.0), 1e-6, atol=1e-6)
    np.testing.assert_allclose(np.mod(ang[df.species == 0], 72.0), 36.0, atol=1e-6)
    assert _nn(df[["x_nm", "y_nm"]].to_numpy()).min() == pytest.approx(0.2957, rel=1e-3)


@pytest.mark.parametrize("kind, shell", [("square", 4), ("hexagonal", 6)])
def test_lattice_neighbour_shells(kind, shell):
    df = S.stress_structure(kind, width_nm=6, height_nm=6, spacing_nm=0.25, angle_deg=13.0)
    xy = df[["x_nm", "y_nm"]].to_numpy()
    tree = cKDTree(xy)
    inner = np.all((xy > 1) & (xy < 5), axis=1)
    n = tree.query_ball_point(xy[inner], 0.25 * 1.01, return_length=True) - 1
    assert (n == shell).all()
    assert _nn(xy).min() == pytest.approx(0.25, rel=1e-9)


def test_perovskite_cell():
    df = S.stress_structure("perovskite", width_nm=6, height_nm=6, spacing_nm=0.28, angle_deg=0.0)
    a = df[df.species == 1][["x_nm", "y_nm"]].to_numpy()
    b = df[df.species == 0][["x_nm", "y_nm"]].to_numpy()
    assert _nn(a).min() == pytest.approx(0.28 * math.sqrt(2), rel=1e-9)  # A-A: the cell side
    assert cKDTree(a).query(b)[0].max() == pytest.approx(0.28, rel=1e-9)  # B at the body centre


def test_hardcore_keeps_its_distance():
    df = S.stress_structure("hardcore", width_nm=8, height_nm=8, spacing_nm=0.3, rng=11)
    xy = df[["x_nm", "y_nm"]].to_numpy()
    assert _nn(xy).min() >= 0.3
    # random sequential packing reaches ~0.55 area fraction of discs of diameter d (Feder 1980, J. Theor. Biol.
    # 87, 237: jamming limit 0.547); eight Matern rounds get most of the way
    frac = len(xy) * math.pi * 0.15**2 / 64.0
    assert 0.35 < frac < 0.55
    assert set(df.species) == {0, 1, 2}


def test_truth_pixels_and_cells():
    img, truth, p = S.stress_sample(S.STRESS_CELLS["shared_base"], rng=0)
    assert img.shape == (512, 512) and img.dtype == np.float32
    assert p["closest_spacing_px"] == pytest.approx(p["sigma_px"] / S.STRESS_CELLS["shared_base"].sigma_over_spacing,
                                                    rel=1e-6)
    assert truth.x_px.between(0, 511).all() and truth.y_px.between(0, 511).all()
    np.testing.assert_allclose(truth.amplitude, np.array(p["peaks_by_species"])[truth.species])
    assert S.stress_draw(5, rng=1).keys() == S.stress_draw(5, rng=1).keys()
    for c in S.stress_draw(20, rng=2).values():
        assert 0.15 <= c.sigma_over_spacing <= 0.30 and 1.3 <= c.px_per_sigma <= 4 and 30 <= c.peak_counts <= 5000


def test_bad_conditions():
    with pytest.raises(TenfoldInputError, match="structure"):
        S.stress_sample(S.StressCondition(structure="quasi"))
    with pytest.raises(TenfoldInputError, match="rescale"):
        S.stress_sample(S.StressCondition(rescale="uint16"))
    with pytest.raises(TenfoldInputError, match="probe"):
        S.stress_probe("airy")


# ----------------------------------------------------------------------------------------------------- scoring


def _toy_truth():
    # one ring of ten around a centre plus two lone columns; bound 0.1 px everywhere
    ang = np.radians(36 * np.arange(10))
    x = np.r_[50.0, 50 + 10 * np.cos(ang), 10.0, 90.0]
    y = np.r_[50.0, 50 + 10 * np.sin(ang), 10.0, 90.0]
    return pd.DataFrame({
        "x_px": x, "y_px": y, "species": np.r_[2, np.arange(10) % 2, 0, 1],
        "role": ["centre"] + ["ring"] * 10 + ["site", "site"], "centre_x_px": np.r_[[50.0] * 11, np.nan, np.nan],
        "centre_y_px": np.r_[[50.0] * 11, np.nan, np.nan], "crlb_px": 0.1, "crowded": [True] * 11 + [False] * 2,
    })


def test_score_recall_precision_and_radial_bias():
    t = _toy_truth()
    f = t[["x_px", "y_px"]].copy()
    ring = t.role == "ring"
    # pull ring columns 0.1 px toward the centre: radial bias +1 bound, RMS / bound 1 on the ring
    f.loc[ring, "x_px"] += 0.1 * (50 - t.x_px[ring]) / 10
    f.loc[ring, "y_px"] += 0.1 * (50 - t.y_px[ring]) / 10
    f = f.drop(index=12)  # a miss
    f.loc[99] = [30.0, 70.0]  # a false detection
    f["pos_err_px"] = 0.05
    f["species"] = np.r_[t.species[:12].map({0: 2, 1: 0, 2: 1}), 0]  # relabelled: agreement stays perfect
    s = S.score_columns(f, t, match_radius_px=3.0)
    assert (s["n_true"], s["n_found"], s["n_matched"]) == (13, 13, 12)
    assert s["recall"] == pytest.approx(12 / 13) and s["precision"] == pytest.approx(12 / 13)
    assert s["radial_bias"] == {0: pytest.approx(1.0), 1: pytest.approx(1.0)}
    # per-axis RMS of a 0.1 px radial shift is 0.1 / sqrt(2)
    assert s["rms_over_bound"][1] == pytest.approx(1 / math.sqrt(2))  # species 1: ring columns only
    assert s["actual_over_reported"][1] == pytest.approx(math.sqrt(2))
    assert s["species_agreement"] == pytest.approx(1.0)
    assert s["n_species_found"] == 3


def test_species_agreement_counts_unpaired_classes_as_wrong():
    assert S.species_agreement([0, 0, 1, 1], [1, 1, 0, 0]) == 1.0
    assert S.species_agreement([0, 0, 0, 0], [0, 0, 1, 1]) == 0.5
    assert S.species_agreement([0, 1, 2, 3], [0, 0, 1, 1]) == 0.5


def test_match_is_mutual_nearest():
    fi, ti = S.match_columns([[0.0, 0.0], [0.3, 0.0]], [[0.2, 0.0]], radius_px=1.0)
    assert list(fi) == [1] and list(ti) == [0]
