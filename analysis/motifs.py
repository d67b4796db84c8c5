"""Cluster motifs: rings of n columns on a circle about a centre point, and near-regular pentagons.

A ring motif of order n is n columns lying on a circle of radius r about a centre point, at angles close to a
regular n-gon. The centre is a point, not necessarily a column: decagonal clusters are often empty-centred or hold
a small group of columns. The search is vectorised throughout:

1. A KD-tree of the columns is built once. Candidate centres are every column plus the circumcentres of the
   corners (column, two neighbours at the ring-edge distance, at the n-gon's interior angle): the centre lies at
   r along the corner's bisector, so empty-centred rings get a candidate where they need one.
2. All candidates' shells ``r (1 +- radius_tolerance)`` are collected with one ``sparse_distance_matrix`` call
   into padded (candidates x shell) arrays; at most n members per shell are kept (those closest to r).
3. The centre is refined by a least-squares circle fit of the members (algebraic fit, then Gauss-Newton on the
   geometric distances), the shell is collected again about the refined centre and fitted once more.
4. Members get angular slots ``round((theta - phi) / (360/n))`` about the orientation phi = arg(psi_n)/n; a ring
   is kept when it has at least ``min_members`` members in distinct slots, |psi_n| >= ``psi_min`` and a radial
   spread below half the shell tolerance. Candidates that converged onto one ring (centres closer than a third of
   the ring edge) are merged, keeping the best score.

Radius, when not given, comes from a ring-shell scan: for a sample of candidate centres, every trial radius on a
geometric grid from 0.8 to 6 nearest-neighbour distances is tested and the number of n-fold regular shells counted.
Every significant maximum of that count is a shell (at least 3 shells and a fifth of the best, standing out by half
its height); each is searched and reported (``shell_radius_px``), and the most populous is the primary one.

Pentagons are (a) both five-column halves in alternate slots of every complete ten-membered ring (``parent_ring``
set), labelled ``half`` = 'brighter' / 'dimmer' by their members' mean species class (then mean intensity), so
that both appear whatever the species split; and (b) free pentagons: five columns alone in a shell about a point,
found by the same engine with n = 5 at every significant shell of its own radius scan, kept when their edges agree
within the tolerance and diagonal / edge is within the tolerance of tau, when not all five members belong to rings
(the rings explain them) and, unless ``mixed_pentagons``, when the members are of one species class. Without rings
the primary pentagon shell is chosen by :data:`SHELL_RULE` (the brightest of the populous shells).

Every row carries ``species`` (the members' common class, -1 if mixed) and five-fold rows a ``flip_state``: 'up'
when the vertices point along the tiling edge vectors (phase + 72 j, the ten-fold edge phase measured on the
network of the primary centres and taken in [-18, 18) deg), 'down' when turned by 36 deg.

References
----------
Bond-orientational order psi_n: D. R. Nelson and B. I. Halperin, Phys. Rev. B 19 (1979) 2457.
Circle fit: I. Kasa, IEEE Trans. Instrum. Meas. 25 (1976) 8; N. Chernov, "Circular and linear regression" (2010).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy.spatial import cKDTree

from ._errors import TenfoldInputError
from ._lengths import check_pixel_size
from ._progress import ProgressCallback, report
from ._renamed import renamed_keywords
from ._schema import MOTIFS, conform, empty_table

__all__ = ["TAU", "SHELL_RULE", "find_motifs", "ring_search"]

TAU = (1.0 + np.sqrt(5.0)) / 2.0
_ORDERS = (5, 6, 8, 10, 12)
_SCAN_SAMPLE = 2000  # candidate centres used by the radius scan (independent of N, keeps it O(1))
_SHELL_MIN_COUNT = 3  # fewest regular shells in the scan sample for a shell to count
_SHELL_MIN_SHARE = 0.2  # ... and at least this share of the most populous shell
_FLIP_MARGIN_DEG = 6.0  # a pentagon turned within this of halfway between 'up' and 'down' is undecided ('')
_PRIMARY_SHARE = 0.5  # pentagon shells holding at least this share of the most populous one compete for 'primary'


# --------------------------------------------------------------------------------------------- padded shells
def _padded(i: np.ndarray, j: np.ndarray, d: np.ndarray, n_rows: int) -> tuple[np.ndarray, np.ndarray]:
    """Group (row i, column j, distance d) triples into padded (n_rows x K) arrays; padding j = -1, d = inf.

    Within a row the order is that of the input; callers select by distance themselves.
    """
    if len(i) == 0:
        return np.full((n_rows, 0), -1, dtype=np.int64), np.full((n_rows, 0), np.inf)
    order = np.argsort(i, kind="stable")  # radix sort on integer keys: O(n)
    i, j, d = i[order], j[order], d[order]
    counts = np.bincount(i, minlength=n_rows)
    starts = np.concatenate([[0], np.cumsum(counts)[:-1]])
    rank = np.arange(len(i)) - starts[i]
    k = int(counts.max())
    jj = np.full((n_rows, k), -1, dtype=np.int64)
    dd = np.full((n_rows, k), np.inf)
    jj[i, rank] = j
    dd[i, rank] = d
    return jj, dd


def _shell_pairs(tree: cKDTree, centres: np.ndarray, r_lo: float, r_hi: float):
    """All (centre, column, distance) with r_lo <= distance <= r_hi, from one dual-tree query."""
    if len(centres) == 0:
        e = np.zeros(0, dtype=np.int64)
        return e, e, np.zeros(0)
    sdm = cKDTree(centres).sparse_distance_matrix(tree, r_hi, output_type="ndarray")
    keep = sdm["v"] >= r_lo
    return sdm["i"][keep].astype(np.int64), sdm["j"][keep].astype(np.int64), sdm["v"][keep]


def _keep_closest(jj: np.ndarray, dd: np.ndarray, r: float, n: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Keep at most n members per row, those whose distance is closest to r; also return the shell count."""
    count = (jj >= 0).sum(axis=1)
    if jj.shape[1] > n:
        key = np.where(jj >= 0, np.abs(dd - r), np.inf)
        sel = np.argsort(key, axis=1, kind="stable")[:, :n]
        jj = np.take_along_axis(jj, sel, axis=1)
        dd = np.take_along_axis(dd, sel, axis=1)
    return jj, dd, count


def _fit_circles(px: np.ndarray, py: np.ndarray, valid: np.ndarray, n_iter: int = 3):
    """Least-squares circles through the valid points of every row: Kasa algebraic fit, then Gauss-Newton.

    Rows with fewer than 3 valid points get NaN. Returns (cx, cy, r) arrays.
    """
    w = valid.astype(float)
    m = w.sum(axis=1)
    ok = m >= 3
    safe = np.where(ok, m, 1.0)
    # Centre the coordinates per row for conditioning.
    x0 = (np.where(valid, px, 0.0)).sum(axis=1) / safe
    y0 = (np.where(valid, py, 0.0)).sum(axis=1) / safe
    u = np.where(valid, px - x0[:, None], 0.0)
    v = np.where(valid, py - y0[:, None], 0.0)
    z = u * u + v * v
    # Kasa: z = 2 a u + 2 b v + c (least squares).
    a_mat = np.empty((len(px), 3, 3))
    rhs = np.empty((len(px), 3))
    cols = (2 * u, 2 * v, w)
    for p in range(3):
        rhs[:, p] = (cols[p] * z).sum(axis=1)
        for q in range(3):
            a_mat[:, p, q] = (cols[p] * cols[q]).sum(axis=1)
    a_mat[~ok] = np.eye(3)
    rhs[~ok] = 0.0
    sol = np.linalg.solve(a_mat, rhs[..., None])[..., 0]
    a, b = sol[:, 0], sol[:, 1]
    rr = np.sqrt(np.maximum(sol[:, 2] + a * a + b * b, 0.0))
    for _ in range(n_iter):  # geometric refinement: minimise sum (|p - c| - r)^2
        du = np.where(valid, u - a[:, None], 0.0)
        dv = np.where(valid, v - b[:, None], 0.0)
        dist = np.hypot(du, dv)
        dist_s = np.where(dist > 0, dist, 1.0)
        res = np.where(valid, dist - rr[:, None], 0.0)
        ja = np.where(valid, -du / dist_s, 0.0)
        jb = np.where(valid, -dv / dist_s, 0.0)
        jr = -w
        jac = (ja, jb, jr)
        for p in range(3):
            rhs[:, p] = -(jac[p] * res).sum(axis=1)
            for q in range(3):
                a_mat[:, p, q] = (jac[p] * jac[q]).sum(axis=1)
        a_mat[~ok] = np.eye(3)
        rhs[~ok] = 0.0
        det = np.linalg.det(a_mat)
        good = np.abs(det) > 1e-12
        a_mat[~good] = np.eye(3)
        rhs[~good] = 0.0
        step = np.linalg.solve(a_mat, rhs[..., None])[..., 0]
        a, b, rr = a + step[:, 0], b + step[:, 1], rr + step[:, 2]
    cx, cy = x0 + a, y0 + b
    cx[~ok] = np.nan
    cy[~ok] = np.nan
    rr = np.where(ok, np.abs(rr), np.nan)
    return cx, cy, rr


