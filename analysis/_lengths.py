"""User lengths resolved once, at the boundary: the calibration check, nm -> px, and a record of how.

Every length a user can set exists twice in :class:`~tenfold.analysis.Parameters`, as ``<name>_nm`` and
``<name>_px`` (the second for uncalibrated images); at most one of the two is given, and neither means
"automatic". :func:`resolve_lengths` turns them into pixels once, before any stage runs, so that a length in nm on
an uncalibrated image fails in the first second with one message (not after the column finding), and every stage
takes plain pixel lengths under the Parameters names (``ring_radius_px``, ``ladder_r_max_px``, ``tiling_edge_px``,
...). How each length was resolved goes into ``summary.json`` as ``lengths_px`` (:func:`lengths_record`), with the
values the stages chose for the automatic ones.

:func:`check_pixel_size` is the one calibration check: reading, ``Parameters.validate`` and every stage that takes
a pixel size call it, so a bad pixel size gets the same message wherever it was given.

Examples
--------
>>> r = resolve_lengths({"ring_radius_nm": 0.5, "tiling_edge_px": 30.0}, pixel_size_nm=0.02)
>>> r.px("ring_radius"), r.px("tiling_edge"), r.px("d0")
(25.0, 30.0, None)
>>> r["ring_radius"].as_dict()
{'value_px': 25.0, 'given': '0.5 nm', 'source': 'user'}
"""

from __future__ import annotations

import math
import numbers
from dataclasses import dataclass

from ._errors import TenfoldInputError

__all__ = ["LENGTHS", "PLAUSIBLE_PIXEL_NM", "DIAMETER_PER_SIGMA", "Length", "ResolvedLengths", "check_pixel_size",
           "length_px", "resolve_lengths", "lengths_record", "uncalibrated"]

#: The user lengths, by their base name in ``Parameters`` (each is a ``_nm`` and a ``_px`` field), and what each is.
LENGTHS = {
    "column_diameter": "column diameter",
    "column_spacing": "nearest-column spacing",
    "ring_radius": "ring-motif radius",
    "ladder_r_max": "largest pair distance of the ladder",
    "d0": "ladder base distance",
    "tiling_edge": "cluster-network edge length",
}

#: pixel sizes of atomic-resolution images lie well inside this range (nm per pixel); outside it a value is a
#: unit mistake or a broken tag (common practice: 0.005-0.5 nm for HAADF-STEM/HRTEM lattice images)
PLAUSIBLE_PIXEL_NM = (1e-4, 10.0)

#: A column's diameter (the detection window, the user's "column diameter") is this many Gaussian sigmas: the disk
#: of that diameter holds 1 - exp(-2.25^2 / 2) = 92 % of a 2-D Gaussian's light (common practice)
DIAMETER_PER_SIGMA = 4.5


def check_pixel_size(pixel_size_nm, what: str = "pixel_size_nm", *, plausible: bool = True) -> float | None:
    """The pixel size as a float (None stays None: uncalibrated), or one :class:`TenfoldInputError`.

    Parameters
    ----------
    pixel_size_nm : float or None
        nm per pixel.
    what : str
        How the message names the value (a parameter, a file's tag, a command-line option).
    plausible : bool
        Default True: also refuse values outside ``PLAUSIBLE_PIXEL_NM`` (a unit mistake). A stage that is handed a
        pixel size computes with it as it is (False).

    Examples
    --------
    >>> check_pixel_size(0.02), check_pixel_size(None)
    (0.02, None)
    >>> try:
    ...     check_pixel_size(-1.0)
    ... except ValueError as exc:  # TenfoldInputError
    ...     print(exc)
    pixel_size_nm=-1.0 must be a positive finite number of nm per pixel, e.g. 0.015
    """
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
    lo, hi = PLAUSIBLE_PIXEL_NM
    if plausible and not lo <= value <= hi:
        raise TenfoldInputError(
            f"{what}={pixel_size_nm!r} nm per pixel is outside {lo:g} - {hi:g} nm, the range of atomic-resolution "
            "images; give the pixel size in nm, e.g. 0.015 (check the unit: 1 A = 0.1 nm, 1 um = 1000 nm)"
        )
    return value


