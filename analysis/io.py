"""Reading micrographs into a :class:`Micrograph`, and writing calibrated TIFFs.

Only numpy and the small format libraries (tifffile, mrcfile, imageio) are imported here, and only inside the
functions that need them, so ``import tenfold.analysis.io`` stays light.
"""

from __future__ import annotations

import hashlib
import logging
import math
import stat
import warnings
from contextlib import contextmanager
from pathlib import Path

import numpy as np

from ._errors import TenfoldInputError, TenfoldWarning
from ._image import ImageMeta, Micrograph
from ._lengths import PLAUSIBLE_PIXEL_NM, check_pixel_size as _check_pixel_size  # the one calibration check
from ._sanitize import check_memory, to_float32

_log = logging.getLogger("tenfold")

__all__ = ["write_tiff", "read_micrograph", "read_stack", "micrograph_from_array", "supported_suffixes"]

# dtypes ImageJ TIFFs hold as they are; anything else is written as float32.
_IMAGEJ_DTYPES = (np.uint8, np.uint16, np.float32)


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
    pixel_size_nm = _check_pixel_size(pixel_size_nm, plausible=False)
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



# --------------------------------------------------------------------------------------------------------------
# reading

#: suffix -> reader family. Vendor formats need the optional ``vendor`` extra (rosettasciio, GPL-3.0-or-later).
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


#: length unit names (lower case) -> nm. Pixel-like units ('pixel', 'px', '') mean "uncalibrated".
_UNIT_NM = {
    "nm": 1.0, "nanometer": 1.0, "nanometers": 1.0, "nanometre": 1.0, "nanometres": 1.0,
    "um": 1e3, "\u00b5m": 1e3, "\u03bcm": 1e3, "micron": 1e3, "microns": 1e3,
    "micrometer": 1e3, "micrometers": 1e3, "micrometre": 1e3, "micrometres": 1e3,
    "\u00e5": 0.1, "\u212b": 0.1, "a": 0.1, "angstrom": 0.1, "angstroms": 0.1, "ang": 0.1,
    "pm": 1e-3, "picometer": 1e-3, "picometre": 1e-3,
    "mm": 1e6, "millimeter": 1e6, "millimetre": 1e6,
    "cm": 1e7, "centimeter": 1e7, "centimetre": 1e7,
    "m": 1e9, "meter": 1e9, "metre": 1e9,
    "inch": 2.54e7, "in": 2.54e7,
}
_NO_UNIT = {"", "pixel", "pixels", "px", "none"}

#: A pixel larger than this is no micrograph calibration, whatever the source.
_MAX_PIXEL_NM = 1e6  # 1 mm
#: Plain TIFF inch/cm resolution tags are mostly dpi values written by image editors (72-1200 dpi = 353-21 um
#: pixels); a pixel above 1 um from that source is taken as such a tag, not as a microscope calibration.
_MAX_DPI_PIXEL_NM = 1e3  # 1 um
#: Relative x/y pixel-size difference above which the calibration counts as anisotropic.
_ANISO_TOL = 1e-4
#: Smallest side accepted: anything smaller cannot hold several column spacings.
_MIN_SIDE = 16
#: ITU-R BT.709 luma weights for R, G, B (ITU-R Recommendation BT.709-6, 2015, item 3.2).
_LUMA = np.array([0.2126, 0.7152, 0.0722])


def supported_suffixes() -> tuple[str, ...]:
    """File suffixes :func:`read_micrograph` accepts (lower case, with the dot).

    The vendor suffixes (.dm3, .dm4, .emd, .ser) are listed even when the optional reader is not installed;
    reading them then raises a :class:`TenfoldInputError` naming the extra to install.
    """
    return tuple(sorted(_SUFFIXES))


def _unit_factor(unit) -> float | None:
    """nm per ``unit``; None for pixel-like or unknown units."""
    if unit is None:
        return None
    u = str(unit).strip()
    if "\\u" in u:  # ImageJ writes e.g. 'unit=\\u00B5m' into its description
        try:
            u = u.encode("ascii", "backslashreplace").decode("unicode_escape")
        except UnicodeDecodeError:
            pass
    u = u.lower()
    if u in _NO_UNIT:
        return None
    return _UNIT_NM.get(u)


class _Calib:
    """Calibration found in a file: pixel size in nm (x, y) and where it came from, plus notes/warnings."""

    def __init__(self) -> None:
        self.px_x: float | None = None
        self.px_y: float | None = None
        self.source = "none"
        self.notes: list[str] = []
        self.warnings: list[str] = []

    def set(self, px_x, px_y, source: str) -> None:
        self.px_x, self.px_y, self.source = float(px_x), float(px_y), source


