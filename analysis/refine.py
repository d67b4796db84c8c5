"""Sub-pixel refinement of every column at once: a 2-D Gaussian plus local background, fitted in a numba kernel.

Model (per column, per pixel centred at integer (u, v))::

    m(u, v) = B + A * gx(u) * gy(v) + N(u, v)
    gx(u)   = integral over [u - 1/2, u + 1/2] of exp(-(t - x)^2 / (2 s^2)) dt     (same for gy)

i.e. an isotropic Gaussian of peak height ``A`` and width ``s`` *integrated over each pixel* (the way a detector
pixel collects it), a constant background ``B``, and ``N`` the current model of the neighbouring columns (second
pass only). Integrating over the pixel makes ``s`` the width of the continuous column image: a sampled Gaussian
fitted to the same pixels returns roughly ``sqrt(s^2 + 1/12)`` instead. The integrated intensity is
``2 pi A s^2``.

The fit is Levenberg-Marquardt on the 5 parameters (x, y, s, A, B). With ``counts=True`` the weights are
``1 / max(m, 1)`` and steps are accepted on the Poisson negative log-likelihood, so the iteration is Fisher
scoring and converges to the Poisson maximum-likelihood estimate; the position uncertainty is then the
Cramer-Rao-type inverse Fisher information. With ``counts=False`` it is ordinary least squares and the
covariance is scaled by the residual variance.
"""

from __future__ import annotations

import math
import time

import numpy as np
import pandas as pd
from numba import njit, prange
from scipy.spatial import cKDTree

from ._errors import TenfoldInputError
from ._progress import report

__all__ = ["refine_columns", "warm_up", "STATUS_CODES"]

#: fit_status strings by kernel code.
STATUS_CODES = ("ok", "diverged", "edge", "masked", "fixed_width")
_OK, _DIVERGED, _EDGE, _MASKED, _FIXED = 0, 1, 2, 3, 4
_SQRT2 = math.sqrt(2.0)
_SQRT_PI_2 = math.sqrt(math.pi / 2.0)
#: number of values the kernel writes per column.
_NOUT = 15


@njit(cache=True, inline="always")
def _profile(u0, n, x, s, g, dg, ds):
    """Pixel-integrated 1-D Gaussian on pixels u0 .. u0+n-1, with d/dx and d/ds (unit peak height)."""
    inv = 1.0 / (_SQRT2 * s)
    ta = (u0 - 0.5 - x) / s
    ea = math.erf(ta * s * inv)
    pa = math.exp(-0.5 * ta * ta)
    for i in range(n):
        tb = (u0 + i + 0.5 - x) / s
        eb = math.erf(tb * s * inv)
        pb = math.exp(-0.5 * tb * tb)
        g[i] = s * _SQRT_PI_2 * (eb - ea)
        dg[i] = pa - pb
        ds[i] = g[i] / s - tb * pb + ta * pa
        ta = tb
        ea = eb
        pa = pb


@njit(cache=True)
def _evaluate(d, msk, off, nx, ny, u0, v0, p, counts, gx, dgx, dsx, gy, dgy, dsy, jtj, jtr, want_j):
    """Objective at parameters p (and J^T W J, J^T W r when want_j). Returns (objective, rss, n_pixels)."""
    x, y, s, a, b = p[0], p[1], p[2], p[3], p[4]
    _profile(u0, nx, x, s, gx, dgx, dsx)
    _profile(v0, ny, y, s, gy, dgy, dsy)
    if want_j:
        for i in range(5):
            jtr[i] = 0.0
            for j in range(5):
                jtj[i, j] = 0.0
    obj = 0.0
    rss = 0.0
    npx = 0
    j0 = 0.0
    j1 = 0.0
    j2 = 0.0
    j3 = 0.0
    for r in range(ny):
        gyr = gy[r]
        dgyr = dgy[r]
        dsyr = dsy[r]
        for c in range(nx):
            k = r * nx + c
            if not msk[k]:
                continue
            gg = gx[c] * gyr
            m = b + a * gg + off[k]
            res = d[k] - m
            rss += res * res
            npx += 1
            if counts:
                mm = m if m > 1e-9 else 1e-9
                obj += mm - d[k] * math.log(mm)
                w = 1.0 / (m if m > 1.0 else 1.0)
            else:
                obj += res * res
                w = 1.0
            if want_j:
                j0 = a * dgx[c] * gyr
                j1 = a * gx[c] * dgyr
                j2 = a * (dsx[c] * gyr + gx[c] * dsyr)
                j3 = gg
                wr = w * res
                jtr[0] += j0 * wr
                jtr[1] += j1 * wr
                jtr[2] += j2 * wr
                jtr[3] += j3 * wr
                jtr[4] += wr
                w0 = w * j0
                w1 = w * j1
                w2 = w * j2
                w3 = w * j3
                jtj[0, 0] += w0 * j0
                jtj[0, 1] += w0 * j1
                jtj[0, 2] += w0 * j2
                jtj[0, 3] += w0 * j3
                jtj[0, 4] += w0
                jtj[1, 1] += w1 * j1
                jtj[1, 2] += w1 * j2
                jtj[1, 3] += w1 * j3
                jtj[1, 4] += w1
                jtj[2, 2] += w2 * j2
                jtj[2, 3] += w2 * j3
                jtj[2, 4] += w2
                jtj[3, 3] += w3 * j3
                jtj[3, 4] += w3
                jtj[4, 4] += w
    if want_j:
        for i in range(5):
            for j in range(i):
                jtj[i, j] = jtj[j, i]
    return obj, rss, npx


