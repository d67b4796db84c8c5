"""Checks at the orchestrator's boundary that turn silent wrong answers into errors or notes.

* a region wholly outside the image, or without area, is an error (it would give an empty result);
* an edited columns table with NaN or far-off positions is an error (it would be written out as it is);
* a length parameter larger than the image is an error (a column spacing of 1e6 px hangs the scale stage, 1e300 px
  overflows an array size);
* an empty result explains itself: no columns or no ring motifs get a note saying which lengths were used and
  how they compare with the image;
* an error raised deep inside a stage gets the file name in front, so the one line names the file.
"""

from __future__ import annotations

from contextlib import contextmanager
from pathlib import Path

import numpy as np

from ._errors import TenfoldInputError
from ._lengths import length_px

__all__ = ["check_regions", "check_positions", "check_lengths", "empty_result_notes", "with_file", "name_the_file",
           "small_image_hint"]

#: below this side (px) an automatic scale failure is more likely a too small area than featureless noise
SMALL_SIDE_PX = 128
#: bound on positions when the image size is not known (no detector has a side of a million pixels)
_MAX_SIDE_PX = 1_000_000


def check_regions(regions, shape) -> None:
    """Raise when a region has no area or lies wholly outside the image of ``shape`` (rows, cols)."""
    rows, cols = shape
    for k, reg in enumerate(regions or (), start=1):
        v = np.asarray(reg.vertices_px, dtype=np.float64)
        name = f"region {getattr(reg, 'label', k)}"
        if v.ndim != 2 or len(v) < 3 or not np.isfinite(v).all():
            raise TenfoldInputError(f"{name} needs at least 3 finite corners, got {v.tolist()}")
        x, y = v[:, 0], v[:, 1]
        area = 0.5 * abs(float(np.dot(x, np.roll(y, 1)) - np.dot(y, np.roll(x, 1))))
        if area < 1.0:
            raise TenfoldInputError(f"{name} has no area ({area:.3g} px^2, corners {np.round(v, 2).tolist()}); "
                                    "give a rectangle or polygon that encloses some columns (--region X0,Y0,X1,Y1)")
        if x.max() < -0.5 or y.max() < -0.5 or x.min() > cols - 0.5 or y.min() > rows - 0.5:
            raise TenfoldInputError(
                f"{name} (x {x.min():.4g}..{x.max():.4g} px, y {y.min():.4g}..{y.max():.4g} px) lies wholly "
                f"outside the image ({cols} x {rows} px); check its corners and --region-unit (nm or px)"
            )


