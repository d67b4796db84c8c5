"""Scan-distortion correction of the column positions, against the bundled sheared sample's recorded shear.

The generator moves every column to x' = x + s y (s = 0.03, recorded in the truth file); the exact correction is
the inverse affine [[1, -s], [0, 1]] (linear algebra). After it, distances in the cluster tiling are those of the
model: tiling edge 2.000 nm and the centre ladder at tau^n (tau = (1 + sqrt 5) / 2, golden ratio).
"""

import json
from pathlib import Path

import numpy as np
import pytest

from tenfold.analysis.cli import _params, build_parser
from tenfold.analysis.io import read_micrograph
from tenfold.analysis.pipeline import Parameters, run_pipeline

SAMPLES = Path(__file__).resolve().parents[1] / "sample_images"


@pytest.fixture(scope="module")
def corrected():
    mg = read_micrograph(SAMPLES / "decagonal_haadf_sheared.tif")
    return mg, run_pipeline(mg, Parameters(correct_distortion=True))


def test_correction_recorded_and_applied(corrected):
    mg, result = corrected
    s = json.loads((SAMPLES / "decagonal_haadf_sheared_truth.json").read_text())["shear"]
    rec = result.summary["distortion_correction"]
    assert rec["applied"] and rec["significant"] and rec["source"] == "indexing"
    np.testing.assert_allclose(rec["matrix"], [[1.0, -s], [0.0, 1.0]], atol=0.002)  # within 0.2 %
    np.testing.assert_allclose(result.summary["fourier"]["distortion_matrix"], rec["matrix"])
    cols = result.tables["columns"]
    raw = cols[["x_raw_px", "y_raw_px"]].to_numpy()
    c = np.asarray(rec["centre_px"])
    np.testing.assert_allclose(cols[["x_px", "y_px"]].to_numpy(), (raw - c) @ np.asarray(rec["matrix"]).T + c)
    assert cols["x_nm"].to_numpy() == pytest.approx(cols["x_px"].to_numpy() * mg.meta.pixel_size_nm)
    # the truth columns, corrected the same way, are where the corrected columns are
    truth = np.loadtxt(SAMPLES / "decagonal_haadf_sheared_columns.csv", delimiter=",", skiprows=1, usecols=(1, 2))
    from scipy.spatial import cKDTree

    d, _ = cKDTree((truth - c) @ np.array([[1.0, -s], [0.0, 1.0]]).T + c).query(cols[["x_px", "y_px"]].to_numpy())
    assert np.median(d) < 0.1


def test_tiling_and_ladder_after_correction(corrected):
    _, result = corrected
    edge = result.summary["tiling"]["edge_length_px"]["mean"] * result.meta.pixel_size_nm
    assert edge == pytest.approx(2.0, abs=0.004)  # 2.025 nm before the correction
    lad = result.tables["ladder"]
    centres = lad[lad["set"] == "centres"]
    assert len(centres) >= 3
    assert centres["deviation_pct"].abs().max() < 0.1  # 0.4-0.8 % before the correction
    assert not any("not applied" in n for n in result.summary["notes"])


def test_uncorrected_run_says_how_to_correct():
    from tenfold.analysis.fourier import fourier_stage
    from tenfold.analysis._result import AnalysisResult

    mg = read_micrograph(SAMPLES / "decagonal_haadf_sheared.tif")
    result = AnalysisResult(meta=mg.meta, image=mg.data)
    fourier_stage(result, mg)
    assert any("--correct-distortion" in n for n in result.summary["fourier"]["notes"])
    assert result.summary["phason"]["fourier"]["ok"]


def test_cli_flags():
    args = build_parser().parse_args(["analyze", "x.tif", "--out", "o", "--correct-distortion", "--no-phason"])
    p = _params(args)
    assert p.correct_distortion and not p.phason
    p = _params(build_parser().parse_args(["analyze", "x.tif", "--out", "o"]))
    assert not p.correct_distortion and p.phason


def test_correction_summary_keys(corrected):
    from tenfold.analysis._schema import SUMMARY_KEYS

    _, result = corrected
    assert {k for k, _ in SUMMARY_KEYS["distortion_correction"]} <= set(result.summary["distortion_correction"])


def test_columns_csv_keeps_raw_and_corrected_positions(corrected, tmp_path):
    import pandas as pd

    from tenfold.analysis.export import write_results

    _, result = corrected
    write_results(result, tmp_path / "out", figures=False)
    cols = pd.read_csv(tmp_path / "out" / "columns.csv")
    assert {"x_px", "y_px", "x_raw_px", "y_raw_px"} <= set(cols.columns)
    assert np.abs(cols["x_px"] - cols["x_raw_px"]).max() > 5  # 3 % of up to 384 px from the centre