@njit(cache=True)
def _solve5(a, rhs, out):
    """Solve a 5x5 symmetric positive system by Gaussian elimination with partial pivoting; False if singular."""
    m = np.empty((5, 6))
    for i in range(5):
        for j in range(5):
            m[i, j] = a[i, j]
        m[i, 5] = rhs[i]
    for col in range(5):
        piv = col
        best = abs(m[col, col])
        for r in range(col + 1, 5):
            if abs(m[r, col]) > best:
                best = abs(m[r, col])
                piv = r
        if not best > 0.0 or not math.isfinite(best):
            return False
        if piv != col:
            for j in range(6):
                tmp = m[col, j]
                m[col, j] = m[piv, j]
                m[piv, j] = tmp
        for r in range(col + 1, 5):
            f = m[r, col] / m[col, col]
            for j in range(col, 6):
                m[r, j] -= f * m[col, j]
    for i in range(4, -1, -1):
        acc = m[i, 5]
        for j in range(i + 1, 5):
            acc -= m[i, j] * out[j]
        out[i] = acc / m[i, i]
    return True


@njit(parallel=True, cache=True, nogil=True)  # nogil: a GUI thread keeps running while columns fit
def _fit_all(img, valid, x0, y0, s0, rad, counts, n_iter, max_shift, s_lo, s_hi, touch2, nb_ptr, nb_idx, nb_par,
             start, out):
    """Fit every column in parallel (prange over columns). Writes ``out[k, :_NOUT]``; see ``_columns_out``.

    ``start[k]`` (x, y, s, A, B), when finite, is a warm start (a previous pass).
    """
    n = x0.shape[0]
    h, w = img.shape
    side = 2 * rad + 1
    for k in prange(n):
        for q in range(_NOUT):
            out[k, q] = np.nan
        xi = x0[k]
        yi = y0[k]
        cx = int(math.floor(xi + 0.5))
        cy = int(math.floor(yi + 0.5))
        if not (xi >= -0.5 and xi < w - 0.5 and yi >= -0.5 and yi < h - 0.5):
            out[k, 8] = _EDGE
            continue
        u0 = max(cx - rad, 0)
        u1 = min(cx + rad, w - 1)
        v0 = max(cy - rad, 0)
        v1 = min(cy + rad, h - 1)
        nx = u1 - u0 + 1
        ny = v1 - v0 + 1
        d = np.empty(side * side)
        msk = np.empty(side * side, dtype=np.bool_)
        off = np.zeros(side * side)
        touched = False
        dmin = np.inf
        dmax = -np.inf
        for r in range(ny):
            for c in range(nx):
                kk = r * nx + c
                val = img[v0 + r, u0 + c]
                ok = valid[v0 + r, u0 + c] and math.isfinite(val)
                msk[kk] = ok
                d[kk] = val if ok else 0.0
                if not ok:
                    ddx = u0 + c - xi
                    ddy = v0 + r - yi
                    if ddx * ddx + ddy * ddy <= touch2:
                        touched = True
                else:
                    if val < dmin:
                        dmin = val
                    if val > dmax:
                        dmax = val
        if touched:
            out[k, 8] = _MASKED
            continue
        gx = np.empty(side)
        dgx = np.empty(side)
        dsx = np.empty(side)
        gy = np.empty(side)
        dgy = np.empty(side)
        dsy = np.empty(side)
        # neighbours' current model (second pass): fixed during this column's fit
        for t in range(nb_ptr[k], nb_ptr[k + 1]):
            j = nb_idx[t]
            _profile(u0, nx, nb_par[j, 0], nb_par[j, 2], gx, dgx, dsx)
            _profile(v0, ny, nb_par[j, 1], nb_par[j, 2], gy, dgy, dsy)
            aj = nb_par[j, 3]
            for r in range(ny):
                for c in range(nx):
                    off[r * nx + c] += aj * gx[c] * gy[r]
        p = np.empty(5)
        trial = np.empty(5)
        delta = np.empty(5)
        jtj = np.empty((5, 5))
        jtr = np.empty(5)
        tj = np.empty((5, 5))
        tr = np.empty(5)
        damp = np.empty((5, 5))
        p[0] = xi
        p[1] = yi
        p[2] = s0
        # linear start for A and B at the initial position and width: regress (d - off) on [g, 1]
        _profile(u0, nx, xi, s0, gx, dgx, dsx)
        _profile(v0, ny, yi, s0, gy, dgy, dsy)
        sgg = 0.0
        sg = 0.0
        s1 = 0.0
        sgd = 0.0
        sd = 0.0
        for r in range(ny):
            for c in range(nx):
                kk = r * nx + c
                if msk[kk]:
                    gg = gx[c] * gy[r]
                    dd = d[kk] - off[kk]
                    sgg += gg * gg
                    sg += gg
                    s1 += 1.0
                    sgd += gg * dd
                    sd += dd
        det = sgg * s1 - sg * sg
        if s1 < 8 or not det > 0:
            out[k, 8] = _DIVERGED
            continue
        p[3] = (s1 * sgd - sg * sd) / det
        p[4] = (sgg * sd - sg * sgd) / det
        if not p[3] > 0:
            p[3] = max(dmax - dmin, 1e-6)
            p[4] = dmin
        if math.isfinite(start[k, 0]) and math.isfinite(start[k, 3]) and start[k, 3] > 0 and start[k, 2] > 0.05:
            for i in range(5):
                p[i] = start[k, i]
        obj, rss, npx = _evaluate(d, msk, off, nx, ny, u0, v0, p, counts, gx, dgx, dsx, gy, dgy, dsy, jtj, jtr,
                                  True)
        lam = 1e-3
        it = 0
        fix_s = s_hi <= s_lo  # fixed-width fit: sigma held at s0, four free parameters
        rhs = np.empty(5)
        for it in range(n_iter):
            for i in range(5):
                for j in range(5):
                    damp[i, j] = jtj[i, j]
                damp[i, i] = jtj[i, i] * (1.0 + lam)
                rhs[i] = jtr[i]
            if fix_s:
                for i in range(5):
                    damp[2, i] = 0.0
                    damp[i, 2] = 0.0
                damp[2, 2] = 1.0
                rhs[2] = 0.0
            if not _solve5(damp, rhs, delta):
                lam *= 10.0
                continue
            for i in range(5):
                trial[i] = p[i] + delta[i]
            if not (trial[2] > 0.05 and trial[3] > 0.0):
                lam *= 10.0
                continue
            tobj, trss, tnpx = _evaluate(d, msk, off, nx, ny, u0, v0, trial, counts, gx, dgx, dsx, gy, dgy, dsy,
                                         tj, tr, True)
            if tobj <= obj:
                small = abs(delta[0]) < 1e-4 and abs(delta[1]) < 1e-4 and abs(delta[2]) < 1e-4 * trial[2]
                for i in range(5):
                    p[i] = trial[i]
                    jtr[i] = tr[i]
                    for j in range(5):
                        jtj[i, j] = tj[i, j]
                obj = tobj
                rss = trss
                npx = tnpx
                lam = max(lam * 0.3, 1e-7)
                if small:
                    break
            else:
                lam *= 10.0
                if lam > 1e8:
                    break
        # covariance: inverse Fisher information (counts) or scaled (J^T J)^-1 (least squares)
        scale = 1.0
        if not counts:
            scale = rss / max(npx - 5, 1)
        if fix_s:  # covariance of the four free parameters
            for i in range(5):
                jtj[2, i] = 0.0
                jtj[i, 2] = 0.0
            jtj[2, 2] = 1.0
        e0 = np.zeros(5)
        col = np.empty(5)
        e0[0] = 1.0
        okx = _solve5(jtj, e0, col)
        vx = col[0]
        e0[0] = 0.0
        e0[1] = 1.0
        oky = _solve5(jtj, e0, col)
        vy = col[1]
        e0[1] = 0.0
        e0[3] = 1.0
        oka = _solve5(jtj, e0, col)
        va = col[3]
        for i in range(5):
            out[k, i] = p[i]
        out[k, 5] = math.sqrt(vx * scale) if okx and vx > 0 else np.nan
        out[k, 6] = math.sqrt(vy * scale) if oky and vy > 0 else np.nan
        out[k, 7] = math.sqrt(rss / max(npx, 1)) / p[3]
        out[k, 9] = npx
        out[k, 10] = it + 1
        out[k, 11] = obj
        out[k, 12] = xi
        out[k, 13] = yi
        out[k, 14] = math.sqrt(va * scale) if oka and va > 0 else np.nan
        status = _OK
        if not (math.isfinite(p[0]) and math.isfinite(p[1]) and math.isfinite(p[2]) and math.isfinite(p[3])):
            status = _DIVERGED
        elif not (p[3] > out[k, 14]):
            # amplitude within one standard error of zero (e.g. a constant patch): no column was fitted
            status = _DIVERGED
        elif abs(p[0] - xi) > max_shift or abs(p[1] - yi) > max_shift:
            status = _DIVERGED
        elif p[2] < s_lo or p[2] > s_hi or not p[3] > 0:
            status = _DIVERGED
        elif p[0] < s0 - 0.5 or p[0] > w - 0.5 - s0 or p[1] < s0 - 0.5 or p[1] > h - 0.5 - s0:
            status = _EDGE
        out[k, 8] = status