def _slots(theta: np.ndarray, valid: np.ndarray, n: int):
    """psi_n, orientation (rad, in [0, 2 pi / n)), integer slot per member and whether the slots are distinct."""
    m = valid.sum(axis=1)
    ph = np.where(valid, np.exp(1j * n * theta), 0.0).sum(axis=1) / np.maximum(m, 1)
    phi = np.mod(np.angle(ph) / n, 2 * np.pi / n)
    step = 2 * np.pi / n
    rel = np.mod(theta - phi[:, None], 2 * np.pi)
    slot = np.mod(np.rint(rel / step).astype(np.int64), n)
    slot = np.where(valid, slot, n + np.arange(theta.shape[1])[None, :])  # padding never collides
    s = np.sort(slot, axis=1)
    distinct = ~(np.diff(s, axis=1) == 0).any(axis=1) if s.shape[1] > 1 else np.ones(len(s), bool)
    return np.abs(ph), phi, slot, distinct


def ring_search(
    xy: np.ndarray,
    tree: cKDTree,
    candidates: np.ndarray,
    *,
    order: int,
    radius_px: float,
    radius_tolerance: float,
    min_members: int,
    psi_min: float,
    exact: bool = False,
) -> dict:
    """Vectorised ring search about candidate centres (the engine behind :func:`find_motifs`).

    Parameters
    ----------
    xy : (N, 2) float array
        Column positions in px.
    tree : cKDTree
        KD-tree of ``xy`` (built once by the caller).
    candidates : (M, 2) float array
        Candidate centre positions in px.
    order : int
        Ring order n.
    radius_px, radius_tolerance : float
        Shell radius r in px and relative half width of the shell.
    min_members : int
        Fewest members for a ring (rings with fewer than n are flagged incomplete).
    psi_min : float
        Smallest accepted |psi_n|.
    exact : bool
        Require exactly n columns in the shell and no others (used for free pentagons).

    Returns
    -------
    dict
        'cx', 'cy' refined centres (px), 'slots' (R x n) member column indices in slot order (-1 missing),
        'psi', 'phi' (rad), 'radius', 'rms' arrays, one entry per accepted, de-duplicated ring.
    """
    n, r, tol = order, float(radius_px), float(radius_tolerance)
    lo, hi = r * (1 - tol), r * (1 + tol)
    cand = np.asarray(candidates, dtype=float)
    shell_count = np.zeros(len(cand), dtype=np.int64)
    for it in range(2):  # collect, fit, re-collect about the refined centre, fit again
        # The first pass takes a 1.5x wider shell so that a candidate a little off the centre still sees the ring.
        wide = 1.5 if it == 0 else 1.0
        i, j, d = _shell_pairs(tree, cand, r * (1 - wide * tol), r * (1 + wide * tol))
        jj, dd = _padded(i, j, d, len(cand))
        jj, dd, shell_count = _keep_closest(jj, dd, r, n)
        valid = jj >= 0
        px = np.where(valid, xy[np.maximum(jj, 0), 0], 0.0)
        py = np.where(valid, xy[np.maximum(jj, 0), 1], 0.0)
        enough = valid.sum(axis=1) >= max(3, min_members)
        cand, jj, px, py, valid, shell_count = (cand[enough], jj[enough], px[enough], py[enough], valid[enough],
                                                shell_count[enough])
        cx, cy, _ = _fit_circles(px, py, valid)
        fin = np.isfinite(cx) & np.isfinite(cy)
        cand = np.stack([cx, cy], axis=1)[fin]
        jj, px, py, valid, shell_count = jj[fin], px[fin], py[fin], valid[fin], shell_count[fin]
    if len(cand) == 0:
        return _empty_search(n)
    cx, cy = cand[:, 0], cand[:, 1]
    dist = np.where(valid, np.hypot(px - cx[:, None], py - cy[:, None]), np.nan)
    m = valid.sum(axis=1)
    radius = np.nanmean(dist, axis=1)
    rms = np.sqrt(np.nanmean((dist - radius[:, None]) ** 2, axis=1))
    theta = np.where(valid, np.arctan2(py - cy[:, None], px - cx[:, None]), 0.0)
    psi, phi, slot, distinct = _slots(theta, valid, n)
    good = (m >= min_members) & (m <= n) & distinct & (psi >= psi_min) & (rms <= 0.5 * tol * r)
    good &= np.abs(radius - r) <= tol * r
    if exact:
        good &= (shell_count == n) & (m == n)
    idx = np.flatnonzero(good)
    if len(idx) == 0:
        return _empty_search(n)
    score = _score(psi[idx], m[idx] / n, rms[idx], tol * r)
    # Merge candidates that converged onto the same ring: centres closer than a third of the ring edge.
    edge = 2 * r * np.sin(np.pi / n)
    keep = _dedupe(cand[idx], score, edge / 3.0)
    idx = idx[keep]
    slots = np.full((len(idx), n), -1, dtype=np.int64)
    rows = np.repeat(np.arange(len(idx)), jj.shape[1])
    s = slot[idx].ravel()
    mem = jj[idx].ravel()
    ok = (mem >= 0) & (s < n)
    slots[rows[ok], s[ok]] = mem[ok]
    return {"cx": cx[idx], "cy": cy[idx], "slots": slots, "psi": psi[idx], "phi": phi[idx],
            "radius": radius[idx], "rms": rms[idx]}


def _empty_search(n: int) -> dict:
    z = np.zeros(0)
    return {"cx": z, "cy": z, "slots": np.zeros((0, n), dtype=np.int64), "psi": z, "phi": z, "radius": z, "rms": z}


def _score(psi, completeness, rms, rms_scale):
    return np.clip(psi, 0, 1) * completeness * np.clip(1.0 - rms / rms_scale, 0.0, 1.0)


def _dedupe(centres: np.ndarray, score: np.ndarray, radius: float) -> np.ndarray:
    """Indices of the best-scoring centre of every cluster of centres closer than ``radius``."""
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    pairs = cKDTree(centres).query_pairs(radius, output_type="ndarray")
    n = len(centres)
    g = coo_matrix((np.ones(len(pairs)), (pairs[:, 0], pairs[:, 1])), shape=(n, n)) if len(pairs) else \
        coo_matrix((n, n))
    _, lab = connected_components(g, directed=False)
    order = np.lexsort((-score, lab))
    first = np.ones(len(order), bool)
    first[1:] = lab[order][1:] != lab[order][:-1]
    return np.sort(order[first])


