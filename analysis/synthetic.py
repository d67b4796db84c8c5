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
from dataclasses import dataclass, field, replace
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
    "drifting_stack",
    "expected_image",
    "crlb_position_px",
    "make_sample",
    "write_sample",
    "build_bundle",
    "BUNDLE",
    "crystal_columns",
    "fcc_al_001_columns",
    "AL_LATTICE_NM",
    "STRESS_STRUCTURES",
    "PROBES",
    "RESCALES",
    "StressCondition",
    "stress_structure",
    "stress_probe",
    "stress_sample",
    "stress_background",
    "column_signal",
    "peak_per_count",
    "crlb_columns_px",
    "match_columns",
    "species_agreement",
    "score_columns",
    "STRESS_CELLS",
    "stress_draw",
    "MULTISLICE_DOSES",
    "MultisliceCell",
    "load_multislice_cell",
    "multislice_values",
    "multislice_image",
    "multislice_peak_offsets",
    "multislice_columns",
    "multislice_sample",
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


# ----------------------------------------------------------------------------------------------------------------
# Stress structures and conditions (the column finder's measuring instrument; issue 10)
# ----------------------------------------------------------------------------------------------------------------

#: Structures :func:`stress_structure` builds -> number of species in them.
STRESS_STRUCTURES = {
    "decagonal": 3, "shared_rings": 3, "fivefold": 2, "square": 1, "hexagonal": 1, "perovskite": 2, "hardcore": 3,
}
#: Ring radius / closest spacing of a ring of ten: 1 / (2 sin 18 deg) = tau (Euclid's pentagon).
_DECAGON_R = 1.0 / (2.0 * math.sin(math.pi / 10.0))
#: Five-fold cluster radii in units of the closest spacing (outer bright 0.48 nm, inner dim 0.30 nm, turned 36 deg).
_FIVEFOLD_R1, _FIVEFOLD_R2 = 0.48, 0.30
#: Second lattice vector of the edge-sharing ring chains, in ring radii (the densest stacking keeping every pair at
#: least one ring-edge apart; found by a grid search over the offset).
_CHAIN_OFFSET = (0.18, 2.5)
#: Probe shapes: name -> ((weight, sigma / core sigma), ...) before the tail fraction is applied; see stress_probe.
PROBES = ("gaussian", "core_tail")
#: Components wider than this (px) are rendered by a bilinear deposit and an FFT Gaussian instead of exact patches.
_BROAD_PX = 6.0
#: Integer rescalings of the pixel values a stress image can get.
RESCALES = ("none", "uint8", "x1000")


def _rotation(angle_deg: float) -> np.ndarray:
    a = np.deg2rad(angle_deg)
    return np.array([[np.cos(a), -np.sin(a)], [np.sin(a), np.cos(a)]])


def _tiling_centres(width_nm, height_nm, edge_nm, reach_nm, angle_deg, gen) -> np.ndarray:
    """Penrose-tiling vertices (edge ``edge_nm``) at least ``reach_nm`` inside the field, sorted by y then x."""
    tiling = pentagrid_tiling(0.5 * width_nm / edge_nm + 2.0, half_height=0.5 * height_nm / edge_nm + 2.0,
                              rng=gen).scaled(edge_nm, centre=(0.5 * width_nm, 0.5 * height_nm), angle_deg=angle_deg)
    v = tiling.vertices
    keep = (v[:, 0] >= reach_nm) & (v[:, 0] <= width_nm - reach_nm) & (v[:, 1] >= reach_nm) & \
        (v[:, 1] <= height_nm - reach_nm)
    v = v[keep]
    return v[np.lexsort((v[:, 0], v[:, 1]))]


def _lattice_points(cell: np.ndarray, basis: np.ndarray, width_nm, height_nm, margin_nm, angle_deg):
    """Points of a 2-D lattice (rows of ``cell``) with a basis, rotated about the field centre, kept inside.

    Returns (xy (n, 2), basis index (n,)).
    """
    rot = _rotation(angle_deg)
    centre = np.array([0.5 * width_nm, 0.5 * height_nm])
    reach = math.hypot(width_nm, height_nm)
    inv = np.linalg.inv(cell.T)
    corners = inv @ np.array([[-reach, reach, -reach, reach], [-reach, -reach, reach, reach]])
    lo, hi = np.floor(corners.min(axis=1)) - 1, np.ceil(corners.max(axis=1)) + 1
    i, j = np.meshgrid(np.arange(lo[0], hi[0] + 1), np.arange(lo[1], hi[1] + 1), indexing="ij")
    origins = i.reshape(-1, 1) * cell[0] + j.reshape(-1, 1) * cell[1]
    pts = (origins[:, None, :] + basis[None, :, :]).reshape(-1, 2) @ rot.T + centre
    kind = np.tile(np.arange(len(basis)), len(origins))
    keep = (pts[:, 0] >= margin_nm) & (pts[:, 0] <= width_nm - margin_nm) & (pts[:, 1] >= margin_nm) & \
        (pts[:, 1] <= height_nm - margin_nm)
    return pts[keep], kind[keep]


def _cluster_columns(centres: np.ndarray, offsets: np.ndarray, species: np.ndarray, roles: np.ndarray):
    """Every cluster centre plus the same offsets (nm, rotated already): positions, species, role, cluster id."""
    xy = (centres[:, None, :] + offsets[None, :, :]).reshape(-1, 2)
    n_off = len(offsets)
    return (xy, np.tile(species, len(centres)), np.tile(roles, len(centres)),
            np.repeat(np.arange(len(centres)), n_off), np.repeat(centres, n_off, axis=0))


def _hardcore_points(width_nm, height_nm, spacing_nm, margin_nm, gen, rounds: int = 8):
    """Random hard-core points (no pair closer than ``spacing_nm``): rounds of Matern type-II thinning.

    Each round throws candidates, drops those within ``spacing_nm`` of an accepted point, and among the rest keeps a
    candidate only if no candidate within ``spacing_nm`` carries a smaller random mark (Matern 1960, type II).
    """
    from scipy.spatial import cKDTree

    lo = np.array([margin_nm, margin_nm])
    span = np.array([width_nm - 2 * margin_nm, height_nm - 2 * margin_nm])
    if np.any(span <= 0):
        return np.zeros((0, 2))
    n_throw = int(math.ceil(2.0 * span.prod() / spacing_nm**2)) + 1
    kept = np.zeros((0, 2))
    for _ in range(rounds):
        cand = lo + gen.random((n_throw, 2)) * span
        if len(kept):
            d, _ = cKDTree(kept).query(cand, distance_upper_bound=spacing_nm)
            cand = cand[~np.isfinite(d) | (d >= spacing_nm)]
        mark = gen.random(len(cand))
        pairs = cKDTree(cand).query_pairs(spacing_nm, output_type="ndarray")
        loser = np.where(mark[pairs[:, 0]] > mark[pairs[:, 1]], pairs[:, 0], pairs[:, 1])
        ok = np.ones(len(cand), dtype=bool)
        ok[loser] = False
        kept = np.vstack([kept, cand[ok]])
    return kept[np.lexsort((kept[:, 0], kept[:, 1]))]


