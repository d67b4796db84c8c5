"""Sub-pixel refinement of every column at once: a 2-D Gaussian plus local background, fitted in a numba kernel.

Model (per column, per pixel centred at integer (u, v))::

    m(u, v) = B + A * gx(u) * gy(v) + N(u, v)
    gx(u)   = integral over [u - 1/2, u + 1/2] of exp(-(t - x)^2 / (2 s^2)) dt     (same for gy)

i.e. an isotropic Gaussian of peak height ``A`` and width ``s`` *integrated over each pixel* (the way a detector
pixel collects it), a constant background ``B``, and ``N`` the current model of the neighbouring columns (second
pass only). Integrating over the pixel makes ``s`` the width of the continuous column image: a sampled Gaussian
fitted to the same pixels returns roughly ``sqrt(s^2 + 1/12)`` instead. The integrated intensity is
``2 pi A s^2``.

Real columns have a sharp core and a long tail: with ``tail=(h, k)`` the column profile is
``(1 - h) gx(u; s) gy(v; s) + h gx(u; k s) gy(v; k s)`` (same centre, peak height still ``A``, intensity
``2 pi A s^2 ((1 - h) + h k^2)``), ``h`` and ``k`` fixed for the image and learned from it by :func:`learn_tail`;
``h = 0`` is the Gaussian above, exactly.

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
import numba
from numba import get_thread_id, njit, prange
from scipy.sparse import coo_matrix
from scipy.spatial import cKDTree

from ._errors import TenfoldInputError
from ._progress import report

__all__ = ["refine_columns", "joint_position_errors", "learn_tail", "tail_share", "profile_area", "warm_up",
           "STATUS_CODES"]

#: fit_status strings by kernel code.
STATUS_CODES = ("ok", "diverged", "edge", "masked", "fixed_width")
_OK, _DIVERGED, _EDGE, _MASKED, _FIXED = 0, 1, 2, 3, 4
_SQRT2 = math.sqrt(2.0)
_SQRT_PI_2 = math.sqrt(math.pi / 2.0)
#: number of values the kernel writes per column.
_NOUT = 17


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
def _evaluate(d, msk, off, nx, ny, u0, v0, p, counts, gx, dgx, dsx, gy, dgy, dsy, tb, th, tk, jtj, jtr, want_j,
              want_obj=True):
    """Objective at parameters p (and J^T W J, J^T W r when want_j).

    ``th``, ``tk``: the tail's share of the peak height and its width over the core width (``th`` 0: a plain
    Gaussian, the tail's scratch ``tb`` (6 rows of the patch side) unused).
    Returns (objective, rss, n_pixels, Pearson chi-square with Poisson weights 1 / max(m, 1)); the Poisson
    objective (a logarithm per pixel) only when ``want_obj``, else NaN. The sums run in local scalars (the scratch
    arrays are views of one buffer, so sums kept in them would be stored and reloaded at every pixel).
    """
    x, y, s, a, b = p[0], p[1], p[2], p[3], p[4]
    tail = th > 0.0
    cw = 1.0 - th
    _profile(u0, nx, x, s, gx, dgx, dsx)
    _profile(v0, ny, y, s, gy, dgy, dsy)
    if tail:
        _profile(u0, nx, x, tk * s, tb[0], tb[1], tb[2])
        _profile(v0, ny, y, tk * s, tb[3], tb[4], tb[5])
    obj = 0.0
    rss = 0.0
    chi2 = 0.0
    npx = 0
    r0 = r1 = r2 = r3 = r4 = 0.0
    h00 = h01 = h02 = h03 = h04 = 0.0
    h11 = h12 = h13 = h14 = 0.0
    h22 = h23 = h24 = 0.0
    h33 = h34 = 0.0
    h44 = 0.0
    for r in range(ny):
        gyr = gy[r]
        dgyr = dgy[r]
        dsyr = dsy[r]
        for c in range(nx):
            k = r * nx + c
            if not msk[k]:
                continue
            if tail:
                gg = cw * gx[c] * gyr + th * tb[0, c] * tb[3, r]
            else:
                gg = gx[c] * gyr
            m = b + a * gg + off[k]
            res = d[k] - m
            rss += res * res
            npx += 1
            wp = 1.0 / (m if m > 1.0 else 1.0)
            chi2 += res * res * wp
            if counts:
                if want_obj:
                    mm = m if m > 1e-9 else 1e-9
                    obj += mm - d[k] * math.log(mm)
                w = wp
            else:
                obj += res * res
                w = 1.0
            if want_j:
                if tail:  # d/ds of the tail's width k s is k d/d(k s)
                    j0 = a * (cw * dgx[c] * gyr + th * tb[1, c] * tb[3, r])
                    j1 = a * (cw * gx[c] * dgyr + th * tb[0, c] * tb[4, r])
                    j2 = a * (cw * (dsx[c] * gyr + gx[c] * dsyr) + th * tk * (tb[2, c] * tb[3, r] + tb[0, c] * tb[5, r]))
                else:
                    j0 = a * dgx[c] * gyr
                    j1 = a * gx[c] * dgyr
                    j2 = a * (dsx[c] * gyr + gx[c] * dsyr)
                j3 = gg
                wr = w * res
                r0 += j0 * wr
                r1 += j1 * wr
                r2 += j2 * wr
                r3 += j3 * wr
                r4 += wr
                w0 = w * j0
                w1 = w * j1
                w2 = w * j2
                w3 = w * j3
                h00 += w0 * j0
                h01 += w0 * j1
                h02 += w0 * j2
                h03 += w0 * j3
                h04 += w0
                h11 += w1 * j1
                h12 += w1 * j2
                h13 += w1 * j3
                h14 += w1
                h22 += w2 * j2
                h23 += w2 * j3
                h24 += w2
                h33 += w3 * j3
                h34 += w3
                h44 += w
    if want_j:
        jtr[0] = r0
        jtr[1] = r1
        jtr[2] = r2
        jtr[3] = r3
        jtr[4] = r4
        jtj[0, 0] = h00
        jtj[0, 1] = jtj[1, 0] = h01
        jtj[0, 2] = jtj[2, 0] = h02
        jtj[0, 3] = jtj[3, 0] = h03
        jtj[0, 4] = jtj[4, 0] = h04
        jtj[1, 1] = h11
        jtj[1, 2] = jtj[2, 1] = h12
        jtj[1, 3] = jtj[3, 1] = h13
        jtj[1, 4] = jtj[4, 1] = h14
        jtj[2, 2] = h22
        jtj[2, 3] = jtj[3, 2] = h23
        jtj[2, 4] = jtj[4, 2] = h24
        jtj[3, 3] = h33
        jtj[3, 4] = jtj[4, 3] = h34
        jtj[4, 4] = h44
    if counts and not want_obj:
        obj = np.nan
    return obj, rss, npx, chi2


@njit(cache=True)
def _solve5(a, rhs, out, m):
    """Solve a 5x5 symmetric positive system by Gaussian elimination with partial pivoting (``m``: a 5 x 6
    scratch matrix); False if singular."""
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


@njit(cache=True, inline="always")
def _add_tail(off, u0, u1, v0, v1, nx, x, y, st, at, tb):
    """Add a neighbour's tail (peak height ``at``, width ``st``) to the patch model ``off`` (rows v0..v1, columns
    u0..u1), within ``TAIL_BOX_SIGMA`` of its widths; ``tb``: scratch rows of the patch side."""
    reach = TAIL_BOX_SIGMA * st
    ua = max(u0, int(math.ceil(x - reach)))
    ub = min(u1, int(math.floor(x + reach)))
    va = max(v0, int(math.ceil(y - reach)))
    vb = min(v1, int(math.floor(y + reach)))
    if ua > ub or va > vb:
        return
    _profile(ua, ub - ua + 1, x, st, tb[0], tb[1], tb[2])
    _profile(va, vb - va + 1, y, st, tb[3], tb[4], tb[5])
    for r in range(va, vb + 1):
        ayr = at * tb[3, r - va]
        base = (r - v0) * nx - u0
        for c in range(ua, ub + 1):
            off[base + c] += ayr * tb[0, c - ua]


#: a neighbour's model is added to a patch only within this many of its widths of its centre (per axis): beyond,
#: its light is below exp(-12.5) = 4e-6 of its peak (the neighbour lists already leave out columns 4 widths away)
NEIGHBOUR_BOX_SIGMA = 5.0
#: a neighbour's tail (see ``refine_columns``, ``tail``) enters a patch within this many of the tail's widths: its
#: light there is below exp(-8) = 3e-4 of the tail's own peak, itself a small share of the column's
TAIL_BOX_SIGMA = 4.0
#: a step smaller than this (px; relative for the width) ends a column's fit
STEP_TOL = 1e-4
#: an undamped step smaller than this (px for the position; relative to the width, and to the amplitude for the
#: amplitude and the background) is near enough the optimum to be taken without evaluating the Poisson objective
TRUST_PX, TRUST_REL = 0.05, 0.02


@njit(cache=True, nogil=True)
def _fit_one(k, img, valid, x0, y0, s0, fixw, rad, counts, n_iter, max_shift, s_lo, s_hi, touch2, th, tk, final_obj,
             nb_ptr, nb_idx, nb_par, start, out, fbuf, msk):
    """Fit column k; writes ``out[k, :_NOUT]`` (see ``_columns_out``). ``start[k]`` (x, y, s, A, B), when finite, is
    a warm start (a previous pass). ``th``, ``tk``: the column profile's tail (see ``refine_columns``);
    ``final_obj``: ``out[k, 11]`` is the objective at the final parameters (one more evaluation). ``fbuf`` (``_scratch_size(rad)`` floats) and ``msk`` ((2 rad + 1)^2 bools) are
    the calling thread's scratch: no allocation per column."""
    h, w = img.shape
    side = 2 * rad + 1
    s2 = side * side
    d = fbuf[0:s2]
    off = fbuf[s2:2 * s2]
    o = 2 * s2
    gx = fbuf[o:o + side]
    dgx = fbuf[o + side:o + 2 * side]
    dsx = fbuf[o + 2 * side:o + 3 * side]
    gy = fbuf[o + 3 * side:o + 4 * side]
    dgy = fbuf[o + 4 * side:o + 5 * side]
    dsy = fbuf[o + 5 * side:o + 6 * side]
    o += 6 * side
    tb = fbuf[o:o + 6 * side].reshape((6, side))
    o += 6 * side
    p = fbuf[o:o + 5]
    trial = fbuf[o + 5:o + 10]
    delta = fbuf[o + 10:o + 15]
    jtr = fbuf[o + 15:o + 20]
    tr = fbuf[o + 20:o + 25]
    rhs = fbuf[o + 25:o + 30]
    e0 = fbuf[o + 30:o + 35]
    col = fbuf[o + 35:o + 40]
    o += 40
    jtj = fbuf[o:o + 25].reshape((5, 5))
    tj = fbuf[o + 25:o + 50].reshape((5, 5))
    damp = fbuf[o + 50:o + 75].reshape((5, 5))
    sm = fbuf[o + 75:o + 105].reshape((5, 6))
    for i in range(s2):
        off[i] = 0.0
    for q in range(_NOUT):
        out[k, q] = np.nan
    xi = x0[k]
    yi = y0[k]
    sk = s0[k]
    fix_s = fixw[k] or s_hi <= s_lo  # fixed-width fit: sigma held at sk, four free parameters
    cx = int(math.floor(xi + 0.5))
    cy = int(math.floor(yi + 0.5))
    if not (xi >= -0.5 and xi < w - 0.5 and yi >= -0.5 and yi < h - 0.5):
        out[k, 8] = _EDGE
        return
    u0 = max(cx - rad, 0)
    u1 = min(cx + rad, w - 1)
    v0 = max(cy - rad, 0)
    v1 = min(cy + rad, h - 1)
    nx = u1 - u0 + 1
    ny = v1 - v0 + 1
    touched = False
    dsum = 0.0
    dmin = np.inf
    dmax = -np.inf
    nvalid = 0
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
                nvalid += 1
                dsum += val
                if val < dmin:
                    dmin = val
                if val > dmax:
                    dmax = val
    if touched:
        out[k, 8] = _MASKED
        return
    # neighbours' current model: fixed during this column's fit; each only over its box within the patch
    for t in range(nb_ptr[k], nb_ptr[k + 1]):
        j = nb_idx[t]
        if not (nb_par[j, 3] != 0.0 and nb_par[j, 2] > 0.0):
            continue  # a failed fit: no model, no light
        reach = NEIGHBOUR_BOX_SIGMA * nb_par[j, 2]
        ua = max(u0, int(math.ceil(nb_par[j, 0] - reach)))
        ub = min(u1, int(math.floor(nb_par[j, 0] + reach)))
        va = max(v0, int(math.ceil(nb_par[j, 1] - reach)))
        vb = min(v1, int(math.floor(nb_par[j, 1] + reach)))
        if ua > ub or va > vb:
            continue
        _profile(ua, ub - ua + 1, nb_par[j, 0], nb_par[j, 2], gx, dgx, dsx)
        _profile(va, vb - va + 1, nb_par[j, 1], nb_par[j, 2], gy, dgy, dsy)
        aj = nb_par[j, 3] * (1.0 - th)
        for r in range(va, vb + 1):
            ayr = aj * gy[r - va]
            base = (r - v0) * nx - u0
            for c in range(ua, ub + 1):
                off[base + c] += ayr * gx[c - ua]
        if th > 0.0:
            _add_tail(off, u0, u1, v0, v1, nx, nb_par[j, 0], nb_par[j, 1], tk * nb_par[j, 2], th * nb_par[j, 3], tb)
    if nvalid < 8:
        out[k, 8] = _DIVERGED
        return
    if math.isfinite(start[k, 0]) and math.isfinite(start[k, 3]) and start[k, 3] > 0 and start[k, 2] > 0.05:
        for i in range(5):
            p[i] = start[k, i]
        if fix_s:
            p[2] = sk
    else:
        p[0] = xi
        p[1] = yi
        p[2] = sk
        # linear start for A and B at the initial position and width: regress (d - off) on [g, 1]
        _profile(u0, nx, xi, sk, gx, dgx, dsx)
        _profile(v0, ny, yi, sk, gy, dgy, dsy)
        if th > 0.0:
            _profile(u0, nx, xi, tk * sk, tb[0], tb[1], tb[2])
            _profile(v0, ny, yi, tk * sk, tb[3], tb[4], tb[5])
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
                    if th > 0.0:
                        gg = (1.0 - th) * gg + th * tb[0, c] * tb[3, r]
                    dd = d[kk] - off[kk]
                    sgg += gg * gg
                    sg += gg
                    s1 += 1.0
                    sgd += gg * dd
                    sd += dd
        det = sgg * s1 - sg * sg
        if not det > 0:
            out[k, 8] = _DIVERGED
            return
        p[3] = (s1 * sgd - sg * sd) / det
        p[4] = (sgg * sd - sg * sgd) / det
        if not p[3] > 0:
            p[3] = max(dmax - dmin, 1e-6)
            p[4] = dmin
    # the objective (a logarithm per pixel) is only needed to judge a trial step: a warm start that has already
    # converged takes its small step without one
    obj, rss, npx, chi2 = _evaluate(d, msk, off, nx, ny, u0, v0, p, counts, gx, dgx, dsx, gy, dgy, dsy, tb, th, tk,
                                    jtj, jtr, True, False)
    obj_known = not counts
    lam = 1e-3
    it = 0
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
        if not _solve5(damp, rhs, delta, sm):
            lam *= 10.0
            continue
        if lam < 1e-2 and abs(delta[0]) < STEP_TOL and abs(delta[1]) < STEP_TOL \
                and abs(delta[2]) < STEP_TOL * p[2] and p[2] + delta[2] > 0.05 and p[3] + delta[3] > 0.0:
            # converged: an undamped Fisher-scoring step this small is taken without another evaluation (an
            # evaluation would only confirm it; steps made small by damping after rejected ones are still checked)
            for i in range(5):
                p[i] += delta[i]
            break
        for i in range(5):
            trial[i] = p[i] + delta[i]
        if not (trial[2] > 0.05 and trial[3] > 0.0):
            lam *= 10.0
            continue
        # a small, undamped Fisher-scoring step near the optimum is taken without judging it by the Poisson
        # objective (a logarithm per pixel); only the derivatives for the next step are evaluated there
        trusted = counts and lam < 1e-2 and abs(delta[0]) < TRUST_PX and abs(delta[1]) < TRUST_PX \
            and abs(delta[2]) < TRUST_REL * p[2] and abs(delta[3]) < TRUST_REL * p[3] \
            and abs(delta[4]) < TRUST_REL * p[3]
        if not trusted and not obj_known:
            obj = _evaluate(d, msk, off, nx, ny, u0, v0, p, counts, gx, dgx, dsx, gy, dgy, dsy, tb, th, tk, tj, tr,
                            False)[0]
            obj_known = True
        tobj, trss, tnpx, tchi2 = _evaluate(d, msk, off, nx, ny, u0, v0, trial, counts, gx, dgx, dsx, gy, dgy, dsy,
                                            tb, th, tk, tj, tr, True, not trusted)
        if trusted or tobj <= obj:
            small = abs(delta[0]) < STEP_TOL and abs(delta[1]) < STEP_TOL and abs(delta[2]) < STEP_TOL * trial[2]
            for i in range(5):
                p[i] = trial[i]
                jtr[i] = tr[i]
                for j in range(5):
                    jtj[i, j] = tj[i, j]
            obj = tobj
            obj_known = not trusted
            rss = trss
            npx = tnpx
            chi2 = tchi2
            lam = max(lam * 0.3, 1e-7)
            if small:
                break
        else:
            lam *= 10.0
            if lam > 1e8:
                break
    if final_obj:
        obj = _evaluate(d, msk, off, nx, ny, u0, v0, p, counts, gx, dgx, dsx, gy, dgy, dsy, tb, th, tk, tj, tr,
                        False)[0]
    # covariance: inverse Fisher information (counts) or scaled (J^T J)^-1 (least squares)
    scale = 1.0
    if not counts:
        scale = rss / max(npx - 5, 1)
    if fix_s:  # covariance of the four free parameters
        for i in range(5):
            jtj[2, i] = 0.0
            jtj[i, 2] = 0.0
        jtj[2, 2] = 1.0
    for i in range(5):
        e0[i] = 0.0
    e0[0] = 1.0
    okx = _solve5(jtj, e0, col, sm)
    vx = col[0]
    e0[0] = 0.0
    e0[1] = 1.0
    oky = _solve5(jtj, e0, col, sm)
    vy = col[1]
    e0[1] = 0.0
    e0[3] = 1.0
    oka = _solve5(jtj, e0, col, sm)
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
    out[k, 15] = dsum / max(npx, 1)
    # Pearson chi-square of the final model (Poisson weights): with the level it checks the noise model
    out[k, 16] = chi2
    status = _OK
    if not (math.isfinite(p[0]) and math.isfinite(p[1]) and math.isfinite(p[2]) and math.isfinite(p[3])):
        status = _DIVERGED
    elif not (p[3] > out[k, 14]):
        # amplitude within one standard error of zero (e.g. a constant patch): no column was fitted
        status = _DIVERGED
    elif abs(p[0] - xi) > max_shift or abs(p[1] - yi) > max_shift:
        status = _DIVERGED
    elif (not fix_s and (p[2] < s_lo or p[2] > s_hi)) or not p[3] > 0:
        status = _DIVERGED
    elif p[0] < sk - 0.5 or p[0] > w - 0.5 - sk or p[1] < sk - 0.5 or p[1] > h - 0.5 - sk:
        status = _EDGE
    elif fixw[k]:
        status = _FIXED
    out[k, 8] = status