def _resolve_calibration(cal: _Calib, name: str) -> tuple[float | None, str]:
    """Turn (x, y) pixel sizes into one square pixel size, warning about nonsense or anisotropy."""
    if cal.px_x is None:
        return None, "none"
    px_x, px_y = cal.px_x, cal.px_y if cal.px_y is not None else cal.px_x
    if not (math.isfinite(px_x) and math.isfinite(px_y) and px_x > 0 and px_y > 0):
        cal.warnings.append(f"{name}: pixel size in the file ({px_x!r}, {px_y!r} nm) is not positive; treated as uncalibrated")
        return None, "none"
    limit = _MAX_DPI_PIXEL_NM if cal.source == "tiff-resolution" else _MAX_PIXEL_NM
    if max(px_x, px_y) > limit:
        cal.warnings.append(
            f"{name}: the file's pixel size ({px_x:.4g} nm, from {cal.source}) is larger than "
            f"{'1 um' if limit == _MAX_DPI_PIXEL_NM else '1 mm'}, which is no micrograph calibration "
            "(probably an image-editor dpi tag); treated as uncalibrated, "
            "give pixel_size_nm to calibrate"
        )
        return None, "none"
    lo, hi = PLAUSIBLE_PIXEL_NM
    if min(px_x, px_y) < lo:
        cal.warnings.append(f"{name}: the file's pixel size ({min(px_x, px_y):.3g} nm, from {cal.source}) is below "
                            f"{lo:g} nm, which no micrograph has (a broken tag); treated as uncalibrated, "
                            "give pixel_size_nm to calibrate")
        return None, "none"
    if max(px_x, px_y) > hi:
        cal.warnings.append(f"{name}: the file's pixel size ({max(px_x, px_y):.4g} nm, from {cal.source}) is above "
                            f"{hi:g} nm, coarse for atomic columns; check the calibration (a unit mistake?)")
    if abs(px_x - px_y) > _ANISO_TOL * 0.5 * (px_x + px_y):
        mean = 0.5 * (px_x + px_y)
        cal.warnings.append(
            f"{name}: anisotropic pixels (x {px_x:.6g} nm, y {px_y:.6g} nm); using their mean {mean:.6g} nm, "
            "distances along x and y are off by up to "
            f"{100 * abs(px_x - px_y) / (px_x + px_y):.2g}%"
        )
        return mean, cal.source
    return px_x, cal.source


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def _first(x):
    return x[0] if isinstance(x, (list, tuple)) else x


def _tiff_calibration(tf, cal: _Calib, name: str) -> None:
    """Fill ``cal`` from OME-XML, ImageJ metadata, Thermo/FEI metadata or the plain resolution tags."""
    import tifffile

    page = tf.pages[0]
    if tf.is_ome and tf.ome_metadata:
        try:
            ome = tifffile.xml2dict(tf.ome_metadata)
            pixels = _first(ome["OME"]["Image"])["Pixels"]
        except Exception:  # malformed OME-XML: fall through to the other conventions
            pixels = {}
            cal.notes.append(f"{name}: OME-XML present but unreadable; ignored")
        if "PhysicalSizeX" in pixels:
            fx = _unit_factor(pixels.get("PhysicalSizeXUnit", "\u00b5m"))  # OME default unit is micrometre
            fy = _unit_factor(pixels.get("PhysicalSizeYUnit", "\u00b5m"))
            sx = float(pixels["PhysicalSizeX"])
            sy = float(pixels.get("PhysicalSizeY", sx))
            if fx is not None and fy is not None:
                cal.set(sx * fx, sy * fy, "ome")
                return
            cal.notes.append(f"{name}: OME PhysicalSizeX unit {pixels.get('PhysicalSizeXUnit')!r} not a length")
    xres, yres = page.get_resolution()
    ij = tf.imagej_metadata if tf.is_imagej else None
    if ij and "unit" in ij:
        factor = _unit_factor(ij["unit"])
        if factor is not None and xres > 0 and yres > 0:
            cal.set(factor / xres, factor / yres, "imagej")
            return
        if factor is None and str(ij["unit"]).strip().lower() not in _NO_UNIT:
            cal.notes.append(f"{name}: ImageJ unit {ij['unit']!r} is not a length unit; ignored")
    if getattr(tf, "is_fei", False):
        fei = tf.fei_metadata or {}
        width = (fei.get("Scan") or {}).get("PixelWidth")
        height = (fei.get("Scan") or {}).get("PixelHeight", width)
        if width:
            cal.set(float(width) * 1e9, float(height) * 1e9, "vendor")  # metres
            return
    unit = int(page.resolutionunit)
    factor = {2: 2.54e7, 3: 1e7}.get(unit)  # RESUNIT INCH, CENTIMETER; NONE (1) carries no length
    if factor is not None and "XResolution" in page.tags and xres > 0 and yres > 0:
        cal.set(factor / xres, factor / yres, "tiff-resolution")


