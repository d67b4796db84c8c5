"""Batched Gaussian refinement: Cramer-Rao efficiency, no pixel locking, scipy oracle, edge cases."""

import warnings

import numpy as np
import pytest
from scipy import stats
from scipy.optimize import least_squares
from scipy.special import erf

from tenfold.analysis.refine import refine_columns
from tenfold.analysis.synthetic import crlb_position_px, render_image


def _isolated(n, counts, sigma, background, rng, spacing=20):
    g = int(np.ceil(np.sqrt(n)))
    gx, gy = np.meshgrid(np.arange(g), np.arange(g))
    x = (gx.ravel()[:n] + 1) * spacing + rng.uniform(-0.5, 0.5, n)
    y = (gy.ravel()[:n] + 1) * spacing + rng.uniform(-0.5, 0.5, n)
    shape = ((g + 1) * spacing, (g + 1) * spacing)
    img = render_image(x, y, counts, shape=shape, sigma_px=sigma, background=background, rng=rng)
    return img, x, y


def test_position_error_reaches_crlb_and_is_unbiased():
    rng = np.random.default_rng(11)
    n, counts, sigma, bg = 2000, 1000.0, 1.5, 10.0
    img, x, y = _isolated(n, counts, sigma, bg, rng)
    start = np.c_[x, y] + rng.normal(0, 0.3, (n, 2))
    df = refine_columns(img, start, sigma_px=1.8, neighbour_passes=0)
    assert (df["fit_status"] == "ok").all()
    # Mortensen et al., Nat. Methods 7 (2010) 377, eq. (5): the bound of Poisson maximum likelihood (our estimator)
    bound = crlb_position_px(counts, sigma, bg, estimator="mle")
    dx, dy = df["x_px"] - x, df["y_px"] - y
    rms = np.sqrt(0.5 * (np.mean(dx**2) + np.mean(dy**2)))
    assert rms <= 1.3 * bound
    assert abs(dx.mean()) < 0.2 * bound and abs(dy.mean()) < 0.2 * bound
    # the reported uncertainty (inverse Fisher information) matches the bound
    assert df["pos_err_px"].median() == pytest.approx(bound, rel=0.1)
    # width of the pixel-integrated model is the true sigma; intensity = counts
    assert df["sigma_px"].median() == pytest.approx(sigma, rel=0.01)
    assert df["intensity"].median() == pytest.approx(counts, rel=0.02)
    assert df["background"].median() == pytest.approx(bg, rel=0.02)


def test_no_pixel_locking_where_trackpy_centroids_are_locked():
    import trackpy as tp

    rng = np.random.default_rng(12)
    n = 2000
    img, x, y = _isolated(n, 3000.0, 1.2, 5.0, rng, spacing=16)
    with warnings.catch_warnings():  # trackpy uses pandas' deprecated inplace keyword (pandas 3)
        warnings.simplefilter("ignore")
        f = tp.locate(img.astype(np.uint16), 5, separation=8, percentile=0, characterize=False, engine="numba",
                      max_iterations=1, minmass=50)
    assert len(f) == n
    df = refine_columns(img, f[["x", "y"]].to_numpy(), sigma_px=1.2)
    frac_fit = np.mod(df["x_px"].to_numpy() + 0.5, 1.0)
    frac_tp = np.mod(f["x"].to_numpy() + 0.5, 1.0)
    # true positions are uniform in the pixel, so refined fractional parts must be (Kolmogorov-Smirnov)
    assert stats.kstest(frac_fit, "uniform").pvalue > 0.01
    # trackpy's centre-of-mass is pulled to pixel centres: the same test rejects uniformity decisively
    assert stats.kstest(frac_tp, "uniform").pvalue < 1e-6
    counts_fit = np.histogram(frac_fit, bins=10, range=(0, 1))[0]
    assert stats.chisquare(counts_fit).pvalue > 0.01


def _erf_model(p, u, v):
    x, y, s, a, b = p
    gx = s * np.sqrt(np.pi / 2) * (erf((u + 0.5 - x) / (np.sqrt(2) * s)) - erf((u - 0.5 - x) / (np.sqrt(2) * s)))
    gy = s * np.sqrt(np.pi / 2) * (erf((v + 0.5 - y) / (np.sqrt(2) * s)) - erf((v - 0.5 - y) / (np.sqrt(2) * s)))
    return b + a * gx * gy


