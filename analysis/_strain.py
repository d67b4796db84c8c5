"""The size of a measured 2x2 strain, corrected for its noise: :func:`strain_summary`.

A low module shared by the two phason measurements, the real-space lift (``phason``) and the Fourier spots
(``fourier``), so that neither stage imports the other for it.
"""

from __future__ import annotations

import numpy as np

__all__ = ["strain_summary"]


def strain_summary(w, se) -> dict:
    """Singular values of a measured 2x2 strain with the noise bias removed, and a test of 'no strain'.

    The singular values of ``W_hat = W + E`` are biased by the noise ``E``: the largest up, and a zero strain
    reads ``s1 ~ 1.9 se`` on average. Both invariants they come from are corrected by their expected noise
    contributions (element variances ``v = se^2``, errors independent and zero-mean):
    ``E |W_hat|_F^2 = |W|_F^2 + sum v`` and ``E det(W_hat)^2 = det(W)^2 + M + D`` with
    ``M = w11^2 v22 + w22^2 v11 + w12^2 v21 + w21^2 v12`` (whose estimate from ``W_hat`` is itself high by ``2 D``)
    and ``D = v11 v22 + v12 v21``; the singular values are the roots of ``s^4 - |W|_F^2 s^2 + det(W)^2``, the
    invariants clipped to their admissible range (``|W|_F^2 >= 0``, ``0 <= det^2 <= |W|_F^4 / 4``).

    Parameters
    ----------
    w, se : (2, 2) array_like
        The strain matrix and the standard errors of its elements.

    Returns
    -------
    dict
        ``singular_values`` (bias-corrected, descending), ``singular_values_plain`` (of ``w`` itself),
        ``zero_chi2`` (``sum (w / se)^2``, chi-square with 4 degrees of freedom when there is no strain),
        ``zero_p`` (its tail probability) and ``significant`` (``zero_p < 0.003``, i.e. 3 sigma).

    Examples
    --------
    >>> out = strain_summary([[0.01, 0.0], [0.0, 0.0]], [[0.01, 0.01], [0.01, 0.01]])
    >>> [round(v, 4) for v in out["singular_values"]], out["significant"]
    ([0.0, 0.0], False)
    """
    from scipy.stats import chi2

    w = np.asarray(w, dtype=float).reshape(2, 2)
    v = np.asarray(se, dtype=float).reshape(2, 2) ** 2
    plain = np.linalg.svd(w, compute_uv=False)
    out = {"singular_values_plain": plain.tolist()}
    if not np.all(np.isfinite(v)):
        out.update(singular_values=plain.tolist(), zero_chi2=None, zero_p=None, significant=None)
        return out
    d = v[0, 0] * v[1, 1] + v[0, 1] * v[1, 0]
    m = w[0, 0] ** 2 * v[1, 1] + w[1, 1] ** 2 * v[0, 0] + w[0, 1] ** 2 * v[1, 0] + w[1, 0] ** 2 * v[0, 1]
    f = max(float(np.sum(w**2) - np.sum(v)), 0.0)
    det2 = float(np.clip(np.linalg.det(w) ** 2 - m + d, 0.0, f * f / 4.0))
    root = np.sqrt(max(f * f - 4.0 * det2, 0.0))
    sv = np.sqrt(np.maximum([(f + root) / 2.0, (f - root) / 2.0], 0.0))
    z2 = float(np.sum(w**2 / np.maximum(v, 1e-30)))
    p = float(chi2.sf(z2, 4))
    out.update(singular_values=sv.tolist(), zero_chi2=z2, zero_p=p, significant=bool(p < 0.003))
    return out
