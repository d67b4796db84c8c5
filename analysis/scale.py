"""Automatic column scale: typical nearest-column spacing and column width, from the image alone.

Method: the radially averaged autocorrelation of the high-passed image. For an image made of Gaussian columns of
width s the autocorrelation is the pair-distance distribution of the columns blurred by a Gaussian of width
s sqrt(2): a central peak whose width gives s, a first minimum, and a first neighbour peak at the most common
short column-column distance. This needs no lattice (it works for a decagonal point set as for a crystal), does
not depend on contrast polarity (the autocorrelation of -f equals that of f), and is insensitive to white noise,
whose autocorrelation is confined to r = 0 (that bin is never used).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import fft as sfft
from scipy.spatial import cKDTree

from . import _sanitize
from ._correlate import gaussian_filter
from ._filters import window_max, window_min
from ._errors import TenfoldInputError

__all__ = ["ScaleEstimate", "estimate_scale", "radial_autocorrelation"]

#: Largest square crop analysed (px); larger images are cropped about the centre (the scale is a local property).
MAX_CROP_PX = 512
#: Radial bin width of the autocorrelation profile, px.
BIN_PX = 0.5
#: Provisional maxima must stand this many noise standard deviations of the smoothed image above the lowest
#: smoothed value within 3 sigma (common practice: 5 sigma for a detection).
MAXIMA_Z = 5.0


def nearest_maxima_spacing(image, valid, sigma_px: float):
    """Median nearest-neighbour distance of the significant local maxima of the Gaussian-smoothed image.

    The image is filtered with the column width (matched filter); local maxima that stand ``MAXIMA_Z`` noise
    standard deviations above the lowest smoothed value within ``3 sigma`` count. The noise of the smoothed image
    is the per-pixel noise (MAD of neighbour differences / sqrt 2) times ``1 / (2 sqrt(pi) sigma)``, the norm of the
    unit-sum Gaussian kernel. Two rounds: the maxima search window is ``2 ceil(sigma) + 1`` px, then
    ``2 floor(0.35 d) + 1`` px with the first spacing d (noise maxima on the flank of a column no longer count);
    the smoothed image, the noise and the local minima are shared. Returns ``(spacing_px or None, n_maxima)``.
    """
    g = gaussian_filter(np.where(valid, image, image[valid].mean()), sigma_px)  # scipy's, in numba
    dif = np.diff(image, axis=1)[valid[:, 1:] & valid[:, :-1]]
    sd_pix = 1.4826 * np.median(np.abs(dif - np.median(dif))) / math.sqrt(2.0)
    sd_g = sd_pix / (2.0 * math.sqrt(math.pi) * sigma_px)
    clear = valid & (g - window_min(g, 2 * math.ceil(3.0 * sigma_px) + 1) > MAXIMA_Z * max(sd_g, 1e-12))
    clear[0, :] = clear[-1, :] = clear[:, 0] = clear[:, -1] = False
    d, n = _maxima_spacing(g, clear, 2 * math.ceil(sigma_px) + 1)
    if d is not None and 2 * math.floor(0.35 * d) + 1 > 2 * math.ceil(sigma_px) + 1:
        d2, n2 = _maxima_spacing(g, clear, 2 * math.floor(0.35 * d) + 1)
        if d2 is not None:
            return d2, n2
    return d, n


def _maxima_spacing(g, clear, size):
    """Median nearest-neighbour distance of the maxima of ``g`` over ``size`` px squares among the ``clear``
    pixels (significant, off the border), with a parabolic sub-pixel position; ``(spacing_px or None, n)``."""
    yy, xx = np.nonzero((g == window_max(g, size)) & clear)
    if xx.size < 10:
        return None, int(xx.size)
    # sub-pixel position: vertex of the parabola through each maximum and its two neighbours per axis
    c = g[yy, xx]
    xy = np.c_[xx, yy].astype(np.float64)
    for k, (lo, hi) in enumerate(((g[yy, xx - 1], g[yy, xx + 1]), (g[yy - 1, xx], g[yy + 1, xx]))):
        den = lo - 2.0 * c + hi
        off = np.where(den < 0, 0.5 * (lo - hi) / np.where(den < 0, den, -1.0), 0.0)
        xy[:, k] += np.clip(off, -0.5, 0.5)
    d = cKDTree(xy).query(xy, k=2)[0][:, 1]
    return float(np.median(d)), int(xx.size)


@dataclass
class ScaleEstimate:
    """Column scale found in an image.

    Attributes
    ----------
    spacing_px : float
        Typical nearest-neighbour column spacing, px (position of the first neighbour peak of the autocorrelation).
    sigma_px : float
        Gaussian standard deviation of a column image, px.
    spacing_method, sigma_method : str
        How each was found.
    details : dict
        JSON-safe record of every choice (crop, high-pass width, peak heights, significance).
    """

    spacing_px: float
    sigma_px: float
    spacing_method: str = ""
    sigma_method: str = ""
    details: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        return {"spacing_px": float(self.spacing_px), "sigma_px": float(self.sigma_px),
                "spacing_method": self.spacing_method, "sigma_method": self.sigma_method, "details": self.details}


def _prepare(image, valid):
    img = np.asarray(image, dtype=np.float64)
    if img.ndim != 2:
        raise TenfoldInputError(f"estimate_scale: image must be 2-D, got shape {img.shape}")
    ok = np.isfinite(img)
    if valid is not None:
        v = np.asarray(valid, dtype=bool)
        if v.shape != img.shape:
            raise TenfoldInputError(f"estimate_scale: valid mask shape {v.shape} differs from image {img.shape}")
        ok &= v
    return img, ok


def radial_autocorrelation(image, valid, *, highpass_px: float, r_max_px: float):
    """Masked, zero-padded autocorrelation of the Gaussian-high-passed image, radially averaged in 0.5 px bins.

    Returns (r_px, acf, acf0, n_used): bin centres, mean autocorrelation per bin (pixel pairs only where both
    pixels are valid), the zero-lag value and the number of valid pixels.

    Both transforms run on a grid padded to twice the image (the high-pass Gaussian's wrap-around is then
    negligible). Only lags up to ``r_max_px`` are used, so the autocorrelation is transformed back on those lags'
    rows only and binned on those lags only: the same 1-D transforms and sums as the whole grid's, far fewer of
    them.
    """
    w = valid.astype(np.float64)
    nvalid = float(w.sum())
    fill = image[valid].mean()
    f = np.where(valid, image - fill, 0.0)
    h, wd = f.shape
    ph, pw = 2 * h, 2 * wd
    if highpass_px > 0:
        # Gaussian high-pass in Fourier space (masked pixels were set to the mean, i.e. 0 here)
        ky = np.fft.fftfreq(ph)[:, None]
        kx = np.fft.rfftfreq(pw)[None, :]
        ff = _padded_rfft2(f, ph, pw)
        ff *= 1.0 - np.exp(-2.0 * (math.pi * highpass_px) ** 2 * (kx * kx + ky * ky))
        f = _cropped_irfft2(ff, pw, slice(0, h), wd)
        f = np.where(valid, f - f[valid].mean(), 0.0)
    lag = min(int(math.floor(r_max_px)), h - 1, wd - 1)
    rows = np.r_[0:lag + 1, ph - lag:ph]
    cols = np.r_[0:lag + 1, pw - lag:pw]
    ff = _padded_rfft2(f, ph, pw)
    acf = _cropped_irfft2(ff * np.conj(ff), pw, rows, pw)[:, cols]
    ry, rx = np.where(rows > lag, rows - ph, rows), np.where(cols > lag, cols - pw, cols)
    if valid.all():
        # the pair counts as this function has always taken them: h - lag for lags >= 0, but |lag| for negative
        # lags, so that (square crops) only the quadrant of non-negative lags passes the pairs test below
        pairs = np.where(ry >= 0, h - ry, -ry)[:, None].astype(np.float64) * np.where(rx >= 0, wd - rx, -rx)[None, :]
    else:
        fm = _padded_rfft2(w, ph, pw)
        pairs = _cropped_irfft2(fm * np.conj(fm), pw, rows, pw)[:, cols]
    r = np.hypot(ry[:, None].astype(np.float64), rx[None, :].astype(np.float64))
    sel = (r <= r_max_px) & (pairs > 0.25 * nvalid)
    acf = acf[sel] / pairs[sel]
    b = np.rint(r[sel] / BIN_PX).astype(np.int64)
    cnt = np.bincount(b)
    prof = np.bincount(b, acf) / np.maximum(cnt, 1)
    rb = np.arange(prof.size) * BIN_PX
    keep = cnt > 0
    return rb[keep], prof[keep], float(prof[0]), nvalid


def _padded_rfft2(a, ph, pw):
    """``rfft2(a, s=(ph, pw))`` of a zero-padded array, transforming the padding rows only where they matter."""
    rows = sfft.rfft(a, n=pw, axis=1, workers=-1)
    return sfft.fft(rows, n=ph, axis=0, workers=-1)


def _cropped_irfft2(spec, pw, rows, n_cols):
    """``irfft2(spec, s=(ph, pw))[rows, :n_cols]``, the last axis transformed on the wanted rows only.

    As pocketfft does for the 2-D transform: the first axis unscaled, the last one unscaled too, then every value
    times 1 / (ph pw) rounded from extended precision (so the values equal ``irfft2``'s bit for bit).
    """
    out = sfft.irfft(sfft.ifft(spec, axis=0, norm="forward", workers=-1)[rows], n=pw, axis=1, norm="forward",
                     workers=-1)[:, :n_cols]
    out *= np.float64(np.longdouble(1) / np.longdouble(spec.shape[0] * pw))
    return out


def _parabolic(x, y, i):
    if 0 < i < len(y) - 1:
        den = y[i - 1] - 2 * y[i] + y[i + 1]
        if den != 0:
            off = 0.5 * (y[i - 1] - y[i + 1]) / den
            if abs(off) <= 1:
                return float(x[i] + off * (x[1] - x[0]))
    return float(x[i])


def _analyse(r, a, a0, nvalid):
    """First minimum, first neighbour peak and central width of a radial autocorrelation profile."""
    noise = a0 / math.sqrt(nvalid)  # standard error of a white-noise autocorrelation value, per pixel pair
    sm = np.convolve(a, np.array([0.25, 0.5, 0.25]), mode="same")
    sm[0], sm[-1] = a[0], a[-1]
    pos = r > 0
    ri, ai, si = r[pos], a[pos], sm[pos]
    if ai.size < 6 or not ai[0] > 10 * noise:
        return None, {"reason": f"no correlation at 0.5-1 px (acf {float(ai[0]) if ai.size else 0:.3g} vs white-noise "
                                f"level {noise:.3g})"}
    # first local minimum of the smoothed profile, then the highest point before it falls again
    d = np.diff(si)
    mins = np.flatnonzero((d[:-1] < 0) & (d[1:] >= 0)) + 1
    if mins.size == 0:
        return None, {"reason": "autocorrelation decreases monotonically: no neighbour peak"}
    i_min = int(mins[0])
    maxs = np.flatnonzero((d[:-1] > 0) & (d[1:] <= 0)) + 1
    maxs = maxs[maxs > i_min]
    if maxs.size == 0:
        return None, {"reason": "no neighbour peak after the first minimum"}
    i_pk = int(maxs[0])
    prom = float(si[i_pk] - si[i_min])
    info = {"first_min_px": float(ri[i_min]), "first_peak_px": float(ri[i_pk]), "peak_prominence": prom,
            "acf0": float(a0), "white_noise_level": float(noise), "acf_first_bin": float(ai[0])}
    if not prom > 5 * noise:
        info["reason"] = f"neighbour peak prominence {prom:.3g} below 5 x white-noise level {noise:.3g}"
        return None, info
    # annulus weight r: the distance histogram of a blurred neighbour ring peaks at its distance (Rice), while
    # the plain radial mean is pulled inwards by about s^2 / d
    rw = ri * si
    j = i_pk
    while 0 < j < rw.size - 1 and rw[j + 1] > rw[j]:
        j += 1
    spacing = _parabolic(ri, rw, j)
    # central width: Gaussian exp(-r^2 / (4 s^2)) above the first-minimum baseline, fitted on the upper part
    base = si[i_min]
    y = ai[: i_min + 1] - base
    x = ri[: i_min + 1]
    top = y[0]
    sel = (y > 0.2 * top) & (y > 0)
    if sel.sum() < 2:
        sel = np.zeros_like(sel)
        sel[:2] = True
        sel &= y > 0
    if sel.sum() >= 2:
        slope = np.polyfit(x[sel] ** 2, np.log(y[sel]), 1)[0]
        sigma = math.sqrt(-1.0 / (4.0 * slope)) if slope < 0 else float(ri[i_min]) / 3.0
    else:
        sigma = float(ri[i_min]) / 3.0
    info["central_fit_points"] = int(sel.sum())
    return (spacing, sigma), info


def _central_width(r, a, a0, nvalid):
    """Column width from the central autocorrelation peak alone (baseline 0 after the high-pass), or None.

    The peak must stand above 10 white-noise standard errors at the first lag (white noise only lives at r = 0),
    the same test as for a full profile.
    """
    noise = a0 / math.sqrt(nvalid)
    pos = r > 0
    ri, ai = r[pos], a[pos]
    if ai.size < 3 or not ai[0] > 10 * noise:
        return None
    above = ai > 0.2 * ai[0]
    n_run = int(np.argmin(above)) if not above.all() else above.size  # contiguous run from the first lag
    if n_run < 2:
        return None
    slope = np.polyfit(ri[:n_run] ** 2, np.log(ai[:n_run]), 1)[0]
    return math.sqrt(-1.0 / (4.0 * slope)) if slope < 0 else None


def estimate_scale(image, *, valid=None, dark_columns=False) -> ScaleEstimate:
    """Find the typical nearest-column spacing and the column width of an atomic-resolution image.

    Parameters
    ----------
    image : (H, W) array
        The micrograph (any polarity). Not modified.
    valid : (H, W) bool array, optional
        False for masked pixels; they are left out of the autocorrelation.
    dark_columns : bool
        Columns darker than the background: the provisional maxima are taken on the inverted image (the
        autocorrelation does not depend on polarity).

    Returns
    -------
    ScaleEstimate
        ``spacing_px``, ``sigma_px``, the methods and a ``details`` dict.

    Raises
    ------
    TenfoldInputError
        No column scale in the image (featureless noise, constant image, too small).

    Notes
    -----
    At most a central ``MAX_CROP_PX`` square is used. The image is high-passed by subtracting a Gaussian blur of
    width ``max(min(H, W) / 8, 8)`` px; if the spacing found is more than a quarter of that width the estimate is
    repeated with a blur of 4 x spacing. The autocorrelation is computed with zero padding and normalised by the
    number of valid pixel pairs per lag; radial bins are 0.5 px wide and the r = 0 bin (white noise) is ignored.
    The neighbour peak must stand more than 5 white-noise standard errors (``acf(0) / sqrt(N)``) above the first
    minimum. The column width comes from fitting ``exp(-r^2 / (4 s^2))`` to the central peak above the
    first-minimum level (points above 20 % of the peak); it is a starting value refined per column later.

    References
    ----------
    The autocorrelation as blurred pair distribution: e.g. Cowley, Diffraction Physics, 3rd ed. (1995), ch. 5
    (Patterson function), from memory.

    Examples
    --------
    >>> est = estimate_scale(img)  # doctest: +SKIP
    >>> est.spacing_px, est.sigma_px  # doctest: +SKIP
    (10.1, 1.52)
    """
    img, ok = _prepare(image, valid)
    h, w = img.shape
    details: dict = {"dark_columns": bool(dark_columns), "shape": [int(h), int(w)]}
    if min(h, w) >= 16:  # (analysis/_sanitize.py) the most valid window, hot pixels clipped
        img, ok, details["sanitized"] = _sanitize.prepare_for_scale(img, ok, MAX_CROP_PX)
        h, w = img.shape
    if min(h, w) < 16:
        raise TenfoldInputError(f"estimate_scale: image {h}x{w} px is too small to find a column scale (need 16x16)")
    c = min(MAX_CROP_PX, h), min(MAX_CROP_PX, w)
    r0, c0 = (h - c[0]) // 2, (w - c[1]) // 2
    sub, okc = img[r0:r0 + c[0], c0:c0 + c[1]], ok[r0:r0 + c[0], c0:c0 + c[1]]
    details["crop"] = [int(r0), int(c0), int(c[0]), int(c[1])]
    if okc.sum() < 256 or np.ptp(sub[okc]) == 0:
        raise TenfoldInputError("estimate_scale: the image is constant or almost fully masked; no column scale")
    r_max = min(c) / 4.0
    hp = max(min(c) / 8.0, 8.0)
    result = None
    for attempt in range(2):
        r, a, a0, nv = radial_autocorrelation(sub, okc, highpass_px=hp, r_max_px=r_max)
        result, info = _analyse(r, a, a0, nv)
        info["highpass_px"] = float(hp)
        details[f"attempt_{attempt}"] = info
        if result is None or result[0] <= hp / 4.0:
            break
        hp = 4.0 * result[0]
        r_max = min(min(c) / 2.5, max(r_max, 3 * result[0]))
    if result is None:
        # No neighbour peak: a disordered or strongly jittered arrangement (or noise). The central peak still
        # gives the column width when it stands clear of white noise, and the maxima then give the spacing.
        sigma = _central_width(r, a, a0, nv)
        nn, n_max = (nearest_maxima_spacing(-sub if dark_columns else sub, okc, sigma) if sigma else (None, 0))
        if sigma is None or nn is None or not nn > 1.8 * sigma:
            raise TenfoldInputError(f"estimate_scale: no column scale found ({info.get('reason', 'no peak')}); the "
                                    "image looks like featureless noise; set the column spacing and diameter "
                                    "yourself (in nm, or in px for an uncalibrated image)")
        details["provisional_maxima"] = n_max
        details["no_neighbour_peak"] = info.get("reason", "")
        return ScaleEstimate(
            spacing_px=float(nn),
            sigma_px=float(sigma),
            spacing_method="median nearest-neighbour distance of the significant maxima of the Gaussian-smoothed "
                           "image (no neighbour peak in the autocorrelation: disordered arrangement)",
            sigma_method="Gaussian fit exp(-r^2/4s^2) to the autocorrelation central peak (baseline 0)",
            details=details,
        )
    spacing, sigma = result
    sigma = float(min(max(sigma, 0.3), spacing / 2.0))
    details["sigma_clipped_to"] = [0.3, float(spacing / 2.0)]
    details["autocorrelation_spacing_px"] = float(spacing)
    nn, n_max = nearest_maxima_spacing(-sub if dark_columns else sub, okc, sigma)
    details["provisional_maxima"] = n_max
    method = "first neighbour peak of the radial autocorrelation (parabolic interpolation)"
    if nn is not None and nn > 2.0 * sigma * 0.9:
        spacing = nn
        method = "median nearest-neighbour distance of the significant maxima of the Gaussian-smoothed image"
    return ScaleEstimate(
        spacing_px=float(spacing),
        sigma_px=sigma,
        spacing_method=method,
        sigma_method="Gaussian fit exp(-r^2/4s^2) to the autocorrelation central peak",
        details=details,
    )
