"""Core + tail column profile: learned from the image, exact Fisher bound of the true profile, Gaussian unchanged."""

import numpy as np
import pandas as pd
import pytest

from tenfold.analysis.refine import TAIL_PROBES, joint_position_errors, learn_tail, refine_columns, tail_share
from tenfold.analysis.synthetic import column_signal, render_image

SIGMA, K_TRUE, F_TRUE = 1.5, 3.0, 0.3  # core width px; tail 3x wider holding 30 % of the light
PROBE = ((1.0 - F_TRUE, 1.0), (F_TRUE, K_TRUE))  # components up to 6 px wide are integrated exactly per pixel
H_TRUE = tail_share(F_TRUE, K_TRUE)


def _lattice(spacing, n_side, counts, background, rng, probe=PROBE, jitter=0.5):
    """Columns on a square lattice moved by up to ``jitter`` px, rendered with ``probe``, Poisson noise."""
    g = (np.arange(n_side) + 1.5) * spacing
    x, y = (a.ravel() for a in np.meshgrid(g, g))
    x = x + rng.uniform(-jitter, jitter, x.size)
    y = y + rng.uniform(-jitter, jitter, y.size)
    size = int(round((n_side + 2) * spacing))
    mu = background + column_signal(x, y, np.full(x.size, counts), shape=(size, size), sigma_px=SIGMA, probe=probe)
    return rng.poisson(mu).astype(np.float64), x, y, mu


def test_tail_of_zero_gives_exactly_the_gaussian_fit():
    rng = np.random.default_rng(3)
    img, x, y, _ = _lattice(7.0, 12, 3000.0, 20.0, rng)
    start = np.c_[x, y] + rng.normal(0, 0.2, (x.size, 2))
    plain = refine_columns(img, start, sigma_px=1.7, joint_errors=True)
    zero = refine_columns(img, start, sigma_px=1.7, joint_errors=True, tail=(0.0, 3.0))
    pd.testing.assert_frame_equal(plain, zero)


def test_bad_tail_is_refused():
    img = np.ones((16, 16))
    with pytest.raises(ValueError, match="tail="):
        refine_columns(img, [[8.0, 8.0]], sigma_px=1.5, tail=(1.2, 3.0))
    with pytest.raises(ValueError, match="width ratio"):
        refine_columns(img, [[8.0, 8.0]], sigma_px=1.5, tail=(0.1, 0.5))


def test_learned_tail_matches_the_rendered_probe():
    # crowded, irregular columns (spacing 5.3 core widths, moved by up to 1.5 px): the neighbours' tails are what a
    # Gaussian model misses (on a regular lattice they add a symmetric pedestal that the background takes up)
    rng = np.random.default_rng(5)
    img, x, y, _ = _lattice(8.0, 30, 4000.0, 20.0, rng, jitter=1.5)
    fit = refine_columns(img, np.c_[x, y], sigma_px=SIGMA, neighbour_passes=10, converge_px=2e-4)
    rec = learn_tail(img, fit, patch_radius_px=4)
    assert rec["significant"]
    # tolerances: the two-parameter fit trades f against k along a shallow valley (two seeds gave f 0.25 and 0.22,
    # k 2.57 both: a little low)
    assert rec["fraction"] == pytest.approx(F_TRUE, abs=0.1)
    assert rec["ratio"] == pytest.approx(K_TRUE, abs=0.6)
    assert rec["tail"][0] == pytest.approx(tail_share(rec["fraction"], rec["ratio"]))


def test_gaussian_image_learns_no_tail():
    rng = np.random.default_rng(6)
    img, x, y, _ = _lattice(8.0, 30, 4000.0, 20.0, rng, probe=((1.0, 1.0),), jitter=1.5)
    fit = refine_columns(img, np.c_[x, y], sigma_px=SIGMA, neighbour_passes=10, converge_px=2e-4)
    rec = learn_tail(img, fit, patch_radius_px=4)
    assert not rec["significant"]
    assert rec["tail"] == [0.0, 1.0]
    assert rec["trials"] == 1 + len(TAIL_PROBES)  # the Gaussian and the small trial tails


