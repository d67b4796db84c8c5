"""``scipy.ndimage``'s 1-D correlation, Gaussian and uniform filters, Laplacian and linear interpolation for 2-D float
images, value for value, in numba; and the detection's other elementwise steps.

scipy filters a 2-D image line by line through a double-precision line buffer; along the first axis every line
is a strided gather, which makes the Gaussian of the column finder's significance map its most expensive filter.
These kernels do the same arithmetic in the same order (double accumulation; for a symmetric kernel the centre
tap first, then the sums of the mirrored pairs from the outermost in; the same border extension; the same
rounding to the output dtype after each axis), but sweep whole rows at a time, which the compiler vectorises:
the results are bit-identical to scipy's (``tests/test_filters.py`` checks that) at 2-5 times the speed. The
kernels are serial and release the GIL, so windows detected in threads run them side by side.

``add_patches`` draws the fitted columns' model image (the sums ``np.bincount`` forms, term for term);
``block_sums`` and ``linear_fit_level`` are the two elementwise steps of the significance map's background
(``columns._local_background``), the same operations in the same order in one pass each; ``close_pairs`` is
the KD-tree's ``query_pairs`` for pixels sorted row-major (the candidates trackpy's rule leaves too close).

Only what the finder needs: float32 / float64 2-D arrays, odd-length symmetric or antisymmetric weights no longer
than the lines, modes 'reflect' (scipy's default) and 'constant' with cval 0; anything else goes to scipy itself.
"""

from __future__ import annotations

import numpy as np
from numba import njit
from scipy import ndimage

__all__ = ["correlate1d", "gaussian_filter", "uniform_filter", "laplace", "bilinear", "add_patches", "block_sums",
           "linear_fit_level", "close_pairs"]

_SYMMETRIC, _ANTISYMMETRIC, _GENERAL = 1, -1, 0
_MODES = {"reflect": True, "constant": False}


@njit(cache=True, nogil=True)
def _along_rows(a, w, symmetric, reflect, out):
    """Correlation along axis 0 (between rows), ``out[i] = sum_j w[j] a[i + j - r]``: scipy's per-pixel order
    (the centre tap, then the mirrored pairs from the outermost in), one row of accumulators at a time."""
    n, m = a.shape
    r = w.size // 2
    acc = np.empty(m)
    zero = np.zeros(m, dtype=a.dtype)
    for i in range(n):
        row = a[i]
        for k in range(m):
            acc[k] = np.float64(row[k]) * w[r]
        for j in range(r, 0, -1):
            lo, hi = i - j, i + j
            if reflect:  # (a single reflection: the caller hands longer kernels to scipy)
                x = a[-lo - 1] if lo < 0 else a[lo]
                y = a[2 * n - hi - 1] if hi >= n else a[hi]
            else:
                x = a[lo] if lo >= 0 else zero
                y = a[hi] if hi < n else zero
            wj = w[r - j]
            if symmetric:
                for k in range(m):
                    acc[k] += (np.float64(x[k]) + np.float64(y[k])) * wj
            else:
                for k in range(m):
                    acc[k] += (np.float64(x[k]) - np.float64(y[k])) * wj
        row = out[i]
        for k in range(m):
            row[k] = acc[k]


@njit(cache=True, nogil=True)
def _along_cols(a, w, symmetric, reflect, out):
    """Correlation along axis 1 (within rows), through an extended double line buffer as scipy does."""
    n, m = a.shape
    r = w.size // 2
    line = np.zeros(m + 2 * r)
    acc = np.empty(m)
    for i in range(n):
        row = a[i]
        for k in range(m):
            line[r + k] = row[k]
        if reflect:
            for k in range(r):
                line[r - 1 - k] = row[k]
                line[r + m + k] = row[m - 1 - k]
        for k in range(m):
            acc[k] = line[r + k] * w[r]
        for j in range(r, 0, -1):
            wj = w[r - j]
            x = line[r - j:r - j + m]
            y = line[r + j:r + j + m]
            if symmetric:
                for k in range(m):
                    acc[k] += (x[k] + y[k]) * wj
            else:
                for k in range(m):
                    acc[k] += (x[k] - y[k]) * wj
        row = out[i]
        for k in range(m):
            row[k] = acc[k]


