"""Tenfold's computational core: atomic columns, cluster motifs, golden-ratio ladders, tilings, Fourier.

Pure computation (numpy / scipy / pandas / trackpy / numba); never imports Qt or napari. Stages live in their own
modules and are strung together by :mod:`tenfold.analysis.pipeline`::

    from tenfold.analysis import read_micrograph, run_pipeline, write_results
    result = run_pipeline(read_micrograph("image.tif"))
    write_results(result, "results/")

Conventions: the centre of pixel (row 0, col 0) is at x = 0, y = 0; x along columns, y along rows (down);
nm = px * pixel size; ``*_nm`` columns are NaN for uncalibrated images.
"""

from __future__ import annotations

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("tenfold")
except PackageNotFoundError:  # running from a source tree that is not installed
    __version__ = "0+unknown"

from ._errors import Cancelled, TenfoldInputError, TenfoldWarning  # noqa: E402
from ._cache import use_user_cache_dir  # noqa: E402

use_user_cache_dir()  # numba kernels are cached per user, never inside the installed package

__all__ = [
    "__version__",
    "TenfoldInputError",
    "TenfoldWarning",
    "Cancelled",
    "read_micrograph",
    "run_pipeline",
    "rerun_from_columns",
    "Parameters",
    "write_results",
    "load_parameters",
    "save_parameters",
]


def __getattr__(name: str):
    # Heavy stages load on first use so that `import tenfold.analysis` stays fast.
    if name == "read_micrograph":
        from .io import read_micrograph

        return read_micrograph
    if name == "Parameters":
        from .parameters import Parameters

        return Parameters
    if name in ("run_pipeline", "rerun_from_columns"):
        from . import pipeline

        return getattr(pipeline, name)
    if name == "write_results":
        from .export import write_results

        return write_results
    if name in ("load_parameters", "save_parameters"):
        from . import _params_file

        return getattr(_params_file, name)
    raise AttributeError(f"module 'tenfold.analysis' has no attribute {name!r}")
