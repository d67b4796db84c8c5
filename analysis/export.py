"""Writing an :class:`AnalysisResult` to a results folder: CSV tables, ``results.xlsx``, ``summary.json``, figures.

Layout of ``DIR``::

    columns.csv motifs.csv ladder.csv pair_peaks.csv tiles.csv network.csv spots.csv   one per table
    curves/<name>.csv                                                                  curves behind the figures
    summary.json                                                                       result.summary, JSON-safe
    provenance.json                                                                    input, calibration, parameters, versions
    parameters.toml                                                                    the parameters as set, to repeat the run
    frames.csv, aligned_mean.tif                                                       a frame series: shifts per frame, the aligned mean
    results.xlsx                                                                       one sheet per table + 'regions' + 'provenance'
    figures/<name>.png, figures/<name>.svg                                             every registered figure that applies

    .tenfold-manifest.json                                                             what this run wrote, with checksums

Everything is written into a hidden work folder first and moved into place at the end, so a failure, a
cancellation or a signal never leaves a half-written results folder. ``overwrite=True`` replaces only the files a
previous run wrote (listed, with checksums, in the manifest) and leaves every other file in the folder alone; a
folder holding the input image is refused (see :mod:`tenfold.analysis._outdir`).

Figure makers live with the stage that knows the data and receive the whole result; export finds them through the
fixed table ``STAGE_FIGURES`` (its own, and any added later, through :func:`register_figure`). matplotlib is imported only inside figure makers and never switches the global
backend: figures are built as :class:`matplotlib.figure.Figure` and rendered with the Agg canvas directly.
"""

from __future__ import annotations

import datetime as _dt
import importlib
import json
import math
import re
import shutil
import warnings
from collections.abc import Callable
from contextlib import contextmanager
from pathlib import Path

import numpy as np
import pandas as pd

from . import _outdir
from ._errors import Cancelled, TenfoldInputError, TenfoldWarning
from ._progress import ProgressCallback, report
from ._result import AnalysisResult
from ._schema import EXTRAS, TABLES, conform

__all__ = [
    "write_results",
    "read_workbook",
    "register_figure",
    "FIGURES",
    "SPECIES_COLOURS",
    "SPECIES_MARKERS",
    "summary_table",
    "figure_service",
]

#: name -> figure maker. A maker takes the result and returns a matplotlib Figure, or None when it does not apply.
FIGURES: dict[str, Callable[[AnalysisResult], object]] = {}

#: Species colours, dimmest class first: the colour-blind-safe set of Okabe & Ito (2008, "Color Universal Design")
#: without its black and yellow, so every class stays visible on dark and bright HAADF backgrounds; checked to stay
#: apart (CIEDE2000) under simulated protan, deutan and tritan vision (tests/test_export.py). The napari layers use
#: the same colours. Markers differ too, so colour is never the only cue.
SPECIES_COLOURS = ("#0072B2", "#E69F00", "#009E73", "#D55E00", "#56B4E9", "#CC79A7")
SPECIES_MARKERS = ("o", "s", "^", "D", "v", "P")
_UNCLASSIFIED_COLOUR = "#9e9e9e"

#: the stages' figure makers, figure name -> (module, function): a fixed table looked up when figures are drawn,
#: so no stage imports export and export imports no stage at import time
STAGE_FIGURES = {
    "pair_distribution_ladder": ("ladder", "ladder_figure"),
    "cluster_network": ("tiling", "tiling_figure"),
    "power_spectrum": ("fourier", "spectrum_figure"),
    "column_diffraction": ("fourier", "diffraction_figure"),
    "phason_map": ("phason", "phason_map_figure"),
    "frame_shifts": ("frames", "shifts_figure"),
}

#: the versions recorded in the provenance (distribution names)
_VERSIONED = ("tenfold", "numpy", "scipy", "pandas", "trackpy", "scikit-image", "numba", "tifffile", "openpyxl",
              "matplotlib")

_SHEET_EXTRA = ("summary", "regions", "provenance")
_UNIT_SUFFIX = {"_nm": "nm", "_px": "px", "_deg": "deg", "_pct": "%"}


def register_figure(name: str):
    """Decorator registering a figure maker under ``name`` (the file stem in ``DIR/figures``).

    Parameters
    ----------
    name : str
        Figure name, letters, digits, ``_`` and ``-`` only.

    Examples
    --------
    >>> @register_figure("ladder_plot")                  # doctest: +SKIP
    ... def _ladder_plot(result):
    ...     if result.tables["ladder"].empty:
    ...         return None
    ...     ...
    """
    if not re.fullmatch(r"[A-Za-z0-9_\-]+", name):
        raise ValueError(f"figure name {name!r} must use letters, digits, '_' and '-' only")

    def deco(func):
        old = FIGURES.get(name)
        if old is not None and (old.__module__, old.__qualname__) != (func.__module__, func.__qualname__):
            raise ValueError(f"figure name {name!r} is already registered by {old.__module__}.{old.__qualname__}")
        FIGURES[name] = func
        return func

    return deco


# --------------------------------------------------------------------------------------------------------------
# JSON, provenance