@njit(cache=True, inline="always")
def _scratch_size(rad):
    """Floats of scratch one ``_fit_one`` call needs."""
    side = 2 * rad + 1
    return 2 * side * side + 12 * side + 145


@njit(cache=True, inline="always")
def _publish(k, out, nb_par, gidx):
    """Column k's fitted model becomes its neighbours' view of it (zeros, no light, for a failed fit)."""
    g = gidx[k]
    if g < 0:
        return
    st = out[k, 8]
    good = st == _OK or st == _FIXED
    for i in range(4):
        nb_par[g, i] = out[k, i] if good else 0.0


@njit(parallel=True, cache=True, nogil=True)  # nogil: a GUI thread keeps running while columns fit
def _fit_all(img, valid, x0, y0, s0, fixw, rad, counts, n_iter, max_shift, s_lo, s_hi, touch2, th, tk, final_obj, nb_ptr,
             nb_idx, nb_par, start, out, n_threads, order, cptr, gidx):
    """Fit every column, one colour class after the other (see ``_colour_classes``), the columns of a class in
    parallel (prange); see ``_fit_one``. After a class is fitted its models replace the old ones in ``nb_par``
    (row ``gidx[k]``, none when negative), so the next classes see them: a Gauss-Seidel sweep of the coupled fits.
    A class holds no two neighbours, so its fits read no model that is being written. One scratch row per
    thread."""
    side = 2 * rad + 1
    fbuf = np.empty((n_threads, _scratch_size(rad)))
    mbuf = np.empty((n_threads, side * side), dtype=np.bool_)
    for c in range(cptr.shape[0] - 1):
        for t in prange(cptr[c], cptr[c + 1]):
            k = order[t]
            tid = get_thread_id()
            _fit_one(k, img, valid, x0, y0, s0, fixw, rad, counts, n_iter, max_shift, s_lo, s_hi, touch2, th, tk,
                     final_obj, nb_ptr, nb_idx, nb_par, start, out, fbuf[tid], mbuf[tid])
            _publish(k, out, nb_par, gidx)