def warm_up() -> float:
    """Compile (or load from the on-disk cache) the numba kernels; return the seconds it took."""
    t0 = time.perf_counter()
    img = np.random.default_rng(0).poisson(10.0, (16, 16)).astype(np.float32)
    _run(img, np.ones(img.shape, bool), np.array([7.7]), np.array([8.2]), 1.5, 4, True, 3, 4.0, 0.3, 6.0,
         np.zeros(2, np.int64), np.zeros(0, np.int64), np.zeros((1, 4)))
    return time.perf_counter() - t0


def _run(img, valid, x0, y0, s0, rad, counts, n_iter, max_shift, s_lo, s_hi, nb_ptr, nb_idx, nb_par, start=None):
    n = x0.shape[0]
    out = np.empty((n, _NOUT))
    touch2 = (2.0 * s0 + 0.5) ** 2
    if start is None:
        start = np.full((max(n, 1), 5), np.nan)
    _fit_all(img, valid, x0, y0, float(s0), int(rad), bool(counts), int(n_iter), float(max_shift), float(s_lo),
             float(s_hi), touch2, nb_ptr, nb_idx, nb_par, np.ascontiguousarray(start, dtype=np.float64), out)
    return out


def _prepare(image, valid):
    img = np.asarray(image)
    if img.ndim != 2:
        raise TenfoldInputError(f"refine_columns: image must be 2-D, got shape {img.shape}; pass one frame")
    if not np.issubdtype(img.dtype, np.floating):
        img = img.astype(np.float64)
    img = np.ascontiguousarray(img)
    if valid is None:
        vmask = np.ones(img.shape, dtype=bool)
    else:
        vmask = np.ascontiguousarray(np.asarray(valid, dtype=bool))
        if vmask.shape != img.shape:
            raise TenfoldInputError(f"refine_columns: valid mask shape {vmask.shape} differs from image {img.shape}")
    return img, vmask