class _LogCapture(logging.Handler):
    """Collects what a format library logs while it reads (instead of letting it print to stderr)."""

    def __init__(self) -> None:
        super().__init__(logging.DEBUG)
        self.messages: list[str] = []

    def emit(self, record: logging.LogRecord) -> None:
        self.messages.append(record.getMessage().splitlines()[0] if record.getMessage() else "")

    def first(self) -> str:
        if not self.messages:
            return ""
        more = f" (+{len(self.messages) - 1} more)" if len(self.messages) > 1 else ""
        return f"; the reader said: {self.messages[0][:200]}{more}"


@contextmanager
def _captured_log(name: str):
    logger = logging.getLogger(name)
    cap = _LogCapture()
    old = logger.propagate
    logger.addHandler(cap)
    logger.propagate = False
    try:
        yield cap
    finally:
        logger.removeHandler(cap)
        logger.propagate = old
        for m in cap.messages:  # kept for the --debug log, never printed by default
            _log.debug("%s: %s", name, m)


def _planar_shape(shape) -> tuple[int, int]:
    """(rows, cols) of the image a reader will return for data of ``shape`` (channels and frames dropped)."""
    big = [int(n) for n in shape if int(n) > 4]
    return (big[-2], big[-1]) if len(big) >= 2 else (0, 0)


def _read_tiff(path: Path, cal: _Calib) -> np.ndarray:
    import tifffile

    with _captured_log("tifffile") as log:
        try:
            with tifffile.TiffFile(path) as tf:
                if not tf.series:
                    raise TenfoldInputError(f"{path}: TIFF holds no image data; the file is corrupt or not an image{log.first()}")
                series = tf.series[0]
                if len(tf.series) > 1:
                    cal.notes.append(f"{path.name}: file has {len(tf.series)} image series; read the first ({series.axes} {series.shape})")
                check_memory(_planar_shape(series.shape), label=str(path),
                             raw_bytes=int(np.prod(series.shape)) * np.dtype(series.dtype).itemsize)
                data = series.asarray()
                try:
                    _tiff_calibration(tf, cal, path.name)
                except Exception as exc:  # a broken calibration tag must not make good pixels unreadable
                    cal.px_x = cal.px_y = None
                    cal.source = "none"
                    cal.warnings.append(f"{path.name}: the file's calibration cannot be read ({type(exc).__name__}: "
                                        f"{str(exc)[:80]}); ignored, the image is uncalibrated unless pixel_size_nm "
                                        "is given")
                expected = int(np.prod(series.shape))
        except TenfoldInputError:
            raise
        except Exception as exc:  # tifffile raises many kinds for damaged files
            raise TenfoldInputError(
                f"{path}: not a readable TIFF ({type(exc).__name__}: {exc}); the file is corrupt, truncated or not a "
                f"TIFF{log.first()}"
            ) from None
    if data is None or data.size != expected:
        raise TenfoldInputError(f"{path}: TIFF image data is incomplete; the file is truncated or corrupt")
    return data


def _read_mrc(path: Path, cal: _Calib) -> np.ndarray:
    import mrcfile

    try:
        # mrcfile raises for damaged files and warns (RuntimeWarning) about odd but readable headers
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            with mrcfile.open(path, mode="r", header_only=True) as mrc:
                hd = mrc.header
                dims = (int(hd.nz), int(hd.ny), int(hd.nx))
                _check_mrc_size(path, hd, dims)
            check_memory(_planar_shape(dims), label=str(path), raw_bytes=4 * int(np.prod(dims, dtype=np.float64)))
            with mrcfile.open(path, mode="r") as mrc:
                data = np.array(mrc.data)
                vs = mrc.voxel_size
                vx, vy = float(vs.x), float(vs.y)
        cal.notes.extend(f"{path.name}: MRC header: {w.message}" for w in caught)
    except TenfoldInputError:
        raise
    except Exception as exc:
        raise TenfoldInputError(
            f"{path}: not a readable MRC file ({type(exc).__name__}: {exc}); the file is corrupt, truncated or not MRC"
        ) from None
    if vx > 0 and vy > 0:
        cal.set(vx * 0.1, vy * 0.1, "mrc-voxel")  # MRC voxel size is in angstrom
    elif vx != 0 or vy != 0:
        cal.notes.append(f"{path.name}: MRC voxel size ({vx}, {vy}) A is not positive; treated as uncalibrated")
    return data


