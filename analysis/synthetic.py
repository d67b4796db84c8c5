"""Synthetic micrographs of a decagonal cluster model, with their ground truth.

The model
---------
Cluster centres are the vertices of a Penrose rhombus tiling (de Bruijn's pentagrid, :mod:`._pentagrid`) with
edge ``edge_nm``. Every centre carries one column of the brightest species (2) and a ring of ten columns at
``ring_radius_nm`` whose species alternate between 1 and 0, so each of the two species forms a regular pentagon
and the two pentagons point opposite ways. All rings share one orientation: ring member k sits at
``angle_deg + 36 k`` (atan2 in the image frame, y down), i.e. member 0 points along a tiling edge direction.

Images are rendered as a sum of pixel-integrated 2-D Gaussians (one per column, ``counts`` electrons each) on a
constant background, followed by Poisson noise. HAADF column intensity is taken proportional to Z^1.7 of an
effective atomic number per column (common practice: the "Z-contrast" exponent lies between about 1.6 and 2
depending on the detector's inner angle; 1.7 is the value most often quoted).

The bundled samples in ``tenfold.sample_images`` are made here:
``python -m tenfold.analysis.synthetic --bundle sample_images``.

Conventions: pixel (row 0, col 0) has its centre at x = 0, y = 0; x along columns, y along rows (down);
nm = px * pixel size.

References
----------
N. G. de Bruijn, Indagationes Mathematicae 84 (1981) 39-66 (pentagrid method).
K. I. Mortensen, L. S. Churchman, J. A. Spudich, H. Flyvbjerg, Nature Methods 7 (2010) 377-381.
R. E. Thompson, D. R. Larson, W. W. Webb, Biophysical Journal 82 (2002) 2775-2783.
S. J. Pennycook, L. A. Boatner, Nature 336 (1988) 565-567 (incoherent Z-contrast imaging).
"""

from __future__ import annotations

import argparse
import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Mapping, Sequence

import numpy as np
import pandas as pd

from ._errors import TenfoldInputError
from ._pentagrid import TAU, pentagrid_tiling

__all__ = [
    "GENERATOR_VERSION",
    "Z_EXPONENT",
    "SPECIES_Z_EFF",
    "SyntheticModel",
    "SampleTruth",
    "decagonal_model",
    "counts_from_z",
    "render_image",
    "expected_image",
    "crlb_position_px",
    "make_sample",
    "write_sample",
    "build_bundle",
    "BUNDLE",
    "crystal_columns",
    "fcc_al_001_columns",
    "AL_LATTICE_NM",
]

#: Bumped whenever the model or the renderer changes what a given seed produces.
GENERATOR_VERSION = "tenfold-synthetic 1"

#: HAADF intensity ~ Z^Z_EXPONENT (common practice; Pennycook & Boatner 1988 give the incoherent Z-contrast picture).
Z_EXPONENT = 1.7

#: Effective atomic number per column of the invented alloy, species 0 (dimmest) .. 2 (brightest).
SPECIES_Z_EFF = (22.0, 40.0, 70.0)

#: Al lattice parameter at room temperature in nm (from memory of handbook tables: CRC Handbook, Wyckoff).
AL_LATTICE_NM = 0.40495

_RING = 10


def _rng(rng) -> np.random.Generator:
    return np.random.default_rng(rng)


def _positive(name: str, value, *, allow_zero: bool = False) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise TenfoldInputError(f"{name}={value!r} is not a number; give a positive value") from None
    if not math.isfinite(v) or v < 0 or (v == 0 and not allow_zero):
        what = "non-negative" if allow_zero else "positive"
        raise TenfoldInputError(f"{name}={value!r} must be a {what} finite number")
    return v


# ----------------------------------------------------------------------------------------------------------------
# The cluster model
# ----------------------------------------------------------------------------------------------------------------


@dataclass
class SyntheticModel:
    """A decagonal cluster model in physical units (nm), y down.

    Attributes
    ----------
    columns : DataFrame
        One row per atomic column: ``id`` (0..N-1), ``x_nm``, ``y_nm``, ``species`` (0 dimmest .. 2 brightest),
        ``z_eff`` (effective atomic number of the column), ``role`` ('centre' or 'ring'), ``motif_id`` (the
        cluster the column belongs to), ``slot`` (-1 for the centre, 0..9 for the ring position).
    motifs : DataFrame
        One 'ring10' row per cluster (``motif_id`` = cluster index) and one 'pentagon' row per species pentagon:
        ``motif_id``, ``kind``, ``order`` (10 or 5), ``species`` (pentagon species; -1 for rings),
        ``parent_ring`` (-1 for rings), ``centre_x_nm``, ``centre_y_nm``, ``radius_nm`` (mean member distance
        from the centre = circumradius), ``orientation_deg`` (arg(psi_n)/n mod 360/n, psi_n = mean exp(i n
        theta_k) over the present members, theta_k = atan2(dy, dx) with y down; NaN without members),
        ``complete`` (bool), ``n_members``, ``members`` (space-separated column ids in angular order).
    centres : DataFrame
        ``motif_id``, ``x_nm``, ``y_nm``: the tiling vertices kept.
    tiling_edges : DataFrame
        ``a``, ``b`` (motif ids), ``length_nm``, ``angle_deg`` (direction a -> b, mod 180).
    tiles : DataFrame
        ``tile`` ('thick_rhombus' or 'thin_rhombus'), ``v0`` .. ``v3`` (motif ids in cyclic order).
    params : dict
        The arguments the model was built with.
    """

    columns: pd.DataFrame
    motifs: pd.DataFrame
    centres: pd.DataFrame
    tiling_edges: pd.DataFrame
    tiles: pd.DataFrame
    params: dict = field(default_factory=dict)


def _motif_geometry(x, y, owner, n_motifs, cx, cy, order):
    """Mean radius, orientation arg(psi_n)/n and member count of motifs, vectorised over all memberships.

    ``owner`` gives the motif index of each member; ``cx, cy`` the motif centres.
    """
    dx, dy = x - cx[owner], y - cy[owner]
    r = np.hypot(dx, dy)
    theta = np.arctan2(dy, dx)
    n = np.bincount(owner, minlength=n_motifs)
    with np.errstate(invalid="ignore", divide="ignore"):
        radius = np.bincount(owner, r, minlength=n_motifs) / n
        psi = (np.bincount(owner, np.cos(order * theta), minlength=n_motifs)
               + 1j * np.bincount(owner, np.sin(order * theta), minlength=n_motifs)) / n
    period = 360.0 / order
    orient = np.mod(np.degrees(np.angle(psi)) / order, period)
    orient = np.where(np.isclose(orient, period, rtol=0, atol=1e-9), 0.0, orient)
    orient[n == 0] = np.nan
    return radius, orient, n


