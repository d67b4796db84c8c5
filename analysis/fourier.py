"""Fourier stage: power spectrum, Bragg-like spots, rotational order and scan-distortion check.

The power spectrum is taken on the largest central square of the image, mean-subtracted and Hann-windowed (to
suppress the edge cross), so one frequency step ``1 / N`` per pixel serves both axes. Spots are local maxima of
the power over the azimuthally averaged (log) background. The rotational order of the pattern (4 for a square
lattice, 6 for a hexagonal one, 10 for a decagonal quasicrystal seen down its ten-fold axis) comes from the
bond-orientational order ``|psi_n|`` of the strong spots of each ``|k|`` shell. A scan distortion (shear or an
anisotropic pixel size) turns every shell into an ellipse: fitting ``k^T M k = 1`` to the spots of a shell gives the
axis ratio, which is reported, with a warning when it exceeds ``distortion_warn``.

Conventions: ``kx`` along image columns, ``ky`` along rows (down), in cycles per pixel; ``angle_deg`` is
``atan2(ky, kx)``. A real-space affine distortion ``r' = D r`` maps a circular shell to ``k'^T (D D^T) k' = k0^2``,
so ``M`` is proportional to ``D D^T``.

References
----------
F. J. Harris, "On the use of windows for harmonic analysis with the discrete Fourier transform",
Proc. IEEE 66 (1978) 51-83 (Hann window).
D. R. Nelson and B. I. Halperin, Phys. Rev. B 19 (1979) 2457 (bond-orientational order psi_n).
"""

from __future__ import annotations

import functools
import math

import numpy as np
import pandas as pd
from scipy import ndimage

from ._errors import TenfoldInputError
from ._lengths import check_pixel_size
from ._schema import SPOTS, conform, empty_table
from ._strain import strain_summary

__all__ = ["power_spectrum", "find_spots", "analyze_fourier", "index_decagonal", "correct_columns", "fourier_stage",
           "electron_wavelength_nm", "bragg_angle_mrad", "spectrum_figure", "column_diffraction",
           "diffraction_figure"]

_ORDERS = (2, 4, 6, 8, 10, 12)


def _square_crop(image: np.ndarray, valid: np.ndarray | None) -> tuple[np.ndarray, np.ndarray]:
    img = np.asarray(image)  # a view: only the crop is converted, in _power
    if img.ndim != 2:
        raise TenfoldInputError(f"power spectrum: image must be 2-D, got shape {img.shape}")
    n = min(img.shape)
    n -= n % 2
    if n < 16:
        raise TenfoldInputError(f"power spectrum: image {img.shape} is too small (need at least 16 x 16 px)")
    r0 = (img.shape[0] - n) // 2
    c0 = (img.shape[1] - n) // 2
    crop = img[r0 : r0 + n, c0 : c0 + n]
    ok = np.ones_like(crop, dtype=bool) if valid is None else np.asarray(valid, dtype=bool)[r0 : r0 + n, c0 : c0 + n]
    return crop, ok


WINDOWS = ("hann", "periodic_smooth")


def _periodic_component(u: np.ndarray) -> np.ndarray:
    """Periodic part p of u = p + s (s smooth): s solves a Poisson equation driven by the jumps across the image
    border (L. Moisan, "Periodic plus smooth image decomposition", J. Math. Imaging Vis. 39 (2011) 161-179)."""
    n0, n1 = u.shape
    v = np.zeros_like(u)
    v[0, :] += u[-1, :] - u[0, :]
    v[-1, :] += u[0, :] - u[-1, :]
    v[:, 0] += u[:, -1] - u[:, 0]
    v[:, -1] += u[:, 0] - u[:, -1]
    q = 2 * np.cos(2 * np.pi * np.arange(n0) / n0)[:, None] + 2 * np.cos(2 * np.pi * np.arange(n1) / n1)[None, :] - 4
    q[0, 0] = 1.0
    sh = np.fft.fft2(v) / q
    sh[0, 0] = 0.0
    return u - np.fft.ifft2(sh).real.astype(u.dtype)


def _windowed(image: np.ndarray, valid: np.ndarray | None, window: str = "hann") -> np.ndarray:
    """The central square, mean removed, masked pixels zero, Hann-windowed or its periodic component (float32)."""
    if window not in WINDOWS:
        raise TenfoldInputError(f"power spectrum: unknown window {window!r}; use one of {list(WINDOWS)}")
    crop, ok = _square_crop(image, valid)
    if not ok.any():
        raise TenfoldInputError("power spectrum: every pixel of the central square is masked")
    n = crop.shape[0]
    work = np.where(ok, crop - crop[ok].mean(), 0.0).astype(np.float32)
    if window == "hann":
        w = np.hanning(n).astype(np.float32)
        work *= w[:, None]
        work *= w[None, :]
    else:
        work = _periodic_component(work)
    return work


def _power(image: np.ndarray, valid: np.ndarray | None, window: str = "hann", *, work=None) -> np.ndarray:
    if work is None:
        work = _windowed(image, valid, window)
    n = work.shape[0]
    # real input: the half-plane transform and Friedel symmetry P(-k) = P(k) give the whole plane at half the cost
    from scipy import fft as _fft

    half = _fft.rfft2(work, workers=-1)
    ph = half.real**2 + half.imag**2
    full = np.empty((n, n), dtype=np.float32)
    m = ph.shape[1]
    full[:, :m] = ph
    full[:, m:] = ph[(-np.arange(n)) % n][:, n - np.arange(m, n)]
    return np.fft.fftshift(full)


def power_spectrum(
    image: np.ndarray, *, valid: np.ndarray | None = None, pixel_size_nm: float | None = None, window: str = "hann"
) -> tuple[np.ndarray, float]:
    """Log power spectrum of the central square of an image.

    Parameters
    ----------
    image : (H, W) array
        The micrograph.
    valid : (H, W) bool array, optional
        False where pixels are masked (set to the mean before the transform).
    pixel_size_nm : float, optional
        Only used to validate; the returned step is per pixel. Multiply by ``1 / pixel_size_nm`` for 1/nm.
    window : {'hann', 'periodic_smooth'}
        Hann apodisation (Harris 1978), or no window on the periodic component of the periodic-plus-smooth
        decomposition (Moisan 2011), which removes the edge cross without weighting the centre of the field.

    Returns
    -------
    spectrum : (N, N) float32
        ``log10(1 + power / median(power))``, zero frequency at index ``(N // 2, N // 2)``.
    k_step_per_px : float
        Frequency step ``1 / N`` in cycles per pixel (cycles per nm: divide by the pixel size in nm).

    Examples
    --------
    >>> import numpy as np
    >>> y, x = np.mgrid[:64, :64]
    >>> s, dk = power_spectrum(np.cos(2 * np.pi * x / 8))
    >>> int(np.argmax(s[32])) - 32 in (-8, 8), dk
    (True, 0.015625)
    """
    check_pixel_size(pixel_size_nm, plausible=False)
    p = _power(image, valid, window)
    med = np.median(p)
    scale = med if med > 0 else max(p.max(), 1e-300)
    return np.log10(1.0 + p / scale).astype(np.float32), 1.0 / p.shape[0]


def find_spots(
    image: np.ndarray,
    *,
    valid: np.ndarray | None = None,
    pixel_size_nm: float | None = None,
    max_spots: int = 80,
    min_strength: float = 8.0,
    k_min_per_px: float | None = None,
    window: str = "hann",
) -> pd.DataFrame:
    """Strong spots of the power spectrum.

    Parameters
    ----------
    image : (H, W) array
        The micrograph.
    valid : (H, W) bool array, optional
        Validity mask.
    pixel_size_nm : float, optional
        Pixel size; without it the nm columns are NaN.
    max_spots : int
        Keep at most this many spots, strongest first.
    min_strength : float
        Minimum ratio of spot power to the azimuthal-average background at the same ``|k|``.
    k_min_per_px : float, optional
        Ignore frequencies below this (default ``4 / N``: the window's central lobe).
    window : {'hann', 'periodic_smooth'}
        As for :func:`power_spectrum`; the sub-pixel estimator follows the window.

    Returns
    -------
    DataFrame
        ``_schema.SPOTS`` columns: spot_id, kx_per_px, ky_per_px, k_per_nm, d_nm, d_px, angle_deg, strength, shell.
    """
    work = _windowed(image, valid, window)
    p = _power(image, valid, window, work=work)
    n = p.shape[0]
    c = n // 2
    ax = (np.arange(n) - c).astype(np.float32)
    rr = np.hypot(ax[None, :], ax[:, None])
    rbin = (rr + 0.5).astype(np.int32)
    logp = np.log(np.maximum(p, np.float32(1e-30)))
    counts = np.bincount(rbin.ravel())
    bg = (np.bincount(rbin.ravel(), weights=logp.ravel()) / np.maximum(counts, 1)).astype(np.float32)
    excess = ndimage.gaussian_filter(logp - bg[rbin], 0.7)
    kmin = (4.0 / n) if k_min_per_px is None else float(k_min_per_px)
    peaks = excess > np.log(min_strength)
    peaks &= (rr >= kmin * n) & (rr <= 0.5 * n - 2)
    cand_y, cand_x = np.nonzero(peaks)
    # local maxima over 5 x 5 among the candidates only (the full-image maximum filter was the slow part)
    keep = np.ones(len(cand_y), dtype=bool)
    pad = np.pad(excess, 2, mode="edge")
    for dy_ in range(-2, 3):
        for dx_ in range(-2, 3):
            if dy_ or dx_:
                keep &= excess[cand_y, cand_x] >= pad[cand_y + 2 + dy_, cand_x + 2 + dx_]
    peaks = np.zeros_like(peaks)
    peaks[cand_y[keep], cand_x[keep]] = True
    py, px = np.nonzero(peaks)
    if len(py) == 0:
        return empty_table(SPOTS)
    order = np.argsort(-excess[py, px])[:max_spots]
    py, px = py[order], px[order]

    # Sub-pixel: the two-bin amplitude ratio of a Hann-windowed sinusoid along each axis (exact for one plane
    # wave; Grandke 1983), which a parabola through the log power is not (biased by up to ~0.1 bin).
    amp = np.sqrt(p)
    offset = _hann_offset if window == "hann" else _rect_offset
    dx = offset(amp[py, px - 1], amp[py, px], amp[py, px + 1])
    dy = offset(amp[py - 1, px], amp[py, px], amp[py + 1, px])
    kx = (px + dx - c) / n
    ky = (py + dy - c) / n
    kx, ky = _refine_peaks(work, kx, ky)
    k = np.hypot(kx, ky)
    strength = np.exp(excess[py, px])

    shell = _split_shells(k, 1.0 / n)

    ps = pixel_size_nm
    df = pd.DataFrame(
        {
            "spot_id": np.arange(len(k)),
            "kx_per_px": kx,
            "ky_per_px": ky,
            "k_per_nm": k / ps if ps else np.nan,
            "d_nm": ps / k if ps else np.nan,
            "d_px": 1.0 / k,
            "angle_deg": np.degrees(np.arctan2(ky, kx)),
            "strength": strength,
            "shell": shell,
        }
    )
    return conform(_unindexed(df), SPOTS)


