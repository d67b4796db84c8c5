"""Fourier stage against facts of diffraction geometry.

* A lattice with plane spacing d gives its first spots at |k| = 1/d, and the spot pattern has the lattice's
  rotational symmetry: four-fold for a square lattice, six-fold for a hexagonal one (Kittel, Introduction to Solid
  State Physics, 8th ed., ch. 2). A decagonal quasicrystal seen down its ten-fold axis gives ten-fold spot stars
  (Shechtman et al., Phys. Rev. Lett. 53 (1984) 1951 for the icosahedral case; ten-fold patterns of decagonal
  phases: Bendersky, Phys. Rev. Lett. 55 (1985) 1461).
* An affine scan distortion r' = D r turns circles of spots into ellipses whose axis ratio is the ratio of the
  singular values of D (linear algebra: k' = D^-T k).
"""

import numpy as np
import pytest

from tenfold.analysis import TenfoldInputError
from tenfold.analysis.fourier import analyze_fourier, find_spots, power_spectrum

N = 384


def _wave_image(directions_deg, d_px, *, shear=0.0, seed=0, dose=60.0):
    """Poisson image of exp(sum of plane waves): spots at |k| = 1/d_px in the given directions (and harmonics)."""
    y, x = np.mgrid[:N, :N].astype(float)
    xs = x + shear * y
    field = sum(np.cos(2 * np.pi * (np.cos(t) * xs + np.sin(t) * y) / d_px) for t in np.radians(directions_deg))
    lam = np.exp(field)
    return np.random.default_rng(seed).poisson(dose * lam / lam.mean()).astype(np.float32)


def test_power_spectrum_peak_at_known_frequency():
    y, x = np.mgrid[:64, :64]
    s, dk = power_spectrum(np.cos(2 * np.pi * x / 8.0))
    assert dk == pytest.approx(1 / 64)
    row = s[32]
    assert abs(int(np.argmax(row)) - 32) == 8  # 64 / 8 cycles


@pytest.mark.parametrize(
    "directions, order",
    [([0, 90], 4), ([0, 60, 120], 6), ([0, 36, 72, 108, 144], 10)],
    ids=["square", "hexagonal", "decagonal"],
)
def test_rotational_order_and_first_shell(directions, order):
    d = 10.3
    spots, info = analyze_fourier(_wave_image(directions, d))
    assert info["rotational_order"] == order
    shells = [sh for sh in info["shells"] if sh["order"] == order]
    # the fundamental shell |k| = 1/d is found to better than 0.5 %
    assert min(abs(sh["d_px"] - d) / d for sh in shells) < 0.005
    assert not info["distortion"]["warning"]
    assert info["distortion"]["axis_ratio"] == pytest.approx(1.0, abs=0.003)


def test_scan_shear_is_measured_and_flagged():
    s = 0.03
    spots, info = analyze_fourier(_wave_image([0, 36, 72, 108, 144], 10.3, shear=s))
    sv = np.linalg.svd(np.array([[1.0, s], [0.0, 1.0]]), compute_uv=False)
    expected = sv[0] / sv[1]
    assert info["distortion"]["axis_ratio"] == pytest.approx(expected, abs=0.004)
    assert info["distortion"]["warning"]
    assert any("elliptical" in n for n in info["notes"])


def test_calibrated_spacing_in_nm():
    spots = find_spots(_wave_image([0, 90], 12.0), pixel_size_nm=0.02)
    first = spots.loc[spots["d_px"].sub(12.0).abs().idxmin()]
    assert first["d_nm"] == pytest.approx(0.24, rel=0.005)
    assert first["k_per_nm"] == pytest.approx(1 / 0.24, rel=0.005)


def test_uncalibrated_nm_columns_are_nan():
    spots = find_spots(_wave_image([0, 90], 12.0))
    assert len(spots) > 0
    assert spots["d_nm"].isna().all() and spots["k_per_nm"].isna().all()


def test_featureless_noise_reports_no_order():
    img = np.random.default_rng(3).poisson(50.0, size=(N, N)).astype(np.float32)
    spots, info = analyze_fourier(img)
    assert info["rotational_order"] == 0
    assert info["distortion"] is None


