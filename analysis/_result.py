"""What one analysis run produces: the tables, the summary and what is needed to redraw the figures."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ._image import ImageMeta

__all__ = ["AnalysisResult"]


@dataclass
class AnalysisResult:
    """Everything one run of the pipeline returns.

    Attributes
    ----------
    meta : ImageMeta
        Input file, calibration and its source.
    parameters : dict
        Every parameter the run used, automatic ones resolved to their values (JSON-safe).
    tables : dict of str -> DataFrame
        Keyed like ``_schema.TABLES``: 'columns', 'motifs', 'ladder', 'pair_peaks', 'tiles', 'network', 'spots'.
        A stage that did not run leaves its table empty (with the right columns).
    summary : dict
        JSON-safe summary; top-level keys at least 'input', 'pixel_size_nm', 'calibration_source', 'calibrated',
        'n_columns', 'automatic', 'notes', 'version', and per stage 'columns', 'species', 'motifs', 'ladder',
        'tiling', 'fourier', 'regions'.
    image : ndarray or None
        The analysed float32 image (for overlay figures); not written to disk.
    curves : dict of str -> DataFrame
        Curves behind the figures, e.g. 'pair_distribution_columns' (r_px, r_nm, g), 'species_histogram'.
    """

    meta: ImageMeta
    parameters: dict = field(default_factory=dict)
    tables: dict[str, pd.DataFrame] = field(default_factory=dict)
    summary: dict = field(default_factory=dict)
    image: np.ndarray | None = None
    curves: dict[str, pd.DataFrame] = field(default_factory=dict)