def stress_structure(
    kind: str,
    *,
    width_nm: float,
    height_nm: float,
    spacing_nm: float,
    angle_deg: float = 7.0,
    margin_nm: float = 0.0,
    rng: np.random.Generator | int | None = None,
) -> pd.DataFrame:
    """Column positions of a test structure scaled to a given closest column spacing.

    Parameters
    ----------
    kind : str
        One of :data:`STRESS_STRUCTURES`:

        * ``'decagonal'``: rings of ten (radius tau x spacing) with a centre column, species alternating 1 / 0 on
          the ring, centre 2, on Penrose-tiling vertices (edge 4.6 ring radii), as :func:`decagonal_model`.
        * ``'shared_rings'``: the same clusters in chains along ``angle_deg + 18`` deg, neighbours sharing two
          ring columns (one ring edge); chains stacked by ``_CHAIN_OFFSET``. A shared column is listed once
          (role 'shared').
        * ``'fivefold'``: five bright columns (species 1) at radius 0.48 / 0.2957 x spacing and five dim ones
          (species 0) at 0.30 / 0.2957 x spacing turned by 36 deg, no centre, on Penrose-tiling vertices (edge 7 x
          spacing). With a spacing of 0.2957 nm the radii are 0.48 and 0.30 nm.
        * ``'square'``, ``'hexagonal'``: one species, lattice constant = spacing.
        * ``'perovskite'``: square cell of side sqrt(2) x spacing, A column (species 1) at the corner and B column
          (species 0) at the body centre, as an ABO3 perovskite along [001] with the oxygen columns invisible.
        * ``'hardcore'``: random points no closer than the spacing (Matern type-II rounds), species 0/1/2 drawn
          with equal probability.
    width_nm, height_nm : float
        Field (x in [0, width_nm], y in [0, height_nm], y down).
    spacing_nm : float
        Closest column-column distance.
    angle_deg : float
        Rotation of the structure (atan2 in the image frame).
    margin_nm : float
        Every column (and for clusters the whole cluster) stays this far inside the field.
    rng : numpy Generator or int seed
        Pentagrid offsets, hard-core throws, species draws.

    Returns
    -------
    DataFrame
        ``x_nm, y_nm, species`` (0 dimmest), ``role`` ('centre', 'ring', 'shared', 'site'), ``cluster_id`` (-1
        outside clusters), ``centre_x_nm, centre_y_nm`` (the column's cluster centre; for a shared column the mean
        of its clusters' centres; NaN outside clusters), sorted by y then x.

    Examples
    --------
    >>> df = stress_structure("square", width_nm=3.0, height_nm=3.0, spacing_nm=0.3, angle_deg=0.0)
    >>> len(df) > 80
    True
    """
    if kind not in STRESS_STRUCTURES:
        raise TenfoldInputError(f"kind={kind!r} is not a stress structure; use one of {sorted(STRESS_STRUCTURES)}")
    width_nm, height_nm = _positive("width_nm", width_nm), _positive("height_nm", height_nm)
    d = _positive("spacing_nm", spacing_nm)
    margin_nm = _positive("margin_nm", margin_nm, allow_zero=True)
    gen = _rng(rng)
    rot = _rotation(angle_deg)
    nan2 = None
    if kind in ("decagonal", "shared_rings"):
        r = _DECAGON_R * d
        ang = np.deg2rad(36.0 * np.arange(_RING))
        offsets = np.vstack([[0.0, 0.0], np.c_[np.cos(ang), np.sin(ang)] * r]) @ rot.T
        species = np.r_[2, np.where(np.arange(_RING) % 2 == 0, 1, 0)]
        roles = np.array(["centre"] + ["ring"] * _RING, dtype=object)
        if kind == "decagonal":
            centres = _tiling_centres(width_nm, height_nm, 4.6 * r, r + margin_nm, angle_deg, gen)
        else:
            step = 2.0 * r * math.cos(math.pi / 10.0)
            cell = np.array([[step * math.cos(math.pi / 10.0), step * math.sin(math.pi / 10.0)],
                             [_CHAIN_OFFSET[0] * r, _CHAIN_OFFSET[1] * r]])
            centres, _ = _lattice_points(cell, np.zeros((1, 2)), width_nm, height_nm, r + margin_nm, angle_deg)
        xy, sp, role, cid, cxy = _cluster_columns(centres, offsets, species, roles)
        if kind == "shared_rings" and len(xy):
            # merge coincident ring columns of neighbouring clusters (positions agree to rounding)
            key = np.round(xy / (1e-3 * d)).astype(np.int64)
            _, first, inv, cnt = np.unique(key, axis=0, return_index=True, return_inverse=True, return_counts=True)
            inv = inv.ravel()
            mcx = np.bincount(inv, cxy[:, 0]) / cnt
            mcy = np.bincount(inv, cxy[:, 1]) / cnt
            xy, sp, cid = xy[first], sp[first], cid[first]
            role = np.where(cnt > 1, "shared", role[first]).astype(object)
            cxy = np.c_[mcx, mcy]
    elif kind == "fivefold":
        r1, r2 = d * _FIVEFOLD_R1 / _fivefold_spacing(), d * _FIVEFOLD_R2 / _fivefold_spacing()
        a1 = np.deg2rad(72.0 * np.arange(5))
        offsets = np.vstack([np.c_[np.cos(a1), np.sin(a1)] * r1,
                             np.c_[np.cos(a1 + np.pi / 5), np.sin(a1 + np.pi / 5)] * r2]) @ rot.T
        species = np.r_[np.ones(5, dtype=np.int64), np.zeros(5, dtype=np.int64)]
        roles = np.array(["ring"] * 10, dtype=object)
        centres = _tiling_centres(width_nm, height_nm, 7.0 * d, r1 + margin_nm, angle_deg, gen)
        xy, sp, role, cid, cxy = _cluster_columns(centres, offsets, species, roles)
    else:
        nan2 = True
        if kind == "square":
            xy, sp = _lattice_points(np.eye(2) * d, np.zeros((1, 2)), width_nm, height_nm, margin_nm, angle_deg)
        elif kind == "hexagonal":
            cell = np.array([[d, 0.0], [0.5 * d, math.sqrt(3) / 2 * d]])
            xy, sp = _lattice_points(cell, np.zeros((1, 2)), width_nm, height_nm, margin_nm, angle_deg)
        elif kind == "perovskite":
            a = math.sqrt(2.0) * d
            xy, kind_idx = _lattice_points(np.eye(2) * a, np.array([[0.0, 0.0], [0.5 * a, 0.5 * a]]),
                                           width_nm, height_nm, margin_nm, angle_deg)
            sp = np.where(kind_idx == 0, 1, 0)
        else:  # hardcore
            xy = _hardcore_points(width_nm, height_nm, d, margin_nm, gen)
            sp = gen.integers(0, 3, len(xy))
        role = np.full(len(xy), "site", dtype=object)
        cid = np.full(len(xy), -1)
    out = pd.DataFrame({"x_nm": xy[:, 0], "y_nm": xy[:, 1], "species": np.asarray(sp, dtype=np.int64),
                        "role": role.astype(object), "cluster_id": np.asarray(cid, dtype=np.int64)})
    if nan2:
        out["centre_x_nm"], out["centre_y_nm"] = np.nan, np.nan
    else:
        out["centre_x_nm"], out["centre_y_nm"] = cxy[:, 0], cxy[:, 1]
    return out.sort_values(["y_nm", "x_nm"], ignore_index=True)


def _fivefold_spacing() -> float:
    """Closest distance in the five-fold cluster with radii 0.48 / 0.30 (inner turned 36 deg), same units."""
    return math.sqrt(_FIVEFOLD_R1**2 + _FIVEFOLD_R2**2 - 2 * _FIVEFOLD_R1 * _FIVEFOLD_R2 * math.cos(math.pi / 5))


def stress_probe(kind: str = "gaussian", *, tail_fraction: float = 0.3) -> tuple[tuple[float, float], ...]:
    """Column image profile as a mixture of isotropic Gaussians: ((weight, sigma / core sigma), ...), weights sum 1.

    ``'gaussian'``: one component. ``'core_tail'``: a Gaussian core holding ``1 - tail_fraction`` of the current
    and a broad tail holding ``tail_fraction``, itself two Gaussians of 3 and 8 core sigmas sharing it equally (a
    scale mixture that falls off much more slowly than the core, roughly like a Lorentzian over the range that
    matters; real probes carry tens of percent of the current in such a tail, common practice).
    """
    if kind == "gaussian":
        return ((1.0, 1.0),)
    if kind == "core_tail":
        f = _positive("tail_fraction", tail_fraction, allow_zero=True)
        if f >= 1:
            raise TenfoldInputError(f"tail_fraction={tail_fraction} must be in [0, 1)")
        return ((1.0 - f, 1.0), (0.5 * f, 3.0), (0.5 * f, 8.0))
    raise TenfoldInputError(f"probe={kind!r} must be one of {PROBES}")


def peak_per_count(probe, sigma_px: float) -> float:
    """Peak height (counts/px) of a column of one count: sum of w_k / (2 pi (s_k sigma)^2) (continuous profile)."""
    return float(sum(w / (2 * math.pi * (m * sigma_px) ** 2) for w, m in probe))


def _pixel_integrals(centre, start, length: int, sigma: float, size: int):
    """Per-pixel integrals of a unit 1-D Gaussian over [j - 1/2, j + 1/2], j = start .. start + length - 1.

    ``centre`` and ``start`` broadcast (any shape S); returns weights (S, length), zero outside [0, size), and the
    clipped pixel indices (S, length).
    """
    from scipy.special import erf

    centre = np.asarray(centre, dtype=float)
    start = np.broadcast_to(np.asarray(start), centre.shape)
    j = start[..., None] + np.arange(length)
    edges = (start[..., None] - 0.5 + np.arange(length + 1) - centre[..., None]) / (sigma * math.sqrt(2.0))
    w = 0.5 * np.diff(erf(edges), axis=-1)
    w = np.where((j >= 0) & (j < size), w, 0.0)
    return w, np.clip(j, 0, size - 1)


