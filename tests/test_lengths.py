"""Lengths resolved once, at the boundary (analysis/_lengths.py), and one name per parameter down to the stages."""

import ast
import json
import math
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from tenfold.analysis import TenfoldInputError
from tenfold.analysis._lengths import (DIAMETER_PER_SIGMA, LENGTHS, check_pixel_size, length_px, lengths_record,
                                       resolve_lengths)
from tenfold.analysis.parameters import Parameters

ROOT = Path(__file__).resolve().parents[1]
SAMPLE = ROOT / "sample_images" / "decagonal_haadf_high_dose.tif"
#: the bundled model (sample_images/README.md): pixel size 0.04 nm, ring radius 0.45 nm
SAMPLE_PX_NM, SAMPLE_RING_NM = 0.04, 0.45


# -- conversion: px = nm / (nm per px) -----------------------------------------------------------------------------

@pytest.mark.parametrize("nm, ps, px", [(0.5, 0.02, 25.0), (0.45, 0.04, 11.25), (2.0, 0.04, 50.0), (0.3, 0.015, 20.0)],
                         ids=["0.5nm@0.02", "0.45nm@0.04", "2nm@0.04", "0.3nm@0.015"])
def test_nm_to_px_known_answers(nm, ps, px):
    length = length_px("ring_radius", nm=nm, pixel_size_nm=ps)
    assert length.value_px == pytest.approx(px, rel=1e-12)
    assert (length.given, length.source) == (f"{nm:g} nm", "user")


def test_px_length_passes_through_without_a_calibration():
    length = length_px("tiling_edge", px=30.5)
    assert (length.value_px, length.given, length.source) == (30.5, "30.5 px", "user")


def test_automatic_length_has_no_value():
    length = length_px("d0")
    assert (length.value_px, length.given, length.source) == (None, None, "automatic")


def test_uncalibrated_nm_length_raises_one_line_naming_the_parameter_and_the_fix():
    with pytest.raises(TenfoldInputError) as info:
        length_px("ring_radius", nm=0.45, pixel_size_nm=None)
    msg = str(info.value)
    assert "\n" not in msg
    assert msg.startswith("ring_radius_nm=0.45 is in nm but the image is uncalibrated")
    assert "pixel_size_nm" in msg and "ring_radius_px" in msg and "automatic" in msg


@pytest.mark.parametrize("value", [0.0, -1.0, math.nan, math.inf, True, "3"], ids=["zero", "negative", "nan", "inf",
                                                                                   "bool", "text"])
def test_bad_length_names_itself(value):
    with pytest.raises(TenfoldInputError, match=r"^tiling_edge_px=.* must be a positive number of px"):
        length_px("tiling_edge", px=value)


def test_both_units_are_refused():
    with pytest.raises(TenfoldInputError, match="column_spacing_nm and column_spacing_px both given"):
        length_px("column_spacing", nm=0.3, px=7.0, pixel_size_nm=0.04)


def test_resolve_covers_every_length_of_parameters():
    fields = {f.name for f in __import__("dataclasses").fields(Parameters)}
    assert {f"{n}_{u}" for n in LENGTHS for u in ("nm", "px")} <= fields
    r = resolve_lengths(Parameters(ring_radius_nm=0.5, d0_px=12.0), pixel_size_nm=0.02)
    assert set(r) == set(LENGTHS)
    assert r.px("ring_radius") == pytest.approx(25.0) and r.px("d0") == 12.0 and r.px("tiling_edge") is None


def test_record_takes_automatic_values_from_the_stage_summaries():
    r = resolve_lengths({"ring_radius_px": 11.25})
    summary = {"automatic": {"sigma": {"value_px": 1.5}, "spacing": {"value_px": 6.9, "how": "nearest maxima"}},
               "motifs": {"radius_px": 11.3, "radius_source": "scan"},
               "ladder": {"columns": {"r_max_px": 55.0, "d0_px": 6.95, "d0_source": "peak"}},
               "tiling": {"edge_px": 50.0, "edge_source": "automatic"}}
    rec = lengths_record(r, summary)
    assert rec["ring_radius"] == {"value_px": 11.25, "given": "11.25 px", "source": "user"}  # the user's, not 11.3
    assert rec["column_diameter"]["value_px"] == pytest.approx(6.75) and rec["column_diameter"]["source"] == "automatic"
    assert (rec["column_spacing"]["value_px"], rec["column_spacing"]["how"]) == (6.9, "nearest maxima")
    assert (rec["d0"]["value_px"], rec["tiling_edge"]["value_px"], rec["ladder_r_max"]["value_px"]) == (6.95, 50.0, 55.0)
    assert json.loads(json.dumps(rec)) == rec


def test_record_of_a_stage_that_chose_nothing_is_empty():
    rec = lengths_record(resolve_lengths({}), {})
    assert all(v["value_px"] is None and v["source"] == "automatic" for v in rec.values())


# -- the one calibration check -------------------------------------------------------------------------------------