def _member_strings(ids, owner, sort_key, n_motifs) -> list[str]:
    if n_motifs == 0:
        return []
    order = np.lexsort((sort_key, owner))
    ids, owner = ids[order], owner[order]
    splits = np.searchsorted(owner, np.arange(1, n_motifs))
    return [" ".join(map(str, chunk)) for chunk in np.split(ids, splits)]


def decagonal_model(
    *,
    width_nm: float,
    height_nm: float,
    edge_nm: float = 2.0,
    ring_radius_nm: float = 0.45,
    angle_deg: float = 0.0,
    vacancy_fraction: float = 0.0,
    margin_nm: float = 0.15,
    z_eff: Sequence[float] = SPECIES_Z_EFF,
    rng: np.random.Generator | int | None = None,
) -> SyntheticModel:
    """Decagonal cluster model: ten-membered rings with a centre column on a Penrose rhombus tiling.

    Parameters
    ----------
    width_nm, height_nm : float
        Field size in nm; the field spans x in [0, width_nm], y in [0, height_nm] (y down).
    edge_nm : float
        Tiling edge length (cluster-cluster distance along an edge), nm.
    ring_radius_nm : float
        Radius of the ten-membered ring, nm. Must be below ``edge_nm / (2 tau)`` so that rings on the short
        diagonal of a thin rhombus (``edge_nm / tau``) do not overlap.
    angle_deg : float
        Rotation of the tiling and of every ring: ring member 0 and one tiling edge direction point along
        ``angle_deg`` (atan2 in the image frame, y down).
    vacancy_fraction : float
        Fraction of ring columns removed at random (centre columns are kept). Rings and pentagons that lose a
        member are marked ``complete = False``.
    margin_nm : float
        A cluster is kept only if its whole ring lies at least this far inside the field (default 0.15 nm, about
        one probe FWHM of a 0.06 nm-sigma probe). Tiles are kept when all four vertices are kept, edges when both
        ends are.
    z_eff : sequence of 3 floats
        Effective atomic number of a column of species 0, 1, 2 (dimmest to brightest).
    rng : numpy Generator or int seed, optional
        Draws the pentagrid offsets and the vacancies.

    Returns
    -------
    SyntheticModel
        Tables ``columns``, ``motifs``, ``centres``, ``tiling_edges``, ``tiles`` (see the class docstring).

    Notes
    -----
    Each ring has ten members at ``angle_deg + 36 k`` (k = 0..9); even k are species 1, odd k species 0, the
    centre is species 2. Ring ids are the cluster indices 0..M-1 (clusters sorted by y, then x); the species-1
    pentagon of ring m has motif id ``M + 2 m``, the species-0 pentagon ``M + 2 m + 1``.

    References
    ----------
    N. G. de Bruijn, Indagationes Mathematicae 84 (1981) 39-66.

    Examples
    --------
    >>> m = decagonal_model(width_nm=12, height_nm=12, rng=0)
    >>> sorted(set(m.motifs.kind))
    ['pentagon', 'ring10']
    """
    width_nm = _positive("width_nm", width_nm)
    height_nm = _positive("height_nm", height_nm)
    edge_nm = _positive("edge_nm", edge_nm)
    ring_radius_nm = _positive("ring_radius_nm", ring_radius_nm)
    margin_nm = _positive("margin_nm", margin_nm, allow_zero=True)
    vacancy_fraction = _positive("vacancy_fraction", vacancy_fraction, allow_zero=True)
    if vacancy_fraction >= 1.0:
        raise TenfoldInputError(f"vacancy_fraction={vacancy_fraction} must be in [0, 1)")
    if ring_radius_nm >= edge_nm / (2 * TAU):
        raise TenfoldInputError(
            f"ring_radius_nm={ring_radius_nm} overlaps neighbouring rings; keep it below edge_nm/(2 tau) = "
            f"{edge_nm / (2 * TAU):.3f} nm"
        )
    z_eff = np.asarray(z_eff, dtype=float)
    if z_eff.shape != (3,) or not np.all(np.diff(z_eff) > 0) or z_eff[0] <= 0:
        raise TenfoldInputError(f"z_eff={z_eff.tolist()} must be three positive increasing numbers (species 0..2)")
    gen = _rng(rng)

    half_w = 0.5 * width_nm / edge_nm + 2.0
    half_h = 0.5 * height_nm / edge_nm + 2.0
    tiling = pentagrid_tiling(half_w, half_height=half_h, rng=gen).scaled(
        edge_nm, centre=(0.5 * width_nm, 0.5 * height_nm), angle_deg=angle_deg
    )
    v = tiling.vertices
    reach = ring_radius_nm + margin_nm
    keep = (v[:, 0] >= reach) & (v[:, 0] <= width_nm - reach) & (v[:, 1] >= reach) & (v[:, 1] <= height_nm - reach)
    kept = np.flatnonzero(keep)
    kept = kept[np.lexsort((v[kept, 0], v[kept, 1]))]
    motif_of_vertex = np.full(len(v), -1, dtype=np.int64)
    motif_of_vertex[kept] = np.arange(len(kept))
    cxy = v[kept]
    n_c = len(kept)
    if n_c == 0:
        raise TenfoldInputError(
            f"width_nm={width_nm}, height_nm={height_nm}: no cluster fits in the field; make it a few edge_nm "
            f"({edge_nm} nm) wide at least"
        )

    # Columns: (cluster, slot) grid, slot -1 = centre, 0..9 ring.
    slot = np.tile(np.arange(-1, _RING), n_c)
    owner = np.repeat(np.arange(n_c), _RING + 1)
    ang = np.deg2rad(angle_deg + 36.0 * np.maximum(slot, 0))
    rad = np.where(slot < 0, 0.0, ring_radius_nm)
    x = cxy[owner, 0] + rad * np.cos(ang)
    y = cxy[owner, 1] + rad * np.sin(ang)
    species = np.where(slot < 0, 2, np.where(slot % 2 == 0, 1, 0))
    present = np.ones(len(slot), dtype=bool)
    ring_rows = np.flatnonzero(slot >= 0)
    n_vac = int(round(vacancy_fraction * len(ring_rows)))
    if n_vac:
        present[gen.choice(ring_rows, size=n_vac, replace=False)] = False
    x, y, species, slot, owner = x[present], y[present], species[present], slot[present], owner[present]
    ids = np.arange(len(x), dtype=np.int64)
    columns = pd.DataFrame({
        "id": ids,
        "x_nm": x,
        "y_nm": y,
        "species": species.astype(np.int64),
        "z_eff": z_eff[species],
        "role": np.where(slot < 0, "centre", "ring").astype(object),
        "motif_id": owner.astype(np.int64),
        "slot": slot.astype(np.int64),
    })

    motifs = _motif_table(columns, cxy[:, 0], cxy[:, 1], "nm")
    centres = pd.DataFrame({"motif_id": np.arange(n_c, dtype=np.int64), "x_nm": cxy[:, 0], "y_nm": cxy[:, 1]})

    e = motif_of_vertex[tiling.edges]
    e = e[(e >= 0).all(axis=1)]
    d = cxy[e[:, 1]] - cxy[e[:, 0]]
    tiling_edges = pd.DataFrame({
        "a": e[:, 0], "b": e[:, 1],
        "length_nm": np.hypot(d[:, 0], d[:, 1]),
        "angle_deg": _mod_angle(np.degrees(np.arctan2(d[:, 1], d[:, 0])), 180.0),
    })
    t = motif_of_vertex[tiling.rhombi]
    ok = (t >= 0).all(axis=1)
    t, thick = t[ok], tiling.thick[ok]
    tiles = pd.DataFrame({"tile": np.where(thick, "thick_rhombus", "thin_rhombus").astype(object)})
    for k in range(4):
        tiles[f"v{k}"] = t[:, k].astype(np.int64)

    params = {
        "width_nm": width_nm, "height_nm": height_nm, "edge_nm": edge_nm, "ring_radius_nm": ring_radius_nm,
        "angle_deg": float(angle_deg), "vacancy_fraction": vacancy_fraction, "margin_nm": margin_nm,
        "z_eff_by_species": z_eff.tolist(), "seed": rng if isinstance(rng, (int, np.integer)) else None,
        "n_clusters": int(n_c), "n_columns": int(len(columns)), "n_vacancies": n_vac,
    }
    return SyntheticModel(columns, motifs, centres, tiling_edges, tiles, params)