def _neighbours(out, rad, s_hi):
    """CSR arrays of the ok neighbours whose model reaches into each column's patch (one KD-tree, one query)."""
    n = out.shape[0]
    good = out[:, 8] == _OK
    xy = out[:, :2]
    ptr = np.zeros(n + 1, np.int64)
    if good.sum() < 2:
        return ptr, np.zeros(0, np.int64), np.zeros((n, 4))
    idx_good = np.flatnonzero(good)
    sig = np.nanmedian(out[good, 2])
    reach = rad * math.sqrt(2.0) + 4.0 * sig
    tree = cKDTree(xy[idx_good])
    pairs = tree.query_pairs(reach, output_type="ndarray")
    a = idx_good[pairs[:, 0]]
    b = idx_good[pairs[:, 1]]
    src = np.concatenate([a, b])
    dst = np.concatenate([b, a])
    order = np.argsort(src, kind="stable")
    src = src[order]
    dst = dst[order]
    ptr[1:] = np.cumsum(np.bincount(src, minlength=n))
    par = np.zeros((n, 4))
    par[good] = out[good][:, [0, 1, 2, 3]]
    return ptr, dst.astype(np.int64), par


def refine_columns(image, xy_px, *, sigma_px, patch_radius_px=None, valid=None, counts=True, n_iter=12,
                   neighbour_passes=1, max_shift_px=None, fixed_width_fallback=True,
                   progress=None) -> pd.DataFrame:
    """Fit a pixel-integrated 2-D Gaussian plus constant background to every column at once.

    Parameters
    ----------
    image : (H, W) array
        The micrograph, bright columns on a darker background (invert dark-column images first). Not modified.
    xy_px : (N, 2) array
        Starting positions (x, y) in px, e.g. trackpy centroids.
    sigma_px : float
        Starting column width (Gaussian standard deviation, px), e.g. from ``estimate_scale``.
    patch_radius_px : int, optional
        Half-size of the square fit patch (side 2 r + 1). Default: ``ceil(3.5 sigma)``, capped at 0.6 x the median
        nearest-neighbour distance of ``xy_px`` (but at least ``ceil(1.5 sigma)``).
    valid : (H, W) bool array, optional
        False for masked pixels: they are left out of the fits, and a column with a masked pixel within
        ``2 sigma + 0.5`` px of its start is 'masked'.
    counts : bool
        True when the image holds raw counts: Poisson weights ``1/max(model, 1)`` and the inverse Fisher matrix
        as covariance (maximum-likelihood fit). False: unweighted least squares.
    n_iter : int
        Maximum Levenberg-Marquardt iterations per column and pass.
    neighbour_passes : int
        Number of extra passes in which each column is refitted with its neighbours' current model (found by
        one KD-tree query) subtracted. 0 fits every column alone.
    max_shift_px : float, optional
        A fit that moves farther than this from its start (per axis) is 'diverged'. Default: the patch radius
        (about half the column spacing).
    progress : callable, optional
        ``progress(fraction, message)``; returning False cancels (raises ``Cancelled``).

    Returns
    -------
    DataFrame
        One row per input position, in input order: ``x_px, y_px, sigma_px, amplitude, background, intensity,
        residual, pos_err_px, fit_status`` (schema names and units, see ``_schema.COLUMNS``) plus extras
        ``amplitude_err`` (1-sigma), ``x_err_px, y_err_px`` (1-sigma per axis), ``x_init_px, y_init_px``,
        ``n_pixels``, ``n_iter``.
        Fit columns are NaN unless ``fit_status`` is 'ok' or 'fixed_width'.

    Notes
    -----
    ``fit_status``: 'ok'; 'fixed_width' (the five-parameter fit failed, a fit with the width held at the median
    width of the good fits succeeded: low-signal columns; only with ``fixed_width_fallback``); 'diverged' (non-finite, moved more than ``max_shift_px``, width outside
    [0.25, 4] x ``sigma_px``, or an amplitude not above its own standard error, e.g. a constant patch); 'edge' (centre closer than ``sigma_px`` to the image
    border, or outside it); 'masked' (see ``valid``).

    References
    ----------
    Mortensen, Churchman, Spudich & Flyvbjerg, Nat. Methods 7 (2010) 377 (pixel-integrated Gaussian, MLE).
    Marquardt, J. Soc. Indust. Appl. Math. 11 (1963) 431.

    Examples
    --------
    >>> table = refine_columns(img, candidates[["x", "y"]].to_numpy(), sigma_px=2.0)  # doctest: +SKIP
    """
    img, vmask = _prepare(image, valid)
    xy = np.asarray(xy_px, dtype=np.float64).reshape(-1, 2) if np.size(xy_px) else np.zeros((0, 2))
    if not (np.isfinite(sigma_px) and sigma_px > 0):
        raise TenfoldInputError(f"refine_columns: sigma_px must be a positive number, got {sigma_px!r}")
    s0 = float(sigma_px)
    n = xy.shape[0]
    if patch_radius_px is None:
        rad = math.ceil(3.5 * s0)
        if n >= 2:
            fin = xy[np.all(np.isfinite(xy), axis=1)]
            dnn = cKDTree(fin).query(fin, k=2)[0][:, 1] if fin.shape[0] >= 2 else np.zeros(0)
            dnn = dnn[np.isfinite(dnn)]
            if dnn.size:
                rad = min(rad, max(int(round(0.6 * np.median(dnn))), math.ceil(1.5 * s0)))
    else:
        rad = int(patch_radius_px)
    rad = max(rad, 2)
    max_shift = float(rad if max_shift_px is None else max_shift_px)
    report(progress, 0.0, f"refining {n} columns")
    x0 = np.ascontiguousarray(xy[:, 0])
    y0 = np.ascontiguousarray(xy[:, 1])
    out = _run(img, vmask, x0, y0, s0, rad, counts, n_iter, max_shift, 0.25 * s0, 4.0 * s0,
               np.zeros(n + 1, np.int64), np.zeros(0, np.int64), np.zeros((max(n, 1), 4)))
    for p in range(int(neighbour_passes)):
        report(progress, (p + 1) / (neighbour_passes + 1), "refitting with neighbours subtracted")
        ptr, idx, par = _neighbours(out, rad, 4.0 * s0)
        if idx.size == 0:
            break
        first = out
        # warm start from the previous pass (ok fits only): a few Gauss-Newton steps suffice
        start = np.where((first[:, 8] == _OK)[:, None], first[:, :5], np.nan)
        # warm-started: the neighbours' models only nudge a converged fit, a few steps suffice
        out = _run(img, vmask, x0, y0, s0, rad, counts, min(n_iter, 6), max_shift, 0.25 * s0, 4.0 * s0, ptr, idx,
                   par, start=start)
        out[:, 10] += first[:, 10]
    # Low-signal columns whose five-parameter fit wandered get a fixed-width fit (sigma = median of the good
    # fits: every column is imaged by the same probe); they are marked 'fixed_width' so the user can tell.
    redo = np.flatnonzero(out[:, 8] == _DIVERGED)
    good = out[:, 8] == _OK
    if fixed_width_fallback and redo.size and good.sum() >= 5:
        s_med = float(np.nanmedian(out[good, 2]))
        ptr, idx, par = _neighbours(out, rad, 4.0 * s0)
        sub_ptr = np.zeros(redo.size + 1, np.int64)
        counts_nb = ptr[redo + 1] - ptr[redo]
        sub_ptr[1:] = np.cumsum(counts_nb)
        # gather each redo column's neighbour list from the CSR arrays (vectorised)
        pos = np.repeat(ptr[redo] - sub_ptr[:-1], counts_nb) + np.arange(sub_ptr[-1])
        sub_idx = idx[pos] if idx.size else np.zeros(0, np.int64)
        again = _run(img, vmask, x0[redo], y0[redo], s_med, rad, counts, n_iter, max_shift, s_med, s_med, sub_ptr,
                     sub_idx.astype(np.int64), par)
        fixed = again[:, 8] == _OK
        again[fixed, 8] = _FIXED
        out[redo[fixed]] = again[fixed]
    report(progress, 1.0, "refinement done")
    return _columns_out(out, x0, y0)


def _columns_out(out, x0, y0) -> pd.DataFrame:
    status = out[:, 8].astype(np.int64) if out.shape[0] else np.zeros(0, np.int64)
    ok = (status == _OK) | (status == _FIXED)
    vals = out.copy()
    vals[~ok, :8] = np.nan
    sigma = vals[:, 2]
    amp = vals[:, 3]
    return pd.DataFrame({
        "x_px": vals[:, 0],
        "y_px": vals[:, 1],
        "sigma_px": sigma,
        "amplitude": amp,
        "background": vals[:, 4],
        "intensity": 2.0 * np.pi * amp * sigma ** 2,
        "residual": vals[:, 7],
        "pos_err_px": 0.5 * (vals[:, 5] + vals[:, 6]),
        "fit_status": np.array(STATUS_CODES, dtype=object)[status],
        "amplitude_err": np.where(ok, out[:, 14], np.nan),
        "x_err_px": vals[:, 5],
        "y_err_px": vals[:, 6],
        "x_init_px": x0,
        "y_init_px": y0,
        "n_pixels": np.nan_to_num(out[:, 9]).astype(np.int64),
        "n_iter": np.nan_to_num(out[:, 10]).astype(np.int64),
    })
