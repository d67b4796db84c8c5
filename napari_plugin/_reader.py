"""napari reader: micrographs through :func:`tenfold.analysis.io.read_micrograph`, scale in nm."""

from __future__ import annotations

import os

from ._layers import image_layer_tuple

__all__ = ["napari_get_reader", "read_layers"]


def _suffixes() -> tuple[str, ...]:
    from tenfold.analysis.io import supported_suffixes

    return tuple(s.lower() for s in supported_suffixes())


def napari_get_reader(path):
    """Return :func:`read_layers` for one file Tenfold can read, else None (never raises for other files)."""
    if isinstance(path, (list, tuple)):
        if len(path) != 1:
            return None
        path = path[0]
    try:
        path = os.fspath(path)
    except TypeError:
        return None
    if os.path.isdir(path) or not path.lower().endswith(_suffixes()):
        return None
    return read_layers


def read_layers(path) -> list[tuple]:
    """Read one micrograph into an image layer-data tuple.

    The layer gets ``scale`` = pixel size in nm and ``units`` nm when the file is calibrated, so the scale bar
    reads nm; an uncalibrated file opens in pixels, its layer name ends in ' (uncalibrated)' and a warning is
    shown. A file of a supported type that cannot be read shows its one-line message as an error notification
    and opens nothing (napari's "no layers" sentinel), never a traceback.
    """
    from napari.utils.notifications import show_error, show_warning

    from tenfold.analysis._errors import TenfoldInputError

    from ._layers import stack_layer_tuple

    if isinstance(path, (list, tuple)):
        path = path[0]
    path = os.fspath(path)
    try:
        stack, micrograph = _read(path)
    except TenfoldInputError as exc:
        show_error(str(exc))
        return [(None,)]
    except Exception as exc:  # never a traceback for a file the user chose; say what failed
        show_error(f"{os.path.basename(path)}: could not be read ({type(exc).__name__}: {exc})")
        return [(None,)]
    name = os.path.splitext(os.path.basename(path))[0]
    if not micrograph.meta.calibrated:
        show_warning(
            f"{os.path.basename(path)}: no pixel size in the file; it opens in pixels and every nm value "
            "will be NaN. Give the pixel size in the Tenfold analysis panel to calibrate it."
        )
    if stack is not None:
        return [stack_layer_tuple(stack, micrograph.meta, name)]
    return [image_layer_tuple(micrograph, name)]


def _read(path: str):
    """(stack, micrograph): a frame series opens as a stack (frames first, as stored; ``micrograph`` is its first
    frame, for the calibration and provenance record), anything else as ``io.read_micrograph`` reads it (stack
    None). The file is read once, by the same readers and checks as ``read_micrograph``."""
    from tenfold.analysis.io import read_stack

    return read_stack(path)