def _patch_signal(x, y, counts, shape, sigma, row_shift) -> np.ndarray:
    """Exact pixel-integrated Gaussians on square patches, optionally each image row shifted along x."""
    h, w = shape
    img = np.zeros(h * w)
    extra = 0 if row_shift is None else int(math.ceil(np.max(np.abs(row_shift)))) + 1
    half = int(math.ceil(4.5 * sigma)) + 1
    ly, lx = 2 * half + 1, 2 * (half + extra) + 1
    chunk = max(1, _CHUNK_ENTRIES // (ly * lx))
    for s in range(0, len(x), chunk):
        xs, ys, cs = x[s:s + chunk], y[s:s + chunk], counts[s:s + chunk]
        wy, jy = _pixel_integrals(ys, np.floor(ys).astype(np.int64) - half + 1, ly, sigma, h)
        x0 = np.floor(xs).astype(np.int64) - half - extra + 1
        if row_shift is None:
            wx, jx = _pixel_integrals(xs, x0, lx, sigma, w)
            weights = (cs[:, None, None] * wy[:, :, None]) * wx[:, None, :]
            flat = jy[:, :, None] * w + jx[:, None, :]
        else:
            # pixel (r, c) shows the specimen at x = c + shift[r]: the column appears at x - shift[r] on row r
            wx, jx = _pixel_integrals(xs[:, None] - row_shift[jy], x0[:, None], lx, sigma, w)
            weights = (cs[:, None, None] * wy[:, :, None]) * wx
            flat = jy[:, :, None] * w + jx
        img += np.bincount(flat.ravel(), weights.ravel(), minlength=h * w)
    return img


def _broad_signal(x, y, counts, shape, sigma) -> np.ndarray:
    """A wide Gaussian component: bilinear deposit, then an FFT Gaussian of variance sigma^2 - 1/12.

    The deposit's triangle kernel adds 1/6 px^2 of variance and pixel integration 1/12, hence the correction.
    Light leaving the field is lost (zero padding of 4 sigma), as on the exact path.
    """
    from scipy import fft

    h, w = shape
    pad = int(math.ceil(4.0 * sigma))
    H, W = fft.next_fast_len(h + 2 * pad), fft.next_fast_len(w + 2 * pad)
    dep = np.zeros((H, W))
    fx, fy = np.floor(x), np.floor(y)
    tx, ty = x - fx, y - fy
    ix, iy = fx.astype(np.int64) + pad, fy.astype(np.int64) + pad
    for dy, wy in ((0, 1 - ty), (1, ty)):
        for dx, wx in ((0, 1 - tx), (1, tx)):
            r, c = iy + dy, ix + dx
            ok = (r >= 0) & (r < H) & (c >= 0) & (c < W)
            np.add.at(dep, (r[ok], c[ok]), (counts * wy * wx)[ok])
    s2 = sigma**2 - 1.0 / 12.0
    ky = fft.fftfreq(H)[:, None]
    kx = fft.rfftfreq(W)[None, :]
    out = fft.irfft2(fft.rfft2(dep) * np.exp(-2 * np.pi**2 * s2 * (kx**2 + ky**2)), s=(H, W))
    return out[pad:pad + h, pad:pad + w].ravel()


def column_signal(x_px, y_px, counts, *, shape, sigma_px: float, probe=((1.0, 1.0),), row_shift_px=None
                  ) -> np.ndarray:
    """Noise-free signal of columns (no background), float64 (H, W), for a Gaussian-mixture probe.

    Parameters
    ----------
    x_px, y_px, counts : array_like (N,)
        Positions as they appear in the image (px; after any shear) and electrons per column.
    shape : (int, int)
    sigma_px : float
        Core Gaussian sigma, px.
    probe : sequence of (weight, sigma multiple)
        From :func:`stress_probe`.
    row_shift_px : (H,) array, optional
        Scan-row jitter: image row r shows the specimen shifted by ``row_shift_px[r]`` along x.

    Notes
    -----
    Components up to 6 px wide are integrated exactly over each pixel (as :func:`render_image`); wider ones are
    deposited bilinearly and blurred by FFT (exact to well under 1 % of their own, already faint, pixel values);
    row jitter is applied to the exact components only (the wide ones are too smooth to show it).
    """
    shape = _check_shape(shape)
    sigma_px = _positive("sigma_px", sigma_px)
    x = np.asarray(x_px, dtype=float).ravel()
    y = np.asarray(y_px, dtype=float).ravel()
    c = np.broadcast_to(np.asarray(counts, dtype=float), x.shape).ravel()
    if not (np.all(np.isfinite(x)) and np.all(np.isfinite(y)) and np.all(np.isfinite(c))) or x.shape != y.shape:
        raise TenfoldInputError("x_px, y_px and counts must be finite arrays of one length")
    shift = None if row_shift_px is None else np.asarray(row_shift_px, dtype=float)
    if shift is not None and shift.shape != (shape[0],):
        raise TenfoldInputError(f"row_shift_px must have one value per image row ({shape[0]}), got {shift.shape}")
    img = np.zeros(shape[0] * shape[1])
    for wgt, mult in probe:
        s = mult * sigma_px
        if wgt == 0 or len(x) == 0:
            continue
        if s > _BROAD_PX:
            img += _broad_signal(x, y, wgt * c, shape, s)
        else:
            img += _patch_signal(x, y, wgt * c, shape, s, shift)
    return img.reshape(shape)


@dataclass(frozen=True)
class StressCondition:
    """One cell of the stress matrix: a structure and the conditions it is recorded under.

    Attributes
    ----------
    structure : str
        A key of :data:`STRESS_STRUCTURES`.
    sigma_over_spacing : float
        Probe (core) sigma / closest column spacing (0.15-0.30 is what microscopists record).
    px_per_sigma : float
        Sampling, px per core sigma (1.3-4).
    peak_counts : float
        Dose scale: peak height of the brightest species, counts per px above background (30-5000).
    background_fraction : float
        Mean background as a fraction of the dimmest species' peak (0-0.5).
    dim_ratio : float
        Peak of the dimmest species / the brightest (0.2-1); species in between are spaced geometrically.
    size_px : int
        Square field, px (256-4096).
    spacing_nm : float
        Closest column spacing in nm (sets the pixel size: sigma_nm / px_per_sigma).
    gradient : float
        Background max / min across the field (1 = flat; 3 = a 3x gradient along the diagonal).
    shear : float
        Fast-scan shear: x' = x + shear * (y - centre).
    row_jitter_px : float
        Standard deviation of a random x shift per scan row, px.
    dark : bool
        HRTEM-like contrast: columns are dips below a bright level (the level sits ``background`` above the
        deepest dip).
    rescale : str
        'none' (counts, float32), 'uint8' (contrast stretch min..max to 0..255) or 'x1000' (counts x 1000, int32).
    probe : str
        'gaussian' or 'core_tail' (:func:`stress_probe`).
    tail_fraction : float
        Current in the tail for 'core_tail'.
    angle_deg : float
        Structure rotation.
    """

    structure: str = "decagonal"
    sigma_over_spacing: float = 0.25
    px_per_sigma: float = 2.5
    peak_counts: float = 500.0
    background_fraction: float = 0.2
    dim_ratio: float = 0.4
    size_px: int = 512
    spacing_nm: float = 0.28
    gradient: float = 1.0
    shear: float = 0.0
    row_jitter_px: float = 0.0
    dark: bool = False
    rescale: str = "none"
    probe: str = "gaussian"
    tail_fraction: float = 0.3
    angle_deg: float = 7.0

    @property
    def sigma_nm(self) -> float:
        return self.sigma_over_spacing * self.spacing_nm

    @property
    def pixel_size_nm(self) -> float:
        return self.sigma_nm / self.px_per_sigma


def _species_peaks(n_species: int, brightest: float, dim_ratio: float) -> np.ndarray:
    if n_species == 1:
        return np.array([brightest])
    return brightest * dim_ratio ** (1.0 - np.arange(n_species) / (n_species - 1))


def stress_sample(cond: StressCondition, *, rng: np.random.Generator | int | None = None,
                  noise: bool = True) -> tuple[np.ndarray, pd.DataFrame, dict]:
    """Render one stress-matrix cell: image, ground truth per column, and every parameter.

    Parameters
    ----------
    cond : StressCondition
        The cell.
    rng : numpy Generator or int seed
        Structure draws (tiling offsets, hard-core points), row jitter and Poisson noise.
    noise : bool
        False returns the expected image (float64, before rescaling).

    Returns
    -------
    image : ndarray (size_px, size_px)
        float32 counts; uint8 or int32 with ``rescale``.
    truth : DataFrame
        One row per column: ``id, x_px, y_px`` (as they appear in the image, after the shear; the specimen
        position, without row jitter), ``x_nm, y_nm, species, role, cluster_id, centre_x_px, centre_y_px``,
        ``counts`` (electrons in the column), ``amplitude`` (peak counts/px above background, continuous
        profile), ``crowded`` (nearest other column closer than 5 core sigmas).
    params : dict
        The condition plus ``pixel_size_nm, sigma_px, sigma_nm, probe`` (components), ``peaks_by_species``,
        ``background_mean``, ``bright_level`` (dark), ``snr_dim`` (dimmest peak over the Poisson noise at it:
        ``A_dim / sqrt(b + A_dim)``, b the mean background or bright level), ``spacing_over_sigma``,
        ``closest_spacing_px`` (measured), ``value_scale`` (image units per count: 1, 255 / range, 1000),
        ``value_offset``, ``n_columns``, ``generator_version``.

    Notes
    -----
    The expected image is ``background(x, y) + sum_i N_i profile(x - x_i, y - y_i)`` (bright) or
    ``level(x, y) - sum_i ...`` (dark), each column pixel-integrated; Poisson noise is drawn from it. The background
    ramps linearly along the diagonal from ``2 b / (1 + g)`` to ``2 g b / (1 + g)`` (mean b, max / min = g).
    """
    if cond.structure not in STRESS_STRUCTURES:
        raise TenfoldInputError(f"structure={cond.structure!r}: use one of {sorted(STRESS_STRUCTURES)}")
    if cond.rescale not in RESCALES:
        raise TenfoldInputError(f"rescale={cond.rescale!r}: use one of {RESCALES}")
    gen = _rng(rng)
    n = int(cond.size_px)
    if n < 16:
        raise TenfoldInputError(f"size_px={cond.size_px!r} must be at least 16")
    ps = _positive("pixel_size_nm", cond.pixel_size_nm)
    sigma_px = float(cond.px_per_sigma)
    probe = stress_probe(cond.probe, tail_fraction=cond.tail_fraction)
    field_nm = n * ps
    # sheared columns must stay inside: build the structure narrower by |shear| x height
    margin_px = 3.0 * sigma_px + 1.0
    width_nm = field_nm * (1.0 - abs(cond.shear))
    cols = stress_structure(cond.structure, width_nm=width_nm, height_nm=field_nm, spacing_nm=cond.spacing_nm,
                            angle_deg=cond.angle_deg, margin_nm=margin_px * ps, rng=gen)
    y = cols["y_nm"].to_numpy() / ps - 0.5
    x0 = cols["x_nm"].to_numpy() / ps - 0.5 + 0.5 * abs(cond.shear) * field_nm / ps
    xc = 0.5 * (n - 1)
    x = x0 + cond.shear * (y - xc)
    cx = cols["centre_x_nm"].to_numpy() / ps - 0.5 + 0.5 * abs(cond.shear) * field_nm / ps
    cy = cols["centre_y_nm"].to_numpy() / ps - 0.5
    cx = cx + cond.shear * (cy - xc)
    n_sp = STRESS_STRUCTURES[cond.structure]
    peaks = _species_peaks(n_sp, _positive("peak_counts", cond.peak_counts), float(cond.dim_ratio))
    species = cols["species"].to_numpy()
    counts = peaks[species] / peak_per_count(probe, sigma_px)
    b_mean = _positive("background_fraction", cond.background_fraction, allow_zero=True) * peaks[0]
    g = _positive("gradient", cond.gradient)
    ramp = _ramp(n, g)
    shift = gen.normal(0.0, cond.row_jitter_px, n) if cond.row_jitter_px > 0 else None
    signal = column_signal(x, y, counts, shape=(n, n), sigma_px=sigma_px, probe=probe, row_shift_px=shift)
    level = None
    if cond.dark:
        # mean bright level such that the deepest dip still sits b_mean above zero everywhere on the ramp
        level = float(((signal + b_mean) / ramp).max())
        expected = level * ramp - signal
    else:
        expected = b_mean * ramp + signal
    b_ref = level if cond.dark else b_mean
    from scipy.spatial import cKDTree

    if len(x) > 1:
        d, _ = cKDTree(np.c_[x, y]).query(np.c_[x, y], k=2)
        nn = d[:, 1]
    else:
        nn = np.full(len(x), np.inf)
    truth = pd.DataFrame({
        "id": np.arange(len(x), dtype=np.int64), "x_px": x, "y_px": y, "x_nm": x * ps, "y_nm": y * ps,
        "species": species, "role": cols["role"].to_numpy(), "cluster_id": cols["cluster_id"].to_numpy(),
        "centre_x_px": cx, "centre_y_px": cy, "counts": counts, "amplitude": peaks[species],
        "crowded": nn < 5.0 * sigma_px,
    })
    params = {
        **{k: getattr(cond, k) for k in cond.__dataclass_fields__},
        "generator_version": GENERATOR_VERSION, "pixel_size_nm": ps, "sigma_px": sigma_px,
        "sigma_nm": cond.sigma_nm, "probe_components": [list(c) for c in probe],
        "peaks_by_species": peaks.tolist(), "background_mean": b_mean, "bright_level": level,
        "snr_dim": float(peaks[0] / math.sqrt(b_ref + peaks[0])),
        "spacing_over_sigma": 1.0 / cond.sigma_over_spacing,
        "closest_spacing_px": float(nn.min()) if len(x) > 1 else float("nan"),
        "n_columns": int(len(x)), "n_species": n_sp,
    }
    if not noise:
        params.update(value_scale=1.0, value_offset=0.0)
        return expected, truth, params
    img = gen.poisson(expected).astype(np.float64)
    scale, offset = 1.0, 0.0
    if cond.rescale == "uint8":
        lo, hi = float(img.min()), float(img.max())
        scale, offset = 255.0 / max(hi - lo, 1e-12), lo
        img = np.round((img - lo) * scale).astype(np.uint8)
    elif cond.rescale == "x1000":
        scale = 1000.0
        img = (img * 1000.0).astype(np.int32)
    else:
        img = img.astype(np.float32)
    params.update(value_scale=scale, value_offset=offset)
    return img, truth, params


def _wobble(h: int, amplitude: float, gen: np.random.Generator) -> np.ndarray:
    """A smooth x displacement per row (three low sine terms of random phase), RMS ``amplitude`` px."""
    if amplitude <= 0:
        return np.zeros(h)
    y = np.arange(h) / h
    f = sum(gen.normal() * np.sin(2 * np.pi * (j + 0.5 * gen.random()) * y + 2 * np.pi * gen.random())
            for j in (1, 2, 3))
    f = f - f.mean()
    return amplitude * f / max(float(np.sqrt(np.mean(f ** 2))), 1e-12)


def drifting_stack(cond: StressCondition, *, n_frames: int = 12, drift_px_per_frame=(0.6, -0.35),
                   jump_px: float = 1.5, jump_chance: float = 0.25, wobble_px: float = 0.0,
                   rng: np.random.Generator | int | None = None) -> tuple[np.ndarray, pd.DataFrame, pd.DataFrame, dict]:
    """A frame series of one stress cell: the specimen drifts and jumps between frames, the dose is split.

    Frame k shows the specimen moved by ``shift_k`` (``frame_k(x) = frame_0(x - shift_k)``): a steady drift
    ``k * drift_px_per_frame`` plus, after each frame with probability ``jump_chance``, a jump drawn from a normal
    distribution of ``jump_px`` per axis (a stage settling, a charging event). With ``wobble_px`` every frame also
    gets its own smooth x displacement per row (slow-scan distortion that changes from frame to frame), RMS
    ``wobble_px``; the cell's ``row_jitter_px`` adds a fresh white jitter per row and frame. Each frame carries
    ``1 / n_frames`` of the cell's dose (peaks and background), so the frames sum to one image of the full dose.

    Parameters
    ----------
    cond : StressCondition
        Bright-field-free (HAADF-like) cell; ``dark`` cells are refused.
    n_frames : int
    drift_px_per_frame : (float, float)
    jump_px, jump_chance, wobble_px : float
    rng : numpy Generator or int seed

    Returns
    -------
    stack : ndarray float32 (n_frames, H, W)
        Poisson counts per frame.
    truth : DataFrame
        As :func:`stress_sample`, positions in frame 0's coordinates (the reference).
    shifts : DataFrame
        ``frame, shift_x_px, shift_y_px, wobble_rms_px`` (rigid part; the wobble has zero mean over the rows).
    params : dict
        The cell's parameters plus ``n_frames``, ``dose_per_frame`` (fraction), ``drift_px_per_frame``,
        ``jump_px``, ``jump_chance``, ``wobble_px`` and ``wobble_rows_px`` (n_frames, H): each frame's smooth x
        displacement per row.

    Examples
    --------
    >>> cond = StressCondition(structure="square", size_px=64, sigma_over_spacing=0.2)
    >>> stack, truth, shifts, params = drifting_stack(cond, n_frames=3, jump_chance=0.0, rng=1)
    >>> stack.shape, shifts["shift_x_px"].round(2).tolist()
    ((3, 64, 64), [0.0, 0.6, 1.2])
    """
    if cond.dark:
        raise TenfoldInputError("drifting_stack: dark (HRTEM-like) cells are not supported; use a bright cell")
    if int(n_frames) < 1:
        raise TenfoldInputError(f"n_frames={n_frames!r} must be at least 1")
    gen = _rng(rng)
    _, truth, params = stress_sample(replace(cond, row_jitter_px=0.0, rescale="none"), rng=gen, noise=False)
    n = int(cond.size_px)
    probe = [tuple(c) for c in params["probe_components"]]
    background = stress_background(cond, params)
    drift = np.asarray(drift_px_per_frame, dtype=float)
    jumps = np.where(gen.random(n_frames)[:, None] < jump_chance, gen.normal(0.0, jump_px, (n_frames, 2)), 0.0)
    jumps[0] = 0.0
    shift = np.arange(n_frames)[:, None] * drift[None, :] + np.cumsum(jumps, axis=0)
    x, y, counts = truth["x_px"].to_numpy(), truth["y_px"].to_numpy(), truth["counts"].to_numpy()
    frames = np.empty((n_frames, n, n), dtype=np.float32)
    wob_rms = np.zeros(n_frames)
    wob_rows = np.zeros((n_frames, n))
    for k in range(n_frames):
        rows = _wobble(n, wobble_px, gen) if wobble_px > 0 else np.zeros(n)
        wob_rows[k] = rows
        wob_rms[k] = float(np.sqrt(np.mean(rows ** 2)))
        if cond.row_jitter_px > 0:
            rows = rows + gen.normal(0.0, cond.row_jitter_px, n)
        # column_signal draws row r's columns at x - row_shift_px[r]: pass -rows so the specimen moves by +rows
        signal = column_signal(x + shift[k, 0], y + shift[k, 1], counts, shape=(n, n), sigma_px=params["sigma_px"],
                               probe=probe, row_shift_px=-rows if np.any(rows) else None)
        frames[k] = gen.poisson((background + signal) / n_frames)
    shifts = pd.DataFrame({"frame": np.arange(n_frames), "shift_x_px": shift[:, 0], "shift_y_px": shift[:, 1],
                           "wobble_rms_px": wob_rms})
    params = {**params, "n_frames": int(n_frames), "dose_per_frame": 1.0 / n_frames,
              "drift_px_per_frame": drift.tolist(), "jump_px": float(jump_px), "jump_chance": float(jump_chance),
              "wobble_px": float(wobble_px), "wobble_rows_px": wob_rows, "value_scale": 1.0, "value_offset": 0.0}
    return frames, truth, shifts, params


def stress_background(cond: StressCondition, params: dict) -> np.ndarray:
    """The expected background (bright: the ramp; dark: the bright level ramp) of a cell, float64 (H, W)."""
    level = params["bright_level"] if cond.dark else params["background_mean"]
    return level * _ramp(int(cond.size_px), float(cond.gradient))


def _ramp(n: int, g: float) -> np.ndarray:
    """Linear ramp along the diagonal of an n x n field, mean 1, max / min = g."""
    rows, cols = np.indices((n, n), dtype=float)
    return (2.0 / (1.0 + g)) * (1.0 + (g - 1.0) * (rows + cols) / max(2 * (n - 1), 1))


# ----------------------------------------------------------------------------------------------------------------
# Named stress cells (benchmarks/stress_columns.py runs them; tests build single cells by name)
# ----------------------------------------------------------------------------------------------------------------

def _cell(**kw) -> StressCondition:
    return StressCondition(**kw)


_DEC = dict(structure="decagonal", size_px=768)
#: The quick matrix: one base cell per structure and one change of one condition at a time from the decagonal base
#: (sigma / spacing 0.25, 2.5 px per sigma, peak 500 counts, background 20 % of the dimmest peak, dimmest 0.4).
STRESS_CELLS: dict[str, StressCondition] = {
    "dec_base": _cell(**_DEC),
    "dec_broad_2048": _cell(**{**_DEC, "size_px": 2048}, sigma_over_spacing=0.27, px_per_sigma=3.6,
                            peak_counts=2000.0),
    "dec_broad": _cell(**_DEC, sigma_over_spacing=0.30, px_per_sigma=3.0),
    "dec_narrow": _cell(**_DEC, sigma_over_spacing=0.15),
    "dec_coarse": _cell(**{**_DEC, "size_px": 512}, px_per_sigma=1.3),
    "dec_fine": _cell(**{**_DEC, "size_px": 1024}, px_per_sigma=4.0),
    "dec_dose30": _cell(**_DEC, peak_counts=30.0, background_fraction=0.5),
    "dec_dose100": _cell(**_DEC, peak_counts=100.0),
    "dec_dose5000": _cell(**_DEC, peak_counts=5000.0, background_fraction=0.05),
    "dec_no_bg": _cell(**_DEC, background_fraction=0.0),
    "dec_dim02": _cell(**_DEC, dim_ratio=0.2),
    "dec_equal": _cell(**_DEC, dim_ratio=1.0),
    "dec_gradient3": _cell(**_DEC, gradient=3.0),
    "dec_shear3": _cell(**_DEC, shear=0.03),
    "dec_jitter": _cell(**_DEC, row_jitter_px=0.2),
    "dec_dark": _cell(**_DEC, dark=True),
    "dec_uint8": _cell(**_DEC, peak_counts=100.0, rescale="uint8"),
    "dec_x1000": _cell(**_DEC, peak_counts=100.0, rescale="x1000"),
    "dec_tail": _cell(**_DEC, probe="core_tail", tail_fraction=0.3),
    "shared_base": _cell(structure="shared_rings", size_px=512),
    "fivefold_base": _cell(structure="fivefold", size_px=768, spacing_nm=0.2957),
    "fivefold_broad": _cell(structure="fivefold", size_px=768, spacing_nm=0.2957, sigma_over_spacing=0.30,
                            px_per_sigma=3.6),
    "square": _cell(structure="square", size_px=512, sigma_over_spacing=0.20),
    "hexagonal": _cell(structure="hexagonal", size_px=512, sigma_over_spacing=0.20),
    "perovskite": _cell(structure="perovskite", size_px=512, dim_ratio=0.5),
    "hardcore": _cell(structure="hardcore", size_px=512, sigma_over_spacing=0.22),
}


def stress_draw(n: int, *, rng: np.random.Generator | int | None = 0) -> dict[str, StressCondition]:
    """A seeded random draw of ``n`` cells over the whole stress range (the ``--full`` matrix adds it).

    Structure uniform over :data:`STRESS_STRUCTURES`; sigma / spacing U(0.15, 0.30); px per sigma U(1.3, 4); peak
    counts log-uniform 30-5000; background U(0, 0.5) of the dimmest peak; dimmest / brightest U(0.2, 1); field 256,
    512, 1024, 2048 or 4096 px (weights 2:3:3:2:1); each of gradient 3x, shear +-0.03, row jitter 0.2 px, dark
    contrast, uint8 / x1000 rescaling and a core-plus-tail probe (tail 0.2-0.4) with probability 0.15.
    """
    gen = _rng(rng)
    kinds = sorted(STRESS_STRUCTURES)
    sizes, weights = [256, 512, 1024, 2048, 4096], np.array([2, 3, 3, 2, 1], float)
    out = {}
    for i in range(int(n)):
        opt = gen.random(6) < 0.15
        kind = kinds[gen.integers(len(kinds))]
        cond = StressCondition(
            structure=kind,
            sigma_over_spacing=float(gen.uniform(0.15, 0.30)),
            px_per_sigma=float(gen.uniform(1.3, 4.0)),
            peak_counts=float(np.exp(gen.uniform(np.log(30.0), np.log(5000.0)))),
            background_fraction=float(gen.uniform(0.0, 0.5)),
            dim_ratio=float(gen.uniform(0.2, 1.0)),
            size_px=int(gen.choice(sizes, p=weights / weights.sum())),
            spacing_nm=0.2957 if kind == "fivefold" else 0.28,
            gradient=3.0 if opt[0] else 1.0,
            shear=float(gen.choice([-0.03, 0.03])) if opt[1] else 0.0,
            row_jitter_px=0.2 if opt[2] else 0.0,
            dark=bool(opt[3]),
            rescale=str(gen.choice(["uint8", "x1000"])) if opt[4] else "none",
            probe="core_tail" if opt[5] else "gaussian",
            tail_fraction=float(gen.uniform(0.2, 0.4)),
            angle_deg=float(gen.uniform(0.0, 36.0)),
        )
        out[f"draw{i:03d}_{kind}"] = cond
    return out


# ----------------------------------------------------------------------------------------------------------------
# The Cramer-Rao bound of crowded columns
# ----------------------------------------------------------------------------------------------------------------

#: Mean counts per pixel below which a pixel is treated as holding this many (keeps 1 / mu finite at zero background).
_MU_FLOOR = 1e-6


def _patch_profiles(centre, start, length, sigma):
    """Pixel integrals of a unit Gaussian (N, L) and their derivatives with respect to the centre."""
    from scipy.special import erf

    e = (start[:, None] - 0.5 + np.arange(length + 1) - centre[:, None]) / sigma
    g = 0.5 * np.diff(erf(e / math.sqrt(2.0)), axis=1)
    pdf = np.exp(-0.5 * e**2) / (sigma * math.sqrt(2 * math.pi))
    return g, pdf[:, :-1] - pdf[:, 1:]


def crlb_columns_px(
    x_px,
    y_px,
    counts,
    *,
    shape: tuple[int, int],
    sigma_px: float,
    background,
    probe=((1.0, 1.0),),
    dark_columns: bool = False,
    group_radius_sigma: float = 5.5,
    max_group: int = 12,
    signal: np.ndarray | None = None,
) -> pd.DataFrame:
    """Cramer-Rao bound of every column's position from the exact pixel Fisher information of the whole image.

    The expected image ``mu`` holds all columns (pixel-integrated, Gaussian-mixture probe) on the background, so
    overlapping neighbours both add counts (noise) and compete for them (correlation). For each column the Fisher
    matrix of its touching group, x, y and counts N of the column and of its neighbours within
    ``group_radius_sigma`` core sigmas (at most ``max_group`` columns, nearest first), plus one constant background
    shared over the group's pixels, is built from ``I_ab = sum_p (d mu_p / d theta_a)(d mu_p / d theta_b) / mu_p``
    and inverted; the bound is the square root of the column's x and y diagonal entries.

    Parameters
    ----------
    x_px, y_px : array_like (N,)
        Column positions in the image (px; pixel (0, 0) centre at x = y = 0).
    counts : array_like (N,)
        Electrons per column (> 0).
    shape : (int, int)
        Image (rows, cols).
    sigma_px : float
        Core sigma, px.
    background : float or (H, W) array
        Expected background counts per px (the bright level for ``dark_columns``).
    probe : sequence of (weight, sigma multiple)
        Column profile, as :func:`stress_probe`.
    dark_columns : bool
        mu = background - signal.
    group_radius_sigma, max_group : float, int
        Neighbours entering a column's group. Pairs further apart than 5.5 core sigmas share a factor below
        exp(-5.5^2 / 4) ~ 5e-4 of their light; their correlation changes the bound by well under 1 %.
    signal : (H, W) array, optional
        The columns' noise-free signal if already rendered with :func:`column_signal` (saves a rendering).

    Returns
    -------
    DataFrame
        ``crlb_x_px, crlb_y_px`` (standard deviations), ``crlb_px`` (per-axis: ``sqrt((var_x + var_y) / 2)``),
        ``crlb_isolated_px`` (the same column's bound with the neighbours' parameters known, i.e. the plain
        per-column Fisher information on the crowded image), ``n_group`` (columns in the group).

    Notes
    -----
    Derivatives are evaluated on a patch of half-width ceil(4.5 sigma) + 1 px around each column (beyond it a
    Gaussian carries under 5e-4 of its position information); the broad tail components of a core-plus-tail probe
    contribute to ``mu`` everywhere but to the derivatives only inside that patch. Pixels with mu below 1e-6 are
    counted as 1e-6. Groups are not chained further (neighbours of neighbours enter only through ``mu``). For an
    isolated Gaussian the result is the pixel Fisher bound that Mortensen et al. (2010) eq. (5) approximates
    (``crlb_position_px(..., estimator='mle')``).

    References
    ----------
    K. I. Mortensen, L. S. Churchman, J. A. Spudich, H. Flyvbjerg, Nature Methods 7 (2010) 377-381.
    S. M. Kay, Fundamentals of Statistical Signal Processing: Estimation Theory (Prentice Hall 1993), ch. 3.

    Examples
    --------
    >>> b = crlb_columns_px([20.0], [20.0], [1000.0], shape=(41, 41), sigma_px=1.5, background=10.0)
    >>> round(float(b.crlb_px[0]), 4)  # Mortensen et al. (2010) eq. (5): 0.0677
    0.0677
    """
    from scipy.spatial import cKDTree

    from . import _fisher

    shape = _check_shape(shape)
    sigma_px = _positive("sigma_px", sigma_px)
    x = np.asarray(x_px, dtype=float).ravel()
    y = np.asarray(y_px, dtype=float).ravel()
    n_cnt = np.broadcast_to(np.asarray(counts, dtype=float), x.shape).ravel().copy()
    if x.shape != y.shape or not (np.all(np.isfinite(x)) and np.all(np.isfinite(y))):
        raise TenfoldInputError("crlb_columns_px: x_px and y_px must be finite arrays of one length")
    if np.any(n_cnt <= 0) or not np.all(np.isfinite(n_cnt)):
        raise TenfoldInputError("crlb_columns_px: counts must be positive and finite")
    n = len(x)
    cols = ["crlb_x_px", "crlb_y_px", "crlb_px", "crlb_isolated_px", "n_group"]
    if n == 0:
        return pd.DataFrame({c: np.zeros(0) for c in cols})
    probe = tuple((float(wt), float(m)) for wt, m in probe)
    if signal is None:
        signal = column_signal(x, y, n_cnt, shape=shape, sigma_px=sigma_px, probe=probe)
    bg = np.broadcast_to(np.asarray(background, dtype=float), shape)
    sign = -1.0 if dark_columns else 1.0
    mu = bg + sign * signal
    inv_mu = 1.0 / np.maximum(mu, _MU_FLOOR)

    half = int(math.ceil(4.5 * sigma_px)) + 1
    length = 2 * half + 1
    u0 = np.round(x).astype(np.int64) - half
    v0 = np.round(y).astype(np.int64) - half
    w = np.array([p[0] for p in probe])
    gx = np.empty((len(probe), n, length))
    dgx, gy, dgy = np.empty_like(gx), np.empty_like(gx), np.empty_like(gx)
    for k, (_, mult) in enumerate(probe):
        gx[k], dgx[k] = _patch_profiles(x, u0, length, mult * sigma_px)
        gy[k], dgy[k] = _patch_profiles(y, v0, length, mult * sigma_px)

    # groups: the column itself first, then its neighbours nearest first; missing slots point at n (padding)
    tree = cKDTree(np.c_[x, y])
    k_q = min(max_group, n)
    dist, grp = tree.query(np.c_[x, y], k=k_q, distance_upper_bound=group_radius_sigma * sigma_px)
    grp = np.asarray(grp).reshape(n, k_q)
    grp[~np.isfinite(np.asarray(dist).reshape(n, k_q))] = n
    # every pair inside some group needs its block; patches overlap only within 2 half-widths (Chebyshev)
    a_idx = np.repeat(grp[:, :, None], k_q, axis=2)
    b_idx = np.repeat(grp[:, None, :], k_q, axis=1)
    valid = (a_idx < n) & (b_idx < n)
    lo, hi = np.minimum(a_idx, b_idx), np.maximum(a_idx, b_idx)
    keys = np.unique((lo * (n + 1) + hi)[valid])
    pi, pj = keys // (n + 1), keys % (n + 1)
    near = (np.abs(u0[pi] - u0[pj]) < length) & (np.abs(v0[pi] - v0[pj]) < length)
    keys, pi, pj = keys[near], pi[near], pj[near]
    blocks = _fisher.pair_blocks(pi, pj, u0, v0, length, inv_mu, w, gx, dgx, gy, dgy, n_cnt, sign)
    bcoup = _fisher.background_coupling(u0, v0, length, inv_mu, w, gx, dgx, gy, dgy, n_cnt, sign)
    # I_bb over the bounding box of the group's patches (clipped to the image), from an integral image of 1 / mu
    sat = np.zeros((shape[0] + 1, shape[1] + 1))
    sat[1:, 1:] = inv_mu.cumsum(0).cumsum(1)
    gu0 = np.where(grp < n, u0[np.minimum(grp, n - 1)], np.iinfo(np.int64).max)
    gv0 = np.where(grp < n, v0[np.minimum(grp, n - 1)], np.iinfo(np.int64).max)
    bu0 = np.clip(gu0.min(axis=1), 0, shape[1])
    bv0 = np.clip(gv0.min(axis=1), 0, shape[0])
    bu1 = np.clip(np.where(grp < n, u0[np.minimum(grp, n - 1)], -1).max(axis=1) + length, 0, shape[1])
    bv1 = np.clip(np.where(grp < n, v0[np.minimum(grp, n - 1)], -1).max(axis=1) + length, 0, shape[0])
    ibb = sat[bv1, bu1] - sat[bv0, bu1] - sat[bv1, bu0] + sat[bv0, bu0]

    n_group = (grp < n).sum(axis=1).astype(np.int64)
    res = _fisher.group_bounds(grp, n_group, keys, blocks, bcoup, ibb, n + 1)
    out, iso = res[:, :2], res[:, 2]
    var = np.where(out > 0, out, np.nan)
    return pd.DataFrame({
        "crlb_x_px": np.sqrt(var[:, 0]), "crlb_y_px": np.sqrt(var[:, 1]),
        "crlb_px": np.sqrt(0.5 * (var[:, 0] + var[:, 1])), "crlb_isolated_px": np.sqrt(iso),
        "n_group": n_group,
    })


# ----------------------------------------------------------------------------------------------------------------
# Scoring a column table against the truth
# ----------------------------------------------------------------------------------------------------------------


def match_columns(found_xy, truth_xy, radius_px: float) -> tuple[np.ndarray, np.ndarray]:
    """Mutual nearest neighbours closer than ``radius_px``: (found index, truth index) of each matched pair.

    A found column and a true column are paired when each is the other's nearest (KD-tree), so no column is used
    twice; anything else is unmatched (a miss or a false detection).
    """
    from scipy.spatial import cKDTree

    f = np.asarray(found_xy, dtype=float).reshape(-1, 2)
    t = np.asarray(truth_xy, dtype=float).reshape(-1, 2)
    if len(f) == 0 or len(t) == 0:
        return np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64)
    d_ft, i_ft = cKDTree(t).query(f, distance_upper_bound=radius_px)
    _, i_tf = cKDTree(f).query(t, distance_upper_bound=radius_px)
    fi = np.flatnonzero(np.isfinite(d_ft))
    ti = i_ft[fi]
    mutual = i_tf[ti] == fi
    return fi[mutual], ti[mutual]