@dataclass(frozen=True)
class Length:
    """One length parameter, resolved.

    Attributes
    ----------
    name : str
        Base name in ``Parameters`` (``'ring_radius'``).
    value_px : float or None
        The length in px; None when automatic and not (yet) chosen.
    given : str or None
        What the user gave, with its unit (``'0.45 nm'``, ``'11.25 px'``); None when automatic.
    source : {'user', 'automatic'}
    how : str or None
        For an automatic length: how the stage chose it (filled by :func:`lengths_record`).
    """

    name: str
    value_px: float | None
    given: str | None
    source: str
    how: str | None = None

    def as_dict(self) -> dict:
        out = {"value_px": self.value_px, "given": self.given, "source": self.source}
        if self.how is not None:
            out["how"] = self.how
        return out


def length_px(name: str, *, nm=None, px=None, pixel_size_nm=None) -> Length:
    """Resolve one length given in nm or in px (or neither: automatic) to px.

    Parameters
    ----------
    name : str
        Base name (``'ring_radius'``); messages name ``<name>_nm`` or ``<name>_px``.
    nm, px : float, optional
        The length in one unit at most.
    pixel_size_nm : float, optional
        nm per pixel (checked with :func:`check_pixel_size`, without the plausibility range); needed for ``nm``.

    Returns
    -------
    Length
        ``value_px = nm / pixel_size_nm`` or ``px``; ``source`` 'automatic' (``value_px`` None) when neither.

    Raises
    ------
    TenfoldInputError
        Both units given; not a positive finite number; a length in nm while the image is uncalibrated.

    Examples
    --------
    >>> length_px("column_spacing", nm=0.2, pixel_size_nm=0.04).value_px
    5.0
    >>> try:
    ...     length_px("ring_radius", nm=0.45)
    ... except ValueError as exc:  # TenfoldInputError
    ...     print(exc)  # doctest: +NORMALIZE_WHITESPACE
    ring_radius_nm=0.45 is in nm but the image is uncalibrated (no pixel size in the file and none given);
    give the pixel size (pixel_size_nm), or the length in pixels (ring_radius_px), or leave it empty for the
    automatic value
    """
    if nm is not None and px is not None:
        raise TenfoldInputError(f"{name}_nm and {name}_px both given; give the length in one unit")
    if nm is None and px is None:
        return Length(name, None, None, "automatic")
    value, unit = (nm, "nm") if nm is not None else (px, "px")
    if isinstance(value, bool) or not isinstance(value, numbers.Real) or not (math.isfinite(value) and value > 0):
        raise TenfoldInputError(f"{name}_{unit}={value!r} must be a positive number of {unit} (or empty for the "
                                "automatic value)")
    ps = check_pixel_size(pixel_size_nm, plausible=False)
    given = f"{float(value):.10g} {unit}"
    if unit == "px":
        return Length(name, float(value), given, "user")
    if ps is None:
        raise uncalibrated(f"{name}_nm={float(value):.10g}", f"the length in pixels ({name}_px), or leave it empty for "
                           "the automatic value")
    return Length(name, float(value) / ps, given, "user")


def uncalibrated(what: str, instead: str, *, pixel_size: str = "pixel_size_nm") -> TenfoldInputError:
    """The one message for a value in nm on an uncalibrated image: what was given, and what to give instead.

    Examples
    --------
    >>> print(uncalibrated("--region '0,0,5,5'", "the region in pixels (--region-unit px)",
    ...                    pixel_size="--pixel-size"))  # doctest: +NORMALIZE_WHITESPACE
    --region '0,0,5,5' is in nm but the image is uncalibrated (no pixel size in the file and none given);
    give the pixel size (--pixel-size), or the region in pixels (--region-unit px)
    """
    return TenfoldInputError(f"{what} is in nm but the image is uncalibrated (no pixel size in the file and none "
                             f"given); give the pixel size ({pixel_size}), or {instead}")


