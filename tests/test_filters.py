"""The detection's own filters against the reference libraries they replace (scipy.ndimage, trackpy)."""

import warnings

import numpy as np
import pytest
from scipy import ndimage

from tenfold.analysis._filters import window_max, window_min
from tenfold.analysis.columns import _grey_maxima


@pytest.mark.parametrize("dtype", [np.float32, np.float64, np.uint16, np.uint8], ids=str)
@pytest.mark.parametrize("size", [1, 2, 3, 4, 5, 8, 9, 21, 40])
@pytest.mark.parametrize("mode", ["reflect", "nearest"])
def test_window_extrema_equal_scipy(dtype, size, mode):
    rng = np.random.default_rng(size)
    a = (rng.random((37, 29)) * 200).astype(dtype)
    for before in {size // 2, size // 2 - (1 - size % 2)}:
        origin = before - size // 2
        assert np.array_equal(window_max(a, size, before=before),
                              ndimage.maximum_filter(a, size=size, mode=mode, origin=origin))
        assert np.array_equal(window_min(a, size, before=before),
                              ndimage.minimum_filter(a, size=size, mode=mode, origin=origin))


def test_window_max_of_bool_is_the_square_dilation():
    rng = np.random.default_rng(0)
    b = rng.random((50, 61)) < 0.01
    assert np.array_equal(window_max(b, 7), ndimage.binary_dilation(b, structure=np.ones((7, 7), bool)))
    assert np.array_equal(window_min(~b, 7), ~ndimage.binary_dilation(b, structure=np.ones((7, 7), bool)))


def test_window_filter_leaves_input_alone_and_handles_tiny_arrays():
    a = np.arange(6.0).reshape(2, 3)
    before = a.copy()
    assert np.array_equal(window_max(a, 9), np.full((2, 3), 5.0))  # window larger than the array
    assert np.array_equal(window_min(a, 9), np.zeros((2, 3)))
    assert np.array_equal(a, before)


@pytest.mark.parametrize("bad", [dict(size=0), dict(size=5, before=0), dict(size=4, before=3)],
                         ids=["size 0", "window not about the pixel", "even window off by two"])
def test_window_filter_rejects_bad_windows(bad):
    with pytest.raises(ValueError, match="window filter"):
        window_max(np.zeros((4, 4)), **bad)


@pytest.mark.parametrize("trial", range(40))
def test_grey_maxima_equal_trackpy(trial):
    import trackpy

    rng = np.random.default_rng(trial)
    h, w = rng.integers(3, 70, 2)
    q = rng.integers(0, [3, 60, 65535][trial % 3], (h, w)).astype(np.uint16)
    if trial % 4 == 0:
        q[rng.random((h, w)) < 0.3] = 0
    separation = float(rng.uniform(1.5, 9.0))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # trackpy warns on an image without maxima
        ref = trackpy.find.grey_dilation(q, separation, percentile=0, margin=0, precise=False)
    assert np.array_equal(_grey_maxima(q, separation), np.asarray(ref, dtype=np.int64).reshape(-1, 2))


def test_grey_maxima_of_a_black_image_is_empty():
    assert _grey_maxima(np.zeros((8, 8), np.uint16), 3.0).shape == (0, 2)


@pytest.mark.parametrize("shape,sigma", [((64, 80), 6.0), ((40, 33), 1.2), ((9, 12), 5.0), ((3, 4), 2.5)],
                         ids=["wide kernel", "narrow kernel", "kernel beyond the image", "tiny image"])
def test_gaussian_fft_equals_scipy(shape, sigma):
    from tenfold.analysis._filters import gaussian_fft

    rng = np.random.default_rng(2)
    a = rng.poisson(500.0, shape).astype(np.float64)
    ref = ndimage.gaussian_filter(a, sigma)
    assert np.max(np.abs(gaussian_fft(a, sigma) - ref)) <= 1e-12 * np.ptp(a)


def test_model_image_equals_a_column_by_column_sum():
    # the canvas-and-crop drawing against the obvious oracle: each column's sampled Gaussian added where it falls
    import pandas as pd

    from tenfold.analysis.columns import _model_image

    rng = np.random.default_rng(3)
    n = 60
    fit = pd.DataFrame({"x_px": rng.uniform(-12, 52, n), "y_px": rng.uniform(-12, 42, n),
                        "amplitude": rng.uniform(10, 100, n), "sigma_px": rng.uniform(0.8, 2.2, n)})
    good = rng.random(n) > 0.2
    h, w = 30, 40
    ref = np.zeros((h, w))
    r = int(np.ceil(4.0 * fit["sigma_px"][good].max()))
    yy, xx = np.mgrid[0:h, 0:w]
    for _, c in fit[good].iterrows():
        near = (np.abs(xx - np.rint(c.x_px)) <= r) & (np.abs(yy - np.rint(c.y_px)) <= r)
        ref += near * c.amplitude * np.exp(-0.5 * ((xx - c.x_px) ** 2 + (yy - c.y_px) ** 2) / c.sigma_px ** 2)
    got = _model_image((h, w), fit, good)
    assert got.dtype == np.float32
    assert np.allclose(got, ref, rtol=1e-6, atol=1e-4)
    assert np.count_nonzero(got) > 0.5 * got.size  # the test draws columns across the whole image


@pytest.mark.parametrize("radius", [1.0, 1.5, 3.96, 4.0, 6.3])
def test_close_pairs_equal_kdtree_pairs(radius):
    from scipy.spatial import cKDTree

    from tenfold.analysis._correlate import close_pairs

    rng = np.random.default_rng(int(radius * 10))
    flat = np.sort(rng.choice(50 * 70, 400, replace=False))  # row-major, as np.argwhere gives pixels
    pos = np.c_[flat // 70, flat % 70].astype(np.int64)
    got = {tuple(p) for p in close_pairs(pos, (50, 70), radius)}
    assert len(got) == len(close_pairs(pos, (50, 70), radius))  # each pair once
    ref = {tuple(p) for p in cKDTree(pos).query_pairs(radius, output_type="ndarray")}
    assert got == ref and len(ref) > 0
    assert all(i < j for i, j in got)


@pytest.mark.parametrize("dtype", [np.float32, np.float64], ids=str)
@pytest.mark.parametrize("shape", [(1, 1), (3, 2), (7, 5), (40, 33)], ids=str)
def test_numba_correlation_is_bit_identical_to_scipy(dtype, shape):
    from tenfold.analysis._correlate import correlate1d, gaussian_filter, laplace, uniform_filter

    rng = np.random.default_rng(shape[0])
    a = (rng.normal(size=shape) * 100 + 300).astype(dtype)
    before = a.copy()
    for n in (1, 3, 7, 25):
        u = np.arange(n) - n // 2
        g = np.exp(-0.5 * u**2 / (n / 5 + 0.3) ** 2)
        g /= g.sum()
        # symmetric, antisymmetric (the background's moment kernels) and a general one (handed to scipy)
        for w in (g, u * g, u * u * g, rng.normal(size=n)):
            for axis in (0, 1):
                for mode in ("reflect", "constant"):
                    ref = ndimage.correlate1d(a, w, axis=axis, mode=mode, cval=0.0)
                    got = correlate1d(a, w, axis, mode=mode)
                    assert got.dtype == ref.dtype and np.array_equal(got, ref), (n, axis, mode)
    for sigma in (0.7, 1.68, 3.0, 12.0):
        assert np.array_equal(gaussian_filter(a, sigma), ndimage.gaussian_filter(a, sigma))
        assert np.array_equal(gaussian_filter(a, sigma, truncate=3.0, mode="constant"),
                              ndimage.gaussian_filter(a, sigma, truncate=3.0, mode="constant", cval=0.0))
    for size in (1, 3, 5, 9, 23):
        ref = ndimage.uniform_filter(a, size=size)
        assert np.array_equal(uniform_filter(a, size), ref) and uniform_filter(a, size).dtype == ref.dtype
    if min(shape) > 1:
        assert np.array_equal(laplace(a), ndimage.laplace(a))
    assert np.array_equal(a, before)


def test_numba_correlation_rejects_what_it_does_not_do():
    from tenfold.analysis._correlate import correlate1d

    with pytest.raises(ValueError, match="correlate1d takes"):
        correlate1d(np.zeros((4, 4), np.int32), np.ones(3), 0)
    with pytest.raises(ValueError, match="correlate1d takes"):
        correlate1d(np.zeros((4, 4)), np.ones(4), 0)
    with pytest.raises(ValueError, match="correlate1d takes"):
        correlate1d(np.zeros((4, 4)), np.ones(3), 0, mode="wrap")


@pytest.mark.parametrize("dtype", [np.float32, np.float64], ids=str)
@pytest.mark.parametrize("shape", [(1, 1), (1, 7), (3, 2), (60, 45)], ids=str)
def test_numba_bilinear_is_bit_identical_to_map_coordinates(dtype, shape):
    from tenfold.analysis._correlate import bilinear

    rng = np.random.default_rng(5)
    a = (rng.normal(size=shape) * 100 + 300).astype(dtype)
    rows = rng.uniform(-3, shape[0] + 2, (40, 50))
    cols = rng.uniform(-3, shape[1] + 2, (40, 50))
    rows[0, :10] = np.rint(rows[0, :10])  # whole pixels, on and beyond the border
    cols[1, :10] = np.rint(cols[1, :10])
    rows[2, 0], cols[2, 1] = np.nan, np.inf
    ref = ndimage.map_coordinates(a, [rows, cols], order=1, mode="nearest")
    got = bilinear(a, rows, cols)
    assert got.dtype == ref.dtype and got.shape == ref.shape
    assert np.array_equal(got, ref, equal_nan=True)


@pytest.mark.parametrize("f,pr,pc", [(1, 0, 0), (3, 0, 0), (4, 1, 3), (5, 4, 2)])
def test_block_sums_equal_padded_block_means(f, pr, pc):
    from tenfold.analysis._correlate import block_sums

    rng = np.random.default_rng(f)
    work = rng.normal(300.0, 50.0, (23, 31))
    keep = rng.random(work.shape) > 0.3
    counts, sums = block_sums(work, keep, f, pr, pc)
    nb_r, nb_c = -(-(23 + pr) // f), -(-(31 + pc) // f)
    grid_k = np.zeros((nb_r * f, nb_c * f))
    grid_v = np.zeros((nb_r * f, nb_c * f))
    grid_k[pr:pr + 23, pc:pc + 31] = keep
    grid_v[pr:pr + 23, pc:pc + 31] = np.where(keep, work.astype(np.float32), 0.0)
    assert np.array_equal(counts, grid_k.reshape(nb_r, f, nb_c, f).sum(axis=(1, 3)))
    assert np.allclose(sums, grid_v.reshape(nb_r, f, nb_c, f).sum(axis=(1, 3)), rtol=1e-12, atol=1e-9)


def test_linear_fit_level_solves_each_block_system():
    # the vectorised moments and Cramer's rule against numpy's solver, block by block
    from tenfold.analysis._correlate import linear_fit_level

    rng = np.random.default_rng(7)
    shape = (6, 5)
    # central moments per block, turned into the raw moments about the grid origin the kernel takes
    s0 = rng.uniform(0.5, 1.0, shape)
    mx, my, mxy = (rng.uniform(-0.2, 0.2, shape) for _ in range(3))
    mxx, myy = rng.uniform(1.0, 2.0, shape), rng.uniform(1.0, 2.0, shape)
    b0, cx, cy = rng.uniform(100, 200, shape), rng.uniform(-5, 5, shape), rng.uniform(-5, 5, shape)
    s0[0, 0] = 0.0  # nothing in reach: NaN
    yy, xx = np.mgrid[0:shape[0], 0:shape[1]].astype(float)
    sx, sy = mx + xx * s0, my + yy * s0
    sxx = mxx + 2 * xx * sx - xx * xx * s0
    syy = myy + 2 * yy * sy - yy * yy * s0
    sxy = mxy + xx * sy + yy * sx - xx * yy * s0
    bx, by = cx + xx * b0, cy + yy * b0
    ridge, scale = 0.3, 2.5
    got = linear_fit_level(s0, sx, sy, sxx, syy, sxy, b0, bx, by, ridge=ridge, scale=scale, tiny_below=1e-6)
    assert np.isnan(got[0, 0])
    for i, j in np.ndindex(shape):
        if (i, j) == (0, 0):
            continue
        q = ridge * s0[i, j] * scale**2
        a = np.array([[s0[i, j], mx[i, j], my[i, j]], [mx[i, j], mxx[i, j] + q, mxy[i, j]],
                      [my[i, j], mxy[i, j], myy[i, j] + q]])
        assert got[i, j] == pytest.approx(np.linalg.solve(a, [b0[i, j], cx[i, j], cy[i, j]])[0], rel=1e-9)