def _mod_angle(a, period):
    a = np.mod(a, period)
    return np.where(np.isclose(a, period, rtol=0, atol=1e-9), 0.0, a)


def _motif_table(columns: pd.DataFrame, cx: np.ndarray, cy: np.ndarray, unit: str) -> pd.DataFrame:
    """Ring and pentagon rows from the column table (positions in ``x_<unit>``), centres ``cx, cy``."""
    n_c = len(cx)
    ring = columns[columns["role"] == "ring"]
    x, y = ring[f"x_{unit}"].to_numpy(), ring[f"y_{unit}"].to_numpy()
    owner = ring["motif_id"].to_numpy()
    slot = ring["slot"].to_numpy()
    ids = ring["id"].to_numpy()

    r10, o10, n10 = _motif_geometry(x, y, owner, n_c, cx, cy, _RING)
    m10 = _member_strings(ids, owner, slot, n_c)
    # Pentagon index 2m (species 1, even slots) and 2m + 1 (species 0, odd slots).
    powner = 2 * owner + (slot % 2)
    pcx, pcy = np.repeat(cx, 2), np.repeat(cy, 2)
    r5, o5, n5 = _motif_geometry(x, y, powner, 2 * n_c, pcx, pcy, 5)
    m5 = _member_strings(ids, powner, slot, 2 * n_c)

    rings = pd.DataFrame({
        "motif_id": np.arange(n_c, dtype=np.int64), "kind": "ring10", "order": _RING, "species": -1,
        "parent_ring": -1, f"centre_x_{unit}": cx, f"centre_y_{unit}": cy, f"radius_{unit}": r10,
        "orientation_deg": o10, "complete": n10 == _RING, "n_members": n10, "members": m10,
    })
    pents = pd.DataFrame({
        "motif_id": n_c + np.arange(2 * n_c, dtype=np.int64), "kind": "pentagon", "order": 5,
        "species": np.tile([1, 0], n_c), "parent_ring": np.repeat(np.arange(n_c), 2),
        f"centre_x_{unit}": pcx, f"centre_y_{unit}": pcy, f"radius_{unit}": r5,
        "orientation_deg": o5, "complete": n5 == 5, "n_members": n5, "members": m5,
    })
    out = pd.concat([rings, pents], ignore_index=True)
    for c in ("order", "species", "parent_ring", "n_members"):
        out[c] = out[c].astype(np.int64)
    out["kind"] = out["kind"].astype(object)
    out["members"] = out["members"].astype(object)
    return out


def counts_from_z(z_eff, *, brightest_counts: float, z_max: float | None = None) -> np.ndarray:
    """Electrons per column for effective atomic numbers, HAADF intensity ~ Z^1.7 (common practice).

    Parameters
    ----------
    z_eff : array_like
        Effective atomic number(s).
    brightest_counts : float
        Counts given to a column of ``z_max``.
    z_max : float, optional
        Reference Z (default: the largest of ``z_eff``).

    Returns
    -------
    ndarray
        ``brightest_counts * (z_eff / z_max) ** 1.7``.
    """
    z = np.asarray(z_eff, dtype=float)
    ref = float(np.max(z)) if z_max is None else float(z_max)
    return _positive("brightest_counts", brightest_counts) * (z / ref) ** Z_EXPONENT


# ----------------------------------------------------------------------------------------------------------------
# Rendering
# ----------------------------------------------------------------------------------------------------------------

_CHUNK_ENTRIES = 1 << 22  # pixel contributions per chunk (~32 MB of float64 weights + int64 indices each)