@pytest.mark.parametrize("bad", [0.0, -0.02, math.nan, math.inf], ids=["zero", "negative", "nan", "inf"])
def test_pixel_size_check_has_one_wording_in_every_stage(bad):
    from tenfold.analysis.columns import find_columns
    from tenfold.analysis.fourier import power_spectrum
    from tenfold.analysis.ladder import fit_ladder
    from tenfold.analysis.motifs import find_motifs
    from tenfold.analysis.region import parse_region
    from tenfold.analysis.tiling import build_network

    xy = np.random.default_rng(0).random((20, 2)) * 50
    cols = pd.DataFrame({"id": np.arange(20), "x_px": xy[:, 0], "y_px": xy[:, 1]})
    motifs = pd.DataFrame({"motif_id": [0], "kind": ["ring10"], "centre_x_px": [1.0], "centre_y_px": [1.0]})
    calls = [lambda: find_columns(np.ones((64, 64)), pixel_size_nm=bad),
             lambda: power_spectrum(np.ones((32, 32)), pixel_size_nm=bad),
             lambda: fit_ladder(xy[:, 0], xy[:, 1], pixel_size_nm=bad),
             lambda: find_motifs(cols, pixel_size_nm=bad),
             lambda: parse_region("0,0,1,1", pixel_size_nm=bad),
             lambda: build_network(motifs, pixel_size_nm=bad),
             lambda: Parameters(pixel_size_nm=bad).validate()]
    messages = set()
    for call in calls:
        with pytest.raises(TenfoldInputError) as info:
            call()
        messages.add(str(info.value).removeprefix("parameter "))  # Parameters names it "parameter pixel_size_nm"
    assert messages == {f"pixel_size_nm={bad!r} must be a positive finite number of nm per pixel, e.g. 0.015"}


def test_pixel_size_in_metres_is_refused_as_implausible():
    # a TIFF in SI units holds 0.04 nm as 4e-11 (m): outside any atomic-resolution pixel size
    with pytest.raises(TenfoldInputError, match=r"pixel_size_nm=4e-11 nm per pixel is outside"):
        check_pixel_size(4e-11)
    assert check_pixel_size(4e-11, plausible=False) == 4e-11


def test_diameter_holds_92_percent_of_a_gaussian_column():
    # the radius of an isotropic 2-D Gaussian is Rayleigh distributed: (r / sigma)^2 is chi-square with 2 degrees
    # of freedom (scipy.stats as the reference)
    from scipy.stats import chi2

    assert chi2(2).cdf((DIAMETER_PER_SIGMA / 2) ** 2) == pytest.approx(0.92, abs=0.005)


# -- at the boundary: before any stage runs ------------------------------------------------------------------------

def test_uncalibrated_nm_length_fails_before_the_first_stage():
    from tenfold.analysis.io import micrograph_from_array
    from tenfold.analysis.pipeline import run_pipeline

    mg = micrograph_from_array(np.random.default_rng(1).poisson(20.0, (128, 128)).astype(np.float32), name="u")
    seen = []
    with pytest.raises(TenfoldInputError, match="ring_radius_nm=0.45 is in nm but the image is uncalibrated"):
        run_pipeline(mg, Parameters(ring_radius_nm=0.45), progress=lambda f, m: seen.append(m))
    assert seen == []


