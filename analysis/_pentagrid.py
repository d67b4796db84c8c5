"""Penrose rhombus tilings by de Bruijn's pentagrid method.

Five families of parallel lines (a pentagrid) ``x . e_j + gamma_j = k`` with unit normals
``e_j = (cos 2 pi j/5, sin 2 pi j/5)`` and offsets ``gamma_j`` summing to zero. Every intersection of a line of
family j with a line of family l becomes one rhombus of the dual tiling, with edges ``e_j`` and ``e_l``: thick
(72 / 108 deg) when the two families are neighbours (|j - l| = 1 or 4), thin (36 / 144 deg) otherwise. A tiling
vertex is ``sum_i K_i e_i`` for the integer mesh index ``K_i = floor(x . e_i + gamma_i)`` of the mesh it stands
for, so vertices are identified exactly by their five integers.

References
----------
N. G. de Bruijn, "Algebraic theory of Penrose's non-periodic tilings of the plane. I, II",
Indagationes Mathematicae 84 (1981) 39-52, 53-66.
R. Penrose, "The role of aesthetics in pure and applied mathematical research",
Bull. Inst. Math. Appl. 10 (1974) 266-271.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["RhombusTiling", "pentagrid_tiling", "E_PAR", "E_PERP"]

TAU = (1.0 + np.sqrt(5.0)) / 2.0
_E = np.stack([np.cos(2 * np.pi * np.arange(5) / 5), np.sin(2 * np.pi * np.arange(5) / 5)], axis=1)
#: Unit star vectors of the five edge directions (physical space), e_j at 72 j deg.
E_PAR = _E
#: Their partners in perpendicular space, e_perp_j at 144 j deg (the standard lift of the 5-D cubic lattice; with
#: E_PAR they satisfy sum_j e_j e_perp_j^T = 0 and sum_j e_perp_j e_perp_j^T = 5/2 I).
E_PERP = np.stack([np.cos(4 * np.pi * np.arange(5) / 5), np.sin(4 * np.pi * np.arange(5) / 5)], axis=1)


@dataclass
class RhombusTiling:
    """A patch of a rhombus tiling with unit edge.

    Attributes
    ----------
    vertices : (V, 2) float array
        Vertex positions (x, y), edge length 1, centred on the patch centre.
    rhombi : (T, 4) int array
        Vertex indices of each rhombus, in cyclic order.
    thick : (T,) bool array
        True for a thick (72/108 deg) rhombus, False for a thin (36/144 deg) one.
    edges : (E, 2) int array
        Unique tiling edges as vertex index pairs (i < j).
    index : (V, 5) int array
        de Bruijn integer index of each vertex.
    """

    vertices: np.ndarray
    rhombi: np.ndarray
    thick: np.ndarray
    edges: np.ndarray
    index: np.ndarray

    def scaled(self, edge: float, *, centre: tuple[float, float] = (0.0, 0.0), angle_deg: float = 0.0) -> "RhombusTiling":
        """Copy with edge length ``edge``, rotated by ``angle_deg`` and shifted to ``centre``."""
        a = np.deg2rad(angle_deg)
        rot = np.array([[np.cos(a), -np.sin(a)], [np.sin(a), np.cos(a)]])
        v = self.vertices @ rot.T * edge + np.asarray(centre, dtype=float)
        return RhombusTiling(v, self.rhombi.copy(), self.thick.copy(), self.edges.copy(), self.index.copy())


def pentagrid_tiling(
    half_width: float,
    *,
    half_height: float | None = None,
    gamma: np.ndarray | None = None,
    rng: np.random.Generator | int | None = None,
    phason_strain: np.ndarray | None = None,
    normals: np.ndarray | None = None,
) -> RhombusTiling:
    """Penrose rhombus tiling covering a rectangle, by de Bruijn's pentagrid method.

    Parameters
    ----------
    half_width, half_height : float
        Half sizes of the rectangle (in edge lengths) to cover; only rhombi with all four vertices inside are kept.
        ``half_height`` defaults to ``half_width``.
    gamma : (5,) array, optional
        Grid offsets. They are shifted to sum to zero (the condition for a Penrose tiling; de Bruijn 1981).
        Default: drawn from ``rng`` (a generic grid, with no three lines through one point).
    rng : numpy Generator or int seed, optional
        Source of the random offsets.
    phason_strain : (2, 2) array, optional
        Linear phason strain ``W = d x_perp / d x_par`` of the tiling (in the frame of this unrotated patch, edge
        1; ``x_perp = sum_j K_j e_perp_j``). The grid offsets then vary linearly across the plane: the lines of
        family j are ``x . (e_j + c_j) + gamma_j = k`` with ``c_j = W^T e_perp_j``, so a vertex's perpendicular
        position ``sum_j K_j e_perp_j ~ sum_j e_perp_j (c_j . x) = 5/2 W x`` follows ``W x_par`` (``x_par ~ 5/2 x``,
        and ``sum_j e_j c_j^T = 0`` leaves the physical positions unstrained). Small strains (singular values
        well below 1) keep every grid generic and the dual a rhombus tiling.
    normals : (5, 2) array, optional
        The five grid normals themselves (instead of ``phason_strain``); edges stay the unit ``e_j``. Normals
        with ``n_j . a_i`` integer for two vectors a_1, a_2 give a tiling periodic under those translations (a
        periodic approximant; de Bruijn's dualisation holds for any such generic grid).

    Returns
    -------
    RhombusTiling

    Examples
    --------
    >>> t = pentagrid_tiling(10.0, rng=1)
    >>> bool(abs(t.thick.sum() / (~t.thick).sum() - TAU) < 0.3)
    True
    """
    if half_height is None:
        half_height = half_width
    if not (half_width > 0 and half_height > 0):
        raise ValueError(f"pentagrid_tiling: half_width and half_height must be positive, got {half_width}, {half_height}")
    if gamma is None:
        gen = np.random.default_rng(rng)
        gamma = gen.uniform(0.0, 1.0, 5)
    gamma = np.asarray(gamma, dtype=float).reshape(5)
    gamma = gamma - gamma.mean()
    grid = _E
    if phason_strain is not None:
        w = np.asarray(phason_strain, dtype=float)
        if w.shape != (2, 2) or not np.all(np.isfinite(w)) or np.linalg.norm(w, 2) >= 0.5:
            raise ValueError(f"pentagrid_tiling: phason_strain must be a finite 2x2 matrix with norm < 0.5, got {w.tolist()}")
        grid = _E + E_PERP @ w  # row j: e_j + W^T e_perp_j
    if normals is not None:
        grid = np.asarray(normals, dtype=float).reshape(5, 2)
        if not np.all(np.isfinite(grid)) or np.max(np.abs(grid - _E)) >= 0.5:
            raise ValueError("pentagrid_tiling: normals must stay within 0.5 of the unit star e_j")

    # Vertices sit near (5/2) x for grid point x, so the grid region needed is the target region / 2.5 plus margin.
    reach = np.hypot(half_width, half_height) / 2.5 + 2.0
    kmax = int(np.ceil(reach + 1.0))
    ks = np.arange(-kmax, kmax + 1)

    idx_blocks, thick_blocks = [], []
    for j in range(5):
        for l in range(j + 1, 5):
            kj, kl = np.meshgrid(ks, ks, indexing="ij")
            kj, kl = kj.ravel(), kl.ravel()
            a = np.stack([grid[j], grid[l]])  # rows: normals
            rhs = np.stack([kj - gamma[j], kl - gamma[l]], axis=1)
            p = np.linalg.solve(a, rhs.T).T  # (M, 2) intersection points
            keep = np.hypot(p[:, 0], p[:, 1]) <= reach
            p, kj, kl = p[keep], kj[keep], kl[keep]
            base = np.floor(p @ grid.T + gamma).astype(np.int64)  # (M, 5)
            base[:, j] = kj - 1
            base[:, l] = kl - 1
            corners = np.repeat(base[:, None, :], 4, axis=1)
            corners[:, 1, j] += 1
            corners[:, 2, j] += 1
            corners[:, 2, l] += 1
            corners[:, 3, l] += 1
            idx_blocks.append(corners)
            thick_blocks.append(np.full(len(p), (l - j) in (1, 4)))
    corners = np.concatenate(idx_blocks)  # (T, 4, 5)
    thick = np.concatenate(thick_blocks)

    index, inverse = np.unique(corners.reshape(-1, 5), axis=0, return_inverse=True)
    rhombi = inverse.reshape(-1, 4)
    vertices = index.astype(float) @ _E

    inside_v = (np.abs(vertices[:, 0]) <= half_width) & (np.abs(vertices[:, 1]) <= half_height)
    keep_t = inside_v[rhombi].all(axis=1)
    rhombi, thick = rhombi[keep_t], thick[keep_t]
    used = np.unique(rhombi)
    remap = np.full(len(vertices), -1, dtype=np.int64)
    remap[used] = np.arange(len(used))
    vertices, index, rhombi = vertices[used], index[used], remap[rhombi]

    e = np.concatenate([rhombi[:, [0, 1]], rhombi[:, [1, 2]], rhombi[:, [2, 3]], rhombi[:, [3, 0]]])
    edges = np.unique(np.sort(e, axis=1), axis=0)
    return RhombusTiling(vertices, rhombi, thick, edges, index)