def test_matches_scipy_least_squares_per_column():
    rng = np.random.default_rng(13)
    img, x, y = _isolated(20, 1500.0, 1.6, 20.0, rng)
    start = np.c_[x, y] + rng.normal(0, 0.4, (20, 2))
    r = 6
    df = refine_columns(img, start, sigma_px=1.4, patch_radius_px=r, counts=False, neighbour_passes=0, n_iter=50)
    for k in range(20):  # the slow, obvious oracle: one scipy fit per column on the same patch
        cx, cy = int(np.floor(start[k, 0] + 0.5)), int(np.floor(start[k, 1] + 0.5))
        v, u = np.mgrid[cy - r:cy + r + 1, cx - r:cx + r + 1]
        d = img[cy - r:cy + r + 1, cx - r:cx + r + 1].astype(float)
        p0 = [start[k, 0], start[k, 1], 1.4, d.max() - d.min(), d.min()]
        sol = least_squares(lambda p: (_erf_model(p, u, v) - d).ravel(), p0, xtol=1e-12, ftol=1e-12)
        got = df.loc[k, ["x_px", "y_px", "sigma_px", "amplitude", "background"]].to_numpy(float)
        np.testing.assert_allclose(got[:3], sol.x[:3], atol=2e-4)
        np.testing.assert_allclose(got[3:], sol.x[3:], rtol=1e-3)


def test_edge_cases():
    rng = np.random.default_rng(14)
    img, x, y = _isolated(4, 2000.0, 1.5, 10.0, rng)
    before = img.copy()
    empty = refine_columns(img, np.zeros((0, 2)), sigma_px=1.5)
    assert len(empty) == 0 and "fit_status" in empty
    valid = np.ones(img.shape, bool)
    valid[int(round(y[1])), int(round(x[1])) + 1] = False
    pts = np.r_[np.c_[x, y], [[-5.0, 3.0], [np.nan, 3.0]]]
    df = refine_columns(img, pts, sigma_px=1.5, valid=valid)
    assert df["fit_status"].tolist() == ["ok", "masked", "ok", "ok", "edge", "edge"]
    assert df.loc[df["fit_status"] != "ok", ["x_px", "sigma_px", "intensity"]].isna().all().all()
    np.testing.assert_array_equal(img, before)


def test_constant_patch_is_not_a_column():
    flat = np.full((40, 40), 7.0, np.float32)
    df = refine_columns(flat, [[20.0, 20.0]], sigma_px=1.5)
    assert df["fit_status"].iloc[0] == "diverged"
    assert df[["x_px", "y_px", "sigma_px", "amplitude", "intensity"]].isna().all().all()


def _crowded_pair_image(rng):
    """Pairs of columns 4 widths apart (their fits are coupled) on a grid: a small crowded test image."""
    base = np.arange(20.0, 300.0, 24.0)
    gx, gy = np.meshgrid(base, base)
    x = np.r_[gx.ravel(), gx.ravel() + 6.0] + rng.uniform(-0.3, 0.3, 2 * gx.size)
    y = np.r_[gy.ravel(), gy.ravel() + 1.0] + rng.uniform(-0.3, 0.3, 2 * gx.size)
    counts = np.r_[np.full(gx.size, 3000.0), np.full(gx.size, 1200.0)]
    img = render_image(x, y, counts, shape=(320, 320), sigma_px=1.5, background=10.0, rng=rng)
    return img, np.c_[x, y] + rng.normal(0, 0.2, (x.size, 2))