@njit(cache=True, nogil=True)
def _fit_serial(img, valid, x0, y0, s0, fixw, rad, counts, n_iter, max_shift, s_lo, s_hi, touch2, th, tk, final_obj,
                nb_ptr, nb_idx, nb_par, start, out, n_threads, order, cptr, gidx):
    """``_fit_all`` in the calling thread: for a few columns, waking the worker threads costs more than the fits
    (milliseconds per call on a busy machine)."""
    side = 2 * rad + 1
    fbuf = np.empty(_scratch_size(rad))
    mbuf = np.empty(side * side, dtype=np.bool_)
    for t in range(order.shape[0]):
        k = order[t]
        _fit_one(k, img, valid, x0, y0, s0, fixw, rad, counts, n_iter, max_shift, s_lo, s_hi, touch2, th, tk,
                 final_obj, nb_ptr, nb_idx, nb_par, start, out, fbuf, mbuf)
        _publish(k, out, nb_par, gidx)


@njit(cache=True)
def _greedy_colours(ptr, idx):
    """Greedy colouring of a symmetric neighbour graph (CSR): no two neighbours share a colour."""
    n = ptr.shape[0] - 1
    colour = np.full(n, -1, np.int64)
    deg = 0
    for i in range(n):
        deg = max(deg, ptr[i + 1] - ptr[i])
    seen = np.full(deg + 2, -1, np.int64)
    for i in range(n):
        for t in range(ptr[i], ptr[i + 1]):
            c = colour[idx[t]]
            if c >= 0:
                seen[c] = i
        c = 0
        while seen[c] == i:
            c += 1
        colour[i] = c
    return colour


@njit(cache=True)
def _inverse_xx_yy(f):
    """Elements (0, 0) and (1, 1) of the inverse of the symmetric positive definite matrix ``f`` (overwritten).

    Cholesky f = L L^T in place; (f^-1)_ii = |L^-1 e_i|^2. NaN when f is not positive definite.
    """
    n = f.shape[0]
    for j in range(n):
        acc = f[j, j]
        for q in range(j):
            acc -= f[j, q] * f[j, q]
        if not (acc > 0.0 and math.isfinite(acc)):
            return np.nan, np.nan
        ljj = math.sqrt(acc)
        f[j, j] = ljj
        for i in range(j + 1, n):
            acc = f[i, j]
            for q in range(j):
                acc -= f[i, q] * f[j, q]
            f[i, j] = acc / ljj
    res = np.empty(2)
    z = np.empty(n)
    for e in range(2):
        tot = 0.0
        for i in range(n):  # forward substitution L z = e_e
            acc = 1.0 if i == e else 0.0
            for q in range(i):
                acc -= f[i, q] * z[q]
            z[i] = acc / f[i, i]
            tot += z[i] * z[i]
        res[e] = tot
    return res[0], res[1]


#: touching neighbours: centres closer than this many widths share enough light to correlate the fits
JOINT_REACH_SIGMA = 5.0
#: at most this many nearest touching neighbours enter a column's joint Fisher matrix
JOINT_MAX_NEIGHBOURS = 6


