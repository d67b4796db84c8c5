"""napari writers: the 'columns' Points layer and the 'motifs' Shapes layer to CSV, features included."""

from __future__ import annotations

import os

import numpy as np
import pandas as pd

__all__ = ["write_columns", "write_motifs", "points_table", "shapes_table"]


def _csv_path(path) -> str:
    path = os.fspath(path)
    return path if path.lower().endswith(".csv") else path + ".csv"


def points_table(data, attributes: dict) -> pd.DataFrame:
    """Features of a Points layer with the current point positions as x_px, y_px (the layer's data frame).

    Positions come from the layer data, not from the features, so points moved by hand are written where they
    now are; added points have empty features.
    """
    data = np.asarray(data, float).reshape(-1, 2)
    feats = pd.DataFrame(attributes.get("features", {})).reset_index(drop=True)
    if len(feats) != len(data):
        feats = pd.DataFrame(index=range(len(data)))
    feats = feats.copy()
    feats["x_px"] = data[:, 1]
    feats["y_px"] = data[:, 0]
    return feats


def shapes_table(data, attributes: dict) -> pd.DataFrame:
    """Features of a Shapes layer, one row per shape, with the vertices as 'x_px y_px; ...' text."""
    feats = pd.DataFrame(attributes.get("features", {})).reset_index(drop=True).copy()
    if len(feats) != len(data):
        feats = pd.DataFrame(index=range(len(data)))
    feats["vertices_px"] = [
        "; ".join(f"{x:.3f} {y:.3f}" for y, x in np.asarray(v, float)[:, -2:]) for v in data
    ]
    return feats


def _write(table, out: str) -> list[str]:
    try:
        table.to_csv(out, index=False)
    except OSError as exc:  # a notification, not a traceback: which file and why
        from napari.utils.notifications import show_error

        show_error(f"could not write {out}: {exc.strerror or exc}; choose another folder or file name")
        return []
    return [out]


def write_columns(path, data, attributes: dict) -> list[str]:
    """Write a Points layer as a CSV: its features plus the point positions (x_px, y_px)."""
    return _write(points_table(data, attributes), _csv_path(path))


def write_motifs(path, data, attributes: dict) -> list[str]:
    """Write a Shapes layer (motifs) as a CSV: its features plus the polygon vertices."""
    return _write(shapes_table(data, attributes), _csv_path(path))