def _rms(v) -> float:
    v = np.asarray(v, dtype=float)
    return float(np.sqrt(np.mean(v**2))) if v.size else float("nan")


def species_agreement(found_labels, true_labels) -> float:
    """Share of columns whose found class maps to their true species under the best one-to-one label map.

    The map maximises the agreement (Hungarian assignment on the contingency table); classes left without a
    partner when the numbers of classes differ count as wrong.
    """
    from scipy.optimize import linear_sum_assignment

    f = np.asarray(found_labels)
    t = np.asarray(true_labels)
    if f.size == 0:
        return float("nan")
    fu, fi = np.unique(f, return_inverse=True)
    tu, ti = np.unique(t, return_inverse=True)
    table = np.zeros((len(fu), len(tu)))
    np.add.at(table, (fi.ravel(), ti.ravel()), 1.0)
    r, c = linear_sum_assignment(-table)
    return float(table[r, c].sum() / f.size)


def score_columns(found: pd.DataFrame, truth: pd.DataFrame, *, match_radius_px: float) -> dict:
    """Compare a found column table with the ground truth of a synthetic image.

    Parameters
    ----------
    found : DataFrame
        ``x_px, y_px``; optional ``pos_err_px`` (reported per-axis error), ``species`` (-1 = none), ``intensity``.
    truth : DataFrame
        ``x_px, y_px, species, crlb_px`` (per-axis bound, :func:`crlb_columns_px`); optional ``crowded`` (bool),
        ``role`` and ``centre_x_px, centre_y_px`` (cluster centre, NaN outside clusters), as from
        :func:`stress_sample`.
    match_radius_px : float
        Pairs further apart are not matched (the benchmark uses half the closest spacing).

    Returns
    -------
    dict
        ``n_true, n_found, n_matched, recall, precision``;
        ``rms_over_bound`` {species: per-axis RMS error / RMS bound}, ``rms_bound_median`` (median over species),
        ``rms_bound_crowded`` (crowded columns pooled), ``rms_bound_worst`` (max over species and the crowded
        set); ``radial_bias`` {species: mean error along the unit vector from the column to its cluster centre,
        positive = toward the centre, over ring / shared columns, in units of their RMS bound},
        ``radial_bias_worst`` (largest magnitude, signed); ``actual_over_reported`` {species: RMS error / RMS of
        ``pos_err_px``}, ``act_rep_min``, ``act_rep_max``; ``n_species_true``, ``n_species_found``,
        ``species_agreement``; ``species_separation`` (smallest gap between adjacent true species' mean found
        ``intensity`` over the mean of their standard deviations).
    """
    tx, ty = truth["x_px"].to_numpy(float), truth["y_px"].to_numpy(float)
    fx, fy = found["x_px"].to_numpy(float), found["y_px"].to_numpy(float)
    fi, ti = match_columns(np.c_[fx, fy], np.c_[tx, ty], match_radius_px)
    n_t, n_f, n_m = len(truth), len(found), len(fi)
    out: dict = {"n_true": n_t, "n_found": n_f, "n_matched": n_m,
                 "recall": n_m / n_t if n_t else float("nan"), "precision": n_m / n_f if n_f else float("nan")}
    ex, ey = fx[fi] - tx[ti], fy[fi] - ty[ti]
    err2 = 0.5 * (ex**2 + ey**2)  # per-axis squared error
    bound = truth["crlb_px"].to_numpy(float)[ti] if "crlb_px" in truth else np.full(n_m, np.nan)
    sp = truth["species"].to_numpy()[ti]
    crowded = truth["crowded"].to_numpy(bool)[ti] if "crowded" in truth else np.zeros(n_m, bool)

    def ratio(sel):
        if not np.any(sel):
            return float("nan")
        return float(np.sqrt(err2[sel].mean()) / np.sqrt(np.mean(bound[sel] ** 2)))

    species = np.unique(truth["species"].to_numpy())
    rob = {int(s): ratio(sp == s) for s in species}
    out["rms_over_bound"] = rob
    vals = [v for v in rob.values() if np.isfinite(v)]
    out["rms_bound_median"] = float(np.median(vals)) if vals else float("nan")
    out["rms_bound_crowded"] = ratio(crowded)
    worst = vals + ([out["rms_bound_crowded"]] if np.isfinite(out["rms_bound_crowded"]) else [])
    out["rms_bound_worst"] = float(max(worst)) if worst else float("nan")

    bias = {}
    if {"centre_x_px", "centre_y_px", "role"} <= set(truth.columns):
        cx = truth["centre_x_px"].to_numpy(float)[ti] - tx[ti]
        cy = truth["centre_y_px"].to_numpy(float)[ti] - ty[ti]
        r = np.hypot(cx, cy)
        ring = np.isin(truth["role"].to_numpy()[ti], ["ring", "shared"]) & (r > 0) & np.isfinite(r)
        with np.errstate(invalid="ignore", divide="ignore"):
            radial = (ex * cx + ey * cy) / r
        for s in species:
            sel = ring & (sp == s)
            if np.any(sel):
                bias[int(s)] = float(radial[sel].mean() / np.sqrt(np.mean(bound[sel] ** 2)))
    out["radial_bias"] = bias
    out["radial_bias_worst"] = max(bias.values(), key=abs) if bias else float("nan")

    arr = {}
    if "pos_err_px" in found:
        rep = found["pos_err_px"].to_numpy(float)[fi]
        for s in species:
            sel = (sp == s) & np.isfinite(rep)
            if np.any(sel):
                arr[int(s)] = float(np.sqrt(err2[sel].mean()) / _rms(rep[sel]))
    out["actual_over_reported"] = arr
    out["act_rep_min"] = min(arr.values()) if arr else float("nan")
    out["act_rep_max"] = max(arr.values()) if arr else float("nan")

    out["n_species_true"] = int(len(species))
    if "species" in found:
        fs = found["species"].to_numpy()
        out["n_species_found"] = int(len(np.unique(fs[fs >= 0])))
        out["species_agreement"] = species_agreement(fs[fi], sp) if n_m else float("nan")
    else:
        out["n_species_found"], out["species_agreement"] = 0, float("nan")
    sep = float("nan")
    if "intensity" in found and len(species) > 1 and n_m:
        inten = found["intensity"].to_numpy(float)[fi]
        stats = [(np.nanmean(inten[sp == s]), np.nanstd(inten[sp == s])) for s in species if np.sum(sp == s) > 1]
        stats.sort()
        gaps = [(b[0] - a[0]) / (0.5 * (a[1] + b[1])) for a, b in zip(stats[:-1], stats[1:]) if a[1] + b[1] > 0]
        sep = float(min(gaps)) if gaps else float("nan")
    out["species_separation"] = sep
    return out