@njit(parallel=True, cache=True, nogil=True)
def _joint_var(img_h, img_w, valid, par, free_s, noise_var, counts, rad, th, tk, ptr, idx, wanted, out):
    """Per-axis position variance of column k from the Fisher matrix of its local joint model.

    The group is column k and its touching neighbours (CSR ``ptr``/``idx``); parameters are (x, y, s, A) of
    every member and one background; pixels are the union of the members' fit patches; the column profile has
    the tail ``th``, ``tk`` (see ``refine_columns``; 0, 1: a plain Gaussian). ``out[k] = (var_x, var_y)``; NaN
    where the matrix is singular or ``wanted[k]`` is False.
    """
    tail = th > 0.0
    cw = 1.0 - th
    n = par.shape[0]
    side = 2 * rad + 1
    for k in prange(n):
        out[k, 0] = np.nan
        out[k, 1] = np.nan
        if not wanted[k]:
            continue
        m = 1 + ptr[k + 1] - ptr[k]
        mem = np.empty(m, np.int64)
        mem[0] = k
        for t in range(ptr[k], ptr[k + 1]):
            mem[1 + t - ptr[k]] = idx[t]
        u0 = img_w
        u1 = -1
        v0 = img_h
        v1 = -1
        for i in range(m):
            cx = int(math.floor(par[mem[i], 0] + 0.5))
            cy = int(math.floor(par[mem[i], 1] + 0.5))
            u0 = min(u0, cx - rad)
            u1 = max(u1, cx + rad)
            v0 = min(v0, cy - rad)
            v1 = max(v1, cy + rad)
        u0 = max(u0, 0)
        v0 = max(v0, 0)
        u1 = min(u1, img_w - 1)
        v1 = min(v1, img_h - 1)
        nx = u1 - u0 + 1
        ny = v1 - v0 + 1
        if nx < 1 or ny < 1:
            continue
        gx = np.empty((m, nx))
        dgx = np.empty((m, nx))
        dsx = np.empty((m, nx))
        gy = np.empty((m, ny))
        dgy = np.empty((m, ny))
        dsy = np.empty((m, ny))
        tx = np.empty((3, m, nx if tail else 0))
        ty = np.empty((3, m, ny if tail else 0))
        for i in range(m):
            j = mem[i]
            _profile(u0, nx, par[j, 0], par[j, 2], gx[i], dgx[i], dsx[i])
            _profile(v0, ny, par[j, 1], par[j, 2], gy[i], dgy[i], dsy[i])
            if tail:
                _profile(u0, nx, par[j, 0], tk * par[j, 2], tx[0, i], tx[1, i], tx[2, i])
                _profile(v0, ny, par[j, 1], tk * par[j, 2], ty[0, i], ty[1, i], ty[2, i])
        npar = 4 * m + 1
        fis = np.zeros((npar, npar))
        # each member only where its light counts (within NEIGHBOUR_BOX_SIGMA widths per axis, the reach of the
        # fits' neighbour models): a pixel's Fisher term then couples the few members that reach it
        bu0 = np.empty(m, np.int64)
        bu1 = np.empty(m, np.int64)
        bv0 = np.empty(m, np.int64)
        bv1 = np.empty(m, np.int64)
        for i in range(m):
            j = mem[i]
            reach = max(NEIGHBOUR_BOX_SIGMA, TAIL_BOX_SIGMA * tk) * par[j, 2] if tail else NEIGHBOUR_BOX_SIGMA * par[j, 2]
            bu0[i] = int(math.ceil(par[j, 0] - reach)) - u0
            bu1[i] = int(math.floor(par[j, 0] + reach)) - u0
            bv0[i] = int(math.ceil(par[j, 1] - reach)) - v0
            bv1[i] = int(math.floor(par[j, 1] + reach)) - v0
        jac = np.empty(npar)
        bk = par[k, 4]
        for r in range(ny):
            for c in range(nx):
                if not valid[v0 + r, u0 + c]:
                    continue
                inside = False
                for i in range(m):
                    if abs(u0 + c - par[mem[i], 0]) <= rad + 0.5 and abs(v0 + r - par[mem[i], 1]) <= rad + 0.5:
                        inside = True
                        break
                if not inside:
                    continue
                mu = bk
                for i in range(npar):
                    jac[i] = 0.0
                for i in range(m):
                    if c < bu0[i] or c > bu1[i] or r < bv0[i] or r > bv1[i]:
                        continue
                    a = par[mem[i], 3]
                    gxc = gx[i, c]
                    gyr = gy[i, r]
                    if tail:  # the same derivatives as the fits' (see _evaluate)
                        txc = tx[0, i, c]
                        tyr = ty[0, i, r]
                        gg = cw * gxc * gyr + th * txc * tyr
                        mu += a * gg
                        jac[4 * i] = a * (cw * dgx[i, c] * gyr + th * tx[1, i, c] * tyr)
                        jac[4 * i + 1] = a * (cw * gxc * dgy[i, r] + th * txc * ty[1, i, r])
                        if free_s[mem[i]]:
                            jac[4 * i + 2] = a * (cw * (dsx[i, c] * gyr + gxc * dsy[i, r])
                                                  + th * tk * (tx[2, i, c] * tyr + txc * ty[2, i, r]))
                    else:
                        gg = gxc * gyr
                        mu += a * gxc * gyr
                        jac[4 * i] = a * dgx[i, c] * gyr
                        jac[4 * i + 1] = a * gxc * dgy[i, r]
                        if free_s[mem[i]]:
                            jac[4 * i + 2] = a * (dsx[i, c] * gyr + gxc * dsy[i, r])
                    jac[4 * i + 3] = gg
                jac[4 * m] = 1.0
                w = 1.0 / max(mu, 1.0) if counts else 1.0 / noise_var[k]
                for a_ in range(npar):  # the upper triangle, a contiguous row at a time (vectorised)
                    ja = jac[a_] * w
                    if ja == 0.0:
                        continue
                    for b_ in range(a_, npar):
                        fis[a_, b_] += ja * jac[b_]
        for a_ in range(npar):
            for b_ in range(a_):
                fis[a_, b_] = fis[b_, a_]
        for i in range(m):  # a width held fixed is no parameter: its empty row and column are decoupled
            if not free_s[mem[i]]:
                fis[4 * i + 2, 4 * i + 2] = 1.0
        ok = True
        for a_ in range(npar):
            if not fis[a_, a_] > 0.0:
                ok = False
        if not ok:
            continue
        out[k, 0], out[k, 1] = _inverse_xx_yy(fis)


def joint_position_errors(image_shape, table, *, patch_radius_px, valid=None, counts=True,
                          reach_sigma=JOINT_REACH_SIGMA, max_neighbours=JOINT_MAX_NEIGHBOURS, rows=None, tail=None):
    """Per-axis 1-sigma position errors of fitted columns from the Fisher information of their local joint model.

    A column fitted with its neighbours' models subtracted inherits the uncertainty of those models: the
    position of a crowded column correlates with its neighbours' positions, widths and amplitudes. The Cramer-Rao
    bound of the joint fit is the (x, x) element of the inverse Fisher matrix over all parameters of the column
    and of its touching neighbours (centres closer than ``reach_sigma`` widths, at most ``max_neighbours``),
    with one shared background, over the union of their fit patches. For an isolated column this is the usual
    single-spot bound.

    Parameters
    ----------
    image_shape : (int, int)
    table : DataFrame
        Output of :func:`refine_columns` (``x_px, y_px, sigma_px, amplitude, background, residual, fit_status``).
    patch_radius_px : int
    valid : (H, W) bool array, optional
    counts : bool
        Poisson weights 1 / model (raw counts); else white noise of variance (residual x amplitude)^2 per column.
    rows : (N,) bool array, optional
        The rows whose errors are wanted (default all); the others still enter their neighbours' groups (a tile's
        halo columns, which the tile does not keep), and get NaN.
    tail : (float, float), optional
        The column profile's tail as in :func:`refine_columns` (the model the table was fitted with); None: a
        plain Gaussian.

    Returns
    -------
    (N, 2) array
        sigma_x, sigma_y in px; NaN for rows without a usable fit.

    References
    ----------
    Fisher information of Poisson pixel data, I = sum_pixels (d mu / d theta)(d mu / d theta)^T / mu: e.g.
    Ober, Ram & Ward, Biophys. J. 86 (2004) 1185 (single spots); the same sum over a joint model of several spots.
    """
    h, w = (int(v) for v in image_shape)
    ok = table["fit_status"].isin(["ok", "fixed_width"]).to_numpy()
    par = table[["x_px", "y_px", "sigma_px", "amplitude", "background"]].to_numpy(dtype=np.float64)
    noise_var = (table["residual"].to_numpy(dtype=np.float64) * table["amplitude"].to_numpy(dtype=np.float64)) ** 2
    res = np.full((len(table), 2), np.nan)
    good = np.flatnonzero(ok & np.all(np.isfinite(par), axis=1))
    if good.size == 0:
        return res
    gp = np.ascontiguousarray(par[good])
    tree = cKDTree(gp[:, :2])
    reach = reach_sigma * float(np.median(gp[:, 2]))
    d, j = tree.query(gp[:, :2], k=max_neighbours + 1, distance_upper_bound=reach)
    d, j = d[:, 1:], j[:, 1:]
    has = np.isfinite(d)
    ptr = np.zeros(good.size + 1, np.int64)
    ptr[1:] = np.cumsum(has.sum(axis=1))
    idx = j[has].astype(np.int64)
    vm = np.ones((h, w), dtype=bool) if valid is None else np.ascontiguousarray(np.asarray(valid, dtype=bool))
    out = np.empty((good.size, 2))
    free_s = np.ascontiguousarray((table["fit_status"].to_numpy() == "ok")[good])
    wanted = np.ones(good.size, dtype=bool) if rows is None else np.asarray(rows, dtype=bool)[good]
    _joint_var(h, w, vm, gp, free_s, np.ascontiguousarray(np.maximum(noise_var[good], 1e-300)), bool(counts),
               int(patch_radius_px), *_tail_pair(tail), ptr, idx, np.ascontiguousarray(wanted), out)
    res[good] = np.sqrt(np.where(out > 0, out, np.nan))
    return res