def _json_safe(obj):
    """A copy of ``obj`` that :func:`json.dumps` accepts with ``allow_nan=False`` (NaN/inf -> None)."""
    if obj is None or isinstance(obj, (bool, str)):
        return obj
    if isinstance(obj, (int, np.integer)) and not isinstance(obj, np.bool_):
        return int(obj)
    if isinstance(obj, np.bool_):
        return bool(obj)
    if isinstance(obj, (float, np.floating)):
        v = float(obj)
        return v if math.isfinite(v) else None
    if isinstance(obj, (complex, np.complexfloating)):
        return [_json_safe(obj.real), _json_safe(obj.imag)]
    if isinstance(obj, dict):
        return {str(k): _json_safe(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple, set, frozenset)):
        return [_json_safe(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return _json_safe(obj.tolist())
    if isinstance(obj, pd.DataFrame):
        return _json_safe(obj.to_dict(orient="list"))
    if isinstance(obj, pd.Series):
        return _json_safe(obj.tolist())
    if isinstance(obj, (_dt.datetime, _dt.date)):
        return obj.isoformat()
    if isinstance(obj, Path):
        return str(obj)
    if hasattr(obj, "to_dict"):
        return _json_safe(obj.to_dict())
    return str(obj)


def _versions() -> dict[str, str]:
    from importlib import metadata

    out = {}
    for dist in _VERSIONED:
        try:
            out[dist] = metadata.version(dist)
        except metadata.PackageNotFoundError:
            out[dist] = "not installed"
    return out


def _flatten(d: dict, prefix: str = "") -> list[tuple[str, object]]:
    rows = []
    for k, v in d.items():
        key = f"{prefix}{k}"
        if isinstance(v, dict) and v:
            rows.extend(_flatten(v, key + "."))
        else:
            rows.append((key, v))
    return rows


def _provenance(result: AnalysisResult) -> dict:
    meta = result.meta
    return {
        "input_file": meta.path,
        "sha256": meta.sha256,
        "pixel_size_nm": meta.pixel_size_nm,
        "calibrated": meta.calibrated,
        "calibration_source": meta.calibration_source,
        "frames": meta.frames,
        "shape_px": list(meta.shape),
        "original_dtype": meta.original_dtype,
        "converted_from_rgb": meta.converted_from_rgb,
        "masked_fraction": meta.masked_fraction,
        "notes": list(meta.notes),
        "parameters": _json_safe(result.parameters),
        "versions": _versions(),
        "date_utc": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
    }


def _provenance_table(prov: dict) -> pd.DataFrame:
    rows = []
    for key, value in prov.items():
        if key == "parameters":
            rows.extend((f"parameter: {k}", v, _unit_of(k)) for k, v in _flatten(value))
        elif key == "versions":
            rows.extend((f"version: {k}", v, "") for k, v in value.items())
        else:
            rows.append((key, value, "nm" if key == "pixel_size_nm" else ("px" if key == "shape_px" else "")))
    cells = [
        (k, json.dumps(v) if isinstance(v, (list, dict)) else v, u) for k, v, u in rows
    ]
    return pd.DataFrame(cells, columns=["item", "value", "unit"])


def _unit_of(name: str) -> str:
    for suffix, unit in _UNIT_SUFFIX.items():
        if name.endswith(suffix):
            return unit
    return ""


# --------------------------------------------------------------------------------------------------------------
# tables


def _ordered_tables(result: AnalysisResult) -> dict[str, pd.DataFrame]:
    """The tables to write, schema tables first in schema order; schema columns first in each."""
    out = {}
    names = [n for n in TABLES if result.tables.get(n) is not None]
    names += [n for n in result.tables if n not in TABLES and result.tables[n] is not None]
    for name in names:
        df = result.tables[name]
        if name in TABLES:
            try:
                df = conform(df, TABLES[name])
            except KeyError:
                pass  # a stage bug; still write what is there rather than lose the run
        out[name] = df
    return out


def _units(name: str, df: pd.DataFrame) -> list[str]:
    schema = {f.name: f.unit for f in TABLES.get(name, ()) + EXTRAS.get(name, ())}
    return [schema.get(c, _unit_of(str(c))) for c in df.columns]


def _safe_stem(name: str) -> str:
    return re.sub(r"[^A-Za-z0-9_\-]+", "_", str(name)).strip("_") or "unnamed"


_CSV_SPECIAL = re.compile(r'[",\n\r]')


def _csv_field(text: str) -> str:
    """Minimal CSV quoting (RFC 4180; what pandas and the csv module write): quote only when needed."""
    return '"' + text.replace('"', '""') + '"' if _CSV_SPECIAL.search(text) else text


def _csv_column(series: pd.Series) -> list[str]:
    """The text of every field of one column, as pandas' ``to_csv`` writes it (checked in the tests)."""
    dtype = series.dtype
    if pd.api.types.is_bool_dtype(dtype) and not series.isna().any():
        return ["True" if v else "False" for v in series.to_numpy(dtype=bool).tolist()]
    if pd.api.types.is_integer_dtype(dtype) and not series.isna().any():
        return [str(v) for v in series.to_numpy(dtype=np.int64).tolist()]
    if dtype == np.float64:  # (float32 prints with its own shortest text: left to pandas)
        # repr: the shortest text that reads back to the same double, as pandas writes it; NaN as an empty field
        return [repr(v) if v == v else "" for v in series.to_numpy(dtype=np.float64).tolist()]
    if dtype == object or isinstance(dtype, pd.StringDtype):
        out = []
        for v in series.tolist():
            if v is None or v is pd.NA or (isinstance(v, float) and v != v):
                out.append("")
            elif isinstance(v, (str, bool, int, np.integer, np.bool_)):
                out.append(_csv_field(str(v)))
            elif isinstance(v, float):
                out.append(repr(v))
            else:  # anything else: leave it to pandas
                return None
        return out
    return None


def _write_csv(df: pd.DataFrame, path: Path) -> None:
    """One table as CSV, full float precision, NaN as an empty field, no index.

    Numeric and boolean columns are formatted column by column in Python (``repr`` is about ten times faster
    than the numpy conversion pandas uses and gives the same text); a table with any other column type goes
    through pandas' writer unchanged.
    """
    fields = [_csv_column(df[c]) for c in df.columns] if df.columns.is_unique else [None]
    if any(f is None for f in fields) or len(df.columns) == 0:
        df.to_csv(path, index=False, lineterminator="\n")
        return
    header = ",".join(_csv_field(str(c)) for c in df.columns)
    with open(path, "w", encoding="utf-8", newline="") as fh:
        fh.write(header + "\n")
        block = 8192
        for start in range(0, len(df), block):
            rows = zip(*(f[start:start + block] for f in fields))
            fh.write("".join(",".join(r) + "\n" for r in rows))


def _write_json(obj, path: Path) -> None:
    with open(path, "w", encoding="utf-8") as fh:
        json.dump(_json_safe(obj), fh, indent=2, allow_nan=False, ensure_ascii=False)
        fh.write("\n")


#: Columns of the summary table (workbook sheet 'summary', the viewer's Summary tab).
SUMMARY_COLUMNS = ("section", "quantity", "value", "error", "unit", "note")


def _num(v):
    return float(v) if isinstance(v, (int, float, np.integer, np.floating)) and not isinstance(v, bool) \
        and np.isfinite(v) else None


def distortion_verdict(fourier_info: dict) -> tuple[bool, float]:
    """(significant, largest element of D - identity) of a run's ``summary['fourier']``: the one verdict on the
    scan distortion that the notes, the workbook and the viewer all show (``fourier._distortion_significant``)."""
    from .fourier import _distortion_significant

    return _distortion_significant(fourier_info)


def summary_table(result: AnalysisResult) -> pd.DataFrame:
    """The headline results of a run as one tidy table: what a reader checks first, with errors and units.

    Rows, by section: 'image' (pixel size and its source, columns, motifs), 'ladder' (verdict per point set, base
    d0 and the agreement of the column and centre ladders), 'tiling' (tile counts, thick/thin ratio, edge),
    'phason' (linear phason strain: singular values with 1-sigma errors from the real-space lift and from the
    Fourier spots, and whether they agree), 'distortion' (the 2 x 2 scan-distortion matrix with its errors, the
    spot-ellipse axis ratio and whether a correction was applied), 'region N' (per-region counts and means),
    'timings' (seconds per stage, when the run recorded ``timings_s``).

    Parameters
    ----------
    result : AnalysisResult

    Returns
    -------
    DataFrame
        Columns ``section, quantity, value, error, unit, note``: ``value`` and ``error`` numbers (NaN when not
        measured or not applicable), verdicts as text in ``note``.
    """
    s = result.summary or {}
    ps = s.get("pixel_size_nm")
    unit = "nm" if ps else "px"
    f = float(ps) if ps else 1.0
    rows: list[tuple] = []

    def add(section, quantity, value=None, error=None, unit="", note=""):
        rows.append((section, quantity, _num(value), _num(error), unit, note))

    add("image", "pixel size", ps, None, "nm", f"source: {s.get('calibration_source', 'none')}")
    add("image", "columns", s.get("n_columns"))
    add("image", "motifs", s.get("n_motifs"))
    frames = s.get("frames") or {}
    if frames:
        add("frames", "frames used", frames.get("n_used"), None, "",
            f"of {frames.get('n_frames')}; {frames.get('method')} alignment to frame {frames.get('reference')}")
        drift = frames.get("drift_px_per_frame") or [None, None]
        for axis, v in zip("xy", drift):
            add("frames", f"drift per frame, {axis}", v * f if _num(v) is not None else None, None, f"{unit}/frame")
        add("frames", "shift uncertainty", frames.get("shift_sd_px") * f if _num(frames.get("shift_sd_px")) is not None
            else None, None, unit, "per shift, relative to the reference frame")
        add("frames", "residual drift (last round)", frames.get("residual_drift_px"), None, "px", "convergence")
    ladder = s.get("ladder") or {}
    for name in ("columns", "centres"):
        info = ladder.get(name)
        if not isinstance(info, dict):
            continue
        holds = info.get("holds")
        d0 = info.get("d0_px")
        unc = (info.get("uncertainty") or {}).get("d0_px") if isinstance(info.get("uncertainty"), dict) else None
        verdict = "tau ladder holds" if holds else ("tau ladder does not hold" if holds is not None else "not tested")
        add("ladder", f"{name}: base d0", d0 * f if _num(d0) is not None else None,
            unc * f if _num(unc) is not None else None, unit, verdict)
    agreement = ladder.get("agreement") or {}
    if agreement.get("compared"):
        add("ladder", "columns vs centres, largest |z|", agreement.get("max_abs_z"), None, "",
            "agree" if agreement.get("agree") else "disagree")
    tiling = s.get("tiling") or {}
    for tile, n in (tiling.get("tile_counts") or {}).items():
        if n:
            add("tiling", tile.replace("_", " "), n)
    if tiling.get("thick_thin_ratio") is not None:
        add("tiling", "thick / thin", tiling.get("thick_thin_ratio"), None, "",
            "ideal Penrose tiling: tau = 1.618")
    if tiling.get("edge_px") is not None:
        add("tiling", "edge length", tiling["edge_px"] * f, None, unit, tiling.get("edge_source", ""))
    phason = s.get("phason") or {}
    for side in ("real_space", "fourier"):
        info = phason.get(side) or {}
        label = "real space (tiling lift)" if side == "real_space" else "Fourier (spot positions)"
        if not info.get("ok"):
            add("phason", f"{label}: strain", None, None, "", info.get("reason") or "not measured")
            continue
        sv, se = info.get("singular_values") or [], info.get("singular_values_se") or []
        for k, v in enumerate(sv):
            add("phason", f"{label}: strain singular value {k + 1}", v, se[k] if k < len(se) else None, "",
                f"{info.get('n_used', 0)} used")
    if "agree" in phason:
        add("phason", "real space vs Fourier, largest |z|", phason.get("agreement_max_sigma"), None, "",
            "agree" if phason.get("agree") else "disagree")
    fourier = s.get("fourier") or {}
    if fourier:
        matrix = fourier.get("distortion_matrix")
        se = (fourier.get("indexing") or {}).get("distortion_matrix_se")
        corr = s.get("distortion_correction") or {}
        verdict = ("applied" if corr.get("applied") else "not applied") + \
            (f" (source: {fourier.get('distortion_source')})" if fourier.get("distortion_source") else "")
        if matrix is not None:
            for i in range(2):
                for j in range(2):
                    add("distortion", f"matrix D[{i + 1},{j + 1}]", matrix[i][j],
                        se[i][j] if se is not None else None, "", verdict if i == j == 0 else "")
        if matrix is not None:
            significant, dev = distortion_verdict(fourier)
            add("distortion", "largest |D - identity|", dev, None, "",
                "significant (beyond 3 standard errors)" if significant else "not significant")
        dist = fourier.get("distortion") or {}
        if dist.get("axis_ratio") is not None:
            add("distortion", "spot-ellipse axis ratio", dist["axis_ratio"], dist.get("axis_ratio_se"), "",
                "suspect scan distortion" if dist.get("warning") else "not significant")
        add("Fourier", "dominant rotational order", fourier.get("dominant_order") or None)
    for r in s.get("regions") or []:
        if not isinstance(r, dict):
            continue
        sec = f"region {r.get('region', 0)}"
        for key, value in r.items():
            if key == "region" or not isinstance(value, (int, float)) or isinstance(value, bool):
                continue
            add(sec, key.replace("_", " ").replace(" nm", ""), value, None, "nm" if key.endswith("_nm") else "")
    for stage, seconds in (s.get("timings_s") or {}).items():
        add("timings", str(stage), seconds, None, "s")
    return pd.DataFrame(rows, columns=list(SUMMARY_COLUMNS)).astype({"value": float, "error": float})


def _write_workbook(sheets: dict[str, tuple[pd.DataFrame, list[str]]], path: Path) -> None:
    """One sheet per table (row 1 names, row 2 units, data from row 3), streamed (see ``_xlsx``).

    A table longer than a worksheet holds keeps its first rows in the sheet (with a warning); its CSV has every
    row.
    """
    from ._xlsx import MAX_ROWS, write_xlsx

    fitted = {}
    for name, (df, units) in sheets.items():
        if len(df) > MAX_ROWS - 3:
            warnings.warn(f"workbook sheet {name!r}: {len(df)} rows exceed a worksheet; the sheet keeps the first "
                          f"{MAX_ROWS - 3}, {name}.csv has all", TenfoldWarning, stacklevel=3)
            df = df.iloc[: MAX_ROWS - 3]
        fitted[name] = (df, units)
    write_xlsx(path, fitted)


def read_workbook(path) -> dict[str, pd.DataFrame]:
    """Read a ``results.xlsx`` written by :func:`write_results` back into DataFrames.

    Parameters
    ----------
    path : str or path-like
        The workbook.

    Returns
    -------
    dict of str -> DataFrame
        One entry per sheet. Row 1 of each sheet gives the column names, row 2 the units (kept in
        ``df.attrs['units']`` as a name -> unit dict), data from row 3. Schema tables get their schema dtypes
        back (empty cells -> NaN for floats); object columns such as 'members' come back as strings ('' for
        empty cells).
    """
    from openpyxl import load_workbook

    path = Path(path)
    if not path.is_file():
        raise TenfoldInputError(f"{path}: no such workbook; give the results.xlsx written by write_results")
    try:
        wb = load_workbook(path, read_only=True, data_only=True)
    except Exception as exc:
        raise TenfoldInputError(f"{path}: not a readable .xlsx workbook ({type(exc).__name__}: {exc})") from None
    out = {}
    try:
        for ws in wb.worksheets:
            rows = list(ws.iter_rows(values_only=True))
            if not rows:
                out[ws.title] = pd.DataFrame()
                continue
            header = [str(h) for h in rows[0]]
            units = list(rows[1]) if len(rows) > 1 else [None] * len(header)
            data = [list(r) + [None] * (len(header) - len(r)) for r in rows[2:]]
            df = pd.DataFrame(data, columns=header, dtype=object)
            schema = {f.name: f.dtype for f in TABLES.get(ws.title, ())}
            for col in header:
                df[col] = _restore(df[col], schema.get(col))
            df.attrs["units"] = {h: (u or "") for h, u in zip(header, units)}
            out[ws.title] = df
    finally:
        wb.close()
    return out


def _restore(col: pd.Series, dtype: str | None) -> pd.Series:
    values = col.tolist()
    if dtype == "object" or (dtype is None and any(isinstance(v, str) for v in values)):
        return pd.Series(["" if v is None else str(v) for v in values], index=col.index, dtype=object)
    if dtype == "bool" or (dtype is None and values and all(isinstance(v, bool) for v in values)):
        return pd.Series([bool(v) for v in values], index=col.index, dtype=bool)
    if dtype is not None and dtype.startswith("int") and None not in values:
        return pd.Series(values, index=col.index, dtype=np.int64)
    if dtype is None and values and all(isinstance(v, int) and not isinstance(v, bool) for v in values):
        return pd.Series(values, index=col.index, dtype=np.int64)
    return pd.Series([np.nan if v is None else v for v in values], index=col.index, dtype=np.float64)


# --------------------------------------------------------------------------------------------------------------
# figures


def _load_figure_modules() -> None:
    """Add the stages' figure makers (``STAGE_FIGURES``) to ``FIGURES``."""
    for name, (mod, func) in STAGE_FIGURES.items():
        if name not in FIGURES:
            FIGURES[name] = getattr(importlib.import_module(f"{__package__}.{mod}"), func)


#: a drawn layer with more marks than this is rasterised in the SVG (a vector file of 50 000 markers is tens of MB
#: and slow to write and to open; the text, axes and sparse layers stay vector)
RASTER_ABOVE = 3000


def _rasterise_dense_layers(fig) -> int:
    """Mark every dense layer of ``fig`` (collection, marker line, or a crowd of patches) as rasterised; returns
    how many."""
    n = 0
    for ax in fig.axes:
        for coll in ax.collections:
            marks = max(len(coll.get_offsets()), len(coll.get_paths()))
            if marks > RASTER_ABOVE:
                coll.set_rasterized(True)
                n += 1
        for line in ax.lines:
            if len(line.get_xdata()) > RASTER_ABOVE:
                line.set_rasterized(True)
                n += 1
        if len(ax.patches) > RASTER_ABOVE:
            for p in ax.patches:
                p.set_rasterized(True)
            n += 1
    return n


#: PNG resolution of the written figures (dots per inch)
FIGURE_DPI = 150


def _save_figure(fig, stem: Path) -> list[Path]:
    png, svg = stem.with_suffix(".png"), stem.with_suffix(".svg")
    _render_figure(fig, png, svg)
    return [png, svg]


def _render_figure(fig, png, svg) -> None:
    """Draw ``fig`` as PNG into ``png`` and as SVG into ``svg`` (paths or binary file objects)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    FigureCanvasAgg(fig)
    _rasterise_dense_layers(fig)
    # fastest zlib level: the figure PNGs are written on every run; a third larger files, several times faster.
    # FIGURE_DPI: a 7 inch overlay of a 1k image keeps one pixel per image pixel
    fig.savefig(png, format="png", dpi=FIGURE_DPI, pil_kwargs={"compress_level": 1})
    # the layout engine placed the axes while drawing the PNG (in figure fractions, the same at any dpi); freezing
    # it spares the SVG a second pass of text measuring, a third of the figure time
    if fig.get_layout_engine() is not None:
        fig.set_layout_engine("none")
    fig.savefig(svg, format="svg")


def _species_colour(species: int) -> tuple[str, str]:
    if species < 0:
        return _UNCLASSIFIED_COLOUR, "x"
    return SPECIES_COLOURS[species % len(SPECIES_COLOURS)], SPECIES_MARKERS[species % len(SPECIES_MARKERS)]


def _species_label(species: int) -> str:
    return "unclassified" if species < 0 else f"species {species}"


@register_figure("species_histogram")
def species_histogram(result: AnalysisResult):
    """Histogram of column integrated intensities, stacked by species; None when there are no columns."""
    cols = result.tables.get("columns")
    if cols is None or cols.empty or "intensity" not in cols:
        return None
    intensity = cols["intensity"].to_numpy(dtype=np.float64)
    species = cols["species"].to_numpy(dtype=np.int64) if "species" in cols else np.full(len(cols), -1)
    ok = np.isfinite(intensity)
    if not ok.any():
        return None
    from matplotlib.figure import Figure

    # square-root rule for the bin count (common practice), bounded so sparse and huge tables both read well
    n_bins = int(np.clip(np.sqrt(ok.sum()), 10, 100))
    edges = np.histogram_bin_edges(intensity[ok], bins=n_bins)
    fig = Figure(figsize=(6.0, 4.0), layout="constrained")
    ax = fig.add_subplot()
    classes = sorted(set(species[ok].tolist()))
    data = [intensity[ok & (species == s)] for s in classes]
    # stacked steps, one artist per class (a bar per bin and class is hundreds of patches, seconds to draw)
    base = np.zeros(len(edges) - 1)
    for s, d in zip(classes, data):
        counts, _ = np.histogram(d, bins=edges)
        ax.stairs(base + counts, edges, baseline=base.copy(), fill=True, color=_species_colour(s)[0],
                  edgecolor="black", linewidth=0.4, label=f"{_species_label(s)} (n={len(d)})")
        base = base + counts
    ax.set_xlabel("integrated column intensity (counts px$^2$)")
    ax.set_ylabel("number of columns")
    ax.set_title(f"column intensities by species ({int(ok.sum())} columns)")
    ax.legend(frameon=False)
    return fig


def _nice_length(target: float) -> float:
    """Largest 1, 2 or 5 x 10^k not above ``target`` (> 0)."""
    k = math.floor(math.log10(target))
    for m in (5, 2, 1):
        if m * 10**k <= target:
            return m * 10**k
    return 10**k


#: longest side of the image drawn under an overlay; larger images are block-averaged (a 7 inch figure at 200 dpi
#: is 1400 px wide, so nothing visible is lost, and a 16k scan is not copied whole into a figure)
DISPLAY_MAX_PX = 1400


def _display_image(image) -> tuple[np.ndarray, int]:
    """The image as float64 for display, block-averaged by an integer step so that no side exceeds
    ``DISPLAY_MAX_PX``; returns (image, step). Reads a memory-mapped image block by block."""
    rows, cols = np.shape(image)
    step = max(1, math.ceil(max(rows, cols) / DISPLAY_MAX_PX))
    if step == 1:
        return np.asarray(image, dtype=np.float64), 1
    r, c = rows // step, cols // step
    out = np.empty((r, c), dtype=np.float64)
    band = max(1, 4096 // step)
    for i in range(0, r, band):  # a band of block rows at a time: bounded memory for memory-mapped images
        blk = np.asarray(image[i * step:min(i + band, r) * step, : c * step], dtype=np.float64)
        out[i:i + band] = blk.reshape(-1, step, c, step).mean(axis=(1, 3))
    return out, step


@register_figure("columns_overlay")
def columns_overlay(result: AnalysisResult):
    """The image in grey with the columns marked by species; a nm scale bar when calibrated."""
    if result.image is None:
        return None
    from matplotlib.figure import Figure
    from matplotlib.patches import Rectangle

    rows, cols_px = np.shape(result.image)
    img, step = _display_image(result.image)
    finite = img[np.isfinite(img)]
    lo, hi = (np.percentile(finite, [0.5, 99.5]) if finite.size else (0.0, 1.0))
    width_in = 7.0
    fig = Figure(figsize=(width_in, width_in * rows / cols_px + 0.6), layout="constrained")
    ax = fig.add_subplot()
    # pixel centres at integer coordinates, as in the table convention; a block-averaged image keeps pixel centres where the table puts them: block k spans k*step-0.5..(k+1)*step-0.5
    extent = (-0.5, img.shape[1] * step - 0.5, img.shape[0] * step - 0.5, -0.5)
    # grey levels looked up once, as the gray colormap would (the same pixels): matplotlib then resamples one
    # byte image instead of the float image and its mask
    from matplotlib import colormaps
    from matplotlib.colors import Normalize

    grey = colormaps["gray"](Normalize(lo, hi if hi > lo else lo + 1)(img), bytes=True)
    ax.imshow(grey, interpolation="nearest", extent=extent)
    table = result.tables.get("columns")
    n = 0
    if table is not None and not table.empty:
        species = table["species"].to_numpy(dtype=np.int64) if "species" in table else np.full(len(table), -1)
        x, y = table["x_px"].to_numpy(dtype=float), table["y_px"].to_numpy(dtype=float)
        size = max(4.0, min(30.0, 2.0e4 / max(len(table), 1)))
        for s in sorted(set(species.tolist())):
            sel = species == s
            colour, marker = _species_colour(s)
            # a marker line, not a scatter: Agg stamps one cached marker (several times faster for 50 000 points)
            ax.plot(x[sel], y[sel], linestyle="none", marker=marker, markersize=math.sqrt(size), color=colour,
                    markeredgecolor="black", markeredgewidth=0.4, label=f"{_species_label(s)} (n={int(sel.sum())})")
        n = len(table)
        ax.legend(loc="upper right", fontsize="small", framealpha=0.8)
    ax.set_xlim(-0.5, cols_px - 0.5)
    ax.set_ylim(rows - 0.5, -0.5)
    ps = result.meta.pixel_size_nm
    if ps:
        bar_nm = _nice_length(0.2 * cols_px * ps)
        bar_px = bar_nm / ps
        x0, y0 = 0.04 * cols_px, rows - 0.05 * rows
        h = max(0.012 * rows, 1.0)
        ax.add_patch(Rectangle((x0, y0 - h), bar_px, h, facecolor="white", edgecolor="black", linewidth=0.6))
        ax.text(x0 + bar_px / 2, y0 - 1.6 * h, f"{bar_nm:g} nm", color="white", ha="center", va="bottom",
                fontsize="medium", fontweight="bold",
                bbox={"facecolor": "black", "alpha": 0.5, "edgecolor": "none", "pad": 1.5})
        ax.set_xticks([])
        ax.set_yticks([])
        ax.set_title(f"{n} columns by species (pixel size {ps:.4g} nm, {result.meta.calibration_source})")
    else:
        ax.set_xlabel("x (px)")
        ax.set_ylabel("y (px)")
        ax.set_title(f"{n} columns by species, uncalibrated (px)")
    return fig


# --------------------------------------------------------------------------------------------------------------
# the writer


def write_results(
    result: AnalysisResult,
    out_dir,
    *,
    overwrite: bool = False,
    figures: bool = True,
    progress: ProgressCallback | None = None,
) -> list[Path]:
    """Write every table, curve, the summary, a workbook and the figures of one analysis into ``out_dir``.

    Parameters
    ----------
    result : AnalysisResult
        What :func:`tenfold.analysis.pipeline.run_pipeline` returned.
    out_dir : str or path-like
        Results folder. Created (with its parents); must not exist or be empty unless ``overwrite``; may not
        hold the input image or be a parent of it (symlinks resolved).
    overwrite : bool
        Replace Tenfold's own earlier results in a non-empty folder (the files in its ``.tenfold-manifest.json``
        whose checksum still matches); other files are never touched, and a file in the way that the manifest
        does not vouch for refuses the run. Old results are replaced only after the new ones are complete.
    figures : bool
        Draw the registered figures (``FIGURES``) into ``figures/`` as PNG (``FIGURE_DPI``, 150 dpi) and SVG.
    progress : callable, optional
        ``progress(fraction, message)``, called once per file; returning False cancels (raises
        :class:`Cancelled`, nothing is left behind).

    Returns
    -------
    list of Path
        Every file written, in the final folder, sorted.

    Notes
    -----
    Files: one CSV per table (``columns.csv``, ``motifs.csv``, ``ladder.csv``, ``pair_peaks.csv``,
    ``tiles.csv``, ``network.csv``, ``spots.csv``; header = schema names, no index, full float precision, NaN
    as an empty field), ``curves/<name>.csv``, ``summary.json`` (NaN -> null), ``provenance.json``,
    ``results.xlsx`` (sheets per table, 'regions', 'provenance'; row 1 names, row 2 units, data from row 3,
    numbers as numeric cells, NaN as empty cells) and ``figures/<name>.png|svg``.

    Raises
    ------
    TenfoldInputError
        ``out_dir`` is a file, or a non-empty folder and ``overwrite`` is False, holds the input image, is
        read-only, has a user's file where a result goes, or writing failed (disk full: the message names the
        folder and the cause; nothing is left half-written).
    Cancelled
        The progress callback returned False.
    """
    out = Path(out_dir).expanduser()
    inputs = [result.meta.path] if result.meta.path and Path(result.meta.path).is_absolute() else []
    _outdir.check_output_folder(out, overwrite=overwrite, inputs=inputs)
    _outdir.clean_stale(out)
    tmp = _outdir.work_folder(out)
    fresh = tmp.parent != out
    try:
        written = _write_all(result, tmp, figures=figures, progress=progress)
        rels = [p.relative_to(tmp).as_posix() for p in written]
        (_outdir.fresh_commit(tmp, out, rels) if fresh else _outdir.commit(tmp, out, rels))
    except OSError as exc:
        shutil.rmtree(tmp, ignore_errors=True)
        raise TenfoldInputError(
            f"{out}: results could not be written ({exc.strerror or exc}{f': {exc.filename}' if exc.filename else ''}); "
            "nothing was changed there; free disk space, fix the permissions or choose another folder"
        ) from exc
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return sorted(out / r for r in rels)


def _write_all(result: AnalysisResult, tmp: Path, *, figures: bool, progress) -> list[Path]:
    tables = _ordered_tables(result)
    curves = {k: v for k, v in (result.curves or {}).items() if v is not None}
    prov = _provenance(result)
    jobs: list[tuple[str, Callable[[], list[Path]]]] = []

    def job(label: str, func: Callable[[], list[Path]]) -> None:
        jobs.append((label, func))

    for name, df in tables.items():
        path = tmp / f"{_safe_stem(name)}.csv"
        job(path.name, lambda df=df, path=path: (_write_csv(df, path), [path])[1])
    if curves:
        (tmp / "curves").mkdir()
    for name, df in curves.items():
        path = tmp / "curves" / f"{_safe_stem(name)}.csv"
        job(f"curves/{path.name}", lambda df=df, path=path: (_write_csv(pd.DataFrame(df), path), [path])[1])
    job("summary.json", lambda: (_write_json(result.summary, tmp / "summary.json"), [tmp / "summary.json"])[1])
    job("provenance.json", lambda: (_write_json(prov, tmp / "provenance.json"), [tmp / "provenance.json"])[1])
    job("parameters.toml", lambda: _write_parameters(result, tmp))
    if "frames" in (result.summary or {}) and result.image is not None:
        job("aligned_mean.tif", lambda: [_write_aligned_mean(result, tmp / "aligned_mean.tif")])

    def workbook() -> list[Path]:
        sheets = {_safe_stem(name)[:31]: (df, _units(name, df)) for name, df in tables.items()
                  if name not in _SHEET_EXTRA}
        summary = summary_table(result)
        sheets = {"summary": (summary, [""] * summary.shape[1]), **sheets}
        regions = (result.summary or {}).get("regions")
        if isinstance(regions, list) and regions and all(isinstance(r, dict) for r in regions):
            # numbers only: a text value (what a mean is taken over) goes to the column's unit row instead
            rdf = pd.DataFrame([{k: (json.dumps(_json_safe(v)) if isinstance(v, (list, dict)) else v)
                                 for k, v in r.items() if not isinstance(v, str)} for r in regions])
            units = _units("regions", rdf)
            if "mean_psi_n" in rdf:
                units[list(rdf.columns).index("mean_psi_n")] = "over ring motifs and pentagons"
            sheets["regions"] = (rdf, units)
        pdf = _provenance_table(_json_safe(prov))
        sheets["provenance"] = (pdf, [""] * pdf.shape[1])
        _write_workbook(sheets, tmp / "results.xlsx")
        return [tmp / "results.xlsx"]

    job("results.xlsx", workbook)
    drawing = None
    if figures:  # helpers start drawing before the tables are written and are waited for after
        first, last, drawing = _figure_jobs(result, tmp, progress)
        jobs = [*first, *jobs, *last]

    written: list[Path] = []
    try:
        for i, (label, func) in enumerate(jobs):
            report(progress, i / len(jobs), f"writing {label}")
            written.extend(func())
    except BaseException:
        if drawing is not None:  # no helper goes on writing into a work folder about to be removed
            drawing.abort()
        raise
    report(progress, 1.0, "results written")
    return written


def _write_aligned_mean(result: AnalysisResult, path: Path) -> Path:
    """The analysed image of a frame series (the aligned mean), calibrated like the input."""
    from .io import write_tiff

    info = result.summary["frames"]
    return write_tiff(path, np.asarray(result.image, dtype=np.float32), pixel_size_nm=result.meta.pixel_size_nm,
                      description=f"Tenfold {info.get('method', '')} mean of {info.get('n_used')} of "
                                  f"{info.get('n_frames')} frames of {Path(result.meta.path).name}, in the "
                                  f"coordinates of frame {info.get('reference')}")


def _write_parameters(result: AnalysisResult, tmp: Path) -> list[Path]:
    """``parameters.toml``: the run's parameters as set (automatic ones as "auto"), to repeat the run.

    Only for results whose ``parameters`` are a full ``Parameters`` record (every pipeline run); a result put
    together by hand with other keys has nothing a re-run could use, so no file is written for it.
    """
    import dataclasses

    from ._params_file import PARAMETERS_FILE, parameters_to_toml
    from .parameters import Parameters

    if set(result.parameters or {}) != {f.name for f in dataclasses.fields(Parameters)}:
        return []
    path = tmp / PARAMETERS_FILE
    path.write_text(parameters_to_toml(result.parameters), encoding="utf-8")
    return [path]


#: draw the figures in forked helper processes while this one writes the tables (Linux, and only when the caller
#: runs a single Python thread, as the command line does: forking a process with running threads, such as a GUI,
#: is not safe). The helpers write into the same work folder, so the results stay all-or-nothing; a figure no
#: helper reports drawn (a helper failed in any way) is drawn here instead.
BACKGROUND_FIGURES = True

#: seconds to wait for the helpers before drawing their figures here instead
_BACKGROUND_TIMEOUT_S = 600.0

#: about the seconds each figure takes (made, PNG and SVG) on the 1024^2 image of benchmarks/bench_pipeline.py:
#: the helpers draw from one queue, costly figures first, so they finish together; a figure not listed counts as
#: _OTHER_FIGURE_S
_FIGURE_SECONDS = {"column_diffraction": 0.75, "phason_map": 0.6, "columns_overlay": 0.6, "power_spectrum": 0.5,
                   "pair_distribution_ladder": 0.45, "species_histogram": 0.2, "cluster_network": 0.15}
_OTHER_FIGURE_S = 0.3

#: the figure service takes a result through a pipe, image included, up to this size; a larger image goes to a
#: helper forked when the figures are due, which shares this process's memory instead of copying it
_SERVICE_MAX_IMAGE_BYTES = 256 * 2**20

#: the running figure service (see :func:`figure_service`), or None
_SERVICE: _FigureService | None = None


def _figure_jobs(result: AnalysisResult, tmp: Path, progress):
    """Jobs that draw every registered figure into ``tmp/figures``: (first, last, drawing). ``first`` hands the
    figures to helper processes and runs before the tables are written, ``last`` draws or collects them after;
    ``drawing`` (or None) is to be aborted if the export fails in between."""
    _load_figure_modules()
    makers = sorted(FIGURES.items(), key=lambda item: -_FIGURE_SECONDS.get(item[0], _OTHER_FIGURE_S))
    service = _SERVICE
    if makers and service is not None and service.takes(result):
        drawing = _FigureDrawing(result, makers, tmp, progress)
        return ([("figures (helper processes)", lambda: drawing.send_to(service))],
                [("figures (helper processes)", drawing.collect)], drawing)
    if not (BACKGROUND_FIGURES and len(makers) >= 2 and _fork_is_safe()):
        return [], [(f"figures/{name}", lambda name=name, maker=maker: _figure_job(result, name, maker, tmp))
                    for name, maker in makers], None
    import matplotlib.figure  # noqa: F401  imported before the fork, so the helper does not import it again

    drawing = _FigureDrawing(result, makers, tmp, progress)
    return ([("figures (helper process)", drawing.fork_helper)],
            [("figures", drawing.draw_here), ("figures (helper process)", drawing.collect)], drawing)


def _fork_is_safe() -> bool:
    import sys
    import threading

    return sys.platform.startswith("linux") and threading.active_count() == 1


def _fork_process(body: Callable[[], dict], *, close: tuple[int, ...] = (), group: bool = False) -> dict:
    """Fork a process that runs ``body()`` and sends its JSON-safe answer back through a pipe, then leaves without
    clean-up; returns the state :func:`_wait_for` and :func:`_end_process` take. ``close``: descriptors the child
    closes first; ``group``: the child leads a process group of its own (and its own helpers), so a kill reaches
    them all and the terminal's Ctrl-C does not (this process ends it)."""
    import os

    read_fd, write_fd = os.pipe()
    pid = os.fork()
    if pid == 0:
        code = 1
        try:
            os.close(read_fd)
            for fd in close:
                os.close(fd)
            if group:
                os.setpgid(0, 0)
            msg = json.dumps(body())
            with os.fdopen(write_fd, "w", encoding="utf-8") as f:
                f.write(msg)
            code = 0
        finally:
            os._exit(code)
    os.close(write_fd)
    if group:
        try:  # set on both sides, so a kill right after the fork reaches the group
            os.setpgid(pid, pid)
        except OSError:
            pass
    return {"pid": pid, "fd": read_fd, "group": group}