def test_masked_pixels_and_input_untouched():
    img = _wave_image([0, 90], 10.3)
    keep = img.copy()
    valid = np.ones_like(img, dtype=bool)
    valid[:40, :40] = False
    spots, info = analyze_fourier(img, valid=valid)
    assert info["rotational_order"] == 4
    np.testing.assert_array_equal(img, keep)


def test_bad_input():
    with pytest.raises(TenfoldInputError, match="2-D"):
        power_spectrum(np.zeros((4, 4, 4)))
    with pytest.raises(TenfoldInputError, match="too small"):
        power_spectrum(np.zeros((8, 8)))
    with pytest.raises(TenfoldInputError, match="masked"):
        power_spectrum(np.ones((32, 32)), valid=np.zeros((32, 32), bool))


def test_bundled_sheared_sample_against_its_recorded_shear():
    import json
    from pathlib import Path

    from tenfold.analysis.io import read_micrograph

    here = Path(__file__).resolve().parents[1] / "sample_images"
    shear = json.loads((here / "decagonal_haadf_sheared_truth.json").read_text())["shear"]
    sv = np.linalg.svd(np.array([[1.0, shear], [0.0, 1.0]]), compute_uv=False)
    mg = read_micrograph(here / "decagonal_haadf_sheared.tif")
    _, info = analyze_fourier(mg.data, valid=mg.valid, pixel_size_nm=mg.meta.pixel_size_nm)
    assert info["rotational_order"] == 10
    assert info["distortion"]["axis_ratio"] == pytest.approx(sv[0] / sv[1], abs=0.003)
    assert info["distortion"]["warning"]
    mg = read_micrograph(here / "decagonal_haadf_vacancies.tif")
    _, info = analyze_fourier(mg.data, valid=mg.valid)
    assert info["rotational_order"] == 10 and not info["distortion"]["warning"]


# ---------------------------------------------------------------------------------------------------------------
# Indexing, scan distortion, periodic lattices, wavelength
# ---------------------------------------------------------------------------------------------------------------

from tenfold.analysis.fourier import (  # noqa: E402
    _rq_upper,
    _upper_from_metric,
    bragg_angle_mrad,
    electron_wavelength_nm,
    index_decagonal,
)

SAMPLES = __import__("pathlib").Path(__file__).resolve().parents[1] / "sample_images"


@pytest.fixture(scope="module")
def high_dose():
    from tenfold.analysis.io import read_micrograph

    mg = read_micrograph(SAMPLES / "decagonal_haadf_high_dose.tif")
    return mg, analyze_fourier(mg.data, valid=mg.valid, pixel_size_nm=mg.meta.pixel_size_nm, edge_px=50.0)


@pytest.mark.parametrize("kv, pm", [(80, 4.18), (200, 2.51), (300, 1.97)], ids=["80kV", "200kV", "300kV"])
def test_electron_wavelength_against_handbook(kv, pm):
    # Williams & Carter, Transmission Electron Microscopy (2009), Table 1.1 (relativistic), from memory (0.01 pm)
    assert electron_wavelength_nm(kv) * 1000 == pytest.approx(pm, abs=0.006)


def test_bragg_angle_and_bad_voltage():
    # theta = asin(lambda / 2d): 2.5079 pm / 0.4 nm at 200 kV
    assert bragg_angle_mrad(0.2, 200) == pytest.approx(np.arcsin(electron_wavelength_nm(200) / 0.4) * 1e3)
    assert bragg_angle_mrad(0.2, 200) == pytest.approx(6.27, abs=0.01)
    with pytest.raises(TenfoldInputError, match="voltage_kv"):
        electron_wavelength_nm(-5)
    with pytest.raises(TenfoldInputError, match="d_nm"):
        bragg_angle_mrad(0.0, 200)


def test_rq_split_against_product():
    rng = np.random.default_rng(0)
    for _ in range(5):
        h = rng.normal(size=(2, 2)) + 2 * np.eye(2)
        u, q = _rq_upper(h)
        assert u[1, 0] == pytest.approx(0.0, abs=1e-12)
        np.testing.assert_allclose(u @ q, h, atol=1e-12)
        np.testing.assert_allclose(q @ q.T, np.eye(2), atol=1e-12)


