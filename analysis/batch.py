"""Many images with the same parameters: one results folder each, and a comparison table across them.

``run_batch(inputs, out_dir, params)`` analyses every image of ``inputs`` (files, folders, glob patterns) into
``out_dir/<image stem>/`` (the same folder :func:`~tenfold.analysis.export.write_results` writes for one image),
then reads every finished folder back and writes

* ``out_dir/comparison.csv`` and ``out_dir/comparison.xlsx`` (sheet 'comparison'): one row per image and region,
  with ``image`` and ``status`` ('ok' or the one-line error) and the fields of :data:`COMPARISON_FIELDS`;
* ``out_dir/figures/comparison.png|svg``: thick/thin ratio (with its counting uncertainty), ladder base and
  column density per image.

Steps: (1) expand the inputs and give every image a unique sub-folder; (2) check the folders already there: one
whose ``parameters.toml`` matches is finished and skipped (resume), one made with other parameters stops the
batch before any work unless ``rerun=True`` (results are never replaced silently); (3) analyse the others,
serially or on a dask cluster (:mod:`tenfold.analysis.parallel`); a failed image is recorded with its error and
the batch goes on; (4) build the comparison from the folders on disk, so a resumed batch gives the same table as
an uninterrupted one.
"""

from __future__ import annotations

import glob
import json
import math
import re
import shutil
import time
import traceback
import warnings
from collections.abc import Callable
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np
import pandas as pd

from . import _outdir
from ._errors import Cancelled, TenfoldInputError, TenfoldWarning
from ._resources import cap_workers

__all__ = ["run_batch", "expand_inputs", "comparison_table", "COMPARISON_FIELDS", "BatchItem"]

#: name -> (unit, meaning) of the comparison table's fixed columns; ``species_<k>_fraction`` columns follow for
#: every species class found in any image.
COMPARISON_FIELDS = {
    "image": ("", "input file"),
    "status": ("", "'ok', or the one-line error of a failed image"),
    "region": ("", "region label (0 = whole image)"),
    "folder": ("", "results sub-folder, relative to the batch folder"),
    "pixel_size_nm": ("nm", "pixel size used (empty when uncalibrated)"),
    "n_columns": ("", "atomic columns found"),
    "area_nm2": ("nm^2", "analysed area (valid pixels x pixel size^2); whole image only"),
    "column_density_per_nm2": ("1/nm^2", "n_columns / area_nm2"),
    "n_ring_motifs": ("", "ring motifs"),
    "n_complete_rings": ("", "ring motifs with every member"),
    "n_pentagons": ("", "pentagon motifs"),
    "ladder_d0_nm": ("nm", "golden-ratio ladder base of the column pair distances"),
    "ladder_d0_px": ("px", "the same in pixels"),
    "ladder_holds": ("", "verdict of the column ladder test"),
    "ladder_rms_deviation_pct": ("%", "rms deviation of the peaks from the ladder rungs"),
    "centre_ladder_d0_nm": ("nm", "ladder base of the cluster-centre pair distances"),
    "centre_ladder_holds": ("", "verdict of the centre ladder test"),
    "n_thick": ("", "thick rhombi in the cluster tiling"),
    "n_thin": ("", "thin rhombi"),
    "thick_thin_ratio": ("", "n_thick / n_thin"),
    "thick_thin_ratio_se": ("", "its standard error from counting statistics, ratio x sqrt(1/n_thick + 1/n_thin)"),
    "fourier_order": ("", "dominant rotational order of the power spectrum"),
    "distortion_axis_ratio": ("", "long / short axis of the Bragg-spot shells (1 = undistorted)"),
    "distortion_warning": ("", "the distortion is significant"),
    "seconds": ("s", "analysis and export time of this image (empty when resumed)"),
    "notes": ("", "the run's notes, joined with ' | '"),
}