#: zoom steps of the spot refinement, in frequency bins: a 3 x 3 stencil at each spacing (one step suffices: the
#: two-bin start is within a few hundredths of a bin, where the log power is a parabola to well under 1e-3 bin)
_ZOOM_BINS = (0.2,)
#: the refinement costs 6 n^2 per spot; above this side (px) the spots keep the two-bin estimate (the bins are then
#: narrow enough that a few hundredths of a bin are below the phason shifts measured; docs/fourier.md)
_REFINE_MAX_SIDE = 2048


def _refine_peaks(work: np.ndarray, kx: np.ndarray, ky: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Spot positions refined on the continuous spectrum of the windowed image (no bin grid).

    The two-bin estimate is exact only for one plane wave alone in its bins; a quasicrystal's spots have
    neighbours (weak ones beside strong ones, Z-module spots closer than a few bins), whose leakage moves it by a
    few hundredths of a bin, which is the size of a phason shift ``W^T g_perp`` of a weak spot. Here ``|F(k)|^2``
    of the windowed image is evaluated off the grid on a 3 x 3 stencil around each spot (the DFT at arbitrary k,
    separable: one matrix product for all spots), the peak taken from a parabola through the log power, and
    the stencil shrunk (``_ZOOM_BINS``).
    """
    n = work.shape[0]
    if len(kx) == 0 or n > _REFINE_MAX_SIDE:
        return kx, ky
    pos = np.arange(n, dtype=np.float64)
    kx, ky = kx.astype(np.float64).copy(), ky.astype(np.float64).copy()
    w32 = np.asarray(work, dtype=np.float32)
    for step_bins in _ZOOM_BINS:
        t = np.array([-1.0, 0.0, 1.0]) * step_bins / n
        ex = np.exp(-2j * np.pi * (kx[:, None, None] + t[None, :, None]) * pos).astype(np.complex64)  # (S, 3, n)
        ey = np.exp(-2j * np.pi * (ky[:, None, None] + t[None, :, None]) * pos).astype(np.complex64)
        e2 = ex.reshape(-1, n).T
        g = (w32 @ np.ascontiguousarray(e2.real)) + 1j * (w32 @ np.ascontiguousarray(e2.imag))  # (n, 3 S)
        g = g.reshape(n, len(kx), 3).transpose(1, 0, 2)  # (S, n, 3)
        f = np.einsum("san,snb->sab", ey, g)  # (S, 3 ky, 3 kx)
        lp = np.log(np.maximum(np.abs(f) ** 2, 1e-300))

        def vertex(lo, mid, hi):
            den = lo - 2 * mid + hi
            with np.errstate(divide="ignore", invalid="ignore"):
                d = np.where(den < 0, 0.5 * (lo - hi) / den, 0.0)
            return np.clip(d, -1.0, 1.0)

        kx = kx + vertex(lp[:, 1, 0], lp[:, 1, 1], lp[:, 1, 2]) * step_bins / n
        ky = ky + vertex(lp[:, 0, 1], lp[:, 1, 1], lp[:, 2, 1]) * step_bins / n
    return kx, ky


def _hann_offset(lo: np.ndarray, mid: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """Sub-bin offset of a Hann-windowed peak from the amplitudes of the peak bin and its two neighbours.

    With ``a = A_next / A_peak`` for the larger neighbour, the offset towards it is ``(2 a - 1) / (a + 1)``
    (T. Grandke, IEEE Trans. Instrum. Meas. 32 (1983) 350).
    """
    right = hi >= lo
    nb = np.where(right, hi, lo)
    with np.errstate(divide="ignore", invalid="ignore"):
        a = nb / mid
        d = np.where(mid > 0, (2 * a - 1) / (a + 1), 0.0)
    return np.where(right, d, -d).clip(-0.5, 0.5)


def _rect_offset(lo: np.ndarray, mid: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """Sub-bin offset of an unwindowed (rectangular) peak: ``a / (1 + a)`` towards the larger neighbour, with
    ``a = A_next / A_peak`` (the Dirichlet-kernel ratio; B. G. Quinn, IEEE Trans. Signal Process. 42 (1994) 1264)."""
    right = hi >= lo
    nb = np.where(right, hi, lo)
    with np.errstate(divide="ignore", invalid="ignore"):
        a = nb / mid
        d = np.where(mid > 0, a / (1 + a), 0.0)
    return np.where(right, d, -d).clip(-0.5, 0.5)


def _unindexed(df: pd.DataFrame) -> pd.DataFrame:
    """The index columns of ``SPOTS`` filled as 'not indexed'."""
    for j in range(1, 5):
        df[f"h{j}"] = 0
    df["indexed"] = False
    for name in ("index_error", "g_par_nm_inv", "g_perp_nm_inv", "g_perp_rel"):
        df[name] = np.nan
    return df


def _split_shells(q: np.ndarray, min_gap: float) -> np.ndarray:
    """Shell index per spot: sort radii and split where neighbours differ by more than 3 % and ``min_gap``."""
    srt = np.argsort(q)
    gaps = np.diff(q[srt]) > np.maximum(0.03 * q[srt][1:], min_gap)
    shell = np.empty(len(q), dtype=np.int64)
    shell[srt] = np.concatenate([[0], np.cumsum(gaps)])
    return shell


def _shell_order(angles_rad: np.ndarray, weights: np.ndarray) -> dict[int, float]:
    z = {m: float(np.abs(np.sum(weights * np.exp(1j * m * angles_rad))) / np.sum(weights)) for m in _ORDERS}
    return z


def _describe_shells(shell_ids, ang, w, q, pixel_size_nm) -> tuple[list[dict], dict[int, float]]:
    """Per-shell radius, |psi_m| and rotational order, and the strength-weighted votes for each order."""
    shells, votes = [], {}
    for s in np.unique(shell_ids):
        sel = shell_ids == s
        psi = _shell_order(ang[sel], w[sel])
        order = next((m for m in _ORDERS if psi[m] > 0.7), 0) if sel.sum() >= 4 else 0
        kk = float(np.average(q[sel], weights=w[sel]))
        shells.append(
            {
                "shell": int(s),
                "k_per_px": kk,
                "d_px": 1.0 / kk,
                "d_nm": (pixel_size_nm / kk) if pixel_size_nm else None,
                "n_spots": int(sel.sum()),
                "strength": float(w[sel].sum()),
                "psi": {str(m): psi[m] for m in _ORDERS},
                "order": int(order),
            }
        )
        if order:
            votes[order] = votes.get(order, 0.0) + float(w[sel].sum())
    return shells, votes


def _ellipse_matrix(kx: np.ndarray, ky: np.ndarray, weight: np.ndarray) -> np.ndarray:
    """``M`` of ``k^T M k = 1`` fitted to spots by weighted least squares."""
    sw = np.sqrt(weight)
    a = np.stack([kx**2, 2 * kx * ky, ky**2], axis=1) * sw[:, None]
    sol, *_ = np.linalg.lstsq(a, sw, rcond=None)
    return np.array([[sol[0], sol[1]], [sol[1], sol[2]]])


def _ellipse(kx: np.ndarray, ky: np.ndarray, weight: np.ndarray) -> tuple[float, float] | None:
    """Axis ratio (>= 1) and major-axis angle (deg) of ``k^T M k = 1`` fitted to spots (weighted least squares)."""
    m = _ellipse_matrix(kx, ky, weight)
    w, v = np.linalg.eigh(m)
    if w[0] <= 0:
        return None
    # |k| is largest along the eigenvector of the smallest eigenvalue.
    ratio = float(np.sqrt(w[1] / w[0]))
    angle = float(np.degrees(np.arctan2(v[1, 0], v[0, 0])) % 180.0)
    return ratio, angle


def _ellipticity(kx: np.ndarray, ky: np.ndarray, weight: np.ndarray) -> dict:
    """Ellipticity of ``k^T M k = 1`` with its standard error from the scatter of the spots about the ellipse.

    The deviatoric part of ``M`` relative to its mean eigenvalue, ``e = ((M11 - M22) / 2, M12) / (tr M / 2)``,
    has length ``|e| ~ ratio - 1`` for small distortions. Its covariance comes from a heteroscedasticity-robust
    (HC1 sandwich) covariance of the weighted least-squares coefficients: the residuals are whatever keeps the spots
    off one ellipse (centroiding noise, an approximant's shells that are not circles, shells assigned across
    families), so the error is measured, not assumed. ``chi2 = e^T C^-1 e`` has two degrees of freedom when the
    shells are circles; the ellipticity is significant when its tail probability is below 0.001
    (``chi2 > 13.8``).

    References
    ----------
    H. White, Econometrica 48 (1980) 817-838 (heteroscedasticity-consistent covariance);
    J. G. MacKinnon, H. White, J. Econometrics 29 (1985) 305-325 (HC1 small-sample factor n / (n - p)).
    """
    out = {"ellipticity": float("nan"), "ellipticity_se": float("nan"), "ellipticity_chi2": float("nan"),
           "significant": False, "n_fit_spots": int(len(kx))}
    vec = _ellipticity_vector(kx, ky, weight)
    if vec is None:
        return out
    e, ce = vec
    try:
        chi2 = float(e @ np.linalg.solve(ce, e))
    except np.linalg.LinAlgError:
        chi2 = float("nan")
    out.update(ellipticity=float(np.hypot(*e)), ellipticity_se=float(np.sqrt(max(np.trace(ce), 0.0) / 2.0)),
               ellipticity_chi2=chi2, significant=bool(np.isfinite(chi2) and chi2 > _ELLIPSE_CHI2))
    return out


def _ellipticity_vector(kx, ky, weight):
    """``e`` and its HC1 covariance (see :func:`_ellipticity`), or None with too few spots."""
    sw = np.sqrt(weight)
    a = np.stack([kx**2, 2 * kx * ky, ky**2], axis=1)
    aw = a * sw[:, None]
    sol, *_ = np.linalg.lstsq(aw, sw, rcond=None)
    n, p = len(kx), 3
    tr = 0.5 * (sol[0] + sol[2])
    if n <= p or tr <= 0:
        return None
    resid = (1.0 - a @ sol) * weight  # weighted residual scores r_i w_i
    bread = np.linalg.pinv(aw.T @ aw)
    meat = (a * resid[:, None]).T @ (a * resid[:, None])
    cov = bread @ meat @ bread * n / (n - p)
    e = np.array([0.5 * (sol[0] - sol[2]), sol[1]]) / tr
    # Jacobian of e with respect to (M11, M12, M22)
    jac = np.array([[0.5 / tr - e[0] * 0.5 / tr, 0.0, -0.5 / tr - e[0] * 0.5 / tr],
                    [-e[1] * 0.5 / tr, 1.0 / tr, -e[1] * 0.5 / tr]])
    return e, jac @ cov @ jac.T


def _shell_consistency(kx, ky, weight, shell) -> dict:
    """Whether every shell is the same ellipse, as an affine scan distortion makes them.

    Per shell (at least 6 spots in 3 directions) the ellipticity vector and its covariance; heterogeneity
    ``chi2 = sum_s (e_s - e_mean)^T C_s^-1 (e_s - e_mean)`` (inverse-covariance weighted mean) with 2 (S - 1)
    degrees of freedom. A periodic approximant's shells deviate from circles shell by shell (its reciprocal lattice
    is not ten-fold), a distortion deforms them all alike (k' = D^-T k).

    References
    ----------
    W. G. Cochran, Biometrics 10 (1954) 101 (the homogeneity chi-square of several estimates).
    """
    from scipy.stats import chi2 as _chi2

    es, inv = [], []
    for sid in np.unique(shell):
        sel = shell == sid
        dirs = np.unique(np.round(np.degrees(np.arctan2(ky[sel], kx[sel])) % 180.0))
        if sel.sum() < 6 or len(dirs) < 3:
            continue
        vec = _ellipticity_vector(kx[sel], ky[sel], weight[sel])
        if vec is None:
            continue
        try:
            inv.append(np.linalg.inv(vec[1]))
        except np.linalg.LinAlgError:
            continue
        es.append(vec[0])
    out = {"n_shells_tested": len(es), "heterogeneity_chi2": None, "heterogeneity_p": None, "consistent": True}
    if len(es) < 2:
        return out
    es, inv = np.array(es), np.array(inv)
    mean = np.linalg.solve(inv.sum(axis=0), np.einsum("sij,sj->i", inv, es))
    d = es - mean
    chi2 = float(np.einsum("si,sij,sj->", d, inv, d))
    p = float(_chi2.sf(chi2, 2 * (len(es) - 1)))
    # refined spots are precise enough to resolve 1e-5 differences between shells; what a distortion cannot make
    # is shells whose ellipses differ by a sizeable part of the ellipticity itself
    scatter = float(np.sqrt(np.mean(np.sum(d**2, axis=1))) / max(np.hypot(*mean), 1e-12))
    out.update(heterogeneity_chi2=chi2, heterogeneity_p=p, relative_scatter=scatter,
               consistent=bool(p > 1e-3 or scatter <= _SHELL_SCATTER))
    return out


#: largest rms difference between the shells' ellipticity vectors, relative to their mean, that still counts as one
#: ellipse (an affine distortion gives the same ellipse to every shell; Tenfold's choice, not a published value)
_SHELL_SCATTER = 0.25


#: chi-square (2 degrees of freedom) above which a shell ellipse counts as measured: tail probability 0.001.
_ELLIPSE_CHI2 = -2.0 * math.log(1e-3)


def analyze_fourier(
    image: np.ndarray,
    *,
    valid: np.ndarray | None = None,
    pixel_size_nm: float | None = None,
    max_spots: int = 80,
    min_strength: float = 8.0,
    distortion_warn: float = 0.005,
    index_spots: int = 300,
    edge_px: float | None = None,
    orientation_deg: float | None = None,
    rng: np.random.Generator | int | None = 0,
    window: str = "hann",
) -> tuple[pd.DataFrame, dict]:
    """Spots, rotational order, decagonal indexing, scan distortion and phason strain from the power spectrum.

    Parameters
    ----------
    image, valid, pixel_size_nm, min_strength
        As for :func:`find_spots`.
    max_spots : int
        The strongest spots used for the shells, the rotational order and the shell ellipse.
    distortion_warn : float
        Axis ratio minus one above which the summary warns of scan distortion or anisotropic calibration
        (0.005 = 0.5 %; common practice for drift/scan checks, not a published threshold).
    index_spots : int
        Spots (strongest first) offered to the decagonal indexing; weak spots far out in perpendicular space carry
        the phason signal.
    edge_px, orientation_deg
        Tiling edge and orientation from real space, passed to :func:`index_decagonal` (fix the tau-scaling and
        the labelling of the five directions).
    rng : Generator or int seed
        For the uncertainty draws of the indexing fit.
    window : {'hann', 'periodic_smooth'}
        As for :func:`power_spectrum` (recorded as ``info['window']``).

    Returns
    -------
    spots : DataFrame
        ``_schema.SPOTS`` table (``shell`` is -1 for spots beyond ``max_spots``).
    info : dict
        JSON-safe: ``n_spots``, ``shells`` (per shell: k_per_px, d_px, d_nm, n_spots, psi per order, order),
        ``rotational_order`` and ``dominant_order`` (the order of the strongest shells, 0 if none), ``distortion``
        (axis_ratio, major_axis_deg, shells used, metric, warning), ``distortion_matrix`` (2x2, x-y order, maps
        measured positions to corrected ones, unit determinant; the identity when none is found),
        ``distortion_source`` ('indexing', 'shell_ellipse' or 'none'), ``basis_nm_inv``, ``orientation_deg``,
        ``indexing`` (see :func:`index_decagonal`), ``lattice`` (periodic patterns: two reciprocal and real
        lattice vectors), ``notes``.
    """
    every = find_spots(image, valid=valid, pixel_size_nm=pixel_size_nm, max_spots=max(max_spots, index_spots),
                       min_strength=min_strength, window=window)
    spots, info = _order_and_shells(every.iloc[:max_spots].copy(), image, pixel_size_nm, distortion_warn)
    every["shell"] = -1
    every.loc[: len(spots) - 1, "shell"] = spots["shell"].to_numpy()
    info["dominant_order"] = info["rotational_order"]
    info["window"] = window
    info["distortion_matrix"] = np.eye(2).tolist()
    info["distortion_source"] = "none"
    info["basis_nm_inv"] = None
    info["orientation_deg"] = None
    info["indexing"] = None
    info["lattice"] = None
    n_image = min(np.shape(image)) // 2 * 2
    order = info["rotational_order"]
    if info["distortion"] is not None:
        info["distortion_matrix"] = _upper_from_metric(np.asarray(info["distortion"]["metric"])).tolist()
        info["distortion_source"] = "shell_ellipse"
    if order == 10:
        metric = info["distortion"]["metric"] if info["distortion"] else None
        every, idx = index_decagonal(every, n_image=n_image, pixel_size_nm=pixel_size_nm, edge_px=edge_px,
                                     orientation_deg=orientation_deg, metric=metric, rng=rng,
                                     window_weighted=window == "hann")
        info["indexing"] = idx
        info["notes"].extend(idx.get("notes", []))
        if idx["ok"]:
            info["distortion_matrix"] = idx["distortion_matrix"]
            info["distortion_source"] = "indexing"
            info["basis_nm_inv"] = idx["basis_nm_inv"]
            info["orientation_deg"] = idx["orientation_deg"]
            _shell_note_against_indexing(info, distortion_warn)
    elif order in (2, 4, 6) and len(spots) >= 2:
        info["lattice"] = _best_lattice(every, n_image, pixel_size_nm)
        info["notes"].append(
            f"periodic {order}-fold spot pattern: described by a 2-D lattice (see fourier.lattice); the decagonal "
            "indexing does not apply"
        )
    return conform(every, SPOTS), info


def _shell_note_against_indexing(info: dict, distortion_warn: float) -> None:
    """Withdraw the shell-ellipse note when the decagonal indexing finds no distortion of that size.

    The shell ellipse takes every departure from circles for a distortion. The indexing separates the two
    causes: a distortion moves spots in proportion to ``g_par`` (the B term), a linear phason strain, which is what
    makes a periodic approximant, in proportion to ``g_perp`` (the C term; Lubensky et al. 1986). When B holds no
    distortion above ``distortion_warn`` and 3 standard errors, the shells' ellipticity is the phason term's.
    """
    dist = info.get("distortion")
    if not dist or not dist.get("warning"):
        return
    corr = np.asarray(info["indexing"]["distortion_matrix"], dtype=float)
    sv = np.linalg.svd(corr, compute_uv=False)
    significant, _ = _distortion_significant(info)
    if sv[0] / sv[1] - 1.0 > distortion_warn and significant:
        return
    dist["warning"] = False
    info["notes"] = [n for n in info["notes"] if "shells are elliptical" not in n]
    info["notes"].append(
        f"the Fourier spot shells are elliptical (axis ratio {dist['axis_ratio']:.4f}), but the decagonal indexing "
        f"finds the scan distortion at {sv[0] / sv[1]:.4f} and puts the rest into the phason term (a periodic "
        "approximant or a phason strain), not a scan distortion")


def _upper_from_metric(metric: np.ndarray) -> np.ndarray:
    """Correction ``U^-1`` (unit determinant) for a shell ellipse ``k^T M k = const``, ``M ~ U U^T``.

    A real-space distortion ``r' = D r`` makes ``M`` proportional to ``D D^T``; taking D upper triangular (the
    fast-scan axis x keeps its direction) makes the split unique: a Cholesky factorisation with the axes swapped.
    """
    flip = np.array([[0.0, 1.0], [1.0, 0.0]])
    try:
        low = np.linalg.cholesky(flip @ metric @ flip)
    except np.linalg.LinAlgError:
        return np.eye(2)
    u = flip @ low @ flip
    corr = np.linalg.inv(u)
    return corr / np.sqrt(abs(np.linalg.det(corr)))


def _best_lattice(spots: pd.DataFrame, n_image: int, pixel_size_nm: float | None) -> dict:
    """Two reciprocal vectors spanning the strong spots, and the real-space lattice they imply."""
    k = spots[["kx_per_px", "ky_per_px"]].to_numpy(dtype=float)
    w = spots["strength"].to_numpy(dtype=float)
    strong = np.argsort(-w)[: max(6, min(len(w), 30))]
    ks = k[strong]
    order = np.argsort(np.hypot(ks[:, 0], ks[:, 1]))
    a1 = ks[order[0]]
    rest = ks[order[1:]]
    cross = np.abs(a1[0] * rest[:, 1] - a1[1] * rest[:, 0]) / (np.hypot(*a1) * np.hypot(rest[:, 0], rest[:, 1]))
    cand = rest[cross > 0.3]
    if len(cand) == 0:
        return {"ok": False}
    a2 = cand[np.argmin(np.hypot(cand[:, 0], cand[:, 1]))]
    basis = np.stack([a1, a2], axis=1)  # columns a1*, a2*
    hk = np.linalg.solve(basis, k.T).T
    idx = np.rint(hk)
    err = np.hypot(*(k - idx @ basis.T).T) / np.maximum(np.hypot(k[:, 0], k[:, 1]), 1e-12)
    fits = err < 0.01 + 1.0 / (n_image * np.maximum(np.hypot(k[:, 0], k[:, 1]), 1e-12))
    real = np.linalg.inv(basis).T  # columns: real-space a1, a2 in px (a_i . a_j* = delta_ij)
    ps = pixel_size_nm
    return {
        "ok": True,
        "reciprocal_per_px": basis.T.tolist(),
        "real_px": real.T.tolist(),
        "real_nm": (real.T * ps).tolist() if ps else None,
        "lengths_px": np.hypot(real[0], real[1]).tolist(),
        "angle_deg": float(np.degrees(np.arccos(np.clip(real[:, 0] @ real[:, 1] / np.prod(np.hypot(real[0], real[1])), -1, 1)))),
        "fraction_indexed": float(fits.mean()),
    }


def _order_and_shells(spots: pd.DataFrame, image, pixel_size_nm, distortion_warn) -> tuple[pd.DataFrame, dict]:
    """Shells, rotational order and the shell ellipse of the strongest spots (``analyze_fourier`` steps 1-2)."""
    info: dict = {"n_spots": int(len(spots)), "shells": [], "rotational_order": 0, "distortion": None, "notes": []}
    if len(spots) == 0:
        info["notes"].append("no Fourier spots above the background: no order or distortion estimate")
        return spots, info
    ang = np.radians(spots["angle_deg"].to_numpy())
    w = spots["strength"].to_numpy()
    k = np.hypot(spots["kx_per_px"].to_numpy(), spots["ky_per_px"].to_numpy())
    kx_all = spots["kx_per_px"].to_numpy()
    ky_all = spots["ky_per_px"].to_numpy()
    min_gap = 1.0 / (min(np.shape(image)) // 2 * 2)  # one frequency step of the square spectrum
    # A distortion turns shells into ellipses and smears them in |k|, so shells are re-split in the metric the
    # current ellipse fit corrects (q^2 = k^T M k with det M = 1), and the fit repeated until it settles.
    metric = np.eye(2)
    fit = fit_spots = fit_shells = None
    for _ in range(4):
        q = np.sqrt(np.einsum("ni,ij,nj->n", np.stack([kx_all, ky_all], 1), metric, np.stack([kx_all, ky_all], 1)))
        shell_ids = _split_shells(q, min_gap)
        shells, votes = _describe_shells(shell_ids, ang, w, q, pixel_size_nm)
        order = int(max(votes, key=votes.get)) if votes else 0
        used = [sh for sh in shells if sh["order"] == order and sh["order"] > 0]
        new_fit = None
        if used:
            sel = np.isin(shell_ids, [sh["shell"] for sh in used])
            radius = {sh["shell"]: sh["k_per_px"] for sh in used}
            norm = np.array([radius[v] for v in shell_ids[sel]])
            kx, ky = kx_all[sel] / norm, ky_all[sel] / norm
            if len(np.unique(np.round(np.degrees(np.arctan2(ky, kx)) % 180.0))) >= 3:
                new_fit = _ellipse(kx, ky, w[sel])
        if new_fit is None:
            break
        fit = new_fit
        fit_spots = (kx, ky, w[sel])
        fit_shells = shell_ids[sel]
        m = _ellipse_matrix(kx, ky, w[sel])
        metric_new = m / np.sqrt(np.linalg.det(m))
        if np.allclose(metric_new, metric, atol=1e-5):
            break
        metric = metric_new
    spots["shell"] = shell_ids
    info["shells"] = shells
    info["rotational_order"] = order
    if fit is not None:
        ratio, angle = fit
        ell = _ellipticity(*fit_spots)
        same = _shell_consistency(*fit_spots, fit_shells)
        # a note needs all three: a size worth worrying about, a measurement that is not the shells' own scatter,
        # and one ellipse for every shell (a distortion's signature; an approximant's shells differ)
        warn = ratio - 1.0 > distortion_warn and ell["significant"] and same["consistent"]
        info["distortion"] = {
            "axis_ratio": ratio,
            "major_axis_deg": angle,
            "shells_used": [sh["shell"] for sh in used],
            "metric": metric.tolist(),
            "warning": bool(warn),
            **ell,
            "shells": same,
        }
        if ratio - 1.0 > distortion_warn and ell["significant"] and not same["consistent"]:
            info["notes"].append(
                f"the Fourier spot shells deviate from circles (axis ratio {ratio:.4f}) but differently from shell "
                f"to shell (heterogeneity chi-square {same['heterogeneity_chi2']:.0f} for "
                f"{2 * (same['n_shells_tested'] - 1)} degrees of freedom): a structural anisotropy such as a "
                "periodic approximant, not the one ellipse a scan distortion would make")
        if warn:
            info["notes"].append(
                f"the Fourier spot shells are elliptical (axis ratio {ratio:.4f}, ellipticity "
                f"{ell['ellipticity']:.4f} +- {ell['ellipticity_se']:.4f}): distances along different "
                f"directions differ by {100 * (ratio - 1):.2f} %; suspect scan distortion, drift or an anisotropic "
                "pixel size (or, in a periodic approximant, its own anisotropic cell: one image cannot tell them "
                "apart), and treat tau-ratio deviations of that size with care"
            )
    else:
        info["notes"].append("too few symmetric Fourier spot shells: scan distortion not estimated")
    return spots, info


# ----------------------------------------------------------------------------------------------------------------
# Decagonal indexing, scan distortion and phason strain from the spots
# ----------------------------------------------------------------------------------------------------------------

#: Largest |h_j| searched when indexing (11^4 candidate index vectors).
_H_MAX = 5
#: Index tolerances (fraction of |k|, plus 3/4 of a frequency step) of the successive passes, and whether the
#: phason term is fitted in that pass: looser first, then tight (the start is already corrected for the shell
#: ellipticity, so the scan distortion is known to ~1e-3 from the beginning; the dense Z-module
#: offers a candidate near any point, so a loose final tolerance would pick wrong indices at large |k|).
_TOLERANCES = ((0.012, False), (0.006, False), (0.004, False), (0.004, True))
#: Largest |g_perp| / a* accepted for an index vector (spots farther out in perpendicular space are too weak to
#: be seen in an image; the bound also keeps the Z-module's dense set of candidates finite).
_GPERP_MAX = 4.0


@functools.lru_cache(maxsize=4)
def _candidates(h_max: int = _H_MAX) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """All index vectors h (4 integers) with their canonical g_par and g_perp (basis length 1, orientation 0)."""
    from ._pentagrid import E_PAR, E_PERP

    r = np.arange(-h_max, h_max + 1)
    # |g_perp| <= _GPERP_MAX is tested on the broadcast sum of the four perpendicular components (float32), so
    # only the few per cent of index vectors that pass are ever materialised
    px = sum(r.reshape([-1 if i == j else 1 for i in range(4)]).astype(np.float32) * np.float32(E_PERP[j + 1, 0])
             for j in range(4))
    py = sum(r.reshape([-1 if i == j else 1 for i in range(4)]).astype(np.float32) * np.float32(E_PERP[j + 1, 1])
             for j in range(4))
    idx = np.nonzero(px * px + py * py <= np.float32(_GPERP_MAX**2 * (1 + 1e-5)))
    h = np.stack(idx, axis=1).astype(np.int64) - h_max
    h = h[np.any(h != 0, axis=1)]
    gperp = h @ E_PERP[1:]
    keep = np.hypot(gperp[:, 0], gperp[:, 1]) <= _GPERP_MAX
    h = h[keep]
    return h, h @ E_PAR[1:], gperp[keep]


def _assign(k: np.ndarray, b: np.ndarray, cand, tol_rel: float, tol_abs: float) -> tuple[np.ndarray, np.ndarray]:
    """Index of the best candidate per spot (-1 if none within tolerance): the smallest |g_perp| among those
    predicted within ``tol_rel |k| + tol_abs`` of the spot. Returns (candidate row, distance).

    Predictions use B alone: a phason strain moves spots by ``W^T g_perp``, far less than the tolerance for the
    small-|g_perp| spots that are seen, while letting a fitted C steer the assignment would let wrong
    high-|g_perp| indices confirm a spurious strain."""
    from scipy.spatial import cKDTree

    h, gpar, gperp = cand
    pred = gpar @ b.T
    tree = cKDTree(pred)
    kk = np.hypot(k[:, 0], k[:, 1])
    radius = tol_rel * kk + tol_abs
    nn = min(48, len(pred))
    dist, idx = tree.query(k, k=nn)
    inside = dist <= radius[:, None]
    perp = np.hypot(gperp[idx, 0], gperp[idx, 1])
    # smallest |g_perp| first; among equal |g_perp| (same star) the nearest
    score = np.where(inside, perp + 1e-6 * dist / np.maximum(radius[:, None], 1e-12), np.inf)
    best = np.argmin(score, axis=1)
    rows = np.arange(len(k))
    found = np.isfinite(score[rows, best])
    return np.where(found, idx[rows, best], -1), np.where(found, dist[rows, best], np.nan)


def _fit_affine(k, gpar, gperp, weight, phason: bool):
    """Least squares ``k = B g_par + C g_perp`` (C = 0 without phason); parameter vectors and covariances."""
    x = np.hstack([gpar, gperp]) if phason else gpar
    sw = np.sqrt(weight)[:, None]
    xw = x * sw
    coefs, covs = [], []
    for axis in range(2):
        yw = k[:, axis] * sw[:, 0]
        sol, *_ = np.linalg.lstsq(xw, yw, rcond=None)
        res = yw - xw @ sol
        dof = max(len(yw) - x.shape[1], 1)
        cov = np.linalg.pinv(xw.T @ xw) * float(res @ res) / dof
        coefs.append(sol)
        covs.append(cov)
    p = x.shape[1]
    b = np.array([coefs[0][:2], coefs[1][:2]])
    c = np.array([coefs[0][2:4], coefs[1][2:4]]) if phason else np.zeros((2, 2))
    return b, c, coefs, covs, p


def _rot(deg: float) -> np.ndarray:
    a = np.radians(deg)
    return np.array([[np.cos(a), -np.sin(a)], [np.sin(a), np.cos(a)]])


def _rq_upper(h: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``h = U Q`` with U upper triangular and Q a rotation (2x2, Givens rotation zeroing ``U[1, 0]``)."""
    a, bb = h[1, 0], h[1, 1]
    r = np.hypot(a, bb)
    q = np.array([[bb / r, -a / r], [a / r, bb / r]])
    return h @ q.T, q