#: the tail is learned on at most this many bright voters (the most central ones: one compact window), and not on
#: fewer than the minimum
TAIL_LEARN_MAX, TAIL_LEARN_MIN = 100, 10
#: searched range of the tail's width ratio k and of its share of the integrated intensity f
TAIL_K_RANGE, TAIL_F_MAX = (1.5, 8.0), 0.8
#: a learned tail is used when it improves the fit of the learning columns at this false-alarm probability (a
#: likelihood-ratio test with two parameters, the patches' overlap divided out) and holds this share of the light
TAIL_P_VALUE, TAIL_MIN_FRACTION = 1e-3, 0.05
#: small trial tails (f, k), a narrow and a wide one: when neither improves the fit by a quarter of the test's
#: threshold the image has no tail worth the search
TAIL_PROBES, TAIL_PROBE_GATE = ((0.03, 3.0), (0.1, 1.7)), 0.25
#: neighbour passes of each trial fit while the tail is learned (they converge to TAIL_CONVERGE_PX)
TAIL_PASSES, TAIL_CONVERGE_PX = 10, 2e-4


def tail_share(fraction, ratio):
    """The tail's share of the peak height ``h`` from its share of the integrated intensity ``f`` and width ratio
    ``k``: ``f = h k^2 / ((1 - h) + h k^2)``, so ``h = f / (f + k^2 (1 - f))``."""
    return fraction / (fraction + ratio * ratio * (1.0 - fraction))


def learn_tail(image, table, *, patch_radius_px, votes=None, valid=None, counts=True, share_widths=None):
    """Learn a core + tail column profile (see ``refine_columns``, ``tail``) from the bright columns.

    The central bright columns (amplitude above ``FREE_WIDTH_SNR`` standard errors) among ``votes`` are refitted
    with everything around them in a window, all columns with one trial profile (tail share of the intensity
    ``f``, width ratio ``k``); the profile that minimises their summed misfit (Poisson negative log-likelihood,
    or the residual sum of squares over its variance) wins: a two-parameter fit by profile likelihood,
    every column's x, y, s, A, B free in each trial (warm-started from the table, each column's class, free or
    common width, kept). A coarse grid over k and f, then Nelder-Mead from its best point.
    A Gaussian image stops after two small trial tails (``TAIL_PROBES``) that improve the fit by less than
    ``TAIL_PROBE_GATE`` of the threshold.

    Parameters
    ----------
    image : (H, W) array
        The image the table was fitted on (bright columns).
    table : DataFrame
        Output of :func:`refine_columns` with a plain Gaussian.
    patch_radius_px : int
        The fits' patch radius.
    votes : (N,) bool array, optional
        Columns that may teach the profile (default all): away from a window's edges.
    valid : (H, W) bool array, optional
    counts : bool
        As in :func:`refine_columns`.
    share_widths : bool, optional
        As in :func:`refine_columns`.

    Returns
    -------
    dict
        ``tail`` ([h, k] for ``refine_columns``; [0, 1] when not significant), ``fraction`` (f), ``ratio`` (k),
        ``significant``, ``deviance_gain`` (twice the log-likelihood gain over the Gaussian, over the patches'
        overlap), ``threshold``, ``n_columns``, ``trials``, ``how``.

    Notes
    -----
    The gain is compared with the chi-square distribution of two degrees of freedom (Wilks 1938) at
    ``TAIL_P_VALUE``; overlapping patches count pixels more than once, so the gain is divided by the mean number
    of patches per pixel.

    References
    ----------
    S. S. Wilks, Ann. Math. Statist. 9 (1938) 60, doi:10.1214/aoms/1177732360 (likelihood-ratio test).
    J. A. Nelder & R. Mead, Comput. J. 7 (1965) 308 (simplex search).
    """
    from scipy.optimize import minimize
    from scipy.stats import chi2 as chi2_dist

    img, vmask = _prepare(image, valid)
    threshold = float(chi2_dist.isf(TAIL_P_VALUE, 2))
    record = {"tail": [0.0, 1.0], "fraction": 0.0, "ratio": 1.0, "significant": False, "deviance_gain": 0.0,
              "threshold": threshold, "n_columns": 0, "trials": 0}
    status = table["fit_status"].to_numpy()
    par = table[["x_px", "y_px", "sigma_px", "amplitude", "amplitude_err"]].to_numpy(dtype=np.float64)
    fitted = np.isin(status, ("ok", "fixed_width")) & np.all(np.isfinite(par[:, :4]), axis=1)
    vote = np.ones(len(table), dtype=bool) if votes is None else np.asarray(votes, dtype=bool)
    learn = np.flatnonzero(fitted & vote & (par[:, 3] > FREE_WIDTH_SNR * par[:, 4]))
    if learn.size:
        centre = np.median(par[learn, :2], axis=0)
        learn = learn[np.argsort(np.hypot(*(par[learn, :2] - centre).T), kind="stable")[:TAIL_LEARN_MAX]]
    record["n_columns"] = int(learn.size)
    n_free = int(np.count_nonzero(status[learn] == "ok"))
    if learn.size < TAIL_LEARN_MIN or n_free < TAIL_LEARN_MIN:
        # without free widths the width is a guess, and a tail would only make up for a wrong one
        record["how"] = (f"not learned: fewer than {TAIL_LEARN_MIN} bright columns with a width of their own; a "
                         "plain Gaussian")
        return record
    rad = int(patch_radius_px)
    s_med = float(np.median(par[learn, 2]))
    # a window around the learning columns, wide enough that their neighbours' neighbours are in it
    margin = _list_reach(rad, s_med, (1.0, TAIL_K_RANGE[1])) + rad + 2.0
    h, w = img.shape
    r0 = max(int(np.floor(par[learn, 1].min() - margin)), 0)
    r1 = min(int(np.ceil(par[learn, 1].max() + margin)) + 1, h)
    c0 = max(int(np.floor(par[learn, 0].min() - margin)), 0)
    c1 = min(int(np.ceil(par[learn, 0].max() + margin)) + 1, w)
    inside = fitted & (par[:, 0] >= c0) & (par[:, 0] <= c1 - 1) & (par[:, 1] >= r0) & (par[:, 1] <= r1 - 1)
    members = np.flatnonzero(inside)
    xy = par[members, :2] - np.array([c0, r0], dtype=np.float64)
    is_learn = np.isin(members, learn)
    free = status[members] == "ok"  # the Gaussian fit's classes, kept in every trial
    start = np.c_[xy, table[["sigma_px", "amplitude", "background"]].to_numpy(dtype=np.float64)[members]]
    crop, cmask = img[r0:r1, c0:c1], vmask[r0:r1, c0:c1]
    # mean number of learning patches per pixel of their union
    cx = np.floor(xy[is_learn, 0] + 0.5).astype(np.int64)
    cy = np.floor(xy[is_learn, 1] + 0.5).astype(np.int64)
    off = np.arange(-rad, rad + 1)
    px = np.clip(cx[:, None, None] + off[None, None, :], 0, crop.shape[1] - 1)
    py = np.clip(cy[:, None, None] + off[None, :, None], 0, crop.shape[0] - 1)
    flat = (py * crop.shape[1] + px).ravel()
    overlap = flat.size / max(np.unique(flat).size, 1)

    def misfit(f, k):
        tail = (tail_share(f, k), k) if f > 0 else None
        t = refine_columns(crop, xy, sigma_px=s_med, patch_radius_px=rad, valid=cmask, counts=counts,
                           neighbour_passes=TAIL_PASSES, converge_px=TAIL_CONVERGE_PX, share_widths=share_widths,
                           width_votes=is_learn, tail=tail, votes_objective=True, free_widths=free,
                           start_params=start)
        record["trials"] += 1
        return t.attrs["objective_by_column"], t.attrs["votes_pixels"]

    m0, npx0 = misfit(0.0, 1.0)
    # twice the log-likelihood gain: 2 x the Poisson negative log-likelihood's drop, or the drop of the residual
    # sum of squares over the Gaussian fits' residual variance
    scale = 0.5 if counts else max(np.nansum(m0) / max(npx0, 1), 1e-300)

    def gain(m):
        both = np.isfinite(m0) & np.isfinite(m)  # a column whose fit fails in one trial is left out of that one
        return float(np.sum(m0[both] - m[both])) / scale / overlap * (m0.size and np.isfinite(m0).sum() / max(
            both.sum(), 1))

    cache: dict = {}

    def cost(q):
        f = float(np.clip(q[0], 0.0, TAIL_F_MAX))
        k = float(np.clip(np.exp(q[1]), *TAIL_K_RANGE))
        key = (round(f, 4), round(k, 3))
        if key not in cache:
            cache[key] = -gain(misfit(f, k)[0])
        return cache[key]

    best = (np.inf, 0.0, 1.0)
    for f, k in TAIL_PROBES:
        c = cost((f, math.log(k)))
        if c < best[0]:
            best = (c, f, k)
    if -best[0] >= TAIL_PROBE_GATE * threshold:
        for k in (2.0, 3.5, 6.0):
            for f in (0.15, 0.35):
                c = cost((f, math.log(k)))
                if c < best[0]:
                    best = (c, f, k)
        res = minimize(cost, np.array([best[1], math.log(best[2])]), method="Nelder-Mead",
                       options={"maxfev": 20, "xatol": 0.01, "fatol": 0.5,
                                "initial_simplex": np.array([[best[1], math.log(best[2])],
                                                             [best[1] * 1.3, math.log(best[2])],
                                                             [best[1], math.log(best[2]) + 0.2]])})
        if res.fun < best[0]:
            best = (float(res.fun), float(np.clip(res.x[0], 0.0, TAIL_F_MAX)),
                    float(np.clip(np.exp(res.x[1]), *TAIL_K_RANGE)))
    g, f, k = -best[0], best[1], best[2]
    record.update(deviance_gain=float(g), fraction=float(f), ratio=float(k))
    if g >= threshold and f >= TAIL_MIN_FRACTION:
        record.update(tail=[float(tail_share(f, k)), float(k)], significant=True)
        record["how"] = (f"learned on {learn.size} bright columns: every trial profile refits them "
                         f"and their neighbours; the best one improves the fit by {g:.1f} (chi-square, over the "
                         f"patches' overlap {overlap:.2f}) against {threshold:.1f} at p = {TAIL_P_VALUE:g} (2 degrees "
                         f"of freedom)")
    else:
        record["how"] = (f"not significant on {learn.size} bright columns (gain {g:.1f} against "
                         f"{threshold:.1f}, or tail share of the light under {TAIL_MIN_FRACTION:g}): a plain Gaussian")
    return record