def _check_mrc_size(path: Path, header, dims) -> None:
    """Refuse a header whose image size does not fit in the file (a corrupt frame count, not a huge image)."""
    import mrcfile.utils

    try:
        itemsize = mrcfile.utils.data_dtype_from_header(header).itemsize
    except ValueError:
        return  # an unknown mode: mrcfile's own reading names it
    need = 1024 + max(int(header.nsymbt), 0) + itemsize * int(np.prod(dims, dtype=np.float64))
    have = path.stat().st_size
    if min(dims) > 0 and need > have:
        raise TenfoldInputError(
            f"{path}: corrupt MRC header: it gives {dims[0]} x {dims[1]} x {dims[2]} values "
            f"({need / 2**20:.4g} MB), the file holds {have / 2**20:.4g} MB; the file is truncated or its header "
            "is damaged"
        )


def _read_imageio(path: Path, cal: _Calib) -> np.ndarray:
    import imageio.v3 as iio

    try:
        from PIL import Image

        with Image.open(path) as im:
            w, h = im.size
        check_memory((h, w), label=str(path), raw_bytes=8 * h * w)
        data = np.asarray(iio.imread(path, plugin="pillow"))
    except TenfoldInputError:
        raise
    except Exception as exc:
        raise TenfoldInputError(
            f"{path}: not a readable {path.suffix.lstrip('.').upper()} image ({type(exc).__name__}: {exc}); "
            "the file is corrupt or truncated"
        ) from None
    cal.notes.append(f"{path.name}: {path.suffix.lstrip('.').upper()} files carry no calibration")
    return data


def _read_vendor(path: Path, cal: _Calib) -> np.ndarray:
    import importlib

    try:
        import rsciio

        # the library's own registry says which of its plug-ins reads this suffix
        suffix = path.suffix.lower().lstrip(".")
        modname = next(p["api"] for p in rsciio.IO_PLUGINS if suffix in [e.lower() for e in p["file_extensions"]])
        module = importlib.import_module(modname)
    except StopIteration:
        raise TenfoldInputError(f"{path}: the installed vendor-format reader has no plug-in for {path.suffix} files; "
                                "convert the file to TIFF") from None
    except ImportError as exc:
        raise TenfoldInputError(
            f"{path}: reading {path.suffix} files needs the optional vendor-format reader rosettasciio "
            f"(GPL-3.0-or-later, not installed: {exc.name}); install it with: pip install 'tenfold[vendor]'"
        ) from None
    try:
        signals = module.file_reader(str(path), lazy=False)
    except ImportError as exc:  # e.g. .emd needs h5py
        raise TenfoldInputError(
            f"{path}: the vendor reader needs {exc.name}, which is missing; install: pip install 'tenfold[vendor]'"
        ) from None
    except Exception as exc:
        raise TenfoldInputError(
            f"{path}: not a readable {path.suffix} file ({type(exc).__name__}: {exc}); the file is corrupt or truncated"
        ) from None
    images = []
    for sig in signals:
        axes = sorted(sig.get("axes", []), key=lambda a: int(a.get("index_in_array", 0)))
        signal_axes = [a for a in axes if not a.get("navigate", False)]
        if len(signal_axes) == 2 and np.ndim(sig["data"]) in (2, 3):
            images.append((sig, signal_axes))
    if not images:
        raise TenfoldInputError(
            f"{path}: holds no 2-D image (found {len(signals)} signal(s) of other kinds, e.g. spectra); "
            "export the image you want as TIFF"
        )
    sig, (ay, ax) = images[0]
    if len(images) > 1:
        titles = [str(s.get("metadata", {}).get("General", {}).get("title", "?")) for s, _ in images]
        cal.warnings.append(f"{path.name}: holds {len(images)} images {titles}; read the first ({titles[0]!r})")
    fx, fy = _unit_factor(ax.get("units")), _unit_factor(ay.get("units"))
    if fx is not None and fy is not None:
        cal.set(float(ax["scale"]) * fx, float(ay["scale"]) * fy, "vendor")
    else:
        cal.notes.append(f"{path.name}: image axes in {ax.get('units')!r}, not a length; treated as uncalibrated")
    return np.asarray(sig["data"])


