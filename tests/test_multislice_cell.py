"""The cached multislice cell (benchmarks/data/multislice_decagonal.npz) against facts outside the project.

* Its columns are the projection of the ASE structure it was simulated from (ASE, the reference library for atomic
  structures; ``synthetic.crystal_columns`` projects it).
* The cell is centred rectangular with a mirror x -> -x through the cluster centres (its design in
  benchmarks/simulate_multislice.py); an incoherent HAADF image has the projected structure's symmetry
  (Pennycook & Boatner, Nature 336 (1988) 565), so the static image is invariant under both, and the reflections
  with h + k odd of the centred cell are extinct (International Tables for Crystallography A, plane group cm).
* Its Fourier coefficients vanish beyond twice the probe aperture, 2 alpha / lambda (incoherent transfer of a
  probe of semi-angle alpha), with lambda the relativistic electron wavelength (CODATA constants).
"""

import math
import sys
from pathlib import Path

import numpy as np
import pytest

from tenfold.analysis import synthetic as S

ROOT = Path(__file__).resolve().parents[1]
DATA = ROOT / "benchmarks" / "data" / "multislice_decagonal.npz"


@pytest.fixture(scope="module")
def cell():
    return S.load_multislice_cell(DATA)


def test_columns_match_the_ase_structure(cell):
    pytest.importorskip("ase")
    sys.path.insert(0, str(ROOT / "benchmarks"))
    try:
        import simulate_multislice as sim
    finally:
        sys.path.remove(str(ROOT / "benchmarks"))
    atoms = sim.build_structure(cell.params["repeats"])
    cols = S.crystal_columns(atoms, axis="z", decimals=3)
    assert len(cols) == len(cell.columns) == 34
    # every projected ASE column has one cached column at the same place (periodic distance), and vice versa
    a, b = cell.cell_nm
    d = np.stack([cols["x_nm"].to_numpy()[:, None] - cell.columns["x_nm"].to_numpy()[None, :],
                  cols["y_nm"].to_numpy()[:, None] - cell.columns["y_nm"].to_numpy()[None, :]], axis=-1)
    d -= np.array([a, b]) * np.round(d / np.array([a, b]))
    dist = np.hypot(d[..., 0], d[..., 1])
    assert np.all(dist.min(axis=1) < 1e-6) and np.all(dist.min(axis=0) < 1e-6)
    # species from the atoms: Al-Al = 26, Al-Co = 40, Co-Co = 54 per repeat (Z: Al 13, Co 27)
    z_per_repeat = cols["z_sum"].to_numpy() / cell.params["repeats"]
    sp = cell.columns["species"].to_numpy()[dist.argmin(axis=1)]
    assert np.all(np.array([26, 40, 54])[sp] == z_per_repeat)


def test_static_image_has_the_cell_symmetry_and_band_limit(cell):
    a, b = cell.cell_nm
    y, x = np.mgrid[0:40, 0:40] * 0.05 + 0.013
    img = S.multislice_values(cell, x.ravel(), y.ravel(), run="static")
    mirror = S.multislice_values(cell, -x.ravel(), y.ravel(), run="static")
    centred = S.multislice_values(cell, x.ravel() + a / 2, y.ravel() + b / 2, run="static")
    scale = img.max()
    assert np.max(np.abs(mirror - img)) < 1e-4 * scale
    assert np.max(np.abs(centred - img)) < 1e-4 * scale
    c = cell.coef["static"]
    h = np.arange(c.shape[0]) - c.shape[0] // 2
    odd = (h[:, None] + h[None, :]) % 2 == 1
    assert np.abs(c[odd]).max() < 1e-5 * np.abs(c).max()
    # band limit 2 alpha / lambda; lambda(200 kV) = 2.5079 pm (relativistic, CODATA; Kirkland 2010 table 2.2: 2.508)
    p = cell.params
    lam_nm = 6.62607015e-34 / math.sqrt(2 * 9.1093837015e-31 * 1.602176634e-19 * 200e3
                                        * (1 + 1.602176634e-19 * 200e3 / (2 * 9.1093837015e-31 * 299792458.0**2))) * 1e9
    assert lam_nm == pytest.approx(0.0025079, rel=1e-4)
    g = np.hypot(h[:, None] / b, h[None, :] / a)
    assert np.all(c[g > 2 * p["alpha_mrad"] * 1e-3 / lam_nm + 1e-9] == 0)
    # the centre column (Co-Co, heaviest) is the brightest maximum and sits on its atoms (mirror-symmetric site)
    off = S.multislice_peak_offsets(cell, run="static")
    centre = cell.columns["role"].to_numpy() == "centre"
    assert np.all(np.hypot(off["dx_nm"], off["dy_nm"])[centre] < 1e-4)
    assert off["peak"][centre].min() > off["peak"][~centre].max()


def test_sample_dose_and_tiling(cell):
    img, truth, params = S.multislice_sample(cell, size_px=200, pixel_size_nm=0.02, dose_e_per_A2=1e6,
                                             run="static", origin_nm=(0.01, 0.03), noise=False)
    # a field of 4 nm holds 2 x 2 cells of 34 columns (give or take the border)
    assert 120 <= len(truth) <= 150
    # expected counts = dose x (pixel area in A^2) x the simulated fraction
    frac = S.multislice_image(cell, shape=(200, 200), pixel_size_nm=0.02, run="static", origin_nm=(0.01, 0.03))
    np.testing.assert_allclose(img, np.maximum(1e6 * 0.2**2 * frac, 1e-6), rtol=1e-12)
    # the tiled image is periodic with the cell: 2.0 nm = 100 px
    np.testing.assert_allclose(img[:, :100], img[:, 100:], rtol=1e-9, atol=1e-9)