# ----------------------------------------------------------------------------------------------------------------
# Multislice-simulated cells: a cached one-cell Fourier series tiled to any field (benchmarks/simulate_multislice.py)
# ----------------------------------------------------------------------------------------------------------------

#: Doses of the multislice stress cells, electrons per square Angstrom at the specimen (the trade's unit).
MULTISLICE_DOSES = {"low": 1e5, "moderate": 1e6, "high": 1e7}


@dataclass(frozen=True)
class MultisliceCell:
    """A periodic HAADF image held as the Fourier series of one rectangular cell, with its columns.

    Attributes
    ----------
    coef : dict of str -> complex ndarray (2H+1, 2K+1)
        ``coef[run][H + h, K + k]`` multiplies ``exp(2 pi i (k x / a + h y / b))`` (x, y in nm); runs 'static' and
        'phonon'. Values are fractions of the incident probe intensity reaching the detector.
    cell_nm : (float, float)
        a (along x), b (along y).
    columns : DataFrame
        ``x_nm, y_nm`` (projected atom positions in the cell), ``species``, ``role``, ``centre_dx_nm,
        centre_dy_nm`` (cluster centre minus column position; NaN outside clusters), ``phonon_dx_nm,
        phonon_dy_nm`` (mean displacement of the column's atoms over the frozen-phonon configurations: the
        finite ensemble leaves each column a few pm off its site, and the phonon image follows it).
    params : dict
        The simulation's parameters (energy, angles, thickness, library versions, ...).
    """

    coef: dict
    cell_nm: tuple
    columns: pd.DataFrame
    params: dict