_READERS = {"tiff": _read_tiff, "mrc": _read_mrc, "imageio": _read_imageio, "vendor": _read_vendor}


def _is_rgb(arr: np.ndarray) -> bool:
    return arr.ndim == 3 and arr.shape[-1] in (3, 4) and arr.shape[0] > 4 and arr.shape[1] > 4


def _is_grey_alpha(arr: np.ndarray) -> bool:
    """Grey + alpha (PNG 'LA'): two samples per pixel on the last axis; stacks have their frames first."""
    return arr.ndim == 3 and arr.shape[-1] == 2 and arr.shape[0] > 4 and arr.shape[1] > 4


def _build(raw, *, label: str, cal: _Calib, override, frame, frame_range, path: str, sha256: str,
           align: bool = True, nonrigid: bool = False, align_reference=None, progress=None) -> Micrograph:
    """Validate ``raw`` and turn it into a float32 :class:`Micrograph`; emits the collected warnings."""
    arr = np.asarray(raw)
    original_dtype = str(arr.dtype)
    if arr.dtype == object or not (np.issubdtype(arr.dtype, np.number) or arr.dtype == bool):
        raise TenfoldInputError(f"{label}: data type {arr.dtype} is not numeric; give a grey-level image")
    if np.iscomplexobj(arr):
        raise TenfoldInputError(
            f"{label}: complex data (e.g. an exit wave); pass its amplitude or phase as a real image"
        )
    # drop length-1 axes (a 1-frame stack, a 1-channel image), never real ones
    if arr.ndim > 2:
        arr = arr.reshape([n for n in arr.shape if n != 1] or [1])
    if arr.ndim < 2:
        raise TenfoldInputError(f"{label}: data is {arr.ndim}-D (shape {np.shape(raw)}); a micrograph must be 2-D")
    if override is not None:
        px, source = override, "user"
        if cal.px_x and cal.px_x > 0 and abs(override - cal.px_x) > 0.01 * cal.px_x:
            cal.notes.append(f"{label}: the given pixel size {override:.6g} nm overrides the file's {cal.px_x:.6g} nm "
                             f"(from {cal.source}), {100 * (override / cal.px_x - 1):+.1f} %")
    else:
        px, source = _resolve_calibration(cal, label)
    converted = False
    frames = ""
    alignment, aligned_valid, n_avg, hold_counts = None, None, 1, False
    warn: list[str] = list(cal.warnings)
    notes: list[str] = list(cal.notes)
    if frame is not None and frame_range is not None:
        raise TenfoldInputError(f"{label}: give either frame or frame_range, not both")
    if _is_rgb(arr):
        if frame is not None or frame_range is not None:
            raise TenfoldInputError(
                f"{label}: is an RGB{'A' if arr.shape[-1] == 4 else ''} image ({arr.shape[0]} x {arr.shape[1]} "
                "px), not a stack; drop frame/frame_range"
            )
        rgb = arr[..., :3].astype(np.float64)
        data = rgb @ _LUMA
        converted = True
        warn.append(
            f"{label}: RGB{'A' if arr.shape[-1] == 4 else ''} image converted to luminance "
            "(BT.709 weights); intensities are no longer raw detector counts, use the original grey-level data "
            "for quantitative work"
        )
    elif _is_grey_alpha(arr):
        if frame is not None or frame_range is not None:
            raise TenfoldInputError(f"{label}: is a grey image with an alpha channel ({arr.shape[0]} x "
                                    f"{arr.shape[1]} px), not a stack; drop frame/frame_range")
        data = arr[..., 0].astype(np.float64)
        transparent = int(np.count_nonzero(arr[..., 1] == 0))
        notes.append(f"{label}: grey image with an alpha (transparency) channel; the alpha channel is ignored"
                     + (f" ({transparent} fully transparent pixels are analysed as they are)" if transparent else ""))
    elif arr.ndim == 3:
        n = arr.shape[0]
        if frame is None and frame_range is None:
            raise TenfoldInputError(
                f"{label}: is a stack of {n} frames ({arr.shape[1]} x {arr.shape[2]} px); choose one with "
                f"frame=K (0..{n - 1}) or average frames a..b-1 with frame_range=(a, b)"
            )
        if frame is not None:
            k = _check_index(frame, n, label)
            data = arr[k].astype(np.float64)
            frames = f"frame {k}"
        else:
            a, b = _check_range(frame_range, n, label)
            n_avg = b - a
            hold_counts = _whole_counts(arr, a, b)
            if align and b - a >= 2:
                ref = a if align_reference is None else _check_index(align_reference, n, label)
                if not a <= ref < b:
                    raise TenfoldInputError(f"{label}: the alignment reference frame {ref} lies outside the frames "
                                            f"{a}-{b - 1}; choose a reference inside the range")
                from .frames import align_frames

                try:
                    alignment = align_frames(arr[a:b], reference=ref - a, nonrigid=nonrigid, first_frame=a,
                                             progress=progress)
                except TenfoldInputError as exc:
                    raise TenfoldInputError(f"{label}: {exc}") from None
                data = alignment.mean.astype(np.float64)
                aligned_valid = alignment.valid
                n_avg = alignment.n_used
                frames = f"aligned mean of frames {a}-{b - 1} (reference {alignment.info['reference']})"
                notes.extend(f"{label}: {t}" for t in alignment.info["notes"])
            else:
                from .frames import plain_mean

                data, _ = plain_mean(arr[a:b])  # one frame at a time; to_float32 below masks what is not finite
                frames = f"mean of frames {a}-{b - 1}"
                if b - a >= 2:
                    notes.append(f"{label}: frames {a}-{b - 1} averaged without alignment; any drift between them "
                                 "smears the columns")
    elif arr.ndim == 2:
        if frame is not None or frame_range is not None:
            raise TenfoldInputError(f"{label}: is a single 2-D image, not a stack; drop frame/frame_range")
        data = arr.astype(np.float64)
    else:
        raise TenfoldInputError(
            f"{label}: data is {arr.ndim}-D (shape {arr.shape}); only 2-D images and 3-D stacks of frames are "
            "read, save the image you want as a 2-D file"
        )
    rows, cols = data.shape
    if min(rows, cols) == 0 and sha256:
        raise TenfoldInputError(f"{label}: the file's header gives an empty image ({rows} x {cols} px); the file is "
                                "corrupt or truncated")
    if min(rows, cols) < _MIN_SIDE:
        raise TenfoldInputError(
            f"{label}: image is {rows} x {cols} px, too small to hold several column spacings "
            f"(need at least {_MIN_SIDE} px on a side)"
        )
    with np.errstate(invalid="ignore"):
        n_nonfinite = int(data.size - np.count_nonzero(np.isfinite(data)))
    data32, valid, precision_notes = to_float32(data, label=label)  # (analysis/_sanitize.py)
    del data
    if aligned_valid is not None:
        valid &= aligned_valid
    warn.extend(precision_notes)
    n_bad = int(valid.size - np.count_nonzero(valid))
    if n_bad == valid.size:
        raise TenfoldInputError(f"{label}: every pixel is NaN or infinite; the image holds no data")
    good = data32[valid]
    if good.min() == good.max():
        raise TenfoldInputError(
            f"{label}: image is constant (every valid pixel = {float(good[0]):g}); it holds no structure to analyse"
        )
    masked_fraction = n_bad / valid.size
    if n_bad:
        data32[~valid] = np.median(good)
    if n_nonfinite:
        warn.append(
            f"{label}: {100 * n_nonfinite / valid.size:.3g}% of pixels are NaN/inf; they are masked (no columns there) "
            "and filled with the median for filtering"
        )
    if px is None:
        notes.append(f"{label}: uncalibrated; all *_nm outputs are NaN (give pixel_size_nm to calibrate)")
    for message in warn:
        warnings.warn(message, TenfoldWarning, stacklevel=3)
    meta = ImageMeta(
        path=path,
        pixel_size_nm=px,
        calibration_source=source,
        original_dtype=original_dtype,
        shape=(int(rows), int(cols)),
        frames=frames,
        frames_averaged=int(n_avg),
        frames_hold_counts=bool(hold_counts),
        converted_from_rgb=converted,
        masked_fraction=float(masked_fraction),
        sha256=sha256,
        notes=list(dict.fromkeys(warn + notes)),
    )
    return Micrograph(data=data32, meta=meta, valid=valid, alignment=alignment)


