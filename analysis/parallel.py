"""Large images and many images: tiled column finding, memory-mapped reading and a dask cluster.

Tiled column finding (:func:`find_columns_tiled`), as numbered steps:

1. The column scale (spacing and width) is estimated ONCE, on a central crop of at most ``SCALE_CROP_PX``
   square (or taken from the parameters), and handed to every tile: tiles that chose their own scale would
   disagree at the seams.
2. The image is cut into a grid of core tiles of ``tile_size`` px; each tile is analysed with a halo of
   ``overlap`` px on every side (default: 4 column spacings + 6 sigma, at least 32 px), so every column of the
   core has the same neighbourhood as in the whole image: detection filters, fit patch and neighbour
   subtraction all reach less than that far.
3. Each tile keeps the columns whose rounded position lies in its core widened by ``SEAM_BAND_PX``; columns in
   the band are found by both neighbouring tiles and de-duplicated (pairs closer than the finder's own duplicate
   distance, ``max(1, sigma, 0.4 spacing)``; the copy inside its own tile's core is kept). So a column on a seam
   is neither lost nor doubled.
4. On the merged table: ``min_mass``, the species classes (one mixture fit over every column, as untiled), the
   region labels, ids in (y, x) order.

What stays local to a tile: the significance cut and the noise level are chosen per tile by the finder (from the
tile's own area and noise), so columns right at the detection limit can differ from an untiled run; columns
well above it match it to fit precision (test: within 1e-3 px).

Parallel work (:func:`map_tasks`) runs serially, on an embedded ``distributed.LocalCluster`` (``workers``
processes of one thread each, started on demand and closed after), or on an existing scheduler
(``scheduler='tcp://host:8786'``; the workers must see the same files and output folder).

Memory-mapped reading (:func:`read_micrograph_mapped`): uncompressed TIFF (tifffile) and MRC (mrcfile) are
mapped, not read, so a tile reads only its window and a 16k x 16k scan never has to fit in memory whole.
"""

from __future__ import annotations

import math
import os
import time
import warnings
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from ._errors import TenfoldInputError, TenfoldWarning
from ._image import ImageMeta, Micrograph
from ._progress import report

__all__ = ["Execution", "find_columns_tiled", "map_tasks", "read_micrograph_mapped", "mapped_if_tiled",
           "image_shape", "tile_grid",
           "AUTO_TILE_ABOVE_PX", "AUTO_TILE_SIZE", "SCALE_CROP_PX", "SEAM_BAND_PX"]

#: images with more pixels than this square are tiled automatically (an untiled 4096^2 run peaks near 2 GB)
AUTO_TILE_ABOVE_PX = 4096
#: core tile size chosen automatically, px
AUTO_TILE_SIZE = 2048
#: side of the central crop the scale is estimated on for a tiled run, px
SCALE_CROP_PX = 2048
#: each tile keeps columns this far outside its core too; the seam duplicates are then removed
SEAM_BAND_PX = 2.0


@dataclass
class Execution:
    """How to run: tiles, workers, scheduler.

    Attributes
    ----------
    tile_size : int or None
        Core tile size in px; None = automatic (tiles of ``AUTO_TILE_SIZE`` when a side exceeds
        ``AUTO_TILE_ABOVE_PX``), 0 = never tile.
    workers : int or None
        Worker processes for tiles or images; None = the number of CPU cores, 1 = serial in this process.
    scheduler : str or None
        Address of a running dask scheduler to use instead of an embedded local cluster.
    overlap : int or None
        Halo around each tile, px (None = automatic from the column scale).
    """

    tile_size: int | None = None
    workers: int | None = None
    scheduler: str | None = None
    overlap: int | None = None

    def __post_init__(self) -> None:
        if self.tile_size is not None and not (isinstance(self.tile_size, (int, np.integer)) and
                                               (self.tile_size == 0 or self.tile_size >= 64)):
            raise TenfoldInputError(f"tile size must be 0 (never tile) or a whole number >= 64 px, got "
                                    f"{self.tile_size!r}")
        if self.workers is not None and not (isinstance(self.workers, (int, np.integer)) and self.workers >= 1):
            raise TenfoldInputError(f"workers must be a whole number >= 1, got {self.workers!r}")
        if self.overlap is not None and not (isinstance(self.overlap, (int, np.integer)) and self.overlap >= 0):
            raise TenfoldInputError(f"overlap must be a whole number >= 0 px, got {self.overlap!r}")

    @property
    def n_workers(self) -> int:
        return int(self.workers) if self.workers is not None else (os.cpu_count() or 1)

    @property
    def parallel(self) -> bool:
        return self.scheduler is not None or self.n_workers > 1

    def tiles_for(self, shape) -> int | None:
        """Core tile size to use for an image of ``shape``, or None for an untiled run."""
        if self.tile_size == 0:
            return None
        if self.tile_size is None:
            return AUTO_TILE_SIZE if max(shape) > AUTO_TILE_ABOVE_PX else None
        return int(self.tile_size) if max(shape) > self.tile_size else None