def check_positions(x, y, shape, *, what: str = "re-run from columns") -> None:
    """Raise when column positions are NaN/inf or outside the image (half a pixel of slack)."""
    x = np.asarray(x, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    rows, cols = shape
    if not (rows and cols):  # image size unknown (a result without its image): a generous bound
        rows = cols = _MAX_SIDE_PX
    with np.errstate(invalid="ignore"):
        bad = ~(np.isfinite(x) & np.isfinite(y) & (x >= -0.5) & (y >= -0.5) & (x <= cols - 0.5) & (y <= rows - 0.5))
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise TenfoldInputError(
            f"{what}: {int(bad.sum())} of {bad.size} columns have x_px/y_px that are NaN or outside the image "
            f"({cols} x {rows} px), first row {i} (x_px={x[i]!r}, y_px={y[i]!r}); remove or correct them"
        )


#: length parameters (base names; each exists as ``_nm`` and ``_px``) bounded by the image's longer side ...
_SIDE_LENGTHS = ("column_diameter", "column_spacing", "ring_radius", "tiling_edge")
#: ... and by its diagonal (pair distances)
_DIAGONAL_LENGTHS = ("ladder_r_max", "d0")


def check_lengths(params, shape, pixel_size_nm=None) -> None:
    """Raise when a length parameter is larger than the image it is applied to.

    Parameters
    ----------
    params : Parameters or mapping
        The run's parameters (``column_spacing_px``, ``ring_radius_nm``, ...); None values are automatic.
    shape : (int, int)
        (rows, cols) of the analysed image.
    pixel_size_nm : float, optional
        Converts the ``_nm`` lengths (without it they are checked elsewhere: they need a calibration).
    """
    rows, cols = (int(n) for n in shape[:2])
    get = params.get if isinstance(params, dict) else (lambda k: getattr(params, k, None))
    for bases, limit, what in ((_SIDE_LENGTHS, max(rows, cols), "longer side"),
                               (_DIAGONAL_LENGTHS, float(np.hypot(rows, cols)), "diagonal")):
        for base in bases:
            for unit in ("px", "nm"):
                value = get(f"{base}_{unit}")
                if value is None:
                    continue
                if unit == "nm" and not pixel_size_nm:
                    continue
                px = length_px(base, **{unit: value}, pixel_size_nm=pixel_size_nm).value_px
                if not px <= limit:
                    raise TenfoldInputError(
                        f"{base}_{unit}={float(value):g} {unit}{f' ({px:.4g} px)' if unit == 'nm' else ''} is larger than the image's {what} "
                        f"({limit:.0f} px, image {cols} x {rows} px); check the value and its unit (nm or px), or "
                        "leave it out for the automatic value"
                    )


def empty_result_notes(summary: dict, tables: dict, shape) -> list[str]:
    """Notes that explain an empty columns or motifs table from the lengths the run used."""
    notes = []
    rows, cols = shape
    auto = summary.get("automatic") or {}
    spacing = (auto.get("spacing") or {}).get("value_px")
    n_cols = len(tables.get("columns", ()))
    if n_cols == 0:
        extra = ""
        if spacing:
            extra = f" with a column spacing of {spacing:.4g} px ({(auto.get('spacing') or {}).get('how', '')})"
            if spacing > min(rows, cols) / 4:
                extra += f", more than a quarter of the image side ({min(rows, cols)} px): check --column-spacing"
        notes.append(f"no columns found{extra}; check the column spacing and diameter (nm vs px), the polarity "
                     "(--dark-columns) and the regions")
        return notes
    motifs = tables.get("motifs")
    m_info = summary.get("motifs") or {}
    n_rings = int(motifs["kind"].str.startswith("ring").sum()) if motifs is not None and len(motifs) else 0
    if n_rings == 0:
        radius = m_info.get("radius_px")
        how = str(m_info.get("radius_source") or "")[:120]
        text = "no ring motifs found"
        if radius:
            text += f" with a ring radius of {float(radius):.4g} px"
            if spacing:
                text += f" ({float(radius) / spacing:.3g} x the column spacing {spacing:.4g} px)"
            if how:
                text += f", {how}"
        notes.append(text + "; if a ring radius was given, check its value and unit (--ring-radius, nm or px)")
    return notes


def with_file(exc: TenfoldInputError, path: str) -> TenfoldInputError:
    """The same error with the input file in front of its message (unless it already names it)."""
    msg = str(exc)
    if not path or path in msg or Path(path).name in msg:
        return exc
    return TenfoldInputError(f"{path}: {msg}")


def name_the_file(notes: list[str], path: str) -> list[str]:
    """Stage notes about the anonymous ``image`` with the input file's name instead (stages see arrays only)."""
    if not path:
        return notes
    name = Path(path).name
    return [f"{name}: {n[len('image: '):]}" if n.startswith("image: ") else n for n in notes]


@contextmanager
def small_image_hint(shape):
    """Add the analysed size to a failed automatic scale when the area is small (the likelier cause)."""
    try:
        yield
    except TenfoldInputError as exc:
        msg = str(exc)
        if "no column scale found" not in msg or min(shape) >= SMALL_SIDE_PX:
            raise
        raise TenfoldInputError(
            f"{msg}; note the analysed area is only {shape[1]} x {shape[0]} px, likely too small to find the scale: "
            "give a larger region, or the column spacing and diameter"
        ) from None
