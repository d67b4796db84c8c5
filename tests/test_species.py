"""Species by a 1-D Gaussian mixture: BIC class count, ordering, brute-force check of the EM optimum."""

import math

import numpy as np
import pandas as pd
import pytest
from scipy.optimize import minimize
from scipy.stats import norm

from tenfold.analysis.species import classify_species, fit_gmm_1d


def _table(values):
    return pd.DataFrame({"intensity": values, "fit_status": ["ok"] * len(values)})


def test_three_classes_by_bic_ordered():
    rng = np.random.default_rng(3)
    means, sd, n = [1000.0, 3000.0, 8000.0], [80.0, 150.0, 300.0], [300, 200, 100]
    truth = np.concatenate([np.full(k, i) for i, k in enumerate(n)])
    x = np.concatenate([rng.normal(m, s, k) for m, s, k in zip(means, sd, n)])
    perm = rng.permutation(x.size)
    cols, info = classify_species(_table(x[perm]))
    assert info["n_species"] == 3 and info["method"] == "BIC"
    np.testing.assert_allclose(info["means"], means, rtol=0.03)
    assert np.all(np.diff(info["means"]) > 0)
    assert (cols["species"].to_numpy() == truth[perm]).mean() > 0.99
    assert cols["species_prob"].between(0.5, 1.0).all()
    assert set(info["bic"]) == {"1", "2", "3", "4", "5"}


def test_em_matches_brute_force_likelihood():
    rng = np.random.default_rng(5)
    x = np.concatenate([rng.normal(0, 1, 60), rng.normal(4, 0.7, 40)])
    fit = fit_gmm_1d(x, 2, rng=0)

    def nll(p):
        w = 1 / (1 + math.exp(-p[0]))
        return -np.log(w * norm.pdf(x, p[1], math.exp(p[2])) + (1 - w) * norm.pdf(x, p[3], math.exp(p[4]))).sum()

    best = min((minimize(nll, p0, method="Nelder-Mead", options={"maxiter": 20000, "xatol": 1e-8, "fatol": 1e-10})
                for p0 in ([0, -1, 0, 5, 0], [0.5, 0, 0, 4, -0.5], [0, 1, 0, 3, 0])), key=lambda r: r.fun)
    assert fit["log_likelihood"] == pytest.approx(-best.fun, abs=1e-4)


def test_skip_and_too_few_and_failed_rows():
    cols, info = classify_species(_table([1.0, 2.0, 3.0]), n_species=0)
    assert (cols["species"] == -1).all() and info["n_species"] == 0
    cols, info = classify_species(_table([1.0, 2.0, 3.0]))
    assert (cols["species"] == 0).all() and info["notes"]
    t = _table(np.r_[np.full(20, 10.0) + np.arange(20) * 0.01, np.full(20, 50.0) + np.arange(20) * 0.01])
    t.loc[0, "fit_status"] = "diverged"
    t.loc[0, "intensity"] = np.nan
    cols, info = classify_species(t, n_species=2)
    assert cols.loc[0, "species"] == -1 and np.isnan(cols.loc[0, "species_prob"])
    assert (cols["species"].to_numpy()[1:20] == 0).all() and (cols["species"].to_numpy()[20:] == 1).all()


def test_two_peak_rule_matches_the_equal_variance_mixture_formula():
    """Equal spreads s, means d * 2 s apart: the mixture p N(0, s) + (1 - p) N(2 d s, s) is bimodal iff d > 1 and
    |ln(p / (1 - p))| < 2 ln(d - sqrt(d^2 - 1)) + 2 d sqrt(d^2 - 1) (Robertson & Fryer 1969; also Behboodian,
    Technometrics 12 (1970) 131; quoted from memory)."""
    from tenfold.analysis.species import _bimodal_pairs

    for d in (0.95, 1.05, 1.3, 2.0):
        limit = 2 * math.log(d - math.sqrt(d * d - 1)) + 2 * d * math.sqrt(d * d - 1) if d > 1 else -1.0
        for p in (0.5, 0.3, 0.1, 0.02):
            lr = abs(math.log(p / (1 - p)))
            if abs(lr - abs(limit)) < 0.05:
                continue  # too close to the boundary for a grid search
            fit = {"means": np.array([0.0, 2 * d]), "stds": np.array([1.0, 1.0]), "weights": np.array([p, 1 - p])}
            assert bool(_bimodal_pairs(fit)[0]) == (d > 1 and lr < abs(limit)), (d, p)


def test_a_shoulder_is_not_a_second_species():
    """A narrow class on the flank of a populous one (means 2.8 of the narrow spread apart, so the smaller-spread
    rule alone would keep both) makes no second peak: f(x) = 0.85 N(1000, 40) + 0.15 N(1070, 25) decreases
    monotonically from its mode near 1000 to 1070 (checked on a fine grid here, independent of the rule's grid)."""
    from tenfold.analysis.species import _separated

    fit = {"means": np.array([1000.0, 1070.0]), "stds": np.array([40.0, 25.0]), "weights": np.array([0.85, 0.15])}
    x = np.linspace(900.0, 1200.0, 30001)
    f = 0.85 * norm.pdf(x, 1000, 40) + 0.15 * norm.pdf(x, 1070, 25)
    assert np.sum(np.diff(np.sign(np.diff(f))) != 0) == 1  # one turning point: unimodal
    assert 1070.0 - 1000.0 >= 2 * 25.0 and not _separated(fit)
    # the same classes with a deeper valley (shoulder further out) are two species
    fit["means"][1] = 1150.0
    f = 0.85 * norm.pdf(x, 1000, 40) + 0.15 * norm.pdf(x, 1150, 25)
    assert np.sum(np.diff(np.sign(np.diff(f))) != 0) == 3 and _separated(fit)