def _kind(w: np.ndarray) -> int:
    """scipy's test: symmetric or antisymmetric about the centre within DBL_EPSILON, else general."""
    r = w.size // 2
    eps = np.finfo(np.float64).eps
    left, right = w[r - 1::-1] if r else w[:0], w[r + 1:]
    if np.all(np.abs(right - left) <= eps):
        return _SYMMETRIC
    if np.all(np.abs(right + left) <= eps):
        return _ANTISYMMETRIC
    return _GENERAL


def correlate1d(a, weights, axis: int, *, mode: str = "reflect") -> np.ndarray:
    """``scipy.ndimage.correlate1d(a, weights, axis=axis, mode=mode, cval=0.0)`` for a 2-D float32 / float64
    array (the output in its dtype) and odd-length weights; ``mode`` 'reflect' or 'constant'."""
    a = np.ascontiguousarray(a)
    w = np.ascontiguousarray(weights, dtype=np.float64)
    if a.ndim != 2 or a.dtype not in (np.float32, np.float64) or w.ndim != 1 or w.size % 2 == 0 \
            or mode not in _MODES or axis not in (0, 1, -1, -2):
        raise ValueError(f"correlate1d takes a 2-D float32/float64 array, odd-length weights, mode 'reflect' or "
                         f"'constant'; got {a.dtype} {a.shape}, {w.size} weights, mode {mode!r}, axis {axis}")
    kind = _kind(w)
    if kind == _GENERAL or w.size // 2 >= a.shape[axis % 2] or a.size == 0:
        # a general kernel, or one longer than the line (several reflections): scipy itself
        return ndimage.correlate1d(a, w, axis=axis, mode=mode, cval=0.0)
    out = np.empty_like(a)
    (_along_rows if axis % 2 == 0 else _along_cols)(a, w, kind == _SYMMETRIC, _MODES[mode], out)
    return out


def gaussian_filter(a, sigma: float, *, truncate: float = 4.0, mode: str = "reflect") -> np.ndarray:
    """``scipy.ndimage.gaussian_filter(a, sigma, mode=mode, cval=0.0, truncate=truncate)`` for a 2-D float32 /
    float64 array: scipy's kernel (radius ``int(truncate sigma + 0.5)``, unit sum), axis 0 then axis 1."""
    sd = float(sigma)
    radius = int(truncate * sd + 0.5)
    x = np.arange(-radius, radius + 1)
    phi = np.exp(-0.5 / (sd * sd) * x**2)
    phi = phi / phi.sum()
    return correlate1d(correlate1d(a, phi, 0, mode=mode), phi, 1, mode=mode)


@njit(cache=True, nogil=True)
def _bilinear(a, rows, cols, out):
    """scipy's order-1 spline at each point: the 2 x 2 pixels about it (indices clamped to the image, the
    'nearest' extension), each value times its two weights, summed in row-major order."""
    n, m = a.shape
    for p in range(rows.size):
        y, x = rows[p], cols[p]
        if not (np.isfinite(y) and np.isfinite(x)):
            out[p] = np.nan
            continue
        fy, fx = np.floor(y), np.floor(x)
        ty, tx = y - fy, x - fx
        iy, ix = int(fy), int(fx)
        y0, y1 = min(max(iy, 0), n - 1), min(max(iy + 1, 0), n - 1)
        x0, x1 = min(max(ix, 0), m - 1), min(max(ix + 1, 0), m - 1)
        wy, wx = 1.0 - ty, 1.0 - tx
        t = np.float64(a[y0, x0]) * wy * wx
        t += np.float64(a[y0, x1]) * wy * tx
        t += np.float64(a[y1, x0]) * ty * wx
        t += np.float64(a[y1, x1]) * ty * tx
        out[p] = t