def _end_process(state: dict, kill: bool) -> int | None:
    """Reap a process of :func:`_fork_process` once (killing it, and its group, first when ``kill``) and close its
    pipe; its exit status, or None when it was reaped already."""
    import os
    import signal

    pid, fd = state.pop("pid", None), state.pop("fd", None)
    if fd is not None:
        os.close(fd)
    if pid is None:
        return None
    if kill:
        try:
            (os.killpg if state.get("group") else os.kill)(pid, signal.SIGKILL)
        except ProcessLookupError:
            pass
    return os.waitpid(pid, 0)[1]


def _wait_for(state: dict, progress) -> dict | None:
    """The answer of a process of :func:`_fork_process` (reporting progress while waiting, so a cancel kills it),
    reaped; None when it failed or took longer than ``_BACKGROUND_TIMEOUT_S``."""
    import os
    import select
    import time

    if "pid" not in state:
        return None
    chunks, t0, done = [], time.monotonic(), False
    try:
        while not done and time.monotonic() - t0 < _BACKGROUND_TIMEOUT_S:
            report(progress, 0.99, "waiting for the figures drawn by the helper process")
            if select.select([state["fd"]], [], [], 0.1)[0]:
                data = os.read(state["fd"], 1 << 16)
                chunks.append(data)
                done = not data
    except BaseException:  # cancelled or interrupted: stop the process, then pass the reason on
        _end_process(state, True)
        raise
    status = _end_process(state, not done)
    try:
        return json.loads(b"".join(chunks).decode("utf-8")) if done and status == 0 else None
    except ValueError:
        return None