_PARAMS_FILE = "parameters.toml"
#: files the batch level writes (under the batch folder's own manifest, like a single run's results)
BATCH_FILES = ("comparison.csv", "comparison.xlsx", "batch_errors.json", "figures/comparison.png",
               "figures/comparison.svg")
#: names no image sub-folder may take
_RESERVED = ("comparison.csv", "comparison.xlsx", "batch_errors.json", "figures", ".tenfold-manifest.json")


@dataclass
class BatchItem:
    """One image of a batch: its file, its sub-folder and what happened to it."""

    path: Path
    folder: str
    state: str = "todo"  # 'todo', 'done' (finished before), 'ok', 'failed'
    error: str = ""
    seconds: float | None = None


def expand_inputs(inputs) -> list[Path]:
    """The image files named by ``inputs``: files, folders (their readable images, not recursive) and glob
    patterns; sorted within each input, duplicates dropped, order of the inputs kept.

    Raises
    ------
    TenfoldInputError
        An input that names nothing, or no image at all.
    """
    from .io import supported_suffixes

    suffixes = set(supported_suffixes())
    if isinstance(inputs, (str, Path)):
        inputs = [inputs]
    out: list[Path] = []
    for item in inputs:
        p = Path(item)
        if p.is_dir():
            try:
                found = sorted(q for q in p.iterdir() if q.is_file() and q.suffix.lower() in suffixes)
            except OSError as exc:
                raise TenfoldInputError(f"{p}: folder cannot be listed ({exc.strerror or exc}); fix its "
                                        "permissions (chmod u+rx) or give the image files") from None
            if not found:
                raise TenfoldInputError(f"{p}: folder holds no image Tenfold reads ({', '.join(sorted(suffixes))})")
        elif p.is_file():
            found = [p]
        elif glob.has_magic(str(item)):
            found = sorted(Path(q) for q in glob.glob(str(item)) if Path(q).is_file()
                           and Path(q).suffix.lower() in suffixes)
            if not found:
                raise TenfoldInputError(f"{item}: pattern matches no image file; check the pattern (quote it in the "
                                        "shell)")
        elif p.exists():  # a FIFO, device or socket (also behind a link): never opened
            raise TenfoldInputError(f"{item}: is not a regular file (a pipe, device or socket); give image files "
                                    "saved on disk, folders or glob patterns")
        else:
            raise TenfoldInputError(f"{item}: no such file or folder; give image files, folders or glob patterns")
        out.extend(found)
    seen, unique = set(), []
    for p in out:
        key = p.resolve()
        if key not in seen:
            seen.add(key)
            unique.append(p)
    if not unique:
        raise TenfoldInputError("batch: no input images")
    return unique


def _folders(paths: list[Path]) -> list[str]:
    """A unique sub-folder name per image: the file stem, then ``stem-2``, ``stem-3`` for repeated stems."""
    used: dict[str, int] = {name.lower(): 1 for name in _RESERVED}  # an image named 'figures' gets 'figures-2'
    names = []
    for p in paths:
        stem = re.sub(r"[^A-Za-z0-9_.\-]+", "_", p.stem).strip("._") or "image"
        k = used.get(stem.lower(), 0) + 1
        used[stem.lower()] = k
        names.append(stem if k == 1 else f"{stem}-{k}")
    return names


def _input_sha(sub: Path) -> str | None:
    """The input checksum a finished sub-folder's summary records (None when unreadable)."""
    try:
        s = json.loads((sub / "summary.json").read_text(encoding="utf-8"))
        sha = (s.get("input") or {}).get("sha256")
        return str(sha) if sha else None
    except (OSError, ValueError, AttributeError):
        return None