def bilinear(a, rows, cols) -> np.ndarray:
    """``scipy.ndimage.map_coordinates(a, [rows, cols], order=1, mode='nearest')`` for a 2-D float32 / float64
    array (output in its dtype, the shape of ``rows``), bit for bit, in one pass without scipy's general
    spline set-up: ~4x faster on the hundreds of thousands of points the tail profile samples."""
    a = np.asarray(a)
    rows = np.asarray(rows, dtype=np.float64)
    cols = np.asarray(cols, dtype=np.float64)
    if a.ndim != 2 or a.dtype not in (np.float32, np.float64) or a.size == 0 or rows.shape != cols.shape:
        return ndimage.map_coordinates(a, [rows, cols], order=1, mode="nearest")
    out = np.empty(rows.shape, a.dtype)
    _bilinear(np.ascontiguousarray(a), np.ascontiguousarray(rows).ravel(), np.ascontiguousarray(cols).ravel(),
              out.reshape(-1))
    return out


@njit(cache=True, nogil=True)
def _add_patches(canvas, top, left, gy, gx):
    """``canvas[top[c] + i, left[c] + j] += gy[c, i] * gx[c, j]`` for every patch c in order: the sums
    ``np.bincount`` forms from the same terms in the same order."""
    for c in range(top.size):
        for i in range(gy.shape[1]):
            row = canvas[top[c] + i]
            for j in range(gx.shape[1]):
                row[left[c] + j] += gy[c, i] * gx[c, j]


def add_patches(canvas, top, left, gy, gx) -> None:
    """Add the separable patches ``gy[c] (x) gx[c]`` (rows x columns) into the float64 ``canvas`` at
    (``top[c]``, ``left[c]``), each inside it; as a ``np.bincount`` over every term would, without its index
    arrays."""
    _add_patches(canvas, np.ascontiguousarray(top, dtype=np.int64), np.ascontiguousarray(left, dtype=np.int64),
                 np.ascontiguousarray(gy, dtype=np.float64), np.ascontiguousarray(gx, dtype=np.float64))


@njit(cache=True, nogil=True)
def _block_sums(work, keep, f, pr, pc, nb_r, nb_c, counts, sums):
    """Per block of f x f px of the padded grid (the window starts ``pr`` rows and ``pc`` columns into its
    first block): the kept pixels' number and the sum of their float32 values, in float64 (each padded column
    summed down the block, then the block's columns from the left)."""
    h, w = work.shape
    acc_c = np.zeros(nb_c * f)
    acc_s = np.zeros(nb_c * f)
    for bi in range(nb_r):
        acc_c[:] = 0.0
        acc_s[:] = 0.0
        for i in range(f):
            r = bi * f + i - pr
            if r < 0 or r >= h:
                continue  # padding adds zeros, which change no sum
            for c in range(w):
                if keep[r, c]:
                    acc_c[c + pc] += 1.0
                    acc_s[c + pc] += np.float64(np.float32(work[r, c]))
        for bj in range(nb_c):
            tc = 0.0
            ts = 0.0
            for j in range(f):
                tc += acc_c[bj * f + j]
                ts += acc_s[bj * f + j]
            counts[bi, bj] = tc
            sums[bi, bj] = ts


