"""Large images and many images: tiled column finding, memory-mapped reading and a dask cluster.

Tiled column finding (:func:`find_columns_tiled`) is ``columns.find_columns`` with a tile size: one finder. The
image-wide choices (scale, noise model, detection levels, the fits' common width) are settled once on the central
sample, every tile (with a halo of ``columns.TILE_HALO_SPACINGS`` spacings) detects and fits with them, one
significance cut is taken from all tiles' candidates, and each column is kept by the tile whose core holds its
candidate pixel. Every step reaches less far than the halo, so a tiled run equals the untiled one (test: same
columns within 1e-3 px, same notes).

Parallel work (:func:`map_tasks`) runs serially, on an embedded ``distributed.LocalCluster`` (``workers``
processes of one thread each, started on demand and closed after), or on an existing scheduler
(``scheduler='tcp://host:8786'``; the workers must see the same files and output folder).

Memory-mapped reading (:func:`read_micrograph_mapped`): uncompressed TIFF (tifffile) and MRC (mrcfile) are
mapped, not read, so a tile reads only its window and a 16k x 16k scan never has to fit in memory whole.
"""

from __future__ import annotations

import os
import warnings
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from ._errors import TenfoldInputError
from ._image import ImageMeta, Micrograph

__all__ = ["Execution", "find_columns_tiled", "map_tasks", "read_micrograph_mapped", "mapped_if_tiled",
           "image_shape", "tile_grid",
           "AUTO_TILE_ABOVE_PX", "AUTO_TILE_SIZE"]

#: images with more pixels than this square are tiled automatically (an untiled 4096^2 run peaks near 2 GB)
AUTO_TILE_ABOVE_PX = 4096
#: core tile size chosen automatically, px
AUTO_TILE_SIZE = 2048


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


def find_columns_tiled(image, *, tile_size: int, execution: Execution | None = None, overlap: int | None = None,
                       **kwargs) -> tuple[pd.DataFrame, dict]:
    """:func:`~tenfold.analysis.columns.find_columns` in overlapping tiles: the same finder, the same result.

    A thin front: ``find_columns(image, tile_size=tile_size, overlap_px=overlap, execution=execution, **kwargs)``.
    The image-wide choices are settled once, every tile detects and fits with them, one significance cut is
    taken from all tiles' candidates and each column is kept by the tile whose core holds its candidate pixel;
    see ``columns.find_columns``.

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
    from .columns import find_columns

    return find_columns(image, tile_size=tile_size, overlap_px=overlap, execution=execution, **kwargs)


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
