"""The `tenfold` command end to end on bundled samples (ground truth from the synthetic generator)."""

import json
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy.spatial import cKDTree

from tenfold.analysis.cli import main

SAMPLES = Path(__file__).resolve().parents[1] / "sample_images"
SAMPLE = SAMPLES / "decagonal_haadf_vacancies.tif"


@pytest.fixture(scope="module")
def analysed(tmp_path_factory):
    out = tmp_path_factory.mktemp("cli") / "res"
    rc = main(["analyze", str(SAMPLE), "--out", str(out), "--quiet"])
    assert rc == 0
    return out


def test_help_uses_trade_words(capsys):
    with pytest.raises(SystemExit) as e:
        main(["analyze", "--help"])
    assert e.value.code == 0
    text = capsys.readouterr().out
    for word in ("atomic columns", "HAADF", "ring", "pentagon", "ladder", "--pixel-size", "--dark-columns",
                 "--region", "--column-diameter", "--species", "--overwrite"):
        assert word in text


def test_console_script_entry_point():
    exe = shutil.which("tenfold")
    assert exe, "the tenfold console script is not installed"
    r = subprocess.run([exe, "--version"], capture_output=True, text=True, timeout=60)
    assert r.returncode == 0 and r.stdout.startswith("tenfold ")


def test_results_folder_contract(analysed):
    for name in ("columns.csv", "motifs.csv", "ladder.csv", "pair_peaks.csv", "tiles.csv", "network.csv",
                 "spots.csv", "summary.json", "results.xlsx"):
        assert (analysed / name).is_file(), name
    s = json.loads((analysed / "summary.json").read_text())
    for key in ("pixel_size_nm", "calibration_source", "n_columns", "automatic", "input", "version", "motifs",
                "ladder", "tiling", "fourier"):
        assert key in s, key
    assert s["pixel_size_nm"] == pytest.approx(0.04)
    assert s["input"]["sha256"] and len(s["input"]["sha256"]) == 64
    cols = pd.read_csv(analysed / "columns.csv")
    assert s["n_columns"] == len(cols)
    # columns match the ground truth (recall/precision; the tight targets are in test_columns.py)
    truth = pd.read_csv(SAMPLES / "decagonal_haadf_vacancies_columns.csv")
    d, _ = cKDTree(truth[["x_px", "y_px"]].to_numpy()).query(cols[["x_px", "y_px"]].to_numpy())
    assert (d < 2.0).mean() > 0.98
    assert len(cols) == pytest.approx(len(truth), rel=0.02)
    np.testing.assert_allclose(cols["x_nm"], cols["x_px"] * 0.04)


def test_refuses_non_empty_folder(analysed, capsys):
    before = sorted(p.name for p in analysed.iterdir())
    rc = main(["analyze", str(SAMPLE), "--out", str(analysed), "--quiet"])
    err = capsys.readouterr().err.strip()
    assert rc == 2
    assert "not empty" in err and "--overwrite" in err and len(err.splitlines()) == 1
    assert sorted(p.name for p in analysed.iterdir()) == before


def test_missing_file_one_line_error_and_no_folder(tmp_path, capsys):
    out = tmp_path / "never"
    rc = main(["analyze", str(tmp_path / "nope.tif"), "--out", str(out)])
    err = capsys.readouterr().err.strip()
    assert rc == 2 and "nope.tif" in err and "Traceback" not in err
    assert not out.exists()


def test_uncalibrated_png_says_so(tmp_path, capsys):
    import imageio.v3 as iio
    import tifffile

    img = tifffile.imread(SAMPLE)[:384, :384]
    png = tmp_path / "crop.png"
    iio.imwrite(png, (255 * (img / img.max())).astype(np.uint8))
    out = tmp_path / "res"
    rc = main(["analyze", str(png), "--out", str(out), "--quiet", "--no-figures"])
    assert rc == 0
    s = json.loads((out / "summary.json").read_text())
    assert s["pixel_size_nm"] is None and s["calibrated"] is False
    assert any("uncalibrated" in n for n in s["notes"])
    cols = pd.read_csv(out / "columns.csv")
    assert len(cols) > 100 and cols["x_nm"].isna().all() and cols["x_px"].notna().all()
    assert "UNCALIBRATED" in capsys.readouterr().out


def test_region_limits_columns(tmp_path):
    out = tmp_path / "res"
    rc = main(["analyze", str(SAMPLE), "--out", str(out), "--quiet", "--no-figures", "--no-fourier",
               "--region", "2,2,14,14"])
    assert rc == 0
    cols = pd.read_csv(out / "columns.csv")
    assert cols["x_nm"].between(2, 14).all() and cols["y_nm"].between(2, 14).all()
    assert set(cols["region"]) == {1}
    truth = pd.read_csv(SAMPLES / "decagonal_haadf_vacancies_columns.csv")
    inside = truth["x_nm"].between(2, 14) & truth["y_nm"].between(2, 14)
    assert len(cols) == pytest.approx(int(inside.sum()), rel=0.03)


def test_nm_override_on_uncalibrated_image_is_refused(tmp_path, capsys):
    import imageio.v3 as iio
    import tifffile

    png = tmp_path / "crop.png"
    iio.imwrite(png, (tifffile.imread(SAMPLE)[:256, :256] // 64).astype(np.uint8))
    rc = main(["analyze", str(png), "--out", str(tmp_path / "r"), "--ring-radius", "0.45", "--quiet"])
    assert rc == 2
    assert "uncalibrated" in capsys.readouterr().err
    assert not (tmp_path / "r").exists()


def test_info_reports_calibration(capsys):
    assert main(["info", str(SAMPLE)]) == 0
    info = json.loads(capsys.readouterr().out)
    assert info["pixel_size_nm"] == pytest.approx(0.04) and info["calibration_source"] == "imagej"
    assert info["automatic_scale"]["column_spacing_nm"] > 0


def test_pixel_lengths_work_on_uncalibrated_images(tmp_path):
    import imageio.v3 as iio
    import tifffile

    img = tifffile.imread(SAMPLE)[:384, :384]
    png = tmp_path / "crop.png"
    iio.imwrite(png, (255 * (img / img.max())).astype(np.uint8))
    out = tmp_path / "res"
    # ring radius of the bundled model: 0.45 nm at 0.04 nm/px = 11.25 px (sample_images/README.md)
    rc = main(["analyze", str(png), "--out", str(out), "--quiet", "--no-figures", "--ring-radius", "11.25px",
               "--column-diameter", "6.75px"])
    assert rc == 0
    s = json.loads((out / "summary.json").read_text())
    assert s["parameters"]["ring_radius_px"] == 11.25 and s["parameters"]["ring_radius_nm"] is None
    assert s["motifs"]["radius_px"] == pytest.approx(11.25, rel=0.02)
    assert s["automatic"]["sigma"]["value_px"] == pytest.approx(1.5)