def _classify(items: list[BatchItem], out: Path, params_text: str, rerun: bool) -> None:
    """Mark finished folders 'done'; refuse folders made with other parameters or from another input unless
    ``rerun``.

    A folder counts as finished only when its parameters file matches and its summary records the checksum of
    the image now at that path: an image replaced since, or two images with the same stem listed in another
    order, are not taken for finished.
    """
    from .io import _sha256

    clash, changed = [], []
    for it in items:
        sub = out / it.folder
        if rerun or not (sub.exists() or sub.is_symlink()):
            continue
        done = (sub.is_dir() and not sub.is_symlink() and (sub / "summary.json").is_file()
                and (sub / _PARAMS_FILE).is_file())
        try:
            same = done and (sub / _PARAMS_FILE).read_text(encoding="utf-8") == params_text
        except (OSError, UnicodeDecodeError):
            same = False
        if not same:
            clash.append(it.folder)
            continue
        try:
            now = _sha256(it.path)
        except OSError:
            now = None
        if now is None or _input_sha(sub) != now:
            changed.append(it.folder)
        else:
            it.state = "done"
    if clash:
        raise TenfoldInputError(
            f"--out {out}: sub-folder(s) {clash[:5]}{' ...' if len(clash) > 5 else ''} hold results made with other "
            "parameters (or not by a finished run); choose another --out folder, or add --rerun to analyse every "
            "image again and replace them"
        )
    if changed:
        raise TenfoldInputError(
            f"--out {out}: sub-folder(s) {changed[:5]}{' ...' if len(changed) > 5 else ''} hold results of another "
            "image than the one now at that name (the file was replaced, or images with the same name are listed "
            "in another order: the input checksum differs); choose another --out folder, or add --rerun to "
            "analyse every image again"
        )


def _analyse_image(path: str, folder: str, params: dict, frame, frame_range, figures: bool, overwrite: bool,
                   execution: dict, align: bool = True, nonrigid: bool = False) -> dict:
    """Analyse one image into ``folder`` (runs in the batch process or on a dask worker); never raises."""
    t0 = time.perf_counter()
    try:
        from ._guards import check_lengths
        from .export import write_results
        from .pipeline import Parameters, run_pipeline

        with warnings.catch_warnings():
            warnings.simplefilter("ignore", TenfoldWarning)  # recorded in the summary notes; not printed per image
            from ._input import read_for_run
            from .parallel import Execution

            ex = Execution(**execution)
            # a large image that will be tiled is memory-mapped, not read whole
            mg = read_for_run(path, ex, pixel_size_nm=params.get("pixel_size_nm"), frame=frame,
                              frame_range=frame_range, align=align, nonrigid=nonrigid)
            check_lengths(params, mg.data.shape, mg.meta.pixel_size_nm)
            result = run_pipeline(mg, Parameters.from_dict(params), execution=ex)
            write_results(result, folder, overwrite=overwrite, figures=figures)
        return {"status": "ok", "seconds": time.perf_counter() - t0}
    except (KeyboardInterrupt, Cancelled):
        raise
    except Exception as exc:  # one bad image never kills a batch: record it
        msg = " ".join(f"{type(exc).__name__}: {exc}".split())
        return {"status": msg, "seconds": time.perf_counter() - t0, "traceback": traceback.format_exc()}