def _whole_counts(arr, a: int, b: int) -> bool:
    """Whether frames a..b-1 hold whole non-negative numbers (raw counts); checked on every 7th value of each."""
    if np.issubdtype(arr.dtype, np.integer) or arr.dtype == bool:
        return bool(all(np.min(arr[k]) >= 0 for k in range(a, b)))
    for k in range(a, b):
        v = np.asarray(arr[k]).ravel()[::7]
        if not (np.all(np.isfinite(v)) and np.all(v >= 0) and np.all(np.mod(v, 1.0) == 0)):
            return False
    return True


def _check_index(frame, n: int, label: str) -> int:
    if isinstance(frame, bool) or not isinstance(frame, (int, np.integer)):
        raise TenfoldInputError(f"{label}: frame={frame!r} must be an integer in 0..{n - 1}")
    k = int(frame)
    if not 0 <= k < n:
        raise TenfoldInputError(f"{label}: frame={k} out of range; the stack has frames 0..{n - 1}")
    return k


def _check_range(frame_range, n: int, label: str) -> tuple[int, int]:
    try:
        a, b = (int(v) for v in frame_range)
        ok = all(isinstance(v, (int, np.integer)) and not isinstance(v, bool) for v in frame_range)
    except (TypeError, ValueError):
        ok = False
    if not ok:
        raise TenfoldInputError(f"{label}: frame_range={frame_range!r} must be a pair of integers (a, b)")
    if not 0 <= a < b <= n:
        raise TenfoldInputError(
            f"{label}: frame_range=({a}, {b}) invalid; need 0 <= a < b <= {n} (frames a..b-1 are averaged)"
        )
    return a, b


