"""Pixel Fisher information of crowded columns (numba kernel behind ``synthetic.crlb_columns_px``).

For Poisson pixels with expected counts ``mu_p``, the Fisher information of parameters theta is
``I_ab = sum_p (d mu_p / d theta_a)(d mu_p / d theta_b) / mu_p``. Every column has three parameters (x, y and its
counts N); its derivatives are non-zero on a square patch (half-width ``h`` px). The kernel sums, for every pair
of columns whose patches overlap (and every column with itself), the 3 x 3 block over the overlap, and for every
column the sums of its derivatives over ``1 / mu`` (its coupling to a local background). ``synthetic.py``
assembles from these the Fisher matrix of each column's touching group and inverts it.

The column image is a mixture of isotropic Gaussians, each integrated over the pixel:
``mu_i(u, v) = N_i sum_k w_k gx_k(u) gy_k(v)`` with ``gx_k(u) = Phi((u + 1/2 - x) / s_k) - Phi((u - 1/2 - x) / s_k)``,
so ``d gx_k / dx = phi_k(u - 1/2 - x) - phi_k(u + 1/2 - x)`` (phi_k the normal density of sigma s_k).
"""

from __future__ import annotations

import numpy as np
from numba import njit


@njit(cache=True)
def pair_blocks(pi, pj, u0, v0, length, inv_mu, w, gx, dgx, gy, dgy, n_counts, sign):
    """3 x 3 Fisher blocks sum_p d_i d_j^T / mu over the overlap of the patches of columns pi[m] and pj[m].

    d = (d mu / dx, d mu / dy, d mu / dN) of one column; the row factors of the separable components are hoisted
    out of the pixel loop.
    """
    h, wd = inv_mu.shape
    nk = w.shape[0]
    out = np.zeros((pi.shape[0], 3, 3))
    gyi = np.empty(nk)
    dgyi = np.empty(nk)
    gyj = np.empty(nk)
    dgyj = np.empty(nk)
    for m in range(pi.shape[0]):
        i = pi[m]
        j = pj[m]
        ua = max(u0[i], u0[j], 0)
        ub = min(u0[i] + length, u0[j] + length, wd)
        va = max(v0[i], v0[j], 0)
        vb = min(v0[i] + length, v0[j] + length, h)
        si = sign * n_counts[i]
        sj = sign * n_counts[j]
        f00 = f01 = f02 = f10 = f11 = f12 = f20 = f21 = f22 = 0.0
        for v in range(va, vb):
            bi = v - v0[i]
            bj = v - v0[j]
            for k in range(nk):
                gyi[k] = w[k] * gy[k, i, bi]
                dgyi[k] = w[k] * dgy[k, i, bi]
                gyj[k] = w[k] * gy[k, j, bj]
                dgyj[k] = w[k] * dgy[k, j, bj]
            for u in range(ua, ub):
                ai = u - u0[i]
                aj = u - u0[j]
                xi = yi = ni = xj = yj = nj = 0.0
                for k in range(nk):
                    g = gx[k, i, ai]
                    xi += dgx[k, i, ai] * gyi[k]
                    yi += g * dgyi[k]
                    ni += g * gyi[k]
                    g = gx[k, j, aj]
                    xj += dgx[k, j, aj] * gyj[k]
                    yj += g * dgyj[k]
                    nj += g * gyj[k]
                q = inv_mu[v, u]
                xi *= si * q
                yi *= si * q
                ni *= sign * q
                xj *= sj
                yj *= sj
                nj *= sign
                f00 += xi * xj
                f01 += xi * yj
                f02 += xi * nj
                f10 += yi * xj
                f11 += yi * yj
                f12 += yi * nj
                f20 += ni * xj
                f21 += ni * yj
                f22 += ni * nj
        out[m, 0, 0] = f00
        out[m, 0, 1] = f01
        out[m, 0, 2] = f02
        out[m, 1, 0] = f10
        out[m, 1, 1] = f11
        out[m, 1, 2] = f12
        out[m, 2, 0] = f20
        out[m, 2, 1] = f21
        out[m, 2, 2] = f22
    return out


@njit(cache=True)
def background_coupling(u0, v0, length, inv_mu, w, gx, dgx, gy, dgy, n_counts, sign):
    """sum_p d_i / mu over each column's patch: its Fisher coupling to a constant background (d mu / d b = 1)."""
    h, wd = inv_mu.shape
    n = u0.shape[0]
    out = np.zeros((n, 3))
    for i in range(n):
        sx = sy = sn = 0.0
        for v in range(max(v0[i], 0), min(v0[i] + length, h)):
            b = v - v0[i]
            for u in range(max(u0[i], 0), min(u0[i] + length, wd)):
                a = u - u0[i]
                q = inv_mu[v, u]
                for k in range(w.shape[0]):
                    sx += w[k] * dgx[k, i, a] * gy[k, i, b] * q
                    sy += w[k] * gx[k, i, a] * dgy[k, i, b] * q
                    sn += w[k] * gx[k, i, a] * gy[k, i, b] * q
        out[i, 0] = sign * n_counts[i] * sx
        out[i, 1] = sign * n_counts[i] * sy
        out[i, 2] = sign * sn
    return out


@njit(cache=True)
def _find(keys, key):
    """Index of ``key`` in the sorted array ``keys``, or -1."""
    lo, hi = 0, keys.shape[0]
    while lo < hi:
        mid = (lo + hi) // 2
        if keys[mid] < key:
            lo = mid + 1
        else:
            hi = mid
    if lo < keys.shape[0] and keys[lo] == key:
        return lo
    return -1


@njit(cache=True)
def group_bounds(grp, n_group, keys, blocks, bcoup, ibb, stride):
    """Invert each column's group Fisher matrix; return var_x, var_y and the own-block-only x/y variance.

    ``grp[i, :n_group[i]]`` are the group's columns (the column itself first); block (a, b) of the pair with
    ``min * stride + max`` is ``blocks[index]`` (transposed when a > b); the last parameter is the background.
    """
    n = grp.shape[0]
    out = np.empty((n, 3))
    for i in range(n):
        k = n_group[i]
        p = 3 * k + 1
        F = np.zeros((p, p))
        for a in range(k):
            ga = grp[i, a]
            for b in range(k):
                gb = grp[i, b]
                lo = min(ga, gb)
                hi = max(ga, gb)
                m = _find(keys, lo * stride + hi)
                if m < 0:
                    continue
                for r in range(3):
                    for c in range(3):
                        F[3 * a + r, 3 * b + c] = blocks[m, r, c] if ga <= gb else blocks[m, c, r]
            for r in range(3):
                F[3 * a + r, p - 1] = bcoup[ga, r]
                F[p - 1, 3 * a + r] = bcoup[ga, r]
        F[p - 1, p - 1] = ibb[i]
        rhs = np.zeros((p, 2))
        rhs[0, 0] = 1.0
        rhs[1, 1] = 1.0
        sol = np.linalg.solve(F, rhs)
        out[i, 0] = sol[0, 0]
        out[i, 1] = sol[1, 1]
        det = F[0, 0] * F[1, 1] - F[0, 1] * F[1, 0]
        out[i, 2] = 0.5 * (F[0, 0] + F[1, 1]) / det
    return out