# --------------------------------------------------------------------------------------------------------------
# running tasks


def _client(execution: Execution):
    try:
        from distributed import Client, LocalCluster
    except ImportError:  # pragma: no cover - a dependency; kept for a clear message
        raise TenfoldInputError("parallel runs need the 'distributed' package: pip install distributed") from None
    if execution.scheduler:
        try:
            return Client(execution.scheduler, timeout="20s"), None
        except Exception as exc:
            raise TenfoldInputError(f"--scheduler {execution.scheduler}: cannot connect ({type(exc).__name__}: "
                                    f"{exc}); check the address or leave it out for a local cluster") from None
    cluster = LocalCluster(n_workers=execution.n_workers, threads_per_worker=1, processes=True,
                           dashboard_address=None)
    return Client(cluster), cluster


def map_tasks(tasks: list[tuple[Callable, tuple]], execution: Execution | None = None) -> Iterator[tuple[int, object]]:
    """Run ``func(*args)`` for every task; yield ``(index, result)`` as each finishes.

    Serial (in order) when there is one task or ``execution`` asks for one worker; otherwise on dask.distributed
    (embedded local cluster, or ``execution.scheduler``), in completion order. An exception in a task is raised
    here (batch tasks catch their own).
    """
    execution = execution or Execution(workers=1)
    if len(tasks) <= 1 or not execution.parallel:
        for k, (func, args) in enumerate(tasks):
            yield k, func(*args)
        return
    from distributed import as_completed

    client, cluster = _client(execution)
    try:
        futures = [client.submit(func, *args, pure=False) for func, args in tasks]
        index = {f.key: k for k, f in enumerate(futures)}
        for fut in as_completed(futures):
            yield index[fut.key], fut.result()
    finally:
        client.close()
        if cluster is not None:
            cluster.close()


# --------------------------------------------------------------------------------------------------------------
# tiles


def tile_grid(shape, tile_size: int, overlap: int) -> list[tuple[tuple[int, int, int, int], tuple[int, int, int, int]]]:
    """Core and halo windows ``((r0, r1, c0, c1) core, (r0, r1, c0, c1) with halo)`` covering ``shape``.

    Cores are disjoint and cover the image; the last row/column of tiles takes the remainder (a sliver thinner
    than a quarter tile is merged into its neighbour).
    """
    def cuts(n):
        edges = list(range(0, n, tile_size)) + [n]
        if len(edges) > 2 and edges[-1] - edges[-2] < tile_size // 4:
            edges.pop(-2)
        return list(zip(edges[:-1], edges[1:]))

    rows, cols = shape
    out = []
    for r0, r1 in cuts(rows):
        for c0, c1 in cuts(cols):
            out.append(((r0, r1, c0, c1), (max(0, r0 - overlap), min(rows, r1 + overlap),
                                           max(0, c0 - overlap), min(cols, c1 + overlap))))
    return out


def _tile_task(window, data, valid, kwargs) -> tuple[pd.DataFrame, dict]:
    """Find columns in one tile (halo included); positions shifted back to whole-image pixels."""
    from .columns import find_columns

    r0, _, c0, _ = window
    img = np.asarray(data)
    ok = None if valid is None else np.asarray(valid, dtype=bool)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", TenfoldWarning)
        try:
            cols, info = find_columns(img, valid=ok, **kwargs)
        except TenfoldInputError as exc:
            if "fewer than 16 valid pixels" in str(exc):  # a fully masked tile has no columns
                return pd.DataFrame(), {"n_columns": 0, "notes": []}
            raise
    info = dict(info)
    info["warnings"] = [str(w.message) for w in caught]
    cols = cols.copy()
    cols["x_px"] += c0
    cols["y_px"] += r0
    return cols, info