def _decompose(b: np.ndarray, c: np.ndarray) -> dict:
    """Basis length, orientation, distortion (unit-determinant correction) and phason strain from (B, C)."""
    det = float(np.linalg.det(b))
    a_star = float(np.sqrt(abs(det)))
    h = np.linalg.inv(b).T  # real-space map from the canonical frame to the image: U Q / a*
    u, q = _rq_upper(h * a_star)
    u = u / np.sqrt(abs(np.linalg.det(u)))
    corr = np.linalg.inv(u)
    theta = float(np.degrees(np.arctan2(q[1, 0], q[0, 0])))
    strain = c.T @ u / a_star
    return {"a_star": a_star, "theta": theta, "u": u, "correction": corr, "strain": strain, "det_sign": np.sign(det)}


def _fit_summary(k, cand, rows, weight, phason, n_draws, rng):
    h, gpar, gperp = cand
    b, c, coefs, covs, p = _fit_affine(k, gpar[rows], gperp[rows], weight, phason)
    best = _decompose(b, c)
    gen = np.random.default_rng(rng)
    draws = [gen.multivariate_normal(coefs[a], covs[a], size=n_draws, check_valid="ignore") for a in range(2)]
    corr_s, strain_s, sv_s, theta_s, astar_s = [], [], [], [], []
    for i in range(n_draws):  # a few hundred parameter draws, not a loop over spots
        bi = np.array([draws[0][i, :2], draws[1][i, :2]])
        ci = np.array([draws[0][i, 2:4], draws[1][i, 2:4]]) if phason else np.zeros((2, 2))
        d = _decompose(bi, ci)
        corr_s.append(d["correction"])
        strain_s.append(d["strain"])
        sv_s.append(np.linalg.svd(d["strain"], compute_uv=False))
        theta_s.append(d["theta"])
        astar_s.append(d["a_star"])
    pred = gpar[rows] @ b.T + gperp[rows] @ c.T
    return b, c, best, {
        "correction_se": np.std(corr_s, axis=0),
        "strain_se": np.std(strain_s, axis=0),
        "sv_se": np.std(sv_s, axis=0),
        "theta_se": float(np.std(theta_s)),
        "a_star_se": float(np.std(astar_s)),
        "residual": np.hypot(*(k - pred).T),
    }


