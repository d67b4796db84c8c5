"""Atomic-column finding: one finder for a whole image or its tiles, with the same result.

Steps of ``find_columns`` (every automatic choice is recorded in the returned info dict):

1. Inputs: the array reaches float32 without losing its signal (``_sanitize.to_float32``); NaN/inf and flat areas
   are masked.
2. Settle the image-wide choices on the sample (``_settle``): the ``SETTLE_PX`` window with the most valid pixels.
   Scale (``estimate_scale``, or the overrides), polarity check, noise model (raw counts, scaled counts or white,
   checked on the fit residuals), the detection levels of ``significance_map`` and the 16-bit range of the LoG,
   the fits' common width (``_width_votes``) and the column profile's tail (``refine.learn_tail``). Detection and fits of the sample repeat while the
   measured width, spacing or noise model disagree with the ones used (at most ``MAX_SCALE_ROUNDS``).
3. Windows (``_run_windows``): the whole image, or tiles with a halo of ``TILE_HALO_SPACINGS`` spacings + 8 sigma.
   Each window detects candidates (``_detect_window``): matched-filter significance over a locally linear
   background (``significance_map``), trackpy's maxima rule on the scale-normalised LoG, mirrored minima for the
   noise estimate. One significance cut for all windows (``mirror_threshold``, bounded by 3.5 sigma and the
   random-field threshold of the image area). Each window fits its significant candidates
   (``refine.refine_columns``: pixel-integrated Gaussians, Poisson-weighted for counts, Gauss-Seidel neighbour passes
   with the settled common width) and prunes them (``_prune``: failed, slid, border, insignificant given the
   neighbours' light, width outliers, duplicates); joint-model position errors
   (``refine.joint_position_errors``). Each column is kept by the window whose core holds its candidate pixel.
4. Finish (``_finish``): ``min_mass``, regions (``region.label_points``), the spacing check, ids, nm columns,
   species (``species.classify_species``), errors widened where the model misfits (``_widen_for_misfit``).

An untiled image no larger than the sample is its own sample: its last settling round is the result.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
import time
import warnings

import numpy as np
import pandas as pd
from scipy import ndimage
from scipy.spatial import cKDTree

from . import _correlate, _sanitize, _schema
from ._filters import gaussian_fft, window_max, window_min
from ._errors import TenfoldInputError, TenfoldWarning
from ._lengths import DIAMETER_PER_SIGMA, check_pixel_size, length_px
from ._progress import report, sub_progress
from .refine import FREE_WIDTH_SNR as FREE_WIDTH_Z, joint_position_errors, learn_tail, refine_columns, warm_up
from .region import label_points
from .scale import estimate_scale
from .species import classify_species

__all__ = ["find_columns", "polarity_skewness", "false_alarm_threshold", "pixel_noise_sd", "significance_map",
           "SignificanceField",
           "mirror_threshold", "FALSE_ALARMS", "FALSE_SHARE", "Z_FLOOR"]

#: Expected number of noise maxima per image above the random-field threshold (the upper end of the cut).
FALSE_ALARMS = 0.05
#: Share of accepted detections that the mirror estimate may call false (the data-driven cut; see mirror_threshold).
FALSE_SHARE = 0.001
#: Lowest significance ever accepted (common practice: below ~3.5 sigma a single detection is not evidence).
Z_FLOOR = 3.5
#: Accepted column widths relative to the median fitted width.
WIDTH_RANGE = (0.5, 2.0)


def polarity_skewness(image, valid=None, *, spacing_px: float) -> float:
    """Skewness of the image after removing structure coarser than ~2 column spacings.

    Bright sparse columns on a dark background give a positive value, dark columns a negative one.
    """
    img = np.asarray(image, dtype=np.float64)
    # polarity is a property of the whole image: the 512 x 512 px window with the most valid pixels is plenty
    if valid is not None:
        valid = np.asarray(valid, dtype=bool)
        rows, cols = _sanitize.best_window(valid, (512, 512))
        valid = valid[rows, cols]
    else:
        h, w = img.shape
        rows, cols = slice((h - min(h, 512)) // 2, None), slice((w - min(w, 512)) // 2, None)
    img = img[rows, cols][:512, :512]
    valid = None if valid is None else valid[:512, :512]
    hp = img - gaussian_fft(img, 2.0 * spacing_px)  # scipy's gaussian_filter, by FFT: its kernel is wide
    v = hp[valid] if valid is not None else hp.ravel()
    if v.size < 16:
        return 0.0
    v = v - v.mean()
    sd = v.std()
    return float(np.mean(v * v * v) / sd**3) if sd > 0 else 0.0  # (v**3 is a slow float power)


def false_alarm_threshold(area_px: float, sigma_px: float, expected_false: float = FALSE_ALARMS) -> float:
    """Significance threshold (in standard deviations) for ``expected_false`` noise maxima over the image.

    The matched-filter image of white noise (Gaussian kernel of width s) is a smooth random field with
    correlation exp(-r^2 / 4 s^2), i.e. gradient variance 1 / (2 s^2) per axis for unit variance. By random-field
    theory the expected number of its local maxima above a high level t over an area S (the Euler characteristic
    density) is

        E(t) = S / (2 s^2) * t exp(-t^2 / 2) / (2 pi)^(3/2),

    and t solves E(t) = ``expected_false``. For 1024^2 px and s = 1.5 px that is about 5.0 sigma, for 4096^2 px
    about 5.5 sigma: the threshold follows the image size, not a hand-tuned number.

    References
    ----------
    Adler, The Geometry of Random Fields (1981), ch. 6; Worsley et al., Hum. Brain Mapp. 4 (1996) 58, eq. (2)
    (2-D Euler characteristic density), from memory.
    """
    k = max(area_px, 1.0) / (2.0 * sigma_px**2) / (2.0 * math.pi) ** 1.5 / expected_false
    t = 3.0
    for _ in range(50):  # solve ln k + ln t - t^2 / 2 = 0 by Newton's method, from t = 3 (the large root)
        f = math.log(k) + math.log(t) - 0.5 * t * t
        t_new = t - f / (1.0 / t - t)
        if abs(t_new - t) < 1e-9:
            break
        t = max(t_new, 1.5)
    return float(max(t, 3.0))


def pixel_noise_sd(image, valid) -> float:
    """Robust per-pixel noise standard deviation: MAD of horizontal neighbour differences / sqrt(2).

    Column structure a few px wide changes little between neighbouring pixels, white noise fully; the median
    absolute deviation (x 1.4826 for a normal distribution) ignores the minority of steep pixels.
    """
    d = np.diff(image, axis=1)
    both = valid[:, 1:] & valid[:, :-1]
    v = d[both]
    if v.size == 0:
        return float("nan")
    return float(1.4826 * np.median(np.abs(v - np.median(v))) / math.sqrt(2.0))


def _block_mean(a: np.ndarray, f: int) -> np.ndarray:
    h, w = (a.shape[0] // f) * f, (a.shape[1] // f) * f
    if h == 0 or w == 0:
        return a.astype(np.float64)
    return a[:h, :w].reshape(h // f, f, w // f, f).mean(axis=(1, 3))


def significance_map(work, valid, *, sigma_px, spacing_px, counts, noise_sd=None, count_offset=0.0, count_sign=1.0,
                     origin=(0, 0), levels=None):
    """Matched-filter significance of a column anywhere in the image: z = (K * I - B) / sd(K * I).

    ``K`` is the normalised Gaussian of the column width (sum 1, sum of squares 1 / (4 pi sigma^2)); ``B`` is a
    smooth background: a first-order (locally linear) normalised convolution, scale ``BG_SCALE_SPACINGS``, on a coarse grid
    anchored at the whole image's pixel (0, 0), of the pixels farther than 4 sigma from every significant local
    maximum, so column light does not raise it; the standard error is the Poisson one under the no-column
    hypothesis, sqrt(sum K^2 lambda) with lambda the background in raw counts (``counts``: lambda = count_offset +
    count_sign * B, which maps an inverted or flattened ``work`` back to the recorded counts), or ``noise_sd`` /
    sqrt(4 pi sigma^2) for other images (white pixel noise). Taking lambda from the background model, not from the
    data, keeps the statistic symmetric under pure noise.

    Every operation is local (Gaussian filters, maximum filters, the locally linear background), so a window of
    the image with a halo of a few spacings gives the same field in its core as the whole image: this is what lets
    a tiled run equal an untiled one. The two image-wide choices (the level above which a maximum is a clear
    source, and whether the image is so crowded that the background is the level of the gaps) are ``levels``:
    measured here when None (the untiled run, or the sample the scale is settled on), handed in otherwise.

    Parameters
    ----------
    work : (H, W) array
        Image (or window) with bright columns (dark-column images already inverted), float.
    valid : (H, W) bool array
        Usable pixels.
    sigma_px, spacing_px : float
        Column width and spacing.
    counts : bool
        Poisson statistics from the counts; otherwise white noise of ``noise_sd``.
    count_offset, count_sign : float or array
        Recorded counts = count_offset + count_sign * work (0, 1 for a plain bright-column image).
    origin : (int, int)
        Row and column of ``work[0, 0]`` in the whole image (windows of a tiled run).
    levels : dict, optional
        ``source_level`` and ``crowded`` from a previous call on the whole image or its sample.

    Returns
    -------
    SignificanceField
        ``.z(rows, cols)``: significance in standard deviations at any positions (0 on masked pixels);
        ``.sd(rows, cols)``: standard error of ``K * work`` there under the no-column hypothesis; ``.levels``.

    References
    ----------
    Matched filtering of point sources: e.g. Kaiser, Squires & Broadhurst, ApJ 449 (1995) 460 (from memory);
    normalised convolution of first order: Knutsson & Westin, Proc. IEEE CVPR (1993) 515 (from memory). The sum of
    squares of a normalised 2-D Gaussian, 1 / (4 pi sigma^2), is elementary.

    Examples
    --------
    >>> from tenfold.analysis.synthetic import render_image
    >>> img = render_image([20.0, 40.0], [30.0, 30.0], [3000.0, 3000.0], shape=(64, 64), sigma_px=1.5,
    ...                    background=20.0, rng=0)
    >>> field = significance_map(img, np.ones(img.shape, bool), sigma_px=1.5, spacing_px=20.0, counts=True)
    >>> bool(field.z([30.0], [20.0])[0] > 20), bool(abs(field.z([10.0], [10.0])[0]) < 4)
    (True, True)
    """
    smooth = _correlate.gaussian_filter(np.asarray(work, dtype=np.float32), sigma_px)  # = scipy's, faster
    size = max(3, int(round(spacing_px * 0.5)) | 1)
    maxima = (smooth == window_max(smooth, size)) & valid
    reach = int(math.ceil(4.0 * sigma_px))  # a bright column's tail still adds ~1 % of its peak at 3 sigma
    k2 = 1.0 / (4.0 * math.pi * sigma_px**2)
    white_sd = None if counts else np.float32(math.sqrt(k2) * float(noise_sd))
    levels = dict(levels) if levels else {}
    if "source_level" not in levels:
        sv = smooth[valid][::7]  # robust level and spread: a regular subsample is plenty and 7x cheaper
        med = float(np.median(sv)) if sv.size else 0.0
        levels["source_level"] = med + 4.0 * 1.4826 * float(np.median(np.abs(sv - med))) if sv.size else 0.0
    # Pass 1 masks clearly bright maxima (masking every noise maximum would bias the background low and make
    # noise look significant); pass 2 masks the maxima that pass 1 found significant, so dim columns no longer
    # raise the background around themselves.
    sources = maxima & (smooth > levels["source_level"])
    my, mx = np.nonzero(maxima)
    field = None
    gaps = None
    crowded = list(levels.get("crowded", []))
    for rnd in range(2):
        keep = valid & ~window_max(sources, 2 * reach + 1)
        if len(crowded) <= rnd:
            # in a crowded image (a crystal, columns closer than ~8 sigma) almost nothing is far from a column;
            # decided per pass (the second pass masks the dim columns too)
            crowded.append(bool(np.count_nonzero(keep) < 0.25 * np.count_nonzero(valid)))
            levels["crowded"] = crowded
        if crowded[rnd]:
            # the background is then the level of the gaps between columns: smoothed pixels below their local
            # mean; pixels far from every source (an empty border, a hole in the crystal) all count
            if gaps is None:
                gaps = valid & (smooth <= _correlate.uniform_filter(smooth, max(3, int(2 * spacing_px) | 1)))
            keep |= gaps
        bg, f = _local_background(work, keep, BG_SCALE_SPACINGS * spacing_px, origin)
        field = SignificanceField(smooth, bg, valid, k2, white_sd, count_offset, count_sign, f, tuple(origin), levels)
        sources = np.zeros_like(maxima)
        zm = field.z_pixels(my, mx)
        sources[my[zm >= Z_FLOOR], mx[zm >= Z_FLOOR]] = True
    return field


@dataclass
class SignificanceField:
    """The significance map, evaluated where it is needed (candidates, minima), never stored at full size.

    ``smooth`` is the matched-filtered image (or window); the background lives on a coarse grid of ``factor`` px
    blocks anchored at the whole image's pixel (0, 0) and is interpolated bilinearly between block centres.
    """

    smooth: np.ndarray
    bg_coarse: np.ndarray
    valid: np.ndarray
    k2: float
    white_sd: float | None
    count_offset: float | np.ndarray
    count_sign: float
    factor: int = 1
    origin: tuple = (0, 0)
    levels: dict | None = None

    def background(self, rows, cols):
        return _coarse_background(self.bg_coarse, self.factor, self.origin, rows, cols)

    def sd(self, rows, cols, bg=None):
        if self.white_sd is not None:
            return np.full(np.shape(rows), float(self.white_sd))
        bg = self.background(rows, cols) if bg is None else bg
        off = self.count_offset
        if np.ndim(off):
            off = _correlate.bilinear(off, rows, cols)
        return np.sqrt(self.k2 * np.maximum(off + self.count_sign * bg, 1.0))

    def z(self, rows, cols):
        """Significance at (row, col) positions of the window (bilinear; 0 on masked pixels)."""
        rows = np.asarray(rows, dtype=np.float64)
        cols = np.asarray(cols, dtype=np.float64)
        if rows.size == 0:
            return np.zeros(0)
        bg = self.background(rows, cols)
        sm = _correlate.bilinear(self.smooth, rows, cols)
        z = (sm - bg) / self.sd(rows, cols, bg)
        h, w = self.smooth.shape
        ri = np.clip(np.rint(rows).astype(np.int64), 0, h - 1)
        ci = np.clip(np.rint(cols).astype(np.int64), 0, w - 1)
        return np.where(self.valid[ri, ci], z, 0.0)

    def z_pixels(self, rows, cols):
        """``z`` at whole pixels (integer arrays inside the window): the smoothed image read, not interpolated."""
        rows, cols = np.asarray(rows), np.asarray(cols)
        if rows.size == 0:
            return np.zeros(0)
        fr, fc = rows.astype(np.float64), cols.astype(np.float64)
        bg = self.background(fr, fc)
        z = (self.smooth[rows, cols] - bg) / self.sd(fr, fc, bg)
        return np.where(self.valid[rows, cols], z, 0.0)


#: scale of the background's Gaussian, in column spacings
BG_SCALE_SPACINGS = 1.5
def _coarse_background(bg_coarse, factor, origin, rows, cols):
    """The background grid of ``_local_background`` at (row, col) positions of its window (bilinear)."""
    r0, c0 = origin
    # block k of the window covers whole-image rows [(g0 + k) f, (g0 + k + 1) f), g0 = floor(r0 / f)
    gr = (np.asarray(rows) + r0 + 0.5) / factor - 0.5 - (r0 // factor)
    gc = (np.asarray(cols) + c0 + 0.5) / factor - 0.5 - (c0 // factor)
    return _correlate.bilinear(bg_coarse, gr, gc)  # scipy's map_coordinates, order 1, 'nearest'; faster


#: ridge of the locally linear background fit, relative to a fully supported window's second moment: keeps the
#: slope finite where only a sliver of kept pixels is in reach (image corners, masks)
_BG_RIDGE = 0.3


def _local_background(work, keep, scale_px, origin):
    """Locally linear normalised convolution of the ``keep`` pixels on a coarse grid; returns (grid, factor).

    Blocks of ``f = max(1, scale // 3)`` px are anchored at the whole image's pixel (0, 0) (``origin`` is the
    window's place in it), and the Gaussian of width ``scale / f`` blocks treats everything outside the window as
    missing (zero weight). A locally linear fit, unlike a plain normalised convolution, follows a tilt up to the
    image border instead of bending there, and it needs no image-wide surface: a window with a halo of 4.5 scales
    reproduces the whole image's background in its core.
    """
    f = max(1, int(scale_px // 3))
    h, w = work.shape
    r0, c0 = int(origin[0]), int(origin[1])
    pr, pc = r0 % f, c0 % f  # rows / columns of the first block that lie before the window
    counts, sums = _correlate.block_sums(work, keep, f, pr, pc)  # the kept pixels' float32 values, per block
    m_c, i_c = counts / (f * f), sums / (f * f)
    if not (m_c > 0).any():
        return np.full((1, 1), float(np.median(work))), f
    s = scale_px / f
    yy, xx = np.mgrid[0:m_c.shape[0], 0:m_c.shape[1]].astype(np.float64)

    def g(a):  # scipy's gaussian_filter(a, s, mode="constant", cval=0.0, truncate=3.0), in numba
        return _correlate.gaussian_filter(a, s, truncate=3.0, mode="constant")

    s0, sx, sy = g(m_c), g(m_c * xx), g(m_c * yy)
    sxx, syy, sxy = g(m_c * xx * xx), g(m_c * yy * yy), g(m_c * xx * yy)
    b0, bx, by = g(i_c), g(i_c * xx), g(i_c * yy)
    # per block: the moments about its centre, then [[s0, mx, my], [mx, mxx + q, mxy], [my, mxy, myy + q]]
    # [a, bx, by] = [b0, cx, cy] solved for a (Cramer's rule; the ridge q = _BG_RIDGE s0 s^2); NaN where no kept
    # pixel is in reach
    bg = _correlate.linear_fit_level(s0, sx, sy, sxx, syy, sxy, b0, bx, by, ridge=_BG_RIDGE, scale=s,
                                     tiny_below=1e-6 * max(float(s0.max()), 1e-300))
    if np.isnan(bg).any():  # blocks with nothing in reach: the nearest supported value
        fill = np.isnan(bg)
        if fill.all():
            return np.full((1, 1), float(np.median(work))), f
        idx = ndimage.distance_transform_edt(fill, return_distances=False, return_indices=True)
        bg = bg[tuple(idx)]
    return bg, f


def _smooth_surface(work, keep, scale_px, *, coarse=False):
    """A quadratic surface fitted to the ``keep`` pixels plus a normalised Gaussian convolution of the rest.

    Computed on a grid coarsened by ~scale / 3 and interpolated back. The quadratic takes tilt and curvature
    first: a normalised convolution alone bends at the image border (a tilt is folded back on itself there) and
    the bend looks like columns on one side and like deep noise on the other.
    """
    f = max(1, int(scale_px // 3))
    h, w = work.shape
    m_c = _block_mean(keep.astype(np.float32), f).astype(np.float64)
    i_c = _block_mean(np.where(keep, work, 0.0).astype(np.float32), f).astype(np.float64)
    if not (m_c > 0).any():
        return np.full((1, 1) if coarse else work.shape, float(np.median(work)))
    yy, xx = np.mgrid[0 : m_c.shape[0], 0 : m_c.shape[1]].astype(np.float64)
    xx, yy = ((xx + 0.5) * f - 0.5) / w, ((yy + 0.5) * f - 0.5) / h
    terms = np.stack([np.ones_like(xx), xx, yy, xx * xx, xx * yy, yy * yy], -1)
    wts = np.sqrt(m_c).ravel()
    mean_c = np.where(m_c > 0, i_c / np.maximum(m_c, 1e-12), 0.0)
    coef, *_ = np.linalg.lstsq(terms.reshape(-1, 6) * wts[:, None], mean_c.ravel() * wts, rcond=None)
    surface = terms @ coef
    num = ndimage.gaussian_filter(i_c - m_c * surface, scale_px / f)
    den = ndimage.gaussian_filter(m_c, scale_px / f)
    bg_c = surface + np.where(den > 1e-6, num / np.maximum(den, 1e-6), 0.0)
    if coarse:
        return bg_c
    zoom = (h / bg_c.shape[0], w / bg_c.shape[1])
    return ndimage.zoom(bg_c.astype(np.float32), zoom, order=1, mode="nearest", grid_mode=True)[:h, :w]


def mirror_threshold(z_candidates, z_mirror, *, z_max, share=FALSE_SHARE, floor=Z_FLOOR):
    """Data-driven significance cut: the lowest t at which the mirrored noise estimate allows ``share`` false.

    The candidates are the maxima of the blob-detector image; ``z_mirror`` is ``-z`` at its minima. Noise alone
    makes minima as deep as it makes maxima high (for symmetric noise), while columns only add maxima, so the
    number of minima deeper than -t estimates how many candidates above t are noise. t is the lowest level where
    that estimate is at most ``share`` of the candidates above t (as in false-discovery-rate control), kept
    between ``floor`` and the random-field threshold ``z_max`` (which allows 0.05 noise maxima per image whatever
    the data say). Poisson noise is skewed towards positive values and the background model is not perfect, so
    the mirror under-counts: by a factor of 2 to 4 on the bundled synthetic samples, where ``share`` = 0.1 % gave
    real false shares of 0.06-0.8 %.

    Returns
    -------
    t : float
    details : dict
    """
    depth = np.sort(np.asarray(z_mirror, dtype=np.float64))
    zc = np.sort(np.asarray(z_candidates, dtype=np.float64))[::-1]
    zc = zc[np.isfinite(zc)]
    t = z_max
    if zc.size:
        levels = zc[(zc >= floor) & (zc <= z_max)]
        if levels.size:
            n_above = np.searchsorted(-zc, -levels, side="right")
            false = depth.size - np.searchsorted(depth, levels, side="left")
            good = np.flatnonzero(false <= share * n_above)
            if good.size:  # the lowest such level (as in false-discovery-rate control)
                t = float(levels[good.max()])
    t = float(min(max(t, floor), z_max))
    est = int(depth.size - np.searchsorted(depth, t, side="left"))  # noise candidates expected above t
    return t, {"z_cut": t, "mirror_false_estimate": est, "candidates_above": int((zc >= t).sum()),
               "floor": floor, "z_max_random_field": z_max, "false_share_target": share}


def _components(tail):
    """The column profile as (share of the peak height, width multiple) pairs: one Gaussian, or core and tail."""
    return ((1.0, 1.0),) if tail is None or not tail[0] > 0 else ((1.0 - tail[0], 1.0), (tail[0], tail[1]))


def _neighbour_light(fit: pd.DataFrame, good: np.ndarray, sigma_k: float, profile=None, tail=None) -> np.ndarray:
    """Light of the other fitted columns in the Gaussian-smoothed image at each column's position (vectorised).

    A column of amplitude A and width s smoothed by the kernel of width k peaks at A s^2 / (s^2 + k^2) with
    width sqrt(s^2 + k^2); the sum runs over pairs from one KD-tree query. ``profile`` (distances px, light per
    unit of the smoothed peak), measured on the image's own bright columns (``_tail_profile``), replaces the
    Gaussian fall-off wherever it holds more light: real columns have tails a Gaussian does not. ``tail``: the
    fits' core + tail profile (``refine_columns``), each component smoothed alike.
    """
    n = len(fit)
    light = np.zeros(n)
    idx = np.flatnonzero(good)
    if idx.size < 2:
        return light
    x = fit["x_px"].to_numpy()[idx]
    y = fit["y_px"].to_numpy()[idx]
    a = fit["amplitude"].to_numpy()[idx]
    comps = []
    for share, mult in _components(tail):
        s2 = (mult * fit["sigma_px"].to_numpy()[idx]) ** 2 + sigma_k**2
        comps.append((share * a * (s2 - sigma_k**2) / s2 if share != 1.0 else a * (s2 - sigma_k**2) / s2, s2))
    reach = 4.0 * float(np.sqrt(max(np.nanmax(c[1]) for c in comps)))
    if profile is not None:
        r_p, p_p = np.asarray(profile[0]), np.asarray(profile[1])
        reach = max(reach, float(r_p[-1]))
    pairs = cKDTree(np.c_[x, y]).query_pairs(reach, output_type="ndarray")
    if pairs.size == 0:
        return light
    i, j = pairs[:, 0], pairs[:, 1]
    d2 = (x[i] - x[j]) ** 2 + (y[i] - y[j]) ** 2
    emp = np.interp(np.sqrt(d2), r_p, p_p, right=0.0) if profile is not None else 0.0
    for c, (peak, s2) in enumerate(comps):
        fall_j, fall_i = np.exp(-0.5 * d2 / s2[j]), np.exp(-0.5 * d2 / s2[i])
        if profile is not None and c == 0:  # the measured extra light, once per column
            fall_j, fall_i = fall_j + emp, fall_i + emp
        np.add.at(light, idx[i], peak[j] * fall_j)
        np.add.at(light, idx[j], peak[i] * fall_i)
    return light


#: the smoothed light around bright columns is measured out to this many spacings, on this many directions; the
#: median over directions leaves out the neighbours, the median over columns the noise
TAIL_REACH_SPACINGS, TAIL_ANGLES, TAIL_MIN_COLUMNS = 2.0, 16, 20


def _tail_profile(work, fit, good, settings, background, tail=None):
    """Light a column adds to the smoothed image beyond its fitted model, per unit of its smoothed peak.

    Returns ``[r_px, extra]`` or None when fewer than ``TAIL_MIN_COLUMNS`` bright fits. The Gaussians of every
    fitted column are subtracted from the image; the smoothed residual around the bright columns, less the
    detection's background (``background``: its coarse grid, block size and window origin), median over
    ``TAIL_ANGLES`` directions (a neighbour's misfit sits in a few of them) and over the columns, is the tail a
    Gaussian does not describe (a sharp channelling core with long tails, a probe tail).
    The significance test of a candidate subtracts it with the Gaussian (``_neighbour_light``). ``tail``: the fits'
    core + tail profile (``refine_columns``), part of the fitted model.
    """
    amp = fit["amplitude"].to_numpy()
    bright = good & np.isfinite(amp) & (amp > FREE_WIDTH_Z * fit["amplitude_err"].to_numpy())
    idx = np.flatnonzero(bright)
    if idx.size < TAIL_MIN_COLUMNS:
        return None
    k = settings.sigma
    smooth = _correlate.gaussian_filter(work.astype(np.float32) - _model_image(work.shape, fit, good, tail), k)
    idx = idx[np.argsort(amp[idx])[::-1][:400]]
    r = np.arange(0.0, TAIL_REACH_SPACINGS * settings.spacing + 0.5, 0.5)
    th = np.linspace(0.0, 2.0 * np.pi, TAIL_ANGLES, endpoint=False)
    x = fit["x_px"].to_numpy()[idx][:, None, None] + r[None, :, None] * np.cos(th)[None, None, :]
    y = fit["y_px"].to_numpy()[idx][:, None, None] + r[None, :, None] * np.sin(th)[None, None, :]
    vals = _correlate.bilinear(smooth, y, x)
    peak = 0.0
    for share, mult in _components(tail):
        s2 = (mult * fit["sigma_px"].to_numpy()[idx]) ** 2
        peak = peak + share * amp[idx] * s2 / (s2 + k * k) if share != 1.0 else amp[idx] * s2 / (s2 + k * k)
    # the residual above the detection's background (estimated away from the columns): a fit's own constant
    # background would have absorbed the tail
    bg = _coarse_background(*background, y.ravel(), x.ravel()).reshape(x.shape)
    extra = np.median(np.median(vals - bg, axis=2) / peak[:, None], axis=0)
    # never negative, and never rising outwards: the envelope of what lies farther out (a conservative tail)
    extra = np.maximum.accumulate(np.clip(extra, 0.0, None)[::-1])[::-1]
    return [r.tolist(), extra.tolist()]


def _model_image(shape, fit, good, tail=None):
    """The fitted columns as sampled Gaussians (over 4 widths; core and tail for a ``tail``, see
    ``refine_columns``), without background, float32."""
    h, w = shape
    model = np.zeros(shape, np.float32)
    xs, ys = fit["x_px"].to_numpy()[good], fit["y_px"].to_numpy()[good]
    a, sg = fit["amplitude"].to_numpy()[good], fit["sigma_px"].to_numpy()[good]
    if not xs.size:
        return model
    for share, mult in _components(tail):
        _add_gaussians(model, xs, ys, a if share == 1.0 else share * a, mult * sg)
    return model


def _add_gaussians(model, xs, ys, a, sg):
    """Add sampled Gaussians of peak ``a`` and width ``sg`` (over 4 widths) to the float32 ``model`` in place."""
    h, w = model.shape
    r = int(math.ceil(4.0 * np.nanmax(sg)))
    cx, cy = np.rint(xs), np.rint(ys)
    # a footprint whose centre lies more than r px outside the image misses it; every other one fits a canvas with a
    # margin of 2 r + 1 px, drawn without masking and then cropped
    near = (cx >= -r - 1) & (cx <= w + r) & (cy >= -r - 1) & (cy <= h + r)
    xs, ys, a, sg = xs[near], ys[near], a[near], sg[near]
    off = np.arange(-r, r + 1)
    px = cx[near].astype(np.int64)[:, None] + off[None, :]
    py = cy[near].astype(np.int64)[:, None] + off[None, :]
    # separable: two rows of exponentials per column instead of a square of them
    gx = np.exp(-0.5 * (px - xs[:, None]) ** 2 / sg[:, None] ** 2)
    gy = a[:, None] * np.exp(-0.5 * (py - ys[:, None]) ** 2 / sg[:, None] ** 2)
    m = 2 * r + 1
    canvas = np.zeros((h + 2 * m, w + 2 * m))
    _correlate.add_patches(canvas, py[:, 0] + m, px[:, 0] + m, gy, gx)
    model += canvas[m:m + h, m:m + w]


def find_columns(image, *, valid=None, pixel_size_nm=None, regions=None, dark_columns=False,
                 column_diameter_nm=None, column_spacing_nm=None, column_diameter_px=None, column_spacing_px=None,
                 min_mass=None, flatten=False, n_species=None, rng=0, tile_size=None, overlap_px=None,
                 execution=None, progress=None, frames_averaged=1) -> tuple[pd.DataFrame, dict]:
    """Find and refine the atomic columns of an image, whole or in tiles, with one result.

    Parameters
    ----------
    image : (H, W) array or memory map
        The micrograph. Not modified. NaN/inf pixels are treated as masked.
    valid : (H, W) bool array, optional
        False for masked pixels: no column is reported inside or touching the mask.
    pixel_size_nm : float, optional
        Pixel size; None leaves every ``*_nm`` column NaN.
    regions : list of region.Region, optional
        Keep only columns inside a region; ``region`` = its label (first region wins on overlap). Fits near a
        region edge use the full image.
    dark_columns : bool
        Columns darker than the background (HRTEM-like); the image is inverted before detection and fitting.
    column_diameter_nm : float, optional
        Overrides the automatic width: sigma = diameter / ``DIAMETER_PER_SIGMA``. Needs ``pixel_size_nm``.
    column_spacing_nm : float, optional
        Overrides the automatic nearest-column spacing. Needs ``pixel_size_nm``.
    column_diameter_px, column_spacing_px : float, optional
        The same overrides in pixels (for uncalibrated images); give each length in one unit only.
    min_mass : float, optional
        Minimum integrated intensity of a column (``intensity``: image units x px^2, i.e. counts x px^2 for raw
        counts), applied after refinement; default: none (the significance cut decides).
    flatten : bool
        Default False. Subtract a smooth surface (3 x spacing) before detection (uneven illumination); one
        surface for the whole image, so not with ``tile_size``.
    n_species : int, optional
        Species classes: None = BIC choice, 0 = skip (species -1), k = k classes.
    rng : int or numpy Generator
        Seeds the species EM starts.
    tile_size : int, optional
        Core tile size, px (>= 64): the detection and the fits run tile by tile (each with a halo of
        ``overlap_px``), possibly in parallel (``execution``); the result equals the untiled one. Default None:
        one window, the whole image.
    overlap_px : int, optional
        Halo of each tile, px; default ``TILE_HALO_SPACINGS`` spacings + 8 sigma, at least 32 px.
    execution : parallel.Execution, optional
        Workers / scheduler for the tiles (default serial).
    progress : callable, optional
        ``progress(fraction, message)``; returning False cancels (raises ``Cancelled``).
    frames_averaged : int
        The image is the mean of this many frames of raw counts (a frame series): the first noise model is then
        Poisson counts scaled by ``1 / frames_averaged`` (still checked against the fit residuals). Default 1.

    Returns
    -------
    columns : DataFrame
        Conformed to ``_schema.COLUMNS`` (``id`` from 0, positions, widths and errors in px and nm, ``amplitude``,
        ``background``, ``intensity``, ``residual``, ``fit_status`` ('ok' or 'fixed_width' for a faint column
        whose width was held at the common width), ``species``, ``species_prob``, ``region``) plus extras
        ``x_err_px``, ``y_err_px``, ``amplitude_err``, ``snr``. Empty (with these columns) when nothing survives.
    info : dict
        JSON-safe: ``automatic`` (scale, diameter, separation, significance cut and how each was chosen),
        ``polarity``, ``counts`` (candidates and rows left after each filter), ``refinement`` (fit statistics,
        compile time), ``tiling`` (windows), ``timings_s`` (seconds per step), ``species``, ``calibrated``,
        ``notes``.

    Raises
    ------
    TenfoldInputError
        Bad image or parameters; ``*_nm`` override without ``pixel_size_nm``; no column scale found.

    Notes
    -----
    Steps (module docstring): check inputs and mask flat areas; settle the image-wide choices (scale, noise model,
    detection levels, the common width) on a central sample of at most ``SETTLE_PX`` square, repeating the
    detection and fits there while the measured width, spacing or noise model disagree with the ones used; detect
    candidates in every window; one significance cut from all of them; fit and prune every window; keep each
    column in the window whose core holds its candidate pixel; regions, ``min_mass``, species and the checks on
    the merged table. An image no larger than the sample and run untiled is its own sample: its last settling
    round is the result.

    References
    ----------
    Crocker & Grier, J. Colloid Interface Sci. 179 (1996) 298, doi:10.1006/jcis.1996.0217 (the detection trackpy
    implements).

    Examples
    --------
    >>> from tenfold.analysis.synthetic import render_image
    >>> g = np.arange(8.0, 120.0, 12.0)
    >>> x, y = (a.ravel() for a in np.meshgrid(g, g))
    >>> img = render_image(x, y, np.full(x.size, 4000.0), shape=(128, 128), sigma_px=1.6, background=20.0, rng=0)
    >>> cols, info = find_columns(img, n_species=0)
    >>> len(cols) == x.size, round(float(np.median(cols["sigma_px"])), 1)
    (True, 1.6)
    """
    t_start = time.perf_counter()
    timings: dict = {}
    img, ok, lengths = _check_inputs(image, valid, pixel_size_nm, column_diameter_nm, column_spacing_nm,
                                     column_diameter_px, column_spacing_px)
    tiled = tile_size is not None
    if tiled:
        if not (isinstance(tile_size, (int, np.integer)) and tile_size >= 64):
            raise TenfoldInputError(f"tile size must be a whole number >= 64 px, got {tile_size!r}")
        if flatten:
            raise TenfoldInputError("flatten=True fits one background surface to the whole image, which tiles "
                                    "cannot repeat; run untiled (tile size 0) or without flatten")
    notes: list[str] = []
    # -- sanitising (analysis/_sanitize.py): float32 without losing the signal, flat areas masked, with notes --
    if not isinstance(img, np.memmap):
        img, ok, cast_notes = _sanitize.to_float32(img, ok, label="image")
        notes.extend(cast_notes)
        for note in cast_notes:
            warnings.warn(note, TenfoldWarning, stacklevel=2)
    ok, flat_notes = _sanitize.mask_flat(img, ok)
    notes.extend(flat_notes)
    for note in flat_notes:
        warnings.warn(note, TenfoldWarning, stacklevel=2)
    # -- end sanitising --
    timings["inputs"] = time.perf_counter() - t_start
    t0 = time.perf_counter()
    t_compile = warm_up()
    timings["kernels"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    sample = _sample_window(ok)
    own_sample = sample == (0, img.shape[0], 0, img.shape[1]) and not tiled
    auto: dict = {}
    settings, last, rounds, polarity = _settle(img, ok, sample, lengths, dark_columns, flatten, auto, notes,
                                               progress=sub_progress(progress, 0.0, 0.85 if own_sample else 0.3),
                                               frames_averaged=frames_averaged)
    timings["settle"] = time.perf_counter() - t0
    reach_note = _sanitize.masked_reach_note(ok, settings.sigma)  # (analysis/_sanitize.py)
    if reach_note:
        notes.append(reach_note)
        warnings.warn(reach_note, TenfoldWarning, stacklevel=2)
    t0 = time.perf_counter()
    if own_sample:
        fit, counts_tab, detail = last
        tiling = {"windows": 1, "n_tiles": 0, "tile_size_px": None, "overlap_px": 0, "seam_duplicates_removed": 0,
                  "how": "whole image, which is also the sample the scale was settled on"}
    else:
        # a large untiled image runs in internal tiles (the same result, see TILE_HALO_SPACINGS) so that their
        # detection can share the cores
        internal = tile_size is None and not flatten and max(img.shape) > INTERNAL_TILE_ABOVE_PX
        fit, counts_tab, detail, tiling = _run_windows(img, ok, settings,
                                                        INTERNAL_TILE_PX if internal else tile_size, overlap_px,
                                                        execution, sub_progress(progress, 0.3, 0.85))
        if internal:
            tiling.update(n_tiles=0, tile_size_px=None, internal_tiles_px=INTERNAL_TILE_PX,
                          how="untiled result; computed in internal tiles whose detection runs on every core "
                              "(tiles equal the whole image, see docs/columns.md)")
    timings["windows"] = time.perf_counter() - t0
    auto["rounds"] = rounds
    auto["noise_model"] = settings.noise
    auto.update(detail["auto"])
    table, info_tail = _finish(fit, counts_tab, settings, auto, notes, regions=regions, min_mass=min_mass,
                               pixel_size_nm=pixel_size_nm, n_species=n_species, rng=rng, progress=progress,
                               timings=timings)
    ok_fit = table["fit_status"].isin(["ok", "fixed_width"])
    info = {
        "automatic": auto,
        "polarity": polarity,
        "counts": counts_tab,
        "refinement": {
            "model": "pixel-integrated isotropic Gaussian + constant background, Levenberg-Marquardt"
                     if not (settings.tail and settings.tail[0] > 0) else
                     "pixel-integrated core + tail profile (two isotropic Gaussians of one centre, the tail's share "
                     "of the peak height and width ratio learned on the sample) + constant background, "
                     "Levenberg-Marquardt",
            "profile": _profile_info(settings),
            "weighting": "Poisson 1/max(model,1)" if settings.fit_counts else "unweighted",
            "image_is_counts": settings.noise["model"] != "white",
            "noise_model": settings.noise["model"],
            "neighbour_passes": detail["neighbour_passes"],
            "columns_still_moving": detail["still_moving"],
            "columns_still_moving_how": f"candidates whose fit still moved by more than {CONVERGE_PX:g} px in the "
                                        f"last of at most {NEIGHBOUR_PASSES} neighbour passes (0: converged); "
                                        "typically faint candidates sliding beside bright columns, most of them "
                                        "pruned afterwards",
            "common_width_px": settings.common_width,
            "position_error": "inverse Fisher information of the local joint model (column + touching "
                              "neighbours, all their parameters), see refine.joint_position_errors",
            "median_sigma_px": float(table.loc[ok_fit, "sigma_px"].median()) if ok_fit.any() else None,
            "median_pos_err_px": float(table.loc[ok_fit, "pos_err_px"].median()) if ok_fit.any() else None,
            "median_residual": float(table.loc[ok_fit, "residual"].median()) if ok_fit.any() else None,
            "compile_or_cache_load_s": t_compile,
            "detect_s": detail["detect_s"],
            "refine_s": detail["refine_s"],
        },
        "tiling": tiling,
        **info_tail,
        "calibrated": pixel_size_nm is not None,
        "n_columns": int(len(table)),
        "seconds": time.perf_counter() - t_start,
        "notes": notes,
    }
    report(progress, 1.0, f"{len(table)} columns")
    return table, _json_safe(info)


def _profile_info(settings):
    """The column profile for the info dict: tail share of the peak height and of the light, width ratio, how."""
    rec = dict(settings.tail_record or {})
    h, k = settings.tail if settings.tail else (0.0, 1.0)
    return {"tail_peak_share": float(h), "tail_width_ratio": float(k),
            "tail_light_fraction": float(h * k * k / ((1.0 - h) + h * k * k)),
            "deviance_gain": rec.get("deviance_gain"), "threshold": rec.get("threshold"),
            "n_columns_learned_on": rec.get("n_columns"), "trials": rec.get("trials"),
            "how": rec.get("how", "not learned")}


#: The detection and refinement are repeated (at most this many rounds in all) when the width or spacing measured
#: on the refined columns, or the noise model checked on their residuals, disagrees with what the round used.
MAX_SCALE_ROUNDS = 3
#: relative disagreement between the scale used and the scale measured that triggers another round
SCALE_TOLERANCE = 0.10
#: a width measured up to this much above the one used does not repeat the round: the fits measure their own
#: widths, the detection kernel loses little, and the separation only gets safer (a width measured below the one
#: used does repeat it: the separation may then have merged close columns)
WIDTH_TOLERANCE_UP = 0.25
#: the spacing used and the first pair-distance peak of the columns found may differ by this much before a note
SPACING_CHECK = 0.10
#: trackpy's minimum separation never exceeds this many column widths: the spacing estimate can be a shoulder
#: (dim columns beside bright ones are not maxima of the smoothed image), the width cannot
SEPARATION_SIGMA = 2.5
#: noise-model check (see noise_model): slope significance, smallest relative rise, and the gain range that
#: confirms raw counts (the residual variance of crowded fits reads 10-20 % under the level; common practice)
NOISE_SLOPE_T, NOISE_RISE, GAIN_CONFIRM = 3.0, 0.15, (0.7, 1.4)
#: Gauss-Seidel passes of the neighbour-subtracted refinement (it stops earlier when no column moves by CONVERGE_PX)
NEIGHBOUR_PASSES = 10
#: the neighbour passes have converged when no column moves by more than this, px: tight enough that a window of
#: the image (a tile) reaches the same fixed point as the whole image to well under 1e-3 px
CONVERGE_PX = 2e-4
#: side of the central sample the image-wide choices are settled on, px (the scale is a local property)
SETTLE_PX = 1024
#: an untiled image with a side longer than this is computed in internal tiles of INTERNAL_TILE_PX (same result)
INTERNAL_TILE_ABOVE_PX, INTERNAL_TILE_PX = 3072, 2048
#: default halo of a tile, in column spacings (plus 8 sigma): the background's two passes (each a Gaussian of 1.5
#: spacings truncated at 3 scales, the second masked by the first's sources), the smoothing and source masks
#: (4 sigma each), fit patches and the neighbour passes all reach less far
TILE_HALO_SPACINGS = 9.5
#: the detection field (the LoG) is handed to trackpy as 16-bit integers over this range around the sample's
#: own range (one quantisation for every window, so windows find the same maxima)
_LOG_MARGIN = 0.5


@dataclass
class _Settings:
    """Image-wide choices: every window is detected and fitted with them (picklable, for workers)."""

    sigma: float
    spacing: float
    noise: dict
    dark_columns: bool
    flatten: bool
    invert_at: float
    fill: float
    noise_sd: float | None = None
    levels: dict | None = None
    common_width: float | None = None
    share_widths: bool | None = None
    width_median: float | None = None
    tail_profile: list | None = None
    area_px: float = 0.0
    #: the column profile's tail [h, k] (``refine_columns``' ``tail``) and how it was learned; None: not yet
    tail: list | None = None
    tail_record: dict | None = None

    @property
    def diameter(self) -> int:
        d = int(math.ceil(DIAMETER_PER_SIGMA * self.sigma))
        return max(d + 1 - d % 2, 3)

    @property
    def separation(self) -> float:
        return max(min(0.5 * self.spacing, SEPARATION_SIGMA * self.sigma), 1.5)

    @property
    def patch_radius(self) -> int:
        return int(min(max(round(0.6 * self.spacing), math.ceil(2.5 * self.sigma)), math.ceil(3.0 * self.sigma)))

    @property
    def counts_like(self) -> bool:
        return self.noise["model"] != "white"

    @property
    def fit_counts(self) -> bool:
        return self.counts_like and not self.dark_columns

    @property
    def border_margin(self) -> float:
        # trackpy.locate's own exclusion zone at the image border (radius, half the separation)
        return max(self.diameter // 2, self.separation // 2 - 1)

    def learned(self, detail: dict) -> "_Settings":
        """A copy that holds the choices a window measured for itself (used by every other window)."""
        return replace(self, noise_sd=detail["noise_sd"], levels=detail["levels"],
                       common_width=detail["common_width"], share_widths=detail["share_widths"],
                       width_median=detail["width_median"], tail_profile=detail["tail_profile"],
                       tail=detail["tail"], tail_record=detail["tail_record"])


def _sample_window(ok) -> tuple[int, int, int, int]:
    """(r0, r1, c0, c1) of the sample the image-wide choices are settled on: the ``SETTLE_PX`` square window
    with the most valid pixels (the central one when all are valid; see ``_sanitize.best_window``)."""
    rows, cols = _sanitize.best_window(ok, (SETTLE_PX, SETTLE_PX))
    return rows.start, rows.stop, cols.start, cols.stop


def _window_data(img_w, ok_w, fill):
    """A window's pixels as float64 (masked ones filled with the image-wide fill value) and its mask."""
    okw = np.asarray(ok_w, dtype=bool)
    return np.where(okw, np.asarray(img_w, dtype=np.float64), fill), okw


def _settle(img, ok, sample, lengths, dark_columns, flatten, auto, notes, *, progress, frames_averaged=1):
    """Scale, noise model, detection levels and common width, settled in rounds on the central sample.

    Returns the settings, the last round's result on the sample (the answer when the sample is the image), the
    rounds' record and the polarity check.
    """
    r0, r1, c0, c1 = sample
    okw = np.asarray(ok[r0:r1, c0:c1], dtype=bool)
    raw = np.asarray(img[r0:r1, c0:c1])
    fill = float(np.median(raw[okw][::7])) if okw.any() else 0.0
    data = np.where(okw, raw, fill).astype(np.float64)
    report(progress, 0.0, "column scale")
    sigma, spacing, _ = _resolve_scale(data, okw, lengths, dark_columns, auto)
    invert_at = _valid_max(img, ok) if dark_columns else 0.0
    polarity = _check_polarity((invert_at - data) if dark_columns else data, okw, spacing, dark_columns, notes)
    noise = _initial_noise_model(data, okw, dark_columns, frames_averaged)
    core = (0, r1 - r0, 0, c1 - c0)
    rounds = []
    for rnd in range(MAX_SCALE_ROUNDS):
        span = (0.05 + 0.9 * rnd / MAX_SCALE_ROUNDS, 0.05 + 0.9 * (rnd + 1) / MAX_SCALE_ROUNDS)
        settings = _Settings(sigma=sigma, spacing=spacing, noise=noise, dark_columns=dark_columns, flatten=flatten,
                             invert_at=invert_at, fill=fill, area_px=float(okw.sum()))
        fit, counts_tab, detail = _analyse_window(data, okw, settings, origin=(r0, c0), core=core,
                                                  image_shape=img.shape, progress=sub_progress(progress, *span))
        meas = _measured_scale(fit)
        factor = (detail.get("tail_record") or {}).get("gaussian_width_factor")
        if factor and meas["sigma_px"]:  # a core + tail fit: the width the scale means is the Gaussian's
            meas["sigma_px"] *= factor
        new_noise = noise_model(fit, noise, dark_columns=dark_columns)
        rounds.append({"sigma_px": sigma, "spacing_px": spacing, "noise": noise["model"], "gain": noise.get("gain", 1.0),
                       "n_columns": int(len(fit)), "measured": meas, "noise_check": new_noise["check"]})
        change = {}
        if "diameter" not in lengths and meas["sigma_px"] and not (
                1 - SCALE_TOLERANCE <= meas["sigma_px"] / sigma <= 1 + WIDTH_TOLERANCE_UP):
            change["sigma"] = meas["sigma_px"]
        if "spacing" not in lengths and meas["spacing_px"] and abs(meas["spacing_px"] / spacing - 1) > SCALE_TOLERANCE:
            change["spacing"] = meas["spacing_px"]
        tried = {(r["noise"], round(r.get("gain", 1.0), 3)) for r in rounds}
        if (new_noise["model"] != noise["model"] or abs(new_noise.get("gain", 1.0) / noise.get("gain", 1.0) - 1) > 0.2) \
                and (new_noise["model"], round(new_noise.get("gain", 1.0), 3)) not in tried:  # no flip-flop
            change["noise"] = new_noise["model"]
        if not change or rnd == MAX_SCALE_ROUNDS - 1:
            break
        sigma = change.get("sigma", sigma)
        spacing = change.get("spacing", spacing)
        if "noise" in change:
            noise = new_noise
        rounds[-1]["changed"] = {k: (v if isinstance(v, str) else float(v)) for k, v in change.items()}
    auto["sigma"]["value_px"], auto["spacing"]["value_px"] = sigma, spacing
    if len(rounds) > 1:
        for key in ("sigma", "spacing"):
            if any(key in r.get("changed", {}) for r in rounds):
                auto[key]["how"] += (f"; re-measured from the refined columns ({'median width of well-measured fits' if key == 'sigma' else 'median nearest-neighbour distance'}) "
                                     f"and detection repeated")
    if sample != (0, img.shape[0], 0, img.shape[1]):
        auto["settled_on"] = {"window_px": list(sample), "how": f"central sample of at most {SETTLE_PX} px square"}
    settings = settings.learned(detail)
    settings.area_px = float(np.count_nonzero(ok))
    return settings, (fit, counts_tab, detail), rounds, polarity


def _valid_max(img, ok) -> float:
    """Largest valid value of the image, read in row bands (memory maps stay unread as a whole)."""
    best = -np.inf
    step = max(1, (64 << 20) // max(8 * img.shape[1], 1))
    for r in range(0, img.shape[0], step):
        band = np.asarray(img[r:r + step], dtype=np.float64)
        okb = np.asarray(ok[r:r + step], dtype=bool)
        if okb.any():
            best = max(best, float(band[okb].max()))
    return best if np.isfinite(best) else 0.0


def _work_image(data, settings):
    """The window in the units and polarity the detection and fits use: (work, count offset, count sign)."""
    if settings.noise["model"] == "scaled counts":
        g, o = settings.noise["gain"], settings.noise["offset"]
        data = (data - o) / g
        top = (settings.invert_at - o) / g
    else:
        top = settings.invert_at
    if settings.dark_columns:
        return top - data, top, -1.0
    return data, 0.0, 1.0


def _analyse_window(data, ok, settings, *, origin, core, image_shape, progress=None, z_cut=None):
    """Detection, significance cut, refinement and pruning of one window (the whole image, a sample or a tile).

    ``z_cut`` None: the cut is chosen from this window's candidates (the window is the image or its sample).
    """
    det = _detect_window(data, ok, settings, origin=origin, core=core, image_shape=image_shape, progress=progress)
    if z_cut is None:
        z_cut, cut_info = _significance_cut(det["z_core"], det["z_mirror_core"], settings.area_px or
                                            float(ok.sum()), settings.sigma)
        det["auto"]["significance"].update(cut_info)
    return _fit_window(data, ok, settings, det, z_cut, progress=progress)


def _detect_window(data, ok, settings, *, origin, core, image_shape, progress=None):
    """Candidates of one window: trackpy's maxima of the scale-normalised LoG, with their significance.

    A dim column on the flank of a bright neighbour is a maximum of the LoG (the blob detector; Lindeberg 1998)
    while in the plain smoothed image it is only a shoulder. The LoG is the discrete Laplacian of the already
    smoothed image: the same operator, a third of the work. The mirrored minima of the same detector in the
    window's core estimate the noise detections (``mirror_threshold``).
    """
    report(progress, 0.05, "detecting columns")
    t0 = time.perf_counter()
    s = settings
    work, offset, sign = _work_image(data, s)
    detect = work
    auto: dict = {}
    if s.flatten:
        blur = _smooth_surface(work, ok, 3.0 * s.spacing)
        detect = work - blur
        offset = offset + sign * blur  # recorded counts = offset + sign * detect
        auto["flatten"] = {"model": "quadratic surface + Gaussian blur of the rest", "gaussian_sigma_px": 3.0 * s.spacing,
                           "used_for": "detection only"}
    noise_sd = s.noise_sd
    if not s.counts_like and noise_sd is None:
        noise_sd = pixel_noise_sd(work, ok)
        if not (noise_sd and noise_sd > 0):
            noise_sd = float(np.std(work[ok])) or 1.0
    field = significance_map(detect, ok, sigma_px=s.sigma, spacing_px=s.spacing, counts=s.counts_like,
                             noise_sd=noise_sd, count_offset=offset, count_sign=sign, origin=origin, levels=s.levels)
    levels = field.levels
    blob = -_correlate.laplace(field.smooth) * np.float32(s.sigma**2)
    if "log_range" not in levels:
        v = blob[ok]
        lo, hi = (float(v.min()), float(v.max())) if v.size else (0.0, 1.0)
        span = max(hi - lo, 1e-30)
        levels["log_range"] = [lo - _LOG_MARGIN * span, hi + _LOG_MARGIN * span]
    lo, hi = levels["log_range"]
    q = blob - lo
    q *= 65535.0 / (hi - lo)
    np.clip(q, 0, 65535, out=q)
    q[~ok] = 0
    pos = _grey_maxima(q.astype(np.uint16), s.separation)
    del q
    n_raw_all = pos.shape[0]
    ys, xs = _subpixel_and_distinct(blob, pos, s, origin, image_shape)
    # minima over a square of about the area of trackpy's disk (radius = separation): separable, so cheap, and
    # noise minima come at about the density of noise maxima
    side = 2 * max(int(round(s.separation * math.sqrt(math.pi) / 2.0)), 1) + 1
    mins = (blob == window_min(blob, side)) & ok
    del blob
    mr, mc = np.nonzero(_core_mask(mins, core))
    z = field.z(ys, xs)
    sd = field.sd(ys, xs)
    in_core = _in_core(ys, xs, core)
    auto["trackpy"] = {"diameter_px": s.diameter, "diameter_how": "smallest odd integer >= 4.5 sigma",
                       "separation_px": s.separation,
                       "separation_how": f"min(0.5 x spacing, {SEPARATION_SIGMA} sigma), at least 1.5 px",
                       "percentile": 0, "function": "trackpy.find.grey_dilation's rule on the 16-bit LoG "
                                                    "(_grey_maxima: the same maxima, computed with array shifts)",
                       "subpixel": "parabola through the LoG maximum and its 4 neighbours (a start for the fits)"}
    auto["significance"] = {
        "noise": "Poisson variance of the smoothed counts" if s.counts_like else
                 f"per-pixel sd {noise_sd:.4g} (MAD of neighbour differences)",
        "how": "matched filter (Gaussian of the column width over a masked smooth background) divided by its "
               "standard error; cut = lowest level where mirrored noise minima allow 0.1 % false detections, "
               "between 3.5 sigma and the random-field threshold for the image area",
    }
    return {"xs": xs, "ys": ys, "z": z, "sd": sd, "in_core": in_core, "z_core": z[in_core],
            "z_mirror_core": -field.z_pixels(mr, mc),
            "n_raw_core": int(in_core.sum()), "n_raw_window": int(n_raw_all), "levels": levels,
            "noise_sd": noise_sd, "auto": auto, "detect_s": time.perf_counter() - t0,
            "inner": _inner_box(origin, image_shape, s.border_margin, data.shape),
            "background": (field.bg_coarse, field.factor, tuple(field.origin))}


def _grey_maxima(q, separation):
    """(row, col) of the maxima that ``trackpy.find.grey_dilation(q, separation, percentile=0, margin=0,
    precise=False)`` finds in the uint16 image ``q``, in its order, without its warnings (an empty result says so).

    trackpy's rule: a pixel equal to the largest value in the box of side ``int(2 separation / sqrt(2))`` (the
    largest square inside the disk; an even side reaches one pixel further after the pixel than before it, as
    ``scipy.ndimage.grey_dilation`` places it) and brighter than the dimmest non-zero pixel. The box maximum is
    ``_filters.window_max`` (exact, several times faster than scipy's filter); ``tests/test_filters.py`` checks
    the equality against trackpy itself.
    """
    side = max(int(2 * separation / math.sqrt(2)), 1)
    lit = q > 0
    if not lit.any():
        return np.zeros((0, 2), np.int64)
    dimmest = q.min(where=lit, initial=np.iinfo(q.dtype).max)
    peak = (q == window_max(q, side, before=side // 2 - (1 - side % 2))) & (q > dimmest)
    return np.argwhere(peak).astype(np.int64)


def _subpixel_and_distinct(blob, pos, s, origin, image_shape):
    """Maxima away from the image border (trackpy's margin), the dimmer of pairs closer than the separation
    dropped (as trackpy does), with a parabolic sub-pixel start position."""
    h, w = blob.shape
    gy, gx = pos[:, 0] + origin[0], pos[:, 1] + origin[1]
    m = s.border_margin
    keep = (gy >= m) & (gx >= m) & (gy <= image_shape[0] - m - 1) & (gx <= image_shape[1] - m - 1)
    pos = pos[keep]
    val = blob[pos[:, 0], pos[:, 1]] if pos.size else np.zeros(0, np.float32)
    if pos.shape[0] > 1:
        pairs = _correlate.close_pairs(pos, blob.shape, s.separation)  # (pos is row-major, as argwhere gives)
        if pairs.size:
            lose = np.where(val[pairs[:, 0]] < val[pairs[:, 1]], pairs[:, 0], pairs[:, 1])
            keep = np.ones(pos.shape[0], bool)
            keep[np.unique(lose)] = False
            pos, val = pos[keep], val[keep]
    r, c = pos[:, 0], pos[:, 1]
    off = []
    for dr, dc, n in ((1, 0, h), (0, 1, w)):
        lo_r, lo_c = np.clip(r - dr, 0, h - 1), np.clip(c - dc, 0, w - 1)
        hi_r, hi_c = np.clip(r + dr, 0, h - 1), np.clip(c + dc, 0, w - 1)
        a, b = blob[lo_r, lo_c].astype(np.float64), blob[hi_r, hi_c].astype(np.float64)
        den = a - 2.0 * val + b
        with np.errstate(divide="ignore", invalid="ignore"):
            d = np.where(den < 0, 0.5 * (a - b) / den, 0.0)
        off.append(np.clip(np.nan_to_num(d), -0.5, 0.5))
    return r + off[0], c + off[1]


def _inner_box(origin, image_shape, margin, shape):
    """(r0, r1, c0, c1), window coordinates, of the image without trackpy's border margin."""
    return (margin - origin[0], image_shape[0] - 1 - margin - origin[0],
            margin - origin[1], image_shape[1] - 1 - margin - origin[1])


def _in_core(ys, xs, core):
    """True for positions whose nearest pixel lies in the core window (r0, r1, c0, c1), window coordinates."""
    r0, r1, c0, c1 = core
    ri, ci = np.rint(ys), np.rint(xs)
    return (ri >= r0) & (ri < r1) & (ci >= c0) & (ci < c1)


def _core_mask(mask, core):
    r0, r1, c0, c1 = core
    out = np.zeros_like(mask)
    out[r0:r1, c0:c1] = mask[r0:r1, c0:c1]
    return out


def _significance_cut(z_cand, z_mirror, area_px, sigma):
    """One cut for the whole image, from all candidates and mirrored minima (see ``mirror_threshold``)."""
    z_rft = false_alarm_threshold(float(area_px), sigma)
    return mirror_threshold(np.asarray(z_cand), np.asarray(z_mirror), z_max=z_rft)


def _fit_window(data, ok, settings, det, z_cut, *, progress=None):
    """Refine the window's significant candidates, prune, joint position errors; counts over the core only."""
    s = settings
    work, _, _ = _work_image(data, s)
    sig = det["z"] >= z_cut
    xs, ys, z, sd, core = det["xs"][sig], det["ys"][sig], det["z"][sig], det["sd"][sig], det["in_core"][sig]
    counts_tab = {"trackpy_maxima": det["n_raw_core"], "after_significance": int(core.sum())}
    rad = s.patch_radius
    auto = dict(det["auto"])
    auto["significance"] = dict(auto["significance"], z_cut=float(z_cut))
    auto["patch_radius_px"] = {"value": rad, "how": "0.6 x spacing, clipped to [ceil(2.5 sigma), ceil(3 sigma)]"}
    report(progress, 0.3, f"refining {xs.size} columns")
    t0 = time.perf_counter()
    # the sample (no common width yet) learns it while it is fitted, from its central columns' votes
    votes = _width_votes(work.shape, xs, ys, s.spacing) if s.common_width is None else None
    fit = refine_columns(work, np.c_[xs, ys], sigma_px=s.sigma, valid=ok, counts=s.fit_counts, patch_radius_px=rad,
                         neighbour_passes=NEIGHBOUR_PASSES, converge_px=CONVERGE_PX, common_width_px=s.common_width,
                         share_widths=s.share_widths, width_votes=votes, tail=s.tail,
                         progress=sub_progress(progress, 0.3, 0.95))
    if s.tail is None:
        # the sample learns the column profile from its fitted columns; a significant tail refits it
        rec = learn_tail(work, fit, patch_radius_px=rad, votes=votes, valid=ok, counts=s.fit_counts,
                         share_widths=bool(fit.attrs["share_widths"]))
        s = replace(s, tail=rec["tail"], tail_record=rec)
        if rec["significant"]:
            # the settling rounds compare the Gaussian-equivalent width with the scale they used, as without a
            # tail: the core's width over the Gaussian's (median over the voters with a width of their own)
            gauss_free = fit["fit_status"].to_numpy() == "ok"
            gauss_sigma = fit["sigma_px"].to_numpy()
            fit = refine_columns(work, np.c_[xs, ys], sigma_px=s.sigma, valid=ok, counts=s.fit_counts,
                                 patch_radius_px=rad, neighbour_passes=NEIGHBOUR_PASSES, converge_px=CONVERGE_PX,
                                 common_width_px=s.common_width, share_widths=s.share_widths, width_votes=votes,
                                 tail=s.tail, progress=sub_progress(progress, 0.3, 0.95))
            both = gauss_free & (fit["fit_status"].to_numpy() == "ok") & (votes if votes is not None else True)
            if both.sum() >= 5:
                rec["gaussian_width_factor"] = float(np.median(gauss_sigma[both]) /
                                                     np.median(fit["sigma_px"].to_numpy()[both]))
    if votes is not None:
        s = _learned_width(fit, votes, s)
    passes = int(fit.attrs.get("neighbour_passes_done", 0))
    common, shared = s.common_width, s.share_widths
    t_refine = time.perf_counter() - t0
    fit["z_detect"] = z
    fit["_core"] = core
    if s.tail_profile is None:
        good = fit["fit_status"].isin(["ok", "fixed_width"]).to_numpy()
        # the detection's image: flattened when asked (the background grid describes that one)
        seen = work - _smooth_surface(work, ok, 3.0 * s.spacing) if s.flatten else work
        s = replace(s, tail_profile=_tail_profile(seen, fit, good, s, det["background"], s.tail))
    if s.tail_profile is not None:
        auto["tail_profile"] = {"r_px": s.tail_profile[0], "extra_per_peak": s.tail_profile[1],
                                "how": "smoothed residual around the bright columns beyond their fitted Gaussians, "
                                       "per unit of the smoothed peak; median over 16 directions and the columns, "
                                       "non-increasing outwards; subtracted with the Gaussian in the significance "
                                       "test given the neighbours"}
    fit, width_median = _prune(fit, xs, ys, z, sd, s, z_cut, counts_tab, auto, det["inner"])
    # position errors of the joint model, on the pruned table (duplicates and failed fits would make the groups'
    # Fisher matrices near-singular)
    if len(fit):
        # only the core's columns are kept: a tile's halo columns enter the groups but need no errors of their own
        err = joint_position_errors(work.shape, fit, patch_radius_px=rad, valid=ok, counts=s.fit_counts,
                                    rows=fit["_core"].to_numpy(), tail=s.tail)
        fit["x_err_px"], fit["y_err_px"] = err[:, 0], err[:, 1]
        fit["pos_err_px"] = 0.5 * (fit["x_err_px"] + fit["y_err_px"])
    if s.noise["model"] == "scaled counts":
        # back to image units: amplitudes, backgrounds and intensities in the units the user recorded
        g, o = s.noise["gain"], s.noise["offset"]
        for c in ("amplitude", "amplitude_err", "intensity"):
            fit[c] = fit[c] * g
        fit["background"] = fit["background"] * g + o
        fit["patch_mean"] = fit["patch_mean"] * g + o
    if s.dark_columns:
        # back to image units: the fitted background was measured on the inverted image
        top = s.invert_at
        fit["background"] = top - fit["background"]
    detail = {"auto": auto, "neighbour_passes": passes, "detect_s": det["detect_s"], "refine_s": t_refine,
              "still_moving": int(fit.attrs.get("columns_still_moving", 0)),
              "levels": det["levels"], "noise_sd": det["noise_sd"], "common_width": common, "share_widths": shared,
              "width_median": width_median, "z_cut": float(z_cut), "tail_profile": s.tail_profile, "tail": s.tail,
              "tail_record": s.tail_record}
    return fit, counts_tab, detail


#: side of the central part of the sample on which the common width of the fits is learned, px
COMMON_WIDTH_PX = 384
#: margin around that part, in spacings: its columns are fitted as neighbours but do not vote (the neighbour
#: lists and the fit patches reach about 2 spacings)
COMMON_WIDTH_MARGIN_SPACINGS = 3.0


def _width_votes(shape, xs, ys, spacing):
    """The columns whose fits decide the common width: those in the central part of the sample.

    ``refine_columns`` measures the common width (the median width of the bright free fits among the voters) while
    it iterates; learned once on the sample and then held fixed, every window is fitted with the same width, so a
    tiled run reaches the same fixed point as an untiled one. Only columns at least the margin inside the central
    part vote, so the sample's own edges (columns missing neighbours) never do.
    """
    h, w = shape
    m = COMMON_WIDTH_MARGIN_SPACINGS * spacing
    side = min(max(h, w), COMMON_WIDTH_PX + int(2 * m))
    r0, c0 = max(0, (h - side) // 2), max(0, (w - side) // 2)
    r1, c1 = min(h, r0 + side), min(w, c0 + side)
    return ((ys >= r0 + m) | (r0 == 0)) & ((ys < r1 - m) | (r1 == h)) & ((xs >= c0 + m) | (c0 == 0)) \
        & ((xs < c1 - m) | (c1 == w)) & (ys >= r0) & (ys < r1) & (xs >= c0) & (xs < c1)


def _learned_width(fit, votes, settings):
    """The settings with the common width, the crowding rule and the voters' median width of a fitted sample."""
    good = fit["fit_status"].isin(["ok", "fixed_width"]).to_numpy() & votes
    return replace(settings, common_width=float(fit.attrs["common_width_px"]),
                   share_widths=bool(fit.attrs["share_widths"]),
                   width_median=float(np.nanmedian(fit["sigma_px"].to_numpy()[good])) if good.sum() >= 5 else None)


def _prune(fit, xs, ys, z_cand, sd_cand, settings, z_cut, counts_tab, auto, inner):
    """Drop failed fits, fits that slid to another column, insignificant ones given their neighbours, width
    outliers and duplicates; counts (of the window's core) after each step go to ``counts_tab``.

    Returns the pruned table and the median width the outlier test used.
    """
    sigma, spacing = settings.sigma, settings.spacing
    core = fit["_core"].to_numpy()
    status = fit.loc[core, "fit_status"].value_counts().to_dict()
    counts_tab["fit_status"] = {str(k): int(v) for k, v in status.items()}
    good = fit["fit_status"].isin(["ok", "fixed_width"]).to_numpy().copy()
    # A fit that slid more than half a spacing off its candidate has found some other column (or a background
    # bump): the candidate's significance no longer describes it.
    slid = np.hypot(fit["x_px"].to_numpy() - xs, fit["y_px"].to_numpy() - ys) > max(1.5, 0.5 * spacing)
    # a fit that ends in the border zone where no candidate may start (trackpy's margin) is cut by the border
    r0, r1, c0, c1 = inner
    fx, fy = fit["x_px"].to_numpy(), fit["y_px"].to_numpy()
    slid |= ~((fy >= r0) & (fy <= r1) & (fx >= c0) & (fx <= c1))
    good &= ~slid
    counts_tab["slid_off_candidate"] = int((slid & core).sum())
    # Significance given the neighbours: the detection statistic also counts the tails of nearby columns, so a
    # gap between bright columns can look significant; subtract every other fitted column's smoothed light.
    fit["snr"] = z_cand - _neighbour_light(fit, good, sigma, settings.tail_profile, settings.tail) / sd_cand
    fit = fit[good & (fit["snr"].to_numpy() >= z_cut)].copy()
    counts_tab["after_neighbour_significance"] = int(fit["_core"].sum())
    # Every column is imaged by the same probe: a well-measured fit (significance above 10) far narrower or
    # wider than the common width is a noise spike or a background bump (common practice: 0.5-2 x the median
    # width). Faint columns are exempt: their fitted widths scatter widely by noise alone.
    width_median = settings.width_median
    if width_median is None and len(fit) >= 5:
        width_median = float(np.nanmedian(fit["sigma_px"].to_numpy()))
    if width_median is not None and len(fit):
        ratio = fit["sigma_px"].to_numpy() / width_median
        odd = (fit["snr"].to_numpy() > 10.0) & ((ratio < WIDTH_RANGE[0]) | (ratio > WIDTH_RANGE[1]))
        fit = fit[~odd].copy()
        auto["width_range"] = {"relative_to_median": list(WIDTH_RANGE), "median_sigma_px": width_median,
                               "applies_above_z": 10.0, "how": "common practice"}
    counts_tab["after_width"] = int(fit["_core"].sum())
    if len(fit) > 1:  # duplicates: candidates that converged on the same column keep the more significant one
        xy = fit[["x_px", "y_px"]].to_numpy()
        pairs = cKDTree(xy).query_pairs(max(1.0, sigma, 0.4 * spacing), output_type="ndarray")
        if pairs.size:
            snr = fit["snr"].to_numpy()
            lose = np.where(snr[pairs[:, 0]] < snr[pairs[:, 1]], pairs[:, 0], pairs[:, 1])
            fit = fit.drop(fit.index[np.unique(lose)])
    counts_tab["after_duplicates"] = int(fit["_core"].sum())
    return fit, width_median


def _run_windows(img, ok, settings, tile_size, overlap_px, execution, progress):
    """Detection in every window, one significance cut, fits in every window, each column kept by one core.

    The untiled run of an image larger than the sample is one window: the whole image.
    """
    from ._tasks import map_tasks, tile_grid, Execution

    h, w = img.shape
    if tile_size is None:
        grid = [((0, h, 0, w), (0, h, 0, w))]
        overlap = 0
    else:
        overlap = overlap_px if overlap_px is not None else max(
            32, int(math.ceil(TILE_HALO_SPACINGS * settings.spacing + 8.0 * settings.sigma)))
        grid = tile_grid((h, w), int(tile_size), int(overlap))
    serial = execution is None or not execution.parallel
    execution = execution or Execution(workers=1)
    wins = [_halo_window(core, halo, settings) for core, halo in grid]
    # each task gets only its window (a view, or a slice read from a memory map), never the whole image
    tasks = [(_detect_task, (img[w0:w1, v0:v1], ok[w0:w1, v0:v1], (w0, v0), core_w, img.shape, settings))
             for (w0, w1, v0, v1), core_w in wins]
    dets: list = [None] * len(tasks)
    report(progress, 0.0, f"detecting columns in {len(grid)} window(s)")
    runner = _threaded(tasks) if serial and len(tasks) > 1 else map_tasks(tasks, execution)
    for done, (k, res) in enumerate(runner, start=1):
        dets[k] = res
        report(progress, 0.3 * done / len(tasks), f"detection: window {done} of {len(tasks)}")
    z_cut, cut_info = _significance_cut(np.concatenate([d["z_core"] for d in dets]),
                                        np.concatenate([d["z_mirror_core"] for d in dets]), settings.area_px,
                                        settings.sigma)
    tasks = [(_fit_task, (img[w0:w1, v0:v1], ok[w0:w1, v0:v1], (w0, v0), settings, det, z_cut))
             for ((w0, w1, v0, v1), _), det in zip(wins, dets)]
    parts: list = [None] * len(tasks)
    for done, (k, res) in enumerate(map_tasks(tasks, execution), start=1):
        parts[k] = res
        report(progress, 0.3 + 0.7 * done / len(tasks), f"fits: window {done} of {len(tasks)}")
    fits = [p[0] for p in parts]
    fit = pd.concat([f for f in fits if len(f)], ignore_index=True) if any(len(f) for f in fits) else fits[0]
    counts_tab: dict = {}
    for _, c, _ in parts:
        for key, v in c.items():
            if isinstance(v, dict):
                sub = counts_tab.setdefault(key, {})
                for k2, v2 in v.items():
                    sub[k2] = sub.get(k2, 0) + v2
            else:
                counts_tab[key] = counts_tab.get(key, 0) + v
    detail = dict(parts[0][2])
    detail["auto"] = dict(detail["auto"])
    detail["auto"]["significance"] = dict(detail["auto"]["significance"], **cut_info)
    detail["neighbour_passes"] = max(p[2]["neighbour_passes"] for p in parts)
    detail["still_moving"] = sum(p[2]["still_moving"] for p in parts)
    detail["detect_s"] = sum(d["detect_s"] for d in dets)
    detail["refine_s"] = sum(p[2]["refine_s"] for p in parts)
    tiling = {"windows": len(grid), "n_tiles": len(grid) if tile_size is not None else 0,
              "tile_size_px": None if tile_size is None else int(tile_size), "overlap_px": int(overlap),
              "seam_duplicates_removed": 0,
              "how": "image-wide choices settled once on the central sample; every window detects and fits with "
                     "them; one significance cut from all windows' candidates; each column kept by the window "
                     "whose core holds its candidate pixel"}
    return fit, counts_tab, detail, tiling


def _threaded(tasks):
    """Yield ``(index, func(*args))`` from a pool of threads, one per usable core: for the detection, whose
    filters release the GIL (scipy.ndimage), never for the fits (their numba kernel is parallel already)."""
    from concurrent.futures import ThreadPoolExecutor, as_completed

    from ._resources import usable_cores

    with ThreadPoolExecutor(max_workers=min(usable_cores(), len(tasks))) as pool:
        futures = {pool.submit(func, *args): k for k, (func, args) in enumerate(tasks)}
        try:
            for fut in as_completed(futures):
                yield futures[fut], fut.result()
        finally:
            for fut in futures:
                fut.cancel()


def _halo_window(core, halo, settings):
    """The halo window with its origin moved down to a multiple of the background block (same blocks as the
    whole image) and the core in window coordinates."""
    f = max(1, int(BG_SCALE_SPACINGS * settings.spacing // 3))
    r0, r1, c0, c1 = halo
    r0, c0 = (r0 // f) * f, (c0 // f) * f
    cr0, cr1, cc0, cc1 = core
    return (r0, r1, c0, c1), (cr0 - r0, cr1 - r0, cc0 - c0, cc1 - c0)


def _detect_task(img_w, ok_w, origin, core_w, image_shape, settings):
    data, okw = _window_data(img_w, ok_w, settings.fill)
    return _detect_window(data, okw, settings, origin=origin, core=core_w, image_shape=image_shape)


def _fit_task(img_w, ok_w, origin, settings, det, z_cut):
    data, okw = _window_data(img_w, ok_w, settings.fill)
    fit, counts_tab, detail = _fit_window(data, okw, settings, det, z_cut)
    fit = fit[fit["_core"].to_numpy()].copy()
    fit["x_px"] += origin[1]
    fit["y_px"] += origin[0]
    return fit, counts_tab, detail


def _finish(fit, counts_tab, settings, auto, notes, *, regions, min_mass, pixel_size_nm, n_species, rng, progress,
            timings):
    """The shared last step: min_mass, regions, spacing check, ids, nm columns, species, the conformed table."""
    t0 = time.perf_counter()
    fit = fit.drop(columns=["_core"], errors="ignore")
    if min_mass is not None:
        fit = fit[fit["intensity"].to_numpy() >= float(min_mass)]
        counts_tab["after_min_mass"] = int(len(fit))
    fit = _keep_in_regions(fit, regions, counts_tab)
    _check_spacing_used(fit, settings.spacing, auto, notes)
    fit = fit.sort_values(["y_px", "x_px"], kind="stable").reset_index(drop=True)
    fit["id"] = np.arange(len(fit), dtype=np.int64)
    ps = np.nan if pixel_size_nm is None else float(pixel_size_nm)
    for q in ("x", "y", "sigma", "pos_err"):
        fit[f"{q}_nm"] = fit[f"{q}_px"] * ps
    if pixel_size_nm is None:
        notes.append("image uncalibrated: *_nm columns are NaN")
    report(progress, 0.9, "species")
    fit["species"] = -1
    fit["species_prob"] = np.nan
    timings["finish"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    fit, sp_info = classify_species(fit, n_species=n_species, rng=rng)
    timings["species"] = time.perf_counter() - t0
    notes.extend(n for n in sp_info.get("notes", []) if n not in notes)
    fit, auto["misfit"] = _widen_for_misfit(fit, settings, notes)
    if pixel_size_nm is not None:
        fit["pos_err_nm"] = fit["pos_err_px"] * float(pixel_size_nm)
    if len(fit) == 0:
        notes.append("no columns survived the filters")
    extras = ["x_err_px", "y_err_px", "amplitude_err", "snr"]
    table = _schema.conform(fit[[f.name for f in _schema.COLUMNS] + extras], _schema.COLUMNS)
    return table, {"species": sp_info, "timings_s": dict(timings)}


#: the model misfits a species when the median Pearson chi-square per degree of freedom of its fits exceeds 1 by
#: more than this many standard errors of that median and by more than MISFIT_MIN (Poisson-weighted fits only)
MISFIT_SE, MISFIT_MIN = 3.0, 0.02


def _widen_for_misfit(fit, settings, notes):
    """Position and amplitude errors widened per species by sqrt(chi2/dof) where the model misfits its columns.

    The inverse Fisher information is the error of a model that describes the data. For Poisson-weighted fits the
    Pearson chi-square per degree of freedom of each column's patch (``pearson_chi2 / (n_pixels - 5)``) is 1 when
    it does (its median over n columns has a standard error of about 1.2533 sqrt(2 / dof) / sqrt(n)); where the
    species' median stands significantly above 1 the errors of that species are multiplied by its square root,
    the usual scaling of a covariance by the reduced chi-square (e.g. Bevington & Robinson, Data Reduction and
    Error Analysis, 3rd ed. (2003), sec. 6.5 and 11.5, from memory). Where the model is good nothing changes.
    Unweighted (white-noise) fits already scale their covariance by the residual variance.
    """
    record: dict = {"how": "errors x sqrt(median Pearson chi2/dof) per species where that median exceeds 1 by more "
                           f"than {MISFIT_SE:g} standard errors and {MISFIT_MIN:g}", "species": {}}
    if not settings.fit_counts or len(fit) == 0 or "pearson_chi2" not in fit:
        record["skipped"] = "unweighted fits: the covariance is already scaled by the residual variance" \
            if len(fit) else "no columns"
        return fit, record
    dof = np.maximum(fit["n_pixels"].to_numpy(dtype=np.float64) - 5.0, 1.0)
    red = fit["pearson_chi2"].to_numpy() / dof
    species = fit["species"].to_numpy()
    fit = fit.copy()
    for sp in np.unique(species):
        sel = (species == sp) & np.isfinite(red)
        if sel.sum() < 10:
            continue
        med = float(np.median(red[sel]))
        se = 1.2533 * math.sqrt(2.0 / float(np.median(dof[sel]))) / math.sqrt(sel.sum())
        factor = math.sqrt(med) if med > 1.0 + max(MISFIT_SE * se, MISFIT_MIN) else 1.0
        record["species"][str(int(sp))] = {"chi2_per_dof_median": med, "standard_error": se, "n": int(sel.sum()),
                                           "error_factor": factor}
        if factor > 1.0:
            rows = species == sp
            for c in ("x_err_px", "y_err_px", "pos_err_px", "amplitude_err"):
                fit.loc[rows, c] = fit.loc[rows, c] * factor
            notes.append(f"species {int(sp)}: the column model misfits its columns (median Pearson chi2/dof "
                         f"{med:.3f} over {int(sel.sum())} columns); their position errors are widened by x{factor:.3f}")
    return fit, record


def _check_inputs(image, valid, pixel_size_nm, diameter_nm, spacing_nm, diameter_px, spacing_px):
    """The image as an array, its usable-pixel mask and the length overrides in px (with how each was given)."""
    img = np.asarray(image)
    if img.ndim != 2:
        raise TenfoldInputError(f"find_columns: image must be 2-D, got shape {img.shape}; pass a single frame")
    if img.size == 0:
        raise TenfoldInputError("find_columns: image is empty")
    if not (np.issubdtype(img.dtype, np.number) and not np.iscomplexobj(img)):
        raise TenfoldInputError(f"find_columns: image dtype {img.dtype} is not real-valued numbers")
    ok = np.isfinite(img)
    if valid is not None:
        v = np.asarray(valid, dtype=bool)
        if v.shape != img.shape:
            raise TenfoldInputError(f"find_columns: valid mask shape {v.shape} differs from image {img.shape}")
        ok &= v
    if ok.sum() < 16:
        raise TenfoldInputError("find_columns: fewer than 16 valid pixels; nothing to analyse")
    check_pixel_size(pixel_size_nm, plausible=False)
    lengths = {}
    for what, nm, px in (("diameter", diameter_nm, diameter_px), ("spacing", spacing_nm, spacing_px)):
        length = length_px(f"column_{what}", nm=nm, px=px, pixel_size_nm=pixel_size_nm)  # the one nm -> px
        if length.value_px is not None:
            lengths[what] = (length.value_px, f"given (column_{what}_{'nm' if nm is not None else 'px'})")
    return img, ok, lengths


def _resolve_scale(data, ok, lengths, dark_columns, auto):
    """Starting width and spacing (px): the overrides, else ``estimate_scale``; recorded in ``auto``."""
    est = estimate_scale(data, valid=ok, dark_columns=dark_columns) if len(lengths) < 2 else None
    spacing, how = lengths["spacing"] if "spacing" in lengths else (est.spacing_px, est.spacing_method)
    auto["spacing"] = {"value_px": spacing, "how": how, "start_px": spacing}
    if "diameter" in lengths:
        sigma, how = lengths["diameter"][0] / DIAMETER_PER_SIGMA, lengths["diameter"][1] + f" / {DIAMETER_PER_SIGMA}"
    else:
        sigma, how = est.sigma_px, est.sigma_method
    auto["sigma"] = {"value_px": sigma, "how": how, "start_px": sigma}
    if est is not None:
        auto["scale_details"] = est.details
    if not (sigma > 0.3 and spacing > 2 * sigma * 0.9):
        raise TenfoldInputError(f"find_columns: column width {sigma:.2f} px and spacing {spacing:.2f} px are not "
                                "usable (need sigma > 0.3 px and spacing > 1.8 sigma); check the column diameter / "
                                "spacing overrides")
    return sigma, spacing, est


def _check_polarity(work, ok, spacing, dark_columns, notes):
    skew = polarity_skewness(work, ok, spacing_px=spacing)
    polarity = {"skewness": skew, "dark_columns": bool(dark_columns), "looks_wrong": bool(skew < -0.1)}
    if polarity["looks_wrong"]:
        msg = (f"find_columns: dark_columns={dark_columns} looks wrong for this image (skewness of the analysed "
               f"image {skew:.2f} < 0, i.e. the columns seem {'bright' if dark_columns else 'dark'}); "
               f"try dark_columns={not dark_columns}")
        warnings.warn(msg, TenfoldWarning, stacklevel=3)
        notes.append(msg)
    return polarity


def _initial_noise_model(data, ok, dark_columns, frames_averaged=1):
    """Noise model for the first round: raw counts if every value is a non-negative whole number, else white.

    The mean of ``frames_averaged`` > 1 frames of raw counts starts as counts scaled by ``1 / frames_averaged``.
    This guess is checked after the first round against the fit residuals (``noise_model``): an integer image
    whose variance does not equal its mean (a contrast-stretched 8-bit export, counts x 1000) is converted to
    equivalent counts or treated as white noise there.
    """
    if frames_averaged > 1 and not dark_columns:  # the caller knows the frames held counts
        return {"model": "scaled counts", "gain": 1.0 / frames_averaged, "offset": 0.0,
                "how": f"mean of {frames_averaged} frames of raw counts: counts = image x {frames_averaged} (checked "
                       "after the first round)", "check": None}
    counts = False
    if not dark_columns:
        v = data[ok]
        head = v[:1 << 14]  # most non-integer images show it in their first pixels: the full test is then skipped
        counts = bool(np.all(head >= 0) and np.array_equal(np.rint(head), head) and np.all(v >= 0)
                      and np.array_equal(np.rint(v), v))
    return {"model": "counts" if counts else "white", "gain": 1.0, "offset": 0.0,
            "how": "integer non-negative values: assumed raw counts (checked after the first round)" if counts else
                   "not raw counts by their values: white noise (checked after the first round)",
            "check": None}


def noise_model(fit: pd.DataFrame, current: dict, *, dark_columns: bool = False) -> dict:
    """Check the noise model against the fit residuals: variance = gain x (level - offset)?

    For Poisson counts recorded with a gain g and an offset o, the residual variance of each column fit
    (``(residual x amplitude)^2``) equals ``g (m - o)`` with m the mean data level over its patch; for white noise
    it does not depend on m. A straight line through (m, variance) of the fitted columns (robust: median in
    level bins, least squares through the bin medians) decides: when its slope is significant (t above
    ``NOISE_SLOPE_T``) and the variance rises by more than ``NOISE_RISE`` of its lowest value over the range of
    levels, the image is treated as scaled counts ``(image - o) / g``; otherwise as white noise. Raw counts are
    kept when g is within ``GAIN_CONFIRM``.

    Returns
    -------
    dict
        ``model`` ('counts', 'scaled counts' or 'white'), ``gain``, ``offset`` (in the units of the analysed
        image, i.e. after the first round's conversion), ``check`` (the line and the levels it used), ``how``.
    """
    out = dict(current)
    good = fit["fit_status"].isin(["ok", "fixed_width"]).to_numpy() if len(fit) else np.zeros(0, bool)
    if dark_columns or good.sum() < 30 or "patch_mean" not in fit:
        out["check"] = {"skipped": "dark columns (no counts model)" if dark_columns else "too few fitted columns"}
        return out
    n_px = fit["n_pixels"].to_numpy(dtype=np.float64)[good]
    lev = fit["patch_mean"].to_numpy()[good]
    if current["model"] == "scaled counts":  # back to the units of this round's converted image
        lev = (lev - current["offset"]) / current["gain"]
    if current["model"] == "white":
        # unweighted fits: residual variance per degree of freedom (``residual`` is relative to the amplitude)
        amp = fit["amplitude"].to_numpy()[good]
        var = (fit["residual"].to_numpy()[good] * amp) ** 2 * n_px / np.maximum(n_px - 5, 1)
    else:
        # Poisson-weighted fits: the Pearson chi-square per degree of freedom is the variance / level ratio with
        # the fit's own leverage taken out (bright columns pull their peak pixels towards the data)
        var = fit["pearson_chi2"].to_numpy()[good] / np.maximum(n_px - 5, 1) * lev
    fin = np.isfinite(var) & np.isfinite(lev)
    var, lev = var[fin], lev[fin]
    if var.size < 30 or np.ptp(lev) <= 0:
        out["check"] = {"skipped": "no spread of levels"}
        return out
    edges = np.quantile(lev, np.linspace(0, 1, 9))
    b = np.clip(np.searchsorted(edges, lev, side="right") - 1, 0, 7)
    m_b = np.array([np.median(lev[b == i]) for i in range(8) if (b == i).sum() >= 3])
    v_b = np.array([np.median(var[b == i]) for i in range(8) if (b == i).sum() >= 3])
    (slope, icpt), cov = np.polyfit(m_b, v_b, 1, cov=True) if m_b.size > 3 else (np.polyfit(m_b, v_b, 1), np.eye(2))
    t_slope = float(slope / math.sqrt(cov[0, 0])) if cov[0, 0] > 0 else float("inf")
    rise = slope * (m_b.max() - m_b.min()) / max(v_b.min(), 1e-300)
    ratio = float(np.median(var / np.maximum(lev, 1e-300)))
    check = {"levels": m_b.tolist(), "variances": v_b.tolist(), "slope": float(slope), "intercept": float(icpt),
             "rise_over_range": float(rise), "slope_t": t_slope, "variance_over_level": ratio}
    out["check"] = check
    if lev.min() > 0 and GAIN_CONFIRM[0] <= ratio <= GAIN_CONFIRM[1]:
        # variance = level: counts (raw, or as converted in this round)
        if current["model"] == "white":
            out.update(model="counts", gain=1.0, offset=0.0,
                       how=f"residual variance equals the level (ratio {ratio:.3f}): Poisson counts")
        else:
            out["how"] = current["how"].split(" (checked")[0] + f"; confirmed: residual variance / level = {ratio:.3f}"
    elif slope > 0 and t_slope > NOISE_SLOPE_T and rise > NOISE_RISE:
        # compose with the conversion already applied in this round
        g0, o0 = current.get("gain", 1.0), current.get("offset", 0.0)
        gain, offset = float(slope), float(-icpt / slope)
        out.update(model="scaled counts", gain=g0 * gain, offset=o0 + g0 * offset,
                   how=f"residual variance grows with the level: counts = (image - {o0 + g0 * offset:.4g}) / "
                       f"{g0 * gain:.4g} (gain and offset from the fit residuals)")
    else:
        out.update(model="white", gain=1.0, offset=0.0,
                   how="residual variance does not grow with the level: white noise, unweighted fits")
    return out


def _nearest_distances(fit):
    """Each column's distance to its nearest neighbour, px (one KD-tree query)."""
    xy = fit[["x_px", "y_px"]].to_numpy()
    return cKDTree(xy).query(xy, k=2)[0][:, 1]


def _measured_scale(fit):
    """Width (median of well-measured fits) and spacing (median nearest-neighbour distance) of the columns found."""
    out = {"sigma_px": None, "spacing_px": None, "n_well_measured": 0}
    if len(fit) < 20:
        return out
    okw = (fit["fit_status"] == "ok").to_numpy() & (fit["snr"].to_numpy() > 10.0)
    out["n_well_measured"] = int(okw.sum())
    if okw.sum() >= 10:
        out["sigma_px"] = float(np.median(fit["sigma_px"].to_numpy()[okw]))
    out["spacing_px"] = float(np.median(_nearest_distances(fit)))
    return out


def _keep_in_regions(fit, regions, counts_tab):
    region = np.zeros(len(fit), dtype=np.int64)
    if regions:
        region = label_points(fit["x_px"].to_numpy(), fit["y_px"].to_numpy(), regions)
        fit = fit[region > 0].copy()
        region = region[region > 0]
        counts_tab["after_regions"] = int(len(fit))
    fit["region"] = region
    return fit


def _check_spacing_used(fit, spacing, auto, notes):
    """After the fact: the spacing used against the first peak of the columns' nearest-neighbour distances."""
    if len(fit) < 20:
        return
    d = _nearest_distances(fit)
    hist, edges = np.histogram(d, bins=np.linspace(0, 2.5 * np.median(d), 51))
    i = int(np.argmax(hist))
    peak = 0.5 * (edges[i] + edges[i + 1])
    auto["spacing_check"] = {"spacing_used_px": float(spacing), "nearest_neighbour_peak_px": float(peak),
                             "median_nearest_neighbour_px": float(np.median(d)), "tolerance": SPACING_CHECK}
    if abs(peak / spacing - 1.0) > SPACING_CHECK:
        notes.append(f"find_columns: the column spacing used ({spacing:.2f} px) differs by "
                     f"{100 * (peak / spacing - 1):+.0f} % from the first peak of the columns' nearest-neighbour "
                     f"distances ({peak:.2f} px); if the spacing was given, check it, else columns may be missing "
                     "or doubled")


def _json_safe(o):
    if isinstance(o, dict):
        return {str(k): _json_safe(v) for k, v in o.items()}
    if isinstance(o, (list, tuple)):
        return [_json_safe(v) for v in o]
    if isinstance(o, (np.integer,)):
        return int(o)
    if isinstance(o, (np.floating, float)):
        return float(o) if math.isfinite(o) else None
    if isinstance(o, np.bool_):
        return bool(o)
    return o
