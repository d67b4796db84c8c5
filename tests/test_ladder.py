"""Pair distributions and golden-ratio ladders: identities, oracles, decagonal and periodic point sets, bad input."""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest
from scipy.spatial.distance import pdist

from tenfold.analysis._errors import TenfoldInputError
from tenfold.analysis._pentagrid import pentagrid_tiling
from tenfold.analysis._schema import LADDER, PEAKS
from tenfold.analysis.ladder import (KNOWN_RATIOS, TAU, fit_ladder, ladder_figure, locate_peaks, motif_ratios,
                                     pair_distribution)
from tenfold.analysis.motifs import find_motifs
from test_motifs import PX_NM, RING_NM, decorated_pentagrid


# --------------------------------------------------------------------------------------------- identities
def test_tau_identities():
    # tau^2 = tau + 1, i.e. tau = 1 + 1/tau (Euclid, Elements VI def. 3, extreme and mean ratio)
    assert TAU == pytest.approx(1 + 1 / TAU, rel=1e-15)
    assert TAU == pytest.approx((1 + 5 ** 0.5) / 2, rel=1e-15)


def test_fibonacci_ratios_converge_to_tau():
    # F(n+1)/F(n) -> tau with |error| ~ 1/(sqrt5 F(n)^2) (Binet's formula; any number-theory handbook)
    f = [1, 1]
    for _ in range(40):
        f.append(f[-1] + f[-2])
    errs = [abs(f[n + 1] / f[n] - TAU) for n in range(5, 40)]
    assert errs[-1] < 1e-15 and all(b < a for a, b in zip(errs[:20], errs[1:21]))
    n = 20
    assert abs(f[n + 1] / f[n] - TAU) == pytest.approx(1 / (5 ** 0.5 * f[n] ** 2), rel=1e-3)


def test_regular_pentagon_diagonal_over_edge_is_tau():
    # Euclid, Elements XIII.8: the diagonals of a regular pentagon cut one another in extreme and mean ratio.
    a = np.deg2rad(72.0 * np.arange(5))
    p = np.stack([np.cos(a), np.sin(a)], axis=1)
    assert np.hypot(*(p[2] - p[0])) / np.hypot(*(p[1] - p[0])) == pytest.approx(TAU, rel=1e-12)


def test_known_ratio_table_is_the_decagon_chords():
    vals = dict((n, v) for v, n in KNOWN_RATIOS)
    # 2 sin 36 = sqrt(3 - tau) and 2 sin 72 = 2 cos 18 = sqrt(2 + tau) (trigonometric identities)
    assert vals["2 sin 36"] == pytest.approx(np.sqrt(3 - TAU), rel=1e-12)
    assert vals["2 sin 72"] == pytest.approx(np.sqrt(2 + TAU), rel=1e-12)
    assert vals["2 sin 72"] == pytest.approx(2 * np.cos(np.deg2rad(18)), rel=1e-12)
    # no table entry is itself a rung tau^n
    for v, _ in KNOWN_RATIOS:
        n = np.log(v) / np.log(TAU)
        assert abs(n - round(n)) > 0.05


# --------------------------------------------------------------------------------------------- pair distances
def test_pair_counts_against_brute_force():
    g = np.random.default_rng(0)
    xy = g.uniform(0, 50, (400, 2))
    curve = pair_distribution(xy[:, 0], xy[:, 1], r_max_px=10.0, bin_px=0.5, edge_correction=False)
    ref, _ = np.histogram(pdist(xy), bins=np.arange(0, 10.25, 0.5))
    assert np.array_equal(curve["count"].to_numpy(), ref.astype(float))


def test_poisson_pattern_has_g_one_with_edge_correction():
    # g(r) = 1 for a Poisson process; the rectangle's set covariance (Ohser & Stoyan 1981) removes the edge deficit
    g = np.random.default_rng(1)
    xy = g.uniform(0, 400, (8000, 2))
    c = pair_distribution(xy[:, 0], xy[:, 1], r_max_px=60.0, bin_px=2.0)
    far = c[c["r_px"] > 20]
    assert far["g"].mean() == pytest.approx(1.0, abs=0.01)
    raw = pair_distribution(xy[:, 0], xy[:, 1], r_max_px=60.0, bin_px=2.0, edge_correction=False)
    assert raw[raw["r_px"] > 50]["g"].mean() < 0.9  # the uncorrected estimate is biased low, as expected


def test_locate_peaks_sub_bin_position():
    r = np.arange(0.05, 20, 0.1)
    g = 1 + 5 * np.exp(-0.5 * ((r - 7.3337) / 0.3) ** 2)
    pk = locate_peaks(pd.DataFrame({"r_px": r, "g": g, "count": 1e6 * np.ones_like(r)}))
    assert len(pk) == 1
    assert pk["distance_px"].iloc[0] == pytest.approx(7.3337, abs=0.002)
    assert pk["width_px"].iloc[0] == pytest.approx(0.3, rel=0.02)


