"""The tables that pass between pipeline stages, defined once.

Every stage takes a pandas DataFrame and returns a new one with more columns. The names, dtypes and units of
those tables live here and nowhere else; the docs (``docs/data_model.md``) are generated from the same
definitions, and the tests check that every stage returns exactly these columns (plus any extras listed).

Conventions
-----------
* Pixel (row 0, col 0) has its centre at x = 0, y = 0. x runs along image columns (to the right), y along rows
  (downwards). Angles are measured with ``atan2(dy, dx)`` in this frame (y down), in degrees.
* ``*_px`` columns are always filled. ``*_nm`` columns are ``px * pixel_size_nm`` and are NaN when the image is
  uncalibrated; the summary then says ``"calibrated": false``.
* ``region`` is the integer label of the user region a row belongs to (0 = whole image / no region given).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from ._lengths import LENGTHS

__all__ = [
    "Field",
    "COLUMNS",
    "MOTIFS",
    "LADDER",
    "PEAKS",
    "TILES",
    "NETWORK",
    "SPOTS",
    "PHASON_MAP",
    "TABLES",
    "EXTRAS",
    "SUMMARY_KEYS",
    "FRAMES",
    "empty_table",
    "conform",
]


@dataclass(frozen=True)
class Field:
    """One column of a table: name, numpy dtype string, unit ("" if none) and a one-line description."""

    name: str
    dtype: str
    unit: str
    doc: str


def _fields(*rows: tuple[str, str, str, str]) -> tuple[Field, ...]:
    return tuple(Field(*r) for r in rows)


#: One row per atomic column (stage: columns -> refine -> species).
COLUMNS = _fields(
    ("id", "int64", "", "column id, unique within one analysis, stable across later stages"),
    ("x_px", "float64", "px", "refined x position (along image columns)"),
    ("y_px", "float64", "px", "refined y position (along image rows)"),
    ("x_nm", "float64", "nm", "x_px * pixel size; NaN when uncalibrated"),
    ("y_nm", "float64", "nm", "y_px * pixel size; NaN when uncalibrated"),
    ("sigma_px", "float64", "px", "Gaussian standard deviation of the column image"),
    ("sigma_nm", "float64", "nm", "sigma_px * pixel size; NaN when uncalibrated"),
    ("amplitude", "float64", "image units", "peak height of the Gaussian above local background (counts for raw-count images)"),
    ("background", "float64", "image units", "local constant background under the column (counts for raw-count images)"),
    ("intensity", "float64", "image units px^2", "integrated intensity 2 pi amplitude sigma_px^2 (counts px^2 for raw counts)"),
    ("residual", "float64", "", "RMS fit residual divided by amplitude (0 = perfect Gaussian)"),
    ("pos_err_px", "float64", "px", "1-sigma position uncertainty from the fit covariance (per axis, mean of x and y)"),
    ("pos_err_nm", "float64", "nm", "pos_err_px * pixel size; NaN when uncalibrated"),
    ("fit_status", "object", "", "'ok', or why the fit failed ('diverged', 'edge', 'masked', ...): then fit columns are NaN"),
    ("species", "int64", "", "intensity class, 0 = dimmest; -1 when not classified"),
    ("species_prob", "float64", "", "posterior probability of the assigned species"),
    ("region", "int64", "", "region label (0 = whole image)"),
)

#: One row per motif (ring or pentagon).
MOTIFS = _fields(
    ("motif_id", "int64", "", "motif id"),
    ("kind", "object", "", "'ring10' (ring of order n: 'ring<n>') or 'pentagon'"),
    ("order", "int64", "", "number of vertices n of the ideal motif"),
    ("centre_x_px", "float64", "px", "motif centre x"),
    ("centre_y_px", "float64", "px", "motif centre y"),
    ("centre_x_nm", "float64", "nm", "motif centre x; NaN when uncalibrated"),
    ("centre_y_nm", "float64", "nm", "motif centre y; NaN when uncalibrated"),
    ("radius_px", "float64", "px", "mean distance of members from the centre"),
    ("radius_nm", "float64", "nm", "radius; NaN when uncalibrated"),
    ("radial_rms_px", "float64", "px", "RMS spread of member distances about the radius"),
    ("radial_rms_nm", "float64", "nm", "radial RMS spread; NaN when uncalibrated"),
    ("psi_n", "float64", "", "|psi_n| n-fold bond-orientational order of members about the centre (1 = ideal)"),
    ("orientation_deg", "float64", "deg", "arg(psi_n)/n in the image frame (atan2, y down), in [0, 360/n)"),
    ("edge_px", "float64", "px", "mean edge length between neighbouring members"),
    ("edge_nm", "float64", "nm", "mean edge length; NaN when uncalibrated"),
    ("diag_edge_ratio", "float64", "", "pentagon: mean diagonal / mean edge (tau ideal); ring: radius / edge"),
    ("n_members", "int64", "", "number of member columns found"),
    ("members", "object", "", "member column ids, space-separated, in angular order"),
    ("centre_content", "object", "", "'column', 'group' (several columns near the centre) or 'empty'"),
    ("centre_ids", "object", "", "ids of the columns at the centre, space-separated ('' if none)"),
    ("species_makeup", "object", "", "member species counts, e.g. '0:5 1:5'"),
    ("completeness", "float64", "", "n_members / order"),
    ("complete", "bool", "", "True when all n members were found; False marks an 'incomplete' motif (vacancies)"),
    ("score", "float64", "", "quality score in [0, 1] combining radial spread, |psi_n| and completeness"),
    ("overlaps", "int64", "", "number of other motifs of the same kind sharing at least one member"),
    ("parent_ring", "int64", "", "for pentagons inside a ring: that ring's motif_id; -1 otherwise"),
    ("region", "int64", "", "region label"),
    ("species", "int64", "", "the members' common species class (one odd member allowed: a classification slip); -1 when "
                            "they are of mixed (or unclassified) species"),
    ("half", "object", "", "pentagons inside a ten-membered ring: 'brighter' or 'dimmer' half of the parent ring "
                           "(by mean species class, then mean intensity); '' otherwise"),
    ("flip_state", "object", "", "five-fold motifs: 'up' when the vertices point along the tiling edge vectors "
                                 "(summary motifs.flip_reference), 'down' when turned by 36 deg; '' otherwise"),
    ("shell_radius_px", "float64", "px", "radius of the shell the motif was searched in (every significant shell "
                                         "of the radius scan is reported)"),
    ("primary", "bool", "", "True for the default cluster shell (rule in summary motifs.shell_rule); the network "
                            "and the centre ladder use these"),
)

#: One row per matched ladder rung (file DIR/ladder.csv).
LADDER = _fields(
    ("set", "object", "", "'columns' or 'centres': which point set the pair distances come from"),
    ("rung", "float64", "", "ladder exponent n in d0 * tau^n (half-integers on the half-step ladder)"),
    ("ideal_ratio", "float64", "", "tau^n"),
    ("ideal_px", "float64", "px", "d0 * tau^n"),
    ("ideal_nm", "float64", "nm", "d0 * tau^n; NaN when uncalibrated"),
    ("measured_px", "float64", "px", "located peak position"),
    ("measured_nm", "float64", "nm", "located peak position; NaN when uncalibrated"),
    ("ratio", "float64", "", "measured / d0"),
    ("deviation_pct", "float64", "%", "100 * (ratio / ideal_ratio - 1)"),
    ("uncertainty_pct", "float64", "%", "1-sigma uncertainty of the ratio, in percent of the ideal ratio "
                                        "(block bootstrap and estimator spread, docs/structure.md)"),
    ("peak_weight", "float64", "", "share of pair-distance weight in this peak"),
    ("position_uncertainty_pct", "float64", "%", "1-sigma uncertainty of measured_px in percent: block bootstrap, "
                                                 "estimator spread (docs/structure.md)"),
    ("expanded_uncertainty_pct", "float64", "%", "2 x position_uncertainty_pct: expanded uncertainty with coverage "
                                                 "factor k = 2 (about 95 %; JCGM 100:2008, section 6)"),
    ("estimator_spread_pct", "float64", "%", "systematic allowance for the peak estimator: half the fit-vs-window-"
                                             "mean difference and the excess width over the narrowest peaks "
                                             "(unresolved distances), in quadrature; part of both uncertainties"),
)

#: One row per located pair-distribution peak, on or off the ladder (file DIR/pair_peaks.csv).
PEAKS = _fields(
    ("set", "object", "", "'columns' or 'centres'"),
    ("distance_px", "float64", "px", "peak position"),
    ("distance_nm", "float64", "nm", "peak position; NaN when uncalibrated"),
    ("ratio_to_d0", "float64", "", "peak position / d0"),
    ("on_ladder", "bool", "", "True when matched to a rung"),
    ("rung", "float64", "", "matched rung exponent, NaN when off-ladder"),
    ("label", "object", "", "e.g. 'tau^1', or a known decagonal distance such as '2 sin 36', or 'unassigned'"),
    ("height", "float64", "", "peak height of the normalised pair distribution"),
    ("width_px", "float64", "px", "peak standard deviation"),
    ("peak_weight", "float64", "", "share of pair-distance weight in this peak"),
    ("position_sd_px", "float64", "px", "1-sigma position uncertainty: width / sqrt(pairs), a 0.2 % floor and the excess width "
                                       "of a peak holding unresolved distances, in quadrature"),
)

#: One row per tile type (file DIR/tiles.csv).
TILES = _fields(
    ("tile", "object", "", "'thick_rhombus', 'thin_rhombus', 'pentagon', 'star', 'boat', 'hexagon', 'other'"),
    ("count", "int64", "", "number of faces of this type"),
    ("fraction", "float64", "", "count / number of classified faces"),
    ("region", "int64", "", "region label"),
)

#: One row per edge of the cluster network (file DIR/network.csv).
NETWORK = _fields(
    ("edge_id", "int64", "", "edge id"),
    ("motif_a", "int64", "", "motif_id of one end"),
    ("motif_b", "int64", "", "motif_id of the other end"),
    ("length_px", "float64", "px", "edge length"),
    ("length_nm", "float64", "nm", "edge length; NaN when uncalibrated"),
    ("angle_deg", "float64", "deg", "edge direction atan2(dy, dx), y down, in [0, 180)"),
    ("tile_left", "object", "", "type of the face on one side of the edge ('outer' for the outer face)"),
    ("tile_right", "object", "", "type of the face on the other side ('outer' for the outer face)"),
    ("region", "int64", "", "region label"),
)

#: One row per Fourier spot (file DIR/spots.csv).
SPOTS = _fields(
    ("spot_id", "int64", "", "spot id"),
    ("kx_per_px", "float64", "1/px", "spatial frequency along x"),
    ("ky_per_px", "float64", "1/px", "spatial frequency along y"),
    ("k_per_nm", "float64", "1/nm", "|k|; NaN when uncalibrated"),
    ("d_nm", "float64", "nm", "lattice-plane spacing 1/|k|; NaN when uncalibrated"),
    ("d_px", "float64", "px", "1/|k| in pixels"),
    ("angle_deg", "float64", "deg", "direction of k, atan2(ky, kx), y down"),
    ("strength", "float64", "", "peak power over local background"),
    ("shell", "int64", "", "index of the |k| shell the spot belongs to (0 = innermost strong shell)"),
    ("h1", "int64", "", "decagonal index on a*_1 (basis a*_j at orientation + 72 j deg; a*_0 = -(a*_1+..+a*_4)); 0 when not indexed"),
    ("h2", "int64", "", "decagonal index on a*_2"),
    ("h3", "int64", "", "decagonal index on a*_3"),
    ("h4", "int64", "", "decagonal index on a*_4"),
    ("indexed", "bool", "", "the spot was given decagonal indices"),
    ("index_error", "float64", "", "|k - k_fit| / |k| of the indexed spot; NaN when not indexed"),
    ("g_par_nm_inv", "float64", "1/nm", "|g_par| of the index (a* |sum h_j e_j|); NaN when uncalibrated or not indexed"),
    ("g_perp_nm_inv", "float64", "1/nm", "|g_perp| of the index (a* |sum h_j e_perp_j|, e_perp_j at 144 j deg); NaN when uncalibrated or not indexed"),
    ("g_perp_rel", "float64", "", "|g_perp| / a* (dimensionless); NaN when not indexed"),
)

#: One row per lifted tiling vertex (file DIR/phason_map.csv): the real-space phason analysis.
PHASON_MAP = _fields(
    ("motif_id", "int64", "", "cluster (ring or pentagon) the vertex is"),
    ("x_px", "float64", "px", "vertex position x (corrected frame when the distortion was corrected)"),
    ("y_px", "float64", "px", "vertex position y"),
    ("x_nm", "float64", "nm", "x; NaN when uncalibrated"),
    ("y_nm", "float64", "nm", "y; NaN when uncalibrated"),
    ("k0", "int64", "", "integer coordinate along e_0 (edge direction at the tiling orientation)"),
    ("k1", "int64", "", "integer coordinate along e_1 (orientation + 72 deg)"),
    ("k2", "int64", "", "integer coordinate along e_2 (orientation + 144 deg)"),
    ("k3", "int64", "", "integer coordinate along e_3 (orientation + 216 deg)"),
    ("k4", "int64", "", "integer coordinate along e_4 (orientation + 288 deg)"),
    ("x_perp", "float64", "L", "perpendicular-space position sum_j k_j e_perp_j, x component, in edge lengths"),
    ("y_perp", "float64", "L", "perpendicular-space position, y component, in edge lengths"),
    ("dx_perp", "float64", "L", "local phason field: x_perp minus the fitted linear strain, in edge lengths"),
    ("dy_perp", "float64", "L", "local phason field, y component"),
    ("flip", "bool", "", "residual outside the acceptance window of the ideal tiling (phason-flip site)"),
    ("phason_ux", "float64", "L", "local phason displacement: Gaussian (2 L) average of dx_perp over nearby non-flip vertices"),
    ("phason_uy", "float64", "L", "local phason displacement, y component"),
)

#: Further columns a stage writes after the contract columns (documented, with units; not a contract).
EXTRAS: dict[str, tuple[Field, ...]] = {
    "columns": _fields(
        ("x_err_px", "float64", "px", "1-sigma uncertainty of x_px from the fit covariance"),
        ("y_err_px", "float64", "px", "1-sigma uncertainty of y_px from the fit covariance"),
        ("amplitude_err", "float64", "image units", "1-sigma uncertainty of amplitude from the fit covariance"),
        ("snr", "float64", "", "detection significance in standard errors, after subtracting the neighbours' light"),
    ),
}

TABLES: dict[str, tuple[Field, ...]] = {
    "columns": COLUMNS,
    "motifs": MOTIFS,
    "ladder": LADDER,
    "pair_peaks": PEAKS,
    "tiles": TILES,
    "network": NETWORK,
    "spots": SPOTS,
    "phason_map": PHASON_MAP,
}


#: A frame series' shifts (``frames.csv``, workbook sheet ``frames``): written only when a stack's frames were
#: aligned (``--frames A:B``), so it is not one of the tables every run writes.
FRAMES = _fields(
    ("frame", "int64", "", "frame index in the file"),
    ("shift_x_px", "float64", "px", "specimen displacement in this frame relative to the reference frame, x "
                                    "(frame(x) = reference(x - shift)); NaN for a blank frame"),
    ("shift_y_px", "float64", "px", "the same, y"),
    ("correlation", "float64", "", "weighted correlation coefficient with the mean of the other used frames"),
    ("used", "bool", "", "the frame is in the aligned mean"),
    ("reason", "object", "", "why a frame was left out ('' when used)"),
    ("shift_sd_px", "float64", "px", "standard deviation of each shift component relative to the reference, from "
                                     "the frames' measured noise (0 for the reference)"),
    ("wobble_rms_px", "float64", "px", "non-rigid step: RMS per-row displacement beyond the rigid shift; NaN "
                                       "without it"),
)


#: Keys of summary.json that other tools read (section -> [(key, meaning)]); sections of other stages are
#: described in their modules.
SUMMARY_KEYS: dict[str, tuple[tuple[str, str], ...]] = {
    "fourier": (
        ("dominant_order", "integer n of the strongest rotational symmetry of the spot pattern (0: none)"),
        ("distortion_matrix", "2x2, x-y order, maps measured positions to corrected ones, unit determinant; "
                              "the identity when none is found (the applied one after --correct-distortion)"),
        ("distortion_source", "'indexing', 'shell_ellipse' or 'none'"),
        ("basis_nm_inv", "decagonal reciprocal basis length a* (1/nm); null when not indexed or uncalibrated"),
        ("orientation_deg", "direction of the basis vector a*_0 (= tiling edge e_0), deg in [0, 36); null when "
                            "not indexed"),
        ("window", "'hann' or 'periodic_smooth'"),
        ("indexing", "decagonal indexing: n_indexed, tau_scale ('real_space' or 'intensity'), shear, "
                     "scale_x_over_y, distortion_matrix(_se), rms_index_error, phason (the spot fit)"),
        ("lattice", "periodic patterns: reciprocal_per_px, real_px, real_nm, lengths_px, angle_deg"),
    ),
    "phason": (
        ("real_space", "lift of the cluster tiling: strain_matrix (2x2, d x_perp / d x_par, x_perp = "
                       "L sum_j K_j e_perp_j), strain_matrix_se, singular_values (descending), "
                       "singular_values_se, n_used, n_flips, window, orientation_deg, edge_px"),
        ("fourier", "the same keys from the spot positions (k = B g_par + C g_perp), plus tau_scale and "
                    "finite_field_floor"),
        ("agreement_max_sigma", "largest |W_real - W_fourier| / combined standard error over the four elements"),
        ("agree", "agreement_max_sigma < 3"),
    ),
    "distortion_correction": (
        ("applied", "whether the column positions were mapped (only with --correct-distortion)"),
        ("matrix", "the 2x2 map applied about centre_px: r' = D (r - c) + c"),
        ("matrix_se", "its standard errors (null when from the shell ellipse)"),
        ("source", "'indexing' or 'shell_ellipse'"),
        ("significant", "the matrix differs from the identity by more than 3 standard errors"),
        ("max_shift_px", "largest position change"),
    ),
    "frames": (
        ("method", "'rigid' or 'rigid + non-rigid rows' (present only for an aligned frame series)"),
        ("reference", "file index of the frame whose coordinates every result uses"),
        ("n_frames", "frames in the range"),
        ("n_used", "frames in the aligned mean"),
        ("rejected", "file indices of the frames left out"),
        ("residual_drift_px", "largest shift change in the last registration round (convergence)"),
        ("drift_px_per_frame", "straight-line drift rate through the shifts, [x, y]"),
        ("shift_sd_px", "median shift standard deviation"),
        ("covered_fraction", "share of the field every used frame covers (the rest is masked)"),
    ),
    # how each user length was resolved to px before the stages ran (_lengths.lengths_record)
    "lengths_px": tuple(
        (name, f"{what}: value_px (the user's length in px, else the stage's choice; null when none), given "
               "('0.45 nm', '11.25 px'; null when automatic), source ('user' or 'automatic'), how (automatic only)")
        for name, what in LENGTHS.items()),
}


def empty_table(fields: tuple[Field, ...]) -> pd.DataFrame:
    """An empty DataFrame with exactly the given columns and dtypes."""
    return pd.DataFrame({f.name: pd.Series([], dtype=f.dtype) for f in fields})


def conform(df: pd.DataFrame, fields: tuple[Field, ...]) -> pd.DataFrame:
    """Return ``df`` with the schema columns first, in schema order and dtype, extras kept after them.

    Raises ``KeyError`` naming the missing columns: a stage that forgets one is a bug, not user error.
    """
    names = [f.name for f in fields]
    missing = [n for n in names if n not in df.columns]
    if missing:
        raise KeyError(f"table is missing schema columns {missing}")
    out = df[names + [c for c in df.columns if c not in names]].copy()
    for f in fields:
        if f.dtype == "object":
            continue
        if f.dtype == "bool":
            out[f.name] = out[f.name].astype(bool)
        elif f.dtype.startswith("int"):
            out[f.name] = np.asarray(out[f.name], dtype=np.int64)
        else:
            out[f.name] = np.asarray(out[f.name], dtype=np.float64)
    return out.reset_index(drop=True)


def schema_markdown() -> str:
    """The data model as Markdown (written to docs/data_model.md; a test keeps the two in step)."""
    lines = [
        "# Tenfold data model",
        "",
        "Generated from `analysis/_schema.py` by `python -m tenfold.analysis._schema > docs/data_model.md`;",
        "do not edit by hand. Stages may add further columns after these; the listed ones are a contract.",
        "",
        "Conventions: the centre of pixel (row 0, col 0) is at x = 0, y = 0; x runs along image columns, y along",
        "rows (down); nm = px * pixel size, NaN when the image is uncalibrated; angles are atan2(dy, dx) in this",
        "frame, in degrees. `region` 0 means the whole image.",
        "",
    ]
    files = {"columns": "columns.csv", "motifs": "motifs.csv", "ladder": "ladder.csv", "pair_peaks": "pair_peaks.csv",
             "tiles": "tiles.csv", "network": "network.csv", "spots": "spots.csv", "phason_map": "phason_map.csv"}
    for key, fields in TABLES.items():
        lines += [f"## {key} (`{files[key]}`, workbook sheet `{key}`)", "", "| column | dtype | unit | meaning |",
                  "| --- | --- | --- | --- |"]
        lines += [f"| `{f.name}` | {f.dtype} | {f.unit} | {f.doc} |" for f in fields]
        lines += [f"| `{f.name}` (extra) | {f.dtype} | {f.unit} | {f.doc} |" for f in EXTRAS.get(key, ())]
        lines.append("")
    lines += ["## frames (`frames.csv`, workbook sheet `frames`; only for an aligned frame series)", "",
              "| column | dtype | unit | meaning |", "| --- | --- | --- | --- |"]
    lines += [f"| `{f.name}` | {f.dtype} | {f.unit} | {f.doc} |" for f in FRAMES]
    lines += ["", "`aligned_mean.tif` beside it holds the aligned mean, calibrated like the input.", ""]
    lines += ["## summary.json sections (contract keys)", ""]
    for section, keys in SUMMARY_KEYS.items():
        lines += [f"### `{section}`", "", "| key | meaning |", "| --- | --- |"]
        lines += [f"| `{k}` | {doc} |" for k, doc in keys]
        lines.append("")
    return "\n".join(lines)


if __name__ == "__main__":  # pragma: no cover
    print(schema_markdown())
