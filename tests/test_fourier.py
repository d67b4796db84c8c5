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
