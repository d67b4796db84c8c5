"""Point sets with known motif geometry, for the motif / ladder / tiling tests and benchmarks/bench_motifs_stress.py.

All builders return ``(columns, truth)``: a columns table in px (``id``, ``x_px``, ``y_px``, ``species``,
``region``; species 0 = dimmest) and a dict of ground truth. Cluster centres are the vertices of a Penrose rhombus
tiling from de Bruijn's pentagrid (N. G. de Bruijn, Indag. Math. 84 (1981) 39-66) or of a rhombic lattice; the
directed pentagrid edges run along the five unit vectors at ``angle_deg + 72 j`` (j = 0..4).

Truth motif rows (``truth['motifs']``): ``kind`` ('ring10' or 'pentagon'), ``species`` (members' common class),
``centre_x_px``, ``centre_y_px``, ``radius_px``, ``orientation_deg`` (arg(psi_n)/n mod 360/n), ``flip_state``
('up' when the pentagon's vertices point along the five edge vectors angle_deg + 72 j, 'down' when they point the
opposite way) and ``half`` ('brighter' / 'dimmer' for the two pentagons of a ring of two species, '' otherwise).

The structures (scenario of our own):

* :func:`decagonal`: a ring of ten columns (radius 0.45 nm, alternating species 1 and 0, species-1 member along
  an edge vector) on every vertex of a Penrose tiling of edge 2 nm, optionally with a species-2 centre column.
* :func:`fivefold`: five bright columns (species 1) at 0.48 nm along the edge vectors and five dim ones (species 0)
  turned by 36 deg at 0.30 nm on every vertex; the cluster pentagon is the bright outer one.
* :func:`shared`: rings of ten (radius 0.45 nm, alternating species) on a rhombic lattice of 36 deg / 144 deg
  rhombi with edge 2 r cos 18 deg, so that neighbouring rings share an edge (two columns); a periodic crystal.
* :func:`square` / :func:`hexagonal`: periodic controls with no ten-membered rings and no golden-ratio ladder.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from tenfold.analysis._pentagrid import pentagrid_tiling

TAU = (1.0 + np.sqrt(5.0)) / 2.0
PX_NM = 0.04
EDGE_NM = 2.0
RING_NM = 0.45
JITTER_NM = 0.01


def _table(pts, species, rng_jitter, jitter_px, id0=0):
    pts = pts + rng_jitter.normal(0.0, jitter_px, pts.shape) if jitter_px else pts
    return pd.DataFrame({"id": np.arange(len(pts), dtype=np.int64) + id0, "x_px": pts[:, 0], "y_px": pts[:, 1],
                         "species": np.asarray(species, dtype=np.int64),
                         "region": np.zeros(len(pts), np.int64)})


def _penrose(half_width, angle_deg, g, edge_px, margin_px=40.0):
    t = pentagrid_tiling(half_width, rng=g).scaled(edge_px, angle_deg=angle_deg)
    t.vertices = t.vertices - t.vertices.min(axis=0) + margin_px
    return t


def _polygon_rows(centres, radius_px, n, orient_deg, species, flip, half, kind):
    k = len(centres)
    return pd.DataFrame({"kind": kind, "order": n, "species": species, "centre_x_px": centres[:, 0],
                         "centre_y_px": centres[:, 1], "radius_px": radius_px,
                         "orientation_deg": np.full(k, np.mod(orient_deg, 360.0 / n)), "flip_state": flip,
                         "half": half})


def decagonal(half_width: float = 10.0, *, centre: bool = True, angle_deg: float = 0.0, vacancy: float = 0.0,
              jitter_nm: float = JITTER_NM, px_nm: float = PX_NM, rng=0):
    """Ring-of-ten clusters on a Penrose tiling (see the module notes)."""
    g = np.random.default_rng(rng)
    t = _penrose(half_width, angle_deg, g, EDGE_NM / px_nm)
    v = t.vertices
    r = RING_NM / px_nm
    slot = np.arange(10)
    a = np.deg2rad(angle_deg + 36.0 * slot)
    pts = (v[:, None, :] + r * np.stack([np.cos(a), np.sin(a)], axis=-1)[None]).reshape(-1, 2)
    owner = np.repeat(np.arange(len(v)), 10)
    species = np.tile(np.where(slot % 2 == 0, 1, 0), len(v))
    keep = g.random(len(pts)) >= vacancy if vacancy else np.ones(len(pts), bool)
    pts, owner, species = pts[keep], owner[keep], species[keep]
    complete = np.bincount(owner, minlength=len(v)) == 10
    if centre:
        pts = np.concatenate([pts, v])
        owner = np.concatenate([owner, np.full(len(v), -1)])
        species = np.concatenate([species, np.full(len(v), 2)])
    cols = _table(pts, species, g, jitter_nm / px_nm)
    c = v[complete]
    motifs = pd.concat([
        _polygon_rows(c, r, 10, angle_deg, -1, "", "", "ring10"),
        _polygon_rows(c, r, 5, angle_deg, 1, "up", "brighter", "pentagon"),
        _polygon_rows(c, r, 5, angle_deg + 36.0, 0, "down", "dimmer", "pentagon"),
    ], ignore_index=True)
    return cols, {"centres": v, "owner": owner, "tiling": t, "motifs": motifs, "angle_deg": angle_deg,
                  "px_nm": px_nm, "edge_px": EDGE_NM / px_nm, "kind": "decagonal"}


def fivefold(half_width: float = 10.0, *, angle_deg: float = 0.0, outer_nm: float = 0.48, inner_nm: float = 0.30,
             jitter_nm: float = JITTER_NM, px_nm: float = PX_NM, rng=0):
    """Five bright columns at 0.48 nm and five dim ones turned by 36 deg at 0.30 nm on every Penrose vertex."""
    g = np.random.default_rng(rng)
    t = _penrose(half_width, angle_deg, g, EDGE_NM / px_nm)
    v = t.vertices
    ro, ri = outer_nm / px_nm, inner_nm / px_nm
    ao = np.deg2rad(angle_deg + 72.0 * np.arange(5))
    ai = ao + np.deg2rad(36.0)
    po = (v[:, None, :] + ro * np.stack([np.cos(ao), np.sin(ao)], axis=-1)[None]).reshape(-1, 2)
    pi = (v[:, None, :] + ri * np.stack([np.cos(ai), np.sin(ai)], axis=-1)[None]).reshape(-1, 2)
    pts = np.concatenate([po, pi])
    species = np.concatenate([np.ones(len(po), np.int64), np.zeros(len(pi), np.int64)])
    cols = _table(pts, species, g, jitter_nm / px_nm)
    motifs = pd.concat([
        _polygon_rows(v, ro, 5, angle_deg, 1, "up", "", "pentagon"),
        _polygon_rows(v, ri, 5, angle_deg + 36.0, 0, "down", "", "pentagon"),
    ], ignore_index=True)
    motifs["primary"] = motifs["radius_px"] == ro
    return cols, {"centres": v, "tiling": t, "motifs": motifs, "angle_deg": angle_deg, "px_nm": px_nm,
                  "edge_px": EDGE_NM / px_nm, "kind": "fivefold"}


def shared(n_cells: int = 16, *, angle_deg: float = 0.0, jitter_nm: float = JITTER_NM, px_nm: float = PX_NM,
           rng=0):
    """Rings of ten sharing edges with their neighbours on a 36/144 deg rhombic lattice (a periodic crystal)."""
    g = np.random.default_rng(rng)
    r = RING_NM / px_nm
    edge = 2.0 * r * np.cos(np.deg2rad(18.0))
    base = np.deg2rad(angle_deg)
    e0 = np.array([np.cos(base), np.sin(base)])
    e1 = np.array([np.cos(base + np.deg2rad(144.0)), np.sin(base + np.deg2rad(144.0))])
    i, j = np.meshgrid(np.arange(n_cells), np.arange(n_cells))
    c = (i.ravel()[:, None] * e0 + j.ravel()[:, None] * e1) * edge
    c = c - c.min(axis=0) + 40.0
    slot = np.arange(10)
    # members at 18 + 36 k deg from the lattice direction, so that neighbours along e0 and e1 share an edge
    a = base + np.deg2rad(18.0 + 36.0 * slot)
    pts = (c[:, None, :] + r * np.stack([np.cos(a), np.sin(a)], axis=-1)[None]).reshape(-1, 2)
    species = np.tile(np.where(slot % 2 == 0, 1, 0), len(c))
    # merge coincident members of neighbouring rings into one column
    key = np.round(pts / (0.05 * r)).astype(np.int64)
    _, first, inv = np.unique(key, axis=0, return_index=True, return_inverse=True)
    inv = inv.ravel()
    if not (species[first][inv] == species).all():
        raise AssertionError("shared columns of different species: the decoration is inconsistent")
    pts, species = pts[first], species[first]
    cols = _table(pts, species, g, jitter_nm / px_nm)
    motifs = pd.concat([
        _polygon_rows(c, r, 10, angle_deg + 18.0, -1, "", "", "ring10"),
        _polygon_rows(c, r, 5, angle_deg + 18.0, 1, "", "brighter", "pentagon"),
        _polygon_rows(c, r, 5, angle_deg + 54.0, 0, "", "dimmer", "pentagon"),
    ], ignore_index=True)
    return cols, {"centres": c, "motifs": motifs, "angle_deg": angle_deg, "px_nm": px_nm, "kind": "shared",
                  "member_of": inv.reshape(len(c), 10)}


def square(n: int = 60, a_px: float = 0.40495 / 2 / PX_NM, *, species=None):
    """Square lattice (fcc Al [001] column spacing a/2; a = 0.40495 nm, from memory of handbook tables)."""
    i, j = np.meshgrid(np.arange(n), np.arange(n))
    pts = np.stack([i.ravel(), j.ravel()], axis=1) * a_px + 20.0
    sp = np.zeros(len(pts), np.int64) if species is None else species
    return _table(pts, sp, None, 0.0), {"kind": "square", "motifs": _polygon_rows(np.zeros((0, 2)), 0, 10, 0, -1,
                                                                                "", "", "ring10")}


def hexagonal(n: int = 60, a_px: float = 7.0):
    """Hexagonal lattice of spacing a_px."""
    i, j = np.meshgrid(np.arange(n), np.arange(n))
    pts = np.stack([i.ravel() + 0.5 * j.ravel(), j.ravel() * np.sqrt(3) / 2], axis=1) * a_px + 20.0
    return _table(pts, np.zeros(len(pts), np.int64), None, 0.0), {
        "kind": "hexagonal", "motifs": _polygon_rows(np.zeros((0, 2)), 0, 10, 0, -1, "", "", "ring10")}


def match_motifs(found: pd.DataFrame, truth: pd.DataFrame, tol_px: float) -> dict:
    """Recall and precision of found motif rows against truth rows (centre within ``tol_px``, one to one by
    nearest centre, same ``kind``); for matched rows the orientation error (deg, folded into +-180/n) and whether
    ``flip_state`` agrees."""
    from scipy.spatial import cKDTree

    if len(truth) == 0 or len(found) == 0:
        return {"recall": float("nan") if len(truth) == 0 else 0.0,
                "precision": float("nan") if len(found) == 0 else 0.0, "n_true": len(truth), "n_found": len(found),
                "orientation_err_deg": np.zeros(0), "flip_ok": np.zeros(0, bool)}
    ft = found[["centre_x_px", "centre_y_px"]].to_numpy()
    tt = truth[["centre_x_px", "centre_y_px"]].to_numpy()
    d, j = cKDTree(tt).query(ft)
    ok = d <= tol_px
    # one to one: a truth row counts once
    hit_truth = np.unique(j[ok])
    n = int(truth["order"].iloc[0])
    err = (found["orientation_deg"].to_numpy()[ok] - truth["orientation_deg"].to_numpy()[j[ok]] + 180.0 / n) \
        % (360.0 / n) - 180.0 / n
    flip_ok = np.zeros(0, bool)
    if "flip_state" in found:
        flip_ok = found["flip_state"].to_numpy()[ok] == truth["flip_state"].to_numpy()[j[ok]]
    return {"recall": len(hit_truth) / len(truth), "precision": float(ok.mean()), "n_true": len(truth),
            "n_found": len(found), "orientation_err_deg": err, "flip_ok": flip_ok}