def test_correction_from_shell_ellipse_inverts_a_known_shear():
    # r' = D r with D = [[1, s], [0, 1]] makes the shell metric M ~ D D^T (k' = D^-T k; linear algebra)
    s = 0.03
    d = np.array([[1.0, s], [0.0, 1.0]])
    np.testing.assert_allclose(_upper_from_metric(d @ d.T), np.linalg.inv(d), atol=1e-12)


def test_decagonal_indexing_of_the_bundled_sample(high_dose):
    mg, (spots, info) = high_dose
    idx = info["indexing"]
    assert idx["ok"] and idx["tau_scale"] == "real_space"
    # the model's tiling edge is 2 nm: reciprocal basis a* = 1 / (5/2 L) = 0.2 1/nm (lift of the 5-D cubic
    # lattice, de Bruijn 1981); orientation 7 deg from the generator
    assert idx["basis_nm_inv"] == pytest.approx(0.2, rel=1e-3)
    assert info["basis_nm_inv"] == idx["basis_nm_inv"]
    assert idx["orientation_deg"] == pytest.approx(7.0, abs=0.05)
    assert idx["n_indexed"] >= 60
    assert idx["rms_index_error"] < 1e-3
    ind = spots[spots["indexed"]]
    # integer indices reproduce the spot positions: k = a* R(theta) sum h_j e_j
    from tenfold.analysis._pentagrid import E_PAR

    h = ind[["h1", "h2", "h3", "h4"]].to_numpy()
    t = np.radians(idx["orientation_deg"])
    rot = np.array([[np.cos(t), -np.sin(t)], [np.sin(t), np.cos(t)]])
    pred = idx["basis_per_px"] * (h @ E_PAR[1:]) @ rot.T
    k = ind[["kx_per_px", "ky_per_px"]].to_numpy()
    assert np.max(np.hypot(*(k - pred).T) / np.hypot(*k.T)) < 0.005
    # strong spots sit near the origin of perpendicular space
    strongest = ind.nlargest(10, "strength")
    assert strongest["g_perp_rel"].max() < 1.0
    np.testing.assert_allclose(info["distortion_matrix"], np.eye(2), atol=1e-3)
    assert info["dominant_order"] == 10 and info["distortion_source"] == "indexing"


def test_intensity_convention_without_real_space_edge(high_dose):
    mg, (spots, _) = high_dose
    out, idx = index_decagonal(spots, n_image=1024, pixel_size_nm=mg.meta.pixel_size_nm)
    assert idx["ok"] and idx["tau_scale"] == "intensity"
    assert any("tau^2" in n for n in idx["notes"])
    # whatever tau^n is chosen, the basis is a tau power of the physical one (0.2 1/nm) possibly times 2 cos 18
    tau = (1 + 5**0.5) / 2
    r = np.log(idx["basis_nm_inv"] / 0.2) / np.log(tau)
    r2 = np.log(idx["basis_nm_inv"] / (0.2 * 2 * np.cos(np.pi / 10))) / np.log(tau)
    assert min(abs(r - round(r)), abs(r2 - round(r2))) < 0.01


def test_sheared_sample_distortion_recovered():
    from tenfold.analysis.io import read_micrograph

    import json

    shear = json.loads((SAMPLES / "decagonal_haadf_sheared_truth.json").read_text())["shear"]
    mg = read_micrograph(SAMPLES / "decagonal_haadf_sheared.tif")
    _, info = analyze_fourier(mg.data, valid=mg.valid, pixel_size_nm=mg.meta.pixel_size_nm, edge_px=50.0)
    # the generator moves x' = x + shear y: the correction is its inverse (unit determinant already)
    truth = np.linalg.inv(np.array([[1.0, shear], [0.0, 1.0]]))
    np.testing.assert_allclose(info["distortion_matrix"], truth, atol=0.002)
    assert info["indexing"]["shear"] == pytest.approx(shear, abs=0.001)
    se = np.asarray(info["indexing"]["distortion_matrix_se"])
    assert np.all(se[[0, 0, 1], [0, 1, 1]] < 0.002)


