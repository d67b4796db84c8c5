"""Golden-ratio distance ladders: pair distributions, their peaks, and the fit d_n = d0 tau^n.

A decagonal point set has strong pair distances in the ratios tau^n (n integer; tau = (1 + sqrt 5) / 2) to a base
distance d0, but not only those. The other strong distances are the chords of the regular decagon and pentagon.
A chord of a regular decagon of circumradius R spanning k edges is ``2 R sin(k pi / 10)``; with R = 1:

=====  ===============  ============  ==============================================
k      2 sin(k pi/10)   value         relation
=====  ===============  ============  ==============================================
1      2 sin 18         0.6180        1 / tau (a rung)
2      2 sin 36         1.1756        sqrt(3 - tau); thick-rhombus short diagonal
3      2 sin 54         1.6180        tau (a rung)
4      2 sin 72         1.9021        2 cos 18 = sqrt(2 + tau); thin-rhombus long diagonal
5      2 sin 90         2             the diameter
=====  ===============  ============  ==============================================

So besides the rungs the table of known decagonal distance ratios holds ``c tau^m`` for c in {2 sin 36, 2 sin 72,
2} (pentagon chords are the even-k decagon chords, so they are already in it); e.g. 2 sin 72 tau = 3.078 and
2 tau = 3.236 between the columns of one ten-membered ring. A peak close to one of these is reported off-ladder
with that label and is never forced onto a rung.

Whether the ladder holds is decided by a likelihood-ratio comparison of all located peak positions against the
decagonal model (rungs plus chords, scale d0) and against periodic alternatives (integer multiples; square lattice
sqrt(h^2 + k^2); hexagonal lattice sqrt(h^2 + hk + k^2)), each with its scale fitted, over the peaks between
0.5 and 4.5 d0. Each model says "a peak sits at one of my K values in the range, each equally likely, with a
Gaussian spread of the peak's width, or is an outlier (share 0.1, uniform)": a dense sequence explains more peaks
by chance but pays log K for every one, so the likelihood ratio is fair between sparse and dense models. The
ladder holds when at least three distinct rungs are matched and the decagonal model wins
by 2 ln LR >= 10 ("very strong" on the scale of Kass & Raftery, J. Am. Stat. Assoc. 90 (1995) 773; common practice).

References
----------
Pair-correlation edge correction for a rectangular window: J. Ohser and D. Stoyan, Biom. J. 23 (1981) 523;
D. Stoyan, W. S. Kendall and J. Mecke, "Stochastic Geometry and its Applications", 2nd ed., Wiley (1995).
Bootstrap: B. Efron and R. J. Tibshirani, "An Introduction to the Bootstrap", Chapman & Hall (1993).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy.spatial import cKDTree

from ._errors import TenfoldInputError
from ._lengths import check_pixel_size
from ._renamed import renamed_keywords
from ._schema import LADDER, PEAKS, conform, empty_table

__all__ = ["TAU", "KNOWN_RATIOS", "pair_distribution", "locate_peaks", "fit_ladder", "ladder_agreement",
           "motif_ratios", "ladder_figure"]

TAU = (1.0 + np.sqrt(5.0)) / 2.0
_JACKKNIFE_BLOCKS = 16  # image blocks left out in turn for the rung uncertainties
_UNRESOLVED_FACTOR = 1.5  # a peak this much broader than the narrowest ones holds unresolved distances
_MAX_REF = 20000  # reference points for pair statistics: the cost stays O(N log N) + O(_MAX_REF k)


def _known_ratios() -> list[tuple[float, str]]:
    """Known off-ladder decagonal distance ratios c tau^m (see the module table), m = -2 .. 4."""
    base = [(2 * np.sin(np.deg2rad(36.0)), "2 sin 36"), (2 * np.sin(np.deg2rad(72.0)), "2 sin 72"), (2.0, "2")]
    out = []
    for c, name in base:
        for m in range(-2, 5):
            out.append((abs(m), c * TAU ** m, name if m == 0 else f"{name} tau^{m}"))
    # 2 sin 36 tau = 2 sin 72 (and so on): one value, one label, the one with the smallest power of tau.
    out.sort()
    kept: list[tuple[float, str]] = []
    for _, v, name in out:
        if all(abs(v / k - 1) > 1e-9 for k, _ in kept):
            kept.append((v, name))
    return sorted(kept)


KNOWN_RATIOS = _known_ratios()


def _module_lengths() -> list[tuple[float, str]]:
    """Lengths sqrt(a + b tau) (small integers a, b) of the decagonal module: every distance between vertices of
    a Penrose tiling has a squared length in Z[tau]; used only to label otherwise unassigned peaks."""
    out = []
    for a in range(-5, 11):
        for b in range(0, 8):
            v = a + b * TAU
            if v > 0.2 and not (b == 0 and a < 0):
                out.append((float(np.sqrt(v)), f"sqrt({a}{'+' if b >= 0 else ''}{b} tau)" if b else f"sqrt({a})"))
    return sorted(out)


MODULE_LENGTHS = _module_lengths()


# --------------------------------------------------------------------------------------------- pair statistics
def _clean_xy(x_px, y_px, name: str) -> np.ndarray:
    x = np.asarray(x_px, dtype=float).ravel()
    y = np.asarray(y_px, dtype=float).ravel()
    if x.shape != y.shape:
        raise TenfoldInputError(f"{name}: x_px and y_px differ in length ({len(x)} vs {len(y)}); pass matching arrays")
    xy = np.stack([x, y], axis=1)
    return xy[np.isfinite(xy).all(axis=1)]


def _pairs(xy: np.ndarray, r_max: float, gen: np.random.Generator, max_ref: int = _MAX_REF, *,
           return_ref: bool = False):
    """Distances from a reference subset (all points when N <= max_ref) to every other point within r_max.

    Returns (ref index into the reference subset, distance, n_ref), and the reference points' indices into xy
    when ``return_ref``.
    """
    n = len(xy)
    ref = np.arange(n) if n <= max_ref else np.sort(gen.choice(n, max_ref, replace=False))
    sdm = cKDTree(xy[ref]).sparse_distance_matrix(cKDTree(xy), r_max, output_type="ndarray")
    keep = ref[sdm["i"]] != sdm["j"]
    if return_ref:
        return sdm["i"][keep].astype(np.int64), sdm["v"][keep], len(ref), ref
    return sdm["i"][keep].astype(np.int64), sdm["v"][keep], len(ref)


def _set_covariance(r: np.ndarray, w: float, h: float) -> np.ndarray:
    """Isotropised set covariance of a w x h rectangle (Ohser & Stoyan 1981), valid for r <= min(w, h)."""
    return w * h - 2.0 * r * (w + h) / np.pi + r * r / np.pi


def _bin_edges(r_max: float, bin_px: float) -> np.ndarray:
    edges = np.arange(0.0, r_max + 0.5 * bin_px, bin_px)
    return edges if len(edges) >= 3 else np.linspace(0.0, r_max, 3)


def _histogram(d: np.ndarray, n_ref: int, xy: np.ndarray, r_max: float, bin_px: float, edge_correction: bool):
    cnt, edges = np.histogram(d, bins=_bin_edges(r_max, bin_px))
    return _curve(cnt, edges, n_ref, xy, edge_correction)


def _curve(cnt: np.ndarray, edges: np.ndarray, n_ref: int, xy: np.ndarray, edge_correction: bool) -> pd.DataFrame:
    """g(r) and pair counts from ordered reference-pair counts per bin."""
    n = len(xy)
    r = 0.5 * (edges[1:] + edges[:-1])
    dr = np.diff(edges)
    w, h = np.ptp(xy[:, 0]), np.ptp(xy[:, 1])
    area = w * h
    with np.errstate(divide="ignore", invalid="ignore"):
        if area > 0:
            gam = _set_covariance(r, w, h) if edge_correction else np.full_like(r, area)
            gam = np.where(gam > 0.05 * area, gam, np.nan)
            expected = n_ref * (n - 1) / area * 2 * np.pi * r * dr * gam / area
            g = cnt / expected
        else:
            g = np.full_like(r, np.nan)
    scale = n / (2.0 * n_ref)  # ordered reference pairs -> unordered pairs of the whole set
    return pd.DataFrame({"r_px": r, "g": g, "count": cnt * scale})


def pair_distribution(x_px, y_px, *, r_max_px: float, bin_px: float | None = None, edge_correction: bool = True,
                      rng: np.random.Generator | int | None = 0) -> pd.DataFrame:
    """Pair distribution function g(r) of a point set, from one KD-tree query.

    Parameters
    ----------
    x_px, y_px : arrays
        Point positions in px (non-finite entries are dropped).
    r_max_px : float
        Largest pair distance in px.
    bin_px : float, optional
        Histogram bin width in px; default 1/40 of the median nearest-neighbour distance.
    edge_correction : bool
        Divide by the isotropised set covariance of the bounding rectangle (Ohser & Stoyan 1981), so g -> 1 for
        a Poisson pattern at every r; otherwise by the window area only.
    rng : Generator or int
        Chooses the reference subset (20 000 points) for large sets; all points are used below that.

    Returns
    -------
    DataFrame
        r_px (bin centre), g (pair distribution; NaN where undefined), count (number of unordered pairs in the
        bin; scaled from the reference subset for large sets).

    References
    ----------
    J. Ohser and D. Stoyan, Biom. J. 23 (1981) 523.
    """
    if not (r_max_px is not None and np.isfinite(r_max_px) and r_max_px > 0):
        raise TenfoldInputError(f"pair_distribution: r_max_px={r_max_px!r} must be a positive number of pixels")
    if bin_px is not None and not (np.isfinite(bin_px) and 0 < bin_px < r_max_px):
        raise TenfoldInputError(f"pair_distribution: bin_px={bin_px!r} must be positive and below r_max_px")
    xy = _clean_xy(x_px, y_px, "pair_distribution")
    if len(xy) < 2:
        return pd.DataFrame({"r_px": pd.Series([], dtype=float), "g": pd.Series([], dtype=float),
                             "count": pd.Series([], dtype=float)})
    if bin_px is None:
        d_nn = float(np.median(cKDTree(xy).query(xy, k=2)[0][:, 1]))
        bin_px = d_nn / 40.0 if d_nn > 0 else r_max_px / 400.0
    _, d, n_ref = _pairs(xy, float(r_max_px), np.random.default_rng(rng))
    return _histogram(d, n_ref, xy, float(r_max_px), float(bin_px), edge_correction)


def _gauss_bg(r, a, mu, s, c0, c1):
    return a * np.exp(-0.5 * ((r - mu) / s) ** 2) + c0 + c1 * (r - mu)


#: stopping rule of the batched Gaussian fit: MINPACK's default relative tolerance (scipy.optimize.leastsq ftol,
#: xtol) and an iteration cap; a fit not converged by then is handed to curve_fit, so the cap costs time only
_FIT_TOL = 1.49012e-08
_FIT_MAX_ITER = 100


def _gauss_bg_residual(p: np.ndarray, r: np.ndarray, g: np.ndarray, w: np.ndarray, jacobian: bool):
    """Residuals (and Jacobian) of :func:`_gauss_bg` for a batch: p (m, 5), r, g, w (m, L); w masks padding."""
    a, mu, s, c0, c1 = (p[:, k, None] for k in range(5))
    with np.errstate(all="ignore"):  # a trial step may send s to 0; its cost is then not finite and it is refused
        z = (r - mu) / s
        e = np.exp(-0.5 * z * z)
        res = w * (a * e + c0 + c1 * (r - mu) - g)
        if not jacobian:
            return res, None
        jac = np.stack([e, a * e * z / s - c1, a * e * z * z / s, np.ones_like(r), r - mu], axis=-1) * w[..., None]
    return res, jac


def _fit_gauss_bg_batch(xs: list, ys: list, p0: np.ndarray, *, min_width=None) -> tuple[np.ndarray, np.ndarray]:
    """Least-squares fits of :func:`_gauss_bg`, one per window, all at once (Levenberg-Marquardt).

    The same estimator as ``scipy.optimize.curve_fit`` (MINPACK's Levenberg-Marquardt with Marquardt's scaling
    by the diagonal of J^T J; D. W. Marquardt, J. Soc. Indust. Appl. Math. 11 (1963) 431) from the same start,
    with the analytic Jacobian and every window advanced in one numpy step, so a few hundred fits cost about as
    much as one. Converged when an accepted step lowers the sum of squares, and the linear model predicts it to
    lower it, by at most ``_FIT_TOL`` relative (MINPACK's ftol test), when the scaled step is that small relative
    to the scaled parameters (its xtol test), or when no step can lower it any more; at most ``_FIT_MAX_ITER``
    steps.

    Parameters
    ----------
    xs, ys : list of 1-D arrays
        Abscissae and data of each window (lengths may differ).
    p0 : (m, 5) array
        Start values (a, mu, s, c0, c1) per window.
    min_width : (m,) array, optional
        A fit whose width |s| is below this after 20 steps is given up (``ok`` False): the caller only keeps
        fits at least this wide and refits the others with curve_fit.

    Returns
    -------
    params : (m, 5) array
    ok : (m,) bool
        False when a fit did not converge within ``_FIT_MAX_ITER`` steps (the caller falls back, as on a
        ``curve_fit`` RuntimeError).
    """
    m = len(xs)
    p = np.array(p0, dtype=float).reshape(m, 5)
    ok = np.zeros(m, bool)
    if m == 0:
        return p, ok
    width = max(len(x) for x in xs)
    r = np.empty((m, width))
    g = np.zeros((m, width))
    w = np.zeros((m, width))
    for k, (x, y) in enumerate(zip(xs, ys)):  # padding only; one row per window
        r[k] = x[0]
        r[k, :len(x)] = x
        g[k, :len(y)] = y
        w[k, :len(x)] = 1.0
    res, jac = _gauss_bg_residual(p, r, g, w, True)
    cost = (res * res).sum(axis=1)
    lam = np.full(m, 1e-3)
    active = np.isfinite(cost)
    eye = np.eye(5)
    for it in range(_FIT_MAX_ITER):
        act = np.flatnonzero(active)
        if len(act) == 0:
            break
        ja, ra = jac[act], res[act]
        jtj = np.einsum("nli,nlj->nij", ja, ja)
        grad = np.einsum("nli,nl->ni", ja, ra)
        diag = np.diagonal(jtj, axis1=1, axis2=2)
        diag = np.maximum(diag, 1e-12 * diag.max(axis=1, keepdims=True) + 1e-300)
        with np.errstate(all="ignore"):
            step = -np.linalg.solve(jtj + lam[act, None, None] * diag[:, :, None] * eye, grad[..., None])[..., 0]
        trial = p[act] + step
        r_new, j_new = _gauss_bg_residual(trial, r[act], g[act], w[act], True)
        c_new = (r_new * r_new).sum(axis=1)
        c_old = cost[act]
        better = np.isfinite(c_new) & np.isfinite(trial).all(axis=1) & (c_new <= c_old)
        pred = -(2.0 * (step * grad).sum(axis=1) + np.einsum("ni,nij,nj->n", step, jtj, step))
        tol = _FIT_TOL * np.maximum(c_old, 1e-300)
        scale = np.sqrt(diag)  # MINPACK's variable scaling: the column norms of the Jacobian
        small_step = np.linalg.norm(scale * step, axis=1) <= _FIT_TOL * np.linalg.norm(scale * p[act], axis=1)
        conv = better & (((c_old - c_new <= tol) & (np.abs(pred) <= tol)) | small_step)
        stuck = ~better & (lam[act] > 1e12)  # no step lowers the sum of squares: at its minimum to rounding
        acc = act[better]
        p[acc], res[acc], jac[acc], cost[acc] = trial[better], r_new[better], j_new[better], c_new[better]
        lam[act] = np.where(better, np.maximum(lam[act] / 10.0, 1e-15), lam[act] * 10.0)
        fin = act[conv | stuck]
        ok[fin] = True
        active[fin] = False
        if min_width is not None and it >= 20:
            active &= ~(np.abs(p[:, 2]) < min_width)
    return p, ok & np.isfinite(p).all(axis=1)


def _curve_fit_one(x: np.ndarray, y: np.ndarray, p0) -> np.ndarray:
    """One :func:`_gauss_bg` fit, exactly as ``curve_fit(_gauss_bg, x, y, p0, maxfev=2000)`` (the same MINPACK
    call, ``leastsq`` with its defaults, on the same residuals) without curve_fit's per-call wrappers and
    covariance; NaN where curve_fit would raise."""
    from scipy.optimize import leastsq

    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    if not (np.isfinite(x).all() and np.isfinite(y).all()):
        return np.full(5, np.nan)

    # MINPACK calls the residual up to 2000 times per fit (a narrow peak that never converges uses them all), and
    # its finite-difference Jacobian steps a, c0 and c1 with mu and s held: the Gaussian of the last few (mu, s)
    # is kept. _gauss_bg's operations in its order, on Python floats: the same bits.
    shapes: dict = {}

    def residual(p):
        a, mu, s, c0, c1 = p.tolist()
        shape = shapes.get((mu, s))
        if shape is None:
            if len(shapes) > 8:
                shapes.clear()
            d = x - mu
            shape = shapes[mu, s] = (d, np.exp(-0.5 * (d / s) ** 2))
        d, e = shape
        return a * e + c0 + c1 * d - y

    with np.errstate(all="ignore"):
        p, _, _, _, ier = leastsq(residual, np.atleast_1d(np.asarray(p0, dtype=float)), full_output=1, maxfev=2000)
    return p if ier in (1, 2, 3, 4) else np.full(5, np.nan)


def _empty_peaks() -> pd.DataFrame:
    cols = ["distance_px", "height", "width_px", "prominence", "fit"]
    return pd.DataFrame({c: pd.Series([], dtype=float if c != "fit" else object) for c in cols})


def _peak_candidates(r: np.ndarray, g: np.ndarray, cnt: np.ndarray, min_prominence: float | None,
                     max_peaks: int) -> dict | None:
    """Local maxima of a pair distribution and the fit window, start width and start values of each (the first
    half of :func:`locate_peaks`); None when there is no peak."""
    from scipy.ndimage import gaussian_filter1d
    from scipy.signal import find_peaks, peak_widths

    if len(r) < 5:
        return None
    g = np.nan_to_num(g, nan=0.0)
    bw = float(r[1] - r[0])
    gs = gaussian_filter1d(g, 1.5)
    noise = np.where(cnt > 0, g / np.sqrt(np.maximum(cnt, 1.0)), 0.0)
    noise_s = gaussian_filter1d(noise, 5.0)
    prom_min = 0.03 * float(gs.max()) if min_prominence is None else float(min_prominence)
    idx, props = find_peaks(gs, prominence=prom_min)
    prom = props["prominences"]
    if min_prominence is None:
        keep = prom >= 4.0 * noise_s[idx]
        idx, prom = idx[keep], prom[keep]
    if len(idx) == 0:
        return None
    if len(idx) > max_peaks:
        top = np.sort(np.argsort(-prom)[:max_peaks])
        idx, prom = idx[top], prom[top]
    wid = peak_widths(gs, idx, rel_height=0.5)[0] * bw / 2.3548
    # A fit window never reaches past the midpoint to a neighbouring maximum: otherwise two close peaks (a width
    # read across both at half height) are fitted as one broad Gaussian halfway between them.
    mids = 0.5 * (r[idx[1:]] + r[idx[:-1]])
    left = np.concatenate([[-np.inf], mids])
    right = np.concatenate([mids, [np.inf]])
    s0 = np.maximum(np.minimum(wid, (right - left) / 2.5), bw)
    lo = np.maximum(np.searchsorted(r, np.maximum(r[idx] - 2.5 * s0, left)), 0)
    hi = np.minimum(np.searchsorted(r, np.minimum(r[idx] + 2.5 * s0, right)) + 1, len(r))
    return {"r": r, "g": g, "gs": gs, "bw": bw, "idx": idx, "prom": prom, "s0": s0, "lo": lo, "hi": hi,
            "left": left, "right": right}


#: the per-peak entries of a candidates dict (the others describe the whole curve)
_PER_PEAK = ("idx", "prom", "s0", "lo", "hi", "left", "right")


def _fit_windows(c: dict) -> tuple[list, list, list, list]:
    """(peak numbers, window abscissae, window data, start values) of the peaks with a window of >= 6 bins."""
    r, g, gs, idx = c["r"], c["g"], c["gs"], c["idx"]
    which, xs, ys, p0 = [], [], [], []
    for k, i in enumerate(idx):  # a few dozen peaks at most; the fits themselves run batched
        lo, hi = c["lo"][k], c["hi"][k]
        if hi - lo >= 6:
            floor = gs[lo:hi].min()
            which.append(k)
            xs.append(r[lo:hi])
            ys.append(g[lo:hi])
            p0.append([g[i] - floor, r[i], c["s0"][k], floor, 0.0])
    return which, xs, ys, p0


def _peaks_table(c: dict, fitted: np.ndarray) -> pd.DataFrame:
    """The peaks table from the candidates and their fits (rows of NaN for a failed or absent fit); a fit is kept
    only near its start and inside its window, else the parabola through the three highest bins of log g."""
    r, gs, bw, idx, s0 = c["r"], c["gs"], c["bw"], c["idx"], c["s0"]
    a, mu, s = fitted[:, 0], fitted[:, 1], fitted[:, 2]
    with np.errstate(invalid="ignore"):
        good = (np.abs(mu - r[idx]) < 2 * s0) & (c["left"] < mu) & (mu < c["right"]) & (np.abs(s) > 0) \
            & (np.abs(s) < 5 * s0) & (a > 0)
    dist = np.where(good, mu, np.nan)
    width = np.where(good, np.abs(s), np.nan)
    height = np.where(good, a + fitted[:, 3], np.nan)
    how = np.where(good, "gauss", "parabola").astype(object)
    for k in np.flatnonzero(~good):  # the rare failed fits
        j = int(np.clip(idx[k], 1, len(r) - 2))
        lg = np.log(np.maximum(gs[j - 1:j + 2], 1e-12))
        den = lg[0] - 2 * lg[1] + lg[2]
        off = 0.5 * (lg[0] - lg[2]) / den if den < 0 else 0.0
        dist[k] = r[j] + np.clip(off, -1, 1) * bw
        width[k] = np.sqrt(-bw * bw / den) if den < 0 else s0[k]
        height[k] = gs[j]
    out = pd.DataFrame({"distance_px": dist.astype(float), "height": height.astype(float),
                        "width_px": width.astype(float), "prominence": c["prom"].astype(float), "fit": how})
    return out.sort_values("distance_px").reset_index(drop=True)


def _locate_peaks_many(curves: list, *, min_prominence: float | None = None, max_peaks: int = 40,
                       keep=None) -> list:
    """:func:`locate_peaks` for several curves given as (r, g, count) arrays, with every Gaussian fit of every
    curve in one batch. ``keep(n, candidates)``, if given, returns a mask of the candidate peaks of curve n to fit
    and report (windows and start values are those of all candidates, so the kept ones come out unchanged)."""
    cands = [_peak_candidates(np.asarray(r, float), np.asarray(g, float), np.asarray(n, float), min_prominence,
                              max_peaks) for r, g, n in curves]
    if keep is not None:
        for n, c in enumerate(cands):
            if c is not None:
                m = np.asarray(keep(n, c), dtype=bool)
                cands[n] = {k: (v[m] if k in _PER_PEAK else v) for k, v in c.items()} if m.any() else None
    owner, which, xs, ys, p0 = [], [], [], [], []
    for ci, c in enumerate(cands):
        if c is not None:
            wk, x, y, p = _fit_windows(c)
            owner += [ci] * len(wk)
            which += wk
            xs += x
            ys += y
            p0 += p
    bins = np.array([cands[ci]["bw"] for ci in owner])
    params, ok = _fit_gauss_bg_batch(xs, ys, np.asarray(p0, float).reshape(-1, 5), min_width=bins)
    fitted = [np.full((len(c["idx"]), 5), np.nan) if c is not None else None for c in cands]
    for n, (ci, k) in enumerate(zip(owner, which)):
        if not (ok[n] and abs(params[n, 2]) >= cands[ci]["bw"]):
            # A peak narrower than a bin has no finite least-squares width (it collapses toward a spike) and
            # where an optimiser stops is then its own choice: such fits, and the rare unconverged ones, are
            # left to curve_fit exactly as before, so the results stay those of the earlier releases.
            params[n] = _curve_fit_one(xs[n], ys[n], p0[n])
        fitted[ci][k] = params[n]
    return [_empty_peaks() if c is None else _peaks_table(c, f) for c, f in zip(cands, fitted)]


def locate_peaks(curve: pd.DataFrame, *, min_prominence: float | None = None, max_peaks: int = 40) -> pd.DataFrame:
    """Peaks of a pair distribution with sub-bin positions and widths.

    Local maxima of g smoothed by a 1.5-bin Gaussian, kept when their prominence exceeds ``min_prominence``
    (default: the larger of 4 x the Poisson noise of g near the peak and 3 % of the highest g). Each is then fitted
    by a Gaussian on a linear background (least squares, Levenberg-Marquardt, all peaks at once; the estimator of
    scipy's ``curve_fit``) over +-2.5 widths; a failed fit falls back to the parabola through the three highest
    bins of log g.

    Parameters
    ----------
    curve : DataFrame
        From :func:`pair_distribution` (r_px, g, count).
    min_prominence : float, optional
        Smallest peak prominence in units of g.
    max_peaks : int
        Keep at most this many peaks (the most prominent).

    Returns
    -------
    DataFrame
        distance_px, height (g at the peak), width_px (Gaussian standard deviation), prominence, fit ('gauss'
        or 'parabola'), sorted by distance.
    """
    arrays = (curve["r_px"].to_numpy(dtype=float), curve["g"].to_numpy(dtype=float),
              curve["count"].to_numpy(dtype=float))
    return _locate_peaks_many([arrays], min_prominence=min_prominence, max_peaks=max_peaks)[0]


# --------------------------------------------------------------------------------------------- ladder fit
def _periodic_sequences(upto: float) -> dict[str, np.ndarray]:
    m = int(np.ceil(upto)) + 1
    h, k = np.meshgrid(np.arange(0, m + 1), np.arange(-m, m + 1), indexing="ij")
    sq = np.unique(np.sqrt(h * h + k * k).ravel())
    hx = np.unique(np.sqrt(np.abs(h * h + h * k + k * k)).ravel())
    ints = np.arange(1, m + 1, dtype=float)
    return {"integer": ints, "square": sq[(sq > 0) & (sq <= upto)], "hexagonal": hx[(hx > 0) & (hx <= upto)]}


def _unique_values(v: np.ndarray, rel: float = 1e-6) -> np.ndarray:
    v = np.sort(v)
    keep = np.ones(len(v), bool)
    keep[1:] = np.diff(v) > rel * v[1:]
    return v[keep]


def _loglik(p: np.ndarray, sig: np.ndarray, values: np.ndarray, span: tuple[float, float]) -> tuple[float, int, np.ndarray]:
    """Log-likelihood of peak positions under 'peaks sit at one of these K values' with an outlier share.

    f(p) = (1 - eps) (1/K) sum_j N(p; v_j, sig) + eps / L over the range L; eps = 0.1 (common practice for a
    robust mixture). A denser sequence explains more peaks but pays log K for each: the likelihood ratio is fair
    between sparse and dense models. Returns (log L, peaks within 3 sig of a value, nearest value index or -1).
    """
    eps = 0.1
    width = max(span[1] - span[0], 1e-9)
    vals = values[(values >= span[0] - 3 * sig.max()) & (values <= span[1] + 3 * sig.max())]
    if len(vals) == 0:
        return float(len(p) * np.log(eps / width)), 0, np.full(len(p), -1)
    z = (p[:, None] - vals[None, :]) / sig[:, None]
    dens = np.exp(-0.5 * z * z).sum(axis=1) / (np.sqrt(2 * np.pi) * sig * len(vals))
    ll = np.log((1 - eps) * dens + eps / width).sum()
    j = np.argmin(np.abs(z), axis=1)
    hit = np.abs(z[np.arange(len(p)), j]) <= 3.0
    idx = np.flatnonzero((values >= span[0] - 3 * sig.max()) & (values <= span[1] + 3 * sig.max()))
    return float(ll), int(hit.sum()), np.where(hit, idx[j], -1)


def _best_periodic(p, sig, seq, span):
    """Best scale for a periodic sequence: anchored on each of the first three peaks, then least squares."""
    best = (-np.inf, 0, np.nan)
    for anchor in p[:3]:  # three anchors
        a = anchor
        for _ in range(3):
            _, _, j = _loglik(p, sig, a * seq, span)
            hit = j >= 0
            if hit.sum() == 0:
                break
            w = 1 / sig[hit] ** 2
            a = float((w * p[hit] * seq[j[hit]]).sum() / (w * seq[j[hit]] ** 2).sum())
        ll, n_ok, _ = _loglik(p, sig, a * seq, span)
        if ll > best[0]:
            best = (ll, n_ok, a)
    return best


def _evidence(peaks: pd.DataFrame, sig_pos: np.ndarray, d0: float, rungs: np.ndarray, matched_rungs: np.ndarray,
              rung_share: float) -> tuple[dict, bool]:
    # Compare within 0.5 .. 4.5 d0: further out every family is dense enough for chance coincidences to dominate.
    sel = (peaks["distance_px"] >= 0.5 * d0) & (peaks["distance_px"] <= 4.5 * d0)
    p = peaks.loc[sel, "distance_px"].to_numpy()
    if len(p) == 0:
        return {"verdict": "ladder does not hold: no peaks between 0.5 and 4.5 d0"}, False
    sig = sig_pos[sel.to_numpy()]
    span = (0.5 * d0, 4.5 * d0)
    known = np.array([v for v, _ in KNOWN_RATIOS])
    dec_vals = _unique_values(np.concatenate([TAU ** rungs, known])) * d0
    ll_dec, n_dec, _ = _loglik(p, sig, dec_vals, span)
    alts = {}
    upto = 4.6 * d0 / max(p.min(), 1e-9) * 1.2
    for name, seq in _periodic_sequences(upto).items():
        ll, n_ok, a = _best_periodic(p, sig, seq, span)
        alts[name] = {"log_likelihood": float(ll), "peaks_explained": int(n_ok), "scale_px": float(a),
                      "sequence_values_in_range": int(((a * seq >= span[0]) & (a * seq <= span[1])).sum())}
    best_alt = max(alts, key=lambda k: alts[k]["log_likelihood"])
    two_ln_lr = 2.0 * (ll_dec - alts[best_alt]["log_likelihood"])
    n_rungs = int(len(np.unique(matched_rungs)))
    holds = bool(n_rungs >= 3 and two_ln_lr >= 10.0)
    if holds:
        verdict = (f"ladder holds: {n_rungs} rungs matched, decagonal model beats the best periodic alternative "
                   f"({best_alt}) by 2 ln LR = {two_ln_lr:.1f}")
    else:
        why = (f"only {n_rungs} distinct rungs matched" if n_rungs < 3 else
               f"decagonal model does not beat the {best_alt} alternative decisively (2 ln LR = {two_ln_lr:.1f} < 10)")
        verdict = f"ladder does not hold: {why}"
    return {"n_peaks_compared": int(len(p)), "compared_range_d0": [0.5, 4.5], "n_rungs_matched": n_rungs,
            "rung_weight_share": float(rung_share), "log_likelihood_decagonal": float(ll_dec),
            "peaks_explained_decagonal": int(n_dec),
            "decagonal_values_in_range": int(((dec_vals >= span[0]) & (dec_vals <= span[1])).sum()),
            "alternatives": alts, "best_alternative": best_alt, "two_ln_likelihood_ratio": float(two_ln_lr),
            "threshold_two_ln_lr": 10.0, "outlier_share": 0.1, "verdict": verdict}, holds


def _match(p, sig_rel, d0, rungs, half_step):
    """Nearest rung or known ratio for each peak; on the ladder only when a rung is the closest within tolerance."""
    ratio = p / d0
    rr = TAU ** rungs
    known = np.array([v for v, _ in KNOWN_RATIOS])
    names = np.array([n for _, n in KNOWN_RATIOS], dtype=object)
    jr = np.argmin(np.abs(np.log(ratio[:, None] / rr[None, :])), axis=1)
    er = np.abs(np.log(ratio / rr[jr]))
    jk = np.argmin(np.abs(np.log(ratio[:, None] / known[None, :])), axis=1)
    ek = np.abs(np.log(ratio / known[jk]))
    on = (er <= sig_rel) & (er <= ek)
    lab_known = (~on) & (ek <= sig_rel)
    rung = np.where(on, rungs[jr], np.nan)
    fmt = (lambda v: f"tau^{v:g}")
    label = np.where(on, [fmt(v) for v in rungs[jr]], np.where(lab_known, names[jk], "unassigned"))
    # Still unassigned: a short decagonal-module length sqrt(a + b tau) within a tenth of the tolerance, if any.
    mod = np.array([v for v, _ in MODULE_LENGTHS])
    mnames = np.array([n for _, n in MODULE_LENGTHS], dtype=object)
    jm = np.argmin(np.abs(np.log(ratio[:, None] / mod[None, :])), axis=1)
    em = np.abs(np.log(ratio / mod[jm]))
    use = (label == "unassigned") & (em <= 0.2 * sig_rel)
    label = np.where(use, mnames[jm], label)
    return on, rung, label.astype(object)


@renamed_keywords(r_max_px="ladder_r_max_px")
def fit_ladder(
    x_px,
    y_px,
    *,
    point_set: str = "columns",
    d0_px: float | None = None,
    ladder_r_max_px: float | None = None,
    half_step: bool = False,
    pixel_size_nm: float | None = None,
    n_boot: int = 200,
    rng: np.random.Generator | int | None = 0,
) -> tuple[pd.DataFrame, pd.DataFrame, dict]:
    """Fit the golden-ratio ladder d_n = d0 tau^n to the peaks of a point set's pair distribution.

    Parameters
    ----------
    x_px, y_px : arrays
        Point positions in px (columns or motif centres).
    point_set : {'columns', 'centres'}
        Which point set this is (written to the 'set' column).
    d0_px : float, optional
        Base distance in px; default: the strongest short-range peak (highest g among the peaks closer than twice
        the first peak).
    ladder_r_max_px : float, optional
        Largest pair distance; default max(8 x median nearest-neighbour distance, 1.1 d0 tau^4). ``r_max_px`` is a
        deprecated alias.
    half_step : bool
        Also allow half-integer rungs tau^(n/2).
    pixel_size_nm : float, optional
        For the ``*_nm`` columns; None leaves them NaN (uncalibrated).
    n_boot : int
        0: rung uncertainties from peak width / sqrt(pairs) only; any positive value (default): block jackknife
        over up to 16 image blocks (see ``_uncertainty``). Kept under this name for compatibility.
    rng : Generator or int
        Reference-subset choice and bootstrap.

    Returns
    -------
    ladder : DataFrame
        ``_schema.LADDER``: set, rung, ideal_ratio, ideal_nm, measured_px, measured_nm, ratio, deviation_pct,
        uncertainty_pct, peak_weight.
    peaks : DataFrame
        ``_schema.PEAKS``: set, distance_px, distance_nm, ratio_to_d0, on_ladder, rung, label, height, width_px.
    info : dict
        'd0_px', 'd0_nm', 'd0_source', 'r_max_px', 'n_points', 'holds', 'evidence' (numbers and a one-line
        'verdict'), 'rung_weight_share', 'message' when nothing could be fitted, and 'curve' (the pair
        distribution DataFrame; not JSON: the pipeline pops it into ``result.curves``).

    References
    ----------
    J. Ohser and D. Stoyan, Biom. J. 23 (1981) 523; R. E. Kass and A. E. Raftery, J. Am. Stat. Assoc. 90 (1995) 773.
    """
    if point_set not in ("columns", "centres"):
        raise TenfoldInputError(f"fit_ladder: point_set={point_set!r} must be 'columns' or 'centres'")
    r_max_px = ladder_r_max_px
    for name, v in (("d0_px", d0_px), ("ladder_r_max_px", r_max_px)):
        if v is not None and not (np.isfinite(v) and v > 0):
            raise TenfoldInputError(f"fit_ladder: {name}={v!r} must be a positive number of pixels (or None)")
    check_pixel_size(pixel_size_nm, plausible=False)
    if n_boot < 0:
        raise TenfoldInputError(f"fit_ladder: n_boot={n_boot!r} must be >= 0")
    xy = _clean_xy(x_px, y_px, "fit_ladder")
    gen = np.random.default_rng(rng)
    scale = pixel_size_nm if pixel_size_nm else np.nan
    info: dict = {"set": point_set, "n_points": int(len(xy)), "calibrated": pixel_size_nm is not None,
                  "half_step": bool(half_step), "holds": False, "d0_px": None, "d0_nm": None}

    def _none(msg):
        info["message"] = msg
        info["evidence"] = {"verdict": f"ladder not evaluated: {msg}"}
        return empty_table(LADDER), empty_table(PEAKS), info

    if len(xy) < 3:
        return _none(f"too few points ({len(xy)}) for pair distances")
    span = np.ptp(xy, axis=0)
    if np.linalg.matrix_rank(xy - xy.mean(axis=0), tol=1e-9 * max(span.max(), 1.0)) < 2:
        return _none("all points are collinear: no two-dimensional pair distribution")
    d_nn = float(np.median(cKDTree(xy).query(xy, k=2)[0][:, 1]))
    if not d_nn > 0:
        return _none("points coincide (median nearest-neighbour distance 0 px)")
    if r_max_px is None:
        r_max = max(8.0 * d_nn, 1.1 * d0_px * TAU ** 4 if d0_px else 0.0)
    else:
        r_max = float(r_max_px)
    r_max = min(r_max, 0.5 * float(span.min())) if span.min() > 0 else r_max
    info["r_max_px"] = float(r_max)
    if r_max <= d_nn:
        return _none(f"point set too small: r_max {r_max:.3g} px is not above the nearest-neighbour distance")
    ref_i, d, n_ref, ref_points = _pairs(xy, r_max, gen, return_ref=True)
    bin_px = d_nn / 40.0
    curve = _histogram(d, n_ref, xy, r_max, bin_px, True)
    curve["r_nm"] = curve["r_px"] * scale
    info["curve"] = curve
    pk = locate_peaks(curve)
    pk = pk[(pk["distance_px"] > 0.3 * d_nn) & (pk["distance_px"] < r_max)].reset_index(drop=True)
    if len(pk) == 0:
        return _none("no peaks in the pair distribution")
    pk = _rice_corrected(_split_broad(_refine_narrow(pk, np.sort(d), bin_px), curve))
    p = pk["distance_px"].to_numpy()
    wpx = np.maximum(pk["width_px"].to_numpy(), bin_px)
    # Pairs per peak window (+-2 widths), for weights and the uncertainties.
    lo, hi = p - 2 * wpx, p + 2 * wpx
    jn = np.clip(np.searchsorted(p, d), 0, len(p) - 1)
    jp = np.clip(jn - 1, 0, len(p) - 1)
    jbest = np.where(np.abs(d - p[jn]) < np.abs(d - p[jp]), jn, jp)
    inwin = (d >= lo[jbest]) & (d <= hi[jbest])
    weight = np.bincount(jbest[inwin], minlength=len(p)) / max(len(d), 1)
    # d0 is fitted with each peak weighted by its position variance width^2 / pairs, so a narrow peak made of a
    # few coincidental pairs cannot pull the whole ladder.
    fit_w = np.maximum(weight * len(d), 1.0) / wpx**2
    w_noise = float(np.median(np.sort(pk["width_px"].to_numpy())[:3]))
    # Fitted widths scatter by some 20 %: only a peak clearly broader than the narrowest ones (by more than
    # _UNRESOLVED_FACTOR) counts as holding unresolved distances, and only its width beyond that.
    unresolved = np.sqrt(np.maximum(pk["width_px"].to_numpy() ** 2 - (_UNRESOLVED_FACTOR * w_noise) ** 2, 0.0))
    # Position uncertainty of each peak for the model comparison: width / sqrt(pairs), with a 0.2 % floor for
    # systematic effects (finite-size and overlap shifts; common practice). The unresolved width is left out
    # here: it would let the dense periodic sequences explain every broad peak.
    n_pairs = np.maximum(weight * len(d), 1.0)
    sig_pos = np.sqrt((wpx / np.sqrt(n_pairs)) ** 2 + (0.002 * p) ** 2)
    step = 0.5 if half_step else 1.0
    sig_rel = np.clip(np.maximum(1.5 * wpx, 2 * bin_px) / p, 0.01, 0.05)

    def scale_and_match(d0):
        rungs = np.arange(np.floor(np.log(p.min() / d0) / np.log(TAU)) - 1,
                          np.ceil(np.log(r_max / d0) / np.log(TAU)) + 1, step)
        for _ in range(2):  # match, refit d0 on the matched rungs, match again
            on, rung, label = _match(p, sig_rel, d0, rungs, half_step)
            if not on.any():
                break
            # The scale comes from the short rungs (|n| <= 2), where pairs are many and specific; longer rungs are
            # then tested against it instead of pulling it (a coincidental long distance near tau^4 would otherwise
            # shift every short rung by its own error).
            use = on & (np.abs(np.nan_to_num(rung, nan=99.0)) <= 2)
            if use.sum() < 2:
                use = on
            w = fit_w[use]
            q = TAU ** rung[use]
            d0 = float((w * p[use] * q).sum() / (w * q * q).sum())
        on, rung, label = _match(p, sig_rel, d0, rungs, half_step)
        return d0, rungs, on, rung, label

    if d0_px is None:
        # Every peak closer than twice the first is tried as the base; the one whose ladder the evidence supports
        # best wins. The strongest short peak alone can be a chord such as 2 sin 36 x edge.
        short = np.flatnonzero(p <= 2.0 * p[0])
        trials = []
        for j in short:  # a handful of candidates
            d0_j, rungs_j, on_j, rung_j, _ = scale_and_match(float(p[j]))
            ev_j, _ = _evidence(pk, sig_pos, d0_j, rungs_j, rung_j[on_j], float(weight[on_j].sum()))
            trials.append((ev_j.get("two_ln_likelihood_ratio", -np.inf), float(pk["height"].iloc[j]), float(p[j]),
                           d0_j))
        # Bases tau^k apart give the same ladder shifted by k rungs (their likelihood ratios differ only through
        # the compared range): of the ladder the evidence supports best, the highest peak is the base, as it
        # always was.
        top = max(trials)
        k = np.log(np.array([t[3] for t in trials]) / top[3]) / np.log(TAU)
        same = [t for t, kk in zip(trials, k) if abs(kk - np.round(kk)) < 0.03]
        best = max(same, key=lambda t: t[1])
        d0 = best[2]
        info["d0_source"] = (f"automatic: of the {len(short)} pair-distribution peaks closer than twice the first "
                             f"({p[0]:.4g} px), the highest of those whose ladder the evidence supports "
                             f"best (2 ln LR {best[0]:.1f}, within 2 of the best)")
        info["d0_trials"] = [{"start_px": t[2], "two_ln_lr": float(t[0])} for t in trials]
    else:
        d0 = float(d0_px)
        info["d0_source"] = "given"
    d0, rungs, on, rung, label = scale_and_match(d0)
    info["d0_px"] = float(d0)
    info["d0_nm"] = float(d0 * pixel_size_nm) if pixel_size_nm else None
    rung_share = float(weight[on].sum())
    ladder_rows = pd.DataFrame()
    if on.any():
        # Keep one peak per rung: the one closest to its ideal position.
        idx = np.flatnonzero(on)
        dev = np.abs(np.log(p[idx] / (d0 * TAU ** rung[idx])))
        order = np.lexsort((dev, rung[idx]))
        first = np.ones(len(order), bool)
        first[1:] = rung[idx][order][1:] != rung[idx][order][:-1]
        idx = np.sort(idx[order[first]])
        side = max(2.0 * r_max, float(span.max()) / np.sqrt(_JACKKNIFE_BLOCKS))
        blk, n_blk = _blocks(xy, ref_points, side)

        edges = _bin_edges(r_max, bin_px)
        order_d = np.argsort(d, kind="stable")
        d_sorted, blk_sorted = d[order_d], blk[ref_i][order_d]
        nb = len(edges) - 1
        b_idx = np.clip(np.searchsorted(edges, d_sorted, side="right") - 1, 0, nb - 1)
        cnt_blk = np.bincount(blk_sorted * nb + b_idx, minlength=n_blk * nb).reshape(n_blk, nb)
        cnt_all = cnt_blk.sum(axis=0)
        ref_blk = np.bincount(blk, minlength=n_blk)

        def locate(targets, widths):
            """(blocks, targets) peak positions nearest ``targets`` (within 2 widths) without the pairs of each
            block's reference points; only a window of the pair distribution around each target is searched, and
            the peak fits of every block and window run as one batch."""
            keys, windows = [], []
            for b in range(n_blk):  # at most _JACKKNIFE_BLOCKS curves
                c = _curve(cnt_all - cnt_blk[b], edges, max(int(len(blk) - ref_blk[b]), 1), xy, True)
                rr, gg, nn = (c[k].to_numpy(dtype=float) for k in ("r_px", "g", "count"))
                for t, (tg, wd) in enumerate(zip(targets, widths)):  # a handful of rungs
                    half = max(8.0 * wd, 8.0 * bin_px)
                    sel = (rr >= tg - half) & (rr <= tg + half)
                    keys.append((b, t, half))
                    windows.append((rr[sel], gg[sel], nn[sel]))
            def could_be_nearest(n, c):
                # A peak's reported position stays within `reach` of its local maximum: the fit is kept within
                # 2 start widths (or the parabola within 2 bins), the raw-distance refinement moves a narrow peak
                # (< 3 bins) by at most 2 widths, the Rice shift by noise^2 / r. Peaks that cannot end up nearest
                # the target are not fitted: the nearest one, the only one used, comes out the same.
                r_k = c["r"][c["idx"]]
                reach = (np.maximum(2.0 * c["s0"], 2.0 * c["bw"]) + 6.0 * max(c["bw"], bin_px)
                         + w_noise ** 2 / np.maximum(r_k, 1e-12) + 1e-9)
                far = np.abs(r_k - targets[keys[n][1]])
                return far - reach <= (far + reach).min()

            out = np.full((n_blk, len(targets)), np.nan)
            for (b, t, half), pk_b in zip(keys, _locate_peaks_many(windows, keep=could_be_nearest)):
                if len(pk_b) == 0:
                    continue
                tg = targets[t]
                lo, hi = np.searchsorted(d_sorted, [tg - half, tg + half])
                raw = d_sorted[lo:hi][blk_sorted[lo:hi] != b]
                pk_b = _rice_corrected(_refine_narrow(pk_b, raw, bin_px), w_noise)
                q_b = pk_b["distance_px"].to_numpy()
                j = int(np.argmin(np.abs(q_b - tg)))
                if abs(q_b[j] - tg) <= 2.0 * max(widths[t], bin_px):
                    out[b, t] = q_b[j]
            return out

        u = _uncertainty(blk, n_blk, ref_i, d, jbest, inwin, idx, rung, wpx, p, n_boot, unresolved, locate)
        unc = u["ratio_pct"]
        info["uncertainty"] = {"method": u["how"] + "; plus, in quadrature, the estimator spread: half the "
                                                    "fit-vs-window-mean difference of each peak and its excess width "
                                                    f"beyond 1.5 x the narrowest peaks' width ({w_noise:.3g} px; unresolved distances)",
                               "birge_ratio": u["birge_ratio"], "block_px": float(side)}
        q = TAU ** rung[idx]
        ratio = p[idx] / d0
        ladder_rows = pd.DataFrame({
            "set": point_set, "rung": rung[idx], "ideal_ratio": q, "ideal_nm": d0 * q * scale,
            "measured_px": p[idx], "measured_nm": p[idx] * scale, "ratio": ratio,
            "deviation_pct": 100.0 * (ratio / q - 1.0), "uncertainty_pct": unc, "peak_weight": weight[idx],
            "ideal_px": d0 * q, "position_uncertainty_pct": u["position_pct"],
            "expanded_uncertainty_pct": 2.0 * u["position_pct"],
            "estimator_spread_pct": u["method_pct"],
        })
        dup = np.setdiff1d(np.flatnonzero(on), idx)
        on[dup] = False  # a second peak near an already matched rung is not a rung
        label[dup] = "unassigned"
        rung[dup] = np.nan
    peaks = pd.DataFrame({
        "set": point_set, "distance_px": p, "distance_nm": p * scale, "ratio_to_d0": p / d0, "on_ladder": on,
        "rung": rung, "label": label, "height": pk["height"].to_numpy(), "width_px": pk["width_px"].to_numpy(),
        "peak_weight": weight, "position_sd_px": np.hypot(sig_pos, unresolved),
    })
    ev, holds = _evidence(pk, sig_pos, d0, rungs, rung[on], rung_share)
    info["holds"] = holds
    info["evidence"] = ev
    info["rung_weight_share"] = rung_share
    info["n_rungs"] = int(on.sum())
    if len(ladder_rows):
        dv = ladder_rows["deviation_pct"].to_numpy()
        info["max_abs_deviation_pct"] = float(np.abs(dv).max())
        info["rms_deviation_pct"] = float(np.sqrt((dv ** 2).mean()))
        ladder = conform(ladder_rows, LADDER)
    else:
        ladder = empty_table(LADDER)
    return ladder, conform(peaks, PEAKS), info


def _two_gauss_bg(r, a1, m1, a2, m2, s, c0, c1):
    return (a1 * np.exp(-0.5 * ((r - m1) / s) ** 2) + a2 * np.exp(-0.5 * ((r - m2) / s) ** 2)
            + c0 + c1 * (r - 0.5 * (m1 + m2)))


def _split_broad(pk: pd.DataFrame, curve: pd.DataFrame) -> pd.DataFrame:
    """Split a peak more than ``_UNRESOLVED_FACTOR`` x broader than the narrowest ones into two, when two Gaussians
    of the noise width fit its window clearly better than one (a weak distance sitting on the shoulder of a strong
    one, e.g. a ring diameter beside a chord: fitted as one, the pair reads as a single shifted distance).

    Better means: the residual sum of squares drops by more than half and both components keep at least a tenth
    of the height, at least one noise width apart.
    """
    import warnings

    from scipy.optimize import OptimizeWarning, curve_fit

    if len(pk) < 3:
        return pk
    w = pk["width_px"].to_numpy(dtype=float)
    noise = float(np.median(np.sort(w)[:3]))
    if not noise > 0:  # exact positions (no noise width): nothing to split by
        return pk
    broad = np.flatnonzero(w > _UNRESOLVED_FACTOR * noise)
    if len(broad) == 0:
        return pk
    r = curve["r_px"].to_numpy(dtype=float)
    g = np.nan_to_num(curve["g"].to_numpy(dtype=float), nan=0.0)
    rows = pk.to_dict("records")
    extra = []
    for k in broad:  # a few broad peaks
        mu, wk = rows[k]["distance_px"], w[k]
        sel = (r >= mu - 3 * wk) & (r <= mu + 3 * wk)
        if sel.sum() < 10:
            continue
        rr, gg = r[sel], g[sel]
        with warnings.catch_warnings(), np.errstate(all="ignore"):  # a bad fit is judged by the checks below
            warnings.simplefilter("ignore", OptimizeWarning)
            try:
                p1, _ = curve_fit(_gauss_bg, rr, gg, p0=[gg.max() - gg.min(), mu, wk, gg.min(), 0.0], maxfev=2000)
                h = gg.max() - gg.min()
                p2, _ = curve_fit(_two_gauss_bg, rr, gg, p0=[h, mu - 0.7 * wk, 0.5 * h, mu + 0.7 * wk, noise,
                                                            gg.min(), 0.0], maxfev=4000)
            except (RuntimeError, ValueError):
                continue
        rss1 = float(((gg - _gauss_bg(rr, *p1)) ** 2).sum())
        rss2 = float(((gg - _two_gauss_bg(rr, *p2)) ** 2).sum())
        a1, m1, a2, m2, s2 = p2[0], p2[1], p2[2], p2[3], abs(p2[4])
        top = max(a1, a2)
        ok = (rss2 < 0.5 * rss1 and min(a1, a2) > 0.1 * top and abs(m2 - m1) > noise
              and rr[0] < min(m1, m2) and max(m1, m2) < rr[-1] and 0 < s2 < wk)
        if not ok:
            continue
        base = dict(rows[k])
        rows[k].update(distance_px=float(m1), height=float(a1 + p2[5]), width_px=float(s2), fit="gauss2")
        base.update(distance_px=float(m2), height=float(a2 + p2[5]), width_px=float(s2), fit="gauss2",
                    prominence=float(a2))
        extra.append(base)
    return pd.DataFrame(rows + extra).sort_values("distance_px").reset_index(drop=True)


def _rice_corrected(pk: pd.DataFrame, noise_px: float | None = None) -> pd.DataFrame:
    """Peak positions of g(r) turned into distances: D = r_peak + s^2 / (2 r_peak).

    Position noise of standard deviation s (per axis, of the difference of two points) turns a distance D into
    |D e + n|, whose density over the plane, g(r) ~ p(r) / r, peaks at D - s^2 / (2 D) to first order, while the
    mean of r is D + s^2 / (2 D) (the Rice distribution: S. O. Rice, Bell Syst. Tech. J. 23 (1944) 282; expansion
    for s << D). s is the position-noise width: the median width of the three narrowest peaks (``noise_px``; a
    broader peak is broad because it holds several distances, which is not noise). For the nearest neighbours
    of columns with 0.01 nm errors the correction is about 0.1 %.
    """
    pk = pk.copy()
    r = pk["distance_px"].to_numpy(dtype=float)
    w = pk["width_px"].to_numpy(dtype=float)
    if noise_px is None:
        noise_px = float(np.median(np.sort(w)[:3])) if len(w) else 0.0
    pk["distance_px"] = r + np.minimum(w, noise_px) ** 2 / (2.0 * np.maximum(r, 1e-12))
    return pk


def _refine_narrow(pk: pd.DataFrame, d_sorted: np.ndarray, bin_px: float) -> pd.DataFrame:
    """Peaks narrower than 3 bins: position from the raw pair distances, since a histogram fit cannot resolve them.

    Iterated windowed harmonic mean of the distances within +-max(1.5 bins, 1 width): the harmonic mean weights
    each pair by 1/r, which undoes the 2 pi r growth of the pair count and so estimates the centre of the peak
    in g(r). Width: the larger of the fitted width and the raw standard deviation in the window.
    """
    pk = pk.copy()
    narrow = pk["width_px"].to_numpy() < 3.0 * bin_px
    if not narrow.any():
        return pk
    mu = pk["distance_px"].to_numpy().copy()
    wid = pk["width_px"].to_numpy().copy()
    inv = 1.0 / np.maximum(d_sorted, 1e-12)
    cs_inv = np.concatenate([[0.0], np.cumsum(inv)])
    cs = np.concatenate([[0.0], np.cumsum(d_sorted)])
    cs2 = np.concatenate([[0.0], np.cumsum(d_sorted ** 2)])
    m0 = mu[narrow]
    m = m0.copy()
    h = np.maximum(0.75 * bin_px, 2.0 * wid[narrow])
    for _ in range(5):  # windowed mean, all narrow peaks at once
        lo = np.searchsorted(d_sorted, m - h)
        hi = np.searchsorted(d_sorted, m + h)
        cnt = hi - lo
        ok = cnt >= 3
        m = np.where(ok, cnt / np.maximum(cs_inv[hi] - cs_inv[lo], 1e-300), m)
    ok &= np.abs(m - m0) <= h
    mean = (cs[hi] - cs[lo]) / np.maximum(cnt, 1)
    var = (cs2[hi] - cs2[lo]) / np.maximum(cnt, 1) - mean ** 2
    mu[narrow] = np.where(ok, m, m0)
    wid[narrow] = np.where(ok, np.sqrt(np.maximum(var, 0.0)), wid[narrow])
    pk["distance_px"] = mu
    pk["width_px"] = wid
    return pk.sort_values("distance_px").reset_index(drop=True)


def _blocks(xy: np.ndarray, ref: np.ndarray, side: float) -> tuple[np.ndarray, int]:
    """Square image block (side ``side`` px) of every reference point, as labels 0..B-1."""
    key = np.floor((xy[ref] - xy.min(axis=0)) / side).astype(np.int64)
    _, lab = np.unique(key, axis=0, return_inverse=True)
    lab = lab.ravel()
    return lab, int(lab.max()) + 1 if len(lab) else 0


def _uncertainty(blk, n_blk, ref_i, d, jbest, inwin, idx, rung, wpx, p, n_boot, unresolved_px, locate) -> dict:
    """1-sigma uncertainties of the rungs ``idx``: of the ratio measured / d0 and of the position, in %.

    Two parts, added in quadrature:

    * **block jackknife of the whole estimator**: the reference points are grouped into image blocks (``blk``),
      and the pair distribution, its peaks and their positions are recomputed with each block left out in turn
      (``locate(targets, widths)`` returns them for every block at once); the jackknife variance (K - 1) / K sum (theta_k - mean)^2 then holds pair-to-pair noise,
      what the peak fit itself does, and regional differences (strain, drift, distortion gradients, fit bias that
      varies over the field). M. H. Quenouille, Biometrika 43 (1956) 353; J. W. Tukey, Ann. Math. Statist. 29
      (1958) 614; blocks for spatially dependent data: H. R. Kunsch, Ann. Statist. 17 (1989) 1217.
    * **estimator spread**: half the difference between the fitted peak position and the plain mean of the pair
      distances in its window, a measure of what the choice of peak estimator does (overlapping neighbours,
      asymmetric background; common practice), and, in quadrature, the excess width ``unresolved_px`` of a peak
      over the narrowest peaks: a peak broader than pure position noise holds several unresolved distances, and
      its position moves with how they are broadened, by up to about their spread.

    The Birge ratio sqrt(chi^2 / dof) of the rungs about d0 tau^n (R. T. Birge, Phys. Rev. 40 (1932) 207) is
    returned as a diagnostic but not applied: a long rung may be a structural distance close to, not at, a power
    of tau, and that is a finding (``deviation_pct``), not a measurement error.
    """
    q = TAU ** rung[idx]
    k = len(idx)
    slot = np.full(len(p), -1)
    slot[idx] = np.arange(k)
    sel = inwin & (slot[jbest] >= 0)
    n_pk = np.bincount(slot[jbest[sel]], minlength=k).astype(float)
    tot = np.bincount(slot[jbest[sel]], weights=d[sel], minlength=k)
    with np.errstate(divide="ignore", invalid="ignore"):
        mean_full = tot / n_pk
    method = np.where(np.isfinite(mean_full), 0.5 * np.abs(p[idx] - mean_full), 0.0)
    method = np.hypot(method, unresolved_px[idx])
    w = 1.0 / wpx[idx] ** 2
    pos = wpx[idx] / np.sqrt(np.maximum(n_pk, 1))
    ratio_sd = np.sqrt(2.0) * pos / p[idx]
    how = "peak width / sqrt(pairs) (no jackknife: n_boot = 0 or fewer than 4 image blocks)"
    if n_boot > 0 and k > 0 and n_blk >= 4:
        theta = locate(p[idx], wpx[idx])  # (blocks, rungs): the peak estimator redone without each block
        good = np.isfinite(theta).all(axis=0)
        if good.any():
            th = np.where(np.isfinite(theta), theta, p[idx][None, :])  # a block that loses a peak counts as no shift
            d0_k = (w * th * q).sum(axis=1) / (w * q * q).sum()
            ratio = th / d0_k[:, None]
            fac = (n_blk - 1) / n_blk
            pos = np.sqrt(fac * ((th - th.mean(axis=0)) ** 2).sum(axis=0))
            ratio_sd = np.sqrt(fac * ((ratio - ratio.mean(axis=0)) ** 2).sum(axis=0)) / q
            if k == 1:  # the single rung is d0 itself: its ratio is 1 by construction; quote its position error
                ratio_sd = pos / p[idx]
            how = f"block jackknife over {n_blk} image blocks (pair distribution and peak fit redone per block)"
    pos_pct = 100.0 * np.sqrt(pos ** 2 + method ** 2) / p[idx]
    ratio_pct = 100.0 * np.sqrt(ratio_sd ** 2 + (method / p[idx]) ** 2)
    d0 = float((w * p[idx] * q).sum() / (w * q * q).sum())
    dev = p[idx] / (d0 * q) - 1.0
    birge = 1.0
    if k >= 3:
        chi2 = float(np.sum((100.0 * dev / np.maximum(ratio_pct, 1e-9)) ** 2))
        birge = max(1.0, float(np.sqrt(chi2 / (k - 1))))
    return {"ratio_pct": ratio_pct, "position_pct": pos_pct, "method_pct": 100.0 * method / p[idx],
            "birge_ratio": birge, "how": how}


def ladder_agreement(ladder: pd.DataFrame, peaks: pd.DataFrame, *, n_sigma: float = 3.0,
                     match_pct: float = 1.5) -> dict:
    """Does the column ladder agree with the centre ladder where they measure the same distances?

    When all clusters share one orientation, equivalent columns of two clusters are as far apart as the cluster
    centres, so every centre rung shows up as a peak of the column pair distribution too. For each centre rung the
    column peak within ``match_pct`` % is compared with it in combined standard uncertainties (the centre rung's
    position uncertainty and the column peak's ``position_sd_px``). Column peaks are dense, so one far-off match
    may be another distance; the ladders disagree when at least two compared rungs, and at least half of them, are
    off by more than ``n_sigma`` in the same direction, and ``note`` then says so in one sentence.

    Parameters
    ----------
    ladder, peaks : DataFrame
        ``_schema.LADDER`` and ``_schema.PEAKS`` tables holding both sets ('columns' and 'centres').

    Returns
    -------
    dict
        'compared' (number of centre rungs with a column peak), 'rungs' (per rung: rung, centre_px, column_px,
        difference_pct, z), 'max_abs_z', 'agree' (bool or None when nothing could be compared), 'note' ('' when
        they agree), 'reason' when nothing was compared.
    """
    cen = ladder[ladder["set"] == "centres"] if len(ladder) else ladder
    col = peaks[peaks["set"] == "columns"] if len(peaks) else peaks
    out: dict = {"compared": 0, "rungs": [], "max_abs_z": None, "agree": None, "note": "", "n_sigma": n_sigma}
    if len(cen) == 0 or len(col) == 0:
        out["reason"] = "no centre ladder" if len(cen) == 0 else "no column pair-distance peaks"
        return out
    p = col["distance_px"].to_numpy(dtype=float)
    u_p = col["position_sd_px"].to_numpy(dtype=float) if "position_sd_px" in col else 0.002 * p
    dcen = cen["measured_px"].to_numpy(dtype=float)
    u_c = dcen * cen["position_uncertainty_pct"].to_numpy(dtype=float) / 100.0 if "position_uncertainty_pct" in cen \
        else dcen * cen["uncertainty_pct"].to_numpy(dtype=float) / 100.0
    j = np.argmin(np.abs(p[None, :] - dcen[:, None]), axis=1)
    rel = 100.0 * (p[j] / dcen - 1.0)
    ok = np.abs(rel) <= match_pct
    if not ok.any():
        out["reason"] = f"no column pair-distance peak within {match_pct:g} % of a centre rung"
        return out
    z = (p[j] - dcen) / np.sqrt(u_c ** 2 + u_p[j] ** 2)
    rungs = cen["rung"].to_numpy(dtype=float)
    out["rungs"] = [{"rung": float(r), "centre_px": float(a), "column_px": float(b), "difference_pct": float(dp),
                     "z": float(zz)} for r, a, b, dp, zz in zip(rungs[ok], dcen[ok], p[j][ok], rel[ok], z[ok])]
    out["compared"] = int(ok.sum())
    out["max_abs_z"] = float(np.abs(z[ok]).max())
    # Column peaks are dense: one off-peak match may be a different distance. A scale disagreement is coherent:
    # at least two compared rungs, and at least half of them, off by more than n_sigma in the same direction.
    zo = z[ok]
    off = max(int((zo > n_sigma).sum()), int((zo < -n_sigma).sum()))
    out["agree"] = not (off >= 2 and off >= 0.5 * len(zo))
    if not out["agree"]:
        k = int(np.flatnonzero(ok)[np.argmax(np.abs(z[ok]))])
        out["note"] = (f"the column ladder disagrees with the centre ladder: the column pair-distance peak at "
                       f"{p[j][k]:.4g} px is {rel[k]:+.2f} % off the centre rung tau^{rungs[k]:g} at {dcen[k]:.4g} px "
                       f"({abs(z[k]):.1f} combined standard uncertainties); column positions may carry a systematic "
                       "error (crowded-column fits, scan distortion) or the cluster centres are off")
    return out


def motif_ratios(motifs: pd.DataFrame) -> dict:
    """Motif-internal ratios: ring radius / ring edge and pentagon diagonal / edge, against their ideal values.

    For a regular n-gon the circumradius / edge is 1 / (2 sin(pi / n)), which is tau for the decagon; the
    diagonal / edge of a regular pentagon is tau (Euclid, Elements XIII).

    Parameters
    ----------
    motifs : DataFrame
        Motifs table (``_schema.MOTIFS``).

    Returns
    -------
    dict
        'ring_radius_over_edge' and 'pentagon_diag_over_edge', each with 'mean', 'std', 'n', 'ideal',
        'deviation_from_ideal_pct' (and 'deviation_from_tau_pct'); None values when there are no such motifs.
    """
    if not isinstance(motifs, pd.DataFrame):
        raise TenfoldInputError(f"motif_ratios: motifs must be a pandas DataFrame, got {type(motifs).__name__}")
    out = {}
    if len(motifs) == 0 or "kind" not in motifs:
        rings = pents = motifs.iloc[0:0] if isinstance(motifs, pd.DataFrame) else None
    else:
        rings = motifs[motifs["kind"].astype(str).str.startswith("ring")]
        pents = motifs[motifs["kind"] == "pentagon"]
    for key, df in (("ring_radius_over_edge", rings), ("pentagon_diag_over_edge", pents)):
        v = df["diag_edge_ratio"].to_numpy(dtype=float) if len(df) else np.zeros(0)
        v = v[np.isfinite(v)]
        if key.startswith("ring") and len(df):
            n = int(df["order"].iloc[0])
            ideal = 1.0 / (2.0 * np.sin(np.pi / n))
        else:
            ideal = TAU
        if len(v) == 0:
            out[key] = {"mean": None, "std": None, "n": 0, "ideal": float(ideal), "deviation_from_ideal_pct": None,
                        "deviation_from_tau_pct": None}
            continue
        m = float(v.mean())
        out[key] = {"mean": m, "std": float(v.std()), "n": int(len(v)), "ideal": float(ideal),
                    "deviation_from_ideal_pct": 100.0 * (m / ideal - 1.0),
                    "deviation_from_tau_pct": 100.0 * (m / TAU - 1.0)}
    return out


def ladder_figure(result):
    """Pair distributions with the ladder rungs marked, deviations annotated and off-ladder peaks labelled.

    Parameters
    ----------
    result : AnalysisResult
        Reads ``curves['pair_distribution_columns']`` / ``['pair_distribution_centres']`` (r_px, r_nm, g) and
        ``tables['ladder']``, ``tables['pair_peaks']``; ``meta.pixel_size_nm`` decides the axis unit.

    Returns
    -------
    matplotlib.figure.Figure or None
        None when there is no pair distribution to draw.
    """
    sets = [s for s in ("columns", "centres") if f"pair_distribution_{s}" in getattr(result, "curves", {})]
    if not sets:
        return None
    from matplotlib.figure import Figure

    ps = getattr(getattr(result, "meta", None), "pixel_size_nm", None)
    s = ps if ps else 1.0
    unit = "nm" if ps else "px"
    lad = result.tables.get("ladder", empty_table(LADDER))
    pk = result.tables.get("pair_peaks", empty_table(PEAKS))
    fig = Figure(figsize=(7.5, 3.2 * len(sets)), dpi=120, layout="constrained")
    for k, name in enumerate(sets):
        ax = fig.add_subplot(len(sets), 1, k + 1)
        c = result.curves[f"pair_distribution_{name}"]
        ax.plot(c["r_px"] * s, c["g"], color="#333333", lw=1.0)
        ax.axhline(1.0, color="#999999", lw=0.6, ls=":")
        top = float(np.nanmax(c["g"])) if len(c) else 1.0
        lr = lad[lad["set"] == name]
        for row in lr.itertuples():
            ideal = row.measured_px / (1 + row.deviation_pct / 100.0)
            ax.axvline(ideal * s, color="#1f5fa8", lw=0.8, ls="--")
            ax.annotate(f"tau^{row.rung:g}\n{row.deviation_pct:+.2f}%", (ideal * s, top * 0.95), fontsize=6,
                        color="#1f5fa8", ha="center", va="top")
        off = pk[(pk["set"] == name) & (~pk["on_ladder"].astype(bool))]
        rr, gg = c["r_px"].to_numpy(), np.nan_to_num(c["g"].to_numpy())
        bw = float(rr[1] - rr[0]) if len(rr) > 1 else 1.0
        for row in off.itertuples():
            near = np.abs(rr - row.distance_px) <= 1.5 * bw
            h = float(gg[near].max()) if near.any() else float(row.height)
            ax.plot([row.distance_px * s], [h], "v", color="#e8962e", ms=4)
            if row.label != "unassigned":
                ax.annotate(str(row.label), (row.distance_px * s, h), fontsize=6, color="#b35f00",
                            xytext=(0, 4), textcoords="offset points", ha="center")
        ax.set_ylabel("g(r)")
        ax.set_title(f"pair distribution, {name}" + ("" if ps else " (uncalibrated)"), fontsize=9)
    ax.set_xlabel(f"r ({unit})")
    return fig