def load_multislice_cell(path) -> MultisliceCell:
    """Read a cached multislice cell (``.npz`` written by ``benchmarks/simulate_multislice.py``)."""
    path = Path(path)
    if not path.is_file():
        raise TenfoldInputError(f"{path}: no such multislice cell; run benchmarks/simulate_multislice.py to make it")
    with np.load(path, allow_pickle=False) as z:
        coef = {k[5:]: z[k].astype(np.complex128) for k in z.files if k.startswith("coef_")}
        cols = pd.DataFrame({k: z[k] for k in ("x_nm", "y_nm", "species", "role", "centre_dx_nm", "centre_dy_nm")})
        for k in ("phonon_dx_nm", "phonon_dy_nm"):
            cols[k] = z[k] if k in z.files else 0.0
        cell = tuple(float(v) for v in z["cell_nm"])
        params = json.loads(str(z["params"]))
    return MultisliceCell(coef=coef, cell_nm=cell, columns=cols, params=params)


def _series_axes(cell: MultisliceCell, run: str):
    if run not in cell.coef:
        raise TenfoldInputError(f"run={run!r} is not in the multislice cell; choose one of {sorted(cell.coef)}")
    c = cell.coef[run]
    h = np.arange(c.shape[0]) - c.shape[0] // 2
    k = np.arange(c.shape[1]) - c.shape[1] // 2
    return c, h, k