def index_decagonal(
    spots: pd.DataFrame,
    *,
    n_image: int,
    pixel_size_nm: float | None = None,
    edge_px: float | None = None,
    orientation_deg: float | None = None,
    metric: np.ndarray | None = None,
    phason: bool = True,
    n_draws: int = 300,
    rng: np.random.Generator | int | None = 0,
    window_weighted: bool = True,
) -> tuple[pd.DataFrame, dict]:
    """Index Fourier spots on the decagonal basis and fit scan distortion and linear phason strain.

    Every spot gets four integers ``h1..h4`` with ``g = sum_j h_j a*_j``, the basis ``a*_j = a* e_j`` four unit
    vectors at ``orientation + 72 j`` deg (j = 1..4; the fifth, at ``orientation``, is minus their sum). Its
    perpendicular-space partner is ``g_perp = a* sum_j h_j e_perp_j`` with ``e_perp_j`` at ``144 j`` deg. The
    observed positions are then fitted by least squares as ``k = B g_par + C g_perp`` (canonical ``g``: a* = 1,
    orientation 0), which is linear in the eight entries of B and C:

    * ``B = a* U^-T R(orientation)``: basis length, orientation and the scan distortion ``U`` (upper triangular,
      unit determinant: the fast-scan axis x keeps its direction, so U holds the x/y scale difference and the
      shear). The correction ``U^-1`` maps measured positions to corrected ones.
    * ``C = a* U^-T W^T``: a linear phason strain ``x_perp = W x_par`` shifts every spot by ``W^T g_perp``
      (Lubensky, Socolar, Steinhardt, Bancel & Heiney 1986), so ``W = C^T U / a*`` in the corrected image frame.

    Parameters
    ----------
    spots : DataFrame
        ``_schema.SPOTS`` table (``kx_per_px``, ``ky_per_px``, ``strength``).
    n_image : int
        Side of the square the spectrum was taken on, px (one frequency step is ``1 / n_image``).
    pixel_size_nm : float, optional
        For the ``*_nm_inv`` columns (NaN without it).
    edge_px : float, optional
        Tiling edge length in px (from the cluster network). Fixes the tau-scaling of the basis: the 5-D lattice
        with edge L has reciprocal basis ``a* = 1 / (5/2 L)``; the basis is the tau^n multiple of the spot
        star nearest to it. Without it the convention is intensity-based (see Notes) and the phason strain is only
        defined up to factors of tau^2.
    orientation_deg : float, optional
        Preferred orientation (e.g. of the real-space edges); the fitted one is reported in the 36-deg period
        nearest to it so both sides label the five directions alike.
    metric : (2, 2) array, optional
        Shell ellipse ``k^T M k = const`` with det M = 1 (from :func:`analyze_fourier`): the starting basis is
        distorted by ``M^-1/2`` so that the first pass already allows for the scan distortion.
    phason : bool
        Fit C (default True); False fits B alone.
    n_draws : int
        Parameter draws for the uncertainties of derived quantities (from the least-squares covariance).
    rng : Generator or int seed
        For those draws.
    window_weighted : bool
        The spectrum was Hann-windowed (True) or not (periodic-plus-smooth): selects the finite-field floor
        added to the phason-strain uncertainty (Notes).

    Returns
    -------
    spots : DataFrame
        The input with ``h1..h4``, ``indexed``, ``index_error`` (|k - k_fit| / |k|), ``g_par_nm_inv``,
        ``g_perp_nm_inv``, ``g_perp_rel`` (|g_perp| / a*).
    info : dict
        JSON-safe: ``ok``, ``n_indexed``, ``n_spots``, ``basis_per_px``, ``basis_nm_inv``, ``orientation_deg``
        (+ ``_se``), ``tau_scale`` ('real_space' or 'intensity'), ``distortion_matrix`` (2x2, unit determinant) and
        ``distortion_matrix_se``, ``scale_x_over_y``, ``shear``, ``phason`` (``strain_matrix``,
        ``strain_matrix_se``, ``singular_values`` (noise bias removed), ``singular_values_plain``,
        ``singular_values_se``, ``zero_chi2``, ``zero_p``, ``significant``, ``n_used``; see
        :func:`._strain.strain_summary`), ``rms_index_error``, ``notes``.

    Notes
    -----
    The Fourier module of a decagonal quasicrystal is closed under multiplication by tau, so the basis length is
    fixed only up to tau^n; |g_perp| of a given spot grows by tau^2 with every step up. With the real-space edge
    the choice is physical. Without it, the strongest spot star is indexed with |g_perp| / |g_par| in
    [tau^-2, 1) (a convention of this program; the strongest stars of decorated Penrose tilings commonly have the
    smallest perpendicular component, e.g. Steurer & Deloudi, Crystallography of Quasicrystals, Springer 2009,
    from memory).

    References
    ----------
    T. C. Lubensky, J. E. S. Socolar, P. J. Steinhardt, P. A. Bancel, P. A. Heiney, "Distortion and peak
    broadening in quasicrystal diffraction patterns", Phys. Rev. Lett. 57 (1986) 1440.
    """
    from ._pentagrid import TAU

    out = _unindexed(spots.copy())
    info: dict = {"ok": False, "n_spots": int(len(spots)), "n_indexed": 0, "notes": []}
    if len(spots) < 8:
        info["notes"].append(f"decagonal indexing needs at least 8 spots, found {len(spots)}")
        return out, info
    k = spots[["kx_per_px", "ky_per_px"]].to_numpy(dtype=float)
    w = spots["strength"].to_numpy(dtype=float)
    kk = np.hypot(k[:, 0], k[:, 1])
    ang = np.arctan2(k[:, 1], k[:, 0])
    # starting basis: the strongest spot's star gives length and orientation (10-fold phase of the strong spots)
    strongest = int(np.argmax(w))
    k0 = kk[strongest]
    near = np.abs(kk - k0) < 0.03 * k0
    theta0 = np.angle(np.sum(w[near] * np.exp(10j * ang[near]))) / 10.0
    if orientation_deg is not None:
        ref = np.radians(orientation_deg)
        theta0 = ref + (theta0 - ref + np.pi / 10) % (np.pi / 5) - np.pi / 10
    step = 1.0 / n_image
    if edge_px is not None and edge_px > 0:
        # the 5-D lattice with tiling edge L has the reciprocal basis a* = 1 / (5/2 L): fixed, only orientation
        # (basis star along the strongest spots or halfway between them) is searched
        a_ref = 1.0 / (2.5 * float(edge_px))
        h_max = int(np.clip(np.ceil(np.percentile(kk, 90) / a_ref), _H_MAX, 12))
        starts = [(a_ref, theta0), (a_ref, theta0 + np.pi / 10)]
        info["tau_scale"] = "real_space"
    else:
        # the strongest star lies along the basis directions (|g| = a* tau^n) or halfway between them
        # (|g| = 2 cos 18 a* tau^n, e.g. e_1 - e_4): both families of starting bases are tried
        h_max = _H_MAX
        starts = [(k0 * TAU**m, theta0) for m in (0, -1, 1)]
        starts += [(k0 / (2 * np.cos(np.pi / 10)) * TAU**m, theta0 + np.pi / 10) for m in (0, -1, 1)]
        info["tau_scale"] = "intensity"
    cand = _candidates(h_max)
    best = None
    pre = np.eye(2)
    if metric is not None:
        ev, evec = np.linalg.eigh(np.asarray(metric, dtype=float))
        if np.all(ev > 0):
            pre = evec @ np.diag(ev**-0.5) @ evec.T
            pre /= np.sqrt(np.linalg.det(pre))
    for a0, t0 in starts:
        rot = np.array([[np.cos(t0), -np.sin(t0)], [np.sin(t0), np.cos(t0)]])
        b, c = a0 * pre @ rot, np.zeros((2, 2))
        # loose first (scan distortion of a few % is not yet known), strongest spots only, then tighter on all
        for rel, use_phason in _TOLERANCES:
            rows, dist = _assign(k, b, cand, rel, 0.75 * step)
            ok = rows >= 0
            if ok.sum() < 8:
                break
            fit_phason = use_phason and phason and ok.sum() >= 12
            b, c, *_ = _fit_affine(k[ok], cand[1][rows[ok]], cand[2][rows[ok]], w[ok], fit_phason)
        # strong spots sit close to the origin of perpendicular space: a wrong basis indexes them at large |g_perp|
        perp = np.hypot(*cand[2][rows[ok]].T)
        score = float(np.sum(w[ok] * np.exp(-0.5 * perp**2))) if ok.sum() >= 8 else -1.0
        if info["tau_scale"] == "real_space" and abs(np.sqrt(abs(np.linalg.det(b))) / a0 - 1) > 0.03:
            score = -1.0  # drifted to another basis of the module (e.g. the index-5 sublattice of strong spots)
        if score > 0 and (best is None or score > best[0]):
            best = (score, b, c)
    if best is None:
        info["notes"].append("decagonal indexing failed: fewer than 8 spots fit the ten-fold basis")
        return out, info
    _, b, c = best
    if info["tau_scale"] == "intensity":
        rows, _ = _assign(k, b, cand, _TOLERANCES[-1][0], 0.75 * step)
        r = rows[strongest]
        ratio = (np.hypot(*cand[2][r]) / np.hypot(*cand[1][r])) if r >= 0 else 0.5
        # |g_perp| / |g_par| of a spot scales by tau^2 per step up of a*: bring the strongest into [tau^-2, 1)
        n_up = -(int(np.floor(np.log(ratio) / np.log(TAU**2))) + 1)
        if n_up:  # a* -> a* tau^n: B scales by tau^n and C by (-1/tau)^n in the new indices
            b = b * TAU**n_up
            c = c * (-1.0 / TAU) ** n_up
        info["notes"].append(
            "decagonal basis length chosen by the intensity convention (no tiling edge given): the phason strain "
            "from the spots is defined only up to factors of tau^2 = 2.618"
        )
    phason_fit = phason
    for _ in range(3):
        rows, dist = _assign(k, b, cand, _TOLERANCES[-1][0], 0.75 * step)
        ok = rows >= 0
        if ok.sum() < 8:
            info["notes"].append("decagonal indexing failed after the tau-scale choice")
            return out, info
        phason_fit = phason and ok.sum() >= 12
        b, c, *_ = _fit_affine(k[ok], cand[1][rows[ok]], cand[2][rows[ok]], w[ok], phason_fit)
    # label the five directions in the agreed period (orientation in [0, 36) deg, or within 18 deg of the hint):
    # turning the labels by 36 m deg turns g_par by 36 m and g_perp by 252 m deg (R36 e_j = -e_(j+3))
    lo = 0.0 if orientation_deg is None else float(orientation_deg) - 18.0
    theta_fit = _decompose(b, c)["theta"]
    m = int(np.floor((theta_fit - lo) / 36.0))
    if m:
        b = b @ _rot(-36.0 * m)
        c = c @ _rot(-252.0 * m)
        rows, _ = _assign(k, b, cand, _TOLERANCES[-1][0], 0.75 * step)
        ok = rows >= 0
    # a spot and its Friedel mate carry the same information: fit one of each pair
    half = ok & ((k[:, 1] > 0) | ((k[:, 1] == 0) & (k[:, 0] > 0)))
    use = half if half.sum() >= 8 else ok
    b, c, dec, unc = _fit_summary(k[use], cand, rows[use], w[use], phason_fit, n_draws, rng)
    unc["residual"] = np.hypot(*(k[ok] - cand[1][rows[ok]] @ b.T - cand[2][rows[ok]] @ c.T).T)
    theta = dec["theta"]
    # finite-field floor of the phason-strain estimate: rms per matrix element of the Hann-weighted slope over
    # ideal pentagrid tilings, 0.92 (L / half field)^2, unweighted 0.51 (L / half field)^2 (Tenfold's own
    # simulation, 30 tilings each at 5 to 40 edges; the square law is the hyperuniformity of quasiperiodic sets)
    half_field = 0.5 * n_image * 2.5 * dec["a_star"]  # half the field in edge lengths, L = 1 / (5/2 a*)
    floor = (0.92 if window_weighted else 0.51) / half_field**2
    unc["strain_se"] = np.sqrt(unc["strain_se"] ** 2 + floor**2)
    unc["sv_se"] = np.sqrt(unc["sv_se"] ** 2 + floor**2)
    h_idx = cand[0][rows[ok]]
    for j in range(4):
        col = np.zeros(len(out), dtype=np.int64)
        col[ok] = h_idx[:, j]
        out[f"h{j + 1}"] = col
    out["indexed"] = ok
    a_star = dec["a_star"]
    gpar_abs = np.full(len(out), np.nan)
    gperp_abs = np.full(len(out), np.nan)
    gpar_abs[ok] = a_star * np.hypot(*cand[1][rows[ok]].T)
    gperp_abs[ok] = a_star * np.hypot(*cand[2][rows[ok]].T)
    err = np.full(len(out), np.nan)
    err[ok] = unc["residual"] / kk[ok]
    out["index_error"] = err
    out["g_perp_rel"] = gperp_abs / a_star
    ps = pixel_size_nm
    out["g_par_nm_inv"] = gpar_abs / ps if ps else np.nan
    out["g_perp_nm_inv"] = gperp_abs / ps if ps else np.nan
    corr = dec["correction"]
    strain = dec["strain"]
    u = dec["u"]
    info.update({
        "ok": True,
        "n_indexed": int(ok.sum()),
        "basis_per_px": a_star,
        "basis_per_px_se": unc["a_star_se"],
        "basis_nm_inv": (a_star / ps) if ps else None,
        "orientation_deg": float(theta),
        "orientation_deg_se": unc["theta_se"],
        "distortion_matrix": corr.tolist(),
        "distortion_matrix_se": unc["correction_se"].tolist(),
        "scale_x_over_y": float(u[0, 0] / u[1, 1]),
        "shear": float(u[0, 1] / u[1, 1]),
        "rms_index_error": float(np.sqrt(np.mean(err[ok] ** 2))),
        "phason": {
            "strain_matrix": strain.tolist(),
            "strain_matrix_se": unc["strain_se"].tolist(),
            **strain_summary(strain, unc["strain_se"]),
            "singular_values_se": unc["sv_se"].tolist(),
            "n_used": int(use.sum()),
            "fitted": bool(phason_fit),
            "finite_field_floor": float(floor),
        },
    })
    return out, info