def _figure_queue(n: int) -> int:
    """A pipe holding the numbers 0 .. n-1 (two bytes each), read end returned: processes sharing it take the next
    figure with one two-byte read each, which the pipe hands out whole and once."""
    import os

    if n > 16384:  # the numbers must fit the pipe's buffer, or writing them would block
        raise ValueError(f"{n} figures are too many for one queue")
    read_fd, write_fd = os.pipe()
    os.write(write_fd, b"".join(k.to_bytes(2, "little") for k in range(n)))
    os.close(write_fd)
    return read_fd


def _draw_from_queue(jobs: list, tmp: Path, queue: int, *, capture: bool) -> dict:
    """Draw the figures (result, name, maker) of ``jobs`` whose numbers this process takes from ``queue`` until it
    is empty: {'paths', 'drawn', 'warnings'}; ``capture`` records the TenfoldWarnings (for another process to
    repeat) instead of raising them."""
    import os

    paths, drawn = [], []
    with warnings.catch_warnings(record=capture) as caught:
        if capture:
            warnings.simplefilter("always", TenfoldWarning)
        while len(ticket := os.read(queue, 2)) == 2:
            result, name, maker = jobs[int.from_bytes(ticket, "little")]
            paths.extend(str(p) for p in _figure_job(result, name, maker, tmp))
            drawn.append(name)
    said = [str(w.message) for w in caught or () if issubclass(w.category, TenfoldWarning)]
    return {"paths": paths, "drawn": drawn, "warnings": said}


