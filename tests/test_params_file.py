"""The parameters file: round trip, strict checks naming the key, and a byte-identical re-run from it."""

import dataclasses
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from tenfold.analysis import TenfoldInputError, load_parameters, save_parameters
from tenfold.analysis._params_file import parameters_from_toml, parameters_to_toml
from tenfold.analysis.cli import main
from tenfold.analysis.pipeline import Parameters

SAMPLE = Path(__file__).resolve().parents[1] / "sample_images" / "decagonal_haadf_vacancies.tif"


def test_round_trip_every_field(tmp_path):
    p = Parameters(pixel_size_nm=0.0412, column_spacing_px=7.25, n_species=2, ring_order=12, radius_tolerance=0.1,
                   pentagons=False, half_step=True, d0_nm=1e-05, rng=7)
    path = save_parameters(p, tmp_path / "p.toml")
    assert load_parameters(path) == p
    assert load_parameters(tmp_path / "p.toml") == p
    # default parameters: every automatic value spelled "auto"
    text = parameters_to_toml(Parameters())
    assert 'pixel_size_nm = "auto"' in text and "ring_order = 10" in text
    assert parameters_from_toml(text) == Parameters()
    assert {f.name for f in dataclasses.fields(Parameters)} <= {ln.split(" = ")[0] for ln in text.splitlines()}


def test_results_folder_accepted(tmp_path):
    save_parameters(Parameters(ring_order=5), tmp_path / "parameters.toml")
    assert load_parameters(tmp_path).ring_order == 5


def test_partial_file_keeps_defaults():
    p = parameters_from_toml("fourier = false\n")
    assert p == dataclasses.replace(Parameters(), fourier=False)


@pytest.mark.parametrize(
    "text, match",
    [
        ("ring_radius = 3.0\nbogus_key = 1\n", "bogus_key"),
        ("ring_order = 10.0\n", "ring_order.*whole number"),
        ("pentagons = 1\n", "pentagons.*bool"),
        ('pixel_size_nm = "0.04"\n', "pixel_size_nm.*number or 'auto'"),
        ('ring_order = "auto"\n', "ring_order.*cannot be 'auto'"),
        ("ring_order = 7\n", "ring_order"),
        ("radius_tolerance = 0.9\n", "radius_tolerance"),
        ("pixel_size_nm = -0.1\n", "pixel_size_nm"),
        ("column_spacing_px = inf\n", "column_spacing_px.*finite"),
        ("n_species = 9\n", "n_species"),
        ("rng = -1\n", "rng"),
        ("column_spacing_px = 7.0\ncolumn_spacing_nm = 0.3\n", "column_spacing"),
        ("[columns]\nring_order = 10\n", "columns"),
        ("ring_order = \n", "not valid TOML"),
        ("tenfold_parameters = 99\n", "tenfold_parameters"),
    ],
    ids=["unknown", "int-as-float", "bool-as-int", "string-number", "auto-not-allowed", "ring-order-range",
         "tolerance-range", "negative", "inf", "species-range", "seed", "two-units", "nested", "syntax", "version"],
)
def test_bad_files_rejected_naming_the_key(text, match):
    with pytest.raises(TenfoldInputError, match=match):
        parameters_from_toml(text, source="x.toml")


def test_parsing_executes_nothing(tmp_path):
    # a file that would run code if evaluated as Python is just a string value to TOML: rejected as a wrong type
    with pytest.raises(TenfoldInputError, match="pixel_size_nm"):
        parameters_from_toml('pixel_size_nm = "__import__(\'os\').system(\'false\')"\n')


def test_save_never_overwrites_silently(tmp_path):
    path = tmp_path / "p.toml"
    path.write_text("keep me")
    with pytest.raises(TenfoldInputError, match="exists"):
        save_parameters(Parameters(), path)
    assert path.read_text() == "keep me"
    save_parameters(Parameters(), path, overwrite=True)
    assert load_parameters(path) == Parameters()


def test_missing_file(tmp_path):
    with pytest.raises(TenfoldInputError, match="no such parameters file"):
        load_parameters(tmp_path / "nope.toml")


def test_rerun_from_parameters_file_gives_identical_tables(tmp_path):
    first, second = tmp_path / "a", tmp_path / "b"
    assert main(["analyze", str(SAMPLE), "--out", str(first), "--quiet", "--no-figures", "--ring-order", "10",
                 "--radius-tolerance", "0.1", "--seed", "3"]) == 0
    saved = load_parameters(first / "parameters.toml")
    assert saved.radius_tolerance == 0.1 and saved.rng == 3
    assert main(["analyze", str(SAMPLE), "--out", str(second), "--quiet", "--no-figures",
                 "--params", str(first / "parameters.toml")]) == 0
    csvs = sorted(p.relative_to(first) for p in first.rglob("*.csv"))
    assert len(csvs) >= 7
    for rel in csvs:
        # the same tables; floats to 1e-9 relative (numpy's SIMD sums depend on where an array sits in memory, so
        # a second run in the same process can differ in the last bit of a few values)
        a, b = pd.read_csv(first / rel), pd.read_csv(second / rel)
        assert a.columns.tolist() == b.columns.tolist() and a.shape == b.shape, rel
        for c in a.columns:
            if pd.api.types.is_float_dtype(a[c]):
                # the pair-distribution peaks are least-squares fits whose height and width trade off: a last-bit
                # difference in their input moves them by up to a few 1e-6 (seen: 7.637999 vs 7.638030)
                rtol = 1e-5 if str(rel).startswith("pair_peaks") else 1e-9
                np.testing.assert_allclose(a[c], b[c], rtol=rtol, atol=0, err_msg=f"{rel}: {c}")
            else:
                assert a[c].equals(b[c]), (rel, c)
    assert (first / "parameters.toml").read_bytes() == (second / "parameters.toml").read_bytes()


def test_command_line_option_overrides_file(tmp_path, capsys):
    f = save_parameters(Parameters(ring_order=12, column_spacing_nm=0.3), tmp_path / "p.toml")
    assert main(["analyze", str(SAMPLE), "--out", str(tmp_path / "o"), "--params", str(f), "--ring-order", "10",
                 "--column-spacing", "8px", "--no-fourier", "--no-figures", "--quiet"]) == 0
    used = load_parameters(tmp_path / "o" / "parameters.toml")
    assert used.ring_order == 10 and used.column_spacing_px == 8.0 and used.column_spacing_nm is None
    assert used.fourier is False


def test_bad_params_file_on_command_line(tmp_path, capsys):
    f = tmp_path / "p.toml"
    f.write_text("ring_order = 11\n")
    assert main(["analyze", str(SAMPLE), "--out", str(tmp_path / "o"), "--params", str(f)]) == 2
    err = capsys.readouterr().err
    assert "--params" in err and "ring_order" in err
    assert not (tmp_path / "o").exists()
