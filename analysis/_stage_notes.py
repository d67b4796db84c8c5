"""Say why a structure stage came out empty or tiny, and which upstream figure is suspicious.

:func:`structure_notes` reads the summaries of the column, motif, ladder and tiling stages (and the column pair
peaks) and returns one sentence per empty or tiny stage, naming the upstream figure that is out of line, e.g. "the
column spacing used (12.0 px) is 60 % above the first pair-distance peak of the columns found (7.5 px)". The
pipeline adds them to ``summary['notes']``, which the command line prints and the napari dock shows.

Thresholds (common practice; chosen so that the bundled samples and the decorated test sets give no note):

* a motif stage is tiny when fewer than ``MIN_MOTIF_COVERAGE`` of the columns belong to a primary motif;
* a network is tiny when it has fewer faces than ``MIN_FACES_PER_VERTEX`` x its vertices (a rhombus tiling has
  about one face per vertex, by Euler's formula);
* a spacing is out of line when it differs from the first pair-distance peak by more than ``SPACING_MISMATCH``;
* a chosen tiling edge is suspect when its network's mean degree is more than 1 from 4 or more than 5 % of its
  links cross.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

MIN_MOTIF_COVERAGE = 0.2
MIN_FACES_PER_VERTEX = 0.2
SPACING_MISMATCH = 0.3


def _spacing_used(columns_info: dict | None) -> float | None:
    auto = (columns_info or {}).get("automatic") or {}
    sp = auto.get("spacing") if isinstance(auto, dict) else None
    v = sp.get("value_px") if isinstance(sp, dict) else None
    return float(v) if isinstance(v, (int, float)) and np.isfinite(v) and v > 0 else None


def _first_peak(pair_peaks: pd.DataFrame | None, point_set: str) -> float | None:
    if pair_peaks is None or len(pair_peaks) == 0:
        return None
    p = pair_peaks.loc[pair_peaks["set"] == point_set, "distance_px"].to_numpy(dtype=float)
    p = p[np.isfinite(p)]
    return float(p.min()) if len(p) else None


def _upstream(columns_info, pair_peaks, n_columns) -> list[str]:
    """Upstream figures that are out of line (columns stage)."""
    out = []
    used, first = _spacing_used(columns_info), _first_peak(pair_peaks, "columns")
    if used and first:
        rel = used / first - 1.0
        if abs(rel) > SPACING_MISMATCH:
            out.append(f"the column spacing used ({used:.3g} px) is {100 * abs(rel):.0f} % "
                       f"{'above' if rel > 0 else 'below'} the first pair-distance peak of the columns found "
                       f"({first:.3g} px): columns may be missing (spacing too large) or split (too small); set "
                       "the spacing by hand to check")
    if n_columns < 50:
        out.append(f"only {n_columns} columns were found")
    return out


def structure_notes(*, n_columns: int, columns_info: dict | None, motifs: pd.DataFrame, motifs_info: dict,
                    ladder_info: dict, tiling_info: dict, pair_peaks: pd.DataFrame | None = None) -> list[str]:
    """One note per empty or tiny structure stage, with the upstream figure that is suspicious.

    Parameters
    ----------
    n_columns : int
        Columns handed to the motif stage.
    columns_info, motifs_info, ladder_info, tiling_info : dict
        The stages' summaries (``summary['columns']``, ``['motifs']``, ``['ladder']``, ``['tiling']``).
    motifs : DataFrame
        The motifs table (``_schema.MOTIFS``).
    pair_peaks : DataFrame, optional
        The pair-peak table (``_schema.PEAKS``) for the first column pair-distance peak.

    Returns
    -------
    list of str
        Empty when every stage has a plausible size.
    """
    notes: list[str] = []
    upstream = _upstream(columns_info, pair_peaks, n_columns)
    why_up = ("; suspicious upstream: " + "; ".join(upstream)) if upstream else ""

    prim = motifs[motifs["primary"].astype(bool)] if len(motifs) and "primary" in motifs else motifs.iloc[0:0]
    members = set()
    for m in prim["members"].astype(str):  # one short string per motif
        members.update(m.split())
    coverage = len(members) / n_columns if n_columns else 0.0
    scan = (motifs_info or {}).get("radius_scan") or {}
    if len(prim) == 0 or coverage < MIN_MOTIF_COVERAGE:
        what = "no motifs" if len(prim) == 0 else (f"only {len(prim)} motifs holding {100 * coverage:.0f} % of the "
                                                   f"{n_columns} columns")
        detail = []
        if scan.get("best_count") is not None:
            detail.append(f"the best trial radius of the ring-shell scan held {scan['best_count']} regular shells "
                          f"among {scan.get('sample_centres', '?')} sample centres")
        if motifs_info.get("radius_source") == "given":
            detail.append(f"the ring radius was given ({motifs_info.get('radius_px')} px)")
        notes.append(f"motifs: {what}" + ((" (" + "; ".join(detail) + ")") if detail else "") + why_up)

    lad = (ladder_info or {}).get("columns") or {}
    if lad and not lad.get("holds"):
        verdict = (lad.get("evidence") or {}).get("verdict") or lad.get("message") or "ladder not evaluated"
        if lad.get("message") or (lad.get("n_rungs", 0) or 0) < 3:
            notes.append(f"ladder (columns): {verdict}" + why_up)
    agree = (ladder_info or {}).get("agreement") or {}
    if agree.get("note"):
        notes.append(agree["note"])

    t = tiling_info or {}
    n_v, n_f = int(t.get("n_vertices") or 0), int(t.get("n_faces") or 0)
    if n_f < MIN_FACES_PER_VERTEX * max(n_v, 1) or t.get("message"):
        parts = [t.get("message") or f"{n_f} faces for {n_v} cluster centres"]
        choice = t.get("edge_choice") or {}
        cands = choice.get("candidates") or []
        edge = t.get("edge_px")
        if cands and edge:
            first = min(c["distance_px"] for c in cands)
            chosen = min(cands, key=lambda c: abs(c["distance_px"] - edge))
            parts.append(f"the edge used ({edge:.4g} px) is {edge / first:.3f} x the first centre pair-distance "
                         f"peak ({first:.4g} px); linked there the centres have mean degree "
                         f"{chosen['mean_degree']:.2f} (a rhombus tiling has 4) and {100 * chosen['crossing_fraction']:.0f} % "
                         "crossing links")
        if n_v < 4 or n_columns and n_v < 0.02 * n_columns:
            parts.append(f"only {n_v} cluster centres for {n_columns} columns (the motif stage found too few clusters)")
        notes.append("tiling: network empty or tiny: " + "; ".join(parts) + why_up)
    return notes
