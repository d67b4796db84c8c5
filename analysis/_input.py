"""Reading the input of a run: memory-mapped when it will be tiled and the tiles can take the file's values as they
are, else read whole (where :func:`~tenfold.analysis._sanitize.to_float32` keeps the signal and NaN pixels get
their note).

Both fronts that run the pipeline on a file (``tenfold analyze``, ``tenfold batch``) read through
:func:`read_for_run`, so a FIFO is refused before anything opens it and a file that needs care is never handed to
the tiled path raw.
"""

from __future__ import annotations

import math

import numpy as np

from ._errors import TenfoldInputError

__all__ = ["read_for_run"]

#: dtypes the tiled path takes as they are (float32 holds every value exactly)
_MAPPABLE = tuple(np.dtype(t) for t in (np.uint8, np.int8, np.uint16, np.int16, np.float32))
#: pixels sampled (strided) to decide whether a memory-mapped image needs a whole read
_SAMPLE_PX = 1_000_000


def read_for_run(path, execution, *, pixel_size_nm=None, frame=None, frame_range=None, align=True, nonrigid=False,
                 align_reference=None, progress=None):
    """The micrograph of ``path`` for a run with ``execution`` (see the module docstring).

    A ``frame_range`` of a stack is aligned before it is averaged unless ``align`` is False (see
    :func:`~tenfold.analysis.io.read_micrograph` for ``nonrigid``, ``align_reference`` and ``progress``).

    Returns
    -------
    Micrograph
        Memory-mapped (tiled runs of plain uncompressed TIFF/MRC data) or read whole.
    """
    from .io import check_image_file, read_micrograph
    from .parallel import mapped_if_tiled

    check_image_file(path)
    mg = mapped_if_tiled(path, execution, pixel_size_nm=pixel_size_nm, frame=frame, frame_range=frame_range)
    if mg is not None and _needs_whole_read(mg.data):
        from ._sanitize import check_memory

        try:
            check_memory(mg.data.shape, label=str(path))
        except TenfoldInputError:
            return mg  # too large to read whole: the tiled path takes it as it is
        mg = None
    if mg is not None:
        return mg
    return read_micrograph(path, pixel_size_nm=pixel_size_nm, frame=frame, frame_range=frame_range, align=align,
                           nonrigid=nonrigid, align_reference=align_reference, progress=progress)


def _needs_whole_read(data) -> bool:
    """NaN/inf pixels, a dtype float32 does not hold exactly with values that need an offset or a scale."""
    from ._sanitize import float32_plan

    if data.dtype == np.float16:
        return True
    step = max(1, int(math.sqrt(data.size / _SAMPLE_PX)))
    sample = np.asarray(data[::step, ::step])
    if sample.dtype.kind == "f" and not np.isfinite(sample).all():
        return True
    if sample.dtype in _MAPPABLE:
        return False
    return bool(float32_plan(sample, data.dtype).notes)