def run_batch(
    inputs,
    out_dir,
    params=None,
    *,
    frame: int | None = None,
    frame_range: tuple[int, int] | None = None,
    align: bool = True,
    nonrigid: bool = False,
    rerun: bool = False,
    figures: bool = True,
    execution=None,
    progress: Callable[[int, int, str], bool | None] | None = None,
) -> pd.DataFrame:
    """Analyse every image with the same parameters and write the comparison table and figure.

    Parameters
    ----------
    inputs : str, path or list of them
        Image files, folders (their images) and glob patterns (see :func:`expand_inputs`).
    out_dir : str or path-like
        Batch folder: ``<image stem>/`` per image, ``comparison.csv``, ``comparison.xlsx``,
        ``figures/comparison.png|svg``, ``batch_errors.json`` (tracebacks of failed images). Created if needed.
    params : Parameters, optional
        The same for every image (default: everything automatic).
    frame, frame_range : optional
        For stacks, as in :func:`~tenfold.analysis.io.read_micrograph` (frame series: ``frame_range`` averages).
    align, nonrigid : bool
        Frame series: register the frames before averaging (default), also per row; as in ``read_micrograph``.
    rerun : bool
        Analyse every image again, replacing existing sub-folders (default False: finished images are skipped,
        so an interrupted batch resumes where it stopped).
    figures : bool
        Draw each image's figures (default True); the comparison figure is always drawn.
    execution : parallel.Execution, optional
        Workers / scheduler / tile size (default: serial, automatic tiling of very large images).
    progress : callable(done, total, message), optional
        Called after every image; returning False stops the batch after the images already running
        (raises :class:`Cancelled`; finished images are kept and resume next time).

    Returns
    -------
    DataFrame
        The comparison table (also written to ``comparison.csv``).

    Raises
    ------
    TenfoldInputError
        No images, an input that names nothing, ``out_dir`` is a file, or sub-folders made with other
        parameters and ``rerun`` is False.
    """
    from ._params_file import parameters_to_toml
    from .parameters import Parameters

    params = (params or Parameters()).validate()
    out = Path(out_dir).expanduser()
    if out.exists() and not out.is_dir():
        raise TenfoldInputError(f"--out {out}: exists and is not a folder; choose another path")
    paths = expand_inputs(inputs)
    # the batch level's own files get the single run's protection: a user's comparison.csv is never replaced
    _outdir.check_output_folder(out, overwrite=True, planned=BATCH_FILES, flag="--out", replacer="the batch")
    items = [BatchItem(p, f) for p, f in zip(paths, _folders(paths))]
    _classify(items, out, parameters_to_toml(params), rerun)
    out.mkdir(parents=True, exist_ok=True)
    todo = [it for it in items if it.state == "todo"]
    total, done = len(items), len(items) - len(todo)
    if progress is not None:
        progress(done, total, f"{done} finished before, {len(todo)} to analyse")
    from .parallel import Execution, map_tasks

    execution = execution or Execution()
    workers, note = cap_workers(execution.workers, tasks=max(1, len(todo)), what="images to analyse")
    if note:
        warnings.warn(note, TenfoldWarning, stacklevel=2)
        execution = replace(execution, workers=workers)
    # several images: one per worker, tiles inside an image serial; one image: its tiles use the workers
    images_parallel = len(todo) > 1 and execution.parallel
    inner = {"tile_size": execution.tile_size, "overlap": execution.overlap}
    if not images_parallel:
        inner.update(workers=execution.workers, scheduler=execution.scheduler)
    else:
        inner.update(workers=1)
    tasks = [(_analyse_image, (str(it.path), str(out / it.folder), params.to_dict(), frame, frame_range, figures,
                               rerun, inner, align, nonrigid)) for it in todo]
    errors = {}
    stop = False
    for k, res in map_tasks(tasks, execution if images_parallel else None):
        it = todo[k]
        it.state = "ok" if res["status"] == "ok" else "failed"
        it.error = "" if it.state == "ok" else res["status"]
        it.seconds = res["seconds"]
        if "traceback" in res:
            errors[str(it.path)] = res["traceback"]
        done += 1
        if progress is not None and progress(done, total, f"{it.path.name}: {res['status']}") is False:
            stop = True
            break
    table = comparison_table(items, out)
    _commit_comparison(table, out, errors)
    if stop:
        raise Cancelled(f"batch stopped after {done} of {total} images; run it again to resume")
    return table


def _get(d, *keys):
    for k in keys:
        if not isinstance(d, dict):
            return None
        d = d.get(k)
    return d


