"""Large images and many images: tiled column finding, memory-mapped reading and a dask cluster.

Tiled column finding (:func:`find_columns_tiled`) is ``columns.find_columns`` with a tile size: one finder. The
image-wide choices (scale, noise model, detection levels, the fits' common width) are settled once on the central
sample, every tile (with a halo of ``columns.TILE_HALO_SPACINGS`` spacings) detects and fits with them, one
significance cut is taken from all tiles' candidates, and each column is kept by the tile whose core holds its
candidate pixel. Every step reaches less far than the halo, so a tiled run equals the untiled one (test: same
columns within 1e-3 px, same notes).

Parallel work (:func:`map_tasks`), :class:`Execution` and :func:`tile_grid` live in the low module ``_tasks`` (the
column finder uses them, and nothing there imports a stage back); they are public here.

Memory-mapped reading (:func:`read_micrograph_mapped`): uncompressed TIFF (tifffile) and MRC (mrcfile) are
mapped, not read, so a tile reads only its window and a 16k x 16k scan never has to fit in memory whole.
"""

from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np
import pandas as pd

from ._errors import TenfoldInputError
from ._image import ImageMeta, Micrograph
from ._lengths import check_pixel_size
from ._tasks import AUTO_TILE_ABOVE_PX, AUTO_TILE_SIZE, Execution, map_tasks, tile_grid

__all__ = ["Execution", "find_columns_tiled", "map_tasks", "read_micrograph_mapped", "mapped_if_tiled",
           "image_shape", "tile_grid",
           "AUTO_TILE_ABOVE_PX", "AUTO_TILE_SIZE"]


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
        ps, source = float(check_pixel_size(pixel_size_nm)), "user"
    else:
        ps, source = _io._resolve_calibration(cal, str(p))
    notes.extend(cal.notes + cal.warnings)
    meta = ImageMeta(path=str(p.resolve()), pixel_size_nm=ps, calibration_source=source,
                     original_dtype=str(data.dtype), shape=tuple(int(s) for s in data.shape), frames=frames,
                     sha256=_io._sha256(p), notes=notes)
    return Micrograph(data, meta, np.broadcast_to(np.True_, data.shape))
