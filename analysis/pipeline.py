"""The orchestrator: runs the stages in order on one micrograph and collects an :class:`AnalysisResult`.

Both fronts (the ``tenfold`` command and the napari dock) call :func:`run_pipeline`; after the user edits the
column positions by hand they call :func:`rerun_from_columns`, which skips detection and refinement.

Stages, each in its own module: columns (detection, refinement, species; ``columns.py``), motifs (``motifs.py``),
ladders (``ladder.py``), tiling (``tiling.py``), Fourier (``fourier.py``). Export is separate (``export.py``).
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import warnings
from collections.abc import Callable

import numpy as np
import pandas as pd

from . import __version__, _guards, _timing
from ._errors import Cancelled, TenfoldInputError, TenfoldWarning
from ._image import ImageMeta, Micrograph
from ._lengths import DIAMETER_PER_SIGMA, ResolvedLengths, lengths_record, resolve_lengths
from ._progress import ProgressCallback, report, sub_progress
from ._result import AnalysisResult
from ._schema import COLUMNS, LADDER, MOTIFS, NETWORK, PEAKS, SPOTS, TILES, conform, empty_table
from .parameters import Parameters  # its own low module; kept importable from here

__all__ = ["Parameters", "run_pipeline", "rerun_from_columns", "estimate_defaults", "Cancelled"]


def _with_nm(df: pd.DataFrame, ps: float | None, pairs: dict[str, str]) -> pd.DataFrame:
    for px, nm in pairs.items():
        if px in df.columns:
            df[nm] = df[px] * ps if ps else np.nan
    return df


def _calibrated(micrograph: Micrograph, params: Parameters) -> Micrograph:
    """The micrograph with the user's pixel size applied (never modifies the caller's record)."""
    if params.pixel_size_nm is None:
        return micrograph
    old, new = micrograph.meta.pixel_size_nm, float(params.pixel_size_nm)
    notes = list(micrograph.meta.notes)
    if old and micrograph.meta.calibration_source != "user" and abs(new - old) > 0.01 * old:
        notes.append(f"the given pixel size {new:.6g} nm overrides the file's {old:.6g} nm (from "
                     f"{micrograph.meta.calibration_source}), {100 * (new / old - 1):+.1f} %")
    meta = dataclasses.replace(micrograph.meta, pixel_size_nm=new, calibration_source="user", notes=notes)
    return dataclasses.replace(micrograph, meta=meta)


def estimate_defaults(micrograph: Micrograph, *, dark_columns: bool = False) -> dict:
    """Quick automatic scale for a front end to show next to its fields.

    Returns
    -------
    dict
        ``column_spacing_px``, ``column_diameter_px`` and their ``_nm`` versions (None when uncalibrated).
    """
    from .scale import estimate_scale

    try:
        with _guards.small_image_hint(micrograph.data.shape):
            est = estimate_scale(micrograph.data, valid=micrograph.valid, dark_columns=dark_columns)
    except TenfoldInputError as exc:
        raise _guards.with_file(exc, micrograph.meta.path) from None
    ps = micrograph.meta.pixel_size_nm
    diameter_px = DIAMETER_PER_SIGMA * est.sigma_px
    return {
        "column_spacing_px": float(est.spacing_px),
        "column_diameter_px": float(diameter_px),
        "column_spacing_nm": float(est.spacing_px * ps) if ps else None,
        "column_diameter_nm": float(diameter_px * ps) if ps else None,
    }


def _region_summaries(result: AnalysisResult, regions) -> list[dict]:
    cols = result.tables["columns"]
    motifs = result.tables["motifs"]
    labels = sorted(set(cols["region"].tolist()) | ({r.label for r in regions} if regions else {0}))
    out = []
    for lab in labels:
        c = cols[cols["region"] == lab]
        m = motifs[motifs["region"] == lab] if len(motifs) else motifs
        row = {
            "region": int(lab),
            "n_columns": int(len(c)),
            "n_ring_motifs": int((m["kind"].str.startswith("ring")).sum()) if len(m) else 0,
            "n_complete_rings": int((m["kind"].str.startswith("ring") & m["complete"]).sum()) if len(m) else 0,
            "n_pentagons": int((m["kind"] == "pentagon").sum()) if len(m) else 0,
            "mean_psi_n": float(m["psi_n"].mean()) if len(m) else None,
            "mean_psi_n_over": "ring motifs and pentagons",
            "mean_pos_err_nm": float(c["pos_err_nm"].mean()) if len(c) and c["pos_err_nm"].notna().any() else None,
        }
        for sp, n in c["species"].value_counts().sort_index().items():
            row[f"n_species_{int(sp)}"] = int(n)
        out.append(row)
    return out


def _structure(result: AnalysisResult, params: Parameters, lengths: ResolvedLengths, regions,
               progress: ProgressCallback | None, stage_done=None) -> None:
    """Motifs, ladders and tiling from the columns table in ``result`` (fills tables, curves and summary); the
    stages take the lengths in px as ``resolve_lengths`` resolved them."""
    from . import ladder as _ladder
    from . import motifs as _motifs
    from . import tiling as _tiling

    ps = result.meta.pixel_size_nm
    cols = result.tables["columns"]
    ok = cols[cols["fit_status"].isin(["ok", "fixed_width"])] if "fit_status" in cols else cols
    report(progress, 0.0, "searching ring and pentagon motifs")
    motifs, m_info = _motifs.find_motifs(
        ok,
        ring_order=params.ring_order,
        ring_radius_px=lengths.px("ring_radius"),
        radius_tolerance=params.radius_tolerance,
        pentagons=params.pentagons,
        pixel_size_nm=ps,
        regions=regions,
        progress=sub_progress(progress, 0.0, 0.45),
    )
    result.tables["motifs"] = motifs
    result.summary["motifs"] = m_info
    m_info["mean_psi_n_over"] = "ring motifs only (the per-region rows average rings and pentagons)"
    shape = m_info.get("ring_shape") or {}
    if shape.get("warning"):
        result.summary.setdefault("notes", []).append(
            f"the ring motifs are elliptical on average (axis ratio {shape['axis_ratio']:.4f} +- "
            f"{shape['axis_ratio_se']:.4f}, long axis at {shape['major_axis_deg']:.0f} deg): suspect scan distortion, "
            "drift or an anisotropic pixel size; distances along different directions differ by "
            f"{100 * (shape['axis_ratio'] - 1):.2f} %"
        )
    try:
        result.summary["motifs"]["internal_ratios"] = _ladder.motif_ratios(motifs)
    except Exception as exc:  # a ratio summary must never kill the run; say why it is missing
        result.summary["motifs"]["internal_ratios"] = {"error": str(exc)}
    _timing.lap("motifs")

    report(progress, 0.5, "pair distances and golden-ratio ladder")
    rmax = lengths.px("ladder_r_max")
    d0 = lengths.px("d0")
    ladders, peaks, l_info = [], [], {}
    # one shell per cluster: the primary one (motifs.SHELL_RULE); other shells share its centres
    rings = motifs[motifs["kind"].str.startswith("ring") & motifs["primary"]] if len(motifs) else motifs
    # the clusters are the rings; without rings, free-standing pentagons (five-fold views) take their place
    vertex_kind = "ring"
    if len(rings) < 3 and len(motifs):
        free = motifs[(motifs["kind"] == "pentagon") & (motifs["parent_ring"] < 0) & motifs["primary"]]
        if len(free) >= 3:
            rings, vertex_kind = free, "pentagon"
    result.summary["cluster_vertices"] = vertex_kind
    sets = [("columns", ok["x_px"].to_numpy(), ok["y_px"].to_numpy(), d0)]
    if len(rings) >= 3:
        sets.append(("centres", rings["centre_x_px"].to_numpy(), rings["centre_y_px"].to_numpy(), None))
    for name, x, y, base in sets:
        lt, pk, info = _ladder.fit_ladder(
            x, y, point_set=name, d0_px=base, ladder_r_max_px=rmax, half_step=params.half_step, pixel_size_nm=ps,
            rng=params.rng,
        )
        ladders.append(lt)
        peaks.append(pk)
        curve = info.pop("curve", None) if isinstance(info, dict) else None
        if curve is None:
            r_hi = rmax if rmax else (info.get("r_max_px") if isinstance(info, dict) else None)
            if r_hi:
                curve = _ladder.pair_distribution(x, y, r_max_px=r_hi)
        if curve is not None:
            curve = curve.copy()
            curve["r_nm"] = curve["r_px"] * ps if ps else np.nan
            result.curves[f"pair_distribution_{name}"] = curve
        l_info[name] = info
    result.tables["ladder"] = conform(pd.concat(ladders, ignore_index=True), LADDER) if ladders else empty_table(LADDER)
    result.tables["pair_peaks"] = conform(pd.concat(peaks, ignore_index=True), PEAKS) if peaks else empty_table(PEAKS)
    l_info["agreement"] = _ladder.ladder_agreement(result.tables["ladder"], result.tables["pair_peaks"])
    result.summary["ladder"] = l_info
    _timing.lap("ladder")
    if stage_done is not None:
        stage_done("ladder", result)
    report(progress, 0.75, "cluster network and tiling")
    network, tiles, t_info = _tiling.build_network(
        motifs, tiling_edge_px=lengths.px("tiling_edge"), pixel_size_nm=ps,
        progress=sub_progress(progress, 0.75, 1.0), vertex_kind=vertex_kind,
    )
    result.tables["network"] = network
    result.tables["tiles"] = tiles
    result.summary["tiling"] = t_info
    from ._stage_notes import structure_notes  # say why a stage came out empty or tiny

    notes = result.summary.setdefault("notes", [])
    notes.extend(n for n in structure_notes(
        n_columns=len(ok), columns_info=result.summary.get("columns"), motifs=motifs, motifs_info=m_info,
        ladder_info=l_info, tiling_info=t_info, pair_peaks=result.tables["pair_peaks"]) if n not in notes)
    _timing.lap("tiling")
    if stage_done is not None:
        stage_done("tiling", result)
    if params.phason:
        from .phason import phason_stage

        phason_stage(result, rng=params.rng)
        _timing.lap("phason")
        if stage_done is not None:
            stage_done("phason", result)
    report(progress, 1.0, "structure done")


def _base_summary(meta: ImageMeta, params: Parameters) -> dict:
    return {
        "tenfold_version": __version__,
        "version": __version__,
        "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "input": {"file": meta.path, "sha256": meta.sha256, "shape": list(meta.shape), "frames": meta.frames,
                  "frames_averaged": meta.frames_averaged,
                  "original_dtype": meta.original_dtype, "converted_from_rgb": meta.converted_from_rgb,
                  "masked_fraction": meta.masked_fraction},
        "pixel_size_nm": meta.pixel_size_nm,
        "calibration_source": meta.calibration_source,
        "calibrated": meta.calibrated,
        "parameters": params.to_dict(),
        "notes": list(meta.notes),
    }


def _finish(result: AnalysisResult, regions, caught: list) -> AnalysisResult:
    notes = result.summary.setdefault("notes", [])
    for w in caught:
        msg = str(w.message)
        if msg not in notes:
            notes.append(msg)
    for stage in ("motifs", "tiling", "fourier"):
        for n in (result.summary.get(stage) or {}).get("notes", []) or []:
            if n not in notes:
                notes.append(n)
    if not result.meta.calibrated:
        msg = "uncalibrated: no pixel size in the file and none given; positions are in px and every *_nm column is empty"
        if msg not in notes:
            notes.insert(0, msg)
    for note in _guards.empty_result_notes(result.summary, result.tables, result.meta.shape):
        if note not in notes:
            notes.append(note)
    notes[:] = _guards.name_the_file(notes, result.meta.path)
    result.summary["n_columns"] = int(len(result.tables["columns"]))
    result.summary["n_motifs"] = int(len(result.tables["motifs"]))
    result.summary["regions"] = _region_summaries(result, regions)
    for key, fields in (("columns", COLUMNS), ("motifs", MOTIFS), ("ladder", LADDER), ("pair_peaks", PEAKS),
                        ("tiles", TILES), ("network", NETWORK), ("spots", SPOTS)):
        result.tables.setdefault(key, empty_table(fields))
    # Re-issue what the stages warned about, now that it is recorded in the summary too.
    for w in caught:
        warnings.warn(str(w.message), TenfoldWarning, stacklevel=3)
    return result


def run_pipeline(
    micrograph: Micrograph,
    params: Parameters | None = None,
    *,
    regions=None,
    progress: ProgressCallback | None = None,
    execution=None,
    stage_done: Callable[[str, AnalysisResult], None] | None = None,
) -> AnalysisResult:
    """Run every stage on one micrograph.

    Parameters
    ----------
    micrograph : Micrograph
        From :func:`tenfold.analysis.io.read_micrograph` or ``micrograph_from_array``.
    params : Parameters, optional
        Defaults: everything automatic.
    regions : list of region.Region, optional
        Analyse only inside these regions (labels go to the ``region`` columns); None = whole image (label 0).
    progress : callable(fraction, message) -> bool | None, optional
        Called as the run advances; returning False cancels (raises :class:`Cancelled`).
    execution : parallel.Execution, optional
        Tiles, workers and scheduler for the column finding (:mod:`tenfold.analysis.parallel`); default: untiled
        up to ``AUTO_TILE_ABOVE_PX`` on a side, tiled above, serial.
    stage_done : callable(stage, result), optional
        Called with the result so far once a stage's outputs are final: 'columns' (the image and the columns
        table, after any distortion correction), 'ladder' (the ladder and pair-peak tables and the
        pair-distribution curves), 'tiling' (the motifs, network and tiles tables), 'phason' (the phason_map
        table and ``summary['phason']['real_space']``) and 'fourier' (the spots table and ``summary['fourier']``).
        Front ends use it to start work early (the command line draws those figures
        while the analysis goes on); the result is still being filled, so read it and do not keep it. Not
        called for regions analysed in a crop (their tables are shifted at the end).

    Returns
    -------
    AnalysisResult
        Tables 'columns', 'motifs', 'ladder', 'pair_peaks', 'tiles', 'network', 'spots'; summary sections
        'columns' (automatic choices), 'motifs', 'ladder', 'tiling', 'fourier', 'regions', 'notes'.
    """
    params = (params or Parameters()).validate()
    micrograph = _calibrated(micrograph, params)
    _guards.check_lengths(params, micrograph.data.shape, micrograph.meta.pixel_size_nm)
    try:
        lengths = resolve_lengths(params, micrograph.meta.pixel_size_nm)  # once, before any stage runs
        return _run_regions(micrograph, params, lengths, regions, progress, execution, stage_done)
    except TenfoldInputError as exc:  # the one line names the file, whichever stage raised
        raise _guards.with_file(exc, micrograph.meta.path) from None


def _run_regions(micrograph: Micrograph, params: Parameters, lengths: ResolvedLengths, regions, progress,
                 execution=None, stage_done=None) -> AnalysisResult:
    _guards.check_regions(regions, micrograph.data.shape)
    if regions:
        # small regions of a large image: analyse their bounding box (with a margin) and shift the tables back
        from ._crop import crop_to_regions, shift_result

        work, work_regions, offset = crop_to_regions(micrograph, regions)
        if work is not micrograph:
            with _guards.small_image_hint(work.data.shape):
                result = _run(work, params, lengths, work_regions, progress, execution)
            shift_result(result, micrograph, offset)
            return result
    with _guards.small_image_hint(micrograph.data.shape):
        return _run(micrograph, params, lengths, regions, progress, execution, stage_done)


def _column_finder(micrograph: Micrograph, params: Parameters, execution):
    """(finder, tiled): find_columns, or its tiled version when the image is large or tiles were asked for."""
    from .columns import find_columns
    from .parallel import Execution, find_columns_tiled

    execution = execution or Execution(workers=1)
    tile = execution.tiles_for(micrograph.data.shape)
    if tile is None:
        return find_columns, False
    if params.flatten:
        warnings.warn(f"the {micrograph.data.shape[0]} x {micrograph.data.shape[1]} px image is analysed untiled "
                      "because flatten fits one background to the whole image; this may need a lot of memory "
                      "(leave flatten off for a tiled run)", TenfoldWarning, stacklevel=4)
        return find_columns, False

    def tiled(image, **kw):
        return find_columns_tiled(image, tile_size=tile, execution=execution, overlap=execution.overlap, **kw)

    return tiled, True


#: the Fourier stage of a tiled run looks at the central crop of this size (an FFT of a 16k scan needs 4 GB)
FOURIER_CROP_PX = 4096


def _fourier_input(micrograph: Micrograph, tiled: bool):
    rows, cols = micrograph.data.shape
    if not tiled or max(rows, cols) <= FOURIER_CROP_PX:
        return micrograph.data, micrograph.valid, None
    h, w = min(rows, FOURIER_CROP_PX), min(cols, FOURIER_CROP_PX)
    r0, c0 = (rows - h) // 2, (cols - w) // 2
    data = np.asarray(micrograph.data[r0:r0 + h, c0:c0 + w], dtype=np.float32)
    valid = np.asarray(micrograph.valid[r0:r0 + h, c0:c0 + w], dtype=bool) & np.isfinite(data)
    note = (f"Fourier analysis on the central {h} x {w} px crop of the {rows} x {cols} px image (tiled run); "
            "spots and distortion describe that part")
    return data, valid, note


def _run(micrograph: Micrograph, params: Parameters, lengths: ResolvedLengths, regions, progress,
         execution=None, stage_done=None) -> AnalysisResult:
    meta = micrograph.meta
    ps = meta.pixel_size_nm
    result = AnalysisResult(meta=meta, parameters=params.to_dict(), image=micrograph.data)
    result.summary = _base_summary(meta, params)
    if micrograph.alignment is not None:  # a frame series: how the frames were moved (frames.csv, summary)
        result.tables["frames"] = micrograph.alignment.table
        result.summary["frames"] = dict(micrograph.alignment.info)
    clock = _timing.start()
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", TenfoldWarning)
        find_columns, tiled = _column_finder(micrograph, params, execution)
        report(progress, 0.0, "finding atomic columns")
        cols, c_info = find_columns(
            micrograph.data,
            valid=micrograph.valid,
            pixel_size_nm=ps,
            regions=regions,
            dark_columns=params.dark_columns,
            column_diameter_px=lengths.px("column_diameter"),
            column_spacing_px=lengths.px("column_spacing"),
            min_mass=params.min_mass,
            flatten=params.flatten,
            n_species=params.n_species,
            rng=params.rng,
            progress=sub_progress(progress, 0.0, 0.55),
            frames_averaged=meta.frames_averaged if meta.frames_hold_counts else 1,
        )
        result.tables["columns"] = cols
        result.summary["automatic"] = c_info.get("automatic", c_info)
        result.summary["species"] = c_info.get("species")
        # each block once: 'automatic' and 'species' live at the top level only
        result.summary["columns"] = {k: v for k, v in c_info.items() if k not in ("automatic", "species")}
        _timing.lap("columns")
        f_data, f_valid, f_note = _fourier_input(micrograph, tiled)
        f_micrograph = micrograph if f_note is None else dataclasses.replace(micrograph, data=f_data, valid=f_valid)
        if params.fourier and params.correct_distortion:
            from .fourier import correct_columns

            report(progress, 0.55, "power spectrum and scan-distortion correction")
            correct_columns(result, f_micrograph, fourier_window=params.fourier_window)
            _timing.lap("distortion_correction")
        elif params.correct_distortion:
            result.summary.setdefault("notes", []).append(
                "correct_distortion needs the Fourier stage (fourier = true): positions were not corrected")
        if stage_done is not None:
            stage_done("columns", result)
        _structure(result, params, lengths, regions, sub_progress(progress, 0.55, 0.9), stage_done)
        if params.fourier:
            report(progress, 0.9, "power spectrum")
            from .fourier import fourier_stage

            fourier_stage(result, f_micrograph, fourier_window=params.fourier_window)
            _timing.lap("fourier")
            if f_note:
                f_info = result.summary["fourier"]
                f_info["notes"] = [*(f_info.get("notes") or []), f_note]
                f_info["crop_note"] = f_note
            if stage_done is not None:
                stage_done("fourier", result)
        report(progress, 1.0, "analysis done")
    result.summary["timings_s"] = clock.as_dict()  # wall seconds per stage of this run
    _timing.stop(clock)
    result.summary["lengths_px"] = lengths_record(lengths, result.summary)
    kept = [w for w in caught if issubclass(w.category, TenfoldWarning)]
    for w in caught:
        if w not in kept:
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
    return _finish(result, regions, kept)


#: Fit outcomes of refine.refine_columns that are measurements (a width held at the common width is one too).
FITTED_STATUSES = ("ok", "fixed_width")


def _distortion_maps(summary: dict):
    """(to_raw, to_corrected): maps of (N, 2) x, y px between the image frame and the frame the run's positions
    are in (``summary['distortion_correction']``, ``r' = D (r - c) + c``); identities when nothing was applied."""
    corr = summary.get("distortion_correction") or {}
    if not corr.get("applied"):
        return (lambda xy: np.asarray(xy, float)), (lambda xy: np.asarray(xy, float))
    d = np.asarray(corr["matrix"], float)
    c = np.asarray(corr["centre_px"], float)
    d_inv = np.linalg.inv(d)
    return (lambda xy: (np.asarray(xy, float) - c) @ d_inv.T + c), (lambda xy: (np.asarray(xy, float) - c) @ d.T + c)


def _fit_hand_added(result: AnalysisResult, cols: pd.DataFrame, hand: np.ndarray, *,
                    dark_columns: bool = False) -> pd.DataFrame:
    """Fit the columns added by hand (rows where ``hand``) on the result's image; see :func:`rerun_from_columns`.

    They are fitted together with the columns around them (within 12 widths), so that their neighbours' light is
    modelled, not taken for background, exactly as in detection; only the added rows take the fit's values.
    Without an image, or without any fitted column to take the starting width from, nothing is guessed: the
    added columns stay 'manual'. When the run corrected the scan distortion, positions are taken back to the
    image's (raw) frame for the fit and the fitted ones mapped forward again (``x_raw_px`` keeps the raw ones).
    """
    out = cols.copy()
    status = out["fit_status"].astype(object).to_numpy(copy=True)
    status[hand] = "manual"
    out["fit_status"] = status
    old = result.tables.get("columns")
    good_old = (old["fit_status"].isin(FITTED_STATUSES) & old["sigma_px"].notna()).to_numpy() \
        if old is not None and len(old) else np.zeros(0, bool)
    xy = out[["x_px", "y_px"]].to_numpy(float)
    hand = hand & np.all(np.isfinite(xy), axis=1)
    if not hand.any() or result.image is None or not good_old.any():
        return out
    from scipy.spatial import cKDTree

    from .refine import refine_columns

    image = np.asarray(result.image, np.float32)
    if dark_columns:
        image = np.nanmax(image) - image
    sigma = float(np.median(old.loc[good_old, "sigma_px"]))
    to_raw, to_corrected = _distortion_maps(result.summary)
    xy = to_raw(xy)
    near = cKDTree(xy[hand]).query_ball_point(xy, r=12.0 * sigma, return_length=True) > 0
    near &= np.all(np.isfinite(xy), axis=1)
    sub = np.flatnonzero(near)
    fit = refine_columns(image, xy[sub], sigma_px=sigma, counts=False, neighbour_passes=1,
                         fixed_width_fallback=False)
    fit = fit[hand[sub]].reset_index(drop=True)
    # kept when the fit converged (a held width too), found a column (amplitude above 3 standard errors, the
    # usual detection threshold) and did not slide onto a column that is already there (closer than one width)
    ok = fit["fit_status"].isin(FITTED_STATUSES).to_numpy() & (fit["amplitude"] > 3.0 * fit["amplitude_err"]).to_numpy()
    others = xy[~hand & np.all(np.isfinite(xy), axis=1)]
    if len(others) and ok.any():
        d, _ = cKDTree(others).query(np.nan_to_num(fit[["x_px", "y_px"]].to_numpy(float), nan=-1e9))
        ok = ok & (d > sigma)
    rows = np.flatnonzero(hand)[ok]
    raw = fit[["x_px", "y_px"]].to_numpy(float)[ok]
    fit.loc[ok, ["x_px", "y_px"]] = to_corrected(raw)
    for name in ("x_px", "y_px", "sigma_px", "amplitude", "background", "intensity", "residual", "pos_err_px"):
        values = out[name].to_numpy(float, copy=True) if name in out else np.full(len(out), np.nan)
        values[rows] = fit[name].to_numpy(float)[ok]
        out[name] = values
    if "x_raw_px" in out:
        for j, name in enumerate(("x_raw_px", "y_raw_px")):
            values = out[name].to_numpy(float, copy=True)
            values[rows] = raw[:, j]
            out[name] = values
    status[rows] = "added"
    out["fit_status"] = status
    return out


def rerun_from_columns(
    result: AnalysisResult,
    columns: pd.DataFrame,
    *,
    params: Parameters | None = None,
    regions=None,
    progress: ProgressCallback | None = None,
) -> AnalysisResult:
    """Recompute motifs, ladders and tiling from an edited columns table, without re-detecting.

    Parameters
    ----------
    result : AnalysisResult
        The run being corrected (its image, calibration and Fourier results are kept).
    columns : DataFrame
        Edited columns; needs ``x_px`` and ``y_px``. Rows without an ``id``, with an id the run does not know, or
        with ``fit_status`` 'added' are columns added by hand: they get new ids (when they have none) and the same
        pixel-integrated Gaussian fit as detected columns (``refine.refine_columns`` with their neighbours, started
        at the run's median width). A fit that converges (status 'ok' or 'fixed_width' from the fit: a width held
        at the common width is a converged fit too), with an amplitude above 3 standard errors and not onto a
        column already there, moves the column and fills its width, intensity and errors, and the column is
        marked 'added'; otherwise (e.g. a point on empty background) it stays where it was placed, with NaN
        measurements and ``fit_status`` 'manual'. Species of added columns are -1.
    params : Parameters, optional
        Defaults to the parameters of ``result``.
    regions, progress
        As for :func:`run_pipeline`.

    Returns
    -------
    AnalysisResult
        A new result; ``summary['columns']['hand_edited']`` records how many columns were added and removed.
    """
    if not {"x_px", "y_px"} <= set(columns.columns):
        raise TenfoldInputError("re-run from columns: the edited table needs x_px and y_px columns")
    params = (params or Parameters.from_dict(result.parameters)).validate()
    lengths = resolve_lengths(params, result.meta.pixel_size_nm)
    shape = result.image.shape if result.image is not None else result.meta.shape
    _guards.check_positions(pd.to_numeric(columns["x_px"], errors="coerce"),
                            pd.to_numeric(columns["y_px"], errors="coerce"), shape)
    ps = result.meta.pixel_size_nm
    cols = columns.copy().reset_index(drop=True)
    old = result.tables.get("columns", empty_table(COLUMNS))
    if "id" not in cols:
        cols["id"] = -1
    ids = pd.to_numeric(cols["id"], errors="coerce").fillna(-1).astype(np.int64).to_numpy(copy=True)  # writable under copy-on-write
    seen = set()
    dup = np.zeros(len(ids), dtype=bool)
    for i, v in enumerate(ids):  # short loop over ids only (hand edits), not a per-column computation
        if v >= 0 and v in seen:
            dup[i] = True
        seen.add(v)
    fresh = (ids < 0) | dup
    start = int(max(old["id"].max() if len(old) else -1, ids.max() if len(ids) else -1)) + 1
    ids[fresh] = np.arange(start, start + fresh.sum())
    cols["id"] = ids
    # Columns the user kept keep their fitted values (looked up by id); moved ones are marked 'moved'.
    known = ~fresh & np.isin(ids, old["id"].to_numpy())
    if known.any():
        ref = old.set_index("id").loc[ids[known]]
        for f in COLUMNS:
            if f.name in ("id", "x_px", "y_px", "x_nm", "y_nm") or f.name not in ref:
                continue
            if f.name not in cols:
                cols[f.name] = pd.Series([None] * len(cols), dtype=object if f.dtype == "object" else float)
            cols.loc[known, f.name] = np.where(
                cols.loc[known, f.name].isna().to_numpy(), ref[f.name].to_numpy(), cols.loc[known, f.name].to_numpy()
            )
        shift = np.hypot(cols.loc[known, "x_px"].to_numpy() - ref["x_px"].to_numpy(),
                         cols.loc[known, "y_px"].to_numpy() - ref["y_px"].to_numpy())
        moved = np.flatnonzero(known)[shift > 0.01]
        cols.loc[moved, "fit_status"] = "moved"
    defaults = {"fit_status": "manual", "species": -1, "species_prob": np.nan, "region": 0}
    for f in COLUMNS:
        if f.name not in cols:
            cols[f.name] = defaults.get(f.name, np.nan)
        elif f.name in defaults:
            cols[f.name] = cols[f.name].fillna(defaults[f.name])
    hand = fresh | ~np.isin(ids, old["id"].to_numpy()) | (cols["fit_status"].astype(str) == "added").to_numpy()
    if regions:
        from .region import label_points

        # regions are drawn on the image: label the positions in its frame (raw, when the distortion was corrected)
        raw = _distortion_maps(result.summary)[0](cols[["x_px", "y_px"]].to_numpy(float))
        cols["region"] = label_points(raw[:, 0], raw[:, 1], regions)
        hand = hand[(cols["region"] > 0).to_numpy()]
        cols = cols[cols["region"] > 0].reset_index(drop=True)
    cols = _fit_hand_added(result, cols, hand, dark_columns=params.dark_columns)
    cols = _with_nm(cols, ps, {"x_px": "x_nm", "y_px": "y_nm", "sigma_px": "sigma_nm", "pos_err_px": "pos_err_nm"})
    cols = conform(cols, COLUMNS)
    new = AnalysisResult(meta=result.meta, parameters=params.to_dict(), image=result.image)
    new.summary = _base_summary(result.meta, params)
    for key in ("columns", "automatic", "species", "fourier"):
        if key in result.summary:
            new.summary[key] = result.summary[key]
    old_ids = set(old["id"].tolist())
    new_ids = set(cols["id"].tolist())
    new.summary["columns"] = dict(new.summary.get("columns") or {})
    new.summary["columns"]["hand_edited"] = {
        "added": int(len(new_ids - old_ids)),
        "removed": int(len(old_ids - new_ids)),
        "moved": int((cols["fit_status"] == "moved").sum()),
        "kept": int(len(new_ids & old_ids)),
        "added_fitted": int((cols["fit_status"] == "added").sum()),
    }
    new.tables["columns"] = cols
    new.tables["spots"] = result.tables.get("spots", empty_table(SPOTS))
    for key in ("analysed_box_px", "distortion_correction"):  # where the positions came from stays recorded
        if key in result.summary:
            new.summary[key] = result.summary[key]
    # Hand-placed columns have no fit; the motif search uses every column the user kept.
    struct_cols = cols.copy()
    struct_cols["fit_status"] = "ok"
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", TenfoldWarning)
        tmp = AnalysisResult(meta=result.meta, tables={"columns": struct_cols}, summary=new.summary, image=result.image)
        _structure(tmp, params, lengths, regions, progress)
    for key in ("motifs", "ladder", "pair_peaks", "tiles", "network", "phason_map"):
        if key in tmp.tables:
            new.tables[key] = tmp.tables[key]
    new.curves = tmp.curves
    new.summary["lengths_px"] = lengths_record(lengths, new.summary)
    kept = [w for w in caught if issubclass(w.category, TenfoldWarning)]
    return _finish(new, regions, kept)