def _resolve_scale(image, valid, *, pixel_size_nm, dark_columns, column_spacing_nm, column_spacing_px,
                   column_diameter_nm, column_diameter_px) -> tuple[float, float, dict]:
    """(spacing_px, diameter_px, how): given lengths win; the others from a central crop of the image."""
    ps = pixel_size_nm
    spacing = column_spacing_px if column_spacing_px is not None else (
        column_spacing_nm / ps if column_spacing_nm is not None and ps else None)
    diameter = column_diameter_px if column_diameter_px is not None else (
        column_diameter_nm / ps if column_diameter_nm is not None and ps else None)
    for name, nm in (("column_spacing", column_spacing_nm), ("column_diameter", column_diameter_nm)):
        if nm is not None and not ps:
            raise TenfoldInputError(f"{name}_nm is in nm but the image has no pixel size; give the pixel size, or "
                                    f"{name}_px instead")
    how = {"spacing": "given" if spacing is not None else None, "diameter": "given" if diameter is not None else None}
    if spacing is None or diameter is None:
        from .scale import estimate_scale

        rows, cols = np.shape(image)
        h, w = min(rows, SCALE_CROP_PX), min(cols, SCALE_CROP_PX)
        r0, c0 = (rows - h) // 2, (cols - w) // 2
        crop = np.asarray(image[r0:r0 + h, c0:c0 + w])
        vcrop = None if valid is None else np.asarray(valid[r0:r0 + h, c0:c0 + w], dtype=bool)
        est = estimate_scale(crop, valid=vcrop, dark_columns=dark_columns)
        where = f"estimated once on the central {h} x {w} px crop and used for every tile"
        if spacing is None:
            spacing, how["spacing"] = float(est.spacing_px), f"{est.spacing_method}; {where}"
        if diameter is None:
            diameter, how["diameter"] = 4.5 * float(est.sigma_px), f"4.5 x ({est.sigma_method}); {where}"
    return float(spacing), float(diameter), how


def _merge_tiles(parts, grid, dedup_px: float) -> tuple[pd.DataFrame, int]:
    """Keep each tile's columns within its core (+ the seam band); remove the seam duplicates."""
    from scipy.spatial import cKDTree

    kept = []
    for k, ((cols, _), (core, _)) in enumerate(zip(parts, grid)):
        if cols is None or len(cols) == 0:
            continue
        r0, r1, c0, c1 = core
        x, y = cols["x_px"].to_numpy(), cols["y_px"].to_numpy()
        b = SEAM_BAND_PX
        keep = (x >= c0 - 0.5 - b) & (x < c1 - 0.5 + b) & (y >= r0 - 0.5 - b) & (y < r1 - 0.5 + b)
        sub = cols[keep].copy()
        xs, ys = x[keep], y[keep]
        sub["_own"] = (xs >= c0 - 0.5) & (xs < c1 - 0.5) & (ys >= r0 - 0.5) & (ys < r1 - 0.5)
        sub["_tile"] = k
        kept.append(sub)
    if not kept:
        return pd.DataFrame(), 0
    merged = pd.concat(kept, ignore_index=True)
    n_dup = 0
    if len(merged) > 1:
        xy = merged[["x_px", "y_px"]].to_numpy()
        pairs = cKDTree(xy).query_pairs(dedup_px, output_type="ndarray")
        if pairs.size:
            tile = merged["_tile"].to_numpy()
            pairs = pairs[tile[pairs[:, 0]] != tile[pairs[:, 1]]]  # within a tile the finder has decided already
            own = merged["_own"].to_numpy()
            snr = merged["snr"].to_numpy() if "snr" in merged else np.zeros(len(merged))
            a, b_ = pairs[:, 0], pairs[:, 1]
            # the copy inside its own tile's core wins; if both or neither are, the more significant one
            a_wins = np.where(own[a] != own[b_], own[a], snr[a] >= snr[b_])
            lose = np.unique(np.where(a_wins, b_, a))
            n_dup = int(lose.size)
            merged = merged.drop(merged.index[lose])
    # a column in the band outside its own core that nobody else found (the other tile dropped it) is kept:
    # losing it would be worse than a position the neighbouring tile did not confirm
    return merged.drop(columns=["_own", "_tile"]).reset_index(drop=True), n_dup