def check_image_file(path) -> Path:
    """Refuse, with one line, a path that is no image file Tenfold reads; nothing is opened.

    Called before any reader or header probe touches the file: opening a FIFO (or a link to one) blocks until
    another program writes to it, and a device may never end.

    Raises
    ------
    TenfoldInputError
        Missing, a folder, not a regular file (pipe, device, socket, also behind a link), unknown suffix.
    """
    p = Path(path)
    try:
        st = p.stat()
    except FileNotFoundError:
        raise TenfoldInputError(f"{p}: no such file; check the path") from None
    except OSError as exc:
        raise TenfoldInputError(f"{p}: cannot be reached ({exc.strerror or exc}); check the path and the "
                                "permissions of its folders") from None
    if stat.S_ISDIR(st.st_mode):
        raise TenfoldInputError(f"{p}: is a directory, not an image file; give one image file")
    if not stat.S_ISREG(st.st_mode):
        raise TenfoldInputError(f"{p}: is not a regular file (a pipe, device or socket); give an image file saved "
                                "on disk")
    if p.suffix.lower() not in _SUFFIXES:
        raise TenfoldInputError(
            f"{p}: unknown file type {p.suffix or '(no suffix)'!r}; supported: {', '.join(supported_suffixes())}"
        )
    return p


def read_micrograph(path, *, pixel_size_nm=None, frame=None, frame_range=None, align=True, nonrigid=False,
                    align_reference=None, progress=None) -> Micrograph:
    """Read a micrograph file into a 2-D float32 :class:`Micrograph` with its calibration and provenance.

    Parameters
    ----------
    path : str or path-like
        TIFF (.tif/.tiff, incl. ImageJ and OME-TIFF), MRC (.mrc/.mrcs/.st), PNG/JPEG/BMP, or with the optional
        ``vendor`` extra .dm3/.dm4/.emd/.ser. See :func:`supported_suffixes`.
    pixel_size_nm : float, optional
        Pixel size in nm; overrides whatever the file says (``calibration_source='user'``).
    frame : int, optional
        For a stack (3-D, not RGB): the frame to read (0-based).
    frame_range : (int, int), optional
        For a stack: average frames ``a .. b-1``. Exactly one of ``frame``/``frame_range`` is required for a
        stack, and neither is allowed for a single image.
    align : bool
        Default True: the frames of ``frame_range`` are registered to one reference frame before they are
        averaged (:func:`tenfold.analysis.frames.align_frames`); the result's ``alignment`` holds the shifts.
        False gives the plain mean (with a note).
    nonrigid : bool
        Also correct per-row distortions that change from frame to frame (slower).
    align_reference : int, optional
        File index of the reference frame (default: the first frame of the range); the columns are reported in
        its coordinates.
    progress : callable, optional
        ``progress(fraction, message)`` during the alignment; returning False cancels.

    Returns
    -------
    Micrograph
        ``data`` float32 (rows, cols); ``valid`` False where the file had NaN/inf (those pixels hold the median
        of the valid ones); ``meta`` an :class:`ImageMeta` with every field filled, incl. the file's sha256.

    Raises
    ------
    TenfoldInputError
        Missing file, a directory, unknown suffix, corrupt/truncated file, 1-D or 4-D+ data, a stack without a
        frame choice, an image smaller than 16 px on a side, a constant or all-NaN image, a bad pixel size.

    Warns
    -----
    TenfoldWarning
        RGB converted to luminance, masked NaN/inf pixels, anisotropic pixels (the mean is used), a pixel size
        larger than 1 mm in the file (ignored as an image-editor dpi tag). The messages also go to
        ``meta.notes``.

    Notes
    -----
    Calibration sources, in order of preference: OME-XML ``PhysicalSizeX/Y`` with their units ('ome');
    ImageJ resolution tags with the ImageJ ``unit`` (nm, um/micron/µm, Å/A, cm, m, ...; 'imagej'); Thermo
    Fisher/FEI TIFF metadata ``PixelWidth`` ('vendor'); TIFF ResolutionUnit inch/cm ('tiff-resolution');
    the MRC voxel size in Å ('mrc-voxel', 0 = none); vendor-file axis scales ('vendor'). PNG/JPEG/BMP carry
    none ('none'). A pixel size is never invented.

    Examples
    --------
    >>> mg = read_micrograph("scan.tif")                      # doctest: +SKIP
    >>> mg = read_micrograph("movie.mrc", frame_range=(0, 10))  # doctest: +SKIP
    """
    override = _check_pixel_size(pixel_size_nm)
    p, raw, cal, sha = _read_raw(path)
    return _build(
        raw, label=str(p), cal=cal, override=override, frame=frame, frame_range=frame_range,
        path=str(p.resolve()), sha256=sha, align=align, nonrigid=nonrigid, align_reference=align_reference,
        progress=progress,
    )