def test_serial_and_parallel_kernels_give_identical_fits(monkeypatch):
    # a few columns are fitted in the calling thread (no wake-up of the workers): the answer must not depend on it
    import tenfold.analysis.refine as refine

    img, start = _crowded_pair_image(np.random.default_rng(5))
    assert start.shape[0] > 256  # the default splits: parallel first passes, serial last ones
    tables = []
    for below in (0, 10**9):  # every call parallel; every call serial
        monkeypatch.setattr(refine, "SERIAL_BELOW", below)
        tables.append(refine.refine_columns(img, start, sigma_px=1.5, neighbour_passes=10, converge_px=2e-4,
                                            joint_errors=True))
    for c in ("x_px", "y_px", "sigma_px", "amplitude", "x_err_px", "pearson_chi2"):
        np.testing.assert_array_equal(tables[0][c].to_numpy(), tables[1][c].to_numpy(), err_msg=c)
    assert (tables[0]["fit_status"] == tables[1]["fit_status"]).all()


def test_joint_errors_of_selected_rows_equal_the_full_computation():
    from tenfold.analysis.refine import joint_position_errors

    img, start = _crowded_pair_image(np.random.default_rng(6))
    fit = refine_columns(img, start, sigma_px=1.5, neighbour_passes=10, converge_px=2e-4)
    full = joint_position_errors(img.shape, fit, patch_radius_px=5)
    rows = np.zeros(len(fit), bool)
    rows[::3] = True
    part = joint_position_errors(img.shape, fit, patch_radius_px=5, rows=rows)
    np.testing.assert_array_equal(part[rows], full[rows])
    assert np.isnan(part[~rows]).all() and np.isfinite(full[~rows]).mean() > 0.9


def test_cholesky_inverse_diagonal_matches_numpy():
    from tenfold.analysis.refine import _inverse_xx_yy

    rng = np.random.default_rng(7)
    for n in (5, 13, 29):  # one column; up to a column with six neighbours (4 parameters each) and a background
        a = rng.normal(size=(n, n))
        f = a @ a.T + n * np.eye(n)
        ref = np.linalg.inv(f)  # reference library: numpy's LAPACK inverse
        got = _inverse_xx_yy(f.copy())
        assert got == pytest.approx((ref[0, 0], ref[1, 1]), rel=1e-10)
    indefinite = np.diag([1.0, -1.0, 2.0])
    assert np.isnan(_inverse_xx_yy(indefinite)).all()


def test_colour_classes_never_put_two_neighbours_together():
    # the classes of a Gauss-Seidel sweep are fitted in parallel: a column must never read a model being written
    from tenfold.analysis.refine import _colour_classes, _neighbour_lists

    xy = np.random.default_rng(8).uniform(0, 200, (1500, 2))
    ptr, idx = _neighbour_lists(xy, 14.0)
    colour = _colour_classes(ptr, idx)
    src = np.repeat(np.arange(xy.shape[0]), np.diff(ptr))
    assert idx.size > 10 * xy.shape[0]  # a dense graph, so the check means something
    assert not np.any(colour[src] == colour[idx])
    # greedy colouring needs at most (largest degree of the symmetrised graph) + 1 classes
    deg = np.bincount(np.r_[src, idx], minlength=xy.shape[0])
    assert colour.max() + 1 <= deg.max() + 1


def test_neighbour_passes_reach_the_same_fixed_point_in_any_column_order():
    # the coupled fits converge to one joint solution; the order of the sweep (the input order of the columns,
    # which sets the colour classes) must not change it beyond the convergence tolerance
    img, start = _crowded_pair_image(np.random.default_rng(9))
    perm = np.random.default_rng(10).permutation(start.shape[0])
    a = refine_columns(img, start, sigma_px=1.5, neighbour_passes=10, converge_px=2e-4)
    b = refine_columns(img, start[perm], sigma_px=1.5, neighbour_passes=10, converge_px=2e-4)
    assert a.attrs["neighbour_passes_done"] < 10  # converged, not stopped by the cap
    assert a.attrs["columns_still_moving"] == 0
    capped = refine_columns(img, start, sigma_px=1.5, neighbour_passes=2, converge_px=2e-4)
    assert capped.attrs["columns_still_moving"] > 0  # two passes are not enough: the table says so
    ok = a["fit_status"].isin(["ok", "fixed_width"]).to_numpy()
    assert ok.mean() > 0.95
    for c in ("x_px", "y_px"):
        np.testing.assert_allclose(b[c].to_numpy()[np.argsort(perm)][ok], a[c].to_numpy()[ok], atol=1e-3)
