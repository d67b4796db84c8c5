"""The fast writers behind write_results: CSV text equal to pandas' writer (the oracle), the streaming workbook
read back by openpyxl, and rasterised dense figure layers."""

import math

import numpy as np
import pandas as pd
import pytest

from tenfold.analysis import export
from tenfold.analysis._xlsx import write_xlsx


def _awkward_table(n=50):
    rng = np.random.default_rng(0)
    x = rng.normal(size=n) * 10.0 ** rng.integers(-8, 17, n)
    x[[1, 4]] = np.nan
    x[5], x[6] = np.inf, -np.inf
    x[7] = 0.1 + 0.2
    text = np.array(["ok", 'say "hi"', "a,b", "line\nbreak", "", "=1+1", "tab\there", "ünï", None, "cr\r"] * n,
                    dtype=object)[:n]
    return pd.DataFrame({
        "id": np.arange(n, dtype=np.int64),
        "x_px": x,
        "flag": rng.random(n) > 0.5,
        "kind": text,
        "f32": rng.normal(size=n).astype(np.float32),
        "neg_int": -np.arange(n, dtype=np.int32),
    })


@pytest.mark.parametrize("table", ["awkward", "empty", "no_rows"])
def test_csv_text_equals_pandas(tmp_path, table):
    df = {"awkward": _awkward_table(), "empty": pd.DataFrame(),
          "no_rows": _awkward_table().iloc[:0]}[table]
    path = tmp_path / "t.csv"
    export._write_csv(df, path)
    assert path.read_bytes() == df.to_csv(index=False, lineterminator="\n").encode()


def test_csv_falls_back_to_pandas_for_other_types(tmp_path):
    df = pd.DataFrame({"a": pd.array([1, None, 3], dtype="Int64"), "t": pd.to_datetime(["2020-01-01"] * 3)})
    export._write_csv(df, tmp_path / "t.csv")
    assert (tmp_path / "t.csv").read_bytes() == df.to_csv(index=False, lineterminator="\n").encode()


def test_streaming_workbook_reads_back(tmp_path):
    from openpyxl import load_workbook

    df = _awkward_table(30)
    units = ["", "px", "", "", "", ""]
    path = write_xlsx(tmp_path / "w.xlsx", {"first": (df, units), "second & <more>": (df.iloc[:0], units)})
    wb = load_workbook(path)
    assert wb.sheetnames == ["first", "second & <more>"]
    ws = wb["first"]
    assert [c.value for c in ws[1]] == list(df.columns) and ws["A1"].font.b
    assert ws["B2"].value == "px" and ws["B2"].font.i and ws["A2"].value is None
    assert ws.freeze_panes == "A3"
    for i in range(len(df)):
        r = 3 + i
        assert ws.cell(r, 1).value == i and ws.cell(r, 1).data_type == "n"
        v = df["x_px"][i]
        assert ws.cell(r, 2).value == (v if math.isfinite(v) else None)  # exact: shortest round-trip text
        assert ws.cell(r, 3).value is bool(df["flag"][i])
        k = df["kind"][i]
        want = k if isinstance(k, str) and k else None  # missing text (NaN/None) and '' are empty cells
        got = ws.cell(r, 4).value
        assert (got or None) == want and (got is None or ws.cell(r, 4).data_type == "s")
        assert ws.cell(r, 5).value == float(df["f32"][i])
    assert wb["second & <more>"].max_row == 2


def test_workbook_rejects_bad_sheets(tmp_path):
    df = pd.DataFrame({"a": [1]})
    with pytest.raises(ValueError, match="31 characters"):
        write_xlsx(tmp_path / "w.xlsx", {"x" * 32: (df, [""])})
    with pytest.raises(ValueError, match="units"):
        write_xlsx(tmp_path / "w.xlsx", {"a": (df, [])})


def test_dense_scatter_rasterised_sparse_kept_vector():
    from matplotlib.figure import Figure

    fig = Figure()
    ax = fig.add_subplot()
    dense = ax.scatter(np.arange(export.RASTER_ABOVE + 1), np.zeros(export.RASTER_ABOVE + 1))
    sparse = ax.scatter([0, 1], [1, 2])
    (line,) = ax.plot(np.arange(export.RASTER_ABOVE + 1), np.ones(export.RASTER_ABOVE + 1), "o")
    assert export._rasterise_dense_layers(fig) == 2
    assert dense.get_rasterized() and line.get_rasterized() and not sparse.get_rasterized()


def test_display_image_block_mean_keeps_small_images():
    img = np.arange(20.0).reshape(4, 5)
    out, step = export._display_image(img)
    assert step == 1 and np.array_equal(out, img)
    big = np.ones((export.DISPLAY_MAX_PX * 2 + 3, 10), dtype=np.float32)
    big[:2, :2] = 5.0
    out, step = export._display_image(big)
    assert step == 3 and out.shape == ((export.DISPLAY_MAX_PX * 2 + 3) // 3, 3)
    assert out[0, 0] == pytest.approx((4 * 5.0 + 5 * 1.0) / 9)