def multislice_values(cell: MultisliceCell, x_nm, y_nm, *, run: str = "phonon", derivative: str = "") -> np.ndarray:
    """The series (or its derivative 'x', 'y', 'xx', 'xy', 'yy', per nm) at scattered points (nm)."""
    c, h, k = _series_axes(cell, run)
    a, b = cell.cell_nm
    x = np.asarray(x_nm, dtype=float).ravel()
    y = np.asarray(y_nm, dtype=float).ravel()
    fx = np.exp(2j * np.pi * np.outer(x, k) / a)  # (N, K)
    fy = np.exp(2j * np.pi * np.outer(y, h) / b)  # (N, H)
    fx = fx * ((2j * np.pi * k / a) ** derivative.count("x"))[None, :]
    fy = fy * ((2j * np.pi * h / b) ** derivative.count("y"))[None, :]
    return np.real(np.einsum("nh,hk,nk->n", fy, c, fx))


def multislice_image(cell: MultisliceCell, *, shape, pixel_size_nm: float, run: str = "phonon",
                     origin_nm=(0.0, 0.0), derivative: str = "") -> np.ndarray:
    """Noise-free image (fraction of the probe on the detector) sampled at the pixel centres of a field.

    Pixel (row i, col j) is the probe position x = origin_x + j * pixel_size_nm, y = origin_y + i * pixel_size_nm
    (a STEM image samples points, it does not integrate over a pixel). Separable: (H x 2h+1) @ coef @ (2k+1 x W).
    """
    rows, ncols = _check_shape(shape)
    ps = _positive("pixel_size_nm", pixel_size_nm)
    c, h, k = _series_axes(cell, run)
    a, b = cell.cell_nm
    x = origin_nm[0] + ps * np.arange(ncols)
    y = origin_nm[1] + ps * np.arange(rows)
    ex = np.exp(2j * np.pi * np.outer(k, x) / a)
    ey = np.exp(2j * np.pi * np.outer(y, h) / b)
    ex = ex * ((2j * np.pi * k / a) ** derivative.count("x"))[:, None]
    ey = ey * ((2j * np.pi * h / b) ** derivative.count("y"))[None, :]
    return np.real(ey @ c @ ex)


def multislice_columns(cell: MultisliceCell, *, run: str = "phonon") -> tuple[np.ndarray, np.ndarray]:
    """True column positions (nm) of a run: the projected atom positions (phonon run: their ensemble mean)."""
    c = cell.columns
    x, y = c["x_nm"].to_numpy(float), c["y_nm"].to_numpy(float)
    if run == "phonon":
        x, y = x + c["phonon_dx_nm"].to_numpy(float), y + c["phonon_dy_nm"].to_numpy(float)
    return x, y


def multislice_peak_offsets(cell: MultisliceCell, *, run: str = "phonon", iterations: int = 20) -> pd.DataFrame:
    """Maximum of the noise-free image nearest each column minus the column's true position (nm), by Newton steps.

    Returns ``dx_nm, dy_nm`` (NaN where the nearest stationary point is no maximum), ``peak`` (the image there)
    and ``curvature_per_nm2`` (minus half its Laplacian).
    """
    x0, y0 = multislice_columns(cell, run=run)
    x, y = x0.copy(), y0.copy()
    for _ in range(iterations):
        gx = multislice_values(cell, x, y, run=run, derivative="x")
        gy = multislice_values(cell, x, y, run=run, derivative="y")
        hxx = multislice_values(cell, x, y, run=run, derivative="xx")
        hxy = multislice_values(cell, x, y, run=run, derivative="xy")
        hyy = multislice_values(cell, x, y, run=run, derivative="yy")
        det = hxx * hyy - hxy**2
        dx = -(hyy * gx - hxy * gy) / det
        dy = -(hxx * gy - hxy * gx) / det
        step = np.hypot(dx, dy)
        scale = np.minimum(1.0, 0.01 / np.maximum(step, 1e-30))  # at most 0.1 A per step
        x, y = x + dx * scale, y + dy * scale
    ok = (hxx < 0) & (det > 0)
    dx, dy = x - x0, y - y0
    return pd.DataFrame({"dx_nm": np.where(ok, dx, np.nan), "dy_nm": np.where(ok, dy, np.nan),
                         "peak": multislice_values(cell, x, y, run=run), "curvature_per_nm2": -0.5 * (hxx + hyy)})