def find_columns_tiled(image, *, tile_size: int, valid=None, pixel_size_nm=None, regions=None, dark_columns=False,
                       column_diameter_nm=None, column_spacing_nm=None, column_diameter_px=None,
                       column_spacing_px=None, min_mass=None, flatten=False, n_species=None, rng=0,
                       execution: Execution | None = None, overlap: int | None = None,
                       progress=None) -> tuple[pd.DataFrame, dict]:
    """:func:`~tenfold.analysis.columns.find_columns` in overlapping tiles, merged into one columns table.

    Parameters
    ----------
    image : (H, W) array or memory map
        The micrograph; only one tile (with its halo) is read into memory at a time per worker.
    tile_size : int
        Core tile size, px (>= 64).
    execution : Execution, optional
        Workers / scheduler for the tiles (default serial).
    overlap : int, optional
        Halo, px; default 4 x spacing + 6 x sigma, at least 32.
    valid, pixel_size_nm, regions, dark_columns, column_*, min_mass, flatten, n_species, rng, progress
        As for ``find_columns``.

    Returns
    -------
    columns : DataFrame
        Conformed to ``_schema.COLUMNS`` with the finder's extras, ids in (y, x) order.
    info : dict
        ``automatic`` (scale and how, trackpy settings of the first tile), ``tiling`` (tile size, overlap,
        tiles, seam duplicates removed), ``counts`` (summed over tiles), ``species``, ``notes``, ``seconds``.

    Examples
    --------
    >>> from tenfold.analysis.synthetic import render_image
    >>> g = np.arange(8.0, 250.0, 12.0)
    >>> x, y = (a.ravel() for a in np.meshgrid(g, g))
    >>> img = render_image(x, y, np.full(x.size, 4000.0), shape=(256, 256), sigma_px=1.6, background=20.0, rng=0)
    >>> cols, info = find_columns_tiled(img, tile_size=128, n_species=0)
    >>> len(cols) == x.size, info["tiling"]["n_tiles"]
    (True, 4)
    """
    from . import _schema
    from .species import classify_species

    t0 = time.perf_counter()
    if np.ndim(image) != 2:
        raise TenfoldInputError(f"find_columns_tiled: image must be 2-D, got shape {np.shape(image)}")
    if not (isinstance(tile_size, (int, np.integer)) and tile_size >= 64):
        raise TenfoldInputError(f"tile size must be a whole number >= 64 px, got {tile_size!r}")
    if flatten:
        raise TenfoldInputError("flatten=True fits one background surface to the whole image, which tiles cannot "
                                "repeat; run untiled (tile size 0) or without flatten")
    spacing, diameter, how = _resolve_scale(
        image, valid, pixel_size_nm=pixel_size_nm, dark_columns=dark_columns, column_spacing_nm=column_spacing_nm,
        column_spacing_px=column_spacing_px, column_diameter_nm=column_diameter_nm,
        column_diameter_px=column_diameter_px)
    sigma = diameter / 4.5
    if overlap is None:
        overlap = max(32, int(math.ceil(4.0 * spacing + 6.0 * sigma)))
    grid = tile_grid(np.shape(image), int(tile_size), int(overlap))
    kwargs = dict(pixel_size_nm=pixel_size_nm, dark_columns=dark_columns, column_spacing_px=spacing,
                  column_diameter_px=diameter, n_species=0, rng=rng)
    tasks = []
    for _, halo in grid:
        r0, r1, c0, c1 = halo
        v = None if valid is None else np.asarray(valid[r0:r1, c0:c1], dtype=bool)
        if v is not None and v.all():
            v = None
        tasks.append((_tile_task, (halo, np.asarray(image[r0:r1, c0:c1]), v, kwargs)))
    report(progress, 0.0, f"finding columns in {len(grid)} tiles of {tile_size} px (+{overlap} px halo)")
    parts: list = [None] * len(tasks)
    for done, (k, res) in enumerate(_lazy_tasks(tasks, execution), start=1):
        parts[k] = res
        report(progress, 0.9 * done / len(tasks), f"tile {done} of {len(tasks)}")
    dedup = max(1.0, sigma, 0.4 * spacing)
    fit, n_dup = _merge_tiles(parts, grid, dedup)
    infos = [p[1] for p in parts]
    notes: list[str] = []
    for inf in infos:
        for n in list(inf.get("notes", [])) + list(inf.get("warnings", [])):
            if n not in notes and "uncalibrated" not in n and "no columns survived" not in n:
                notes.append(n)
    counts: dict = {}
    for inf in infos:
        for key, v in (inf.get("counts") or {}).items():
            if isinstance(v, (int, float)):
                counts[key] = counts.get(key, 0) + v
    counts["seam_duplicates_removed"] = n_dup
    if len(fit) == 0:
        fit = pd.DataFrame({f.name: pd.Series(dtype=f.dtype if f.dtype != "object" else object)
                            for f in _schema.COLUMNS})
        for extra in ("x_err_px", "y_err_px", "amplitude_err", "snr"):
            fit[extra] = pd.Series(dtype=float)
    if min_mass is not None:
        fit = fit[fit["intensity"].to_numpy() >= float(min_mass)]
        counts["after_min_mass"] = int(len(fit))
    region = np.zeros(len(fit), dtype=np.int64)
    if regions:
        from .region import label_points

        region = label_points(fit["x_px"].to_numpy(), fit["y_px"].to_numpy(), regions)
        fit = fit[region > 0].copy()
        region = region[region > 0]
    fit = fit.copy()
    fit["region"] = region
    fit = fit.sort_values(["y_px", "x_px"], kind="stable").reset_index(drop=True)
    fit["id"] = np.arange(len(fit), dtype=np.int64)
    ps = np.nan if pixel_size_nm is None else float(pixel_size_nm)
    for q in ("x", "y", "sigma", "pos_err"):
        fit[f"{q}_nm"] = fit[f"{q}_px"] * ps
    report(progress, 0.95, "species")
    fit["species"] = -1
    fit["species_prob"] = np.nan
    fit, sp_info = classify_species(fit, n_species=n_species, rng=rng)
    notes.extend(n for n in sp_info.get("notes", []) if n not in notes)
    if pixel_size_nm is None:
        notes.append("image uncalibrated: *_nm columns are NaN")
    extras = [c for c in ("x_err_px", "y_err_px", "amplitude_err", "snr") if c in fit]
    table = _schema.conform(fit[[f.name for f in _schema.COLUMNS] + extras], _schema.COLUMNS)
    first = next((i for i in infos if i.get("automatic")), {})
    auto = dict(first.get("automatic") or {})
    auto["spacing"] = {"value_px": spacing, "how": how["spacing"]}
    auto["sigma"] = {"value_px": sigma, "how": f"{how['diameter']} / 4.5"}
    auto.pop("significance", None)  # chosen per tile; listed under tiling
    info = {
        "automatic": auto,
        "tiling": {
            "tile_size_px": int(tile_size), "overlap_px": int(overlap), "n_tiles": len(grid),
            "seam_band_px": SEAM_BAND_PX, "duplicate_distance_px": dedup, "seam_duplicates_removed": n_dup,
            "significance_cut_per_tile": [(_tile_cut(i)) for i in infos],
            "how": "scale estimated once, tiles analysed with a halo, columns kept in their tile's core, seam "
                   "duplicates removed; species classified on the merged table",
        },
        "counts": counts,
        "species": sp_info,
        "calibrated": pixel_size_nm is not None,
        "n_columns": int(len(table)),
        "seconds": time.perf_counter() - t0,
        "notes": notes,
    }
    report(progress, 1.0, f"{len(table)} columns")
    return table, info