def test_hexagonal_pattern_gives_a_lattice_not_a_decagonal_index():
    d = 10.3
    spots, info = analyze_fourier(_wave_image([0, 60, 120], d))
    assert info["dominant_order"] == 6
    assert info["indexing"] is None
    lat = info["lattice"]
    assert lat["ok"]
    # plane spacing d of a hexagonal lattice: a = 2 d / sqrt(3), 60 or 120 deg between the vectors (Kittel ch. 2)
    np.testing.assert_allclose(lat["lengths_px"], 2 * d / np.sqrt(3), rtol=0.01)
    assert min(abs(lat["angle_deg"] - 60), abs(lat["angle_deg"] - 120)) < 1.0
    assert lat["fraction_indexed"] > 0.8  # the rest: weak noise maxima that pass the strength cut
    assert any("decagonal indexing does not apply" in n for n in info["notes"])
    assert not spots["indexed"].any()


def test_too_few_spots_is_not_indexed():
    spots = find_spots(_wave_image([0, 90], 12.0))
    out, idx = index_decagonal(spots.iloc[:4], n_image=N)
    assert not idx["ok"] and not out["indexed"].any() and "at least 8" in idx["notes"][0]


# ---------------------------------------------------------------------------------------------------------------
# Kinematic diffraction of columns (non-uniform FFT) against a direct sum, and against the image spectrum
# ---------------------------------------------------------------------------------------------------------------


def test_column_diffraction_matches_a_direct_sum():
    from tenfold.analysis.fourier import column_diffraction

    rng = np.random.default_rng(2)
    x, y, w = rng.uniform(0, 32, 40), rng.uniform(0, 32, 40), rng.uniform(0.5, 2, 40)
    inten, dk = column_diffraction(x, y, w, n_image=32, n_grid=16, eps=1e-10)
    m = np.arange(-8, 8)
    kx, ky = np.meshgrid(m * dk, m * dk)  # rows ky, columns kx
    direct = np.abs(np.exp(-2j * np.pi * (kx[..., None] * x + ky[..., None] * y)) @ w) ** 2
    np.testing.assert_allclose(inten, direct, rtol=1e-7, atol=1e-7 * direct.max())


def test_column_diffraction_peaks_where_the_image_spots_are(high_dose):
    import pandas as pd

    from tenfold.analysis.fourier import column_diffraction

    mg, (spots, _) = high_dose
    truth = pd.read_csv(SAMPLES / "decagonal_haadf_high_dose_columns.csv")
    inten, dk = column_diffraction(truth["x_px"], truth["y_px"], truth["counts"], n_image=1024)
    c = 512
    for _, s in spots.nlargest(10, "strength").iterrows():
        px, py = int(round(s["kx_per_px"] / dk)) + c, int(round(s["ky_per_px"] / dk)) + c
        win = inten[py - 2 : py + 3, px - 2 : px + 3]
        iy, ix = np.unravel_index(np.argmax(win), win.shape)
        assert abs(iy - 2) <= 1 and abs(ix - 2) <= 1  # the same spot within one frequency bin
        assert win.max() > 20 * np.median(inten)


def test_column_diffraction_bad_input():
    from tenfold.analysis.fourier import column_diffraction

    with pytest.raises(TenfoldInputError, match="one length"):
        column_diffraction([0.0, 1.0], [0.0], n_image=16)
    with pytest.raises(TenfoldInputError, match="weights"):
        column_diffraction([0.0, 1.0], [0.0, 1.0], [1.0], n_image=16)


def test_periodic_smooth_spectrum_has_no_edge_cross_and_finds_the_frequency():
    # an image whose left and right edges differ (a ramp) has a strong cross in the unwindowed spectrum; the
    # periodic component of Moisan's decomposition (J. Math. Imaging Vis. 39 (2011) 161) has none
    y, x = np.mgrid[:128, :128].astype(float)
    img = np.cos(2 * np.pi * x / 8.0) + x / 16.0
    s, _ = power_spectrum(img, window="periodic_smooth")
    c = 64
    assert abs(int(np.argmax(s[c])) - c) == 16  # 128 / 8 cycles
    assert np.median(s[c + 5 : c + 30, c]) < 0.05 * s[c, c + 16]
    spots = find_spots(img, window="periodic_smooth")
    assert spots["d_px"].iloc[0] == pytest.approx(8.0, rel=1e-3)
    with pytest.raises(TenfoldInputError, match="window"):
        power_spectrum(img, window="blackman")


