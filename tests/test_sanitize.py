"""Bad images and options become errors or notes, never silent wrong answers (issue: flat areas, hot pixels,
memory, non-regular files, pixel sizes, regions, edited columns, one-line messages naming file and option).

Images are the bundled synthetic samples (analysis/synthetic.py) damaged in known ways.
"""

from __future__ import annotations

import logging
import os
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import tifffile

from tenfold.analysis import _guards, _sanitize
from tenfold.analysis._errors import TenfoldInputError, TenfoldWarning
from tenfold.analysis.cli import main
from tenfold.analysis.columns import find_columns
from tenfold.analysis.io import micrograph_from_array, read_micrograph
from tenfold.analysis.pipeline import Parameters, rerun_from_columns, run_pipeline
from tenfold.analysis.region import Region
from tenfold.analysis.scale import MAX_CROP_PX, estimate_scale

SAMPLES = Path(__file__).resolve().parents[1] / "sample_images"
SAMPLE = SAMPLES / "decagonal_haadf_vacancies.tif"


@pytest.fixture(scope="module")
def sample():
    return read_micrograph(SAMPLE)


def _flat(image, value):
    img = image.copy()
    img[img.shape[0] // 8:] = value
    return img


# ---------------------------------------------------------------------------------------------------------------
# flat areas, zeros, outliers


@pytest.mark.parametrize("fill", ["zero", "median"])
def test_flat_area_is_masked_with_its_share(sample, fill):
    img = _flat(sample.data, 0.0 if fill == "zero" else float(np.median(sample.data)))
    with pytest.warns(TenfoldWarning, match=r"8[78]\.\d % of the image is flat"):
        cols, info = find_columns(img, pixel_size_nm=0.04)
    assert (cols["y_px"] < img.shape[0] // 8).all()
    assert len(cols) > 150  # the intact eighth keeps its columns (about 1/8 of the 2806 of the whole image)


def test_flat_mask_leaves_noisy_image_alone(sample):
    ok, notes = _sanitize.mask_flat(sample.data, np.ones(sample.data.shape, bool))
    assert ok.all() and notes == []


def test_flat_everywhere_is_an_error():
    img = np.zeros((64, 64), np.float32)
    img[0, 0] = 1.0
    with pytest.raises(TenfoldInputError, match="flat .exactly constant. almost everywhere"):
        _sanitize.mask_flat(img, np.ones(img.shape, bool))


def test_scattered_zeros_get_a_note():
    rng = np.random.default_rng(0)
    img = rng.poisson(5.0, (64, 64)).astype(np.float32)
    img[rng.random(img.shape) < 0.5] = 0
    ok, notes = _sanitize.mask_flat(img, np.ones(img.shape, bool))
    assert any("are exactly 0" in n for n in notes)


def test_hot_pixels_clipped_before_scale(sample):
    img = sample.data[:256, :256].copy()
    clean = estimate_scale(img)
    rng = np.random.default_rng(3)
    img[rng.integers(0, 256, 20), rng.integers(0, 256, 20)] = 65535.0
    est = estimate_scale(img)
    assert est.details["sanitized"]["outliers_clipped"] == 20
    assert est.spacing_px == pytest.approx(clean.spacing_px, rel=0.05)


def test_one_wild_pixel_clipped_before_scale(sample):
    img = sample.data[:256, :256].astype(np.float64)
    img[100, 100] = 1e38
    est = estimate_scale(img)
    assert est.details["sanitized"]["outliers_clipped"] == 1


def test_scale_window_follows_valid_pixels(sample):
    img = _flat(sample.data, 0.0)
    ok = np.ones(img.shape, bool)
    ok[img.shape[0] // 8:] = False
    est = estimate_scale(img, valid=ok)
    assert est.details["sanitized"]["window"][0] == 0


def test_masked_reach_note_for_sparse_nan(sample):
    img = sample.data.copy()
    rng = np.random.default_rng(1)
    img[rng.random(img.shape) < 0.039] = np.nan
    with pytest.warns(TenfoldWarning, match=r"masked pixels \(3\.9\d* % of the image\) keep columns out of 9\d"):
        find_columns(img, pixel_size_nm=0.04, column_spacing_px=7.0, column_diameter_px=7.0)


# ---------------------------------------------------------------------------------------------------------------
# memory and files


def test_image_larger_than_memory_refused_before_reading(monkeypatch):
    monkeypatch.setattr(_sanitize, "available_memory", lambda: 10 * 2**20)
    decoded = []
    monkeypatch.setattr("tifffile.TiffPageSeries.asarray", lambda *a, **k: decoded.append(1))
    with pytest.raises(TenfoldInputError, match=r"vacancies\.tif: image of 768 x 768 px needs about 2\d\.\d MB.*"
                                                r"only 10\.0 MB is available; crop it .* or bin it"):
        read_micrograph(SAMPLE)
    assert decoded == []


def test_memory_check_passes_sample():
    _sanitize.check_memory((768, 768), label="x", available=2**30)


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="needs POSIX FIFOs")
def test_fifo_refused(tmp_path):
    fifo = tmp_path / "x.tif"
    os.mkfifo(fifo)
    with pytest.raises(TenfoldInputError, match="not a regular file"):
        read_micrograph(fifo)


def test_link_to_device_refused(tmp_path):
    link = tmp_path / "zero.tif"
    link.symlink_to("/dev/zero")
    with pytest.raises(TenfoldInputError, match="not a regular file"):
        read_micrograph(link)


def test_tifffile_log_goes_into_message(tmp_path, capsys):
    path = tmp_path / "bad.tif"
    good = tmp_path / "good.tif"
    tifffile.imwrite(good, np.arange(64 * 64, dtype=np.uint16).reshape(64, 64))
    raw = bytearray(good.read_bytes())
    raw[4:8] = (10**9).to_bytes(4, "little")  # first IFD offset far past the end
    path.write_bytes(bytes(raw))
    with pytest.raises(TenfoldInputError, match=r"bad\.tif: .*corrupt"):
        read_micrograph(path)
    assert capsys.readouterr().err == ""


def test_float64_beyond_float32_rescaled_with_note():
    img = np.random.default_rng(0).random((32, 32)) * 1e300
    with pytest.warns(TenfoldWarning, match=r"exceed the float32 range.*divided by 1e29\d"):
        mg = micrograph_from_array(img)
    assert np.isfinite(mg.data).all() and mg.valid.all()


def test_corrupt_header_empty_image_says_corrupt(monkeypatch):
    from tenfold.analysis import io

    monkeypatch.setitem(io._READERS, "tiff", lambda path, cal: np.zeros((1024, 0), np.uint8))
    with pytest.raises(TenfoldInputError, match=r"header gives an empty image \(1024 x 0 px\); the file is corrupt"):
        read_micrograph(SAMPLE)


# ---------------------------------------------------------------------------------------------------------------
# pixel sizes


@pytest.mark.parametrize("bad", [1e-300, 1e300, 20.0, 5e-5], ids=["tiny", "huge", "20nm", "0.05pm"])
def test_implausible_pixel_size_parameter_rejected(bad):
    with pytest.raises(TenfoldInputError, match=r"parameter pixel_size_nm=.* outside 0\.0001 - 10 nm"):
        Parameters(pixel_size_nm=bad).validate()


def test_implausible_pixel_size_flag_rejected(capsys, tmp_path):
    with pytest.raises(SystemExit):
        main(["analyze", str(SAMPLE), "--out", str(tmp_path / "r"), "--pixel-size", "1e300"])
    assert "--pixel-size" in capsys.readouterr().err


def test_broken_resolution_tag_flagged(tmp_path):
    path = tmp_path / "tag.tif"
    img = np.random.default_rng(0).random((32, 32)).astype(np.float32)
    tifffile.imwrite(path, img, imagej=True, resolution=(4294967295, 4294967295), metadata={"unit": "nm"})
    with pytest.warns(TenfoldWarning, match=r"\(2\.33e-10 nm, from imagej\) is below 0\.0001 nm.*uncalibrated"):
        mg = read_micrograph(path)
    assert mg.meta.pixel_size_nm is None


def test_override_of_file_calibration_noted():
    mg = read_micrograph(SAMPLE, pixel_size_nm=0.05)
    assert any("overrides the file's 0.04 nm (from imagej), +25.0 %" in n for n in mg.meta.notes)


# ---------------------------------------------------------------------------------------------------------------
# regions, empty results, edited columns


def test_region_outside_image_is_an_error(sample):
    reg = Region(label=1, kind="rectangle",
                 vertices_px=np.array([[5000.0, 5000], [5100, 5000], [5100, 5100], [5000, 5100]]))
    with pytest.raises(TenfoldInputError, match=r"decagonal_haadf_vacancies\.tif: region 1 .* lies wholly outside"):
        run_pipeline(sample, Parameters(fourier=False), regions=[reg])


def test_degenerate_region_is_an_error():
    reg = Region(label=2, kind="polygon", vertices_px=np.array([[10.0, 10], [10.5, 10], [10.5, 10.5], [10, 10.5]]))
    with pytest.raises(TenfoldInputError, match="region 2 has no area"):
        _guards.check_regions([reg], (100, 100))


def test_absurd_spacing_explains_empty_result(sample):
    crop = micrograph_from_array(sample.data[:200, :200], pixel_size_nm=0.04, name="crop")
    # beyond the image: a named error before any work (issue 17)
    with pytest.raises(TenfoldInputError, match="column_spacing_px=5000 px is larger than the image"):
        run_pipeline(crop, Parameters(column_spacing_px=5000.0, column_diameter_px=20.0, fourier=False))
    # absurd but inside the image: the empty result explains itself
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", TenfoldWarning)
        res = run_pipeline(crop, Parameters(column_spacing_px=150.0, column_diameter_px=20.0, fourier=False))
    if res.summary["n_columns"] == 0:
        assert any("no columns found with a column spacing of 150 px" in n for n in res.summary["notes"])
    else:
        assert any("no ring motifs found" in n for n in res.summary["notes"])


def test_absurd_ring_radius_explains_no_rings():
    notes = _guards.empty_result_notes(
        {"automatic": {"spacing": {"value_px": 7.0, "how": "auto"}},
         "motifs": {"radius_px": 275.0, "radius_source": "given"}},
        {"columns": pd.DataFrame({"x_px": [1.0]}), "motifs": pd.DataFrame({"kind": pd.Series([], dtype=object)})},
        (768, 768))
    assert notes == ["no ring motifs found with a ring radius of 275 px (39.3 x the column spacing 7 px), given; "
                     "if a ring radius was given, check its value and unit (--ring-radius, nm or px)"]


@pytest.fixture(scope="module")
def small_result(sample):
    crop = micrograph_from_array(sample.data[:160, :160], pixel_size_nm=0.04, name="crop")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", TenfoldWarning)
        return run_pipeline(crop, Parameters(fourier=False))


@pytest.mark.parametrize("x, y", [(np.nan, np.nan), (1e12, 5.0), (-3.0, 5.0)], ids=["nan", "far", "negative"])
def test_rerun_rejects_bad_positions(small_result, x, y):
    cols = small_result.tables["columns"].copy()
    cols.loc[0, ["x_px", "y_px"]] = [x, y]
    with pytest.raises(TenfoldInputError, match=r"1 of \d+ columns have x_px/y_px that are NaN or outside"):
        rerun_from_columns(small_result, cols)


# ---------------------------------------------------------------------------------------------------------------
# command-line options


def test_negative_seed_refused_by_parser(capsys, tmp_path):
    with pytest.raises(SystemExit):
        main(["analyze", str(SAMPLE), "--out", str(tmp_path / "r"), "--seed", "-5"])
    assert "--seed: expected a whole number 0 or larger" in capsys.readouterr().err
    assert not (tmp_path / "r").exists()


def test_messages_use_flag_names(capsys, tmp_path):
    rc = main(["analyze", str(SAMPLE), "--out", str(tmp_path / "r"), "--frame", "3", "--quiet"])
    err = capsys.readouterr().err
    assert rc == 2 and "drop --frame" in err and "frame_range" not in err


def test_info_help_has_texts(capsys):
    with pytest.raises(SystemExit):
        main(["info", "--help"])
    text = capsys.readouterr().out
    for flag in ("--frame K", "--frames A:B", "--dark-columns", "--debug"):
        line = next(ln for ln in text.splitlines() if ln.strip().startswith(flag))
        assert len(line.split(flag, 1)[1].strip()) > 10, line


def test_ring_radius_help_names_shell_scan(capsys):
    with pytest.raises(SystemExit):
        main(["analyze", "--help"])
    assert "ring-shell scan" in capsys.readouterr().out


def test_debug_log_receives_reader_messages(caplog):
    from tenfold.analysis.io import _captured_log

    with caplog.at_level(logging.DEBUG, logger="tenfold"):
        with _captured_log("tifffile"):
            logging.getLogger("tifffile").warning("odd tag 999")
    assert "tifffile: odd tag 999" in caplog.text


def test_scale_window_of_large_mostly_flat_image(sample):
    img = np.tile(sample.data, (2, 2))
    img[img.shape[0] // 8:] = 0.0
    ok = np.ones(img.shape, bool)
    ok[img.shape[0] // 8:] = False
    est = estimate_scale(img, valid=ok)
    assert est.details["sanitized"]["window"][0] == 0 and est.details["sanitized"]["window"][2:] == [MAX_CROP_PX, MAX_CROP_PX]
    assert est.spacing_px == pytest.approx(estimate_scale(sample.data).spacing_px, rel=0.05)


def test_flat_note_names_the_file(sample):
    crop = micrograph_from_array(_flat(sample.data[:256, :256], 0.0), pixel_size_nm=0.04, name="scan_part.tif")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", TenfoldWarning)
        res = run_pipeline(crop, Parameters(fourier=False, column_spacing_px=7.0, column_diameter_px=6.75))
    assert any(n.startswith("scan_part.tif: 8") and "flat" in n for n in res.summary["notes"])


def test_summary_blocks_not_repeated(small_result):
    s = small_result.summary
    assert "automatic" in s and "species" in s
    assert "automatic" not in s["columns"] and "species" not in s["columns"]


def test_mean_psi_n_scope_stated(small_result):
    assert "ring motifs only" in small_result.summary["motifs"]["mean_psi_n_over"]
    assert small_result.summary["regions"][0]["mean_psi_n_over"] == "ring motifs and pentagons"


def test_tiny_image_scale_failure_says_too_small(sample):
    tiny = micrograph_from_array(sample.data[:32, :32], pixel_size_nm=0.04, name="tiny.tif")
    with pytest.raises(TenfoldInputError, match=r"^tiny\.tif: .*no column scale found.*only 32 x 32 px, likely too small"):
        run_pipeline(tiny, Parameters(fourier=False))


def test_info_scale_failure_names_file(tmp_path, capsys):
    path = tmp_path / "noise.tif"
    tifffile.imwrite(path, np.random.default_rng(0).normal(100, 5, (40, 40)).astype(np.float32))
    rc = main(["info", str(path)])
    err = capsys.readouterr().err
    assert rc == 2 and f"{path}: estimate_scale: no column scale found" in err and "40 x 40 px" in err