def _rows_for(item: BatchItem, out: Path) -> list[dict]:
    base = {"image": str(item.path), "folder": item.folder, "seconds": item.seconds}
    if item.state == "failed":
        return [{**base, "status": item.error or "failed", "region": 0}]
    if item.state == "todo":
        return [{**base, "status": "not analysed (batch stopped)", "region": 0}]
    try:
        s = json.loads((out / item.folder / "summary.json").read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        return [{**base, "status": f"results unreadable: {exc}", "region": 0}]
    ps = s.get("pixel_size_nm")
    lad, cen = _get(s, "ladder", "columns") or {}, _get(s, "ladder", "centres") or {}
    counts = _get(s, "tiling", "tile_counts") or {}
    n_thick, n_thin = counts.get("thick_rhombus"), counts.get("thin_rhombus")
    ratio = n_thick / n_thin if n_thick and n_thin else None
    # Poisson counting errors of two independent counts, propagated to their ratio (first-order; common practice)
    ratio_se = ratio * math.sqrt(1.0 / n_thick + 1.0 / n_thin) if ratio else None
    shape = _get(s, "input", "shape") or [None, None]
    masked = _get(s, "input", "masked_fraction") or 0.0
    image_area = (shape[0] * shape[1] * (1.0 - masked) * ps * ps) if ps and None not in shape else None
    common = {
        **base, "status": "ok", "pixel_size_nm": ps,
        "ladder_d0_nm": lad.get("d0_nm"), "ladder_d0_px": lad.get("d0_px"), "ladder_holds": lad.get("holds"),
        "ladder_rms_deviation_pct": lad.get("rms_deviation_pct"),
        "centre_ladder_d0_nm": cen.get("d0_nm"), "centre_ladder_holds": cen.get("holds"),
        "n_thick": n_thick, "n_thin": n_thin, "thick_thin_ratio": ratio, "thick_thin_ratio_se": ratio_se,
        "fourier_order": _get(s, "fourier", "rotational_order"),
        "distortion_axis_ratio": _get(s, "fourier", "distortion", "axis_ratio"),
        "distortion_warning": _get(s, "fourier", "distortion", "warning"),
        "notes": " | ".join(str(n) for n in s.get("notes") or []),
    }
    rows = []
    for reg in s.get("regions") or [{"region": 0, "n_columns": s.get("n_columns")}]:
        n = reg.get("n_columns") or 0
        area = image_area if reg.get("region", 0) == 0 else None
        row = {**common, "region": reg.get("region", 0), "n_columns": reg.get("n_columns"),
               "n_ring_motifs": reg.get("n_ring_motifs"), "n_complete_rings": reg.get("n_complete_rings"),
               "n_pentagons": reg.get("n_pentagons"), "area_nm2": area,
               "column_density_per_nm2": n / area if area else None}
        for key, v in reg.items():
            m = re.fullmatch(r"n_species_(\d+)", key)
            if m and n:
                row[f"species_{m.group(1)}_fraction"] = v / n
        rows.append(row)
    return rows


def comparison_table(items: list[BatchItem], out_dir) -> pd.DataFrame:
    """One row per image and region, read from the results folders in ``out_dir`` (see ``COMPARISON_FIELDS``)."""
    out = Path(out_dir)
    rows = [r for it in items for r in _rows_for(it, out)]
    df = pd.DataFrame(rows)
    species = sorted((c for c in df.columns if c.startswith("species_")), key=lambda c: int(c.split("_")[1]))
    for c in COMPARISON_FIELDS:
        if c not in df:
            df[c] = None
    order = list(COMPARISON_FIELDS)
    order = order[:order.index("n_ring_motifs")] + species + order[order.index("n_ring_motifs"):]
    df = df[order]
    for c in df.columns:
        if c not in ("image", "status", "folder", "notes", "ladder_holds", "centre_ladder_holds",
                     "distortion_warning"):
            df[c] = pd.to_numeric(df[c], errors="coerce").astype(np.float64)
    for c in ("ladder_holds", "centre_ladder_holds", "distortion_warning"):
        df[c] = df[c].map({True: "yes", False: "no"}).fillna("")
    for c in ("n_columns", "n_ring_motifs", "n_complete_rings", "n_pentagons", "n_thick", "n_thin",
              "fourier_order"):
        df[c] = df[c].round().astype("Int64")  # counts stay whole numbers; empty for failed images
    df["region"] = df["region"].fillna(0).astype(np.int64)
    df["notes"] = df["notes"].fillna("")
    return df


def _commit_comparison(table: pd.DataFrame, out: Path, errors: dict) -> None:
    """Write the batch-level files in a work folder, then move them in under the batch folder's manifest."""
    _outdir.clean_stale(out)
    tmp = _outdir.work_folder(out)
    try:
        rels = _write_comparison(table, tmp, errors)
        _outdir.commit(tmp, out, rels, flag="--out")
    except OSError as exc:
        shutil.rmtree(tmp, ignore_errors=True)
        raise TenfoldInputError(
            f"--out {out}: the comparison could not be written ({exc.strerror or exc}"
            f"{f': {exc.filename}' if exc.filename else ''}); the per-image folders are complete, run the batch "
            "again once the cause is fixed (finished images are skipped)"
        ) from exc
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise


def _write_comparison(table: pd.DataFrame, out: Path, errors: dict) -> list[str]:
    """Write the comparison files into ``out``; returns their paths relative to it."""
    from .export import _write_csv, _write_workbook

    _write_csv(table, out / "comparison.csv")
    units = [COMPARISON_FIELDS.get(c, ("", ""))[0] for c in table.columns]
    _write_workbook({"comparison": (table, units)}, out / "comparison.xlsx")
    rels = ["comparison.csv", "comparison.xlsx"]
    if errors:
        (out / "batch_errors.json").write_text(json.dumps(errors, indent=2) + "\n", encoding="utf-8")
        rels.append("batch_errors.json")
    fig = comparison_figure(table)
    if fig is not None:
        from .export import _save_figure

        (out / "figures").mkdir(exist_ok=True)
        _save_figure(fig, out / "figures" / "comparison")
        rels += [p.relative_to(out).as_posix() for p in sorted((out / "figures").iterdir())]
    return rels


def comparison_figure(table: pd.DataFrame):
    """Thick/thin ratio (+- its counting error), ladder base and column density per image; None without rows."""
    ok = table[table["status"] == "ok"]
    if ok.empty:
        return None
    from matplotlib.figure import Figure

    labels = [Path(p).stem + (f" r{r}" if r else "") for p, r in zip(ok["image"], ok["region"])]
    x = np.arange(len(ok))
    fig = Figure(figsize=(max(5.0, 0.45 * len(ok) + 2.0), 7.0), layout="constrained")
    axes = fig.subplots(3, 1, sharex=True)
    axes[0].errorbar(x, ok["thick_thin_ratio"], yerr=ok["thick_thin_ratio_se"], fmt="o", capsize=3, color="#1b5fad")
    axes[0].axhline((1 + math.sqrt(5)) / 2, color="#e23c55", linewidth=0.8, linestyle="--",
                    label="tau (ideal Penrose rhombus tiling)")
    axes[0].set_ylabel("thick / thin")
    axes[0].legend(frameon=False, fontsize="small")
    calibrated = ok["ladder_d0_nm"].notna().any()
    axes[1].plot(x, ok["ladder_d0_nm"] if calibrated else ok["ladder_d0_px"], "s", color="#f5a623")
    axes[1].set_ylabel(f"ladder base d0 ({'nm' if calibrated else 'px'})")
    axes[2].plot(x, ok["column_density_per_nm2"], "D", color="#2a1a10")
    axes[2].set_ylabel("columns per nm$^2$")
    axes[2].set_xticks(x, labels, rotation=45, ha="right", fontsize="small")
    axes[0].set_title(f"comparison of {len(ok)} image(s)" + ("" if calibrated else " (uncalibrated: d0 in px)"))
    return fig