# ----------------------------------------------------------------------------------------------------------------
# Pipeline glue: the Fourier stage and the scan-distortion correction of the columns
# ----------------------------------------------------------------------------------------------------------------


def _distortion_significant(info: dict) -> tuple[bool, float]:
    """Whether the correction differs from the identity by more than 3 standard errors (and that deviation)."""
    d = np.asarray(info["distortion_matrix"], dtype=float) - np.eye(2)
    se = (info.get("indexing") or {}).get("distortion_matrix_se")
    dev = float(np.max(np.abs(d)))
    if se is None:
        return dev > 1e-3, dev
    se = np.asarray(se, dtype=float)
    return bool(np.any(np.abs(d) > 3 * np.maximum(se, 1e-12))), dev


def correct_columns(result, micrograph, *, fourier_window: str = "hann") -> dict:
    """Measure the scan distortion from the spectrum and apply it to the column positions of ``result``.

    Positions are mapped about the image centre ``c`` as ``r' = D (r - c) + c`` with ``D`` the unit-determinant
    ``distortion_matrix`` of :func:`analyze_fourier`; the measured positions stay in ``x_raw_px``, ``y_raw_px``
    and ``x_nm``, ``y_nm`` follow the corrected ones. ``result.summary['distortion_correction']`` records what
    was done (matrix, its uncertainty, source, centre, largest shift, whether it was significant) and a note says
    when the correction is uncertain. ``fourier_window`` is ``Parameters.fourier_window`` (the ``window`` of
    :func:`analyze_fourier`).

    Returns
    -------
    dict
        The ``distortion_correction`` record.
    """
    ps = micrograph.meta.pixel_size_nm
    spots, info = analyze_fourier(micrograph.data, valid=micrograph.valid, pixel_size_nm=ps, window=fourier_window)
    result.tables["spots"] = spots
    result.summary["fourier"] = info
    notes = result.summary.setdefault("notes", [])
    d = np.asarray(info["distortion_matrix"], dtype=float)
    source = info["distortion_source"]
    h, w = np.shape(micrograph.data)
    centre = np.array([(w - 1) / 2.0, (h - 1) / 2.0])
    rec = {"applied": False, "matrix": d.tolist(), "source": source, "centre_px": centre.tolist(),
           "matrix_se": (info.get("indexing") or {}).get("distortion_matrix_se"), "max_shift_px": 0.0}
    if source == "none":
        notes.append("scan-distortion correction asked for, but no symmetric spot pattern was found to measure "
                     "it: positions are NOT corrected")
        result.summary["distortion_correction"] = rec
        return rec
    cols = result.tables["columns"].copy()
    xy = cols[["x_px", "y_px"]].to_numpy(dtype=float)
    new = (xy - centre) @ d.T + centre
    cols["x_raw_px"] = xy[:, 0]
    cols["y_raw_px"] = xy[:, 1]
    cols["x_px"] = new[:, 0]
    cols["y_px"] = new[:, 1]
    if ps:
        cols["x_nm"] = new[:, 0] * ps
        cols["y_nm"] = new[:, 1] * ps
    result.tables["columns"] = cols
    significant, dev = _distortion_significant(info)
    shift = np.hypot(*(new - xy).T) if len(xy) else np.zeros(0)
    rec.update(applied=True, significant=significant, max_deviation_from_identity=dev,
               max_shift_px=float(shift.max()) if len(shift) else 0.0)
    notes.append(f"scan distortion corrected: x_px, y_px and every structure table are in the corrected frame "
                 f"(measured positions in x_raw_px, y_raw_px); the image itself is not resampled, so overlays on "
                 f"it are offset by up to {rec['max_shift_px']:.1f} px")
    if source == "shell_ellipse":
        notes.append("scan-distortion correction from the spot-shell ellipse only (no decagonal indexing): it "
                     "assumes the true pattern is isotropic and the fast-scan axis x undistorted; treat it as "
                     "uncertain")
    elif not significant:
        notes.append(f"scan-distortion correction applied although it is within 3 standard errors of none "
                     f"(largest element change {dev:.1e})")
    result.summary["distortion_correction"] = rec
    return rec


