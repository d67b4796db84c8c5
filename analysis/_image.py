"""The micrograph record that the reader returns and every stage receives."""

from __future__ import annotations

from dataclasses import asdict, dataclass, field

import numpy as np

__all__ = ["ImageMeta", "Micrograph"]


@dataclass
class ImageMeta:
    """Where an image came from and how it is calibrated.

    Attributes
    ----------
    path : str
        File the image was read from ('' for arrays made in memory).
    pixel_size_nm : float or None
        Square pixel size in nm; None means uncalibrated (all ``*_nm`` outputs are NaN).
    calibration_source : str
        Where the pixel size came from: 'tiff-resolution', 'imagej', 'ome', 'mrc-voxel', 'vendor',
        'user' (``--pixel-size``), 'synthetic', or 'none'.
    original_dtype : str
        dtype of the data in the file, before conversion to float32.
    shape : tuple of int
        (rows, cols) of the analysed 2-D image.
    frames : str
        What was taken from a stack: '' for a plain 2-D image, 'frame 3', 'mean of frames 0-9', 'aligned mean of
        frames 0-11 (reference 0)'.
    frames_averaged : int
        How many frames the analysed image averages (1 for a single image or frame).
    frames_hold_counts : bool
        The averaged frames held whole non-negative numbers (raw counts), so the image is counts / frames_averaged.
    converted_from_rgb : bool
        True when an RGB(A) image was converted to luminance.
    masked_fraction : float
        Fraction of pixels that were NaN/inf in the file and are masked.
    sha256 : str
        Checksum of the input file ('' for in-memory arrays).
    notes : list of str
        Human-readable warnings that also go into the summary.
    """

    path: str = ""
    pixel_size_nm: float | None = None
    calibration_source: str = "none"
    original_dtype: str = "float32"
    shape: tuple[int, int] = (0, 0)
    frames: str = ""
    frames_averaged: int = 1
    frames_hold_counts: bool = False
    converted_from_rgb: bool = False
    masked_fraction: float = 0.0
    sha256: str = ""
    notes: list[str] = field(default_factory=list)

    @property
    def calibrated(self) -> bool:
        return self.pixel_size_nm is not None

    def to_dict(self) -> dict:
        d = asdict(self)
        d["shape"] = list(self.shape)
        d["calibrated"] = self.calibrated
        return d


@dataclass
class Micrograph:
    """A 2-D float32 image with its metadata and validity mask.

    ``valid`` is a boolean array of the image shape, False where the file had NaN/inf (those pixels hold the
    median of the valid pixels in ``data`` so filters behave, and no column is reported there). ``alignment`` is
    the :class:`~tenfold.analysis.frames.FrameAlignment` when the image is the aligned mean of a frame series.
    """

    data: np.ndarray
    meta: ImageMeta
    valid: np.ndarray | None = None
    alignment: object | None = None

    def __post_init__(self) -> None:
        if self.valid is None:
            self.valid = np.ones(self.data.shape, dtype=bool)