# --------------------------------------------------------------------------------------------- candidates, scan
def _triangle_centres(xy: np.ndarray, tree: cKDTree, sel: np.ndarray, *, k: int = 6,
                      edge_range: tuple[float, float] | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Circumcentres and circumradii of the triangles (column, neighbour a, neighbour b) for the k nearest
    neighbours of the columns ``sel``.

    Three consecutive members of a ring have their circumcentre at the ring centre, so these are the candidate
    centres of empty-centred rings. With ``edge_range`` only neighbours at a ring-edge distance are used.
    """
    if len(xy) < 3 or len(sel) == 0:
        return np.zeros((0, 2)), np.zeros(0)
    k = min(k, len(xy) - 1)
    d, nb = tree.query(xy[sel], k=k + 1)
    d, nb = d[:, 1:], nb[:, 1:]
    valid = np.isfinite(d) & (nb < len(xy))
    if edge_range is not None:
        valid &= (d >= edge_range[0]) & (d <= edge_range[1])
    ia, ib = np.triu_indices(k, 1)
    ok = (valid[:, ia] & valid[:, ib]).ravel()
    c = np.repeat(xy[sel], len(ia), axis=0)[ok]
    pa = xy[np.minimum(nb[:, ia], len(xy) - 1)].reshape(-1, 2)[ok]
    pb = xy[np.minimum(nb[:, ib], len(xy) - 1)].reshape(-1, 2)[ok]
    bx, by = pa[:, 0] - c[:, 0], pa[:, 1] - c[:, 1]
    qx, qy = pb[:, 0] - c[:, 0], pb[:, 1] - c[:, 1]
    den = 2 * (bx * qy - by * qx)
    fine = np.abs(den) > 1e-9 * np.maximum(bx * bx + by * by, 1e-30)
    den = np.where(fine, den, 1.0)
    ux = (qy * (bx * bx + by * by) - by * (qx * qx + qy * qy)) / den
    uy = (bx * (qx * qx + qy * qy) - qx * (bx * bx + by * by)) / den
    cc = np.stack([c[:, 0] + ux, c[:, 1] + uy], axis=1)[fine]
    return cc, np.hypot(ux, uy)[fine]


def _ring_candidates(xy, tree, r, tol, n, k: int = 6):
    """Centres of empty-centred rings, one per (column, two neighbours at the ring-edge distance) corner.

    A ring member c with its two ring neighbours a and b sees the centre along the bisector of (a - c) and (b - c)
    at distance r, and the corner angle is the n-gon's interior angle 180 - 360/n. Stepping r along the bisector
    is far less sensitive to jitter than the circumcentre of the three points (which spans only 2/n of the circle).
    """
    if len(xy) < 3:
        return np.zeros((0, 2))
    edge = 2 * r * np.sin(np.pi / n)
    k = min(k, len(xy) - 1)
    d, nb = tree.query(xy, k=k + 1)
    d, nb = d[:, 1:], nb[:, 1:]
    valid = np.isfinite(d) & (nb < len(xy)) & (d >= edge * (1 - tol)) & (d <= edge * (1 + tol))
    ia, ib = np.triu_indices(k, 1)
    ok = valid[:, ia] & valid[:, ib]
    rows, pair = np.nonzero(ok)
    c = xy[rows]
    ua = xy[nb[rows, ia[pair]]] - c
    ub = xy[nb[rows, ib[pair]]] - c
    ua /= np.hypot(ua[:, 0], ua[:, 1])[:, None]
    ub /= np.hypot(ub[:, 0], ub[:, 1])[:, None]
    corner = np.degrees(np.arccos(np.clip((ua * ub).sum(axis=1), -1.0, 1.0)))
    bis = ua + ub
    norm = np.hypot(bis[:, 0], bis[:, 1])
    good = (np.abs(corner - (180.0 - 360.0 / n)) <= 25.0) & (norm > 1e-9)
    cand = c[good] + r * bis[good] / norm[good, None]
    return _merge_close(cand, 0.2 * edge)


def _merge_close(points: np.ndarray, cell: float) -> np.ndarray:
    """Thin a candidate list: the mean of the points in every grid cell of size ``cell`` (many triangles of one
    ring share one circumcentre, up to jitter, and their mean is the better estimate)."""
    if len(points) == 0:
        return points
    key = np.floor(points / cell).astype(np.int64)
    _, inv = np.unique(key, axis=0, return_inverse=True)
    inv = inv.ravel()
    cnt = np.bincount(inv)
    return np.stack([np.bincount(inv, weights=points[:, 0]) / cnt, np.bincount(inv, weights=points[:, 1]) / cnt], axis=1)


def _scan_radius(xy, tree, cand, *, order, tol, min_members, psi_min, d_nn, rng, exact=False):
    """Ring-shell scan: the trial radius at which the most candidate shells look like regular n-gons."""
    n = order
    if len(cand) > _SCAN_SAMPLE:
        cand = cand[rng.choice(len(cand), _SCAN_SAMPLE, replace=False)]
    radii = np.exp(np.arange(np.log(0.8 * d_nn), np.log(6.0 * d_nn), np.log1p(tol / 3.0)))
    if len(radii) == 0 or len(cand) == 0:
        return None, {"method": "ring-shell scan", "trial_radii": 0, "best_count": 0}
    i, j, d = _shell_pairs(tree, cand, radii[0] * (1 - tol), radii[-1] * (1 + tol))
    jj, dd = _padded(i, j, d, len(cand))
    valid = jj >= 0
    theta = np.arctan2(xy[np.maximum(jj, 0), 1] - cand[:, 1:2], xy[np.maximum(jj, 0), 0] - cand[:, 0:1])
    counts = np.zeros(len(radii), dtype=np.int64)

    rot = np.where(valid, np.exp(1j * n * theta), 0.0)

    def _good(r):
        ins = valid & (dd >= r * (1 - tol)) & (dd <= r * (1 + tol))
        m = ins.sum(axis=1)
        rows = np.flatnonzero((m == n) if exact else ((m >= min_members) & (m <= n)))
        psi = np.abs(np.where(ins[rows], rot[rows], 0.0).sum(axis=1)) / np.maximum(m[rows], 1)
        rows = rows[psi >= psi_min]
        sub, dsub, msub = ins[rows], dd[rows], m[rows][:, None]
        _, _, _, distinct = _slots(theta[rows], sub, n)
        mean = np.where(sub, dsub, 0.0).sum(axis=1, keepdims=True) / msub
        rms = np.sqrt(np.where(sub, (dsub - mean) ** 2, 0.0).sum(axis=1) / msub[:, 0])
        ok = np.zeros(len(m), bool)
        ok[rows[distinct & (rms <= 0.5 * tol * r)]] = True
        return ok, ins

    for k, r in enumerate(radii):  # a fixed number (~50) of vectorised passes, independent of N
        counts[k] = _good(r)[0].sum()
    best = int(np.argmax(counts))
    info = {"method": "ring-shell scan", "trial_radii": int(len(radii)),
            "scan_range_px": [float(radii[0]), float(radii[-1])], "sample_centres": int(len(cand)),
            "best_count": int(counts[best]), "shells": []}
    if counts[best] < _SHELL_MIN_COUNT:
        return None, info
    shells = []
    for k in _shell_peaks(counts):  # a handful of peaks
        good, ins = _good(radii[k])
        sel = ins & good[:, None]
        if sel.any():
            shells.append({"radius_px": float(np.median(dd[sel])), "trial_px": float(radii[k]),
                           "scan_count": int(counts[k])})
    shells = _merge_shells(shells, tol)
    info["shells"] = shells
    top = max(shells, key=lambda s: s["scan_count"])
    info["best_trial_px"] = top["trial_px"]
    return top["radius_px"], info


def _shell_peaks(counts: np.ndarray) -> np.ndarray:
    """Indices of the significant maxima of a shell-count curve.

    A maximum is a shell when it holds at least ``_SHELL_MIN_COUNT`` regular shells and ``_SHELL_MIN_SHARE`` of
    the best one, and stands out: its prominence is at least half its height (a shoulder of a larger peak is not a
    shell of its own). The curve is padded with zeros so that a peak at either end of the scan counts.
    """
    from scipy.signal import find_peaks

    c = np.concatenate([[0], counts, [0]]).astype(float)
    floor = max(_SHELL_MIN_COUNT, _SHELL_MIN_SHARE * c.max())
    idx, props = find_peaks(c, height=floor, prominence=0.0)
    keep = props["prominences"] >= 0.5 * props["peak_heights"]
    return idx[keep] - 1


def _merge_shells(shells: list[dict], tol: float) -> list[dict]:
    """Shells whose radii agree within the tolerance are one shell (the one with more regular shells)."""
    out: list[dict] = []
    for s in sorted(shells, key=lambda s: -s["scan_count"]):
        if all(abs(s["radius_px"] / o["radius_px"] - 1.0) > tol for o in out):
            out.append(s)
    return sorted(out, key=lambda s: s["radius_px"])


# --------------------------------------------------------------------------------------------- motif rows
def _rows(xy, ids, species, region, res, *, n, kind, pixel_size_nm, parent=None, brightness=None):
    """Turn a ring_search-style result into MOTIFS rows (vectorised over motifs, loops over the n slots).

    Besides the schema columns: ``mean_brightness`` (mean intensity of the members; NaN without intensities),
    used to pick the primary pentagon shell and dropped before the table is returned.
    """
    slots = res["slots"]
    k = len(slots)
    valid = slots >= 0
    px = np.where(valid, xy[np.maximum(slots, 0), 0], np.nan)
    py = np.where(valid, xy[np.maximum(slots, 0), 1], np.nan)
    nxt = np.roll(np.arange(n), -1)
    adj = valid & valid[:, nxt]
    e = np.where(adj, np.hypot(px[:, nxt] - px, py[:, nxt] - py), np.nan)
    edge = _nanmean_rows(e)
    if n == 5:
        nn2 = np.roll(np.arange(n), -2)
        dg = np.where(valid & valid[:, nn2], np.hypot(px[:, nn2] - px, py[:, nn2] - py), np.nan)
        ratio = _nanmean_rows(dg) / edge
    else:
        ratio = res["radius"] / edge
    m = valid.sum(axis=1)
    members = _join_ids(ids, slots)
    sp = np.where(valid, species[np.maximum(slots, 0)], np.iinfo(np.int64).min)
    makeup = pd.Series([""] * k, dtype=object)
    for s in (np.unique(sp[valid]) if valid.any() else []):  # a handful of species classes
        c = (sp == s).sum(axis=1)
        piece = (f"{int(s)}:" + pd.Series(c.astype(str), dtype=object)).where(c > 0, "")
        sep = pd.Series(np.where((makeup != "") & (c > 0), " ", ""), dtype=object)
        makeup = makeup + sep + piece
    common_sp = _common_species(sp, valid)
    br = _nanmean_rows(np.where(valid, brightness[np.maximum(slots, 0)], np.nan)) if (brightness is not None and k) \
        else np.full(k, np.nan)
    # Region: of the member column closest to the centre.
    dist = np.where(valid, np.hypot(px - res["cx"][:, None], py - res["cy"][:, None]), np.inf)
    near = slots[np.arange(k), np.argmin(dist, axis=1)] if k else np.zeros(0, dtype=np.int64)
    ps = pixel_size_nm
    scale = ps if ps else np.nan
    out = pd.DataFrame({
        "motif_id": np.zeros(k, dtype=np.int64),
        "kind": kind,
        "order": n,
        "centre_x_px": res["cx"], "centre_y_px": res["cy"],
        "centre_x_nm": res["cx"] * scale, "centre_y_nm": res["cy"] * scale,
        "radius_px": res["radius"], "radius_nm": res["radius"] * scale,
        "radial_rms_px": res["rms"], "radial_rms_nm": res["rms"] * scale,
        "psi_n": res["psi"],
        "orientation_deg": np.mod(np.rad2deg(res["phi"]), 360.0 / n),
        "edge_px": edge, "edge_nm": edge * scale,
        "diag_edge_ratio": ratio,
        "n_members": m,
        "members": members,
        "centre_content": "empty",
        "centre_ids": "",
        "species_makeup": makeup.to_numpy(dtype=object),
        "completeness": m / n,
        "complete": m == n,
        "score": np.nan,
        "overlaps": 0,
        "parent_ring": -1 if parent is None else parent,
        "region": region[near] if k else np.zeros(0, dtype=np.int64),
        "species": common_sp.astype(np.int64),
        "half": "",
        "flip_state": "",
        "mean_brightness": br,
    })
    return out


def _common_species(sp: np.ndarray, valid: np.ndarray) -> np.ndarray:
    """The members' common species class per row, -1 when mixed or unclassified.

    One odd member is allowed (all but one member share the class): a single column put in a neighbouring class
    is far more often a classification slip than a cluster of mixed species, whose halves differ by two or more
    members. ``species_makeup`` keeps the exact counts.
    """
    k = len(sp)
    if k == 0:
        return np.zeros(0, dtype=np.int64)
    m = valid.sum(axis=1)
    classes = np.unique(sp[valid & (sp >= 0)])
    best = np.full(k, -1, dtype=np.int64)
    best_n = np.zeros(k, dtype=np.int64)
    for c in classes:  # a handful of species classes
        n_c = ((sp == c) & valid).sum(axis=1)
        better = n_c > best_n
        best[better], best_n[better] = c, n_c[better]
    return np.where((best_n >= np.maximum(m - 1, 1)) & (m > 0) & (best_n * 2 > m), best, -1)


def _nanmean_rows(a: np.ndarray) -> np.ndarray:
    c = np.isfinite(a).sum(axis=1)
    s = np.where(np.isfinite(a), a, 0.0).sum(axis=1)
    return np.where(c > 0, s / np.maximum(c, 1), np.nan)


def _join_ids(ids: np.ndarray, slots: np.ndarray) -> np.ndarray:
    """Space-separated member ids per row, in slot (angular) order; one vectorised pass per slot."""
    out = pd.Series([""] * len(slots), dtype=object)
    for s in range(slots.shape[1]):
        present = slots[:, s] >= 0
        txt = pd.Series(np.where(present, ids[np.maximum(slots[:, s], 0)].astype(str), ""), dtype=object)
        sep = pd.Series(np.where(present & (out != ""), " ", ""), dtype=object)
        out = out + sep + txt
    return out.to_numpy(dtype=object)


def _centre_content(tree, ids, centres, radius):
    """'column' / 'group' / 'empty' and the centre ids, from columns within 0.25 r of each centre."""
    k = len(centres)
    content = np.full(k, "empty", dtype=object)
    cids = np.full(k, "", dtype=object)
    if k == 0:
        return content, cids
    sdm = cKDTree(centres).sparse_distance_matrix(tree, float(np.nanmax(0.25 * radius)), output_type="ndarray")
    i, j, v = sdm["i"], sdm["j"], sdm["v"]
    keep = v <= 0.25 * radius[i]
    i, j = i[keep], j[keep]
    cnt = np.bincount(i, minlength=k)
    content[cnt == 1] = "column"
    content[cnt >= 2] = "group"
    if len(i):
        jj, _ = _padded(i.astype(np.int64), j.astype(np.int64), v[keep], k)
        cids = _join_ids(ids, jj)
    return content, cids


def _overlaps(slots: np.ndarray, n_cols: int) -> np.ndarray:
    """Number of other motifs sharing at least one member, from a sparse motif x column incidence matrix."""
    from scipy.sparse import csr_matrix

    k = len(slots)
    if k == 0:
        return np.zeros(0, dtype=np.int64)
    rows = np.repeat(np.arange(k), slots.shape[1])
    cols = slots.ravel()
    ok = cols >= 0
    inc = csr_matrix((np.ones(ok.sum()), (rows[ok], cols[ok])), shape=(k, n_cols))
    share = (inc @ inc.T).tocsr()
    share.setdiag(0)
    share.eliminate_zeros()
    return np.diff(share.indptr).astype(np.int64)


def _inner_pentagons(slots: np.ndarray, xy: np.ndarray) -> tuple[dict, np.ndarray, np.ndarray]:
    """Both alternate-slot pentagons of every complete ten-membered ring, whatever their species.

    Returns (search dict, parent ring row, which half: 0 = even slots, 1 = odd slots).
    """
    if slots.shape[1] != 10 or len(slots) == 0:
        z = np.zeros(0, dtype=np.int64)
        return _empty_search(5), z, z
    sub = np.concatenate([slots[:, 0::2], slots[:, 1::2]])
    parent = np.concatenate([np.arange(len(slots))] * 2)
    which = np.repeat([0, 1], len(slots))
    ok = (sub >= 0).all(axis=1)
    sub, parent, which = sub[ok], parent[ok], which[ok]
    res = _describe_fixed(sub, xy, 5)
    return res, parent, which


def _describe_fixed(slots: np.ndarray, xy: np.ndarray, n: int) -> dict:
    """Circle fit, psi_n and slot ordering for given member sets (rows of column indices, -1 = missing)."""
    if len(slots) == 0:
        return _empty_search(n)
    valid = slots >= 0
    px = np.where(valid, xy[np.maximum(slots, 0), 0], 0.0)
    py = np.where(valid, xy[np.maximum(slots, 0), 1], 0.0)
    cx, cy, _ = _fit_circles(px, py, valid)
    dist = np.where(valid, np.hypot(px - cx[:, None], py - cy[:, None]), np.nan)
    radius = np.nanmean(dist, axis=1)
    rms = np.sqrt(np.nanmean((dist - radius[:, None]) ** 2, axis=1))
    theta = np.where(valid, np.arctan2(py - cy[:, None], px - cx[:, None]), 0.0)
    psi, phi, slot, distinct = _slots(theta, valid, n)
    out = np.full((len(slots), n), -1, dtype=np.int64)
    rows = np.repeat(np.arange(len(slots)), slots.shape[1])
    s = slot.ravel()
    mem = slots.ravel()
    ok = (mem >= 0) & (s < n) & np.repeat(distinct, slots.shape[1])
    out[rows[ok], s[ok]] = mem[ok]
    return {"cx": cx, "cy": cy, "slots": out, "psi": psi, "phi": phi, "radius": radius, "rms": rms}


def _pentagon_ok(df: pd.DataFrame, xy: np.ndarray, slots: np.ndarray, tol: float) -> np.ndarray:
    """Near-regular pentagon test: edges equal within ``tol`` (relative std) and diagonal / edge within tol of tau."""
    valid = (slots >= 0).all(axis=1)
    px = xy[np.maximum(slots, 0), 0]
    py = xy[np.maximum(slots, 0), 1]
    nxt = np.roll(np.arange(5), -1)
    e = np.hypot(px[:, nxt] - px, py[:, nxt] - py)
    rel = e.std(axis=1) / np.maximum(e.mean(axis=1), 1e-12)
    ratio = df["diag_edge_ratio"].to_numpy()
    return valid & (rel <= tol) & (np.abs(ratio / TAU - 1.0) <= tol)


# --------------------------------------------------------------------------------------------- public
def ring_shape(xy, cx, cy, slots, *, warn_above=0.005, n_boot=200, rng=0):
    """Real-space distortion check: the mean ellipse of the complete rings.

    A ring of a decagonal cluster is a circle; a scan distortion r' = D r turns every ring into the same ellipse
    ``d^T M d = 1`` with ``M`` proportional to ``(D D^T)^-1``. Each complete ring gets ``M`` by least squares,
    normalised to unit determinant (so only the shape counts), and the normalised matrices are averaged: position
    noise makes single rings look elliptical in random directions, which the average cancels. The axis ratio of
    the mean is the distortion estimate; its standard error comes from a bootstrap over rings.

    Returns
    -------
    info : dict
        ``n_rings``, ``axis_ratio`` (>= 1), ``major_axis_deg`` (atan2, y down, in [0, 180)), ``axis_ratio_se``,
        ``warning`` (ratio - 1 above ``warn_above`` and above 3 standard errors).
    per_ring : (R,) array
        Axis ratio of each ring (NaN for incomplete ones).
    """
    per_ring = np.full(len(slots), np.nan)
    info = {"n_rings": 0, "axis_ratio": None, "major_axis_deg": None, "axis_ratio_se": None, "warning": False}
    if len(slots) == 0:
        return info, per_ring
    full = np.all(slots >= 0, axis=1)
    if full.sum() < 3:
        return info, per_ring
    sl = slots[full]
    dx = xy[sl, 0] - np.asarray(cx)[full, None]
    dy = xy[sl, 1] - np.asarray(cy)[full, None]
    a = np.stack([dx * dx, 2 * dx * dy, dy * dy], axis=-1)  # (R, n, 3)
    ata = np.einsum("rni,rnj->rij", a, a)
    atb = a.sum(axis=1)
    sol = np.linalg.solve(ata, atb[..., None])[..., 0]  # (R, 3): M = [[s0, s1], [s1, s2]]
    det = sol[:, 0] * sol[:, 2] - sol[:, 1] ** 2
    good = det > 0
    m = sol[good] / np.sqrt(det[good])[:, None]

    def _ratio(mm):
        tr, dt = mm[..., 0] + mm[..., 2], mm[..., 0] * mm[..., 2] - mm[..., 1] ** 2
        disc = np.sqrt(np.maximum(tr * tr / 4 - dt, 0.0))
        lo, hi = tr / 2 - disc, tr / 2 + disc
        return np.sqrt(hi / np.maximum(lo, 1e-300))

    idx_full = np.flatnonzero(full)[good]
    per_ring[idx_full] = _ratio(m)
    mean = m.mean(axis=0)
    gen = np.random.default_rng(rng)
    boot = m[gen.integers(0, len(m), size=(n_boot, len(m)))].mean(axis=1)
    ratio = float(_ratio(mean))
    se = float(np.std(_ratio(boot)))
    # |d| is largest along the eigenvector of M's smaller eigenvalue
    w, v = np.linalg.eigh(np.array([[mean[0], mean[1]], [mean[1], mean[2]]]))
    info.update(n_rings=int(len(m)), axis_ratio=ratio, axis_ratio_se=se,
                major_axis_deg=float(np.degrees(np.arctan2(v[1, 0], v[0, 0])) % 180.0),
                warning=bool(ratio - 1.0 > warn_above and ratio - 1.0 > 3.0 * se))
    return info, per_ring


@renamed_keywords(order="ring_order", radius_px="ring_radius_px")
def find_motifs(
    columns: pd.DataFrame,
    *,
    ring_order: int = 10,
    ring_radius_px: float | None = None,
    radius_tolerance: float = 0.12,
    min_members: int | None = None,
    pentagons: bool = True,
    pixel_size_nm: float | None = None,
    regions=None,
    psi_min: float = 0.8,
    mixed_pentagons: bool = False,
    edge_phase_deg: float | None = None,
    rng: np.random.Generator | int | None = 0,
    progress: ProgressCallback | None = None,
) -> tuple[pd.DataFrame, dict]:
    """Find ring motifs of order n and near-regular pentagons in a columns table.

    Parameters
    ----------
    columns : DataFrame
        Columns table (``_schema.COLUMNS``); needs ``id``, ``x_px``, ``y_px``; ``species`` and ``region`` are used
        when present. Rows with non-finite positions are ignored (and counted in the info).
    ring_order : int
        Ring order n: 5, 6, 8, 10 (default) or 12. ``order`` is a deprecated alias.
    ring_radius_px : float, optional
        Ring radius r in px. Default: automatic ring-shell scan (see Notes); the info says which. ``radius_px`` is
        a deprecated alias.
    radius_tolerance : float
        Relative half width of the shell r (1 +- tolerance) in which members are looked for (0 < tol < 0.5).
    min_members : int, optional
        Fewest members for a ring, default n - 2; rings with fewer than n members are kept with
        ``complete=False`` (vacancies).
    pentagons : bool
        Also report pentagon motifs (inside rings and free-standing).
    pixel_size_nm : float, optional
        Pixel size for the ``*_nm`` columns; None leaves them NaN (uncalibrated).
    regions : optional
        Region shapes for ``tenfold.analysis.region.label_points``; default: the region of the member column
        nearest the centre.
    psi_min : float
        Smallest accepted |psi_n| of a ring (1 = ideal n-gon).
    mixed_pentagons : bool
        Keep free pentagons whose members are of more than one species class (default False: such a pentagon is
        a chance arrangement of columns from different clusters, not a cluster).
    edge_phase_deg : float, optional
        Direction of the tiling edges (mod 36 deg) that ``flip_state`` refers to; default: measured on the
        cluster network of the primary motif centres (``tiling.edge_phase``).
    rng : Generator or int
        Seeds the sample of candidate centres used by the radius scan.
    progress : callable, optional
        ``progress(fraction, message)``; returning False stops the run (``Cancelled``).

    Returns
    -------
    motifs : DataFrame
        ``_schema.MOTIFS`` columns: motif_id, kind ('ring<n>' or 'pentagon'), order, centre_x/y_px/nm,
        radius_px/nm, radial_rms_px/nm, psi_n, orientation_deg, edge_px/nm, diag_edge_ratio, n_members, members,
        centre_content, centre_ids, species_makeup, completeness, complete, score, overlaps, parent_ring, region.
        Also species, half ('brighter' / 'dimmer' for ring halves), flip_state, shell_radius_px, primary.
    info : dict
        JSON-safe summary: 'n_columns', counts per kind (primary rings; other ring shells as
        'ring<n>_other_shells'), 'complete'/'incomplete', 'radius_px', 'radius_source', 'radius_scan',
        'mean_psi_n', 'orientation_domains', 'shells' (one entry per reported shell: kind, order, radius,
        n_motifs, mean_species, primary), 'shell_rule', 'pentagons' (counts by half, species, flip state),
        'flip_reference', 'free_pentagons' (radius, scan, dropped counts), 'message' (when nothing was found),
        'warnings'.

    Notes
    -----
    Orientation: ``arg(psi_n) / n`` with ``theta = atan2(dy, dx)`` in the image frame (y down), in
    [0, 360/n) degrees. Rings sharing columns are all reported; ``overlaps`` counts the others.

    References
    ----------
    D. R. Nelson and B. I. Halperin, Phys. Rev. B 19 (1979) 2457 (psi_n). I. Kasa, IEEE Trans. Instrum. Meas. 25
    (1976) 8 (circle fit).

    Examples
    --------
    >>> import pandas as pd, numpy as np
    >>> a = np.deg2rad(np.arange(10) * 36.0)
    >>> cols = pd.DataFrame({"id": np.arange(10), "x_px": 50 + 10 * np.cos(a), "y_px": 50 + 10 * np.sin(a)})
    >>> m, info = find_motifs(cols, ring_radius_px=10.0, pentagons=False)
    >>> int(m["n_members"].iloc[0])
    10
    """
    if not isinstance(columns, pd.DataFrame):
        raise TenfoldInputError(f"find_motifs: columns must be a pandas DataFrame, got {type(columns).__name__}")
    missing = [c for c in ("id", "x_px", "y_px") if c not in columns.columns]
    if missing:
        raise TenfoldInputError(f"find_motifs: columns table lacks {missing}; pass the columns table from refine/species")
    order, radius_px = ring_order, ring_radius_px
    if order not in _ORDERS:
        raise TenfoldInputError(f"find_motifs: ring_order={order!r} is not supported; use one of {_ORDERS}")
    if radius_px is not None and not (np.isfinite(radius_px) and radius_px > 0):
        raise TenfoldInputError(f"find_motifs: ring_radius_px={radius_px!r} must be a positive number of pixels (or None for automatic)")
    if not (0 < radius_tolerance < 0.5):
        raise TenfoldInputError(f"find_motifs: radius_tolerance={radius_tolerance!r} must lie in (0, 0.5)")
    if min_members is None:
        min_members = order - 2
    if not (3 <= int(min_members) <= order):
        raise TenfoldInputError(f"find_motifs: min_members={min_members!r} must lie between 3 and ring_order={order}")
    check_pixel_size(pixel_size_nm, plausible=False)
    min_members = int(min_members)
    gen = np.random.default_rng(rng)
    info: dict = {"order": int(order), "kind": f"ring{order}", "radius_tolerance": float(radius_tolerance),
                  "min_members": min_members, "calibrated": pixel_size_nm is not None, "warnings": []}

    xy_all = columns[["x_px", "y_px"]].to_numpy(dtype=float)
    fin = np.isfinite(xy_all).all(axis=1)
    if (~fin).any():
        info["warnings"].append(f"{int((~fin).sum())} columns with non-finite positions ignored")
    xy = xy_all[fin]
    ids = columns["id"].to_numpy()[fin].astype(np.int64)
    species = (columns["species"].to_numpy()[fin].astype(np.int64) if "species" in columns
               else np.full(len(xy), -1, dtype=np.int64))
    region = (columns["region"].to_numpy()[fin].astype(np.int64) if "region" in columns
              else np.zeros(len(xy), dtype=np.int64))
    b_col = next((c for c in ("intensity", "amplitude") if c in columns), None)
    brightness = (columns[b_col].to_numpy(dtype=float)[fin] if b_col else np.full(len(xy), np.nan))
    info["n_columns"] = int(len(xy))
    _set_counts(info, None, order)

    def _nothing(msg: str):
        info["message"] = msg
        info["radius_px"] = float(radius_px) if radius_px is not None else None
        info["radius_nm"] = float(radius_px * pixel_size_nm) if (radius_px and pixel_size_nm) else None
        info.setdefault("radius_source", "given" if radius_px is not None else "automatic (failed)")
        return empty_table(MOTIFS), info

    if len(xy) < min_members + 1:
        return _nothing(f"too few columns ({len(xy)}) for ring motifs of order {order} "
                        f"(need at least {min_members + 1}); no motifs reported")
    report(progress, 0.0, "motifs: KD-tree and candidate centres")
    tree = cKDTree(xy)
    d_nn_all, _ = tree.query(xy, k=2)
    d_nn = float(np.median(d_nn_all[:, 1]))
    if not d_nn > 0:
        return _nothing("columns coincide (median nearest-neighbour distance 0 px); no motifs reported")
    scan_sel = gen.choice(len(xy), min(len(xy), _SCAN_SAMPLE // 2), replace=False)
    cc, cr = _triangle_centres(xy, tree, scan_sel)

    report(progress, 0.1, "motifs: ring radius")
    if radius_px is not None:
        r = float(radius_px)
        info["radius_source"] = "given"
    else:
        scan_c = np.concatenate([xy, cc[(cr > 0.5 * d_nn) & (cr < 7 * d_nn)]])
        r, scan = _scan_radius(xy, tree, scan_c, order=order, tol=radius_tolerance, min_members=min_members,
                               psi_min=psi_min, d_nn=d_nn, rng=gen)
        info["radius_scan"] = scan
        failed = (f"ring-shell scan found no radius with regular {order}-membered shells "
                  f"(best trial held {scan.get('best_count', 0)})")
        if r is None and not pentagons:
            return _nothing(failed + "; no motifs reported")
        if r is None:
            # no rings, but pentagons may stand on their own (e.g. an icosahedral phase down a five-fold axis)
            info["radius_source"] = f"automatic (failed): {failed}; free pentagons searched only"
        else:
            info["radius_source"] = (f"automatic: ring-shell scan of {scan['trial_radii']} radii "
                                     f"{scan['scan_range_px'][0]:.3g}-{scan['scan_range_px'][1]:.3g} px on "
                                     f"{scan['sample_centres']} sample centres; most regular {order}-fold shells "
                                     f"at {scan['best_trial_px']:.4g} px, median member distance {r:.4g} px")
    info["radius_px"] = float(r) if r is not None else None
    info["radius_nm"] = float(r * pixel_size_nm) if (pixel_size_nm and r is not None) else None

    report(progress, 0.3, "motifs: ring search")
    tol = radius_tolerance
    kind = f"ring{order}"
    ring_radii = [r] if r is not None else []
    if r is not None and radius_px is None:  # every significant shell of the scan, the most populous first
        ring_radii += [s["radius_px"] for s in info["radius_scan"]["shells"] if s["radius_px"] != r]
    ring_df, ring_slots = _ring_shells(xy, tree, ids, species, region, ring_radii, order=order, tol=tol,
                                       min_members=min_members, psi_min=psi_min, pixel_size_nm=pixel_size_nm)
    shape_info, ring_df["axis_ratio"] = ring_shape(xy, ring_df["centre_x_px"].to_numpy(),
                                                   ring_df["centre_y_px"].to_numpy(), ring_slots, rng=gen)
    info["ring_shape"] = shape_info
    tables = [(ring_df, ring_slots)]

    report(progress, 0.7, "motifs: pentagons")
    if pentagons:
        if order == 10 and len(ring_df):
            tables.append(_ring_halves(xy, ids, species, brightness, region, ring_df, ring_slots, tol,
                                       pixel_size_nm))
        free_df, free_slots, free_info = _free_pentagons(xy, tree, cc, cr, ids, species, brightness, region, d_nn,
                                                         tol, pixel_size_nm, gen, ring_slots=ring_slots,
                                                         mixed=mixed_pentagons)
        info["free_pentagons"] = free_info
        tables.append((free_df, free_slots))

    tables = [(t, sl) for t, sl in tables if len(t)]
    at = f"at radius {r:.4g} px" if r is not None else "(no ring radius found)"
    if not tables:
        return _nothing(f"no {kind} motifs {at} (tolerance {tol:.2f}); no motifs reported")
    out = pd.concat([t for t, _ in tables], ignore_index=True)
    all_slots = np.full((len(out), max(sl.shape[1] for _, sl in tables)), -1, dtype=np.int64)
    k0 = 0
    for t, sl in tables:
        all_slots[k0:k0 + len(t), :sl.shape[1]] = sl
        k0 += len(t)
    out["motif_id"] = np.arange(len(out), dtype=np.int64)
    is_p = (out["kind"] == "pentagon").to_numpy() & (out["parent_ring"].to_numpy() >= 0)
    out.loc[is_p, "parent_ring"] = out["motif_id"].to_numpy()[:len(ring_df)][out.loc[is_p, "parent_ring"].to_numpy()]
    # overlaps: with other motifs of the same kind
    out["overlaps"] = 0
    for kd in out["kind"].unique():  # two kinds
        sel = (out["kind"] == kd).to_numpy()
        out.loc[sel, "overlaps"] = _overlaps(all_slots[sel], len(xy))
    centres = out[["centre_x_px", "centre_y_px"]].to_numpy()
    content, cids = _centre_content(tree, ids, centres, out["radius_px"].to_numpy())
    out["centre_content"] = content
    out["centre_ids"] = cids
    if regions is not None:
        try:
            from .region import label_points
        except ImportError:
            info["warnings"].append("region.label_points not available: region taken from the member column "
                                    "nearest the centre")
        else:
            out["region"] = np.asarray(label_points(centres[:, 0], centres[:, 1], regions), dtype=np.int64)
    _primary_pentagon_shell(out, info, has_rings=bool(out["primary"].to_numpy()[:len(ring_df)].any()))
    info["flip_reference"] = _set_flip(out, edge_phase_deg, tol)
    out = conform(out.drop(columns=["mean_brightness"]), MOTIFS)
    _set_counts(info, out, order)
    info["shells"] = _shell_summary(out, pixel_size_nm)
    info["shell_rule"] = SHELL_RULE
    if info["counts"].get(kind, 0) == 0:
        info["message"] = f"no {kind} motifs {at} (tolerance {tol:.2f})"
    from .tiling import orientation_domains

    rr = out[(out["kind"] == kind) & out["primary"]]
    info["orientation_domains"] = orientation_domains(rr["orientation_deg"].to_numpy(), period_deg=360.0 / order)
    report(progress, 1.0, "motifs: done")
    return out, info


#: How the default ('primary') shell is chosen; written to ``info['shell_rule']``.
SHELL_RULE = ("rings: the shell of the chosen order holding the most regular rings in the radius scan (or the given "
              "radius) is primary, with the pentagon halves of its rings; other significant shells are reported "
              "with primary = False. Free pentagons: when no primary ring was found, the pentagon shells holding "
              "at least half as many pentagons as the most populous one compete, and the one with the brightest "
              "members (highest mean species class, then highest mean intensity, then the larger radius) is "
              "primary: the heavy-atom pentagon is the cluster's skeleton in a HAADF image.")


def _ring_shells(xy, tree, ids, species, region, radii, *, order, tol, min_members, psi_min, pixel_size_nm):
    """Ring motifs at each shell radius (the first is the primary shell); rows and (R x n) member slots."""
    dfs, slots = [], []
    for k, r in enumerate(radii):  # one or a few shells
        cand = np.concatenate([xy, _ring_candidates(xy, tree, r, tol, order)])
        res = ring_search(xy, tree, cand, order=order, radius_px=r, radius_tolerance=tol,
                          min_members=min_members, psi_min=psi_min)
        df = _rows(xy, ids, species, region, res, n=order, kind=f"ring{order}", pixel_size_nm=pixel_size_nm)
        df["score"] = _score(res["psi"], df["completeness"].to_numpy(), res["rms"], tol * r)
        df["shell_radius_px"] = float(r)
        df["primary"] = k == 0
        dfs.append(df)
        slots.append(res["slots"])
    if not dfs:
        df = _rows(xy, ids, species, region, _empty_search(order), n=order, kind=f"ring{order}",
                   pixel_size_nm=pixel_size_nm)
        df["shell_radius_px"] = np.zeros(0)
        df["primary"] = np.zeros(0, bool)
        return df, np.zeros((0, order), dtype=np.int64)
    return pd.concat(dfs, ignore_index=True), np.concatenate(slots)


def _ring_halves(xy, ids, species, brightness, region, ring_df, ring_slots, tol, pixel_size_nm):
    """Both five-membered halves (alternate slots) of every complete ten-membered ring, labelled by brightness."""
    ip, parent, which = _inner_pentagons(ring_slots, xy)
    pdf = _rows(xy, ids, species, region, ip, n=5, kind="pentagon", pixel_size_nm=pixel_size_nm)
    pdf["parent_ring"] = parent  # ring row index for now; turned into a motif_id by the caller
    pdf["score"] = _score(pdf["psi_n"].to_numpy(), 1.0, pdf["radial_rms_px"].to_numpy(),
                          tol * np.maximum(pdf["radius_px"].to_numpy(), 1e-9))
    pdf["half"] = _halves(ip["slots"], parent, which, species, brightness)
    pdf["shell_radius_px"] = ring_df["shell_radius_px"].to_numpy()[parent]
    pdf["primary"] = ring_df["primary"].to_numpy()[parent]
    ok = _pentagon_ok(pdf, xy, ip["slots"], tol)
    return pdf[ok].reset_index(drop=True), ip["slots"][ok]


def _halves(slots, parent, which, species, brightness) -> np.ndarray:
    """'brighter' / 'dimmer' for the two halves of each ring: by mean species class, else by mean intensity."""
    sp = np.where(slots >= 0, species[np.maximum(slots, 0)], -1).astype(float)
    sp = np.where(sp >= 0, sp, np.nan)
    br = np.where(slots >= 0, brightness[np.maximum(slots, 0)], np.nan)
    key_sp = _nanmean_rows(sp)
    key_br = _nanmean_rows(br)
    out = np.full(len(slots), "", dtype=object)
    # partner: the other half of the same ring (parent, 1 - which)
    lut = {(int(p), int(w)): i for i, (p, w) in enumerate(zip(parent, which))}
    partner = np.array([lut.get((int(p), 1 - int(w)), -1) for p, w in zip(parent, which)], dtype=np.int64)
    has = partner >= 0
    pp = np.maximum(partner, 0)
    d_sp = key_sp - key_sp[pp]
    d_br = key_br - key_br[pp]
    diff = np.where(np.isfinite(d_sp) & (d_sp != 0), d_sp, np.where(np.isfinite(d_br), d_br, 0.0))
    out[has & (diff > 0)] = "brighter"
    out[has & (diff < 0)] = "dimmer"
    return out


def _free_pentagons(xy, tree, cc, cr, ids, species, brightness, region, d_nn, tol, pixel_size_nm, gen, *,
                    ring_slots, mixed):
    """Five columns alone on a circle (exact shell), found with the ring engine at n = 5, at every significant
    shell of its own radius scan. Dropped: pentagons whose five members all belong to rings (the rings explain
    them) and, unless ``mixed``, pentagons whose members are of more than one species class."""
    scan_c = np.concatenate([xy, cc[(cr > 0.5 * d_nn) & (cr < 7 * d_nn)]])
    r5, scan = _scan_radius(xy, tree, scan_c, order=5, tol=tol, min_members=5, psi_min=0.9, d_nn=d_nn, rng=gen,
                            exact=True)
    empty = _rows(xy, ids, species, region, _empty_search(5), n=5, kind="pentagon", pixel_size_nm=pixel_size_nm)
    empty["shell_radius_px"] = np.zeros(0)
    empty["primary"] = np.zeros(0, bool)
    info = {"radius_px": None, "scan": scan, "count": 0, "dropped_explained_by_rings": 0,
            "dropped_mixed_species": 0, "mixed_species_allowed": bool(mixed)}
    if r5 is None:
        return empty, np.zeros((0, 5), dtype=np.int64), info
    in_ring = np.zeros(len(xy), bool)
    in_ring[ring_slots[ring_slots >= 0]] = True
    dfs, slots = [], []
    for sh in scan["shells"]:  # one or a few shells
        rs = sh["radius_px"]
        cand = np.concatenate([xy, _ring_candidates(xy, tree, rs, tol, 5)])
        res = ring_search(xy, tree, cand, order=5, radius_px=rs, radius_tolerance=tol, min_members=5,
                          psi_min=0.9, exact=True)
        df = _rows(xy, ids, species, region, res, n=5, kind="pentagon", pixel_size_nm=pixel_size_nm,
                   brightness=brightness)
        ok = _pentagon_ok(df, xy, res["slots"], tol) if len(df) else np.zeros(0, bool)
        explained = in_ring[res["slots"]].all(axis=1) if len(df) else np.zeros(0, bool)
        is_mixed = (df["species"].to_numpy() < 0) & (species[res["slots"]] >= 0).any(axis=1) if len(df) else \
            np.zeros(0, bool)
        info["dropped_explained_by_rings"] += int((ok & explained).sum())
        info["dropped_mixed_species"] += int((ok & ~explained & is_mixed).sum()) if not mixed else 0
        ok &= ~explained
        if not mixed:
            ok &= ~is_mixed
        df = df[ok].copy()
        df["score"] = _score(df["psi_n"].to_numpy(), 1.0, df["radial_rms_px"].to_numpy(), tol * rs)
        df["shell_radius_px"] = float(rs)
        df["primary"] = False  # decided once all shells are known (_primary_pentagon_shell)
        dfs.append(df)
        slots.append(res["slots"][ok])
    df = pd.concat(dfs, ignore_index=True) if dfs else empty
    sl = np.concatenate(slots) if slots else np.zeros((0, 5), dtype=np.int64)
    info.update(radius_px=float(r5), count=int(len(df)))
    return df, sl, info


def _primary_pentagon_shell(out: pd.DataFrame, info: dict, *, has_rings: bool) -> None:
    """Mark the free pentagons of the primary shell (see SHELL_RULE), in place."""
    free = ((out["kind"] == "pentagon") & (out["parent_ring"] < 0)).to_numpy()
    if has_rings or not free.any():
        return
    f = out[free]
    g = f.groupby("shell_radius_px")
    n = g.size()
    sp = f["species"].where(f["species"] >= 0)
    stats = pd.DataFrame({"n": n, "species": sp.groupby(f["shell_radius_px"]).mean(),
                          "brightness": f["mean_brightness"].groupby(f["shell_radius_px"]).mean()})
    stats = stats[stats["n"] >= _PRIMARY_SHARE * stats["n"].max()].fillna(-np.inf)
    stats["radius"] = stats.index.to_numpy()
    best = stats.sort_values(["species", "brightness", "radius"]).index[-1]
    out.loc[free & (out["shell_radius_px"] == best).to_numpy(), "primary"] = True
    info["free_pentagons"]["primary_radius_px"] = float(best)


def _set_flip(out: pd.DataFrame, edge_phase_deg: float | None, tol: float) -> dict:
    """Fill ``flip_state`` of five-fold rows from their orientation against the tiling edge vectors, in place.

    The tiling's edges run along ten directions 36 deg apart; as undirected lines they fix a phase mod 36 deg only,
    so the five reference edge vectors are taken at ``phase + 72 j`` with the phase in [-18, 18) deg. A pentagon
    whose vertices point within 18 deg of these is 'up', one turned by 36 deg is 'down'; within
    ``_FLIP_MARGIN_DEG`` of halfway the state is '' (undecided).
    """
    out["flip_state"] = ""
    src = "given"
    if edge_phase_deg is None:
        from .tiling import edge_phase

        prim = out[out["primary"] & ((out["kind"] != "pentagon") | (out["parent_ring"] < 0))]
        xy = prim[["centre_x_px", "centre_y_px"]].to_numpy(dtype=float)
        edge_phase_deg, how = edge_phase(xy, tol=min(tol, 0.1))
        src = how
    if edge_phase_deg is None:
        return {"phase_deg": None, "source": src}
    ref = float(np.mod(edge_phase_deg + 18.0, 36.0) - 18.0)
    five = (out["order"] == 5).to_numpy()
    rel = np.mod(out["orientation_deg"].to_numpy(dtype=float) - ref, 72.0)
    state = np.where((rel < 18.0) | (rel >= 54.0), "up", "down")
    halfway = np.minimum(np.abs(rel - 18.0), np.abs(rel - 54.0)) < _FLIP_MARGIN_DEG
    out.loc[five, "flip_state"] = np.where(halfway, "", state)[five]
    return {"phase_deg": ref, "source": src,
            "convention": "flip_state 'up': pentagon vertices along the edge vectors phase + 72 j (phase in "
                          "[-18, 18) deg, atan2 with y down); 'down': turned by 36 deg; '' within "
                          f"{_FLIP_MARGIN_DEG:g} deg of halfway"}


def _shell_summary(out: pd.DataFrame, pixel_size_nm) -> list[dict]:
    """One entry per reported shell: kind, order, radius, number of motifs, mean species, primary."""
    rows = []
    key = out["kind"] + np.where((out["kind"] == "pentagon") & (out["parent_ring"] >= 0), " (ring half)", "")
    for (k, rad), g in out.groupby([key, "shell_radius_px"], sort=True):  # a few shells
        sp = g["species"][g["species"] >= 0]
        rows.append({"kind": str(k), "order": int(g["order"].iloc[0]), "shell_radius_px": float(rad),
                     "radius_px": float(g["radius_px"].median()),
                     "radius_nm": float(g["radius_px"].median() * pixel_size_nm) if pixel_size_nm else None,
                     "n_motifs": int(len(g)), "mean_species": float(sp.mean()) if len(sp) else None,
                     "primary": bool(g["primary"].any())})
    return rows


def _set_counts(info: dict, df: pd.DataFrame | None, order: int) -> None:
    kind = f"ring{order}"
    if df is None or len(df) == 0:
        info["counts"] = {kind: 0, "pentagon": 0}
        info["complete"] = 0
        info["incomplete"] = 0
        info["mean_psi_n"] = None
        info["orientation_domains"] = []
        info["pentagons"] = {"in_ring_brighter": 0, "in_ring_dimmer": 0, "free": 0, "free_primary": 0,
                             "by_species": {}}
        return
    rings = df[(df["kind"] == kind) & df["primary"]]
    pent = df[df["kind"] == "pentagon"]
    info["counts"] = {kind: int(len(rings)), "pentagon": int(len(pent)),
                      "pentagon_in_ring": int((pent["parent_ring"] >= 0).sum())}
    other = int(((df["kind"] == kind) & ~df["primary"]).sum())
    if other:
        info["counts"][f"{kind}_other_shells"] = other
    info["complete"] = int(rings["complete"].sum())
    info["incomplete"] = int((~rings["complete"]).sum())
    info["mean_psi_n"] = float(rings["psi_n"].mean()) if len(rings) else None
    info["centre_content"] = {k: int(v) for k, v in rings["centre_content"].value_counts().items()}
    free = pent[pent["parent_ring"] < 0]
    info["pentagons"] = {
        "in_ring_brighter": int((pent["half"] == "brighter").sum()),
        "in_ring_dimmer": int((pent["half"] == "dimmer").sum()),
        "free": int(len(free)), "free_primary": int(free["primary"].sum()),
        "by_species": {str(int(k)): int(v) for k, v in pent["species"].value_counts().sort_index().items()},
        "flip_states": {str(k): int(v) for k, v in pent["flip_state"].value_counts().items() if k},
    }