def fourier_stage(result, micrograph, *, fourier_window: str = "hann") -> None:
    """Run :func:`analyze_fourier` for the pipeline, with the real-space tiling edge and orientation when known
    (``fourier_window``: ``Parameters.fourier_window``, the ``window`` of :func:`analyze_fourier`).

    Fills ``tables['spots']``, ``summary['fourier']`` and ``summary['phason']['fourier']``; records the applied
    correction (``summary['distortion_correction']``) inside ``summary['fourier']`` too.
    """
    ps = micrograph.meta.pixel_size_nm
    tiling = result.summary.get("tiling") or {}
    real = (result.summary.get("phason") or {}).get("real_space") or {}
    edge = tiling.get("edge_px") if tiling.get("n_edges") else None
    spots, info = analyze_fourier(micrograph.data, valid=micrograph.valid, pixel_size_nm=ps, edge_px=edge,
                                  orientation_deg=real.get("orientation_deg"), window=fourier_window)
    corr = result.summary.get("distortion_correction")
    if corr is not None:
        info["correction_applied"] = corr
        if corr.get("applied"):
            # the matrix the positions were mapped with (the re-measurement stays in indexing.distortion_matrix)
            info["distortion_matrix"] = corr["matrix"]
            info["notes"] = [n + " (corrected: the column positions were mapped with fourier.distortion_matrix "
                             "before motifs, ladders and tiling)" if "elliptical" in n else n for n in info["notes"]]
    else:
        significant, dev = _distortion_significant(info)
        if significant and dev > 0.002:
            info["notes"].append(
                f"scan distortion measured (largest element of the correction {dev:.4f}) but not applied; run with "
                "--correct-distortion to compute the structure in the corrected frame")
    result.tables["spots"] = spots
    result.summary["fourier"] = info
    ph = result.summary.setdefault("phason", {})
    ph["fourier"] = fourier_phason_summary(info)
    _compare_phason(ph)