def _read_raw(path):
    """(path, the file's data as its reader returns it, calibration, checksum), after the file checks."""
    p = check_image_file(path)
    try:
        sha = _sha256(p)
    except OSError as exc:
        raise TenfoldInputError(f"{p}: cannot be read ({exc.strerror or exc}); check its permissions") from None
    if p.stat().st_size == 0:
        raise TenfoldInputError(f"{p}: file is empty (0 bytes)")
    cal = _Calib()
    return p, _READERS[_SUFFIXES[p.suffix.lower()]](p, cal), cal, sha


def read_stack(path) -> tuple[np.ndarray | None, Micrograph]:
    """Read a file once for a viewer: ``(stack, micrograph)``.

    A frame series (3-D, frames first, not RGB) comes back as it is stored, with ``micrograph`` its first frame
    (for the calibration and provenance record); anything else comes back as :func:`read_micrograph` reads it,
    with ``stack`` None. Same readers and checks as :func:`read_micrograph`.

    Raises
    ------
    TenfoldInputError
        As :func:`read_micrograph`.
    """
    p, raw, cal, sha = _read_raw(path)
    arr = np.asarray(raw)
    arr = arr.reshape([n for n in arr.shape if n != 1] or [1]) if arr.ndim > 2 else arr
    stack = arr.ndim == 3 and not _is_rgb(arr) and not _is_grey_alpha(arr)
    micrograph = _build(arr, label=str(p), cal=cal, override=None, frame=0 if stack else None, frame_range=None,
                        path=str(p.resolve()), sha256=sha)
    return (arr if stack else None), micrograph


def micrograph_from_array(
    array, *, pixel_size_nm=None, name: str = "", frame=None, frame_range=None, align=True, nonrigid=False,
    align_reference=None, progress=None
) -> Micrograph:
    """Wrap an in-memory array as a :class:`Micrograph`, with the same checks as :func:`read_micrograph`.

    Parameters
    ----------
    array : array_like
        2-D image, RGB(A) image (last axis 3/4) or 3-D stack (frames first). Not modified.
    pixel_size_nm : float, optional
        Pixel size in nm (``calibration_source='user'``); None leaves the image uncalibrated ('none').
    name : str
        Label used in messages and stored as ``meta.path`` (e.g. the napari layer name).
    frame, frame_range, align, nonrigid, align_reference, progress
        Frame choice and frame-series alignment for a stack, as in :func:`read_micrograph`.

    Returns
    -------
    Micrograph
        float32 copy of the data, validity mask and metadata (``sha256`` is '').
    """
    override = _check_pixel_size(pixel_size_nm)
    label = f"array {name!r}" if name else "array"
    check_memory(_planar_shape(np.shape(array)), label=label)
    return _build(
        array, label=label, cal=_Calib(), override=override, frame=frame, frame_range=frame_range,
        path=str(name), sha256="", align=align, nonrigid=nonrigid, align_reference=align_reference,
        progress=progress,
    )