class _FigureDrawing:
    """The figures of one export, drawn by helper processes from one queue: a helper forked now
    (:meth:`fork_helper`, with this process taking figures from the queue too, :meth:`draw_here`) or the figure
    service (:meth:`send_to`). :meth:`collect` waits for the helpers and draws here whatever they did not report
    drawn."""

    def __init__(self, result: AnalysisResult, makers: list, tmp: Path, progress) -> None:
        self.result, self.makers, self.tmp, self.progress = result, makers, tmp, progress
        self.state: dict = {}
        self.queue: int | None = None
        self.drawn: set[str] = set()

    def fork_helper(self) -> list[Path]:
        import weakref

        (self.tmp / "figures").mkdir(exist_ok=True)
        self.queue = _figure_queue(len(self.makers))
        jobs = [(self.result, name, maker) for name, maker in self.makers]
        self.state = _fork_process(lambda: _draw_from_queue(jobs, self.tmp, self.queue, capture=True))
        weakref.finalize(self, _end_process, self.state, True)  # never left running if the run stops early
        return []

    def send_to(self, service: _FigureService) -> list[Path]:
        (self.tmp / "figures").mkdir(exist_ok=True)
        self.state = service.state  # from now on this export's to wait for, or to abort
        service.submit((self.result, self.makers, self.tmp), self.progress)
        return []

    def draw_here(self) -> list[Path]:
        got = _draw_from_queue([(self.result, name, maker) for name, maker in self.makers], self.tmp, self.queue,
                               capture=False)
        self.drawn.update(got["drawn"])
        return [Path(p) for p in got["paths"]]

    def collect(self) -> list[Path]:
        got = _wait_for(self.state, self.progress) or {}
        self._close_queue()
        for msg in got.get("warnings", ()):
            warnings.warn(msg, TenfoldWarning, stacklevel=2)
        self.drawn.update(got.get("drawn", ()))
        paths = [Path(p) for p in got.get("paths", ())]
        for name, maker in self.makers:  # what a failed helper left undone
            if name not in self.drawn:
                paths.extend(_figure_job(self.result, name, maker, self.tmp))
        return paths

    def abort(self) -> None:
        """Stop the helpers (the export failed or was cancelled)."""
        _end_process(self.state, True)
        self._close_queue()

    def _close_queue(self) -> None:
        import os

        if self.queue is not None:
            os.close(self.queue)
            self.queue = None