def fourier_phason_summary(info: dict) -> dict:
    """The ``phason.fourier`` section from an :func:`analyze_fourier` info dict."""
    idx = info.get("indexing") or {}
    if not idx.get("ok"):
        return {"ok": False, "n_used": 0, "reason": "no decagonal indexing" if info.get("dominant_order") != 10
                else "decagonal indexing failed"}
    p = dict(idx["phason"])
    p.update(ok=True, tau_scale=idx.get("tau_scale"), orientation_deg=idx.get("orientation_deg"),
             method="least squares k = B g_par + C g_perp over the indexed spots (Lubensky et al. 1986)")
    return p


def _compare_phason(ph: dict) -> None:
    """Agreement of the two strain matrices in standard errors (largest element), when both exist."""
    a, b = ph.get("real_space") or {}, ph.get("fourier") or {}
    if not (a.get("ok") and b.get("ok")):
        return
    wa, wb = np.asarray(a["strain_matrix"]), np.asarray(b["strain_matrix"])
    se = np.hypot(np.asarray(a["strain_matrix_se"]), np.asarray(b["strain_matrix_se"]))
    z = np.abs(wa - wb) / np.maximum(se, 1e-12)
    ph["agreement_max_sigma"] = float(z.max())
    ph["agree"] = bool(z.max() < 3.0)


# ----------------------------------------------------------------------------------------------------------------
# Electron wavelength and Bragg angles
# ----------------------------------------------------------------------------------------------------------------


def electron_wavelength_nm(voltage_kv) -> float | np.ndarray:
    """Relativistic electron wavelength for an accelerating voltage.

    ``lambda = h / sqrt(2 m0 e V (1 + e V / (2 m0 c^2)))`` with CODATA constants from :mod:`scipy.constants`.

    Parameters
    ----------
    voltage_kv : float or array
        Accelerating voltage, kV (positive).

    Returns
    -------
    float or ndarray
        Wavelength in nm.

    References
    ----------
    D. B. Williams, C. B. Carter, Transmission Electron Microscopy, 2nd ed., Springer (2009), eq. 1.6 and
    Table 1.1.

    Examples
    --------
    >>> round(electron_wavelength_nm(200.0) * 1000, 3)   # pm
    2.508
    """
    from scipy import constants as k

    v = np.asarray(voltage_kv, dtype=float) * 1e3
    if np.any(~np.isfinite(v)) or np.any(v <= 0):
        raise TenfoldInputError(f"voltage_kv must be positive, got {voltage_kv!r}")
    ev = k.e * v
    lam = k.h / np.sqrt(2 * k.m_e * ev * (1 + ev / (2 * k.m_e * k.c**2))) * 1e9
    return float(lam) if lam.ndim == 0 else lam


def bragg_angle_mrad(d_nm, voltage_kv) -> float | np.ndarray:
    """Bragg angle ``theta = asin(lambda / (2 d))`` of a plane spacing ``d_nm`` at ``voltage_kv``, in mrad."""
    d = np.asarray(d_nm, dtype=float)
    if np.any(d <= 0):
        raise TenfoldInputError("d_nm must be positive plane spacings in nm")
    out = np.arcsin(np.clip(electron_wavelength_nm(voltage_kv) / (2 * d), -1, 1)) * 1e3
    return float(out) if np.ndim(out) == 0 else out


# ----------------------------------------------------------------------------------------------------------------
# Figure
# ----------------------------------------------------------------------------------------------------------------


