"""A slice of the column-finder stress matrix (benchmarks/stress_columns.py runs all of it).

Each cell is a synthetic micrograph from the stress generator with known column positions; the bound is the exact
pixel Fisher (Cramer-Rao) bound of every column with its neighbours' parameters as nuisance parameters
(``synthetic.crlb_columns_px``; for isolated Gaussian spots it equals Mortensen et al., Nat. Methods 7 (2010) 377,
eq. 5). The targets are those of the column issue: recall and precision >= 0.995 where the dimmest species has a
peak SNR of at least 5 and the closest spacing is at least 3.3 sigma; RMS error / bound <= 1.3 per cell; radial bias
of crowded ring columns under 0.2 bound; actual / reported position error within 0.85-1.2 per species; species
agreement >= 0.99 with the right number of classes where the classes are more than 4 spreads apart.
"""

import numpy as np
import pandas as pd
import pytest

from tenfold.analysis import synthetic as S
from tenfold.analysis.columns import find_columns

#: seeds as in benchmarks/stress_columns.py would differ; any seed must do, these are fixed for repeatability
CELLS = ["dec_broad", "dec_base", "fivefold_base", "dec_x1000"]


def _run(name):
    cond = S.STRESS_CELLS[name]
    img, truth, params = S.stress_sample(cond, rng=7)
    probe = S.stress_probe(cond.probe, tail_fraction=cond.tail_fraction)
    bound = S.crlb_columns_px(truth["x_px"], truth["y_px"], truth["counts"], shape=img.shape,
                              sigma_px=params["sigma_px"], background=S.stress_background(cond, params),
                              probe=probe, dark_columns=cond.dark)
    truth = pd.concat([truth, bound], axis=1)
    found, info = find_columns(img, pixel_size_nm=params["pixel_size_nm"], dark_columns=cond.dark)
    return S.score_columns(found, truth, match_radius_px=0.5 * params["closest_spacing_px"]), info, params


@pytest.fixture(scope="module", params=CELLS, ids=CELLS)
def cell(request):
    return request.param, *_run(request.param)


def test_recall_and_precision(cell):
    name, score, info, params = cell
    assert params["snr_dim"] >= 5 and params["spacing_over_sigma"] >= 3.3
    assert score["recall"] >= 0.995 and score["precision"] >= 0.995, (score["recall"], score["precision"])


def test_rms_error_near_the_bound(cell):
    name, score, info, params = cell
    assert score["rms_bound_worst"] <= 1.3, score["rms_over_bound"]


def test_no_radial_bias(cell):
    name, score, info, params = cell
    assert abs(score["radial_bias_worst"]) < 0.2, score["radial_bias"]


def test_reported_error_is_honest(cell):
    name, score, info, params = cell
    assert 0.85 <= score["act_rep_min"] and score["act_rep_max"] <= 1.2, score["actual_over_reported"]


def test_species(cell):
    name, score, info, params = cell
    assert score["n_species_found"] == score["n_species_true"]
    assert score["species_agreement"] >= 0.99


def test_scaled_integer_image_is_not_taken_for_counts():
    """An image of counts x 1000 stored as int32 is scaled counts (variance 1000 x level), not raw counts."""
    score, info, params = _run("dec_x1000")
    assert info["automatic"]["noise_model"]["model"] == "scaled counts"
    assert info["automatic"]["noise_model"]["gain"] == pytest.approx(1000.0, rel=0.25)
