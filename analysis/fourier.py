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

import numpy as np
import pandas as pd
from scipy import ndimage

from ._errors import TenfoldInputError
from ._schema import SPOTS, conform, empty_table

__all__ = ["power_spectrum", "find_spots", "analyze_fourier"]

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


def _power(image: np.ndarray, valid: np.ndarray | None) -> np.ndarray:
    crop, ok = _square_crop(image, valid)
    if not ok.any():
        raise TenfoldInputError("power spectrum: every pixel of the central square is masked")
    # in place and from the half-plane transform (the power of a real image is point-symmetric): about 24 bytes per
    # pixel at the peak instead of 65 (benchmarks/bench_memory.py)
    work = np.array(crop, dtype=np.float64)
    work -= np.mean(work, where=ok)
    work[~ok] = 0.0
    n = work.shape[0]
    w = np.hanning(n)
    work *= w[:, None]
    work *= w[None, :]
    f = np.fft.rfft2(work)
    del work
    half = np.square(f.real)
    half += np.square(f.imag)
    del f
    m = n // 2
    p = np.empty((n, n))
    p[:, : m + 1] = half
    p[:, m + 1 :] = half[(-np.arange(n)) % n, m - 1 : 0 : -1]  # P(ky, kx) = P(-ky, -kx)
    del half
    return np.fft.fftshift(p)


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
    window : {'hann'}
        Apodisation window (Harris 1978).

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
    if window != "hann":
        raise TenfoldInputError(f"power spectrum: unknown window {window!r}; use 'hann'")
    if pixel_size_nm is not None and not (np.isfinite(pixel_size_nm) and pixel_size_nm > 0):
        raise TenfoldInputError(f"power spectrum: pixel_size_nm must be a positive number, got {pixel_size_nm}")
    p = _power(image, valid)
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

    Returns
    -------
    DataFrame
        ``_schema.SPOTS`` columns: spot_id, kx_per_px, ky_per_px, k_per_nm, d_nm, d_px, angle_deg, strength, shell.
    """
    logp = _power(image, valid)
    logp += 1e-300
    np.log(logp, out=logp)
    n = logp.shape[0]
    c = n // 2
    yy, xx = np.ogrid[-c : n - c, -c : n - c]
    rbin = np.round(np.hypot(xx, yy)).astype(np.int32)
    counts = np.bincount(rbin.ravel())
    bg = np.bincount(rbin.ravel(), weights=logp.ravel()) / np.maximum(counts, 1)
    rel = bg[rbin]
    del rbin
    np.subtract(logp, rel, out=rel)
    excess = ndimage.gaussian_filter(rel, 0.7)
    del rel
    kmin = (4.0 / n) if k_min_per_px is None else float(k_min_per_px)
    peaks = (excess == ndimage.maximum_filter(excess, size=5)) & (excess > np.log(min_strength))
    rr = np.hypot(xx, yy)
    peaks &= (rr >= kmin * n) & (rr <= 0.5 * n - 2)
    del rr
    py, px = np.nonzero(peaks)
    if len(py) == 0:
        return empty_table(SPOTS)
    order = np.argsort(-excess[py, px])[:max_spots]
    py, px = py[order], px[order]

    # Sub-pixel: parabola through the log power along each axis.
    def _vertex(lo, mid, hi):
        den = lo - 2 * mid + hi
        return np.where(np.abs(den) > 1e-12, 0.5 * (lo - hi) / np.where(den == 0, 1, den), 0.0).clip(-0.5, 0.5)

    dx = _vertex(logp[py, px - 1], logp[py, px], logp[py, px + 1])
    dy = _vertex(logp[py - 1, px], logp[py, px], logp[py + 1, px])
    kx = (px + dx - c) / n
    ky = (py + dy - c) / n
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
    return conform(df, SPOTS)


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


def analyze_fourier(
    image: np.ndarray,
    *,
    valid: np.ndarray | None = None,
    pixel_size_nm: float | None = None,
    max_spots: int = 80,
    min_strength: float = 8.0,
    distortion_warn: float = 0.005,
) -> tuple[pd.DataFrame, dict]:
    """Spots, rotational order and a scan-distortion estimate from the power spectrum.

    Parameters
    ----------
    image, valid, pixel_size_nm, max_spots, min_strength
        As for :func:`find_spots`.
    distortion_warn : float
        Axis ratio minus one above which the summary warns of scan distortion or anisotropic calibration
        (0.005 = 0.5 %; common practice for drift/scan checks, not a published threshold).

    Returns
    -------
    spots : DataFrame
        ``_schema.SPOTS`` table.
    info : dict
        JSON-safe: ``n_spots``, ``shells`` (per shell: k_per_px, d_px, d_nm, n_spots, psi per order, order),
        ``rotational_order`` (the order of the strongest shells, 0 if none), ``distortion`` (axis_ratio,
        major_axis_deg, shell used, warning) and ``notes``.
    """
    spots = find_spots(image, valid=valid, pixel_size_nm=pixel_size_nm, max_spots=max_spots, min_strength=min_strength)
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
    fit = None
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
        warn = ratio - 1.0 > distortion_warn
        info["distortion"] = {
            "axis_ratio": ratio,
            "major_axis_deg": angle,
            "shells_used": [sh["shell"] for sh in used],
            "warning": bool(warn),
        }
        if warn:
            info["notes"].append(
                f"the Fourier spot shells are elliptical (axis ratio {ratio:.4f}): distances along different "
                f"directions differ by {100 * (ratio - 1):.2f} %; suspect scan distortion, drift or an anisotropic "
                "pixel size, and treat tau-ratio deviations of that size with care"
            )
    else:
        info["notes"].append("too few symmetric Fourier spot shells: scan distortion not estimated")
    return spots, info