def _shown_part(img: np.ndarray, k_step: float, lim: float) -> tuple[np.ndarray, np.ndarray]:
    """The part of a centred spectrum (pixel j at k = (j - n/2) k_step, as :func:`power_spectrum` lays it out)
    that a [-lim, lim] view shows, one pixel of margin, with its imshow extent: drawing only that part looks the
    same and costs a fraction of resampling the whole spectrum into the figure (and of embedding it in the SVG)."""
    n_r, n_c = img.shape
    half = int(np.ceil(lim / k_step)) + 1
    r0, r1 = max(n_r // 2 - half, 0), min(n_r // 2 + half + 1, n_r)
    c0, c1 = max(n_c // 2 - half, 0), min(n_c // 2 + half + 1, n_c)
    ext = np.array([c0 - n_c / 2 - 0.5, c1 - 1 - n_c / 2 + 0.5, r1 - 1 - n_r / 2 + 0.5, r0 - n_r / 2 - 0.5]) * k_step
    return img[r0:r1, c0:c1], ext


def spectrum_figure(result):
    """Log power spectrum with the spots (indexed spots coloured by |g_perp| / a*) and the fit's key numbers.

    Parameters
    ----------
    result : AnalysisResult
        Reads ``image``, ``tables['spots']``, ``summary['fourier']`` and ``meta.pixel_size_nm``.

    Returns
    -------
    matplotlib.figure.Figure or None
        None without an image or without the Fourier stage.
    """
    info = result.summary.get("fourier")
    if result.image is None or not info:
        return None
    from matplotlib.figure import Figure

    ps = getattr(result.meta, "pixel_size_nm", None)
    spec, dk = power_spectrum(result.image)
    s = (1.0 / ps) if ps else 1.0
    unit = "1/nm" if ps else "1/px"
    n = spec.shape[0]
    spots = result.tables.get("spots")
    fig = Figure(figsize=(7.2, 6.2), dpi=120, layout="constrained")
    ax = fig.add_subplot(1, 1, 1)
    lim = 0.5 * dk * n * s
    if spots is not None and len(spots):
        kx, ky = spots["kx_per_px"].to_numpy() * s, spots["ky_per_px"].to_numpy() * s
        lim = min(lim, 1.15 * float(np.percentile(np.hypot(kx, ky), 95)))
    shown, ext = _shown_part(spec, dk * s, lim)
    # one figure pixel block per spectrum sample (no smoothing): spots stay the single samples they are, and the
    # SVG embeds the samples as they are instead of a resampled copy
    ax.imshow(shown, cmap="gray", extent=ext, vmax=float(np.percentile(spec, 99.9)), interpolation="none")
    if spots is not None and len(spots):
        ind = spots["indexed"].to_numpy(dtype=bool) if "indexed" in spots else np.zeros(len(spots), bool)
        ax.scatter(kx[~ind], ky[~ind], s=30, facecolors="none", edgecolors="#bbbbbb", linewidths=0.6,
                   label="spot (not indexed)")
        if ind.any():
            from matplotlib import colormaps
            from matplotlib.cm import ScalarMappable
            from matplotlib.colors import Normalize

            gp = spots["g_perp_rel"].to_numpy()[ind]
            norm = Normalize(0.0, max(float(gp.max()), 1e-6))
            cmap = colormaps["plasma"]
            ax.scatter(kx[ind], ky[ind], s=36, facecolors="none", edgecolors=cmap(norm(gp)), linewidths=1.0,
                       label="indexed spot")
            fig.colorbar(ScalarMappable(norm=norm, cmap=cmap), ax=ax, shrink=0.8, label="|g_perp| / a*")
        ax.legend(loc="lower left", fontsize=7, framealpha=0.8)
    ax.set(xlim=(-lim, lim), ylim=(lim, -lim), xlabel=f"k_x ({unit})", ylabel=f"k_y ({unit})")
    lines = [f"order {info.get('dominant_order', info.get('rotational_order'))}"]
    idx = info.get("indexing") or {}
    if idx.get("ok"):
        basis = idx["basis_nm_inv"] if ps else idx["basis_per_px"]
        lines.append(f"a* = {basis:.4f} {unit}, orientation {idx['orientation_deg']:.2f} deg, "
                     f"{idx['n_indexed']} spots indexed")
        dm = np.asarray(idx["distortion_matrix"])
        lines.append(f"shear {idx['shear']:+.4f}, x/y scale {idx['scale_x_over_y']:.4f}; "
                     f"D = [[{dm[0, 0]:.4f}, {dm[0, 1]:+.4f}], [{dm[1, 0]:.4f}, {dm[1, 1]:.4f}]]")
        ph = idx.get("phason") or {}
        if ph.get("fitted"):
            sv, se = ph["singular_values"], ph["singular_values_se"]
            lines.append(f"phason strain singular values {sv[0]:.4f} +- {se[0]:.4f}, {sv[1]:.4f} +- {se[1]:.4f}")
    elif info.get("lattice"):
        lat = info["lattice"]
        if lat.get("ok"):
            lines.append(f"periodic lattice {lat['lengths_px'][0]:.2f} x {lat['lengths_px'][1]:.2f} px, "
                         f"{lat['angle_deg']:.1f} deg")
    ax.set_title("\n".join(lines), fontsize=8)
    return fig




# ----------------------------------------------------------------------------------------------------------------
# Kinematic diffraction of the found columns
# ----------------------------------------------------------------------------------------------------------------


def column_diffraction(
    x_px, y_px, weights=None, *, n_image: int, n_grid: int | None = None, eps: float = 1e-6
) -> tuple[np.ndarray, float]:
    """Kinematic intensity ``|sum_j f_j exp(-2 pi i k . r_j)|^2`` of point scatterers on a square k-grid.

    A type-1 non-uniform FFT (finufft; Barnett, Magland & af Klinteberg, SIAM J. Sci. Comput. 41 (2019) C479)
    evaluates the sum for every grid frequency at once, so 1e5-1e6 columns take seconds.

    Parameters
    ----------
    x_px, y_px : (N,) arrays
        Column positions, px.
    weights : (N,) array, optional
        Scattering weights f_j (e.g. column intensity or a species value); default 1.
    n_image : int
        Side of the square the image spectrum was taken on: the grid step is ``1 / n_image`` cycles per px,
        the same as :func:`power_spectrum`'s.
    n_grid : int, optional
        Grid side (default ``n_image``, even); frequencies ``m / n_image`` for m in ``[-n_grid/2, n_grid/2)``.
    eps : float
        Requested relative accuracy of the transform.

    Returns
    -------
    intensity : (n_grid, n_grid) float64
        Rows ky, columns kx, zero frequency at ``(n_grid // 2, n_grid // 2)`` (as :func:`power_spectrum`).
    k_step_per_px : float

    Examples
    --------
    >>> i, dk = column_diffraction(np.arange(0, 64, 8.0), np.zeros(8), n_image=64)  # doctest: +SKIP
    """
    try:
        import finufft
    except ImportError:
        raise TenfoldInputError(
            "column diffraction needs the non-uniform FFT package finufft: pip install 'tenfold[diffraction]'"
        ) from None
    x = np.asarray(x_px, dtype=np.float64).ravel()
    y = np.asarray(y_px, dtype=np.float64).ravel()
    if x.shape != y.shape or not (np.all(np.isfinite(x)) and np.all(np.isfinite(y))):
        raise TenfoldInputError("column diffraction: x_px and y_px must be finite arrays of one length")
    c = np.ones_like(x) if weights is None else np.asarray(weights, dtype=np.float64).ravel()
    if c.shape != x.shape:
        raise TenfoldInputError("column diffraction: weights must have one value per column")
    n_grid = int(n_image if n_grid is None else n_grid)
    n_grid += n_grid % 2
    if n_image < 2 or n_grid < 2:
        raise TenfoldInputError("column diffraction: n_image and n_grid must be at least 2")
    # phase 2 pi m x / n_image: scaled positions wrapped into [-pi, pi) (the transform is 2 pi-periodic in them)
    xs = np.mod(2 * np.pi * x / n_image + np.pi, 2 * np.pi) - np.pi
    ys = np.mod(2 * np.pi * y / n_image + np.pi, 2 * np.pi) - np.pi
    f = finufft.nufft2d1(xs, ys, c.astype(np.complex128), (n_grid, n_grid), isign=-1, eps=eps)
    inten = (f.real**2 + f.imag**2).T  # finufft's first axis is kx
    return inten, 1.0 / n_image


def diffraction_figure(result):
    """Image power spectrum and the kinematic diffraction of the found columns, side by side.

    Returns None without an image, without columns or without finufft.
    """
    cols = result.tables.get("columns")
    if result.image is None or cols is None or len(cols) < 10:
        return None
    try:
        import finufft  # noqa: F401
    except ImportError:
        return None
    from matplotlib.figure import Figure

    spec, dk = power_spectrum(result.image)
    n = spec.shape[0]
    h, w = np.shape(result.image)
    r0, c0 = (h - n) // 2, (w - n) // 2
    x = cols["x_raw_px"] if "x_raw_px" in cols else cols["x_px"]
    y = cols["y_raw_px"] if "y_raw_px" in cols else cols["y_px"]
    inside = (x >= c0) & (x < c0 + n) & (y >= r0) & (y < r0 + n)
    wts = cols["intensity"].to_numpy(dtype=float)[inside] if "intensity" in cols else None
    if wts is not None and not np.all(np.isfinite(wts)):
        wts = None
    inten, _ = column_diffraction(x[inside] - c0, y[inside] - r0, wts, n_image=n)
    kin = np.log10(1.0 + inten / max(float(np.median(inten)), 1e-300))
    ps = getattr(result.meta, "pixel_size_nm", None)
    s = (1.0 / ps) if ps else 1.0
    unit = "1/nm" if ps else "1/px"
    spots = result.tables.get("spots")
    lim = 0.5 * n * dk * s
    if spots is not None and len(spots):
        lim = min(lim, 1.15 * float(np.percentile(np.hypot(spots["kx_per_px"], spots["ky_per_px"]), 95)) * s)
    fig = Figure(figsize=(11, 5.4), dpi=120, layout="constrained")
    for ax, img, title in zip(fig.subplots(1, 2), (spec, kin),
                              ("image power spectrum", "kinematic |sum f exp(-2 pi i k.r)|^2 of the found columns")):
        shown, ext = _shown_part(img, dk * s, lim)
        ax.imshow(shown, cmap="gray", extent=ext, vmax=float(np.percentile(img, 99.9)), interpolation="none")
        ax.set(xlim=(-lim, lim), ylim=(lim, -lim), xlabel=f"k_x ({unit})", ylabel=f"k_y ({unit})")
        ax.set_title(title, fontsize=9)
    return fig


