"""Synthetic decagonal images with a known linear phason strain (for tests, benchmarks and examples).

The cluster model of :mod:`.synthetic` (a centre column and a ring of ten on every tiling vertex, species 2 / 1 / 0)
is placed on a pentagrid tiling whose grid offsets vary linearly across the field
(:func:`._pentagrid.pentagrid_tiling` with ``phason_strain``), so the lifted vertices follow
``x_perp = W x_par`` with W known. A periodic approximant is the limit in which one rational strain locks the
tiling to a lattice; here W is a free 2x2 matrix.
"""

from __future__ import annotations

import numpy as np

from ._pentagrid import pentagrid_tiling
from .synthetic import SPECIES_Z_EFF, counts_from_z, render_image

__all__ = ["strain_with_singular_values", "phason_strained_image"]


def strain_with_singular_values(s1: float, s2: float, *, angle_u_deg: float = 25.0,
                                angle_v_deg: float = -40.0) -> np.ndarray:
    """``W = R(u) diag(s1, s2) R(v)^T``: a strain matrix with the given singular values."""
    def rot(a):
        a = np.radians(a)
        return np.array([[np.cos(a), -np.sin(a)], [np.sin(a), np.cos(a)]])

    return rot(angle_u_deg) @ np.diag([s1, s2]) @ rot(angle_v_deg).T


def phason_strained_image(
    *,
    phason_strain,
    size_px: int = 1024,
    pixel_size_nm: float = 0.04,
    edge_nm: float = 2.0,
    ring_radius_nm: float = 0.45,
    angle_deg: float = 7.0,
    sigma_nm: float = 0.06,
    brightest_counts: float = 8000.0,
    background: float = 40.0,
    shear: float = 0.0,
    rng: np.random.Generator | int | None = 0,
) -> tuple[np.ndarray, dict]:
    """Render a decagonal cluster image whose tiling carries the linear phason strain ``phason_strain``.

    Parameters
    ----------
    phason_strain : (2, 2) array
        ``W = d x_perp / d x_par`` in the image frame (x right, y down), with ``x_perp = L sum_j K_j e_perp_j``,
        ``e_perp_j`` at 144 j deg, ``e_j`` at ``angle_deg + 72 j`` (the convention of :mod:`.phason`).
    size_px, pixel_size_nm, edge_nm, ring_radius_nm, angle_deg, sigma_nm
        Geometry (square image).
    brightest_counts, background
        Electrons in a species-2 column and background per px (species 0 and 1 scaled as Z^1.7).
    shear : float
        Fast-scan shear of :func:`.synthetic.render_image` (x' = x + shear y).
    rng : Generator or int seed
        Pentagrid offsets and Poisson noise.

    Returns
    -------
    image : (size_px, size_px) float32
    truth : dict
        ``phason_strain``, ``singular_values``, ``centres_px`` (V, 2, after shear), ``index`` (V, 5),
        ``edge_px``, ``angle_deg``, ``shear``, ``pixel_size_nm``.
    """
    gen = np.random.default_rng(rng)
    w_img = np.asarray(phason_strain, dtype=float).reshape(2, 2)
    a = np.radians(angle_deg)
    rot = np.array([[np.cos(a), -np.sin(a)], [np.sin(a), np.cos(a)]])
    # the patch is built unrotated and then turned by angle_deg: x_par_img = R x_par, so W_patch = W_img R
    half = 0.5 * size_px * pixel_size_nm / edge_nm + 2.0
    t = pentagrid_tiling(half, rng=gen, phason_strain=w_img @ rot)
    centre = 0.5 * size_px * pixel_size_nm
    t = t.scaled(edge_nm, centre=(centre, centre), angle_deg=angle_deg)
    v = t.vertices
    span = size_px * pixel_size_nm
    reach = ring_radius_nm + 0.15
    lo, hi_y = reach, span - reach
    hi_x = span - reach - abs(shear) * span
    keep = (v[:, 0] >= lo) & (v[:, 0] <= hi_x) & (v[:, 1] >= lo) & (v[:, 1] <= hi_y)
    v, index = v[keep], t.index[keep]
    slot = np.arange(-1, 10)
    ang = np.radians(angle_deg + 36.0 * np.maximum(slot, 0))
    rad = np.where(slot < 0, 0.0, ring_radius_nm)
    x = (v[:, None, 0] + rad * np.cos(ang)).ravel() / pixel_size_nm
    y = (v[:, None, 1] + rad * np.sin(ang)).ravel() / pixel_size_nm
    species = np.tile(np.where(slot < 0, 2, np.where(slot % 2 == 0, 1, 0)), len(v))
    counts = counts_from_z(SPECIES_Z_EFF, brightest_counts=brightest_counts)[species]
    image = render_image(x, y, counts, shape=(size_px, size_px), sigma_px=sigma_nm / pixel_size_nm,
                         background=background, rng=gen, shear=shear)
    c_px = v / pixel_size_nm
    c_px = np.stack([c_px[:, 0] + shear * c_px[:, 1], c_px[:, 1]], axis=1)
    truth = {
        "phason_strain": w_img.tolist(),
        "singular_values": np.linalg.svd(w_img, compute_uv=False).tolist(),
        "centres_px": c_px,
        "index": index,
        "edge_px": edge_nm / pixel_size_nm,
        "angle_deg": float(angle_deg),
        "shear": float(shear),
        "pixel_size_nm": float(pixel_size_nm),
    }
    return image, truth
