"""The table contract: schema, generated docs, conform."""

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from tenfold.analysis._schema import COLUMNS, MOTIFS, TABLES, conform, empty_table, schema_markdown

DOCS = Path(__file__).resolve().parents[1] / "docs" / "data_model.md"


def test_docs_match_schema():
    assert DOCS.read_text().strip() == schema_markdown().strip(), (
        "docs/data_model.md is stale: run python -m tenfold.analysis._schema > docs/data_model.md"
    )


def test_contract_names_from_the_issues():
    cols = {f.name for f in COLUMNS}
    assert {"id", "x_px", "y_px", "x_nm", "y_nm", "sigma_nm", "amplitude", "background", "intensity", "pos_err_nm",
            "species", "species_prob", "region"} <= cols
    assert {"kind", "centre_x_nm", "centre_y_nm", "radius_nm", "orientation_deg", "members"} <= {f.name for f in MOTIFS}
    assert {"set", "rung", "ideal_ratio", "measured_nm", "ratio", "deviation_pct", "uncertainty_pct"} <= {
        f.name for f in TABLES["ladder"]}
    assert {"tile", "count"} <= {f.name for f in TABLES["tiles"]}


def test_units_in_names_match_units():
    for fields in TABLES.values():
        for f in fields:
            for suffix, unit in (("_nm", "nm"), ("_px", "px"), ("_deg", "deg"), ("_pct", "%")):
                if f.name.endswith(suffix) and not f.name.endswith("_per" + suffix):
                    assert f.unit == unit, f.name
            if "_per_" in f.name:  # spatial frequencies: k_per_nm is in 1/nm
                assert f.unit == "1/" + f.name.rsplit("_per_", 1)[1], f.name


def test_empty_and_conform():
    e = empty_table(COLUMNS)
    assert list(e.columns) == [f.name for f in COLUMNS] and len(e) == 0
    assert e["species"].dtype == np.int64
    df = pd.DataFrame({f.name: [1] for f in COLUMNS})
    df["extra"] = 2.5
    out = conform(df[list(reversed(df.columns))], COLUMNS)
    assert list(out.columns)[: len(COLUMNS)] == [f.name for f in COLUMNS]
    assert out.columns[-1] == "extra" and out["x_px"].dtype == np.float64
    with pytest.raises(KeyError, match="x_px"):
        conform(df.drop(columns="x_px"), COLUMNS)