class ResolvedLengths(dict):
    """Base name -> :class:`Length` for every name in ``LENGTHS`` (a dict; :meth:`px` reads the value)."""

    def px(self, name: str) -> float | None:
        """The length in px, or None when it is automatic."""
        return self[name].value_px


def resolve_lengths(params, pixel_size_nm=None) -> ResolvedLengths:
    """Every length parameter in px, once, before the stages run.

    Parameters
    ----------
    params : Parameters or mapping
        ``<name>_nm`` / ``<name>_px`` for each name in ``LENGTHS``; missing or None values are automatic.
    pixel_size_nm : float, optional
        The image's pixel size (None: uncalibrated).

    Returns
    -------
    ResolvedLengths

    Raises
    ------
    TenfoldInputError
        From :func:`length_px`, naming the first bad parameter.

    Examples
    --------
    >>> resolve_lengths({"column_diameter_nm": 0.27}, pixel_size_nm=0.04).px("column_diameter")
    6.75
    """
    get = params.get if isinstance(params, dict) else (lambda k: getattr(params, k, None))
    return ResolvedLengths((name, length_px(name, nm=get(f"{name}_nm"), px=get(f"{name}_px"),
                                            pixel_size_nm=pixel_size_nm)) for name in LENGTHS)


def _chosen(summary: dict) -> dict[str, tuple[float | None, str | None]]:
    """The lengths the stages chose (px) and how, read from their summary sections."""
    auto = summary.get("automatic") or {}
    sigma = auto.get("sigma") or {}
    spacing = auto.get("spacing") or {}
    motifs = summary.get("motifs") or {}
    ladder = (summary.get("ladder") or {}).get("columns") or {}
    tiling = summary.get("tiling") or {}
    diameter = sigma.get("value_px")
    return {
        "column_diameter": (None if diameter is None else DIAMETER_PER_SIGMA * float(diameter),
                            f"{DIAMETER_PER_SIGMA:g} x the column width sigma (automatic.sigma)"),
        "column_spacing": (spacing.get("value_px"), spacing.get("how")),
        "ring_radius": (motifs.get("radius_px"), motifs.get("radius_source")),
        "ladder_r_max": (ladder.get("r_max_px"), "automatic: max(8 x the median nearest-neighbour distance, "
                         "1.1 d0 tau^4), at most half the smaller extent of the columns (ladder.columns)"),
        "d0": (ladder.get("d0_px"), ladder.get("d0_source")),
        "tiling_edge": (tiling.get("edge_px"), (tiling.get("edge_choice") or {}).get("method")
                        or tiling.get("edge_source")),
    }


def lengths_record(resolved: ResolvedLengths, summary: dict) -> dict[str, dict]:
    """``summary['lengths_px']``: how every length was resolved, the automatic ones with the stages' choice.

    Examples
    --------
    >>> r = resolve_lengths({"ring_radius_px": 11.25})
    >>> rec = lengths_record(r, {"tiling": {"edge_px": 30.5, "edge_source": "automatic"}})
    >>> rec["ring_radius"], rec["tiling_edge"]["value_px"], rec["tiling_edge"]["source"]
    ({'value_px': 11.25, 'given': '11.25 px', 'source': 'user'}, 30.5, 'automatic')
    """
    chosen = _chosen(summary)
    out = {}
    for name, length in resolved.items():
        if length.source == "automatic":
            value, how = chosen[name]
            length = Length(name, None if value is None else float(value), None, "automatic",
                            None if how is None else str(how))
        out[name] = length.as_dict()
    return out
