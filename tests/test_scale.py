"""Automatic column scale from the autocorrelation (known spacings of rendered point sets)."""

import numpy as np
import pytest

from tenfold.analysis._errors import TenfoldInputError
from tenfold.analysis.scale import estimate_scale
from tenfold.analysis.synthetic import AL_LATTICE_NM, fcc_al_001_columns, render_image


def _square(a_px=9.0, sigma=1.5, counts=2000.0, bg=20.0, dark=False, rng=0, n=40):
    g = np.arange(n) * a_px + 8
    x, y = np.meshgrid(g, g)
    shape = (int(n * a_px + 16),) * 2
    return render_image(x.ravel(), y.ravel(), counts, shape=shape, sigma_px=sigma, background=bg, rng=rng,
                        dark_columns=dark)


@pytest.mark.parametrize("dark,counts,bg", [
    (False, 2000.0, 20.0), (True, 2000.0, 900.0),
    pytest.param(False, 150.0, 3.0, marks=pytest.mark.xfail(strict=True, reason="measured 8.69 px for 9 px (3.4 %)"))])
def test_square_lattice_spacing(dark, counts, bg):
    est = estimate_scale(_square(counts=counts, bg=bg, dark=dark), dark_columns=dark)
    assert est.spacing_px == pytest.approx(9.0, rel=0.03)
    # rendered width 1.5 px (pixel-integrated: sqrt(1.5^2 + 1/12) = 1.53 px); the autocorrelation estimate is only
    # the starting value of the per-column fit and reads ~15 % low on this dense lattice, hence 20 %
    assert est.sigma_px == pytest.approx(1.53, rel=0.20)
    assert est.details["dark_columns"] is dark


def test_fcc_al_001_spacing_within_5_percent():
    ps = 0.02
    cols = fcc_al_001_columns(a_nm=AL_LATTICE_NM, width_nm=8, height_nm=8)
    img = render_image(cols["x_nm"] / ps + 5, cols["y_nm"] / ps + 5, 3000.0, shape=(410, 410), sigma_px=2.0,
                       background=30.0, rng=1)
    est = estimate_scale(img)
    assert est.spacing_method.startswith("median nearest-neighbour")
    # projected fcc [001]: square column lattice of side a/2 (Al a = 0.40495 nm, handbook value from memory, via synthetic)
    assert est.spacing_px * ps == pytest.approx(AL_LATTICE_NM / 2, rel=0.05)


def test_featureless_noise_and_constant_raise():
    rng = np.random.default_rng(0)
    with pytest.raises(TenfoldInputError):
        estimate_scale(rng.poisson(50.0, (256, 256)).astype(np.float32))
    with pytest.raises(TenfoldInputError):
        estimate_scale(np.ones((64, 64)))
    with pytest.raises(TenfoldInputError):
        estimate_scale(np.ones((8, 8)))


def test_disordered_arrangement_still_gives_a_scale():
    # Columns at random positions (minimum distance 9 px, no lattice): the autocorrelation has no neighbour peak,
    # but the central peak gives the width (Gaussian of width s -> autocorrelation of width sqrt(2) s) and the
    # maxima the spacing.
    from scipy.spatial import cKDTree

    from tenfold.analysis.synthetic import render_image

    rng = np.random.default_rng(5)
    pts = rng.uniform(8, 248, size=(4000, 2))
    tree_pts = []
    for p in pts:  # dart throwing on a small test set (setup only, not code under test)
        if not tree_pts or np.min(np.hypot(*(np.array(tree_pts) - p).T)) >= 9.0:
            tree_pts.append(p)
    xy = np.array(tree_pts)
    img = render_image(xy[:, 0], xy[:, 1], 3000.0, shape=(256, 256), sigma_px=1.6, background=20.0, rng=6)
    est = estimate_scale(img)
    assert est.sigma_px == pytest.approx(1.6, rel=0.15)
    nn = cKDTree(xy).query(xy, k=2)[0][:, 1]
    assert est.spacing_px == pytest.approx(np.median(nn), rel=0.05)


def test_radial_autocorrelation_equals_a_direct_sum_over_pixel_pairs():
    # the FFT route (padded grids, lags cropped before the last inverse transform) against the obvious oracle:
    # sum over all valid pixel pairs at each lag, divided by their number, averaged in 0.5 px radial bins
    from tenfold.analysis.scale import BIN_PX, radial_autocorrelation

    rng = np.random.default_rng(4)
    img = rng.normal(size=(23, 31))
    valid = rng.random(img.shape) > 0.1
    r_max = 6.5
    r, acf, acf0, nvalid = radial_autocorrelation(img, valid, highpass_px=0.0, r_max_px=r_max)
    f = np.where(valid, img - img[valid].mean(), 0.0)
    w = valid.astype(float)
    h, wd = img.shape
    sums, counts = {}, {}
    for dy in range(-6, 7):
        for dx in range(-6, 7):
            d = np.hypot(dy, dx)
            a = slice(max(0, -dy), h - max(0, dy)), slice(max(0, -dx), wd - max(0, dx))
            b = slice(max(0, dy), h - max(0, -dy)), slice(max(0, dx), wd - max(0, -dx))
            pairs = float((w[a] * w[b]).sum())
            if d > r_max or not pairs > 0.25 * valid.sum():
                continue
            k = int(np.rint(d / BIN_PX))
            sums[k] = sums.get(k, 0.0) + float((f[a] * f[b]).sum()) / pairs
            counts[k] = counts.get(k, 0) + 1
    bins = sorted(sums)
    assert np.allclose(r, np.array(bins) * BIN_PX)
    assert np.allclose(acf, [sums[k] / counts[k] for k in bins], rtol=1e-9, atol=1e-12)
    assert acf0 == pytest.approx(sums[0] / counts[0], rel=1e-9)
    assert nvalid == valid.sum()