def test_cli_names_the_flags(tmp_path, capsys):
    import imageio.v3 as iio

    from tenfold.analysis.cli import main

    png = tmp_path / "crop.png"
    iio.imwrite(png, np.random.default_rng(2).integers(0, 255, (96, 96), dtype=np.uint8))
    assert main(["analyze", str(png), "--out", str(tmp_path / "r"), "--tiling-edge", "2", "--quiet"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--tiling-edge" in err[0] and "--pixel-size" in err[0] and "uncalibrated" in err[0]


@pytest.fixture(scope="module")
def run_with_a_radius_in_nm():
    from tenfold.analysis.io import micrograph_from_array, read_micrograph
    from tenfold.analysis.pipeline import run_pipeline

    full = read_micrograph(SAMPLE)
    mg = micrograph_from_array(full.data[:300, :300].copy(), pixel_size_nm=full.meta.pixel_size_nm, name="crop")
    return run_pipeline(mg, Parameters(ring_radius_nm=SAMPLE_RING_NM, fourier=False, phason=False))


def test_summary_records_how_each_length_was_resolved(run_with_a_radius_in_nm):
    s = run_with_a_radius_in_nm.summary
    rec = s["lengths_px"]
    assert set(rec) == set(LENGTHS)
    assert rec["ring_radius"] == {"value_px": pytest.approx(SAMPLE_RING_NM / SAMPLE_PX_NM), "given": "0.45 nm",
                                  "source": "user"}
    assert s["motifs"]["radius_px"] == pytest.approx(11.25)  # the stage got the px value
    spacing = rec["column_spacing"]
    assert spacing["source"] == "automatic" and spacing["value_px"] == s["automatic"]["spacing"]["value_px"]
    # the diameter the finder worked with: DIAMETER_PER_SIGMA x its settled width
    assert rec["column_diameter"]["value_px"] == DIAMETER_PER_SIGMA * s["automatic"]["sigma"]["value_px"]
    assert rec["d0"]["value_px"] == s["ladder"]["columns"]["d0_px"]


def test_rerun_from_columns_records_the_lengths_too(run_with_a_radius_in_nm):
    from tenfold.analysis.pipeline import rerun_from_columns

    res = run_with_a_radius_in_nm
    new = rerun_from_columns(res, res.tables["columns"].iloc[1:])
    assert new.summary["lengths_px"]["ring_radius"]["given"] == "0.45 nm"
    assert new.summary["lengths_px"]["column_spacing"] == res.summary["lengths_px"]["column_spacing"]


# -- one name per parameter ----------------------------------------------------------------------------------------

def _ring(n=10, r=10.0):
    a = np.deg2rad(np.arange(n) * 360.0 / n)
    return pd.DataFrame({"id": np.arange(n), "x_px": 50 + r * np.cos(a), "y_px": 50 + r * np.sin(a)})


def test_old_keywords_still_work_with_a_deprecation_warning():
    from tenfold.analysis.motifs import find_motifs

    new, _ = find_motifs(_ring(), ring_order=10, ring_radius_px=10.0, pentagons=False)
    with pytest.warns(DeprecationWarning) as caught:
        old, _ = find_motifs(_ring(), order=10, radius_px=10.0, pentagons=False)
    assert sorted(str(w.message) for w in caught) == ["find_motifs: the keyword order is deprecated, use ring_order",
                                                      "find_motifs: the keyword radius_px is deprecated, use "
                                                      "ring_radius_px"]
    assert all(w.filename == __file__ for w in caught)  # stacklevel points at the caller
    pd.testing.assert_frame_equal(new, old)
    with pytest.raises(TenfoldInputError, match="give ring_radius_px only"):
        find_motifs(_ring(), radius_px=10.0, ring_radius_px=10.0)


@pytest.mark.parametrize("module, func, old, new", [("ladder", "fit_ladder", "r_max_px", "ladder_r_max_px"),
                                                    ("tiling", "build_network", "edge_px", "tiling_edge_px")])
def test_stage_keywords_carry_the_parameters_names(module, func, old, new):
    import importlib
    import inspect

    f = getattr(importlib.import_module(f"tenfold.analysis.{module}"), func)
    names = inspect.signature(f).parameters
    assert new in names and old not in names


def test_fit_ladder_alias_gives_the_same_table():
    from tenfold.analysis.ladder import fit_ladder

    g = np.arange(0.0, 200.0, 10.0)
    x, y = (a.ravel() for a in np.meshgrid(g, g))
    new = fit_ladder(x, y, ladder_r_max_px=60.0)[0]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DeprecationWarning)
        old = fit_ladder(x, y, r_max_px=60.0)[0]
    pd.testing.assert_frame_equal(new, old)


def test_parameters_is_one_class_wherever_it_is_imported():
    import tenfold.analysis as a
    from tenfold.analysis import pipeline

    assert a.Parameters is pipeline.Parameters is Parameters


def _relative_imports():
    """module -> the analysis modules it imports (top level and inside functions)."""
    graph = {}
    for path in (ROOT / "analysis").glob("*.py"):
        deps = set()
        for node in ast.walk(ast.parse(path.read_text())):
            if isinstance(node, ast.ImportFrom) and node.level == 1:
                deps.update([node.module.split(".")[0]] if node.module else [a.name for a in node.names])
        graph[path.stem] = deps
    return graph


def test_parameters_and_lengths_import_no_stage():
    graph = _relative_imports()
    assert graph["parameters"] <= {"_errors", "_lengths"}
    assert graph["_lengths"] <= {"_errors"}


def test_no_import_cycle_in_analysis():
    # columns <-> parallel and fourier <-> phason imported each other (lazily) before the shared pieces moved to
    # _tasks and _strain; a depth-first search finds any cycle, however long
    graph = _relative_imports()
    state: dict[str, int] = {}  # 1 on the current path, 2 done

    def visit(node, path):
        state[node] = 1
        for nxt in sorted(graph.get(node, ())):
            if nxt not in graph:
                continue
            assert state.get(nxt) != 1, f"import cycle: {' -> '.join(path + [nxt])}"
            if nxt not in state:
                visit(nxt, path + [nxt])
        state[node] = 2

    for module in sorted(graph):
        if module not in state:
            visit(module, [module])


def test_export_and_the_parameters_file_take_parameters_from_the_low_module():
    graph = _relative_imports()
    assert "pipeline" not in graph["export"] and "pipeline" not in graph["_params_file"]


def test_every_length_is_bounded_by_the_image():
    from tenfold.analysis._guards import _DIAGONAL_LENGTHS, _SIDE_LENGTHS

    assert sorted(_SIDE_LENGTHS + _DIAGONAL_LENGTHS) == sorted(LENGTHS)