def warm_up() -> float:
    """Compile (or load from the on-disk cache) the numba kernels; return the seconds it took."""
    t0 = time.perf_counter()
    for dtype in (np.float64, np.float32):  # the finder fits float64 windows; callers may pass float32 images
        img = np.random.default_rng(0).poisson(10.0, (16, 16)).astype(dtype)
        for kernel in (_fit_all, _fit_serial):
            kernel(img, np.ones(img.shape, bool), np.array([7.7]), np.array([8.2]), np.array([1.5]),
                   np.zeros(1, np.bool_), 4, True, 3, 4.0, 0.3, 6.0, 16.0, 0.0, 1.0, False, np.zeros(2, np.int64),
                   np.zeros(0, np.int64),
                   np.zeros((1, 4)), np.full((1, 5), np.nan), np.empty((1, _NOUT)), int(numba.config.NUMBA_NUM_THREADS),
                   np.zeros(1, np.int64), np.array([0, 1], np.int64), np.zeros(1, np.int64))
    _greedy_colours(np.array([0, 1, 2], np.int64), np.array([1, 0], np.int64))
    _joint_var(16, 16, np.ones((16, 16), bool), np.array([[7.7, 8.2, 1.5, 50.0, 10.0]]), np.ones(1, np.bool_),
               np.ones(1), True, 4, 0.0, 1.0,
               np.zeros(2, np.int64), np.zeros(0, np.int64), np.ones(1, np.bool_), np.empty((1, 2)))
    return time.perf_counter() - t0


#: fewer columns than this are fitted in the calling thread (same results; no wake-up of the worker threads)
SERIAL_BELOW = 256


def _tail_pair(tail):
    """(share of the peak height, width ratio) of a profile's tail as floats; (0, 1) for none."""
    if tail is None:
        return 0.0, 1.0
    th, tk = (float(v) for v in tail)
    if not (0.0 <= th < 1.0 and tk >= 1.0 and math.isfinite(tk)):
        raise TenfoldInputError(f"tail={tail!r}: the tail's share of the peak height must lie in [0, 1) and its "
                                "width ratio be at least 1; pass None for a plain Gaussian")
    return (th, tk) if th > 0.0 else (0.0, 1.0)


def profile_area(tail) -> float:
    """Integral of the unit-peak column profile over 2 pi s^2: ``(1 - h) + h k^2`` (1 for a plain Gaussian)."""
    th, tk = _tail_pair(tail)
    return (1.0 - th) + th * tk * tk



def _run(img, valid, x0, y0, s0, rad, counts, n_iter, max_shift, s_lo, s_hi, nb_ptr, nb_idx, nb_par, start=None,
         fixw=None, colour=None, gidx=None, tail=None, final_obj=False):
    """Fit the columns (x0, y0); with ``colour`` (one class per column) class after class, each class's models
    written into ``nb_par`` rows ``gidx`` as it is done (a Gauss-Seidel sweep; ``nb_par`` is updated in place).
    ``tail``: (share of the peak height, width ratio) of the profile's tail, None for a plain Gaussian;
    ``final_obj``: the objective (``out[:, 11]``) at the final parameters."""
    th, tk = _tail_pair(tail)
    n = x0.shape[0]
    if colour is None or n == 0:
        order, cptr = np.arange(n, dtype=np.int64), np.array([0, n], np.int64)
    else:
        colour = np.asarray(colour, dtype=np.int64)
        order = np.argsort(colour, kind="stable").astype(np.int64)
        cptr = np.zeros(int(colour.max()) + 2, np.int64)
        cptr[1:] = np.cumsum(np.bincount(colour))
    gidx = np.full(n, -1, np.int64) if gidx is None else np.ascontiguousarray(gidx, dtype=np.int64)
    out = np.empty((n, _NOUT))
    s_arr = np.ascontiguousarray(np.broadcast_to(np.asarray(s0, dtype=np.float64), (n,)))
    fix_arr = np.zeros(n, dtype=np.bool_) if fixw is None else np.ascontiguousarray(fixw, dtype=np.bool_)
    touch2 = (2.0 * float(np.median(s_arr)) + 0.5) ** 2 if n else 1.0
    if start is None:
        start = np.full((max(n, 1), 5), np.nan)
    kernel = _fit_all if n >= SERIAL_BELOW else _fit_serial
    kernel(img, valid, x0, y0, s_arr, fix_arr, int(rad), bool(counts), int(n_iter), float(max_shift), float(s_lo),
           float(s_hi), touch2, th, tk, bool(final_obj), nb_ptr, nb_idx, nb_par,
           np.ascontiguousarray(start, dtype=np.float64), out,
           int(numba.config.NUMBA_NUM_THREADS), order, cptr, gidx)
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


#: longest neighbour list per column (the nearest are kept); a column farther than the patch reach adds no light
NEIGHBOUR_LIST_MAX = 24


def _neighbour_lists(xy, reach, k_max=NEIGHBOUR_LIST_MAX):
    """CSR arrays of every column's neighbours within ``reach`` px (at most ``k_max`` nearest), built once.

    One vectorised KD-tree query; rows with non-finite positions get empty lists.
    """
    n = xy.shape[0]
    ptr = np.zeros(n + 1, np.int64)
    fin = np.all(np.isfinite(xy), axis=1)
    if n < 2 or fin.sum() < 2:
        return ptr, np.zeros(0, np.int64)
    idx_fin = np.flatnonzero(fin)
    k = min(k_max + 1, idx_fin.size)
    d, j = cKDTree(xy[idx_fin]).query(np.where(fin[:, None], xy, 0.0), k=k, distance_upper_bound=reach)
    d, j = d.reshape(n, -1), j.reshape(n, -1)
    has = np.isfinite(d) & fin[:, None]
    has &= idx_fin[np.minimum(j, idx_fin.size - 1)] != np.arange(n)[:, None]
    ptr[1:] = np.cumsum(has.sum(axis=1))
    return ptr, idx_fin[j[has]].astype(np.int64)