def block_sums(work, keep, f: int, pr: int, pc: int) -> tuple[np.ndarray, np.ndarray]:
    """(kept pixels, sum of their float32 values) per ``f`` x ``f`` block of a grid whose first block starts
    ``pr`` rows and ``pc`` columns before ``work``; float64, in one pass without padded copies of the window."""
    h, w = work.shape
    nb_r, nb_c = -(-(h + pr) // f), -(-(w + pc) // f)
    counts = np.empty((nb_r, nb_c))
    sums = np.empty((nb_r, nb_c))
    _block_sums(np.ascontiguousarray(work), np.ascontiguousarray(keep, dtype=np.bool_), int(f), int(pr), int(pc),
                nb_r, nb_c, counts, sums)
    return counts, sums


@njit(cache=True, nogil=True, error_model="numpy")
def _linear_fit_level(s0, sx, sy, sxx, syy, sxy, b0, bx, by, ridge_scale, tiny_below, out):
    """The level of the ridge-regularised locally linear fit per block (Cramer's rule), NaN where nothing is in
    reach: the expressions of columns._local_background (moments about each block, then the solve), evaluated
    in the same order."""
    n, m = s0.shape
    for i in range(n):
        yy = np.float64(i)
        for j in range(m):
            xx = np.float64(j)
            s = s0[i, j]
            # moments about the block centre (xx, yy)
            mxx = sxx[i, j] - 2.0 * xx * sx[i, j] + xx * xx * s
            myy = syy[i, j] - 2.0 * yy * sy[i, j] + yy * yy * s
            xy = sxy[i, j] - xx * sy[i, j] - yy * sx[i, j] + xx * yy * s
            x, y = sx[i, j] - xx * s, sy[i, j] - yy * s
            cx, cy = bx[i, j] - xx * b0[i, j], by[i, j] - yy * b0[i, j]
            ridge = ridge_scale[0] * s * ridge_scale[1] * ridge_scale[1]
            a11 = mxx + ridge
            a22 = myy + ridge
            det = s * (a11 * a22 - xy * xy) - x * (x * a22 - xy * y) + y * (x * xy - a11 * y)
            num = b0[i, j] * (a11 * a22 - xy * xy) - x * (cx * a22 - xy * cy) + y * (cx * xy - a11 * cy)
            bound = s * a11 * a22
            if not bound >= 1e-300:  # np.maximum(bound, 1e-300), NaN kept
                bound = bound if np.isnan(bound) else 1e-300
            level = num / det if abs(det) > 1e-12 * bound else b0[i, j] / s
            out[i, j] = np.nan if (s < tiny_below or not np.isfinite(level)) else level


def linear_fit_level(s0, sx, sy, sxx, syy, sxy, b0, bx, by, *, ridge: float, scale: float,
                     tiny_below: float) -> np.ndarray:
    """Per block (i, j), the level ``a`` of the weighted least-squares plane about the block, from the weighted
    moments about the grid origin (``s0 = sum w``, ``sx = sum w x``, ..., ``b0 = sum w v``, ``bx = sum w v x``, x
    the column and y the row index of the block): ``[[s0, mx, my], [mx, mxx + q, mxy], [my, mxy, myy + q]]
    [a, bx', by'] = [b0, cx, cy]`` with the moments taken about (j, i) and the ridge ``q = ridge s0 scale^2``;
    NaN where ``s0 < tiny_below`` or the level is not finite."""
    out = np.empty_like(s0)
    arrays = [np.ascontiguousarray(a, dtype=np.float64) for a in (s0, sx, sy, sxx, syy, sxy, b0, bx, by)]
    _linear_fit_level(*arrays, np.array([ridge, scale]), float(tiny_below), out)
    return out


@njit(cache=True, nogil=True)
def _close_pairs(rows, cols, row_start, r, radius2, out):
    """Pairs (i < j) of pixels sorted row-major at most sqrt(radius2) apart: per pixel, the pixels of its own
    row to its right and of the next ``r`` rows within ``r`` columns (found by bisection in each row)."""
    n = rows.size
    k = 0
    for i in range(n):
        y, x = rows[i], cols[i]
        for dy in range(r + 1):
            yy = y + dy
            if yy >= row_start.size - 1:
                break
            lo, hi = row_start[yy], row_start[yy + 1]
            if dy == 0:
                lo = i + 1
            else:
                while lo < hi:  # the first pixel of row yy with col >= x - r
                    mid = (lo + hi) // 2
                    if cols[mid] < x - r:
                        lo = mid + 1
                    else:
                        hi = mid
                hi = row_start[yy + 1]
            for j in range(lo, hi):
                dx = cols[j] - x
                if dx > r:
                    break
                if dy * dy + dx * dx <= radius2:
                    if k < out.shape[0]:
                        out[k, 0] = i
                        out[k, 1] = j
                    k += 1
    return k


def close_pairs(pos, shape, radius: float) -> np.ndarray:
    """Pairs (i < j) of the distinct pixels ``pos`` (n, 2), sorted row-major as ``np.argwhere`` gives them, at
    most ``radius`` apart: the pairs ``cKDTree(pos).query_pairs(radius)`` finds, in a numba sweep."""
    pos = np.asarray(pos, dtype=np.int64)
    if pos.shape[0] < 2:
        return np.zeros((0, 2), np.int64)
    rows, cols = np.ascontiguousarray(pos[:, 0]), np.ascontiguousarray(pos[:, 1])
    row_start = np.searchsorted(rows, np.arange(int(shape[0]) + 1)).astype(np.int64)
    r = int(np.floor(radius))
    out = np.empty((4 * pos.shape[0], 2), np.int64)
    k = _close_pairs(rows, cols, row_start, r, float(radius) * float(radius), out)
    if k > out.shape[0]:  # (more pairs than room: count once more into an array of the right size)
        out = np.empty((k, 2), np.int64)
        _close_pairs(rows, cols, row_start, r, float(radius) * float(radius), out)
    return out[:k]


@njit(cache=True, nogil=True, inline="always")
def _mirror(p, n):
    """scipy's 'reflect' extension of a line of n (edge pixel repeated), for |overhang| < n."""
    if p < 0:
        return -p - 1
    if p >= n:
        return 2 * n - p - 1
    return p


@njit(cache=True, nogil=True)
def _uniform_rows(a, size, out):
    """scipy's running mean along axis 0 (mode 'reflect'): the first window summed, then per step
    ``sum += entering - leaving``, each output ``sum / size``, in double, a row of running sums at a time."""
    n, m = a.shape
    r = size // 2
    tmp = np.zeros(m)
    for p in range(-r, size - r):
        row = a[_mirror(p, n)]
        for k in range(m):
            tmp[k] += row[k]
    for k in range(m):
        out[0, k] = tmp[k] / size
    for ll in range(1, n):
        enter = a[_mirror(ll - 1 + size - r, n)]
        leave = a[_mirror(ll - 1 - r, n)]
        row = out[ll]
        for k in range(m):
            tmp[k] += np.float64(enter[k]) - np.float64(leave[k])
            row[k] = tmp[k] / size


@njit(cache=True, nogil=True)
def _uniform_cols(a, size, out):
    """The same running mean along axis 1, through an extended double line buffer."""
    n, m = a.shape
    r = size // 2
    line = np.empty(m + size - 1)
    for i in range(n):
        for p in range(m + size - 1):
            line[p] = a[i, _mirror(p - r, m)]
        tmp = 0.0
        for p in range(size):
            tmp += line[p]
        out[i, 0] = tmp / size
        for ll in range(1, m):
            tmp += line[ll - 1 + size] - line[ll - 1]
            out[i, ll] = tmp / size


def uniform_filter(a, size: int) -> np.ndarray:
    """``scipy.ndimage.uniform_filter(a, size)`` (mode 'reflect') for a 2-D float32 / float64 array and an odd
    size shorter than its sides (else scipy itself): the same running sums in the same order, per axis."""
    a = np.ascontiguousarray(a)
    if a.ndim != 2 or a.dtype not in (np.float32, np.float64) or size % 2 == 0 or size // 2 >= min(a.shape):
        return ndimage.uniform_filter(a, size=size)
    if size == 1:  # (scipy copies; a running sum would round)
        return a.copy()
    t = np.empty_like(a)
    _uniform_rows(a, int(size), t)
    out = np.empty_like(a)
    _uniform_cols(t, int(size), out)
    return out


def laplace(a) -> np.ndarray:
    """``scipy.ndimage.laplace(a)`` (mode 'reflect') for a 2-D float32 / float64 array: the second differences
    along axis 0, then along axis 1 added to them in the array's dtype, as scipy's ``generic_laplace`` does."""
    second = np.array([1.0, -2.0, 1.0])
    out = correlate1d(a, second, 0)
    out += correlate1d(a, second, 1)
    return out