def _tile_cut(info: dict):
    sig = (info.get("automatic") or {}).get("significance") or {}
    return sig.get("z_cut")


def _lazy_tasks(tasks, execution):
    return map_tasks(tasks, execution or Execution(workers=1))


# --------------------------------------------------------------------------------------------------------------
# memory-mapped reading


def image_shape(path) -> tuple[int, ...] | None:
    """Shape of the image data in a TIFF or MRC file from its header (nothing read); None for other files or
    when the header cannot be read."""
    p = Path(path)
    try:
        if p.suffix.lower() in (".tif", ".tiff"):
            import tifffile

            with tifffile.TiffFile(p) as tf:
                return tuple(int(s) for s in tf.series[0].shape)
        if p.suffix.lower() in (".mrc", ".mrcs", ".st"):
            import mrcfile

            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                with mrcfile.open(p, mode="r", header_only=True) as mrc:
                    nz, ny, nx = (int(mrc.header.nz), int(mrc.header.ny), int(mrc.header.nx))
                    return (ny, nx) if nz <= 1 else (nz, ny, nx)
    except Exception:
        return None
    return None


def mapped_if_tiled(path, execution: Execution, *, pixel_size_nm=None, frame=None, frame_range=None):
    """The memory-mapped micrograph when ``execution`` will tile this file's image and the file can be mapped;
    None otherwise (read it whole with ``read_micrograph``)."""
    shape = image_shape(path)
    if frame_range is not None or shape is None or len(shape) < 2 or execution.tiles_for(shape[-2:]) is None:
        return None
    try:
        return read_micrograph_mapped(path, pixel_size_nm=pixel_size_nm, frame=frame)
    except TenfoldInputError:
        return None


