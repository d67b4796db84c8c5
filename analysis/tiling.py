"""The cluster network and its tiling: ring centres linked at the tiling edge, faces enumerated and classified.

Ring-motif centres are the vertices. Two centres are linked when their distance is within ``edge_tolerance`` of
the tiling edge length. The edge is given or chosen from the centre pair distribution: in a Penrose vertex set the
shortest strong distance is NOT the edge but the short diagonal of the thin rhombus, edge / tau, followed by the
edge, the thick rhombus' short diagonal 2 sin 36 edge and its long diagonal tau edge. Linking at each of the first
few peaks gives a network whose mean degree and number of crossing links tell them apart: only the true edge gives
a planar network with mean degree close to 4 (Euler's formula for a tiling by quadrilaterals: E = 2V, so degree
4), while the short diagonal gives degree 2 n_thin / V ~ 0.76 and the diagonals of thick rhombi cross one another.

Faces come from a half-edge structure: the half-edges out of every vertex are sorted by angle once, and the next
half-edge of a face is the one just before the twin in that order (all index arithmetic, no per-vertex loop). The
face cycles of that permutation are its connected components. Faces are classified by their number of sides and
their sorted vertex angles against templates (within 12 deg): thin rhombus 36/144, thick rhombus 72/108, pentagon
5 x 108, hexagon 72 72 144 144 144 144, boat 36 36 36 144 144 252 252, star 5 x 36 + 5 x 252; the rest is 'other'.
The outer face(s) (orientation opposite to the interior faces) are excluded.

References
----------
N. G. de Bruijn, Indag. Math. 84 (1981) 39-66 (pentagrid; thick : thin = tau). R. Penrose, Bull. Inst. Math.
Appl. 10 (1974) 266 (tilings). M. de Berg et al., "Computational Geometry", 3rd ed., Springer (2008), ch. 2
(doubly-connected edge lists).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy.spatial import cKDTree

from ._errors import TenfoldInputError
from ._lengths import check_pixel_size
from ._progress import ProgressCallback, report
from ._renamed import renamed_keywords
from ._schema import NETWORK, TILES, conform, empty_table

__all__ = ["TAU", "TILE_TYPES", "TILE_COLOURS", "build_network", "edge_phase", "orientation_domains", "faces",
           "tiling_figure"]

TAU = (1.0 + np.sqrt(5.0)) / 2.0
TILE_TYPES = ("thick_rhombus", "thin_rhombus", "pentagon", "star", "boat", "hexagon", "other")
#: Our own colour-blind-safe palette (distinct in lightness and hue under deuter-/protanopia).
TILE_COLOURS = {"thick_rhombus": "#1f5fa8", "thin_rhombus": "#e8962e", "pentagon": "#2f9e83", "star": "#c0507a",
                "boat": "#8e6bbf", "hexagon": "#6b6b6b", "other": "#bdbdbd"}
_TEMPLATES = {  # sides -> [(name, sorted interior angles in deg)]
    4: [("thin_rhombus", (36, 36, 144, 144)), ("thick_rhombus", (72, 72, 108, 108))],
    5: [("pentagon", (108,) * 5)],
    6: [("hexagon", (72, 72, 144, 144, 144, 144))],
    7: [("boat", (36, 36, 36, 144, 144, 252, 252))],
    10: [("star", (36,) * 5 + (252,) * 5)],
}
_ANGLE_TOL_DEG = 12.0


# --------------------------------------------------------------------------------------------- orientation
def orientation_domains(orientation_deg, *, period_deg: float = 36.0, bin_deg: float = 1.0,
                        min_fraction: float = 0.05) -> list[dict]:
    """Cluster motif orientations (mod ``period_deg``) into domains.

    A circular histogram (``bin_deg`` bins, smoothed by a 2-bin Gaussian) is searched for local maxima at least 10 %
    of the highest; each orientation joins the nearest maximum (circular distance). Domains holding less than
    ``min_fraction`` are merged into the nearest larger one.

    Parameters
    ----------
    orientation_deg : array
        Motif orientations in deg.
    period_deg : float
        Symmetry period (360 / n; 36 deg for ten-membered rings).

    Returns
    -------
    list of dict
        One per domain, largest first: 'orientation_deg' (circular mean), 'fraction', 'n', 'spread_deg'
        (circular standard deviation).
    """
    a = np.asarray(orientation_deg, dtype=float)
    a = a[np.isfinite(a)]
    if len(a) == 0:
        return []
    nb = max(int(round(period_deg / bin_deg)), 4)
    ph = np.mod(a, period_deg) / period_deg * 2 * np.pi
    hist = np.bincount(np.minimum((ph / (2 * np.pi) * nb).astype(int), nb - 1), minlength=nb).astype(float)
    k = np.arange(-6, 7)
    w = np.exp(-0.5 * (k / 2.0) ** 2)
    sm = sum(wi * np.roll(hist, ki) for ki, wi in zip(k, w))
    peak = (sm >= np.roll(sm, 1)) & (sm > np.roll(sm, -1)) & (sm >= 0.1 * sm.max())
    centres = (np.flatnonzero(peak) + 0.5) / nb * 2 * np.pi
    if len(centres) == 0:
        centres = np.array([np.angle(np.exp(1j * ph).mean()) % (2 * np.pi)])
    for _ in range(len(centres)):
        lab = np.argmin(np.abs(np.angle(np.exp(1j * (ph[:, None] - centres[None, :])))), axis=1)
        frac = np.bincount(lab, minlength=len(centres)) / len(ph)
        small = frac < min_fraction
        if not small.any() or small.all():
            break
        centres = centres[~small]
    lab = np.argmin(np.abs(np.angle(np.exp(1j * (ph[:, None] - centres[None, :])))), axis=1)
    out = []
    for d in range(len(centres)):  # a handful of domains
        z = np.exp(1j * ph[lab == d])
        if len(z) == 0:
            continue
        mean = np.angle(z.mean()) % (2 * np.pi)
        rbar = min(abs(z.mean()), 1.0)
        spread = np.sqrt(-2 * np.log(max(rbar, 1e-12))) / (2 * np.pi) * period_deg
        out.append({"orientation_deg": float(mean / (2 * np.pi) * period_deg), "fraction": float(len(z) / len(ph)),
                    "n": int(len(z)), "spread_deg": float(spread)})
    return sorted(out, key=lambda d: -d["fraction"])


# --------------------------------------------------------------------------------------------- planar faces
def faces(xy: np.ndarray, edges: np.ndarray) -> dict:
    """Faces of a planar straight-line graph from its half-edge structure.

    Parameters
    ----------
    xy : (V, 2) float array
        Vertex positions.
    edges : (E, 2) int array
        Undirected edges (vertex index pairs).

    Returns
    -------
    dict
        'face' (2E,) face label per half-edge (half-edge 2e runs a -> b of edge e, 2e + 1 back), 'next' (2E,),
        'n_faces', 'sides' (F,), 'area' (F,) signed area, 'interior' (F,) bool, 'angles_deg' (2E,) interior
        angle at the head of each half-edge, 'origin' (2E,).
    """
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    e = np.asarray(edges, dtype=np.int64).reshape(-1, 2)
    n_h = 2 * len(e)
    org = np.empty(n_h, dtype=np.int64)
    dst = np.empty(n_h, dtype=np.int64)
    org[0::2], dst[0::2] = e[:, 0], e[:, 1]
    org[1::2], dst[1::2] = e[:, 1], e[:, 0]
    if n_h == 0:
        z = np.zeros(0)
        return {"face": np.zeros(0, np.int64), "next": np.zeros(0, np.int64), "n_faces": 0, "sides": z, "area": z,
                "interior": np.zeros(0, bool), "angles_deg": z, "origin": org}
    ang = np.arctan2(xy[dst, 1] - xy[org, 1], xy[dst, 0] - xy[org, 0])
    order = np.lexsort((ang, org))
    pos = np.empty(n_h, dtype=np.int64)
    pos[order] = np.arange(n_h)
    cnt = np.bincount(org, minlength=len(xy))
    start = np.concatenate([[0], np.cumsum(cnt)[:-1]])
    twin = np.arange(n_h) ^ 1
    tw = twin
    v = org[tw]  # = dst of h
    p = pos[tw] - start[v]
    prev = start[v] + np.mod(p - 1, cnt[v])
    nxt = order[prev]
    g = coo_matrix((np.ones(n_h), (np.arange(n_h), nxt)), shape=(n_h, n_h))
    n_f, face = connected_components(g, directed=True, connection="weak")
    sides = np.bincount(face, minlength=n_f)
    cross = xy[org, 0] * xy[dst, 1] - xy[dst, 0] * xy[org, 1]
    area = 0.5 * np.bincount(face, weights=cross, minlength=n_f)
    turn = np.angle(np.exp(1j * (ang[nxt] - ang)))
    interior_angle = np.rad2deg(np.pi - turn)
    # With next = the half-edge before the twin in ascending angle, every face lies to the left of its half-edges:
    # bounded faces come out with positive shoelace area, the outer face of every component with negative area
    # (in any frame, since angles and areas use the same coordinates).
    interior = (area > 0) & (sides >= 3)
    return {"face": face, "next": nxt, "n_faces": int(n_f), "sides": sides, "area": area, "interior": interior,
            "angles_deg": interior_angle, "origin": org}


def _classify(fc: dict) -> np.ndarray:
    """Tile type per face from its side count and sorted vertex angles (templates within 12 deg)."""
    n_f = fc["n_faces"]
    kind = np.full(n_f, "other", dtype=object)
    if n_f == 0:
        return kind
    face, ang = fc["face"], fc["angles_deg"]
    order = np.argsort(face, kind="stable")
    f_sorted = face[order]
    sides = fc["sides"]
    start = np.concatenate([[0], np.cumsum(sides)[:-1]])
    for s, templates in _TEMPLATES.items():  # a few side counts
        fid = np.flatnonzero((sides == s) & fc["interior"])
        if len(fid) == 0:
            continue
        idx = start[fid][:, None] + np.arange(s)[None, :]
        a = np.sort(ang[order][idx], axis=1)
        assert (f_sorted[idx] == fid[:, None]).all()
        for name, tmpl in templates:
            hit = np.abs(a - np.asarray(tmpl, float)[None, :]).max(axis=1) <= _ANGLE_TOL_DEG
            kind[fid[hit]] = name
    return kind


# --------------------------------------------------------------------------------------------- linking
def _links(xy: np.ndarray, edge: float, tol: float) -> np.ndarray:
    pairs = cKDTree(xy).query_pairs(edge * (1 + tol), output_type="ndarray")
    if len(pairs) == 0:
        return np.zeros((0, 2), dtype=np.int64)
    d = np.hypot(*(xy[pairs[:, 0]] - xy[pairs[:, 1]]).T)
    return pairs[d >= edge * (1 - tol)].astype(np.int64)


def _crossings(xy: np.ndarray, e: np.ndarray, edge: float) -> np.ndarray:
    """(K, 2) pairs of edge indices whose segments properly cross (edges sharing a vertex excluded)."""
    if len(e) < 2:
        return np.zeros((0, 2), dtype=np.int64)
    mid = 0.5 * (xy[e[:, 0]] + xy[e[:, 1]])
    pr = cKDTree(mid).query_pairs(edge * 1.2, output_type="ndarray")
    if len(pr) == 0:
        return np.zeros((0, 2), dtype=np.int64)
    a, b = e[pr[:, 0]], e[pr[:, 1]]
    share = (a[:, :1] == b).any(axis=1) | (a[:, 1:] == b).any(axis=1)
    pr, a, b = pr[~share], a[~share], b[~share]
    p1, p2, q1, q2 = xy[a[:, 0]], xy[a[:, 1]], xy[b[:, 0]], xy[b[:, 1]]

    def orient(p, q, r):
        return np.sign((q[:, 0] - p[:, 0]) * (r[:, 1] - p[:, 1]) - (q[:, 1] - p[:, 1]) * (r[:, 0] - p[:, 0]))

    hit = (orient(p1, p2, q1) * orient(p1, p2, q2) < 0) & (orient(q1, q2, p1) * orient(q1, q2, p2) < 0)
    return pr[hit].astype(np.int64)


def _choose_edge(xy: np.ndarray, tol: float) -> tuple[float | None, dict]:
    """Pick the tiling edge among the first centre pair-distance peaks (degree ~4, planar)."""
    from .ladder import locate_peaks, pair_distribution

    d_nn = float(np.median(cKDTree(xy).query(xy, k=2)[0][:, 1]))
    curve = pair_distribution(xy[:, 0], xy[:, 1], r_max_px=3.5 * d_nn, bin_px=d_nn / 60.0)
    pk = locate_peaks(curve)
    pk = pk[pk["distance_px"] > 0.5 * d_nn].head(5)
    cands = []
    for p in pk["distance_px"].to_numpy():  # at most five candidate peaks
        e = _links(xy, p, tol)
        deg = 2 * len(e) / len(xy)
        cr = _crossings(xy, e, p)
        frac = len(np.unique(cr)) / max(len(e), 1)
        cands.append({"distance_px": float(p), "mean_degree": float(deg), "crossing_fraction": float(frac),
                      "cost": float(abs(deg - 4.0) + 10.0 * frac)})
    info = {"method": "centre pair-distribution peaks linked in turn; chosen: planar (few crossings) with mean "
                      "degree closest to 4", "candidates": cands, "nearest_neighbour_px": d_nn}
    if not cands:
        return None, info
    best = min(cands, key=lambda c: c["cost"])
    return best["distance_px"], info


def edge_phase(xy: np.ndarray, *, tol: float = 0.1) -> tuple[float | None, str]:
    """Direction of the tiling edges, mod 36 deg, measured on a point set of cluster centres.

    The edge is chosen as in :func:`build_network` (centre pair-distance peaks, planar, degree ~4), the centres are
    linked at it and the ten-fold phase of the link directions is returned with a sentence saying how it was
    found; (None, why) when there are too few centres or no edge.
    """
    xy = np.asarray(xy, dtype=float).reshape(-1, 2)
    xy = xy[np.isfinite(xy).all(axis=1)]
    if len(xy) < 4:
        return None, f"too few cluster centres ({len(xy)}) for tiling edge directions"
    edge, _ = _choose_edge(xy, tol)
    if edge is None:
        return None, "no peak in the centre pair distribution to link at"
    e = _links(xy, edge, tol)
    if len(e) < 2:
        return None, f"fewer than two centre pairs at the edge length {edge:.4g} px"
    vec = xy[e[:, 1]] - xy[e[:, 0]]
    ph = _edge_orientation(np.rad2deg(np.arctan2(vec[:, 1], vec[:, 0])))["phase_deg"]
    return float(ph), (f"measured: ten-fold phase of {len(e)} links between {len(xy)} primary cluster centres at "
                       f"the tiling edge {edge:.4g} px")


# --------------------------------------------------------------------------------------------- public
@renamed_keywords(edge_px="tiling_edge_px")
def build_network(
    motifs: pd.DataFrame,
    *,
    tiling_edge_px: float | None = None,
    edge_tolerance: float = 0.1,
    pixel_size_nm: float | None = None,
    progress: ProgressCallback | None = None,
    vertex_kind: str = "ring",
) -> tuple[pd.DataFrame, pd.DataFrame, dict]:
    """Link ring-motif centres into the cluster network, enumerate its faces and classify the tiles.

    Parameters
    ----------
    motifs : DataFrame
        Motifs table (``_schema.MOTIFS``); rows whose ``kind`` starts with ``vertex_kind`` ('ring' by default;
        'pentagon' for free-standing pentagonal clusters) are the vertices.
    tiling_edge_px : float, optional
        Tiling edge length in px; default automatic (see the module notes; the info says which peak and why).
        ``edge_px`` is a deprecated alias.
    edge_tolerance : float
        Relative tolerance on the edge length for a link (0 < tol < 0.5).
    pixel_size_nm : float, optional
        Pixel size for ``length_nm``; None leaves it NaN.
    progress : callable, optional
        ``progress(fraction, message)``; returning False stops the run.

    Returns
    -------
    network : DataFrame
        ``_schema.NETWORK``: edge_id, motif_a, motif_b, length_px, length_nm, angle_deg (in [0, 180)), region,
        tile_left, tile_right (tile type of the face on each side, 'outer' for the outer face).
    tiles : DataFrame
        ``_schema.TILES``: tile, count, fraction (of all interior faces of that region), region.
    info : dict
        JSON-safe: 'edge_px', 'edge_nm', 'edge_source', 'edge_choice', 'n_vertices', 'n_edges', 'tile_counts',
        'thick_thin_ratio', 'edge_length_px' (mean, std), 'edge_orientation' (10 peak angles, share within
        +-5 deg, 5-deg histogram), 'orientation_domains', 'crossings_removed', 'message' when empty.

    References
    ----------
    N. G. de Bruijn, Indag. Math. 84 (1981) 39-66; R. Penrose, Bull. Inst. Math. Appl. 10 (1974) 266.
    """
    if not isinstance(motifs, pd.DataFrame):
        raise TenfoldInputError(f"build_network: motifs must be a pandas DataFrame, got {type(motifs).__name__}")
    edge_px = tiling_edge_px
    if edge_px is not None and not (np.isfinite(edge_px) and edge_px > 0):
        raise TenfoldInputError(f"build_network: tiling_edge_px={edge_px!r} must be a positive number of pixels (or None)")
    if not (0 < edge_tolerance < 0.5):
        raise TenfoldInputError(f"build_network: edge_tolerance={edge_tolerance!r} must lie in (0, 0.5)")
    check_pixel_size(pixel_size_nm, plausible=False)
    info: dict = {"calibrated": pixel_size_nm is not None, "edge_tolerance": float(edge_tolerance),
                  "tile_counts": {t: 0 for t in TILE_TYPES}, "thick_thin_ratio": None}
    need = [c for c in ("motif_id", "kind", "centre_x_px", "centre_y_px") if c not in motifs.columns]
    if need:
        raise TenfoldInputError(f"build_network: motifs table lacks {need}; pass the table from find_motifs")
    rings = motifs[motifs["kind"].astype(str).str.startswith(vertex_kind)]
    if vertex_kind == "pentagon" and "parent_ring" in rings:
        rings = rings[rings["parent_ring"] < 0]  # pentagons inside a ring are not clusters of their own
    if "primary" in rings and rings["primary"].any():
        rings = rings[rings["primary"].astype(bool)]  # one shell per cluster: other shells share its centres
    xy = rings[["centre_x_px", "centre_y_px"]].to_numpy(dtype=float)
    ok = np.isfinite(xy).all(axis=1)
    rings, xy = rings[ok], xy[ok]
    mid = rings["motif_id"].to_numpy(dtype=np.int64)
    reg = rings["region"].to_numpy(dtype=np.int64) if "region" in rings else np.zeros(len(rings), np.int64)
    info["n_vertices"] = int(len(xy))
    if "orientation_deg" in rings and len(rings):
        order = int(rings["order"].iloc[0]) if "order" in rings else 10
        info["orientation_domains"] = orientation_domains(rings["orientation_deg"].to_numpy(),
                                                          period_deg=360.0 / order)
    else:
        info["orientation_domains"] = []

    def _empty(msg):
        info["message"] = msg
        info.setdefault("edge_px", float(edge_px) if edge_px else None)
        info["n_edges"] = 0
        net = empty_table(NETWORK)
        return net, empty_table(TILES), info

    if len(xy) < 4:
        return _empty(f"too few {vertex_kind} centres ({len(xy)}) for a cluster network (need at least 4)")
    if np.linalg.matrix_rank(xy - xy.mean(axis=0), tol=1e-9 * max(np.ptp(xy), 1.0)) < 2:
        return _empty("ring centres are collinear: no planar network")
    report(progress, 0.0, "tiling: edge length")
    if edge_px is None:
        edge, choice = _choose_edge(xy, edge_tolerance)
        info["edge_choice"] = choice
        if edge is None:
            return _empty("no peak in the centre pair distribution to link at")
        info["edge_source"] = "automatic"
    else:
        edge = float(edge_px)
        info["edge_source"] = "given"
    info["edge_px"] = float(edge)
    info["edge_nm"] = float(edge * pixel_size_nm) if pixel_size_nm else None

    report(progress, 0.3, "tiling: links and crossings")
    e = _links(xy, edge, edge_tolerance)
    if len(e) == 0:
        return _empty(f"no centre pairs at the edge length {edge:.4g} px (tolerance {edge_tolerance:.2f})")
    cr = _crossings(xy, e, edge)
    removed = 0
    if len(cr):
        # Keep the link closer to the edge length in every crossing pair.
        dev = np.abs(np.hypot(*(xy[e[:, 0]] - xy[e[:, 1]]).T) - edge)
        worse = np.where(dev[cr[:, 0]] >= dev[cr[:, 1]], cr[:, 0], cr[:, 1])
        keep = np.ones(len(e), bool)
        keep[worse] = False
        e = e[keep]
        removed = int((~keep).sum())
    info["crossings_removed"] = removed

    report(progress, 0.5, "tiling: faces")
    fc = faces(xy, e)
    kind = _classify(fc)
    face_of = fc["face"]
    left = np.where(fc["interior"][face_of[0::2]], kind[face_of[0::2]], "outer")
    right = np.where(fc["interior"][face_of[1::2]], kind[face_of[1::2]], "outer")

    vec = xy[e[:, 1]] - xy[e[:, 0]]
    length = np.hypot(vec[:, 0], vec[:, 1])
    ang = np.rad2deg(np.arctan2(vec[:, 1], vec[:, 0]))
    scale = pixel_size_nm if pixel_size_nm else np.nan
    net = pd.DataFrame({"edge_id": np.arange(len(e)), "motif_a": mid[e[:, 0]], "motif_b": mid[e[:, 1]],
                        "length_px": length, "length_nm": length * scale, "angle_deg": np.mod(ang, 180.0),
                        "region": reg[e[:, 0]], "tile_left": left.astype(object), "tile_right": right.astype(object)})
    net = conform(net, NETWORK)

    interior = np.flatnonzero(fc["interior"])
    # Region of a face: that of its first vertex (lowest half-edge index of the face).
    first_h = np.full(fc["n_faces"], -1, dtype=np.int64)
    hs = np.arange(len(face_of))[::-1]
    first_h[face_of[hs]] = hs
    f_reg = reg[fc["origin"][first_h[interior]]]
    tdf = pd.DataFrame({"tile": kind[interior], "region": f_reg})
    counts = tdf.groupby(["region", "tile"]).size().rename("count").reset_index()
    tot = counts.groupby("region")["count"].transform("sum")
    counts["fraction"] = counts["count"] / tot
    tiles = conform(counts[["tile", "count", "fraction", "region"]], TILES)

    tc = {t: int((kind[interior] == t).sum()) for t in TILE_TYPES}
    info["tile_counts"] = tc
    info["n_faces"] = int(len(interior))
    info["thick_thin_ratio"] = float(tc["thick_rhombus"] / tc["thin_rhombus"]) if tc["thin_rhombus"] else None
    info["n_edges"] = int(len(e))
    info["mean_degree"] = float(2 * len(e) / len(xy))
    info["edge_length_px"] = {"mean": float(length.mean()), "std": float(length.std())}
    info["edge_length_nm"] = ({"mean": float(length.mean() * pixel_size_nm), "std": float(length.std() * pixel_size_nm)}
                              if pixel_size_nm else None)
    info["edge_orientation"] = _edge_orientation(ang)
    report(progress, 1.0, "tiling: done")
    return net, tiles, info


def _edge_orientation(ang_deg: np.ndarray) -> dict:
    """Ten-direction analysis of edge angles (both senses of every edge, so directions 36 deg apart)."""
    both = np.mod(np.concatenate([ang_deg, ang_deg + 180.0]), 360.0)
    phase = np.mod(np.rad2deg(np.angle(np.exp(1j * np.deg2rad(10 * both)).mean())) / 10.0, 36.0)
    rel = np.mod(both - phase + 18.0, 36.0) - 18.0
    sector = np.mod(np.rint((both - phase) / 36.0).astype(int), 10)
    peaks = []
    for k in range(10):  # the ten directions
        sel = sector == k
        base = phase + 36.0 * k
        peaks.append(float(np.mod(base + (rel[sel].mean() if sel.any() else 0.0), 360.0)))
    hist, _ = np.histogram(both, bins=72, range=(0.0, 360.0))
    return {"peak_angles_deg": peaks, "share_within_5deg": float((np.abs(rel) <= 5.0).mean()),
            "phase_deg": float(phase), "histogram_5deg": hist.astype(int).tolist()}


def _face_polygons(xy: np.ndarray, fc: dict, kind: np.ndarray, max_sides: int = 12):
    """Vertex polygons of the interior faces (vectorised over faces, one step per side) and their types."""
    polys, types = [], []
    first = np.full(fc["n_faces"], -1, dtype=np.int64)
    hs = np.arange(len(fc["face"]))[::-1]
    first[fc["face"][hs]] = hs
    for s_ in np.unique(fc["sides"][fc["interior"]]):
        if s_ > max_sides:
            continue
        fid = np.flatnonzero(fc["interior"] & (fc["sides"] == s_))
        h = first[fid]
        ring = np.empty((len(fid), s_), dtype=np.int64)
        for k in range(s_):  # at most max_sides steps
            ring[:, k] = fc["origin"][h]
            h = fc["next"][h]
        polys.extend(xy[ring])
        types.extend(kind[fid])
    return polys, types


def tiling_figure(result):
    """Cluster network over the ring centres, faces filled by tile type, edges drawn on top.

    Parameters
    ----------
    result : AnalysisResult
        Reads ``tables['network']`` and ``tables['motifs']``; ``meta.pixel_size_nm`` for the axes.

    Returns
    -------
    matplotlib.figure.Figure or None
        None when there is no network to draw.
    """
    net = result.tables.get("network")
    mot = result.tables.get("motifs")
    if net is None or mot is None or len(net) == 0:
        return None
    from matplotlib.collections import LineCollection, PolyCollection
    from matplotlib.figure import Figure
    from matplotlib.patches import Patch

    ps = getattr(getattr(result, "meta", None), "pixel_size_nm", None)
    s = ps if ps else 1.0
    used = np.unique(np.concatenate([net["motif_a"].to_numpy(), net["motif_b"].to_numpy()]))
    pos = mot.set_index("motif_id").loc[used, ["centre_x_px", "centre_y_px"]].to_numpy() * s
    lut = pd.Series(np.arange(len(used)), index=used)
    e = np.stack([lut[net["motif_a"]].to_numpy(), lut[net["motif_b"]].to_numpy()], axis=1)
    fc = faces(pos, e)
    kind = _classify(fc)
    polys, types = _face_polygons(pos, fc, kind)
    fig = Figure(figsize=(6.5, 6.0), dpi=120)
    ax = fig.add_subplot(1, 1, 1)
    ax.add_collection(PolyCollection(polys, facecolors=[TILE_COLOURS.get(t, TILE_COLOURS["other"]) for t in types],
                                     edgecolors="none", alpha=0.85))
    ax.add_collection(LineCollection(pos[e], colors="#222222", linewidths=0.6))
    ax.set_aspect("equal")
    ax.autoscale_view()
    ax.invert_yaxis()
    unit = "nm" if ps else "px"
    ax.set_xlabel(f"x ({unit})")
    ax.set_ylabel(f"y ({unit})")
    present = [t for t in TILE_TYPES if t in set(types)]
    ax.legend([Patch(facecolor=TILE_COLOURS[t]) for t in present], [t.replace("_", " ") for t in present],
              loc="upper right", fontsize=7, framealpha=0.85)
    ax.set_title("cluster network and tiles" + ("" if ps else " (uncalibrated)"))
    return fig