def multislice_sample(cell: MultisliceCell, *, size_px: int, pixel_size_nm: float, dose_e_per_A2: float,
                      run: str = "phonon", origin_nm=(0.0, 0.0), rng=None, noise: bool = True,
                      partition_sigma_nm: float = 0.05, truth_at: str | None = None
                      ) -> tuple[np.ndarray, pd.DataFrame, dict]:
    """Tile a multislice cell over a square field, scale to a dose, add Poisson noise; truth with bounds.

    Parameters
    ----------
    cell : MultisliceCell
        From :func:`load_multislice_cell`.
    size_px, pixel_size_nm : int, float
        Field.
    dose_e_per_A2 : float
        Electrons per square Angstrom: each probe position receives ``dose * (10 pixel_size_nm)^2`` electrons and
        the detector counts that times the simulated fraction.
    run : {'phonon', 'static'}
        Frozen-phonon average or the static lattice.
    origin_nm : (float, float)
        Specimen position of pixel (0, 0).
    rng : Generator or int seed
        Poisson noise.
    noise : bool
        False returns the expected counts.
    partition_sigma_nm : float
        Width of the soft split of the image among columns used for the bound (see Notes).
    truth_at : {'atoms', 'peaks'}, optional
        What ``x_px, y_px`` hold: the projected atom positions, or the maxima of the noise-free image. Default
        'atoms' for the static run, 'peaks' for the phonon run: a few frozen-phonon configurations leave every
        column's atoms a few pm off their site on average and the depth-dependent channelling weights them unevenly,
        so the phonon image's columns have no better-defined position than its own peaks (a real specimen averages
        millions of configurations). Both are kept: ``atom_x_px, atom_y_px`` and ``peak_dx_px, peak_dy_px``.

    Returns
    -------
    image : float32 (size_px, size_px)
    truth : DataFrame
        ``x_px, y_px, x_nm, y_nm`` (see ``truth_at``), ``species, role, centre_x_px, centre_y_px, crowded,
        atom_x_px, atom_y_px, peak_dx_px, peak_dy_px`` (noise-free peak minus the atom position),
        ``crlb_x_px, crlb_y_px, crlb_px``; columns inside the field.
    params : dict
        Dose, electrons per probe position, pixel size, the simulation's parameters, ``snr_dim`` (dimmest species'
        median peak above the lowest level over the square root of its peak), ``closest_spacing_px``.

    Notes
    -----
    The truth of a column in a multislice image is the projected position of its atoms. The bound is the
    Cramer-Rao bound of the column's x, y with its neighbours' parameters known: the expected image is split among
    the columns by Gaussian weights of ``partition_sigma_nm`` about each column (normalised over the columns), and a
    column's parameters are its share's translation, its share's scale and a local constant background; Fisher
    information ``sum_p (d mu_p / d theta_a)(d mu_p / d theta_b) / mu_p`` over a patch of 0.3 nm about it. Ignoring
    the correlation with neighbours makes it a little optimistic for crowded columns.
    """
    from scipy.spatial import cKDTree

    n = int(size_px)
    ps = _positive("pixel_size_nm", pixel_size_nm)
    dose = _positive("dose_e_per_A2", dose_e_per_A2)
    per_px = dose * (10.0 * ps) ** 2
    mu = per_px * multislice_image(cell, shape=(n, n), pixel_size_nm=ps, run=run, origin_nm=origin_nm)
    mu = np.maximum(mu, _MU_FLOOR)
    a, b = cell.cell_nm
    c = cell.columns
    # every copy of the cell's columns inside the field (pixel centres span origin .. origin + (n - 1) ps)
    lo_x, lo_y = origin_nm[0] - 0.5 * ps, origin_nm[1] - 0.5 * ps
    i0, i1 = math.floor(lo_x / a) - 1, math.ceil((lo_x + n * ps) / a) + 1
    j0, j1 = math.floor(lo_y / b) - 1, math.ceil((lo_y + n * ps) / b) + 1
    ti, tj = np.meshgrid(np.arange(i0, i1), np.arange(j0, j1), indexing="ij")
    cx0, cy0 = multislice_columns(cell, run=run)
    xs = (cx0[None, :] + a * ti.reshape(-1, 1)).ravel()
    ys = (cy0[None, :] + b * tj.reshape(-1, 1)).ravel()
    rep = np.tile(np.arange(len(c)), ti.size)
    xp, yp = (xs - origin_nm[0]) / ps, (ys - origin_nm[1]) / ps
    inside = (xp >= -0.5) & (xp < n - 0.5) & (yp >= -0.5) & (yp < n - 0.5)
    xp, yp, rep = xp[inside], yp[inside], rep[inside]
    cc = c.iloc[rep].reset_index(drop=True)
    offs = multislice_peak_offsets(cell, run=run).iloc[rep].reset_index(drop=True)
    nn = cKDTree(np.c_[xp, yp]).query(np.c_[xp, yp], k=2)[0][:, 1] if len(xp) > 1 else np.full(len(xp), np.inf)
    truth_at = ("peaks" if run == "phonon" else "atoms") if truth_at is None else truth_at
    if truth_at not in ("atoms", "peaks"):
        raise TenfoldInputError(f"truth_at={truth_at!r} must be 'atoms' or 'peaks'")
    pdx, pdy = offs["dx_nm"].to_numpy() / ps, offs["dy_nm"].to_numpy() / ps
    ax, ay = xp, yp
    if truth_at == "peaks":
        xp, yp = xp + np.nan_to_num(pdx), yp + np.nan_to_num(pdy)
    truth = pd.DataFrame({
        "id": np.arange(len(xp), dtype=np.int64), "x_px": xp, "y_px": yp, "x_nm": xp * ps, "y_nm": yp * ps,
        "species": cc["species"].to_numpy(), "role": cc["role"].to_numpy(),
        "centre_x_px": ax + cc["centre_dx_nm"].to_numpy() / ps, "centre_y_px": ay + cc["centre_dy_nm"].to_numpy() / ps,
        "crowded": nn * ps < 0.3, "atom_x_px": ax, "atom_y_px": ay, "peak_dx_px": pdx, "peak_dy_px": pdy,
    })
    gx = per_px * multislice_image(cell, shape=(n, n), pixel_size_nm=ps, run=run, origin_nm=origin_nm,
                                   derivative="x") * ps
    gy = per_px * multislice_image(cell, shape=(n, n), pixel_size_nm=ps, run=run, origin_nm=origin_nm,
                                   derivative="y") * ps
    truth = pd.concat([truth, _partition_bound(mu, gx, gy, xp, yp, partition_sigma_nm / ps, 0.3 / ps)], axis=1)
    species = truth["species"].to_numpy()
    floor = float(mu.min())
    peaks = {int(s): float(np.median(per_px * offs["peak"].to_numpy()[species == s])) for s in np.unique(species)}
    dim = min(peaks.values())
    # Gaussian-equivalent width of the dimmest species' peaks from their curvature: A exp(-r^2 / 2 s^2) has
    # Laplacian / 2 = -A / s^2 at its centre
    dim_sp = min(peaks, key=peaks.get)
    sel = species == dim_sp
    peak_counts = per_px * offs["peak"].to_numpy()[sel]
    sig = np.sqrt((peak_counts - floor) / (per_px * offs["curvature_per_nm2"].to_numpy()[sel]))
    params = {
        "sigma_nm": float(np.median(sig)),
        "run": run, "truth_at": truth_at, "dose_e_per_A2": dose, "electrons_per_px": per_px, "pixel_size_nm": ps,
        "size_px": n,
        "origin_nm": list(origin_nm), "peaks_by_species": peaks, "lowest_level": floor,
        "snr_dim": float((dim - floor) / math.sqrt(dim)), "closest_spacing_px": float(nn.min()),
        "n_columns": int(len(xp)), "n_species": int(len(peaks)), "simulation": cell.params,
    }
    if not noise:
        return mu, truth, params
    img = _rng(rng).poisson(mu).astype(np.float32)
    return img, truth, params


def _partition_bound(mu, gx, gy, x, y, s_px: float, radius_px: float) -> pd.DataFrame:
    """Neighbours-known Fisher bound of each column's x, y on a soft split of the image (see multislice_sample)."""
    from scipy.spatial import cKDTree

    n = len(x)
    h = int(math.ceil(radius_px))
    off = np.arange(-h, h + 1)
    u = np.round(x).astype(np.int64)[:, None, None] + off[None, None, :]
    v = np.round(y).astype(np.int64)[:, None, None] + off[None, :, None]
    u, v = np.broadcast_arrays(u, v)
    inside = (u >= 0) & (u < mu.shape[1]) & (v >= 0) & (v < mu.shape[0])
    uc, vc = np.clip(u, 0, mu.shape[1] - 1), np.clip(v, 0, mu.shape[0] - 1)
    k = min(12, n)
    _, nb = cKDTree(np.c_[x, y]).query(np.c_[x, y], k=k)
    nb = np.asarray(nb).reshape(n, k)
    own = np.exp(-((u - x[:, None, None]) ** 2 + (v - y[:, None, None]) ** 2) / (2 * s_px**2))
    tot = np.zeros_like(own)
    for j in range(k):  # k <= 12 neighbour slots, each vectorised over all columns
        xj, yj = x[nb[:, j]][:, None, None], y[nb[:, j]][:, None, None]
        tot += np.exp(-((u - xj) ** 2 + (v - yj) ** 2) / (2 * s_px**2))
    w = np.where(inside, own / np.maximum(tot, 1e-300), 0.0)
    m = mu[vc, uc]
    base = np.quantile(mu, 0.01)
    d = np.stack([-w * gx[vc, uc], -w * gy[vc, uc], w * (m - base), inside.astype(float)], axis=-1)
    fisher = np.einsum("npqa,npqb,npq->nab", d, d, np.where(inside, 1.0 / m, 0.0))
    cov = np.linalg.pinv(fisher)
    vx, vy = cov[:, 0, 0], cov[:, 1, 1]
    return pd.DataFrame({"crlb_x_px": np.sqrt(vx), "crlb_y_px": np.sqrt(vy), "crlb_px": np.sqrt(0.5 * (vx + vy))})


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