def _integrated_profile(centre: np.ndarray, start: np.ndarray, length: int, sigma: float, size: int):
    """Per-pixel integrals of a unit 1-D Gaussian over [j - 0.5, j + 0.5] for j = start .. start+length-1.

    Returns (weights (n, L), clipped indices (n, L)); weights of pixels outside [0, size) are zero.
    """
    from scipy.special import erf

    j = start[:, None] + np.arange(length)[None, :]
    edges = (start[:, None] - 0.5 + np.arange(length + 1)[None, :] - centre[:, None]) / (sigma * np.sqrt(2.0))
    w = 0.5 * np.diff(erf(edges), axis=1)
    inside = (j >= 0) & (j < size)
    w = np.where(inside, w, 0.0)
    return w, np.clip(j, 0, size - 1)


def _check_shape(shape) -> tuple[int, int]:
    try:
        h, w = (int(s) for s in shape)
    except (TypeError, ValueError):
        raise TenfoldInputError(f"shape={shape!r} must be (rows, cols) of positive integers") from None
    if h <= 0 or w <= 0:
        raise TenfoldInputError(f"shape={shape!r} must be (rows, cols) of positive integers")
    return h, w


def _column_signal(x_px, y_px, counts, shape, sigma_px) -> np.ndarray:
    """Noise-free column signal (float64, flat) without background."""
    h, w = shape
    img = np.zeros(h * w, dtype=np.float64)
    n = len(x_px)
    if n == 0:
        return img
    half = int(math.ceil(4.5 * sigma_px)) + 1
    length = 2 * half + 1
    per_col = length * length
    chunk = max(1, _CHUNK_ENTRIES // per_col)
    for s in range(0, n, chunk):
        xs, ys, cs = x_px[s:s + chunk], y_px[s:s + chunk], counts[s:s + chunk]
        wx, jx = _integrated_profile(xs, np.floor(xs).astype(np.int64) - half + 1, length, sigma_px, w)
        wy, jy = _integrated_profile(ys, np.floor(ys).astype(np.int64) - half + 1, length, sigma_px, h)
        weights = (cs[:, None, None] * wy[:, :, None]) * wx[:, None, :]
        flat = jy[:, :, None] * w + jx[:, None, :]
        np.add.at(img, flat.ravel(), weights.ravel())
    return img


def _render(x_px, y_px, counts, shape, sigma_px, background, dark_columns, shear, rng, noise) -> np.ndarray:
    shape = _check_shape(shape)
    sigma_px = _positive("sigma_px", sigma_px)
    background = _positive("background", background, allow_zero=True)
    x = np.asarray(x_px, dtype=float).ravel()
    y = np.asarray(y_px, dtype=float).ravel()
    c = np.broadcast_to(np.asarray(counts, dtype=float), x.shape).ravel()
    if y.shape != x.shape:
        raise TenfoldInputError(f"x_px and y_px must have the same length, got {x.size} and {y.size}")
    if not (np.all(np.isfinite(x)) and np.all(np.isfinite(y)) and np.all(np.isfinite(c))):
        raise TenfoldInputError("x_px, y_px and counts must be finite; drop NaN/inf columns before rendering")
    if np.any(c < 0):
        raise TenfoldInputError("counts must be non-negative electrons per column")
    shear = float(shear)
    if not math.isfinite(shear):
        raise TenfoldInputError(f"shear={shear!r} must be a finite number")
    x = x + shear * y
    signal = _column_signal(x, y, c, shape, sigma_px)
    if dark_columns:
        expected = background - signal
        low = float(expected.min()) if expected.size else background
        if low < 0:
            raise TenfoldInputError(
                f"background={background} is too low for dark columns: the darkest pixel would be {low:.1f}; "
                f"raise background above {background - low:.0f} counts per px"
            )
    else:
        expected = signal + background
    expected = expected.reshape(shape)
    if noise:
        expected = _rng(rng).poisson(expected).astype(np.float32)
    return expected.astype(np.float32, copy=False)


def render_image(
    x_px,
    y_px,
    counts,
    *,
    shape: tuple[int, int],
    sigma_px: float,
    background: float,
    rng: np.random.Generator | int | None = None,
    dark_columns: bool = False,
    shear: float = 0.0,
    noise: bool = True,
) -> np.ndarray:
    """Render columns as pixel-integrated 2-D Gaussians on a background, with Poisson noise.

    Parameters
    ----------
    x_px, y_px : array_like, shape (N,)
        Column positions in px (pixel (row 0, col 0) centre at x = 0, y = 0; x along columns, y down), before
        the scan shear.
    counts : array_like, shape (N,) or scalar
        Electrons scattered into each column (the total N of the spot).
    shape : (int, int)
        Image (rows, cols).
    sigma_px : float
        Gaussian standard deviation of a column image (probe and column spread together), px.
    background : float
        Background, counts per px. With ``dark_columns`` this is the bright level from which columns are
        subtracted and must exceed the deepest column dip.
    rng : numpy Generator or int seed, optional
        Source of the Poisson noise.
    dark_columns : bool
        HRTEM-like contrast: expected image = background - column signal (dark columns on a bright field).
    shear : float
        Fast-scan distortion: every position is moved to x' = x + shear * y before rendering, as when the fast
        scan (along x) starts later on every successive row. Positive shear leans columns to the right downwards.
    noise : bool
        Draw Poisson counts from the expected image (default). False returns the expected image itself.

    Returns
    -------
    ndarray, float32, shape ``shape``
        The image in counts per pixel.

    Notes
    -----
    Column i contributes ``counts_i * Px(col) * Py(row)`` where ``Px(j) = (erf((j + 1/2 - x)/(s sqrt 2)) -
    erf((j - 1/2 - x)/(s sqrt 2))) / 2`` is the integral of a unit Gaussian over pixel j. Each column is
    evaluated on a square patch of half-width ceil(4.5 sigma) + 1 px (outer product of the two 1-D profiles), all
    columns at once in chunks of a few million pixel contributions, accumulated with ``np.add.at``. Parts of a
    column that fall outside the image are lost (not wrapped).

    Examples
    --------
    >>> img = render_image([10.0], [12.0], [1000.0], shape=(24, 24), sigma_px=1.5, background=0.0, noise=False)
    >>> round(float(img.sum()), 2)
    1000.0
    """
    return _render(x_px, y_px, counts, shape, sigma_px, background, dark_columns, shear, rng, noise)


def expected_image(
    x_px,
    y_px,
    counts,
    *,
    shape: tuple[int, int],
    sigma_px: float,
    background: float,
    dark_columns: bool = False,
    shear: float = 0.0,
) -> np.ndarray:
    """The noise-free image of :func:`render_image` (same parameters, same code path, no rng).

    Returns
    -------
    ndarray, float32, shape ``shape``
        Expected counts per pixel.
    """
    return _render(x_px, y_px, counts, shape, sigma_px, background, dark_columns, shear, None, False)


def crlb_position_px(counts, sigma_px, background, pixel: float = 1.0, *, estimator: str = "mle"):
    """Best achievable per-axis position standard deviation of a 2-D Gaussian spot, in px.

    Parameters
    ----------
    counts : float or array_like
        N, the total counts in the spot.
    sigma_px : float or array_like
        s, the Gaussian standard deviation of the spot, px.
    background : float or array_like
        b, expected background counts per pixel.
    pixel : float
        a, the pixel size in the same unit as ``sigma_px`` (1 for px).
    estimator : {'mle', 'lsq'}
        'mle': the Cramer-Rao bound reached by maximum-likelihood fitting with a Poisson model, Mortensen et
        al. (2010) eq. (5): ``var = (s_a^2/N) / (1 + int_0^1 ln t / (1 + t/tau) dt)`` with ``tau = 2 pi s_a^2 b
        / (N a^2)``. The integral is ``Li2(-1/tau) tau`` (dilogarithm) and vanishes for b = 0, where
        ``var = s_a^2 / N``.
        'lsq': unweighted least-squares fitting, Mortensen et al. (2010) eq. (6):
        ``var = (s_a^2/N) (16/9 + 8 pi s_a^2 b / (N a^2))``.
        In both, ``s_a^2 = s^2 + a^2/12`` and the EMCCD excess-noise factor is omitted (F = 1, direct counting).

    Returns
    -------
    float or ndarray
        Standard deviation of the position along one axis, px (``sqrt(var)``). A float for scalar input.

    Notes
    -----
    Mortensen et al. corrected the earlier formula of Thompson, Larson & Webb (2002),
    ``var = (s^2 + a^2/12)/N + 8 pi s^4 b / (a^2 N^2)``, by the factor 16/9 for least squares and by using
    ``s_a`` in the background term. At b = 0 the MLE bound is the textbook ``s_a^2/N``; at high background both
    estimators approach ``8 pi s_a^4 b / (N^2 a^2)``.

    References
    ----------
    K. I. Mortensen, L. S. Churchman, J. A. Spudich, H. Flyvbjerg, "Optimized localization analysis for
    single-molecule tracking and super-resolution microscopy", Nature Methods 7 (2010) 377-381.
    R. E. Thompson, D. R. Larson, W. W. Webb, "Precise nanometer localization analysis for individual
    fluorescent probes", Biophysical Journal 82 (2002) 2775-2783.

    Examples
    --------
    >>> round(crlb_position_px(1000.0, 1.5, 0.0, pixel=1e-6), 5)
    0.04743
    """
    from scipy.special import spence

    n = np.asarray(counts, dtype=float)
    s = np.asarray(sigma_px, dtype=float)
    b = np.asarray(background, dtype=float)
    a = float(pixel)
    if np.any(n <= 0) or np.any(s <= 0) or np.any(b < 0) or not a > 0:
        raise TenfoldInputError("crlb_position_px: counts, sigma_px and pixel must be positive, background >= 0")
    sa2 = s**2 + a**2 / 12.0
    if estimator == "lsq":
        var = sa2 / n * (16.0 / 9.0 + 8.0 * np.pi * sa2 * b / (n * a**2))
    elif estimator == "mle":
        tau = 2.0 * np.pi * sa2 * b / (n * a**2)
        with np.errstate(divide="ignore", invalid="ignore"):
            c = 1.0 / tau
            # Li2(z) = spence(1 - z) in scipy's convention.
            integral = np.where(tau > 0, spence(1.0 + c) / c, 0.0)
        var = sa2 / n / (1.0 + integral)
    else:
        raise TenfoldInputError(f"estimator={estimator!r} must be 'mle' or 'lsq'")
    out = np.sqrt(var)
    return float(out) if out.ndim == 0 else out


# ----------------------------------------------------------------------------------------------------------------
# Samples
# ----------------------------------------------------------------------------------------------------------------


@dataclass
class SampleTruth:
    """Ground truth of a rendered sample, positions as they appear in the image (after the scan shear).

    Attributes
    ----------
    columns : DataFrame
        ``id, x_px, y_px, x_nm, y_nm, species, z_eff, role, motif_id, slot, counts``.
    motifs : DataFrame
        The model's motif table with ``centre_x_px, centre_y_px, radius_px`` added and ``centre_*_nm``,
        ``radius_nm``, ``orientation_deg`` recomputed from the sheared positions.
    centres : DataFrame
        ``motif_id, x_px, y_px, x_nm, y_nm``.
    tiling_edges : DataFrame
        ``a, b, length_px, length_nm, angle_deg`` (after shear).
    tiles : DataFrame
        As in the model.
    params : dict
        Every parameter of the model and of the rendering.
    """

    columns: pd.DataFrame
    motifs: pd.DataFrame
    centres: pd.DataFrame
    tiling_edges: pd.DataFrame
    tiles: pd.DataFrame
    params: dict


def _species_counts(counts_by_species) -> np.ndarray:
    if isinstance(counts_by_species, Mapping):
        try:
            arr = np.array([float(counts_by_species[k]) for k in range(3)])
        except KeyError:
            raise TenfoldInputError("counts_by_species must give counts for species 0, 1 and 2") from None
    else:
        arr = np.asarray(counts_by_species, dtype=float).ravel()
    if arr.shape != (3,) or not np.all(np.isfinite(arr)) or np.any(arr < 0):
        raise TenfoldInputError(
            f"counts_by_species={counts_by_species!r} must be three non-negative counts (species 0, 1, 2)"
        )
    return arr


def make_sample(
    model: SyntheticModel,
    *,
    pixel_size_nm: float,
    sigma_nm: float,
    counts_by_species,
    background: float,
    rng: np.random.Generator | int | None,
    dark_columns: bool = False,
    shear: float = 0.0,
    shape: tuple[int, int] | None = None,
) -> tuple[np.ndarray, SampleTruth]:
    """Render a model into a noisy micrograph and return it with its ground truth.

    Parameters
    ----------
    model : SyntheticModel
        From :func:`decagonal_model`.
    pixel_size_nm : float
        Pixel size, nm.
    sigma_nm : float
        Gaussian standard deviation of a column image, nm.
    counts_by_species : sequence of 3 floats or mapping {0, 1, 2: counts}
        Electrons scattered into one column of each species.
    background : float
        Background counts per px (bright level when ``dark_columns``).
    rng : numpy Generator or int seed
        Poisson noise.
    dark_columns, shear : see :func:`render_image`.
    shape : (rows, cols), optional
        Default ``round(height_nm / pixel_size_nm), round(width_nm / pixel_size_nm)``.

    Returns
    -------
    image : ndarray float32
        Counts per px.
    truth : SampleTruth
        Positions after the shear, in px and nm.

    Raises
    ------
    TenfoldInputError
        A sheared column would leave the image (build the model narrower), or bad parameters.
    """
    ps = _positive("pixel_size_nm", pixel_size_nm)
    sigma_px = _positive("sigma_nm", sigma_nm) / ps
    counts_sp = _species_counts(counts_by_species)
    if shape is None:
        shape = (int(round(model.params["height_nm"] / ps)), int(round(model.params["width_nm"] / ps)))
    shape = _check_shape(shape)
    shear = float(shear)
    cols = model.columns.copy()
    x0, y0 = cols["x_nm"].to_numpy() / ps, cols["y_nm"].to_numpy() / ps
    counts = counts_sp[cols["species"].to_numpy()]
    image = render_image(x0, y0, counts, shape=shape, sigma_px=sigma_px, background=background, rng=rng,
                         dark_columns=dark_columns, shear=shear)

    def sheared(x, y):
        return x + shear * y, y

    x, y = sheared(x0, y0)
    if len(x) and (x.min() < -0.5 or x.max() > shape[1] - 0.5 or y.min() < -0.5 or y.max() > shape[0] - 0.5):
        raise TenfoldInputError(
            f"shear={shear}: columns leave the {shape[0]}x{shape[1]} image (x from {x.min():.1f} to "
            f"{x.max():.1f} px); build the model narrower by |shear| * height_nm or give a wider shape"
        )
    cols.insert(1, "x_px", x)
    cols.insert(2, "y_px", y)
    cols["x_nm"], cols["y_nm"] = x * ps, y * ps
    cols["counts"] = counts
    cx, cy = sheared(model.centres["x_nm"].to_numpy() / ps, model.centres["y_nm"].to_numpy() / ps)
    centres = pd.DataFrame({"motif_id": model.centres["motif_id"].to_numpy(), "x_px": cx, "y_px": cy,
                            "x_nm": cx * ps, "y_nm": cy * ps})
    motifs = _motif_table(cols, cx, cy, "px")
    for q in ("centre_x", "centre_y", "radius"):
        motifs[f"{q}_nm"] = motifs[f"{q}_px"] * ps
    e = model.tiling_edges
    dx = cx[e["b"].to_numpy()] - cx[e["a"].to_numpy()]
    dy = cy[e["b"].to_numpy()] - cy[e["a"].to_numpy()]
    length = np.hypot(dx, dy)
    edges = pd.DataFrame({"a": e["a"].to_numpy(), "b": e["b"].to_numpy(), "length_px": length,
                          "length_nm": length * ps,
                          "angle_deg": _mod_angle(np.degrees(np.arctan2(dy, dx)), 180.0)})
    params = dict(model.params)
    params.update({
        "generator_version": GENERATOR_VERSION, "shape": list(shape), "pixel_size_nm": ps, "sigma_nm": float(sigma_nm),
        "sigma_px": sigma_px, "counts_by_species": counts_sp.tolist(), "background_per_px": float(background),
        "dark_columns": bool(dark_columns), "shear": shear, "z_exponent": Z_EXPONENT,
        "noise_seed": rng if isinstance(rng, (int, np.integer)) else None,
        # The bound assumes a bright spot on a background; it does not apply to dark columns.
        "crlb_position_px_mle_by_species": None if dark_columns else [
            crlb_position_px(n, sigma_px, background, estimator="mle") if n > 0 else None for n in counts_sp
        ],
    })
    return image, SampleTruth(cols, motifs, centres, edges, model.tiles.copy(), params)


def write_sample(
    out_dir,
    name: str,
    model: SyntheticModel,
    *,
    pixel_size_nm: float,
    sigma_nm: float,
    counts_by_species,
    background: float,
    rng: np.random.Generator | int | None,
    dark_columns: bool = False,
    shear: float = 0.0,
    shape: tuple[int, int] | None = None,
    label: str = "",
    overwrite: bool = False,
) -> dict[str, Path]:
    """Render a sample and write it with its ground truth.

    Files written in ``out_dir``: ``<name>.tif`` (uint16 counts, zlib, calibrated in the ImageJ convention via
    :func:`tenfold.analysis.io.write_tiff`), ``<name>_columns.csv``, ``<name>_motifs.csv``,
    ``<name>_centres.csv``, ``<name>_tiling_edges.csv``, ``<name>_tiles.csv`` and ``<name>_truth.json`` (all
    parameters).

    Parameters
    ----------
    out_dir : path-like
        Output folder (created if missing).
    name : str
        File stem.
    model, pixel_size_nm, sigma_nm, counts_by_species, background, rng, dark_columns, shear, shape
        As in :func:`make_sample`.
    label : str
        Free-text sample label stored in the TIFF description and the JSON.
    overwrite : bool
        Replace existing files.

    Returns
    -------
    dict
        File kind -> path.
    """
    from .io import write_tiff

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    image, truth = make_sample(model, pixel_size_nm=pixel_size_nm, sigma_nm=sigma_nm,
                               counts_by_species=counts_by_species, background=background, rng=rng,
                               dark_columns=dark_columns, shear=shear, shape=shape)
    if image.max() > np.iinfo(np.uint16).max:
        raise TenfoldInputError(f"{name}: counts exceed 65535 and do not fit uint16; lower the counts or background")
    paths = {"image": out / f"{name}.tif"}
    for key in ("columns", "motifs", "centres", "tiling_edges", "tiles"):
        paths[key] = out / f"{name}_{key}.csv"
    paths["truth"] = out / f"{name}_truth.json"
    if not overwrite:
        for p in paths.values():
            if p.exists():
                raise TenfoldInputError(f"{p}: file already exists; pass overwrite=True to replace it")
    params = dict(truth.params, name=name, label=label)
    description = f"{label} | synthetic, {GENERATOR_VERSION}; ground truth in {name}_truth.json".strip(" |")
    write_tiff(paths["image"], image.astype(np.uint16), pixel_size_nm=pixel_size_nm, description=description,
               overwrite=True)
    col_order = ["id", "x_px", "y_px", "x_nm", "y_nm", "species", "z_eff", "role", "motif_id", "slot", "counts"]
    truth.columns[col_order].to_csv(paths["columns"], index=False, float_format="%.6f")
    truth.motifs.to_csv(paths["motifs"], index=False, float_format="%.6f")
    truth.centres.to_csv(paths["centres"], index=False, float_format="%.6f")
    truth.tiling_edges.to_csv(paths["tiling_edges"], index=False, float_format="%.6f")
    truth.tiles.to_csv(paths["tiles"], index=False)
    params["files"] = {k: p.name for k, p in paths.items()}
    paths["truth"].write_text(json.dumps(params, indent=2, default=_json_default) + "\n")
    return paths


def _json_default(o):
    if isinstance(o, np.integer):
        return int(o)
    if isinstance(o, np.floating):
        return float(o)
    raise TypeError(f"not JSON serialisable: {type(o)}")


# ----------------------------------------------------------------------------------------------------------------
# The bundled set
# ----------------------------------------------------------------------------------------------------------------

_PX = 0.04
_SIGMA = 0.06


def _bundle_counts(brightest: float) -> list[float]:
    return [float(round(c)) for c in counts_from_z(SPECIES_Z_EFF, brightest_counts=brightest)]


#: name -> (label, model kwargs, render kwargs, description). Seeds fixed: the files are reproducible.
BUNDLE: dict[str, dict] = {
    "decagonal_haadf_high_dose": dict(
        label="FX-D10 grain A, HAADF, high dose",
        model=dict(width_nm=1024 * _PX, height_nm=1024 * _PX, angle_deg=7.0, rng=101),
        render=dict(counts_by_species=_bundle_counts(8000.0), background=40.0, rng=1101),
        about="clean reference: thousands of counts per column, Poisson noise only",
    ),
    "decagonal_haadf_low_dose": dict(
        label="FX-D10 grain A, HAADF, low dose",
        model=dict(width_nm=1024 * _PX, height_nm=1024 * _PX, angle_deg=7.0, rng=101),
        render=dict(counts_by_species=_bundle_counts(600.0), background=4.0, rng=1102),
        about="same model as the high-dose image, a few hundred counts per column (dim species ~80)",
    ),
    "decagonal_haadf_vacancies": dict(
        label="FX-D10 grain B, HAADF, ring vacancies",
        model=dict(width_nm=768 * _PX, height_nm=768 * _PX, angle_deg=-12.0, vacancy_fraction=0.05, rng=202),
        render=dict(counts_by_species=_bundle_counts(4000.0), background=20.0, rng=1202),
        about="5 % of ring columns removed at random; incomplete rings marked complete = False",
    ),
    "decagonal_hrtem_dark": dict(
        label="FX-D10 grain C, HRTEM-like dark columns",
        model=dict(width_nm=768 * _PX, height_nm=768 * _PX, angle_deg=23.0, rng=303),
        # 3x the HAADF column counts (dimmest species matched-filter SNR ~10 instead of a marginal ~3.7); the bright
        # level is raised to 1000 so that the brightest column (peak ~850 counts/px) stays above zero
        render=dict(counts_by_species=_bundle_counts(12000.0), background=1000.0, dark_columns=True, rng=1303),
        about="dark columns on a bright field (expected = 1000 - column signal), Poisson noise",
    ),
    "decagonal_haadf_sheared": dict(
        label="FX-D10 grain A, HAADF, fast-scan shear 0.03",
        model=dict(width_nm=round(768 * _PX * (1 - 0.03), 4), height_nm=768 * _PX, angle_deg=7.0, rng=404),
        render=dict(counts_by_species=_bundle_counts(4000.0), background=20.0, shear=0.03, rng=1404,
                    shape=(768, 768)),
        about="x' = x + 0.03 y applied to every column (model 3 % narrower so the sheared field fits)",
    ),
}


def build_bundle(out_dir, *, overwrite: bool = True) -> list[Path]:
    """Rebuild the bundled sample images (``BUNDLE``) and their README in ``out_dir``.

    Returns
    -------
    list of Path
        The TIFF files written.
    """
    out = Path(out_dir)
    written = []
    rows = []
    for name, spec in BUNDLE.items():
        model = decagonal_model(**spec["model"])
        paths = write_sample(out, name, model, pixel_size_nm=_PX, sigma_nm=_SIGMA, label=spec["label"],
                             overwrite=overwrite, **spec["render"])
        written.append(paths["image"])
        truth = json.loads(paths["truth"].read_text())
        rows.append((name, spec, truth))
    (out / "README.md").write_text(_bundle_readme(rows))
    return written


def _bundle_readme(rows) -> str:
    lines = [
        "# Bundled sample images",
        "",
        "Synthetic micrographs of **FX-D10**, a decagonal alloy that does not exist: we invented it for these demos.",
        "Its columns have effective atomic numbers 22 (species 0), 40 (species 1) and 70 (species 2); HAADF",
        "intensity is taken as Z^1.7 (common practice). Each cluster is a species-2 centre column in a ring of ten",
        "columns of radius 0.45 nm alternating species 1 and 0 (two opposite pentagons); the cluster centres are",
        "the vertices of a Penrose rhombus tiling with 2 nm edges. See `docs/synthetic.md`.",
        "",
        f"All images: pixel size {_PX} nm (calibrated TIFF, ImageJ convention), column sigma {_SIGMA} nm "
        f"({_SIGMA / _PX:g} px), uint16 counts, Poisson noise, fixed seeds. Rebuild with",
        "`python -m tenfold.analysis.synthetic --bundle sample_images` (generator: " + GENERATOR_VERSION + ").",
        "",
        "| file | size (px) | counts per column (species 0/1/2) | background (counts/px) | clusters | columns | what it tests |",
        "| --- | --- | --- | --- | --- | --- | --- |",
    ]
    for name, spec, t in rows:
        counts = "/".join(f"{c:g}" for c in t["counts_by_species"])
        lines.append(f"| `{name}.tif` | {t['shape'][1]} x {t['shape'][0]} | {counts} | {t['background_per_px']:g}"
                     f"{' (bright level)' if t['dark_columns'] else ''} | {t['n_clusters']} | {t['n_columns']} |"
                     f" {spec['about']} |")
    lines += [
        "",
        "Ground truth beside each image (positions as they appear in the image, i.e. after any shear; pixel",
        "(row 0, col 0) centre at x = 0, y = 0, y down):",
        "",
        "* `<name>_columns.csv`: id, x_px, y_px, x_nm, y_nm, species, z_eff, role ('centre' / 'ring'), motif_id"
        " (cluster), slot (-1 centre, 0-9 ring position), counts.",
        "* `<name>_motifs.csv`: one `ring10` row per cluster (motif_id = cluster index) and two `pentagon` rows"
        " (species 1, species 0) per ring, with centre, radius, orientation_deg (arg(psi_n)/n, mod 360/n),"
        " complete, n_members, members (column ids).",
        "* `<name>_centres.csv`: cluster centres (tiling vertices) in px and nm.",
        "* `<name>_tiling_edges.csv`: tiling edges between cluster ids a, b with length and angle (mod 180).",
        "* `<name>_tiles.csv`: thick / thin rhombi by their four cluster ids.",
        "* `<name>_truth.json`: every model and rendering parameter, seeds, and the Cramer-Rao position bound per"
        " species (Mortensen et al., Nature Methods 7 (2010) 377, maximum likelihood).",
        "",
    ]
    return "\n".join(lines)


# ----------------------------------------------------------------------------------------------------------------
# Crystal references
# ----------------------------------------------------------------------------------------------------------------

_AXES = {"x": (1, 2), "y": (2, 0), "z": (0, 1)}


def crystal_columns(atoms, *, axis: str = "z", decimals: int = 4) -> pd.DataFrame:
    """Project a crystal along an axis into its atomic columns.

    Parameters
    ----------
    atoms : ase.Atoms or any object with ``get_positions()`` (Angstrom) and ``get_atomic_numbers()``
        The structure.
    axis : {'x', 'y', 'z'}
        Projection direction. The in-plane coordinates are (y, z) for 'x', (z, x) for 'y', (x, y) for 'z'.
    decimals : int
        Positions are rounded to this many decimals of a nm to decide which atoms share a column; the reported
        position is the mean of the members' exact positions.

    Returns
    -------
    DataFrame
        ``x_nm, y_nm`` (column position), ``n_atoms`` (atoms in the column), ``z_sum`` (sum of their atomic
        numbers), sorted by y then x.
    """
    if axis not in _AXES:
        raise TenfoldInputError(f"axis={axis!r} must be 'x', 'y' or 'z'")
    try:
        pos = np.asarray(atoms.get_positions(), dtype=float) / 10.0
        z = np.asarray(atoms.get_atomic_numbers(), dtype=np.int64)
    except AttributeError:
        raise TenfoldInputError(
            "atoms must provide get_positions() and get_atomic_numbers() (e.g. an ase.Atoms)"
        ) from None
    i, j = _AXES[axis]
    xy = pos[:, [i, j]]
    key = np.round(xy, decimals) + 0.0  # + 0.0 turns -0.0 into 0.0
    uniq, inv, n = np.unique(key, axis=0, return_inverse=True, return_counts=True)
    inv = inv.ravel()
    # Report the mean of the exact positions; the rounded key only decides membership.
    cx = np.bincount(inv, weights=xy[:, 0], minlength=len(uniq)) / n
    cy = np.bincount(inv, weights=xy[:, 1], minlength=len(uniq)) / n
    zsum = np.bincount(inv, weights=z, minlength=len(uniq)).astype(np.int64)
    df = pd.DataFrame({"x_nm": cx, "y_nm": cy, "n_atoms": n.astype(np.int64), "z_sum": zsum})
    return df.sort_values(["y_nm", "x_nm"], ignore_index=True)


def fcc_al_001_columns(*, a_nm: float = AL_LATTICE_NM, width_nm: float, height_nm: float,
                       thickness_cells: int = 1) -> pd.DataFrame:
    """Atomic columns of fcc Al viewed along [001], built with ASE.

    Parameters
    ----------
    a_nm : float
        Cubic lattice parameter; default 0.40495 nm, Al at room temperature (from memory of handbook tables,
        e.g. CRC Handbook of Chemistry and Physics, Wyckoff's Crystal Structures).
    width_nm, height_nm : float
        The field: columns with 0 <= x < width_nm, 0 <= y < height_nm are returned.
    thickness_cells : int
        Number of cubic cells along [001] (each column then holds ``thickness_cells`` atoms).

    Returns
    -------
    DataFrame
        As :func:`crystal_columns`. The columns form a square lattice of side a/2.
    """
    from ase.build import bulk

    a_nm = _positive("a_nm", a_nm)
    width_nm, height_nm = _positive("width_nm", width_nm), _positive("height_nm", height_nm)
    nz = int(thickness_cells)
    if nz < 1:
        raise TenfoldInputError(f"thickness_cells={thickness_cells!r} must be a positive integer")
    nx, ny = int(math.ceil(width_nm / a_nm)), int(math.ceil(height_nm / a_nm))
    atoms = bulk("Al", "fcc", a=a_nm * 10.0, cubic=True).repeat((nx, ny, nz))
    df = crystal_columns(atoms, axis="z")
    keep = (df["x_nm"] < width_nm) & (df["y_nm"] < height_nm)
    return df[keep].reset_index(drop=True)


def main(argv: list[str] | None = None) -> int:
    """``python -m tenfold.analysis.synthetic --bundle DIR``: rebuild the bundled samples in DIR."""
    p = argparse.ArgumentParser(prog="python -m tenfold.analysis.synthetic",
                                description="Rebuild Tenfold's bundled synthetic sample images.")
    p.add_argument("--bundle", metavar="DIR", required=True, help="output folder (e.g. sample_images)")
    args = p.parse_args(argv)
    for path in build_bundle(args.bundle):
        print(f"wrote {path} ({path.stat().st_size / 1e6:.2f} MB)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