def _colour_classes(ptr, idx):
    """One class per column such that no column shares its class with a neighbour (either list names the
    other): the order of a Gauss-Seidel sweep whose classes are fitted in parallel."""
    n = ptr.shape[0] - 1
    if n == 0:
        return np.zeros(0, np.int64)
    src = np.repeat(np.arange(n), ptr[1:] - ptr[:-1])
    adj = coo_matrix((np.ones(idx.size, np.int8), (src, idx)), shape=(n, n)).tocsr()
    sym = (adj + adj.T).tocsr()
    return _greedy_colours(sym.indptr.astype(np.int64), sym.indices.astype(np.int64))


def _neighbour_params(out):
    """(x, y, s, A) of every fitted column; zeros (no light) for failed fits, so a list may hold any column."""
    good = (out[:, 8] == _OK) | (out[:, 8] == _FIXED)
    par = np.zeros((out.shape[0], 4))
    par[good] = out[good][:, [0, 1, 2, 3]]
    return par


#: after this many neighbour passes a column's class (own free width or the common width) no longer changes
CLASSES_SETTLE_PASSES = 2
#: columns closer than this many widths share the common width in the neighbour passes
TOUCH_SIGMA = 4.5


def _touching(out, fitted, reach):
    """True for columns with another fitted column closer than ``reach`` px."""
    xy = np.where(fitted[:, None], out[:, :2], np.nan)
    idx = np.flatnonzero(fitted & np.all(np.isfinite(xy), axis=1))
    res = np.zeros(out.shape[0], dtype=bool)
    if idx.size >= 2:
        d = cKDTree(xy[idx]).query(xy[idx], k=2)[0][:, 1]
        res[idx] = d < reach
    return res


#: a column keeps its own free width in the neighbour passes only when its amplitude stands this many standard
#: errors above zero; fainter ones share the common width (see _common_width)
FREE_WIDTH_SNR = 20.0


def _common_width(out, s0):
    """The width shared by faint columns: median width of the well-measured free fits (else the start width)."""
    ok = (out[:, 8] == _OK) & (out[:, 3] > FREE_WIDTH_SNR * out[:, 14])
    return float(np.median(out[ok, 2])) if ok.sum() >= 5 else float(s0)


def _sub_csr(ptr, idx, rows):
    """The neighbour lists of ``rows`` only, as CSR arrays (vectorised gather)."""
    counts_nb = ptr[rows + 1] - ptr[rows]
    sub_ptr = np.zeros(rows.size + 1, np.int64)
    sub_ptr[1:] = np.cumsum(counts_nb)
    pos = np.repeat(ptr[rows] - sub_ptr[:-1], counts_nb) + np.arange(sub_ptr[-1])
    sub_idx = idx[pos] if idx.size else np.zeros(0, np.int64)
    return sub_ptr, sub_idx.astype(np.int64)


def _active_columns(out, prev, ptr, idx, tol_px):
    """Columns to refit: all (first pass), else those whose own or a neighbour's model changed by > ``tol_px``.

    A change of the amplitude counts as its effect on the light at one sigma, in px of equivalent shift.
    """
    n = out.shape[0]
    if prev is None:
        return np.arange(n)
    step = np.hypot(out[:, 0] - prev[:, 0], out[:, 1] - prev[:, 1])
    rel_a = np.abs(out[:, 3] - prev[:, 3]) / np.maximum(np.abs(out[:, 3]), 1e-12) * out[:, 2]
    changed = np.nan_to_num(np.maximum(step, rel_a), nan=0.0) > tol_px
    src = np.repeat(np.arange(n), ptr[1:] - ptr[:-1])
    hit = changed.copy()
    hit[src[changed[idx]]] = True  # a column whose neighbour changed is refitted too
    return np.flatnonzero(hit)


