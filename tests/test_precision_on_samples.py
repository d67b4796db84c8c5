"""Position precision on the bundled decagonal samples against the Cramer-Rao bound.

The bound for a pixel-integrated 2-D Gaussian spot with N counts, width s and background b per pixel under Poisson
noise (maximum likelihood: Mortensen, Churchman, Spudich & Flyvbjerg, Nat. Methods 7 (2010) 377, eq. 5; see also
Thompson, Larson & Webb, Biophys. J. 82 (2002) 2775) is computed per species by the generator from the known dose,
width and background and stored in <name>_truth.json. Targets: RMS error <= 1.3 x bound, |mean bias| < 0.2 x bound.
"""

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy.spatial import cKDTree

from tenfold.analysis.columns import find_columns
from tenfold.analysis.io import read_micrograph

SAMPLES = Path(__file__).resolve().parents[1] / "sample_images"


@pytest.mark.parametrize("name", ["decagonal_haadf_high_dose", "decagonal_haadf_low_dose"])
def test_rms_error_within_1p3_crlb_per_species(name):
    mg = read_micrograph(SAMPLES / f"{name}.tif")
    truth = pd.read_csv(SAMPLES / f"{name}_columns.csv")
    bounds = json.loads((SAMPLES / f"{name}_truth.json").read_text())["crlb_position_px_mle_by_species"]
    cols, _ = find_columns(mg.data, valid=mg.valid, pixel_size_nm=mg.meta.pixel_size_nm, n_species=0)
    d, j = cKDTree(truth[["x_px", "y_px"]].to_numpy()).query(cols[["x_px", "y_px"]].to_numpy())
    hit = d < 3.0
    dx = cols["x_px"].to_numpy()[hit] - truth["x_px"].to_numpy()[j[hit]]
    dy = cols["y_px"].to_numpy()[hit] - truth["y_px"].to_numpy()[j[hit]]
    species = truth["species"].to_numpy()[j[hit]]
    for s, bound in enumerate(bounds):
        m = species == s
        rms = np.sqrt(0.5 * (np.mean(dx[m] ** 2) + np.mean(dy[m] ** 2)))
        assert rms <= 1.3 * bound, (s, rms, bound)
        assert abs(dx[m].mean()) < 0.2 * bound and abs(dy[m].mean()) < 0.2 * bound
    # the reported uncertainty is honest: within 15 % of the bound for the brighter species
    err = cols["pos_err_px"].to_numpy()[hit]
    for s in (1, 2):
        assert np.median(err[species == s]) == pytest.approx(bounds[s], rel=0.15)