def _warm_up() -> None:
    """Import matplotlib and the figure makers and draw one small figure of each kind of mark (loads fonts and
    fills caches), so the first real figure costs no more than the others."""
    import io

    from matplotlib.backends import backend_svg  # noqa: F401
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    _load_figure_modules()
    fig = Figure(figsize=(2.0, 2.0), layout="constrained")
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    ax.imshow(np.zeros((4, 4)), cmap="gray")
    ax.plot([0, 1], [0, 1], marker="o", label="a")
    ax.scatter([0, 1], [1, 0], s=4)
    ax.set(title="t", xlabel="x ($px^2$)", ylabel="y")
    ax.legend(fontsize="small")
    fig.colorbar(ax.images[0], ax=ax)
    fig.savefig(io.BytesIO(), format="png", dpi=FIGURE_DPI)
    fig.set_layout_engine("none")
    fig.savefig(io.BytesIO(), format="svg")


#: figures whose inputs are final once a stage is done (the pipeline's ``stage_done`` names): the figure service
#: draws them while the analysis goes on
EARLY_FIGURES = {"columns": ("columns_overlay", "species_histogram"), "ladder": ("pair_distribution_ladder",),
                 "tiling": ("cluster_network",), "phason": ("phason_map",),
                 "fourier": ("power_spectrum", "column_diffraction")}


