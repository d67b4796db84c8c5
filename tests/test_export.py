"""Export stage: folder safety, CSV/JSON/workbook formats, figures. Tables hold made-up demo values (format plumbing)."""

from __future__ import annotations

import itertools
import json
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest

from tenfold.analysis import _schema as S
from tenfold.analysis import export
from tenfold.analysis._errors import Cancelled, TenfoldInputError
from tenfold.analysis._image import ImageMeta
from tenfold.analysis._result import AnalysisResult
from tenfold.analysis.export import FIGURES, read_workbook, register_figure, write_results


def _demo_table(fields, n, rng):
    data = {}
    for f in fields:
        if f.dtype == "int64":
            data[f.name] = np.arange(n, dtype=np.int64)
        elif f.dtype == "float64":
            data[f.name] = rng.random(n) * 10
        elif f.dtype == "bool":
            data[f.name] = rng.random(n) > 0.5
        else:
            data[f.name] = [f"demo {i}" for i in range(n)]
    return S.conform(pd.DataFrame(data), fields)


def _demo_result(pixel_size_nm=0.02, n=12) -> AnalysisResult:
    rng = np.random.default_rng(7)
    tables = {name: _demo_table(fields, n, rng) for name, fields in S.TABLES.items()}
    cols = tables["columns"]
    cols["x_px"] = rng.random(n) * 60
    cols["y_px"] = rng.random(n) * 40
    cols["species"] = np.arange(n) % 3
    cols.loc[2, "sigma_nm"] = np.nan
    cols.loc[0, "amplitude"] = 0.1 + 0.2  # 0.30000000000000004: full precision must survive
    cols["fit_status"] = "ok"
    motifs = tables["motifs"]
    motifs["members"] = ["3 5 7 9 11", "12", ""] * (n // 3)
    motifs["centre_ids"] = ""
    motifs["kind"] = "ring10"
    motifs.loc[1, "kind"] = "=1+1"  # text that looks like a formula stays text
    tables["tiles"] = S.conform(pd.DataFrame({"tile": ["thick_rhombus", "thin_rhombus"], "count": [21, 13],
                                              "fraction": [21 / 34, 13 / 34], "region": [0, 0]}), S.TILES)
    tables["spots"] = S.empty_table(S.SPOTS)  # a stage that found nothing: header only
    meta = ImageMeta(path="/data/demo_alloy_Qz7.tif", pixel_size_nm=pixel_size_nm,
                     calibration_source="imagej" if pixel_size_nm else "none", original_dtype="uint16",
                     shape=(40, 60), sha256="ab" * 32)
    return AnalysisResult(
        meta=meta,
        parameters={"ring_order": 10, "radius_tolerance": 0.12, "d0_nm": None, "auto": {"spacing_px": 9.5}},
        tables=tables,
        summary={"n_columns": np.int64(n), "pixel_size_nm": pixel_size_nm, "bad": np.nan,
                 "arr": np.array([1.5, np.inf]), "calibrated": pixel_size_nm is not None,
                 "regions": [{"region": 0, "n_columns": n, "mean_psi_n": 0.91, "mean_pos_err_nm": None}]},
        image=rng.random((40, 60)).astype(np.float32),
        curves={"pair_distribution_columns": pd.DataFrame({"r_px": [1.0, 2.0], "r_nm": [0.02, 0.04],
                                                           "g": [0.5, 1.25]})},
    )


@pytest.fixture
def result():
    return _demo_result()


@pytest.fixture
def own_figures(monkeypatch):
    """Only this module's figure makers: other stages' makers are tested with their own data."""
    mine = {k: FIGURES[k] for k in ("species_histogram", "columns_overlay")}
    monkeypatch.setattr(export, "_load_figure_modules", lambda: None)
    for k in list(FIGURES):
        if k not in mine:
            monkeypatch.delitem(FIGURES, k)
    return FIGURES


# ---------------------------------------------------------------------------------------------------------------
# folder safety


def test_writes_expected_files(tmp_path, result):
    out = tmp_path / "res"
    files = write_results(result, out, figures=False)
    names = {p.relative_to(out).as_posix() for p in files}
    expected = {f"{t}.csv" for t in S.TABLES} | {"curves/pair_distribution_columns.csv", "summary.json",
                                                 "provenance.json", "results.xlsx"}
    assert names == expected
    assert all(p.is_file() for p in files)
    assert [p.name for p in tmp_path.iterdir()] == ["res"]  # no temporary sibling left


def test_refuses_non_empty_dir(tmp_path, result):
    out = tmp_path / "res"
    out.mkdir()
    (out / "keep.txt").write_text("x")
    with pytest.raises(TenfoldInputError, match="not empty") as info:
        write_results(result, out, figures=False)
    assert str(out) in str(info.value) and "overwrite=True" in str(info.value)
    assert (out / "keep.txt").read_text() == "x"


def test_empty_existing_dir_is_fine(tmp_path, result):
    out = tmp_path / "res"
    out.mkdir()
    write_results(result, out, figures=False)
    assert (out / "columns.csv").is_file()


def test_refuses_file_as_dir(tmp_path, result):
    f = tmp_path / "res"
    f.write_text("x")
    with pytest.raises(TenfoldInputError, match="is a file"):
        write_results(result, f, figures=False)


def test_overwrite_replaces_own_results_keeps_user_file(tmp_path, result):
    out = tmp_path / "res"
    write_results(result, out, figures=False)
    (out / "mine.txt").write_text("the user's")
    stamp = (out / "columns.csv").stat().st_mtime_ns
    write_results(result, out, overwrite=True, figures=False)
    assert (out / "mine.txt").read_text() == "the user's"
    assert (out / "columns.csv").stat().st_mtime_ns >= stamp
    assert (out / "results.xlsx").is_file()
    assert [p.name for p in tmp_path.iterdir()] == ["res"]


def test_failure_leaves_nothing_half_written(tmp_path, result, monkeypatch):
    def broken(*args, **kwargs):
        raise RuntimeError("disk full (injected)")

    monkeypatch.setattr(export, "_write_workbook", broken)
    out = tmp_path / "res"
    with pytest.raises(RuntimeError, match="injected"):
        write_results(result, out, figures=False)
    assert list(tmp_path.iterdir()) == []


def test_failure_with_overwrite_keeps_old_folder(tmp_path, result, monkeypatch):
    out = tmp_path / "res"
    write_results(result, out, figures=False)
    (out / "marker.txt").write_text("previous run")
    monkeypatch.setattr(export, "_write_json", lambda *a, **k: (_ for _ in ()).throw(OSError("injected")))
    with pytest.raises(TenfoldInputError, match=r"res: results could not be written \(injected"):
        write_results(result, out, overwrite=True, figures=False)
    assert (out / "marker.txt").read_text() == "previous run"
    assert [p.name for p in tmp_path.iterdir()] == ["res"]


def test_progress_per_file_and_cancel(tmp_path, result, own_figures):
    calls = []
    write_results(result, tmp_path / "a", figures=False, progress=lambda f, m: calls.append((f, m)))
    fractions = [f for f, _ in calls]
    assert fractions == sorted(fractions) and fractions[0] == 0.0 and fractions[-1] == 1.0
    assert any("columns.csv" in m for _, m in calls) and any("results.xlsx" in m for _, m in calls)
    # tables, one curve, summary/provenance/parameters/workbook, done
    assert len(calls) == len(S.TABLES) + 1 + 4 + 1

    seen = []

    def stop_at_third(f, m):
        seen.append(m)
        return len(seen) < 3

    with pytest.raises(Cancelled):
        write_results(result, tmp_path / "b", progress=stop_at_third)
    assert not (tmp_path / "b").exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a"]


# ---------------------------------------------------------------------------------------------------------------
# formats


def _read_csv(path, fields):
    """CSV back with schema dtypes; object columns as strings ('' for empty)."""
    objects = {f.name for f in fields if f.dtype == "object"}
    df = pd.read_csv(path, dtype={c: str for c in objects}, keep_default_na=True)
    for c in objects:
        df[c] = df[c].fillna("").astype(object)
    return df


def test_csv_header_and_precision(tmp_path, result):
    out = tmp_path / "res"
    write_results(result, out, figures=False)
    for name, fields in S.TABLES.items():
        header = (out / f"{name}.csv").read_text().splitlines()[0].split(",")
        assert header == [f.name for f in fields]
    cols = _read_csv(out / "columns.csv", S.COLUMNS)
    assert cols["amplitude"][0] == 0.1 + 0.2  # exact: repr round-trips IEEE doubles
    np.testing.assert_array_equal(cols["x_px"].to_numpy(), result.tables["columns"]["x_px"].to_numpy())
    assert np.isnan(cols["sigma_nm"][2])
    motifs = _read_csv(out / "motifs.csv", S.MOTIFS)
    assert motifs["members"].tolist()[:3] == ["3 5 7 9 11", "12", ""]
    assert (out / "spots.csv").read_text().strip() == ",".join(f.name for f in S.SPOTS)


def test_summary_json_is_strict_json(tmp_path, result):
    out = tmp_path / "res"
    write_results(result, out, figures=False)
    text = (out / "summary.json").read_text()
    summary = json.loads(text, parse_constant=lambda c: pytest.fail(f"non-JSON constant {c}"))
    assert summary["n_columns"] == 12 and summary["bad"] is None and summary["arr"] == [1.5, None]
    assert summary["regions"][0]["mean_psi_n"] == 0.91
    prov = json.loads((out / "provenance.json").read_text())
    assert prov["sha256"] == "ab" * 32 and prov["calibration_source"] == "imagej"
    assert prov["parameters"]["ring_order"] == 10
    assert set(prov["versions"]) >= {"tenfold", "numpy", "scipy", "pandas", "trackpy", "scikit-image", "numba"}


def test_workbook_matches_csvs(tmp_path, result):
    out = tmp_path / "res"
    write_results(result, out, figures=False)
    wb = read_workbook(out / "results.xlsx")
    assert set(wb) == set(S.TABLES) | {"summary", "regions", "provenance"}
    for name, fields in S.TABLES.items():
        csv = _read_csv(out / f"{name}.csv", fields)
        sheet = wb[name]
        assert list(sheet.columns) == list(csv.columns)
        assert len(sheet) == len(csv)
        for f in fields:
            a, b = sheet[f.name], csv[f.name]
            if f.dtype == "object":
                assert a.tolist() == b.astype(str).tolist(), (name, f.name)
            elif f.dtype == "bool":
                assert a.astype(bool).tolist() == b.astype(bool).tolist()
            else:
                np.testing.assert_allclose(a.to_numpy(float), b.to_numpy(float), rtol=1e-12, equal_nan=True,
                                           err_msg=f"{name}.{f.name}")
    assert wb["motifs"]["kind"][1] == "=1+1"
    assert wb["columns"].attrs["units"]["x_px"] == "px" and wb["columns"].attrs["units"]["id"] == ""


def test_workbook_units_row_and_numeric_cells(tmp_path, result):
    from openpyxl import load_workbook

    out = tmp_path / "res"
    write_results(result, out, figures=False)
    wb = load_workbook(out / "results.xlsx")
    ws = wb["columns"]
    names = [c.value for c in ws[1]]
    units = [c.value for c in ws[2]]
    assert names == [f.name for f in S.COLUMNS]
    assert units == [f.unit or None for f in S.COLUMNS]
    col = {n: i + 1 for i, n in enumerate(names)}
    for name in ("x_px", "intensity", "id", "species"):
        cell = ws.cell(row=3, column=col[name])
        assert cell.data_type == "n" and not isinstance(cell.value, str), name
    assert ws.cell(row=3 + 2, column=col["sigma_nm"]).value is None  # NaN -> empty cell
    assert ws.cell(row=3, column=col["fit_status"]).data_type == "s"
    kinds = wb["motifs"]
    kind_col = [c.value for c in kinds[1]].index("kind") + 1
    assert kinds.cell(row=4, column=kind_col).data_type == "s"  # '=1+1' stored as text, not a formula
    assert wb["tiles"].cell(row=3, column=2).value == 21 and wb["tiles"].cell(row=3, column=2).data_type == "n"
    prov = {r[0].value: r[1].value for r in wb["provenance"].iter_rows(min_row=3)}
    assert prov["sha256"] == "ab" * 32
    assert prov["pixel_size_nm"] == 0.02
    assert prov["parameter: ring_order"] == 10 and prov["parameter: auto.spacing_px"] == 9.5
    assert prov["version: numpy"] == np.__version__
    assert "date_utc" in prov and "calibration_source" in prov
    regions = wb["regions"]
    assert [c.value for c in regions[1]] == ["region", "n_columns", "mean_psi_n", "mean_pos_err_nm"]
    assert regions.cell(row=2, column=4).value == "nm"


def test_regions_sheet_holds_numbers_only(tmp_path, result):
    # the pipeline writes what a region's mean is taken over as text; in the sheet that text is the unit-row label
    # of the mean, never a text cell in a column of numbers
    from openpyxl import load_workbook

    result.summary["regions"][0]["mean_psi_n_over"] = "ring motifs and pentagons"
    out = tmp_path / "res"
    write_results(result, out, figures=False)
    ws = load_workbook(out / "results.xlsx")["regions"]
    names = [c.value for c in ws[1]]
    assert "mean_psi_n_over" not in names
    assert ws.cell(row=2, column=names.index("mean_psi_n") + 1).value == "over ring motifs and pentagons"
    assert all(c.data_type == "n" for c in ws[3])


def test_summary_sheet_lists_the_headline_results(tmp_path, result):
    # every headline number of summary.json is in the workbook's first sheet, with its error and unit
    result.summary.update({
        "ladder": {"columns": {"holds": True, "d0_px": 10.0}, "agreement": {"compared": 1, "max_abs_z": 0.5,
                                                                              "agree": True}},
        "phason": {"real_space": {"ok": True, "singular_values": [0.04, 0.01], "singular_values_se": [0.02, 0.02],
                                  "n_used": 50},
                   "fourier": {"ok": False, "reason": "no decagonal indexing"}},
        "fourier": {"distortion_matrix": [[1.01, 0.0], [0.0, 0.99]], "dominant_order": 10,
                    "indexing": {"distortion_matrix_se": [[0.001, 0.001], [0.0, 0.001]]}},
        "timings_s": {"columns": 2.5, "motifs": 0.5},
    })
    out = tmp_path / "res"
    write_results(result, out, figures=False)
    wb = read_workbook(out / "results.xlsx")
    assert list(wb)[0] == "summary"
    sheet = wb["summary"].set_index(["section", "quantity"])
    d0 = sheet.loc[("ladder", "columns: base d0")]
    assert d0["value"] == pytest.approx(10.0 * 0.02) and d0["unit"] == "nm" and d0["note"] == "tau ladder holds"
    sv = sheet.loc[("phason", "real space (tiling lift): strain singular value 1")]
    assert sv["value"] == pytest.approx(0.04) and sv["error"] == pytest.approx(0.02)
    assert sheet.loc[("phason", "Fourier (spot positions): strain"), "note"] == "no decagonal indexing"
    d11 = sheet.loc[("distortion", "matrix D[1,1]")]
    assert d11["value"] == pytest.approx(1.01) and d11["error"] == pytest.approx(0.001)
    # 0.01 off the identity is 10 standard errors: significant
    assert sheet.loc[("distortion", "largest |D - identity|"), "note"].startswith("significant")
    assert sheet.loc[("timings", "columns"), "value"] == pytest.approx(2.5)
    assert sheet.loc[("region 0", "n columns"), "value"] == 12


def test_read_workbook_bad_path(tmp_path):
    with pytest.raises(TenfoldInputError, match="no such workbook"):
        read_workbook(tmp_path / "none.xlsx")
    bad = tmp_path / "bad.xlsx"
    bad.write_bytes(b"not a zip")
    with pytest.raises(TenfoldInputError, match="bad.xlsx"):
        read_workbook(bad)


def test_json_safe():
    safe = export._json_safe({1: np.float32(2.5), "n": np.nan, "b": np.bool_(True), "a": np.arange(2),
                              "t": (np.int16(3), float("-inf"))})
    assert safe == {"1": 2.5, "n": None, "b": True, "a": [0, 1], "t": [3, None]}
    json.dumps(safe, allow_nan=False)


# ---------------------------------------------------------------------------------------------------------------
# figures


def test_figures_written_as_png_and_svg(tmp_path, result, own_figures):
    out = tmp_path / "res"
    files = write_results(result, out)
    for name in ("species_histogram", "columns_overlay"):
        png, svg = out / "figures" / f"{name}.png", out / "figures" / f"{name}.svg"
        assert png in files and svg in files
        assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (ISO/IEC 15948)
        assert "<svg" in svg.read_text()


def test_overlay_titles_and_scale_bar():
    fig = export.columns_overlay(_demo_result(pixel_size_nm=None))
    assert "uncalibrated (px)" in fig.axes[0].get_title()
    fig = export.columns_overlay(_demo_result(pixel_size_nm=0.05))
    texts = [t.get_text() for t in fig.axes[0].texts]
    # 60 px * 0.05 nm = 3 nm wide; a fifth of that is 0.6 nm -> the 1-2-5 bar is 0.5 nm
    assert texts == ["0.5 nm"]
    assert export.columns_overlay(AnalysisResult(meta=ImageMeta())) is None


def test_histogram_none_without_columns():
    r = _demo_result()
    r.tables["columns"] = S.empty_table(S.COLUMNS)
    assert export.species_histogram(r) is None
    fig = export.species_histogram(_demo_result())
    assert "12 columns" in fig.axes[0].get_title()


def test_nice_length():
    assert [export._nice_length(v) for v in (0.24, 0.6, 1.0, 3.9, 7.0, 120.0)] == [0.2, 0.5, 1, 2, 5, 100]


def test_registered_figure_makers(tmp_path, result, monkeypatch, own_figures):
    from matplotlib.figure import Figure

    def maker(res):
        fig = Figure()
        fig.add_subplot().plot([0, 1], [0, 1])
        return fig

    monkeypatch.setitem(FIGURES, "demo_line", maker)
    monkeypatch.setitem(FIGURES, "not_applicable", lambda res: None)
    out = tmp_path / "res"
    write_results(result, out)
    assert (out / "figures" / "demo_line.png").is_file()
    assert not list((out / "figures").glob("not_applicable.*"))


def test_broken_figure_warns_and_keeps_tables(tmp_path, result, monkeypatch, own_figures):
    from tenfold.analysis._errors import TenfoldWarning

    def broken(res):
        raise ZeroDivisionError("demo")

    monkeypatch.setitem(FIGURES, "broken_demo", broken)
    out = tmp_path / "res"
    with pytest.warns(TenfoldWarning, match="broken_demo"):
        write_results(result, out)
    assert (out / "columns.csv").is_file() and (out / "figures" / "columns_overlay.png").is_file()
    assert not list((out / "figures").glob("broken_demo.*"))


def test_register_figure_rejects_clash(monkeypatch):
    monkeypatch.setattr(export, "FIGURES", dict(FIGURES))

    def a(res):
        return None

    register_figure("clash_demo")(a)
    register_figure("clash_demo")(a)  # the same function again (module reload) is fine

    def b(res):
        return None

    with pytest.raises(ValueError, match="already registered"):
        register_figure("clash_demo")(b)
    with pytest.raises(ValueError, match="letters"):
        register_figure("bad name/")


def test_export_does_not_touch_pyplot(tmp_path):
    code = (
        # read the raw rcParams entry: matplotlib.get_backend() would itself import pyplot to resolve it
        "import sys, matplotlib; raw = lambda: dict.__getitem__(matplotlib.rcParams, 'backend');"
        "before = raw();"
        "from tests.test_export import _demo_result;"
        "from tenfold.analysis.export import write_results;"
        f"write_results(_demo_result(), {str(tmp_path / 'res')!r});"
        "print('matplotlib.pyplot' in sys.modules, raw() == before)"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True,
                         cwd=str(__import__("pathlib").Path(__file__).parent.parent)).stdout
    assert out.split() == ["False", "True"]


# Colour-vision-deficiency simulation matrices (linear RGB, severity 1.0) of Machado, Oliveira & Fernandes,
# IEEE Trans. Vis. Comput. Graph. 15 (2009) 1291 (values from memory).
_CVD = {
    "protan": [[0.152286, 1.052583, -0.204868], [0.114503, 0.786281, 0.099216], [-0.003882, -0.048116, 1.051998]],
    "deutan": [[0.367322, 0.860646, -0.227968], [0.280085, 0.672501, 0.047413], [-0.011820, 0.042940, 0.968881]],
    "tritan": [[1.255528, -0.076749, -0.178779], [-0.078411, 0.930809, 0.147602], [0.004733, 0.691367, 0.303900]],
    "normal": np.eye(3),
}


@pytest.mark.parametrize("vision", sorted(_CVD))
def test_species_palette_stays_distinct(vision):
    from skimage.color import deltaE_ciede2000, rgb2lab

    srgb = np.array([[int(h[i:i + 2], 16) / 255 for i in (1, 3, 5)] for h in export.SPECIES_COLOURS])
    # sRGB transfer function (IEC 61966-2-1)
    lin = np.where(srgb <= 0.04045, srgb / 12.92, ((srgb + 0.055) / 1.055) ** 2.4)
    sim = np.clip(lin @ np.asarray(_CVD[vision]).T, 0, 1)
    sim = np.where(sim <= 0.0031308, 12.92 * sim, 1.055 * sim ** (1 / 2.4) - 0.055)
    lab = rgb2lab(sim[None])[0]
    worst = min(deltaE_ciede2000(lab[i], lab[j]) for i, j in itertools.combinations(range(len(lab)), 2))
    # a CIEDE2000 difference above ~10 reads as clearly different colours (common practice)
    assert worst > 10
    assert len(set(export.SPECIES_MARKERS)) == len(export.SPECIES_COLOURS)
