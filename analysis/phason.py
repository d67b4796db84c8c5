"""Phason strain in real space: lift the cluster tiling to perpendicular space and fit its slope.

Steps
-----
1. **Orientation and steps.** The cluster network is a rhombus tiling whose edges run along five directions
   ``e_j`` at ``orientation + 72 j`` deg (j = 0..4). The orientation (mod 36 deg) is the ten-fold phase of the edge
   directions; every edge vector is classified as ``+e_j`` or ``-e_j`` (within ``angle_tol_deg``) and its length
   checked against the edge length.
2. **Integer coordinates.** Every vertex gets five integers ``K`` with ``K_b - K_a`` the edge step, found for the
   largest connected part of the network by a sparse least-squares solve over all classified edges (one vertex
   pinned) and rounded. An edge whose step disagrees with the rounded result is counted as inconsistent.
3. **Lift.** ``x_perp = L sum_j K_j e_perp_j`` with ``e_perp_j`` unit vectors at ``144 j`` deg and L the edge
   length (the standard lift of the five-dimensional cubic lattice; de Bruijn 1981).
4. **Fit.** ``x_perp = W x_par + c`` by least squares over the vertices, ``x_par`` the measured positions; W is
   the linear phason strain (dimensionless), its uncertainty the larger of a bootstrap over vertices and the
   finite-field floor ``0.51 (L / half field)^2`` of ideal patches (our simulation, docs/fourier.md). The residual is the
   local phason field; a vertex whose residual leaves the acceptance window of the ideal tiling (the projection of
   the unit 5-cube, a decagon of circumradius tau L) is flagged as a phason-flip site.

The convention matches :func:`tenfold.analysis.fourier.index_decagonal`, so the two estimates of W can be
compared directly when both use the same orientation period and edge length.

References
----------
N. G. de Bruijn, Indag. Math. 84 (1981) 39-66 (pentagrid, lift of the vertices).
K. Edagawa, K. Suzuki, S. Takeuchi, "High resolution transmission electron microscopy observation of thermally
fluctuating phasons in decagonal Al-Cu-Co", Phys. Rev. Lett. 85 (2000) 1674 (perpendicular-space analysis of a
tiling traced from an image).
T. C. Lubensky, J. E. S. Socolar, P. J. Steinhardt, P. A. Bancel, P. A. Heiney, Phys. Rev. Lett. 57 (1986) 1440
(linear phason strain).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ._errors import TenfoldInputError
from ._pentagrid import E_PERP, TAU
from ._schema import PHASON_MAP, conform, empty_table
from ._strain import strain_summary
from .fourier import _compare_phason, fourier_phason_summary

__all__ = ["lift_tiling", "phason_from_network", "window_contains", "phason_map_figure", "phason_stage",
           "strain_summary"]

#: Largest angle between an edge and the nearest of the ten directions for the edge to be used (deg).
ANGLE_TOL_DEG = 10.0
#: Largest relative deviation of an edge length from the tiling edge for the edge to be used.
LENGTH_TOL = 0.15
#: A vertex is a flip site when its residual perpendicular position lies this far (fraction of L) outside the
#: acceptance window of the ideal tiling (margin for position noise and a locally curved phason field).
FLIP_MARGIN = 0.1
#: Gaussian width (in edge lengths) of the local average that turns the per-vertex residual (dominated by the
#: vertices' scatter inside the acceptance window) into a local phason displacement field.
SMOOTH_EDGES = 2.0


def _orientation(d: np.ndarray) -> float:
    """Ten-fold phase of edge vectors: the direction of e_0 in [0, 36) deg."""
    a = np.arctan2(d[:, 1], d[:, 0])
    return float(np.degrees(np.angle(np.sum(np.exp(10j * a)))) / 10.0) % 36.0


def _steps(d: np.ndarray, theta_deg: float, edge: float) -> tuple[np.ndarray, np.ndarray]:
    """Signed unit step (index j, sign) per edge vector, and whether the edge passes the angle/length checks."""
    a = (np.degrees(np.arctan2(d[:, 1], d[:, 0])) - theta_deg) / 36.0
    k = np.round(a).astype(np.int64)
    ok = np.abs(a - k) * 36.0 <= ANGLE_TOL_DEG
    ok &= np.abs(np.hypot(d[:, 0], d[:, 1]) / edge - 1.0) <= LENGTH_TOL
    k %= 10
    # direction theta + 36 k: e_(k/2) for even k, -e_((k-5)/2 mod 5) for odd k
    j = np.where(k % 2 == 0, k // 2, ((k - 5) // 2) % 5)
    sign = np.where(k % 2 == 0, 1, -1)
    step = np.zeros((len(d), 5), dtype=np.int64)
    step[np.arange(len(d)), j] = sign
    return step, ok


def lift_tiling(
    xy: np.ndarray, edges: np.ndarray, *, edge: float | None = None, orientation_deg: float | None = None
) -> tuple[np.ndarray, np.ndarray, dict]:
    """Five integer coordinates per tiling vertex, by walking the edges.

    Parameters
    ----------
    xy : (V, 2) float array
        Vertex positions (any length unit).
    edges : (E, 2) int array
        Vertex index pairs of the tiling edges.
    edge : float, optional
        Edge length (default: median edge length).
    orientation_deg : float, optional
        Direction of e_0 (default: the ten-fold phase of the edges, in [0, 36)).

    Returns
    -------
    index : (V, 5) int array
        Integer coordinates (zeros where ``lifted`` is False).
    lifted : (V,) bool array
        True for the vertices of the largest connected part of the classified edges.
    info : dict
        ``edge``, ``orientation_deg``, ``n_edges_used``, ``n_edges_rejected``, ``n_inconsistent_edges``,
        ``n_lifted``.

    Examples
    --------
    >>> from tenfold.analysis._pentagrid import pentagrid_tiling
    >>> t = pentagrid_tiling(6.0, rng=0)
    >>> k, ok, info = lift_tiling(t.vertices, t.edges, orientation_deg=0.0)
    >>> bool(ok.all()), bool(np.all((k - k[0]) == (t.index - t.index[0])))
    (True, True)
    """
    from scipy.sparse import coo_matrix, csgraph
    from scipy.sparse.linalg import spsolve

    xy = np.asarray(xy, dtype=float)
    edges = np.asarray(edges, dtype=np.int64).reshape(-1, 2)
    nv = len(xy)
    info = {"edge": None, "orientation_deg": None, "n_edges_used": 0, "n_edges_rejected": int(len(edges)),
            "n_inconsistent_edges": 0, "n_lifted": 0}
    index = np.zeros((nv, 5), dtype=np.int64)
    lifted = np.zeros(nv, dtype=bool)
    if nv < 3 or len(edges) < 2:
        return index, lifted, info
    d = xy[edges[:, 1]] - xy[edges[:, 0]]
    edge = float(np.median(np.hypot(d[:, 0], d[:, 1]))) if edge is None else float(edge)
    theta = _orientation(d) if orientation_deg is None else float(orientation_deg)
    step, ok = _steps(d, theta, edge)
    e, step = edges[ok], step[ok]
    info.update(edge=edge, orientation_deg=theta, n_edges_used=int(ok.sum()), n_edges_rejected=int((~ok).sum()))
    if len(e) == 0:
        return index, lifted, info
    adj = coo_matrix((np.ones(len(e)), (e[:, 0], e[:, 1])), shape=(nv, nv))
    _, label = csgraph.connected_components(adj, directed=False)
    sizes = np.bincount(label[np.unique(e)], minlength=label.max() + 1)
    main = int(np.argmax(sizes))
    keep = label[e[:, 0]] == main
    e, step = e[keep], step[keep]
    verts = np.unique(e)
    pos = np.full(nv, -1, dtype=np.int64)
    pos[verts] = np.arange(len(verts))
    a, b = pos[e[:, 0]], pos[e[:, 1]]
    m = len(verts)
    # Laplacian system L K = D^T step with the first vertex pinned at K_0 = 0
    rows = np.concatenate([a, b, a, b])
    cols = np.concatenate([a, b, b, a])
    vals = np.concatenate([np.ones(len(a)), np.ones(len(a)), -np.ones(len(a)), -np.ones(len(a))])
    lap = coo_matrix((vals, (rows, cols)), shape=(m, m)).tocsc()
    rhs = np.zeros((m, 5))
    np.add.at(rhs, b, step)
    np.add.at(rhs, a, -step)
    k = np.zeros((m, 5), dtype=np.int64)
    if m > 1:  # vertex 0 pinned at K = 0: solve the reduced system
        sol = spsolve(lap[1:, 1:], rhs[1:])
        k[1:] = np.rint(np.asarray(sol).reshape(m - 1, 5)).astype(np.int64)
    bad = np.any(k[b] - k[a] != step, axis=1)
    index[verts] = k
    lifted[verts] = True
    info.update(n_inconsistent_edges=int(bad.sum()), n_lifted=int(m))
    return index, lifted, info


def _window_facets() -> tuple[np.ndarray, np.ndarray]:
    """Facet normals u_k and support values h(u_k) of the zonogon {sum_j t_j e_perp_j, |t_j| <= 1/2}."""
    u = np.stack([-E_PERP[:, 1], E_PERP[:, 0]], axis=1)
    h = 0.5 * np.abs(u @ E_PERP.T).sum(axis=1)
    return u, h


def window_contains(p: np.ndarray, *, margin: float = 0.0) -> np.ndarray:
    """True where perpendicular positions ``p`` (edge 1, centred) lie inside the ideal acceptance window.

    The window of a pentagrid tiling is the projection of the unit 5-cube on perpendicular space, a decagon of
    circumradius tau (de Bruijn 1981: ``x_perp = sum_j (gamma_j - f_j) e_perp_j`` with ``f_j`` in [0, 1)).

    Examples
    --------
    >>> window_contains(np.array([[0.0, 0.0], [1.7, 0.0]])).tolist()
    [True, False]
    """
    u, h = _window_facets()
    return np.all(np.abs(np.asarray(p, dtype=float) @ u.T) <= h + margin, axis=1)


def _penrose_windows() -> list[tuple[np.ndarray, np.ndarray]]:
    """Facet normals and offsets of the four pentagonal windows of a Penrose tiling, levels m = 1..4.

    With ``sum_j gamma_j = 0`` a vertex has ``x_perp = c - sum_j f_j e_perp_j`` with ``f`` in the unit 5-cube and
    ``sum_j f_j = m`` (m = -sum_j K_j, 1..4; de Bruijn 1981): the window of level m is the projection of that
    slice of the cube, the convex hull of ``-sum_(j in S) e_perp_j`` over the m-subsets S.
    """
    from itertools import combinations

    from scipy.spatial import ConvexHull

    out = []
    for m in range(1, 5):
        pts = np.array([-E_PERP[list(c)].sum(axis=0) for c in combinations(range(5), m)])
        hull = ConvexHull(pts)
        out.append((hull.equations[:, :2], hull.equations[:, 2]))
    return out


def _flip_sites(index: np.ndarray, res: np.ndarray) -> tuple[np.ndarray, str]:
    """Vertices outside the acceptance window, and which window was used.

    When the index sums ``sum_j K_j`` leave exactly one residue mod 5 (almost) empty, the tiling has the level
    structure of a Penrose tiling and each vertex is tested against the pentagon of its level (a single flip moves
    a vertex to another level or out of its pentagon); otherwise against the decagon of the whole 5-cube.
    """
    level_sum = index.sum(axis=1)
    counts = np.bincount(level_sum % 5, minlength=5)
    empty = np.flatnonzero(counts <= max(2, 0.02 * len(index)))
    if len(empty) != 1:
        return ~window_contains(res, margin=FLIP_MARGIN), "decagon (projection of the 5-cube)"
    m = (empty[0] - level_sum) % 5
    outside = m == 0
    for lev, (normal, offset) in enumerate(_penrose_windows(), start=1):
        sel = m == lev
        outside[sel] = np.any(res[sel] @ normal.T + offset > FLIP_MARGIN, axis=1)
    return outside, "Penrose pentagons by level (sum of the integer coordinates mod 5)"


def _smooth_field(xy: np.ndarray, res: np.ndarray, use: np.ndarray, width: float) -> tuple[np.ndarray, np.ndarray]:
    """Gaussian-weighted local mean of the residuals (flip sites excluded) at every vertex, within 2.5 widths."""
    from scipy.sparse import coo_matrix
    from scipy.spatial import cKDTree

    tree = cKDTree(xy)
    pairs = tree.query_pairs(2.5 * width, output_type="ndarray")
    i = np.concatenate([pairs[:, 0], pairs[:, 1], np.arange(len(xy))])
    j = np.concatenate([pairs[:, 1], pairs[:, 0], np.arange(len(xy))])
    d2 = np.sum((xy[i] - xy[j]) ** 2, axis=1)
    wgt = np.exp(-0.5 * d2 / width**2) * use[j]
    m = coo_matrix((wgt, (i, j)), shape=(len(xy), len(xy))).tocsr()
    norm = np.asarray(m.sum(axis=1)).ravel()
    with np.errstate(invalid="ignore", divide="ignore"):
        return m @ res[:, 0] / norm, m @ res[:, 1] / norm


#: Two vertices are of one class when their residual perpendicular positions are closer than this fraction of
#: the mean spacing sqrt(A / n) that n points filling the window (area A = 7.69 L^2, the decagon of
#: circumradius tau) would have. Measured on pentagrid patches of 700 and 12 000 vertices: a quasiperiodic patch
#: has no vertex with a partner that close (nearest neighbour 0.4-0.6 spacings), the approximants of periods
#: 2-4 have every vertex with one (0.04-0.15 spacings).
CLASS_FRACTION = 0.25
#: The tiling is called periodic when at least this fraction of its vertices (and at least 100) has a partner.
PERIODIC_FRACTION = 0.8


def _approximant(xy: np.ndarray, res: np.ndarray, edge: float) -> dict:
    """Whether the lifted tiling is periodic, and its lattice vectors.

    In a periodic approximant the vertices related by a lattice translation have the same residual
    perpendicular position once the (approximant's) linear phason strain is removed, so the residuals fall into
    as many classes as there are vertices per cell; the lattice vectors are the two shortest independent
    displacements between vertices of one class (Lagrange-Gauss reduced).
    """
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components
    from scipy.spatial import cKDTree

    n = len(xy)
    tol = CLASS_FRACTION * np.sqrt(7.69 / max(n, 1))
    tree = cKDTree(res)
    nn, _ = tree.query(res, k=min(2, n))
    paired = float(np.mean(nn[:, -1] < tol)) if n >= 2 else 0.0
    pairs = tree.query_pairs(tol, output_type="ndarray")
    graph = coo_matrix((np.ones(len(pairs)), (pairs[:, 0], pairs[:, 1])), shape=(n, n))
    n_classes, label = connected_components(graph, directed=False)
    out = {"periodic": False, "n_classes": int(n_classes), "n_vertices": int(n), "fraction_paired": paired}
    if n < 100 or paired < PERIODIC_FRACTION:
        return out
    # displacements between vertices of one class (pairs closer than tol in perpendicular space)
    d = xy[pairs[:, 1]] - xy[pairs[:, 0]]
    length = np.hypot(d[:, 0], d[:, 1])
    d, length = d[length > 0.5 * edge], length[length > 0.5 * edge]
    if len(d) < 2:
        out["periodic"] = True
        return out
    a = d[np.argmin(length)]
    cross = np.abs(a[0] * d[:, 1] - a[1] * d[:, 0]) / (np.hypot(*a) * length)
    if not np.any(cross > 0.2):
        out["periodic"] = True
        return out
    b = d[cross > 0.2][np.argmin(length[cross > 0.2])]
    for _ in range(10):  # Lagrange-Gauss reduction of the basis (a, b)
        if b @ b < a @ a:
            a, b = b, a
        m = np.round((a @ b) / (a @ a))
        if m == 0:
            break
        b = b - m * a
    out.update(periodic=True, lattice_px=[a.tolist(), b.tolist()],
               cell_area_px2=float(abs(a[0] * b[1] - a[1] * b[0])))
    return out


def _bootstrap(xpar: np.ndarray, xperp: np.ndarray, n_boot: int, gen: np.random.Generator) -> np.ndarray:
    """Slopes W of ``n_boot`` resamples (with replacement), all at once through weighted normal equations."""
    if n_boot <= 0:
        return np.zeros((0, 2, 2))
    n = len(xpar)
    a = np.hstack([xpar - xpar.mean(axis=0), np.ones((n, 1))])
    counts = gen.multinomial(n, np.full(n, 1.0 / n), size=n_boot).astype(np.float64)
    ata = (counts @ (a[:, :, None] * a[:, None, :]).reshape(n, 9)).reshape(n_boot, 3, 3)
    atb = (counts @ (a[:, :, None] * xperp[:, None, :]).reshape(n, 6)).reshape(n_boot, 3, 2)
    sol = np.linalg.solve(ata, atb)  # (n_boot, 3, 2): rows x, y, 1
    return np.transpose(sol[:, :2, :], (0, 2, 1))


def _fit(xpar: np.ndarray, xperp: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    a = np.hstack([xpar, np.ones((len(xpar), 1))])
    sol, *_ = np.linalg.lstsq(a, xperp, rcond=None)
    return sol[:2].T, sol[2]


def phason_from_network(
    network: pd.DataFrame,
    motifs: pd.DataFrame,
    *,
    pixel_size_nm: float | None = None,
    orientation_deg: float | None = None,
    edge_px: float | None = None,
    n_boot: int = 200,
    rng: np.random.Generator | int | None = 0,
) -> tuple[pd.DataFrame, dict]:
    """Linear phason strain and local phason field from the cluster network (real-space side).

    Parameters
    ----------
    network : DataFrame
        ``_schema.NETWORK`` table (``motif_a``, ``motif_b``).
    motifs : DataFrame
        ``_schema.MOTIFS`` table (``motif_id``, ``centre_x_px``, ``centre_y_px``).
    pixel_size_nm : float, optional
        For the nm columns.
    orientation_deg, edge_px : float, optional
        As for :func:`lift_tiling` (edge in px).
    n_boot : int
        Bootstrap resamples of the vertices for the uncertainties.
    rng : Generator or int seed
        For the bootstrap.

    Returns
    -------
    table : DataFrame
        ``_schema.PHASON_MAP``: one row per lifted vertex.
    info : dict
        JSON-safe: ``strain_matrix`` (2x2, d x_perp / d x_par), ``strain_matrix_se``, ``singular_values``
        (descending, corrected for the noise bias, :func:`strain_summary`), ``singular_values_plain`` (of the
        matrix itself), ``singular_values_se``, ``zero_chi2``, ``zero_p``, ``significant`` (the strain differs
        from none at 3 sigma), ``n_used``, ``n_flips``, ``residual_rms`` (in units of L),
        ``orientation_deg``, ``edge_px``, lift counts, ``notes``.

    Examples
    --------
    >>> from tenfold.analysis._pentagrid import pentagrid_tiling
    >>> t = pentagrid_tiling(12.0, rng=3, phason_strain=[[0.04, 0.0], [0.0, 0.03]]).scaled(40.0)
    >>> net = pd.DataFrame({"motif_a": t.edges[:, 0], "motif_b": t.edges[:, 1]})
    >>> mot = pd.DataFrame({"motif_id": np.arange(len(t.vertices)), "centre_x_px": t.vertices[:, 0],
    ...                     "centre_y_px": t.vertices[:, 1]})
    >>> _, info = phason_from_network(net, mot, orientation_deg=0.0, n_boot=20)
    >>> np.round(info["singular_values"], 2).tolist()
    [0.04, 0.03]
    """
    info: dict = {"ok": False, "n_used": 0, "notes": []}
    if network is None or motifs is None or len(network) < 4:
        info["notes"].append("phason (real space): no cluster network to lift")
        return empty_table(PHASON_MAP), info
    if n_boot < 0:
        raise TenfoldInputError(f"phason: n_boot must be >= 0, got {n_boot}")
    ids = motifs["motif_id"].to_numpy()
    lut = pd.Series(np.arange(len(ids)), index=ids)
    e = np.stack([lut.reindex(network["motif_a"]).to_numpy(), lut.reindex(network["motif_b"]).to_numpy()], axis=1)
    e = e[np.isfinite(e).all(axis=1)].astype(np.int64)
    xy = motifs[["centre_x_px", "centre_y_px"]].to_numpy(dtype=float)
    index, lifted, linfo = lift_tiling(xy, e, edge=edge_px, orientation_deg=orientation_deg)
    info.update(linfo)
    info["edge_px"] = info.pop("edge")
    n = int(lifted.sum())
    if n < 10:
        info["notes"].append(f"phason (real space): only {n} vertices could be lifted; need 10")
        return empty_table(PHASON_MAP), info
    edge = info["edge_px"]
    xpar = xy[lifted]
    xperp = edge * (index[lifted] @ E_PERP)
    w, c = _fit(xpar, xperp)
    res = xperp - xpar @ w.T - c
    k_used = index[lifted]
    outside, window = _flip_sites(k_used, res / edge)
    # refit without the flip sites (their jumps are not part of the linear strain), then re-test
    if outside.any() and (~outside).sum() >= 10:
        w, c = _fit(xpar[~outside], xperp[~outside])
        res = xperp - xpar @ w.T - c
        outside, window = _flip_sites(k_used, res / edge)
    inside = ~outside
    info["window"] = window
    gen = np.random.default_rng(rng)
    use = np.flatnonzero(inside) if inside.sum() >= 10 else np.arange(n)
    boot_w = _bootstrap(xpar[use], xperp[use], n_boot, gen)
    sv = np.linalg.svd(w, compute_uv=False)
    boot_sv = np.linalg.svd(boot_w, compute_uv=False) if n_boot else np.zeros((0, 2))
    # finite-field floor: rms per element of the slope over ideal pentagrid patches, 0.51 (L / half field)^2
    # (Tenfold's own simulation, 30 tilings each at 5-40 edges; see docs/fourier.md)
    half_field = 0.25 * float(np.sum(np.ptp(xpar, axis=0))) / edge
    floor = 0.51 / max(half_field, 1.0) ** 2
    boot_se = boot_w.std(axis=0) if n_boot > 1 else np.full((2, 2), np.nan)
    boot_sv_se = boot_sv.std(axis=0) if n_boot > 1 else np.full(2, np.nan)
    # local gradient of the residual field: least-squares plane through each vertex's lifted neighbours
    ps = pixel_size_nm
    tab = pd.DataFrame({
        "motif_id": ids[lifted],
        "x_px": xpar[:, 0], "y_px": xpar[:, 1],
        "x_nm": xpar[:, 0] * ps if ps else np.nan, "y_nm": xpar[:, 1] * ps if ps else np.nan,
    })
    for j in range(5):
        tab[f"k{j}"] = index[lifted, j]
    tab["x_perp"] = xperp[:, 0] / edge
    tab["y_perp"] = xperp[:, 1] / edge
    tab["dx_perp"] = res[:, 0] / edge
    tab["dy_perp"] = res[:, 1] / edge
    tab["flip"] = ~inside
    ux, uy = _smooth_field(xpar, res / edge, inside, SMOOTH_EDGES * edge)
    tab["phason_ux"] = ux
    tab["phason_uy"] = uy
    w_se = np.fmax(boot_se, floor)
    info.update({
        "ok": True,
        "strain_matrix": w.tolist(),
        "strain_matrix_se": w_se.tolist(),
        **strain_summary(w, w_se),
        "singular_values_se": np.fmax(boot_sv_se, floor).tolist(),
        "finite_field_floor": floor,
        "n_used": int(len(use)),
        "n_flips": int((~inside).sum()),
        "residual_rms": float(np.sqrt(np.mean(np.sum(res[inside] ** 2, axis=1))) / edge) if inside.any() else None,
        "flip_margin": FLIP_MARGIN,
    })
    approx = _approximant(xpar, res / edge, edge)
    if approx["periodic"] and "lattice_px" in approx:
        approx["lattice_nm"] = (np.asarray(approx["lattice_px"]) * ps).tolist() if ps else None
        a, b = (np.asarray(v) for v in approx["lattice_px"])
        info["notes"].append(
            f"phason (real space): the tiling is periodic, a rational approximant: its {len(tab)} vertices fall "
            f"into {approx['n_classes']} classes repeated on the lattice a = ({a[0]:.1f}, {a[1]:.1f}) px, "
            f"b = ({b[0]:.1f}, {b[1]:.1f}) px; the linear phason strain (singular values {sv[0]:.4f}, {sv[1]:.4f})"
            " is the one that locks the tiling to this lattice, not disorder")
    info["approximant"] = approx
    if info["n_inconsistent_edges"]:
        info["notes"].append(
            f"phason (real space): {info['n_inconsistent_edges']} network edges disagree with the lifted integer "
            "coordinates (mislinked clusters or a tiling defect); the fit uses the least-squares lift"
        )
    return conform(tab, PHASON_MAP), info


def phason_map_figure(result):
    """Local phason displacement over the field of view and the vertices in perpendicular space.

    Left: the smoothed residual perpendicular displacement (``phason_ux``, ``phason_uy``; the linear strain
    removed) as arrows coloured by magnitude, its gradient magnitude as the background, flip sites circled in
    red. Right: every vertex's residual perpendicular position (the linear strain removed), which for an ideal
    tiling fills the acceptance windows, flip sites in red.

    Parameters
    ----------
    result : AnalysisResult
        Reads ``tables['phason_map']`` and ``summary['phason']``.

    Returns
    -------
    matplotlib.figure.Figure or None
        None without a lifted tiling.
    """
    tab = result.tables.get("phason_map")
    if tab is None or len(tab) == 0:
        return None
    from matplotlib.figure import Figure
    from matplotlib.tri import LinearTriInterpolator, Triangulation

    ps = getattr(getattr(result, "meta", None), "pixel_size_nm", None)
    s = ps if ps else 1.0
    unit = "nm" if ps else "px"
    x, y = tab["x_px"].to_numpy() * s, tab["y_px"].to_numpy() * s
    ux, uy = tab["phason_ux"].to_numpy(), tab["phason_uy"].to_numpy()
    fl = tab["flip"].to_numpy(dtype=bool)
    fig = Figure(figsize=(12, 5.4), dpi=120, layout="constrained")
    ax1, ax2 = fig.subplots(1, 2, width_ratios=[1.25, 1])
    gx, gy = np.meshgrid(np.linspace(x.min(), x.max(), 80), np.linspace(y.min(), y.max(), 80))
    ok = np.isfinite(ux)
    if ok.sum() >= 4:
        # linear interpolation on the Delaunay triangulation (what scipy's griddata does), with matplotlib's
        # trapezoid-map point location: scipy's walk took from milliseconds to seconds on these grids
        tri = Triangulation(x[ok], y[ok])
        fx, fy = (np.ma.filled(LinearTriInterpolator(tri, u[ok])(gx, gy).astype(float), np.nan) for u in (ux, uy))
        step = (gx[0, 1] - gx[0, 0], gy[1, 0] - gy[0, 0])
        grad = np.sqrt(sum(np.gradient(f, step[1], step[0])[k] ** 2 for f in (fx, fy) for k in (0, 1)))
        im = ax1.imshow(grad, extent=(gx.min(), gx.max(), gy.max(), gy.min()), cmap="Greys", alpha=0.6)
        fig.colorbar(im, ax=ax1, shrink=0.7, label=f"|grad local phason field| (L per {unit})")
    q = ax1.quiver(x, y, ux, uy, np.hypot(ux, uy), cmap="viridis", angles="xy", width=0.003)
    fig.colorbar(q, ax=ax1, shrink=0.7, label="|local perpendicular displacement| / L")
    if fl.any():
        ax1.scatter(x[fl], y[fl], s=70, facecolors="none", edgecolors="#d62728", linewidths=1.4, label="flip site")
        ax1.legend(loc="upper right", fontsize=7)
    ax1.set_aspect("equal")
    ax1.set(xlim=(x.min(), x.max()), ylim=(y.max(), y.min()), xlabel=f"x ({unit})", ylabel=f"y ({unit})",
            )
    ax1.set_title(f"local phason field (smoothed over {SMOOTH_EDGES:g} L, linear strain removed)", fontsize=9)
    ax2.scatter(tab["dx_perp"][~fl], tab["dy_perp"][~fl], s=6, c="#1f5fa8", alpha=0.6, label="vertex")
    if fl.any():
        ax2.scatter(tab["dx_perp"][fl], tab["dy_perp"][fl], s=30, c="#d62728", label="flip site")
    ang = np.linspace(0, 2 * np.pi, 11)  # vertices of the projected 5-cube at 36 k deg
    ax2.plot(TAU * np.cos(ang), TAU * np.sin(ang), color="#888888", lw=0.8, label="5-cube projection")
    ax2.set_aspect("equal")
    ax2.legend(loc="upper right", fontsize=7)
    ph = (result.summary.get("phason") or {}).get("real_space") or {}
    sv = ph.get("singular_values")
    title = "perpendicular positions, linear strain removed"
    if sv:
        se = ph.get("singular_values_se") or [np.nan, np.nan]
        title += f"\nstrain singular values {sv[0]:.4f} +- {se[0]:.4f}, {sv[1]:.4f} +- {se[1]:.4f}"
    ax2.set(xlabel="x_perp / L", ylabel="y_perp / L")
    ax2.set_title(title, fontsize=9)
    return fig


def phason_stage(result, *, rng=0) -> None:
    """Pipeline glue: the real-space phason analysis of ``result``'s network (fills ``tables['phason_map']`` and
    ``summary['phason']['real_space']``; keeps a ``fourier`` section already there)."""
    ps = result.meta.pixel_size_nm
    tab, info = phason_from_network(result.tables.get("network"), result.tables.get("motifs"), pixel_size_nm=ps,
                                    edge_px=(result.summary.get("tiling") or {}).get("edge_px"), rng=rng)
    result.tables["phason_map"] = tab
    ph = result.summary.setdefault("phason", {})
    info["method"] = "lift of the cluster tiling, least squares x_perp = W x_par + c, bootstrap over vertices"
    ph["real_space"] = info
    f_info = result.summary.get("fourier")
    if f_info:  # a re-run from edited columns keeps the Fourier side of the earlier run
        ph["fourier"] = fourier_phason_summary(f_info)
        _compare_phason(ph)
    else:
        ph.setdefault("fourier", {"ok": False, "n_used": 0, "reason": "Fourier stage not run"})
    notes = result.summary.setdefault("notes", [])
    for n in info.get("notes", []):
        if n not in notes:
            notes.append(n)
    if info.get("ok") and info.get("n_flips"):
        notes.append(f"phason: {info['n_flips']} of {info['n_lifted']} tiling vertices lie outside the ideal "
                     "acceptance window (phason-flip sites, marked in phason_map.csv)")