def refine_columns(image, xy_px, *, sigma_px, patch_radius_px=None, valid=None, counts=True, n_iter=12,
                   neighbour_passes=1, converge_px=0.005, max_shift_px=None, fixed_width_fallback=True,
                   joint_errors=False, common_width_px=None, share_widths=None, width_votes=None, tail=None,
                   votes_objective=False, free_widths=None, start_params=None, progress=None) -> pd.DataFrame:
    """Fit a pixel-integrated 2-D Gaussian (or a core + tail profile) plus constant background to every column.

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
        Largest number of extra passes in which each column is refitted with its neighbours' current model (found
        by one KD-tree query) subtracted: a Gauss-Seidel iteration of the coupled fits (colour classes of the
        neighbour graph in turn, each class in parallel, every class subtracting the models already updated), which
        converges to the joint fit of touching columns. 0 fits every column alone.
    converge_px : float
        The passes stop when no column moved by more than this (px); a pass refits only the columns whose own or
        a neighbour's model changed by more than this.
    joint_errors : bool
        Replace each column's position error by the one from the Fisher information of the local joint model
        (the column, its touching neighbours and their nuisance parameters), see ``joint_position_errors``;
        default False (the column's own Fisher information with its neighbours held fixed).
    max_shift_px : float, optional
        A fit that moves farther than this from its start (per axis) is 'diverged'. Default: the patch radius
        (about half the column spacing).
    common_width_px : float, optional
        The width shared by faint and crowded columns in the neighbour passes. Default None: measured here, the
        median width of the bright free fits, updated every pass (its final value is ``attrs['common_width_px']``).
        Give it to fit a window of an image exactly as the whole image was fitted.
    share_widths : bool, optional
        Whether crowded bright columns share the common width (True unless fewer than 5 bright columns are free of
        touching neighbours). Default None: decided here (``attrs['share_widths']``).
    width_votes : (N,) bool array, optional
        The columns whose fits decide the common width and ``share_widths`` (default: all); a window cut out of a
        larger image lets only the columns away from its edges vote (an edge column misses neighbours).
    tail : (float, float), optional
        A core + tail column profile ``(h, k)``: ``A [(1 - h) G(s) + h G(k s)]``, two pixel-integrated Gaussians
        of unit peak height with one centre, the tail ``k`` (>= 1) times wider and ``h`` (in [0, 1)) of the peak
        height; ``h`` and ``k`` are held fixed (learn them with :func:`learn_tail`), x, y, s, A, B stay free per
        column, neighbours are modelled alike. None (default) or ``h = 0``: the plain Gaussian, exactly.
    votes_objective : bool
        Also return ``attrs['votes_objective']``: the summed objective (Poisson negative log-likelihood without
        its data-only term, or the residual sum of squares) of the fitted voters at their final parameters, with
        ``attrs['votes_pixels']``, ``attrs['votes_fitted']`` and ``attrs['objective_by_column']`` (NaN for the
        others; one more evaluation per fit; default False).
    free_widths : (N,) bool array, optional
        The columns that get their own width in the neighbour passes (the others share the common width); default
        None: decided here from their amplitudes and neighbours. Fixed classes make fits of one image with
        different profiles comparable (see ``learn_tail``).
    start_params : (N, 5) array, optional
        A warm start (x, y, s, A, B per column, e.g. an earlier fit's); the first fit holds each width at its
        start value instead of ``sigma_px``. Default None: a cold start.
    progress : callable, optional
        ``progress(fraction, message)``; returning False cancels (raises ``Cancelled``).

    Returns
    -------
    DataFrame
        One row per input position, in input order (``attrs``: ``neighbour_passes_done``,
        ``columns_still_moving`` (fits that still moved by more than ``converge_px`` in the last pass: 0 when the
        passes converged), ``common_width_px``, ``share_widths``): ``x_px, y_px, sigma_px, amplitude, background, intensity,
        residual, pos_err_px, fit_status`` (schema names and units, see ``_schema.COLUMNS``) plus extras
        ``amplitude_err`` (1-sigma), ``x_err_px, y_err_px`` (1-sigma per axis), ``x_init_px, y_init_px``,
        ``n_pixels``, ``n_iter``, ``patch_mean`` (mean data value over the fit patch: with ``residual`` it gives
        the noise variance at that level, see ``columns.noise_model``).
        Fit columns are NaN unless ``fit_status`` is 'ok' or 'fixed_width'.

    Notes
    -----
    ``fit_status``: 'ok' (free width); 'fixed_width' (the width was held at the common width, the median of the
    well-measured free fits: columns whose amplitude is below ``FREE_WIDTH_SNR`` standard errors in the neighbour
    passes, and failed free fits rescued by ``fixed_width_fallback``); 'diverged' (non-finite, moved more than ``max_shift_px``, width outside
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
    tail = _tail_pair(tail)
    if free_widths is not None:
        free_widths = np.asarray(free_widths, dtype=bool)
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
    joint = int(neighbour_passes) > 0
    # With neighbour passes the first fit holds every width at the start width: a free width beside a fainter
    # neighbour widens over it and swallows its light, and the faint fit then finds nothing left to fit.
    fixw = np.full(n, joint)
    warm = None if start_params is None else np.asarray(start_params, dtype=np.float64).reshape(n, 5)
    s_first = s0 if warm is None else np.where(np.isfinite(warm[:, 2]) & (warm[:, 2] > 0), warm[:, 2], s0)
    out = _run(img, vmask, x0, y0, s_first, rad, counts, n_iter, max_shift, 0.25 * s0, 4.0 * s0,
               np.zeros(n + 1, np.int64), np.zeros(0, np.int64), np.zeros((max(n, 1), 4)), start=warm, fixw=fixw,
               tail=tail, final_obj=votes_objective)
    passes_done = 0
    moving = 0
    prev_par = None
    s_cols = np.full(n, s0)
    given_width = common_width_px is not None
    votes = np.ones(n, dtype=bool) if width_votes is None else np.asarray(width_votes, dtype=bool)
    s_common = float(common_width_px) if given_width else _common_width(out[votes], s0)
    crowded = np.zeros(n, dtype=bool)
    shared = share_widths
    if int(neighbour_passes) > 0:
        ptr, idx = _neighbour_lists(np.c_[x0, y0], _list_reach(rad, s0, tail))
        colour = _colour_classes(ptr, idx)
    for p in range(int(neighbour_passes)):
        report(progress, (p + 1) / (neighbour_passes + 1), f"refitting with neighbours subtracted (pass {p + 1})")
        par = _neighbour_params(out)
        if idx.size == 0 and p > 0:
            break
        # Bright columns get their own width; faint ones (and failed fits) share the common width of the bright
        # ones: every column is imaged by the same probe, and a free width beside a brighter neighbour trades off
        # against the background and collapses.
        fitted = (out[:, 8] == _OK) | (out[:, 8] == _FIXED)
        bright = fitted & (out[:, 3] > FREE_WIDTH_SNR * out[:, 14])
        # a free width is only measurable on a column that no neighbour touches (closer than TOUCH_SIGMA widths);
        # crowded columns share the width of the free ones, unless too few are free
        if p == 0:
            crowded = _touching(out, fitted, TOUCH_SIGMA * s0)
            if shared is None:
                shared = bool((bright & ~crowded & votes).sum() >= 5)
            if not shared:
                crowded[:] = False
        bright &= ~crowded
        if p >= CLASSES_SETTLE_PASSES:
            # the classes are kept from here on: a column near the line can otherwise flip every pass (a free
            # width's larger amplitude error puts it under the line, the fixed width's smaller one back over it)
            bright = ~fixw
        if free_widths is not None:
            bright = free_widths.copy()
        if not given_width:
            s_common = _common_width(out[votes], s0)
        newly = (bright == fixw) | (fixw & (np.abs(s_cols - s_common) > 1e-3 * s0))
        fixw = ~bright
        s_cols[fixw] = s_common
        # Gauss-Seidel iteration of the coupled fits: refit only the columns whose own or any neighbour's model
        # changed since the last pass (all of them in the first pass), warm-started, so later passes are cheap.
        # (A first Jacobi pass would make the settled classes independent of the columns' order, but classes
        # settled on it cost the dim columns of the bundled low-dose sample 1.40 bounds instead of <= 1.3.)
        # a failed fit is tried again in the first passes only: one that still fails (no light, then its
        # neighbours' light, then none again) would keep the passes from converging; the last fixed-width try
        # below takes it up
        retry = ~fitted if p < CLASSES_SETTLE_PASSES else np.zeros(n, dtype=bool)
        active = _active_columns(out, prev_par, ptr, idx, converge_px)
        active = np.union1d(active[fitted[active]] if p >= CLASSES_SETTLE_PASSES else active,
                            np.flatnonzero(newly | retry))
        if active.size == 0:
            break
        prev_par = out[:, :5].copy()
        sub_ptr, sub_idx = _sub_csr(ptr, idx, active)
        fitted = (out[active, 8] == _OK) | (out[active, 8] == _FIXED)
        start = np.where(fitted[:, None], out[active, :5], np.nan)
        again = _run(img, vmask, x0[active], y0[active], s_cols[active], rad, counts, n_iter if p == 0 else 6,
                     max_shift, 0.25 * s0, 4.0 * s0, sub_ptr, sub_idx, par, start=start, fixw=fixw[active],
                     colour=colour[active], gidx=active, tail=tail, final_obj=votes_objective)
        again[:, 10] += out[active, 10]
        out[active] = again
        passes_done = p + 1
        step = np.hypot(out[active, 0] - prev_par[active, 0], out[active, 1] - prev_par[active, 1])
        moving = int(np.count_nonzero(np.nan_to_num(step, nan=0.0) > converge_px))
        if not moving and not newly.any() and p > 0:
            break
    # Columns whose fit still failed get one last fixed-width try with everything else subtracted; they are marked
    # 'fixed_width' so the user can tell (low-signal columns).
    redo = np.flatnonzero(out[:, 8] == _DIVERGED)
    good = (out[:, 8] == _OK) | (out[:, 8] == _FIXED)
    if fixed_width_fallback and redo.size and (given_width or good.sum() >= 5):
        if int(neighbour_passes) == 0:
            ptr, idx = _neighbour_lists(np.c_[x0, y0], _list_reach(rad, s0, tail))
            colour = _colour_classes(ptr, idx)
        par = _neighbour_params(out)
        sub_ptr, sub_idx = _sub_csr(ptr, idx, redo)
        again = _run(img, vmask, x0[redo], y0[redo], s_common, rad, counts, n_iter, max_shift, s_common, s_common,
                     sub_ptr, sub_idx, par, fixw=np.ones(redo.size, dtype=bool), colour=colour[redo], gidx=redo,
                     tail=tail, final_obj=votes_objective)
        fixed = again[:, 8] == _FIXED
        out[redo[fixed]] = again[fixed]
    table = _columns_out(out, x0, y0, tail)
    if joint_errors and len(table):
        report(progress, 0.95, "position errors of the joint model")
        err = joint_position_errors(img.shape, table, patch_radius_px=rad, valid=vmask, counts=counts, tail=tail)
        fitted = table["fit_status"].isin(["ok", "fixed_width"]).to_numpy()
        table.loc[fitted, "x_err_px"] = err[fitted, 0]
        table.loc[fitted, "y_err_px"] = err[fitted, 1]
        table["pos_err_px"] = 0.5 * (table["x_err_px"] + table["y_err_px"])
    table.attrs["neighbour_passes_done"] = passes_done
    table.attrs["columns_still_moving"] = moving
    table.attrs["common_width_px"] = float(s_common)
    table.attrs["share_widths"] = bool(shared) if shared is not None else True
    table.attrs["tail"] = list(tail)
    if votes_objective:  # a profile's goodness on fixed patches (see learn_tail)
        voted = votes & ((out[:, 8] == _OK) | (out[:, 8] == _FIXED))
        table.attrs["votes_objective"] = float(np.sum(out[voted, 11]))
        table.attrs["votes_pixels"] = int(np.sum(out[voted, 9]))
        table.attrs["votes_fitted"] = int(voted.sum())
        table.attrs["objective_by_column"] = np.where(voted, out[:, 11], np.nan)
    report(progress, 1.0, "refinement done")
    return table


def _list_reach(rad, s0, tail):
    """Neighbour-list reach, px: a neighbour's model reaches a patch from rad sqrt 2 + 4 widths away (3 of its
    tail's widths with a tail: beyond, the tail's light is under exp(-4.5) of its small peak); 1 px of margin for
    the fits' moves."""
    return rad * math.sqrt(2.0) + max(4.0, 3.0 * tail[1] if tail[0] > 0 else 0.0) * s0 + 1.0


def _columns_out(out, x0, y0, tail=None) -> pd.DataFrame:
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
        "intensity": 2.0 * np.pi * amp * sigma ** 2 * profile_area(tail),
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
        "patch_mean": np.where(ok, out[:, 15], np.nan),
        "pearson_chi2": np.where(ok, out[:, 16], np.nan),
    })