# ---------------------------------------------------------------------------------------------------------------
# Notes must be true: the ellipse against its own error, and one ellipse for every shell
# ---------------------------------------------------------------------------------------------------------------


def _shells(ellipses, n_dir=10, seed=0, noise=0.0):
    """Spots on several shells, shell s drawn through the 2x2 map A_s (k' = A_s k; Friedel pairs included)."""
    rng = np.random.default_rng(seed)
    kx, ky, shell = [], [], []
    for s, (radius, a) in enumerate(ellipses):
        t = np.radians(7.0 + 36.0 * np.arange(n_dir))
        k = radius * np.stack([np.cos(t), np.sin(t)]) + noise * rng.normal(size=(2, n_dir))
        k = np.asarray(a) @ k
        kx.append(k[0] / radius)
        ky.append(k[1] / radius)
        shell.append(np.full(n_dir, s))
    kx, ky, shell = (np.concatenate(v) for v in (kx, ky, shell))
    return kx, ky, np.ones_like(kx), shell


def test_one_distortion_is_one_ellipse_on_every_shell():
    """An affine scan distortion D maps every circle of spots to the same ellipse (k' = D^-T k, linear algebra);
    shells deformed independently (a periodic approximant's) are not one ellipse."""
    from tenfold.analysis.fourier import _ellipticity, _shell_consistency

    d_inv_t = np.linalg.inv(np.array([[1.0, 0.02], [0.0, 1.0]])).T
    same = _shells([(0.05, d_inv_t), (0.081, d_inv_t), (0.13, d_inv_t)], noise=2e-5)
    assert _shell_consistency(*same)["consistent"]
    ell = _ellipticity(*same[:3])
    # ellipticity of k' = D^-T k: ratio of the singular values of D minus one
    sv = np.linalg.svd(np.array([[1.0, 0.02], [0.0, 1.0]]), compute_uv=False)
    assert ell["ellipticity"] == pytest.approx(sv[0] / sv[1] - 1.0, rel=0.05) and ell["significant"]
    differ = _shells([(0.05, np.diag([1.02, 0.98])), (0.081, np.diag([0.98, 1.02])), (0.13, np.eye(2))],
                     noise=2e-5)
    assert not _shell_consistency(*differ)["consistent"]
    # circles with centroiding noise only: not significant
    honest = _shells([(0.05, np.eye(2)), (0.081, np.eye(2))], noise=2e-4, seed=3)
    assert not _ellipticity(*honest[:3])["significant"]


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_honest_images_get_no_distortion_note(seed):
    spots, info = analyze_fourier(_wave_image([0, 36, 72, 108, 144], 10.3, seed=seed))
    assert not info["distortion"]["warning"] and info["distortion"]["ellipticity_chi2"] < 13.8
    assert not any("elliptical" in n for n in info["notes"])


def test_multislice_approximant_gets_no_distortion_note():
    """The cached multislice cell (a periodic approximant of our design, no scan distortion): its shells deviate
    from circles shell by shell, which is said, and no scan distortion is suspected."""
    from pathlib import Path

    from tenfold.analysis import synthetic as S

    cell = S.load_multislice_cell(Path(__file__).resolve().parents[1] / "benchmarks/data/multislice_decagonal.npz")
    img, _, _ = S.multislice_sample(cell, size_px=768, pixel_size_nm=0.015, dose_e_per_A2=1e6,
                                    origin_nm=(0.0137, 0.0291), rng=2)
    _, info = analyze_fourier(img, pixel_size_nm=0.015)
    assert info["rotational_order"] == 10
    assert not info["distortion"]["warning"] and not info["distortion"]["shells"]["consistent"]
    assert not any("shells are elliptical" in n for n in info["notes"])
    assert any("differently from shell to shell" in n for n in info["notes"])