def test_batched_peak_fits_match_curve_fit():
    # oracle: scipy's curve_fit (MINPACK) on each window alone, from the same start values
    from scipy.optimize import curve_fit

    from tenfold.analysis.ladder import _fit_gauss_bg_batch, _gauss_bg

    gen = np.random.default_rng(5)
    xs, ys, p0 = [], [], []
    for n in range(40):  # resolved peaks (several bins wide), noisy, windows of different lengths
        r = np.arange(0.0, 4.0 + 0.1 * (n % 7), 0.1)
        truth = (gen.uniform(2, 6), gen.uniform(1.5, 2.5), gen.uniform(0.3, 0.6), gen.uniform(0.5, 1.5),
                 gen.uniform(-0.1, 0.1))
        xs.append(r)
        ys.append(_gauss_bg(r, *truth) + gen.normal(0.0, 0.05, len(r)))
        p0.append([truth[0] * 0.8, truth[1] + 0.1, truth[2] * 1.3, truth[3], 0.0])
    got, ok = _fit_gauss_bg_batch(xs, ys, np.array(p0))
    assert ok.all()
    for k in range(len(xs)):
        ref = curve_fit(_gauss_bg, xs[k], ys[k], p0=p0[k], maxfev=2000)[0]
        assert got[k, 1] == pytest.approx(ref[1], abs=1e-6)  # peak position
        assert abs(got[k, 2]) == pytest.approx(abs(ref[2]), rel=1e-5)  # width


def test_batched_peak_fits_empty():
    from tenfold.analysis.ladder import _fit_gauss_bg_batch

    got, ok = _fit_gauss_bg_batch([], [], np.zeros((0, 5)))
    assert got.shape == (0, 5) and ok.shape == (0,)


# --------------------------------------------------------------------------------------------- decagonal sets
@pytest.fixture(scope="module")
def decorated():
    cols, truth = decorated_pentagrid(16.0, rng=11)
    return cols, truth


def test_ring_ladder_in_the_columns(decorated):
    cols, _ = decorated
    r = RING_NM / PX_NM
    lad, pk, info = fit_ladder(cols["x_px"], cols["y_px"], ladder_r_max_px=2.1 * r, pixel_size_nm=PX_NM)
    # within one ring: edge e, radius R = tau e, chord 2 R sin 54 = tau^2 e (regular decagon, Euclid XIII.9)
    assert set(lad["rung"]) >= {0.0, 1.0, 2.0}
    assert np.abs(lad["deviation_pct"]).max() < 0.5
    assert info["d0_px"] == pytest.approx(2 * r * np.sin(np.pi / 10), rel=0.005)
    assert info["holds"] is True, info["evidence"]
    off = pk[~pk["on_ladder"]]
    assert "2 sin 72" in set(off["label"])  # 2 R sin 36 = 2 sin 72 x e: off the ladder, labelled
    assert lad["measured_nm"].to_numpy() == pytest.approx(lad["measured_px"].to_numpy() * PX_NM)
    assert (lad["uncertainty_pct"] > 0).all() and (lad["uncertainty_pct"] < 0.5).all()
    assert list(lad.columns[: len(LADDER)]) == [f.name for f in LADDER]


def test_centre_ladder(decorated):
    cols, truth = decorated
    v = truth["centres"]
    lad, pk, info = fit_ladder(v[:, 0], v[:, 1], point_set="centres", n_boot=50)
    # Penrose vertex distances: edge / tau (thin short diagonal), edge, tau edge, tau^2 edge (de Bruijn 1981)
    assert set(lad["rung"]) >= {-1.0, 0.0, 1.0, 2.0}
    assert np.abs(lad["deviation_pct"]).max() < 0.5
    assert info["holds"] is True and "holds" in info["evidence"]["verdict"]
    edge = 2.0 / PX_NM
    d0 = info["d0_px"]
    assert min(abs(d0 / edge - 1), abs(d0 * TAU / edge - 1)) < 0.005
    labels = set(pk["label"])
    assert "2 sin 72" in labels or "2 sin 72 tau^-1" in labels  # 1.902 edge, the thin long diagonal


def test_half_step_ladder_finds_no_half_rungs_in_a_decagonal_set(decorated):
    # tau^(1/2) = 1.272 is not a chord ratio of the regular decagon (2 sin(k pi / 10) x tau^m: 0.618, 1.176,
    # 1.618, 1.902, 2; Euclid XIII), so on a decagonal point set the half-step ladder must match whole rungs only.
    cols, _ = decorated
    lad, _, info = fit_ladder(cols["x_px"], cols["y_px"], half_step=True, ladder_r_max_px=25.0)
    assert info["half_step"] is True and len(lad) >= 2
    assert np.all(lad["rung"].to_numpy() % 1.0 == 0.0)