def _message(obj) -> bytes:
    """``obj`` pickled, after its length (8 bytes): one message for :func:`_read_message`."""
    import pickle

    body = pickle.dumps(obj, protocol=pickle.HIGHEST_PROTOCOL)
    return len(body).to_bytes(8, "little") + body


def _read_message(fd: int):
    """The next object a :func:`_message` written to ``fd`` holds; None at the end of the pipe."""
    import os
    import pickle

    def exactly(n: int) -> bytes | None:
        chunks = []
        while n and (chunk := os.read(fd, min(n, 1 << 20))):
            chunks.append(chunk)
            n -= len(chunk)
        return None if n else b"".join(chunks)

    head = exactly(8)
    body = exactly(int.from_bytes(head, "little")) if head else None
    return None if body is None else pickle.loads(body)


def _serve(job_fd: int) -> dict:
    """The figure service's life (in its own process): warm up; as ('early', result so far, makers) messages
    arrive on ``job_fd``, draw those figures into memory one by one, taking every message waiting before the
    next figure; on the ('final', result, makers, work folder) message write the ones drawn and draw the rest
    (the early ones not reached yet with the result they were told with) together with one more forked helper
    from one queue, costly figures first; answer what was drawn."""
    import io
    import os
    import select

    _warm_up()
    early: dict[str, dict] = {}  # name -> {'.png': bytes, '.svg': bytes} (empty: the figure does not apply)
    told: list[tuple] = []  # (result, name, maker) not drawn yet
    said: list[str] = []
    final = None
    while final is None:
        if not told or select.select([job_fd], [], [], 0)[0]:
            msg = _read_message(job_fd)  # waits when there is nothing to draw
            if msg is None:  # the run ended without figures
                return {}
            if msg[0] == "final":
                final = msg
            else:
                told += [(msg[1], name, maker) for name, maker in msg[2]]
            continue
        result, name, maker = told.pop(0)
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", TenfoldWarning)
            fig = _make_figure(result, name, maker)
            files = {".png": io.BytesIO(), ".svg": io.BytesIO()} if fig is not None else {}
            if fig is not None:
                _render_figure(fig, files[".png"], files[".svg"])
            early[name] = {suffix: f.getvalue() for suffix, f in files.items()}
        said += [str(w.message) for w in caught if issubclass(w.category, TenfoldWarning)]
    os.close(job_fd)
    _, result, makers, tmp = final
    wanted = {name for name, _maker in makers}
    paths, drawn = [], []
    for name, files in early.items():
        if name in wanted:
            for suffix, data in files.items():
                path = (tmp / "figures" / _safe_stem(name)).with_suffix(suffix)
                path.write_bytes(data)
                paths.append(str(path))
            drawn.append(name)
    pending = [job for job in told if job[1] in wanted]
    pending += [(result, name, maker) for name, maker in makers
                if name not in early and name not in {job[1] for job in told}]
    pending.sort(key=lambda job: -_FIGURE_SECONDS.get(job[1], _OTHER_FIGURE_S))
    queue = _figure_queue(len(pending))
    other = _fork_process(lambda: _draw_from_queue(pending, tmp, queue, capture=True))
    mine = _draw_from_queue(pending, tmp, queue, capture=True)
    got = _wait_for(other, None) or {}
    return {"paths": paths + mine["paths"] + got.get("paths", []), "drawn": drawn + mine["drawn"] +
            got.get("drawn", []), "warnings": said + mine["warnings"] + got.get("warnings", [])}


