"""Column species from integrated intensity: a 1-D Gaussian mixture fitted by EM, classes chosen by BIC.

In HAADF-STEM the integrated column intensity grows with the atomic number of the column (roughly Z^1.6-2,
common practice), so columns of different species form separate peaks in the intensity histogram. The mixture
is fitted to the columns whose fit succeeded; classes are numbered from the dimmest (0) to the brightest.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from ._errors import TenfoldInputError

__all__ = ["classify_species", "fit_gmm_1d", "MIN_COLUMNS_PER_CLASS"]

#: A class needs at least this many columns on average to be fitted (fewer: one class, with a note).
MIN_COLUMNS_PER_CLASS = 5
#: smallest share of the columns an automatically chosen class may hold (common practice, not a published value)
MIN_WEIGHT = 0.01
_LOG_2PI = math.log(2.0 * math.pi)


def _log_dens(x, mean, var, weight):
    """(n, k) log of weight_j N(x_i | mean_j, var_j)."""
    return (np.log(weight)[None, :] - 0.5 * (_LOG_2PI + np.log(var))[None, :]
            - 0.5 * (x[:, None] - mean[None, :]) ** 2 / var[None, :])


def _logsumexp(a):
    m = a.max(axis=1, keepdims=True)
    return (m + np.log(np.exp(a - m).sum(axis=1, keepdims=True)))[:, 0]


def _em(x, mean, var, weight, var_floor, cnt, n_iter=300, tol=1e-8):
    """EM on values ``x`` with multiplicities ``cnt`` (histogram bins, or ones)."""
    # tol is relative to |log L|: 1e-8 of a log-likelihood of ~1e4-1e5 nats is far below any BIC gap that matters.
    ll_old = -np.inf
    n = cnt.sum()
    for _ in range(n_iter):
        ld = _log_dens(x, mean, var, weight)
        norm = _logsumexp(ld)
        ll = float((cnt * norm).sum())
        resp = np.exp(ld - norm[:, None]) * cnt[:, None]
        nk = resp.sum(axis=0) + 1e-12
        weight = nk / n
        mean = (resp * x[:, None]).sum(axis=0) / nk
        var = np.maximum((resp * (x[:, None] - mean[None, :]) ** 2).sum(axis=0) / nk, var_floor)
        if ll - ll_old <= tol * abs(ll):
            break
        ll_old = ll
    return mean, var, weight


#: above this many values EM runs on a histogram of BINS bins (bin width << any class width), 20-50x faster
BIN_ABOVE, BINS = 2000, 1024


def fit_gmm_1d(x, k, *, rng=0, n_init=4):
    """Maximum-likelihood 1-D Gaussian mixture with ``k`` components by EM (several starts, best kept).

    Parameters
    ----------
    x : (n,) array
        Data (finite).
    k : int
        Number of components.
    rng : numpy Generator or int seed
        Draws the random starts (the first start is always at the data quantiles).
    n_init : int
        Number of starts.

    Returns
    -------
    dict
        ``means``, ``stds``, ``weights`` (arrays sorted by mean, ascending) and ``log_likelihood`` (float).

    References
    ----------
    Dempster, Laird & Rubin, J. R. Stat. Soc. B 39 (1977) 1 (EM algorithm).
    """
    x = np.asarray(x, dtype=np.float64)
    gen = np.random.default_rng(rng)
    spread = float(np.var(x)) if x.size > 1 else 1.0
    spread = spread if spread > 0 else 1.0
    var_floor = 1e-6 * spread
    if x.size > BIN_ABOVE and np.ptp(x) > 0:
        cnt, edges = np.histogram(x, bins=BINS)
        centres = 0.5 * (edges[1:] + edges[:-1])
        xs, cs = centres[cnt > 0], cnt[cnt > 0].astype(np.float64)
        # the binning adds width^2 / 12 to every class variance; the floor keeps a class from collapsing into a bin
        var_floor = max(var_floor, (edges[1] - edges[0]) ** 2 / 12.0)
    else:
        xs, cs = x, np.ones_like(x)
    best = None
    for start in range(max(1, n_init)):
        if start == 0:
            mean = np.quantile(x, (np.arange(k) + 0.5) / k)
        else:
            mean = np.sort(gen.choice(x, size=k, replace=x.size < k))
        var = np.full(k, spread / k**2)
        weight = np.full(k, 1.0 / k)
        m, v, wt = _em(xs, mean, var, weight, var_floor, cs)
        ll = float(_logsumexp(_log_dens(x, m, v, wt)).sum())  # exact log-likelihood of the raw values
        if best is None or ll > best[3]:
            best = (m, v, wt, ll)
    mean, var, weight, ll = best
    order = np.argsort(mean)
    return {"means": mean[order], "stds": np.sqrt(var[order]), "weights": weight[order], "log_likelihood": ll}


#: neighbouring classes must be at least this many of their (smaller) spreads apart to count as two species: an
#: equal mixture of two Gaussians of equal spread is bimodal only beyond 2 spreads (e.g. Schilling, Watkins &
#: Watkins, Am. Stat. 56 (2002) 223, from memory); closer classes are one species split by noise
MERGE_SPREADS = 2.0


def _entropy(x, fit):
    """Classification entropy -sum_i sum_k t_ik ln t_ik of the posterior memberships (McLachlan & Peel 2000)."""
    ld = _log_dens(x, fit["means"], fit["stds"] ** 2, fit["weights"])
    post = np.exp(ld - _logsumexp(ld)[:, None])
    return float(-(post * np.log(np.maximum(post, 1e-300))).sum())


#: points on which the density of two neighbouring classes is searched for a dip between their means
_DIP_GRID = 257


def _bimodal_pairs(fit) -> np.ndarray:
    """For each pair of neighbouring classes: does their two-component density dip between the two means?

    ``f(x) = w1 N(x; m1, s1) + w2 N(x; m2, s2)`` has two peaks exactly when some point between the means lies below
    the highest value of ``f`` on each side of it; ``f`` is evaluated on a grid between the means (any dip of a
    two-Gaussian mixture lies there). For equal weights and spreads this is the familiar ``|m1 - m2| > 2 s``; a
    narrow class on the shoulder of a broad or much more populous one is not a separate peak.

    References
    ----------
    C. A. Robertson, J. G. Fryer, Skandinavisk Aktuarietidskrift 52 (1969) 137 (modes of a normal mixture);
    S. Ray, B. G. Lindsay, Ann. Statist. 33 (2005) 2042 (the ridgeline: modes lie between the component means).
    """
    m, s, w = fit["means"], fit["stds"], fit["weights"]
    if m.size < 2:
        return np.zeros(0, dtype=bool)
    t = np.linspace(0.0, 1.0, _DIP_GRID)[None, :]
    x = m[:-1, None] + t * (m[1:] - m[:-1])[:, None]  # (pairs, grid)

    def comp(i):
        return w[i, None] / s[i, None] * np.exp(-0.5 * ((x - m[i, None]) / s[i, None]) ** 2)

    f = comp(slice(0, -1)) + comp(slice(1, None))
    left = np.maximum.accumulate(f, axis=1)
    right = np.maximum.accumulate(f[:, ::-1], axis=1)[:, ::-1]
    dip = np.minimum(left, right) - f  # > 0 where the density sits below a higher point on both sides
    return dip[:, 1:-1].max(axis=1) > 1e-9 * f.max(axis=1)


def _separated(fit):
    """True when every pair of neighbouring classes forms two peaks (:func:`_bimodal_pairs`) and is at least
    ``MERGE_SPREADS`` of their smaller spread apart."""
    m, s = fit["means"], fit["stds"]
    if m.size < 2:
        return True
    return bool(np.all(np.diff(m) >= MERGE_SPREADS * np.minimum(s[1:], s[:-1])) and np.all(_bimodal_pairs(fit)))


def classify_species(columns: pd.DataFrame, *, n_species=None, max_species=5, rng=0) -> tuple[pd.DataFrame, dict]:
    """Assign each column an intensity class with a 1-D Gaussian mixture on its integrated intensity.

    Parameters
    ----------
    columns : DataFrame
        Columns table with ``intensity`` and ``fit_status`` (see ``_schema.COLUMNS``). Not modified.
    n_species : int, optional
        Number of classes. None chooses it by the Bayesian information criterion among 1..``max_species``;
        0 skips classification (species -1 everywhere).
    max_species : int
        Largest number of classes tried when ``n_species`` is None.
    rng : numpy Generator or int seed
        Random EM starts.

    Returns
    -------
    columns : DataFrame
        A copy with ``species`` (0 = dimmest; -1 for columns whose fit failed or when skipped) and
        ``species_prob`` (posterior probability of the assigned class; NaN where species is -1).
    info : dict
        JSON-safe: ``n_species``, ``method``, ``means``, ``stds``, ``weights`` (intensity units, dimmest first),
        ``bic`` (k -> BIC for every k tried), ``n_used`` (columns in the fit), ``notes``.

    Notes
    -----
    BIC = -2 ln L + p ln n with p = 3k - 1 free parameters (k means, k variances, k - 1 weights); ICL = BIC + 2 x
    the classification entropy; the k with the smallest ICL wins among the mixtures whose neighbouring classes form
    two peaks of the intensity density (a dip between them; for equal weights and spreads, at least
    ``MERGE_SPREADS`` spreads apart) and whose classes each hold ``MIN_WEIGHT`` of the columns. A species whose
    intensities are skewed (crowded columns reading brighter, a tail of damaged columns) can be fitted better by
    two overlapping Gaussians; without a dip between them they are one species. With fewer than
    ``MIN_COLUMNS_PER_CLASS`` columns per tried class the largest k is reduced; with fewer than ``2 * MIN_COLUMNS_PER_CLASS`` usable columns every column gets species 0 and a note.

    References
    ----------
    Schwarz, Ann. Statist. 6 (1978) 461 (BIC). Dempster, Laird & Rubin, J. R. Stat. Soc. B 39 (1977) 1 (EM).
    Biernacki, Celeux & Govaert, IEEE Trans. PAMI 22 (2000) 719 (ICL).

    Examples
    --------
    >>> cols, info = classify_species(cols)  # doctest: +SKIP
    >>> info["n_species"]  # doctest: +SKIP
    3
    """
    if n_species is not None and (int(n_species) != n_species or n_species < 0):
        raise TenfoldInputError(f"n_species={n_species!r} must be None (automatic), 0 (skip) or a positive integer")
    if int(max_species) < 1:
        raise TenfoldInputError(f"max_species={max_species!r} must be a positive integer")
    out = columns.copy()
    n = len(out)
    species = np.full(n, -1, dtype=np.int64)
    prob = np.full(n, np.nan)
    info: dict = {"n_species": 0, "method": "skipped", "means": [], "stds": [], "weights": [], "bic": {},
                  "n_used": 0, "notes": []}
    if n_species == 0:
        out["species"], out["species_prob"] = species, prob
        return out, info
    inten = out["intensity"].to_numpy(dtype=np.float64) if n else np.zeros(0)
    use = np.isfinite(inten)
    if "fit_status" in out:
        use &= np.isin(out["fit_status"].to_numpy(), ("ok", "fixed_width"))
    x = inten[use]
    info["n_used"] = int(x.size)
    if x.size < 2 * MIN_COLUMNS_PER_CLASS or np.ptp(x) == 0:
        species[use] = 0
        prob[use] = 1.0
        info.update(n_species=1 if x.size else 0, method="too few columns")
        info["notes"].append(f"species: only {x.size} usable columns (need {2 * MIN_COLUMNS_PER_CLASS} and some "
                             "spread in intensity); all put in species 0")
        out["species"], out["species_prob"] = species, prob
        return out, info
    k_cap = max(1, min(int(max_species), x.size // MIN_COLUMNS_PER_CLASS))
    if n_species is None:
        ks = range(1, k_cap + 1)
    else:
        if n_species > x.size // 2:
            raise TenfoldInputError(f"n_species={n_species} is too many for {x.size} usable columns; lower it")
        ks = [int(n_species)]
    gen = np.random.default_rng(rng)
    fits = {}
    bic = {}
    for k in ks:
        fit = fit_gmm_1d(x, k, rng=gen)
        fits[k] = fit
        bic[k] = -2.0 * fit["log_likelihood"] + (3 * k - 1) * math.log(x.size)
    # A class holding under MIN_WEIGHT of the columns is a handful of outliers (false detections, damaged
    # columns), not a species: such mixtures are not eligible when the number is chosen automatically.
    # ICL (BIC plus twice the classification entropy) rather than plain BIC: a class that only bends the shape of
    # one species' intensity distribution overlaps it and is penalised; classes of distinct species are not.
    icl = {k: bic[k] + 2.0 * _entropy(x, fits[k]) for k in bic}
    # classes whose means are closer than MERGE_SPREADS of their spreads are one species measured with noise
    distinct = {k: _separated(fits[k]) for k in fits}
    eligible = {k: v for k, v in icl.items() if n_species is not None or
                (fits[k]["weights"].min() >= MIN_WEIGHT and distinct[k])}
    k_best = min(eligible or icl, key=(eligible or icl).get)
    rejected = sorted(k for k in bic if k not in eligible)
    if rejected and n_species is None:
        info["notes"].append(f"species: mixtures with {rejected} classes have a class under {100 * MIN_WEIGHT:g} % "
                             f"of the columns (outliers, not a species) or two classes that do not form two peaks "
                             "of the intensity histogram (one species split by noise or a skewed distribution) and "
                             "were not chosen; set n_species to force")
    fit = fits[k_best]
    var = fit["stds"] ** 2
    ld = _log_dens(x, fit["means"], var, fit["weights"])
    post = np.exp(ld - _logsumexp(ld)[:, None])
    cls = np.argmax(post, axis=1)
    species[use] = cls
    prob[use] = post[np.arange(x.size), cls]
    out["species"], out["species_prob"] = species, prob
    info.update(
        n_species=int(k_best),
        method="BIC" if n_species is None else "given",
        means=[float(v) for v in fit["means"]],
        stds=[float(v) for v in fit["stds"]],
        weights=[float(v) for v in fit["weights"]],
        bic={str(k): float(v) for k, v in bic.items()},
        icl={str(k): float(v) for k, v in icl.items()},
        criterion="ICL (BIC + 2 x classification entropy), neighbouring classes forming two peaks of the "
                  f"intensity density, each holding at least {100 * MIN_WEIGHT:g} % of the columns",
        log_likelihood=float(fit["log_likelihood"]),
    )
    return out, info
