"""Reading micrographs into a :class:`Micrograph`, and writing calibrated TIFFs.

Only numpy and the small format libraries (tifffile, mrcfile, imageio) are imported here, and only inside the
functions that need them, so ``import tenfold.analysis.io`` stays light.
"""

from __future__ import annotations

import math
import os
from pathlib import Path

import numpy as np

from ._errors import TenfoldInputError

__all__ = ["write_tiff", "read_micrograph", "micrograph_from_array", "supported_suffixes"]

# dtypes ImageJ TIFFs hold as they are; anything else is written as float32.
_IMAGEJ_DTYPES = (np.uint8, np.uint16, np.float32)


def _check_pixel_size(pixel_size_nm, what: str = "pixel_size_nm") -> float | None:
    if pixel_size_nm is None:
        return None
    try:
        value = float(pixel_size_nm)
    except (TypeError, ValueError):
        raise TenfoldInputError(
            f"{what}={pixel_size_nm!r} is not a number; give the pixel size in nm, e.g. 0.015"
        ) from None
    if not math.isfinite(value) or value <= 0:
        raise TenfoldInputError(
            f"{what}={pixel_size_nm!r} must be a positive finite number of nm per pixel, e.g. 0.015"
        )
    return value


def write_tiff(
    path,
    image,
    *,
    pixel_size_nm: float | None,
    description: str | None = None,
    overwrite: bool = False,
) -> Path:
    """Write a 2-D image as a zlib-compressed TIFF with its calibration in the ImageJ convention.

    Parameters
    ----------
    path : str or path-like
        Output file (``.tif`` / ``.tiff``).
    image : array_like, shape (rows, cols)
        The image. uint8, uint16 and float32 are written as they are; every other dtype is written as float32.
    pixel_size_nm : float or None
        Square pixel size in nm. Written as XResolution = YResolution = pixels per nm with ImageJ metadata
        ``unit='nm'``. None writes an uncalibrated file (no resolution, no unit).
    description : str, optional
        Free text stored as the ImageJ ``Info`` property (read back by ImageJ/Fiji and tifffile).
    overwrite : bool
        Replace an existing file. Default False: an existing file raises.

    Returns
    -------
    Path
        The written file.

    Raises
    ------
    TenfoldInputError
        The file exists and ``overwrite`` is False, the image is not 2-D, or the pixel size is not positive.

    Notes
    -----
    The ImageJ convention is an open one: the TIFF resolution tags give pixels per unit, ResolutionUnit is
    'none', and the unit name sits in the ImageJ ImageDescription (``unit=nm``). ImageJ/Fiji, tifffile and
    most microscopy readers understand it.

    Examples
    --------
    >>> write_tiff("demo.tif", np.zeros((64, 64), np.float32), pixel_size_nm=0.02)  # doctest: +SKIP
    """
    import tifffile

    path = Path(path)
    pixel_size_nm = _check_pixel_size(pixel_size_nm)
    arr = np.asarray(image)
    if arr.ndim != 2:
        raise TenfoldInputError(
            f"write_tiff({path.name}): image must be 2-D (rows, cols), got shape {arr.shape}"
        )
    if path.is_dir():
        raise TenfoldInputError(f"{path}: is a directory; give a file name ending in .tif")
    if path.exists() and not overwrite:
        raise TenfoldInputError(
            f"{path}: file already exists; pass overwrite=True to replace it or choose another name"
        )
    if arr.dtype.type not in _IMAGEJ_DTYPES:
        arr = arr.astype(np.float32)
    metadata: dict = {}
    kwargs: dict = {}
    if pixel_size_nm is not None:
        metadata["unit"] = "nm"
        kwargs["resolution"] = (1.0 / pixel_size_nm, 1.0 / pixel_size_nm)
    if description:
        metadata["Info"] = str(description)
    tifffile.imwrite(
        path, arr, imagej=True, metadata=metadata, compression="zlib", **kwargs
    )
    return path


def supported_suffixes() -> tuple[str, ...]:
    """File suffixes :func:`read_micrograph` accepts (lower case, with the dot)."""
    return tuple(sorted(_SUFFIXES))


_SUFFIXES = {
    ".tif": "tiff",
    ".tiff": "tiff",
    ".mrc": "mrc",
    ".mrcs": "mrc",
    ".st": "mrc",
    ".png": "imageio",
    ".jpg": "imageio",
    ".jpeg": "imageio",
    ".bmp": "imageio",
    ".dm3": "vendor",
    ".dm4": "vendor",
    ".emd": "vendor",
    ".ser": "vendor",
}


def read_micrograph(path, *, pixel_size_nm=None, frame=None, frame_range=None):
    """Read a micrograph file (not finished yet)."""
    raise NotImplementedError("read_micrograph is being written")


def micrograph_from_array(array, *, pixel_size_nm=None, name=""):
    """Wrap an in-memory array (not finished yet)."""
    raise NotImplementedError("micrograph_from_array is being written")