def _fisher_bound(x, y, counts, background, rad):
    """Per-axis Cramer-Rao bound of one column's x, y with (x, y, s, N, B) free, from numerical derivatives of the
    rendered true model (``synthetic.column_signal``) over the fit's patch: I = sum_p d mu d mu^T / mu (Poisson
    pixels; e.g. Kay, Fundamentals of Statistical Signal Processing: Estimation Theory (1993), ch. 3)."""
    cx, cy = int(np.floor(x + 0.5)), int(np.floor(y + 0.5))
    shape = (cy + rad + 3, cx + rad + 3)

    def mu(p):
        return p[4] + column_signal([p[0]], [p[1]], [p[3]], shape=shape, sigma_px=p[2], probe=PROBE)[
            cy - rad:cy + rad + 1, cx - rad:cx + rad + 1].ravel()

    p0 = np.array([x, y, SIGMA, counts, background])
    steps = np.array([1e-4, 1e-4, 1e-4, 1e-3 * counts, 1e-3])
    jac = np.empty((p0.size, (2 * rad + 1) ** 2))
    for i in range(p0.size):
        e = np.zeros(p0.size)
        e[i] = steps[i]
        jac[i] = (mu(p0 + e) - mu(p0 - e)) / (2 * steps[i])
    inv = np.linalg.inv((jac / mu(p0)) @ jac.T)
    return np.sqrt(inv[0, 0]), np.sqrt(inv[1, 1])


def test_tail_fit_reaches_the_exact_fisher_bound_of_the_true_profile():
    rng = np.random.default_rng(7)
    counts, bg, rad = 2000.0, 10.0, 6
    img, x, y, _ = _lattice(30.0, 40, counts, bg, rng)  # isolated: tails 4.5 px wide, columns 30 px apart
    start = np.c_[x, y] + rng.normal(0, 0.3, (x.size, 2))
    true_tail = (H_TRUE, K_TRUE)
    fit = refine_columns(img, start, sigma_px=1.8, patch_radius_px=rad, neighbour_passes=0, tail=true_tail)
    assert (fit["fit_status"] == "ok").all()
    # the bound depends on the pixel phase: mean variance over 16 columns' phases (moved near the origin)
    var = [_fisher_bound(x[i] % 1 + 20, y[i] % 1 + 20, counts, bg, rad) for i in range(16)]
    bound = np.sqrt(np.mean(np.square(var)))
    dx, dy = fit["x_px"] - x, fit["y_px"] - y
    rms = np.sqrt(0.5 * (np.mean(dx**2) + np.mean(dy**2)))
    assert rms == pytest.approx(bound, rel=0.1)  # 1600 columns: sampling error of the rms about 2.5 %
    assert abs(dx.mean()) < 0.15 * bound and abs(dy.mean()) < 0.15 * bound
    # the reported error (inverse Fisher information at the fit) is the bound, and the intensity the counts
    assert fit["pos_err_px"].median() == pytest.approx(bound, rel=0.05)
    assert fit["intensity"].median() == pytest.approx(counts, rel=0.02)
    assert fit["sigma_px"].median() == pytest.approx(SIGMA, rel=0.01)
    # the joint errors at the true parameters equal the numerical bound (same patch, same free parameters)
    true = pd.DataFrame({"x_px": [x[0]], "y_px": [y[0]], "sigma_px": [SIGMA],
                         "amplitude": [counts / (2 * np.pi * SIGMA**2 * ((1 - H_TRUE) + H_TRUE * K_TRUE**2))],
                         "background": [bg], "residual": [0.0], "fit_status": ["ok"]})
    err = joint_position_errors(img.shape, true, patch_radius_px=rad, tail=true_tail)
    bx0, by0 = _fisher_bound(x[0], y[0], counts, bg, rad)
    np.testing.assert_allclose(err[0], [bx0, by0], rtol=2e-3)


def test_find_columns_reports_the_profile():
    from tenfold.analysis.columns import find_columns

    rng = np.random.default_rng(8)
    g = np.arange(8.0, 120.0, 12.0)
    x, y = (a.ravel() for a in np.meshgrid(g, g))
    img = render_image(x, y, np.full(x.size, 4000.0), shape=(128, 128), sigma_px=1.6, background=20.0, rng=rng)
    _, info = find_columns(img, n_species=0)
    prof = info["refinement"]["profile"]
    assert prof["tail_peak_share"] == 0.0 and prof["tail_width_ratio"] == 1.0
    assert "how" in prof
