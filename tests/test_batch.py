"""`tenfold batch`: one folder per image, the comparison table, failures recorded, resume."""

import json
import math
import shutil
from pathlib import Path

import pandas as pd
import pytest

from tenfold.analysis import TenfoldInputError, save_parameters
from tenfold.analysis.batch import COMPARISON_FIELDS, expand_inputs, run_batch
from tenfold.analysis.cli import main
from tenfold.analysis.pipeline import Parameters

SAMPLES = Path(__file__).resolve().parents[1] / "sample_images"


@pytest.fixture(scope="module")
def batch(tmp_path_factory):
    src = tmp_path_factory.mktemp("in")
    shutil.copy(SAMPLES / "decagonal_haadf_high_dose.tif", src / "a_high.tif")
    shutil.copy(SAMPLES / "decagonal_haadf_vacancies.tif", src / "b_vac.tif")
    (src / "c_broken.tif").write_bytes(b"II*\x00 this is not a TIFF")
    out = tmp_path_factory.mktemp("batch") / "res"
    rc = main(["batch", str(src), "--out", str(out), "--no-figures", "--workers", "1", "--quiet"])
    return src, out, rc


def test_folders_and_comparison(batch):
    src, out, rc = batch
    assert rc == 1  # one image failed
    for stem in ("a_high", "b_vac"):
        assert (out / stem / "summary.json").is_file() and (out / stem / "parameters.toml").is_file()
    assert not (out / "c_broken").exists()
    table = pd.read_csv(out / "comparison.csv", keep_default_na=False)
    assert list(table.columns[:4]) == ["image", "status", "region", "folder"]
    assert set(COMPARISON_FIELDS) <= set(table.columns)
    assert {"species_0_fraction", "species_1_fraction", "species_2_fraction"} <= set(table.columns)
    assert len(table) == 3
    status = dict(zip(table["folder"], table["status"]))
    assert status["a_high"] == "ok" and status["b_vac"] == "ok"
    assert "c_broken.tif" in status["c_broken"] and "\n" not in status["c_broken"]
    assert "Traceback" in json.loads((out / "batch_errors.json").read_text())[str(src / "c_broken.tif")]
    assert (out / "comparison.xlsx").is_file() and (out / "figures" / "comparison.png").is_file()


def test_comparison_values_match_the_summaries(batch):
    _, out, _ = batch
    table = pd.read_csv(out / "comparison.csv")
    row = table[table["folder"] == "a_high"].iloc[0]
    s = json.loads((out / "a_high" / "summary.json").read_text())
    assert row["n_columns"] == s["n_columns"]
    area = 1024 * 1024 * 0.04**2  # 1024^2 px at 0.04 nm/px (the sample's calibration)
    assert row["area_nm2"] == pytest.approx(area)
    assert row["column_density_per_nm2"] == pytest.approx(s["n_columns"] / area)
    tiles = s["tiling"]["tile_counts"]
    ratio = tiles["thick_rhombus"] / tiles["thin_rhombus"]
    assert row["thick_thin_ratio"] == pytest.approx(ratio)
    # first-order error propagation of two Poisson counts (common practice)
    assert row["thick_thin_ratio_se"] == pytest.approx(
        ratio * math.sqrt(1 / tiles["thick_rhombus"] + 1 / tiles["thin_rhombus"]))
    assert row["ladder_d0_nm"] == pytest.approx(s["ladder"]["columns"]["d0_nm"])
    assert row["fourier_order"] == 10  # the decagonal model
    fr = [row[f"species_{k}_fraction"] for k in range(3)]
    assert sum(fr) == pytest.approx(1.0)


def test_rerun_skips_finished_and_retries_failed(batch):
    src, out, _ = batch
    before = (out / "a_high" / "summary.json").stat().st_mtime_ns
    seen = []
    table = run_batch(src, out, progress=lambda d, t, m: seen.append((d, t, m)), figures=False)
    assert seen[0][:2] == (2, 3) and "2 finished before" in seen[0][2]
    assert (out / "a_high" / "summary.json").stat().st_mtime_ns == before
    assert (table["status"] == "ok").sum() == 2
    assert pd.isna(table.loc[table["folder"] == "a_high", "seconds"]).all()  # resumed: no time


def test_other_parameters_refused_unless_rerun(batch, tmp_path):
    src, out, _ = batch
    with pytest.raises(TenfoldInputError, match="--rerun"):
        run_batch(src / "a_high.tif", out, Parameters(ring_order=12))
    f = save_parameters(Parameters(ring_order=12), tmp_path / "p.toml")
    assert main(["batch", str(src / "a_high.tif"), "--out", str(out), "--params", str(f), "--quiet"]) == 2


def test_expand_inputs(tmp_path):
    (tmp_path / "x.tif").write_bytes(b"")
    (tmp_path / "y.mrc").write_bytes(b"")
    (tmp_path / "notes.txt").write_text("")
    assert [p.name for p in expand_inputs(tmp_path)] == ["x.tif", "y.mrc"]
    assert [p.name for p in expand_inputs([str(tmp_path / "*.tif"), tmp_path / "x.tif"])] == ["x.tif"]
    with pytest.raises(TenfoldInputError, match="no such file"):
        expand_inputs(tmp_path / "missing.tif")
    with pytest.raises(TenfoldInputError, match="matches no image"):
        expand_inputs(str(tmp_path / "*.dm4"))