def test_motif_ratios_on_rings(decorated):
    cols, _ = decorated
    motifs, _ = find_motifs(cols)
    mr = motif_ratios(motifs)
    assert mr["ring_radius_over_edge"]["mean"] == pytest.approx(TAU, rel=0.005)
    assert mr["pentagon_diag_over_edge"]["mean"] == pytest.approx(TAU, rel=0.005)
    assert abs(mr["pentagon_diag_over_edge"]["deviation_from_tau_pct"]) < 0.5
    assert motif_ratios(motifs.iloc[0:0])["ring_radius_over_edge"]["n"] == 0


# --------------------------------------------------------------------------------------------- periodic controls
def _square(n=70):
    a = 0.40495 / 2 / PX_NM  # fcc Al [001]: square of side a/2, a = 0.40495 nm (handbook value, from memory)
    i, j = np.meshgrid(np.arange(n), np.arange(n))
    g = np.random.default_rng(2)
    return i.ravel() * a + g.normal(0, 0.25, n * n), j.ravel() * a + g.normal(0, 0.25, n * n)


def _hexagonal(n=70, a=7.0):
    i, j = np.meshgrid(np.arange(n), np.arange(n))
    g = np.random.default_rng(3)
    return ((i + 0.5 * j) * a).ravel() + g.normal(0, 0.25, n * n), (j * a * np.sqrt(3) / 2).ravel() + g.normal(0, 0.25, n * n)


@pytest.mark.parametrize("maker", [_square, _hexagonal])
def test_periodic_lattice_ladder_does_not_hold(maker):
    x, y = maker()
    lad, pk, info = fit_ladder(x, y)
    assert info["holds"] is False
    ev = info["evidence"]
    assert "does not hold" in ev["verdict"]
    assert ev["best_alternative"] == ("square" if maker is _square else "hexagonal")
    assert ev["two_ln_likelihood_ratio"] < 0


# --------------------------------------------------------------------------------------------- bad input
def _assert_empty(lad, pk, info):
    assert len(lad) == 0 and list(lad.columns) == [f.name for f in LADDER]
    assert len(pk) == 0 and list(pk.columns) == [f.name for f in PEAKS]
    assert info["holds"] is False and info["message"]


def test_too_few_points():
    _assert_empty(*fit_ladder([1.0, 2.0], [1.0, 5.0]))
    _assert_empty(*fit_ladder([], []))


def test_collinear_points():
    x = np.arange(100.0)
    _assert_empty(*fit_ladder(x, 2 * x + 1))


@pytest.mark.parametrize("kw", [{"d0_px": 0.0}, {"d0_px": -3.0}, {"ladder_r_max_px": 0.0}, {"point_set": "atoms"},
                                {"pixel_size_nm": -1.0}])
def test_bad_parameters_raise(kw):
    with pytest.raises(TenfoldInputError):
        fit_ladder(np.arange(10.0), np.arange(10.0) ** 2, **kw)


def test_pair_distribution_bad_input():
    with pytest.raises(TenfoldInputError, match="r_max_px"):
        pair_distribution([0.0, 1.0], [0.0, 1.0], r_max_px=-1.0)
    with pytest.raises(TenfoldInputError, match="length"):
        pair_distribution([0.0, 1.0], [0.0], r_max_px=1.0)
    assert len(pair_distribution([0.0], [0.0], r_max_px=3.0)) == 0


def test_reproducible_with_seed(decorated):
    cols, _ = decorated
    a = fit_ladder(cols["x_px"], cols["y_px"], ladder_r_max_px=25.0, rng=4)[0]
    b = fit_ladder(cols["x_px"], cols["y_px"], ladder_r_max_px=25.0, rng=4)[0]
    pd.testing.assert_frame_equal(a, b)


# --------------------------------------------------------------------------------------------- figure
def test_ladder_figure(decorated):
    cols, _ = decorated
    lad, pk, info = fit_ladder(cols["x_px"], cols["y_px"], ladder_r_max_px=25.0)
    curve = info.pop("curve")
    res = SimpleNamespace(curves={"pair_distribution_columns": curve}, tables={"ladder": lad, "pair_peaks": pk},
                          meta=SimpleNamespace(pixel_size_nm=None))
    fig = ladder_figure(res)
    from matplotlib.figure import Figure

    assert isinstance(fig, Figure)
    assert "uncalibrated" in fig.axes[0].get_title()
    assert ladder_figure(SimpleNamespace(curves={}, tables={}, meta=None)) is None


def test_figure_registered():
    from tenfold.analysis import export

    export._load_figure_modules()  # the stages' makers join FIGURES when figures are first drawn
    assert export.FIGURES.get("pair_distribution_ladder") is ladder_figure
