"""Docs and packaging a newcomer relies on: licence file, extras' licences, data model wording and units."""

from __future__ import annotations

import re
import tomllib
from pathlib import Path

import pandas as pd

from tenfold.analysis import _schema, export

ROOT = Path(__file__).resolve().parents[1]


def test_license_file_is_bsd3_of_the_developers():
    text = (ROOT / "LICENSE").read_text()
    meta = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]
    assert meta["license"]["text"] == "BSD-3-Clause"
    assert text.startswith("BSD 3-Clause License") and "Tenfold developers" in text
    assert "Neither the name of the copyright holder" in text  # clause 3 of the BSD-3-Clause text (SPDX)


def test_readme_names_the_licence_of_every_extra_package():
    readme = (ROOT / "README.md").read_text()
    extras = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]["optional-dependencies"]
    para = next(p for p in readme.split("\n\n") if "Optional extras" in p)
    for extra, reqs in extras.items():
        assert f"`{extra}`" in para, extra
        for req in reqs:
            name = re.split(r"[<>=!\[ ]", req, maxsplit=1)[0]
            assert name.lower() in para.lower(), name
    for licence in ("BSD-3-Clause", "MIT", "LGPL", "GPL-3.0-or-later", "MPL-2.0"):
        assert licence in para


def test_data_model_says_outer_for_the_outer_face():
    doc = {f.name: f.doc for f in _schema.NETWORK}
    assert "'outer'" in doc["tile_left"] and "'outer'" in doc["tile_right"]


def test_extra_column_fields_documented_with_units():
    extras = {f.name: f.unit for f in _schema.EXTRAS["columns"]}
    assert extras == {"x_err_px": "px", "y_err_px": "px", "amplitude_err": "image units", "snr": ""}
    df = pd.DataFrame({"amplitude_err": [1.0], "x_err_px": [0.1]})
    assert export._units("columns", df) == ["image units", "px"]
    assert "`amplitude_err` (extra)" in _schema.schema_markdown()
