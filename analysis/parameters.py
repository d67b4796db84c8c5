"""The parameters of one analysis: :class:`Parameters`, a low module that imports no stage.

The orchestrator (``pipeline``), the parameters file (``_params_file``), ``batch``, ``export`` and both fronts use it;
``tenfold.analysis.Parameters`` and ``tenfold.analysis.pipeline.Parameters`` are this class. Lengths are given in
nm or in px (``<name>_nm`` / ``<name>_px``, see ``_lengths.LENGTHS``) and resolved to px once, at the start of a
run (``_lengths.resolve_lengths``).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

from ._errors import TenfoldInputError
from ._lengths import LENGTHS, check_pixel_size

__all__ = ["Parameters"]


@dataclass
class Parameters:
    """Every user-settable parameter of one analysis. ``None`` means "choose automatically and report".

    Attributes
    ----------
    pixel_size_nm : float or None
        Override the file's calibration (nm per pixel).
    dark_columns : bool
        Columns darker than the background (HRTEM-like contrast) instead of bright (HAADF).
    column_diameter_nm, column_spacing_nm : float or None
        Override the automatic column width (full diameter, about 4.5 sigma) and nearest-column spacing.
    column_diameter_px, column_spacing_px, ring_radius_px, ladder_r_max_px, d0_px, tiling_edge_px : float or None
        The same lengths in pixels, for uncalibrated images (each length in one unit only).
    n_species : int or None
        Number of intensity classes; None chooses by BIC, 0 skips classification.
    flatten : bool
        Subtract a large-scale background (uneven illumination) before detection.
    min_mass : float or None
        Minimum integrated intensity of a column (image units x px^2); default none (the significance cut decides).
    ring_order : int
        Number of columns in a ring motif (5, 6, 8, 10 or 12).
    ring_radius_nm : float or None
        Ring radius; None finds it from the pair distances.
    radius_tolerance : float
        Relative tolerance on the ring radius.
    pentagons : bool
        Also search for pentagon motifs.
    ladder_r_max_nm : float or None
        Largest pair distance in the ladder analysis (default: automatic).
    half_step : bool
        Also try the half-step ladder tau^(n/2).
    d0_nm : float or None
        Ladder base distance (default: the strongest short-range pair peak).
    tiling_edge_nm : float or None
        Cluster-network edge length (default: from the centre pair distances).
    fourier : bool
        Run the Fourier stage.
    correct_distortion : bool
        Apply the scan-distortion correction measured from the Fourier spots to the column positions before the
        structure stages (default False): every downstream table is then in the corrected frame, and
        ``columns`` keeps the measured positions as ``x_raw_px``, ``y_raw_px``.
    phason : bool
        Lift the cluster tiling to perpendicular space and fit the linear phason strain (default True).
    fourier_window : str
        'hann' (default) or 'periodic_smooth' (periodic-plus-smooth decomposition, no window: about half the
        finite-field uncertainty of the phason strain from the spots; see docs/fourier.md).
    rng : int
        Seed for bootstraps and mixture initialisation.
    """

    pixel_size_nm: float | None = None
    dark_columns: bool = False
    column_diameter_nm: float | None = None
    column_spacing_nm: float | None = None
    n_species: int | None = None
    flatten: bool = False
    min_mass: float | None = None
    ring_order: int = 10
    ring_radius_nm: float | None = None
    radius_tolerance: float = 0.12
    pentagons: bool = True
    ladder_r_max_nm: float | None = None
    half_step: bool = False
    d0_nm: float | None = None
    tiling_edge_nm: float | None = None
    fourier: bool = True
    correct_distortion: bool = False
    phason: bool = True
    fourier_window: str = "hann"
    rng: int = 0
    column_diameter_px: float | None = None
    column_spacing_px: float | None = None
    ring_radius_px: float | None = None
    ladder_r_max_px: float | None = None
    d0_px: float | None = None
    tiling_edge_px: float | None = None

    def to_dict(self) -> dict:
        return dataclasses.asdict(self)

    @classmethod
    def from_dict(cls, d: dict) -> "Parameters":
        names = {f.name for f in dataclasses.fields(cls)}
        unknown = sorted(set(d) - names)
        if unknown:
            raise TenfoldInputError(f"unknown parameter(s) {unknown}; known: {sorted(names)}")
        return cls(**d)

    def validate(self) -> "Parameters":
        """Check every value; raise :class:`TenfoldInputError` naming the first bad parameter."""
        check_pixel_size(self.pixel_size_nm, "parameter pixel_size_nm")  # the one calibration check
        for name in ("column_diameter_nm", "column_spacing_nm", "ring_radius_nm",
                     "ladder_r_max_nm", "d0_nm", "tiling_edge_nm", "min_mass", *(f"{b}_px" for b in LENGTHS)):
            v = getattr(self, name)
            if v is not None and not (isinstance(v, (int, float)) and np.isfinite(v) and v > 0):
                raise TenfoldInputError(f"parameter {name} must be a positive number (or empty for automatic), got {v!r}")
        if not isinstance(self.rng, np.random.Generator) and (
                isinstance(self.rng, bool) or not (isinstance(self.rng, (int, np.integer)) and self.rng >= 0)):
            raise TenfoldInputError(f"parameter rng must be a whole number 0 or larger (the seed), got {self.rng!r}")
        for base in LENGTHS:
            if getattr(self, f"{base}_nm") is not None and getattr(self, f"{base}_px") is not None:
                raise TenfoldInputError(f"parameters {base}_nm and {base}_px both given; give the length in one unit")
        if self.n_species is not None and not (isinstance(self.n_species, (int, np.integer)) and 0 <= self.n_species <= 8):
            raise TenfoldInputError(f"parameter n_species must be empty (automatic), 0 (skip) or 1-8, got {self.n_species!r}")
        if self.ring_order not in (5, 6, 8, 10, 12):
            raise TenfoldInputError(f"parameter ring_order must be one of 5, 6, 8, 10, 12, got {self.ring_order!r}")
        if self.fourier_window not in ("hann", "periodic_smooth"):
            raise TenfoldInputError(
                f"parameter fourier_window must be 'hann' or 'periodic_smooth', got {self.fourier_window!r}")
        if not (0 < self.radius_tolerance < 0.5):
            raise TenfoldInputError(f"parameter radius_tolerance must be between 0 and 0.5, got {self.radius_tolerance!r}")
        if not (isinstance(self.rng, (int, np.integer)) and 0 <= self.rng < 2**63):
            raise TenfoldInputError(f"parameter rng must be a whole number >= 0 (a seed), got {self.rng!r}")
        return self