def read_micrograph_mapped(path, *, pixel_size_nm=None, frame=None) -> Micrograph:
    """Open an uncompressed TIFF or an MRC file as a memory map (nothing is read until a window is sliced).

    Parameters
    ----------
    path : str or path-like
        ``.tif``/``.tiff`` (uncompressed, contiguous image data) or ``.mrc``/``.mrcs``/``.st``.
    pixel_size_nm : float, optional
        Overrides the file's calibration.
    frame : int, optional
        For a stack: the frame (0-based).

    Returns
    -------
    Micrograph
        ``data`` a read-only memory map in the file's dtype; ``valid`` a broadcast all-True view (NaN pixels
        are masked by the column finder itself); ``meta`` with calibration and the file's sha256.

    Raises
    ------
    TenfoldInputError
        The file cannot be mapped (compressed or tiled TIFF, other format): read it with ``read_micrograph``.
    """
    from . import io as _io

    p = Path(path)
    if not p.is_file():
        raise TenfoldInputError(f"{p}: no such file")
    suffix = p.suffix.lower()
    cal = _io._Calib()
    notes: list[str] = []
    if suffix in (".tif", ".tiff"):
        import tifffile

        try:
            with tifffile.TiffFile(p) as tf:
                _io._tiff_calibration(tf, cal, p.name)
            data = tifffile.memmap(p, mode="r")
        except Exception as exc:  # tifffile raises many kinds for compressed, tiled or damaged files
            raise TenfoldInputError(f"{p}: TIFF cannot be memory-mapped ({type(exc).__name__}: {exc}); it is "
                                    "compressed, tiled or damaged. Read it whole, or save it uncompressed (or as MRC) "
                                    "for tiled runs") from None
    elif suffix in (".mrc", ".mrcs", ".st"):
        import mrcfile

        try:
            with warnings.catch_warnings(record=True) as caught:
                warnings.simplefilter("always")
                with mrcfile.mmap(p, mode="r") as mrc:
                    shape, dtype, offset = mrc.data.shape, mrc.data.dtype, mrc.data.offset
                    vs = mrc.voxel_size
                    vx, vy = float(vs.x), float(vs.y)
        except Exception as exc:
            raise TenfoldInputError(f"{p}: MRC file cannot be memory-mapped ({type(exc).__name__}: {exc})") from None
        notes.extend(f"{p.name}: MRC header: {w.message}" for w in caught)
        if vx > 0 and vy > 0:
            cal.set(vx * 0.1, vy * 0.1, "mrc-voxel")  # MRC voxel size is in angstrom
        data = np.memmap(p, dtype=dtype, mode="r", offset=offset, shape=shape)
    else:
        raise TenfoldInputError(f"{p}: only uncompressed TIFF and MRC files can be memory-mapped")
    frames = ""
    if data.ndim == 3:
        if frame is None:
            raise TenfoldInputError(f"{p}: a stack of {data.shape[0]} frames; give a frame (--frame K) for a "
                                    "memory-mapped run")
        if not 0 <= frame < data.shape[0]:
            raise TenfoldInputError(f"{p}: frame {frame} out of range 0..{data.shape[0] - 1}")
        data, frames = data[frame], f"frame {frame}"
    elif data.ndim != 2:
        raise TenfoldInputError(f"{p}: image of shape {data.shape} is not 2-D")
    elif frame is not None:
        raise TenfoldInputError(f"{p}: a single image; leave out the frame")
    if pixel_size_nm is not None:
        ps, source = float(_io._check_pixel_size(pixel_size_nm)), "user"
    else:
        ps, source = _io._resolve_calibration(cal, str(p))
    notes.extend(cal.notes + cal.warnings)
    meta = ImageMeta(path=str(p.resolve()), pixel_size_nm=ps, calibration_source=source,
                     original_dtype=str(data.dtype), shape=tuple(int(s) for s in data.shape), frames=frames,
                     sha256=_io._sha256(p), notes=notes)
    return Micrograph(data, meta, np.broadcast_to(np.True_, data.shape))