class _FigureService:
    """A process forked early in a command-line run that imports matplotlib and the figure makers while the
    analysis runs in this one, draws the figures whose data are final while the analysis goes on
    (:meth:`stage_done`), then draws the rest of the finished result (see :func:`figure_service`).

    Messages go to it through a pipe, written by a thread of this process so that the analysis never waits for
    the service to read: it may be busy drawing."""

    def __init__(self) -> None:
        import os
        import queue

        # the stages' modules (the figure makers' homes) are imported here first, where the analysis needs them
        # anyway: the service then shares them and imports matplotlib only
        _load_figure_modules()
        job_read, job_write = os.pipe()
        self.state = _fork_process(lambda: _serve(job_read), close=(job_write,), group=True)
        os.close(job_read)
        self.job_fd: int | None = job_write
        self.outbox: queue.SimpleQueue = queue.SimpleQueue()
        self.sender = None
        self.final_sent = False

    def takes(self, result: AnalysisResult) -> bool:
        """Whether this service can still take ``result``'s figures (once, and not for a huge image)."""
        return not self.final_sent and "pid" in self.state and _small_enough(result)

    def stage_done(self, stage: str, result: AnalysisResult) -> None:
        """Hand the figures of ``EARLY_FIGURES[stage]`` to the service, with ``result`` as it is now; for
        ``run_pipeline(stage_done=...)``."""
        names = EARLY_FIGURES.get(stage, ())
        if not (names and self.takes(result)):
            return
        _load_figure_modules()
        try:
            self._post(_message(("early", result, [(name, FIGURES[name]) for name in names if name in FIGURES])))
        except Exception:  # not picklable: nothing is sent, and these figures are drawn with the rest
            pass

    def submit(self, job: tuple, progress) -> None:
        """Send the final ``job`` (result, makers, work folder) and wait until it is written. A job that cannot be
        pickled, or a service that died, leaves the service without it: it answers nothing drawn, and the
        caller draws the figures."""
        import time

        self.final_sent = True
        try:
            self._post(_message(("final", *job)))
        except Exception:
            pass
        self._post(None)  # the end of the messages: the sender closes the pipe
        t0 = time.monotonic()
        while self.sender.is_alive() and time.monotonic() - t0 < _BACKGROUND_TIMEOUT_S:
            report(progress, 0.0, "waiting for the figure process to take the results")
            self.sender.join(0.1)

    def _post(self, data: bytes | None) -> None:
        import threading

        if self.sender is None:
            self.sender = threading.Thread(target=self._send_all, name="tenfold-figure-messages", daemon=True)
            self.sender.start()
        self.outbox.put(data)

    def _send_all(self) -> None:
        """The sender thread: write the posted messages in order until None; on a broken pipe (the service died)
        the rest are dropped."""
        import os

        fd = self.job_fd
        try:
            while (data := self.outbox.get()) is not None:
                view = memoryview(data)
                while view:
                    view = view[os.write(fd, view[: 1 << 20]):]
        except OSError:
            pass
        finally:
            self.job_fd = None
            os.close(fd)

    def close(self) -> None:
        """End the service (killing it if it still runs) and reap it; the sender thread ends with it."""
        import os

        _end_process(self.state, True)
        if self.sender is not None:
            self.outbox.put(None)
            self.sender.join(5.0)
        elif self.job_fd is not None:
            os.close(self.job_fd)
            self.job_fd = None


def _small_enough(result: AnalysisResult) -> bool:
    return result.image is None or np.asarray(result.image).nbytes <= _SERVICE_MAX_IMAGE_BYTES


@contextmanager
def figure_service(enabled: bool = True):
    """Start the figure service for the duration of a ``with`` block: :func:`write_results` then hands the
    figures of one result to it instead of importing matplotlib and drawing them itself.

    The service is a forked process (Linux, and only while this process runs a single Python thread; the
    stages' modules are imported here first, so it shares them) that imports matplotlib and draws a small
    figure while the analysis runs here. Passed as ``run_pipeline(stage_done=service.stage_done)``, it draws
    the figures of ``EARLY_FIGURES`` as soon as their stage is done, on the second core while the analysis goes
    on; with the final result it writes them into the results' work folder and draws the rest together with one
    more forked helper, from one queue, while this process writes the tables. Nothing is started when
    ``enabled`` is False, fork is not safe, or a service already runs; the block then runs without one, and
    figures are drawn as usual.

    Parameters
    ----------
    enabled : bool, default True
        False: start nothing (e.g. ``--no-figures``).

    Yields
    ------
    object or None
        The service, or None when none was started.
    """
    global _SERVICE
    if not (enabled and BACKGROUND_FIGURES and _SERVICE is None and _fork_is_safe()):
        yield None
        return
    service = _SERVICE = _FigureService()
    try:
        yield service
    finally:
        _SERVICE = None
        service.close()


def _make_figure(result: AnalysisResult, name: str, maker):
    """``maker(result)``: a Figure, or None when it does not apply or failed (with a warning)."""
    try:
        return maker(result)
    except (Cancelled, KeyboardInterrupt):
        raise
    except Exception as exc:  # one broken figure must not lose the tables
        warnings.warn(f"figure {name!r} could not be drawn ({type(exc).__name__}: {exc}); other files are written",
                      TenfoldWarning, stacklevel=5)
        return None


def _figure_job(result: AnalysisResult, name: str, maker, tmp: Path) -> list[Path]:
    fig = _make_figure(result, name, maker)
    if fig is None:
        return []
    (tmp / "figures").mkdir(exist_ok=True)
    return _save_figure(fig, tmp / "figures" / _safe_stem(name))
