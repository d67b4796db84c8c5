"""Frame series: register the frames of a drifting stack to one reference frame and average them.

A stack of fast, low-dose frames is aligned before it is averaged, so specimen drift between frames does not smear
the columns. The steps:

1. **Registration images.** A central crop (at most ``REGISTER_PX`` on a side) of every frame, mean removed, tapered
   at its edges by a Tukey window, Fourier transformed once.
2. **Weights.** Cross-correlations are weighted per spatial frequency by the share of a frame's power that is signal
   (a Wiener-like weight: ``1 - n0 / P(q)``, ``P`` the mean frame power, ``n0`` the white-noise floor measured at
   the highest frequencies), with the lowest frequencies (ramps, the window) removed. At low dose per frame this is
   much more robust than phase correlation, which gives every frequency, noise-only ones too, the same weight.
3. **First guess.** Consecutive frames are registered to each other (whole correlation map, integer peak), and the
   steps are summed.
4. **Template rounds.** Each frame is registered to the mean of all *other* used frames, aligned with the current
   shifts (leave-one-out, so a frame's own noise cannot pull its shift towards the template). The first two rounds
   search the whole correlation map again; every round refines the peak to sub-pixel precision by Newton steps on
   the correlation function evaluated exactly from the cross-power spectrum (the same exact-DFT refinement idea
   as the upsampled correlation of Guizar-Sicairos et al. 2008, without a grid). Rounds stop when no shift moves
   by more than ``CONVERGED_PX``.
5. **Outlier frames.** A frame whose correlation with the template is far below the others' (robust z below
   ``REJECT_Z`` and below ``REJECT_FRACTION`` of the median) is left out of the mean, with the reason in the table.
6. **Mean.** Every used frame is shifted into the reference frame's coordinates by an exact Fourier shift of the
   frame, padded by reflection so nothing wraps around, and averaged. Pixels that some used frame does not cover are
   marked invalid (no columns are reported there).
7. **Optional non-rigid step** (``nonrigid=True``): scan distortions that change from frame to frame (slow-scan
   drift, row wobble) are measured as a smooth displacement per image row: strips of rows are registered to the
   rigid mean, a smoothing spline through the strip shifts gives each row's displacement, and each frame is
   resampled (cubic spline) before a second mean.

Shifts follow one convention: ``shift_x_px`` is how far the specimen appears moved in a frame relative to the
reference frame (``frame(x) = reference(x - shift)``), so a column at ``x`` in the reference sits at ``x + shift``
in that frame. The aligned mean is in the reference frame's coordinates.

The precision of each shift is reported as ``shift_sd_px``: a sandwich estimate of the correlation-peak estimator
(``var = sum_p (d T_w)^2 v_p / (sum_p d T_w d T)^2``, ``T`` the mean, ``T_w`` the weighted template, ``v_p`` the
variance of one frame about the mean measured at every pixel, so Poisson noise, detector noise and whatever the rigid
model leaves all count), with the template's own noise and the reference frame's error added. On the drifting test
stacks it is within 15 % of the actual RMS error (``benchmarks/bench_frames.py``). The white-noise Cramer-Rao
bound (``var = n0 / sum_q 4 pi^2 q^2 S(q)``, e.g. Kay, Fundamentals of Statistical Signal Processing I, 1993,
ch. 3) is used only to refuse frames that hold no structure.

References
----------
Guizar-Sicairos, M., Thurman, S. T. & Fienup, J. R. Efficient subpixel image registration algorithms. Opt. Lett.
33, 156-158 (2008).
Berkels, B. et al. Optimized imaging using non-rigid registration. Ultramicroscopy 138, 46-56 (2014) (from memory).
Yankovich, A. B. et al. Picometre-precision analysis of scanning transmission electron microscopy images of
platinum nanocatalysts. Nat. Commun. 5, 4155 (2014) (from memory).
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass, field
from functools import cached_property

import numpy as np
import pandas as pd
from scipy import fft as sfft

from ._errors import TenfoldInputError
from ._progress import ProgressCallback, report, sub_progress
from ._schema import FRAMES, conform

__all__ = ["FrameAlignment", "align_frames", "FRAME_COLUMNS", "plain_mean", "shifts_figure"]

#: largest side of the central crop used to measure shifts (a rigid shift is the same everywhere)
REGISTER_PX = 1024
#: side of the central crop for the first guess (whole pixels only)
GUESS_PX = 512
#: registration crops of all frames together stay below this many pixels (memory: 8 bytes per pixel)
REGISTER_BUDGET_PX = 48_000_000
#: Tukey taper of the registration crops: fraction of each side that is tapered
TAPER = 0.15
#: frequencies below this many Fourier rings of the crop are ignored (ramps, the window itself)
LOW_CUT_RINGS = 4.0
#: the noise floor is the median power above this fraction of the Nyquist frequency
NOISE_BAND = 0.8
#: template rounds stop when no shift moves more than this (px)
CONVERGED_PX = 1e-3
MAX_ROUNDS = 8
NEWTON_STEPS = 4
#: outlier frames: robust z of the correlation below this, and correlation below this fraction of the median
REJECT_Z = -5.0
REJECT_FRACTION = 0.8
#: below this share of the frames' power in structure (noise alone gives < 0.005 on 64-512 px frames, a decagonal
#: frame with 2.5 counts per column peak 0.14; measured in tests/test_frames.py) the frames cannot be registered
MIN_SIGNAL_SHARE = 0.02
#: consecutive frames whose second correlation peak reaches this share of the first show a repeating structure
PERIODIC_RATIO = 0.8
#: non-rigid step: rows per strip (at least), and strips per frame (at most)
STRIP_ROWS = 32
MAX_STRIPS = 32

#: columns of :attr:`FrameAlignment.table` (the ``frames.csv`` contract, ``_schema.FRAMES``)
FRAME_COLUMNS = tuple(f.name for f in FRAMES)

_WORKERS = max(1, min(2, os.cpu_count() or 1))


@dataclass
class FrameAlignment:
    """The aligned mean of a stack and how each frame was moved.

    Attributes
    ----------
    mean : ndarray, float32 (H, W)
        Mean of the used frames in the reference frame's coordinates.
    valid : ndarray, bool (H, W)
        True where every used frame covers the pixel (and was valid there).
    table : DataFrame
        One row per frame (:data:`FRAME_COLUMNS`): ``frame`` (index in the file), ``shift_x_px``, ``shift_y_px``
        (specimen displacement relative to the reference frame), ``correlation`` (weighted correlation
        coefficient with the mean of the other frames), ``used``, ``reason`` (why a frame was left out),
        ``shift_sd_px`` (standard deviation of each shift component relative to the reference frame, measured
        from the frames' own noise; 0 for the reference), ``wobble_rms_px`` (non-rigid step: RMS of the
        per-row displacement beyond the rigid shift; NaN without it).
    info : dict
        ``method`` ('rigid' or 'rigid + non-rigid rows'), ``reference`` (frame index),
        ``n_frames``, ``n_used``, ``rejected`` (frame indices), ``rounds``, ``residual_drift_px`` (largest shift
        change in the last round), ``drift_px_per_frame`` (straight-line fit through the shifts, x and y),
        ``path_px`` (total length of the drift path), ``covered_fraction``, ``register_crop_px``, ``notes``.
    row_shift_px : ndarray (N, H, 2) or None
        Non-rigid step only: each frame's displacement (x, y) of every row beyond its rigid shift, measured against
        the rigid mean (so relative to the frames' average distortion, which no registration can see); NaN for
        frames left out.
    """

    mean: np.ndarray
    valid: np.ndarray
    table: pd.DataFrame
    info: dict = field(default_factory=dict)
    row_shift_px: np.ndarray | None = None

    @property
    def n_used(self) -> int:
        return int(self.info.get("n_used", int(self.table["used"].sum())))


# ----------------------------------------------------------------------------------------------------------------
# Fourier helpers
# ----------------------------------------------------------------------------------------------------------------


class _Grid:
    """Frequencies of the half (real-input) spectrum of an (h, w) crop, with the multiplicity of each column."""

    def __init__(self, h: int, w: int) -> None:
        self.shape = (h, w)
        self.qy = sfft.fftfreq(h)[:, None]
        self.qx = sfft.rfftfreq(w)[None, :]
        mult = np.full(self.qx.shape, 2.0)
        mult[0, 0] = 1.0
        if w % 2 == 0:
            mult[0, -1] = 1.0
        self.mult = mult
        self.q2 = self.qx ** 2 + self.qy ** 2


def _tukey_at(pos: np.ndarray, n: int, alpha: float, pad: int) -> np.ndarray:
    """Tukey window on [pad, n - 1 - pad] evaluated at real positions ``pos`` (zero outside)."""
    length = max(n - 1 - 2 * pad, 1)
    t = (pos - pad) / length
    m = alpha / 2.0
    w = np.ones_like(t)
    lo, hi = t < m, t > 1 - m
    w[lo] = 0.5 * (1 - np.cos(np.pi * np.clip(t[lo], 0, None) / m))
    w[hi] = 0.5 * (1 - np.cos(np.pi * np.clip(1 - t[hi], 0, None) / m))
    w[(t < 0) | (t > 1)] = 0.0
    return w


def _spectra(crops: np.ndarray, shifts: np.ndarray) -> np.ndarray:
    """Half spectra (complex64) of the crops, each tapered by a window that moves with its content.

    Frame k's window is moved by its current shift estimate, so every frame is tapered on the same specimen area
    and the taper cannot pull the shifts; the window-weighted mean is removed first.
    """
    n, h, w = crops.shape
    pad = int(min(math.ceil(float(np.max(np.abs(shifts), initial=0.0))) + 1, min(h, w) // 4))
    rows, cols = np.arange(h, dtype=np.float64), np.arange(w, dtype=np.float64)
    wy = np.stack([_tukey_at(rows - sy, h, TAPER, pad) for sy in shifts[:, 1]]).astype(np.float32)
    wx = np.stack([_tukey_at(cols - sx, w, TAPER, pad) for sx in shifts[:, 0]]).astype(np.float32)
    # separable windows: the weighted mean needs only the row and column sums
    level = np.einsum("kr,krc,kc->k", wy, crops, wx) / np.maximum(wy.sum(axis=1) * wx.sum(axis=1), 1e-30)
    tapered = crops - level[:, None, None].astype(np.float32)
    tapered *= wy[:, :, None]
    tapered *= wx[:, None, :]
    return sfft.rfft2(tapered, workers=_WORKERS)


def _power(spectra: np.ndarray, grid: _Grid) -> tuple[float, np.ndarray]:
    """White-noise floor ``n0`` of one frame and its signal power ``S(q)`` (2-D over the half spectrum).

    ``n0`` is the median power above ``NOISE_BAND`` of the Nyquist frequency; the mean frame power is smoothed over
    3 x 3 frequencies and ``S = P - n0 (1 + 3 / sqrt(9 n))`` clipped at zero, so that frequencies holding only noise
    (whose smoothed power scatters by ``1 / sqrt(9 n)`` about ``n0``) get no weight. The lowest Fourier rings (ramps,
    the window) are removed.
    """
    from scipy.ndimage import uniform_filter

    power = np.mean(np.abs(spectra) ** 2, axis=0, dtype=np.float64)
    band = np.sqrt(grid.q2) >= NOISE_BAND * 0.5
    n0 = float(np.median(power[band])) if band.any() else float(np.median(power))
    smooth = uniform_filter(power, size=3, mode="nearest")
    signal = np.clip(smooth - n0 * (1.0 + 3.0 / math.sqrt(9.0 * len(spectra))), 0.0, None)
    low = LOW_CUT_RINGS / min(grid.shape)
    signal *= 1.0 - np.exp(-0.5 * grid.q2 / low ** 2)
    return n0, signal


class _Band:
    """The frequencies that carry signal: flat indices into the half spectrum, their row and column, qx, qy and
    multiplicity."""

    def __init__(self, grid: _Grid, signal: np.ndarray) -> None:
        self.grid = grid
        self.index = np.flatnonzero(signal.ravel() > 0)
        self.row, self.col = np.divmod(self.index, signal.shape[1])
        self.qx = grid.qx[0, self.col]
        self.qy = grid.qy[self.row, 0]
        self.mult = grid.mult[0, self.col]
        self.signal = signal.ravel()[self.index]

    def take(self, spectra: np.ndarray) -> np.ndarray:
        return spectra.reshape(len(spectra), -1)[:, self.index]

    def weight(self, n0: float, averaged: float) -> np.ndarray:
        """Wiener-like weight ``S / (S + n0 / averaged)`` against a template that averages ``averaged`` frames."""
        return (self.signal / (self.signal + n0 / max(averaged, 1.0))).astype(np.float32)

    @cached_property
    def map_grid(self) -> tuple[int, int, np.ndarray]:
        """Rows and columns of a correlation map that samples the band (the frequencies holding all but
        ``1e-3`` of its signal; scattered noise frequencies would otherwise force the full size), and which band
        entries it keeps."""
        h, w = self.grid.shape
        ry = np.abs(np.where(self.row > h // 2, self.row - h, self.row))
        order = np.argsort(np.maximum(ry / h, self.col / w))
        cum = np.cumsum(self.signal[order])
        last = order[min(int(np.searchsorted(cum, (1 - 1e-3) * cum[-1])), len(order) - 1)] if len(order) else 0
        reach = max(ry[last] / h, self.col[last] / w) if len(order) else 0.5
        ky, kx = int(math.ceil(reach * h)) + 1, int(math.ceil(reach * w)) + 1
        sh = min(h, sfft.next_fast_len(4 * ky + 4, real=True))
        sw = min(w, sfft.next_fast_len(4 * kx + 4, real=True))
        keep = (ry < sh // 2) & (self.col < sw // 2)
        return sh, sw, keep

    def phase(self, shifts: np.ndarray) -> np.ndarray:
        """``exp(2 pi i q . s)`` for each shift (n, 2), from the separable row and column factors."""
        ey = np.exp(2j * np.pi * self.grid.qy[None, :, 0] * shifts[:, 1:])
        ex = np.exp(2j * np.pi * self.grid.qx[None, 0, :] * shifts[:, :1])
        return ey[:, self.row] * ex[:, self.col]


def _integer_peaks(cross: np.ndarray, band: _Band) -> tuple[np.ndarray, np.ndarray]:
    """(n, 2) (dx, dy) of the highest point of each weighted cross-correlation map (whole map searched), and for
    each map the ratio of its second-highest separate peak to the highest.

    The band holds no frequency above its largest |qx|, |qy|, so the map is computed on a coarser grid that still
    samples it (spectrum cropped to the band), in steps of ``h / sh``, ``w / sw`` px; Newton steps refine it. A
    periodic structure gives every lattice translation (nearly) the same height, so among the points within
    ``1 - PERIODIC_RATIO`` of the highest the smallest shift is taken (for an aperiodic structure that is the
    highest point itself). A ratio near 1 says the structure repeats.
    """
    h, w = band.grid.shape
    sh, sw, keep = band.map_grid
    rows = np.where(band.row > h // 2, band.row - h + sh, band.row)[keep]
    small = np.zeros((len(cross), sh, sw // 2 + 1), dtype=np.complex64)
    small[:, rows, band.col[keep]] = cross[:, keep]
    maps = sfft.irfft2(small, s=(sh, sw), workers=_WORKERS)
    flat_maps = maps.reshape(len(maps), -1)
    top = flat_maps.max(axis=1)
    lag2 = ((np.fft.fftfreq(sh) * h)[:, None] ** 2 + (np.fft.fftfreq(sw) * w)[None, :] ** 2).ravel()
    flat = np.where(flat_maps >= (PERIODIC_RATIO * top)[:, None], lag2[None, :], np.inf).argmin(axis=1)
    iy, ix = np.divmod(flat, sw)
    best = flat_maps.argmax(axis=1)
    by, bx = np.divmod(best, sw)
    # the second peak: the highest point more than a few grid steps (about a column width) from the first
    yy = np.abs(((np.arange(sh)[None, :] - by[:, None]) + sh // 2) % sh - sh // 2)
    xx = np.abs(((np.arange(sw)[None, :] - bx[:, None]) + sw // 2) % sw - sw // 2)
    near = (yy[:, :, None] <= 3) & (xx[:, None, :] <= 3)
    second = np.where(near, -np.inf, maps).reshape(len(maps), -1).max(axis=1)
    ratio = np.where(top > 0, second / np.maximum(top, 1e-30), 1.0)
    iy = np.where(iy > sh // 2, iy - sh, iy) * (h / sh)
    ix = np.where(ix > sw // 2, ix - sw, ix) * (w / sw)
    return np.stack([ix, iy], axis=1).astype(np.float64), ratio


def _coarse(band: _Band) -> float:
    """Grid step (px) of the cropped correlation maps of :func:`_integer_peaks` (at least 0.5)."""
    h, w = band.grid.shape
    sh, sw, _ = band.map_grid
    return max(0.5, h / sh, w / sw)


def _newton(cross: np.ndarray, band: _Band, start: np.ndarray, steps: int = NEWTON_STEPS, reach: float = 0.5
            ) -> tuple[np.ndarray, np.ndarray]:
    """Sub-pixel maxima of the correlation functions ``c(t) = sum_q m Re[X(q) exp(2 pi i q.t)]``, and their values.

    The function, gradient and Hessian are exact sums over the signal band (no upsampled grid); steps are
    limited to ``reach`` px, and a point where the Hessian is not negative definite takes a gradient step instead.
    """
    t = start.astype(np.float64).copy()
    two_pi = 2.0 * np.pi
    qx, qy = band.qx[None, :], band.qy[None, :]
    xm = cross * band.mult[None, :]
    value = np.zeros(len(t))
    for it in range(steps + 1):
        e = xm * band.phase(t)
        re, im = e.real, e.imag
        value = re.sum(axis=1)
        if it == steps:
            break
        gx = -two_pi * (im * qx).sum(axis=1)
        gy = -two_pi * (im * qy).sum(axis=1)
        hxx = -two_pi ** 2 * (re * qx * qx).sum(axis=1)
        hyy = -two_pi ** 2 * (re * qy * qy).sum(axis=1)
        hxy = -two_pi ** 2 * (re * qx * qy).sum(axis=1)
        det = hxx * hyy - hxy ** 2
        concave = (hxx < 0) & (det > 0)
        with np.errstate(divide="ignore", invalid="ignore"):
            sx = np.where(concave, -(hyy * gx - hxy * gy) / det, 0.0)
            sy = np.where(concave, -(hxx * gy - hxy * gx) / det, 0.0)
        # not concave: a small step uphill along the gradient
        gn = np.hypot(gx, gy)
        sx = np.where(concave, sx, np.where(gn > 0, 0.25 * gx / np.maximum(gn, 1e-300), 0.0))
        sy = np.where(concave, sy, np.where(gn > 0, 0.25 * gy / np.maximum(gn, 1e-300), 0.0))
        step = np.stack([sx, sy], axis=1)
        norm = np.hypot(step[:, 0], step[:, 1])
        step *= np.minimum(1.0, reach / np.maximum(norm, 1e-300))[:, None]
        t += step
        if float(np.max(np.abs(step), initial=0.0)) < 1e-7:
            value = (xm * band.phase(t)).real.sum(axis=1)
            break
    return t, value


# ----------------------------------------------------------------------------------------------------------------
# Registration
# ----------------------------------------------------------------------------------------------------------------


def _crop_box(shape: tuple[int, int], n_frames: int, side: int = REGISTER_PX) -> tuple[int, int, int, int]:
    h, w = shape
    while side > 128 and n_frames * side * side > REGISTER_BUDGET_PX:
        side //= 2
    ch, cw = min(h, side), min(w, side)
    r0, c0 = (h - ch) // 2, (w - cw) // 2
    return r0, r0 + ch, c0, c0 + cw


def _first_guess(spectra: np.ndarray, band: _Band, n0: float, usable: np.ndarray) -> tuple[np.ndarray, float]:
    """Shifts from consecutive usable frames registered to each other (whole map searched), summed (module step 3),
    and the median second-to-first peak ratio of their correlation maps. Unusable frames get the shift of the
    usable frame before them."""
    shifts = np.zeros((len(spectra), 2))
    ks = np.flatnonzero(usable)
    if len(ks) < 2:
        return shifts, 0.0
    sel = band.take(spectra[ks])
    cross = np.conj(sel[:-1]) * sel[1:] * band.weight(n0, 1.0)
    peaks, ratio = _integer_peaks(cross, band)
    step, _ = _newton(cross, band, peaks, steps=2 * NEWTON_STEPS, reach=_coarse(band))
    at = np.zeros((len(ks), 2))
    at[1:] = np.cumsum(step, axis=0)
    # every frame takes the shift of the last usable frame at or before it (the first usable one for leading ones)
    idx = np.clip(np.searchsorted(ks, np.arange(len(spectra)), side="right") - 1, 0, None)
    return at[idx], float(np.median(ratio))


def _register(crops: np.ndarray, spectra: np.ndarray, band: _Band, n0: float, used: np.ndarray, shifts: np.ndarray,
              progress) -> dict:
    """Shifts of every frame against the leave-one-out template (module steps 4-5), starting from ``shifts``.

    ``spectra`` are the crops' half spectra with their windows moved by ``shifts``.
    """
    n = len(crops)
    shifts = shifts.astype(np.float64).copy()
    rounds, last_change, corr = 0, float("inf"), np.zeros(n)
    rejected_reason = [""] * n
    windowed_at = shifts.copy()
    spectra = band.take(spectra)
    for rnd in range(MAX_ROUNDS):
        # the windows follow the shifts; once the shifts settle the windows no longer need to move
        if float(np.max(np.abs(shifts - windowed_at))) > 0.02:
            spectra = band.take(_spectra(crops, shifts))
            windowed_at = shifts.copy()
        k_used = int(used.sum())
        weight = band.weight(n0, k_used - 1)
        norms = np.sum(band.mult * weight * np.abs(spectra) ** 2, axis=1)
        aligned = spectra * band.phase(shifts)  # every frame moved into common coordinates
        total = aligned[used].sum(axis=0)
        # leave-one-out template of frame k in the common coordinates: the peak of conj(T_k) F_k W is frame k's shift
        template = (total[None] - np.where(used[:, None], aligned, 0)) / np.maximum(
            k_used - used.astype(int), 1)[:, None]
        cross = np.conj(template) * spectra * weight
        reach = 0.5
        start = shifts
        if rnd == 0:  # keep the guess where the whole-map peak agrees with it to within the map's grid step
            peaks, _ = _integer_peaks(cross, band)
            reach = _coarse(band)
            far = np.any(np.abs(peaks - shifts) > reach + 0.5, axis=1)
            start = np.where(far[:, None], peaks, shifts)
        new, value = _newton(cross, band, start, steps=2 * NEWTON_STEPS if rnd == 0 else NEWTON_STEPS, reach=reach)
        t_norm = np.sum(band.mult * weight * np.abs(template) ** 2, axis=1)
        corr = value / np.sqrt(np.maximum(norms * t_norm, 1e-300))
        last_change = float(np.max(np.abs(new - shifts)[used])) if used.any() else 0.0
        shifts = new
        rounds = rnd + 1
        report(progress, rounds / MAX_ROUNDS, f"frames: template round {rounds}")
        if rnd >= 1:
            newly = _outliers(corr, used)
            if newly.any():
                for k in np.flatnonzero(newly):
                    rejected_reason[k] = (f"correlation {corr[k]:.3f} far below the median {np.median(corr[used]):.3f} "
                                          "of the other frames")
                used = used & ~newly
                continue
        if rnd >= 1 and last_change < CONVERGED_PX:
            break
    return {"shifts": shifts, "correlation": corr, "used": used, "rounds": rounds, "last_change": last_change,
            "reasons": rejected_reason}


def _outliers(corr: np.ndarray, used: np.ndarray) -> np.ndarray:
    """Frames whose correlation is far below the others' (robust z and a fraction of the median)."""
    c = corr[used]
    if c.size < 3:
        return np.zeros_like(used)
    med = float(np.median(c))
    mad = 1.4826 * float(np.median(np.abs(c - med)))
    scale = max(mad, 0.02 * abs(med), 1e-6)
    return used & ((corr - med) / scale < REJECT_Z) & (corr < REJECT_FRACTION * med)


def _registration_crops(arr, valid, offsets: np.ndarray, side: int = REGISTER_PX) -> np.ndarray:
    """Each frame's crop (float32), moved by its whole-pixel offset: the central box of at most ``side`` px on a
    side that fits inside every frame at its offset."""
    n, h, w = arr.shape
    m = np.abs(offsets).max(axis=0) if len(offsets) else np.zeros(2, int)
    r0, r1, c0, c1 = _crop_box((h - 2 * int(m[1]), w - 2 * int(m[0])), n, side)
    r0, r1, c0, c1 = r0 + int(m[1]), r1 + int(m[1]), c0 + int(m[0]), c1 + int(m[0])
    if min(r1 - r0, c1 - c0) < 16:
        raise TenfoldInputError(f"frames: the drift ({int(m[0])} px in x, {int(m[1])} px in y) leaves less than 16 px "
                                "common to all frames; align a shorter range of frames")
    crops = np.empty((n, r1 - r0, c1 - c0), dtype=np.float32)
    for k in range(n):
        ox, oy = int(offsets[k][0]), int(offsets[k][1])
        crops[k], _ = _frame(arr, k, valid, (slice(r0 + oy, r1 + oy), slice(c0 + ox, c1 + ox)), np.float32)
    return crops


def _check_structure(n0: float, signal: np.ndarray, grid: _Grid) -> float:
    """The shift bound (px) when the frames hold structure above their noise; else a clear error."""
    share = float(np.sum(grid.mult * signal) / max(np.sum(grid.mult * (signal + n0)), 1e-300))
    sd = _shift_sd(n0, signal, grid)
    if not math.isfinite(sd) or share < MIN_SIGNAL_SHARE or sd > 1.0:
        raise TenfoldInputError("frames: the frames hold no common structure above their noise, so they cannot be "
                                "registered; average them without alignment (--no-align; align=False in Python) "
                                "or check the frame range")
    return sd


def _shift_sd(n0: float, signal: np.ndarray, grid: _Grid) -> float:
    """Cramer-Rao bound (px) of one shift component of a frame registered to a noise-free template."""
    info = 4 * np.pi ** 2 * np.sum(grid.mult * 0.5 * grid.q2 * signal)  # mean of the x and y information
    return float(math.sqrt(n0 / info)) if info > 0 and n0 > 0 else float("nan")


# ----------------------------------------------------------------------------------------------------------------
# Means
# ----------------------------------------------------------------------------------------------------------------


def _frame(stack, k: int, fill_valid, box=(slice(None), slice(None)), dtype=np.float64
           ) -> tuple[np.ndarray, np.ndarray]:
    """Frame k (or its ``box``) as ``dtype`` with non-finite pixels replaced by the median, and its validity mask."""
    f = np.asarray(stack[k][box], dtype=dtype)
    ok = np.isfinite(f)
    if fill_valid is not None:
        ok &= np.asarray(fill_valid[k][box], dtype=bool)
    if not ok.all():
        f = np.where(ok, f, np.median(f[ok]) if ok.any() else 0.0)
    return f, ok


def _shifted(frame: np.ndarray, shift: tuple[float, float]) -> np.ndarray:
    """``frame(x + shift)``, exactly (Fourier shift) on a reflection-padded copy so nothing wraps around."""
    h, w = frame.shape
    pad = int(math.ceil(max(abs(shift[0]), abs(shift[1])))) + 8
    ph, pw = sfft.next_fast_len(h + 2 * pad, real=True), sfft.next_fast_len(w + 2 * pad, real=True)
    top, left = (ph - h) // 2, (pw - w) // 2
    widths = ((top, ph - h - top), (left, pw - w - left))
    big = np.pad(frame.astype(np.float32), widths, mode="reflect" if max(ph - h, pw - w) < min(h, w) else "edge")
    spec = sfft.rfft2(big, workers=_WORKERS)
    spec *= (np.exp(2j * np.pi * sfft.fftfreq(ph)[:, None] * shift[1])
             * np.exp(2j * np.pi * sfft.rfftfreq(pw)[None, :] * shift[0])).astype(np.complex64)
    out = sfft.irfft2(spec, s=big.shape, workers=_WORKERS)
    return out[top:top + h, left:left + w]


def _coverage(shape: tuple[int, int], shift: tuple[float, float], ok: np.ndarray) -> np.ndarray:
    """Pixels x of the reference whose source x + shift lies inside the frame (1 px margin) and on valid data."""
    h, w = shape
    sx, sy = shift
    xs = np.arange(w) + sx
    ys = np.arange(h) + sy
    inside = ((ys >= 1) & (ys <= h - 2))[:, None] & ((xs >= 1) & (xs <= w - 2))[None, :]
    if not ok.all():
        from scipy.ndimage import binary_erosion, shift as nd_shift

        moved = nd_shift(binary_erosion(ok, iterations=1, border_value=1).astype(np.float32), (-sy, -sx), order=0,
                         mode="constant", cval=0.0) > 0.5
        inside &= moved
    return inside


def _mean_of(stack, ks, shifts, fill_valid, progress, label, resample=None
             ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Mean of frames ``ks`` moved into the reference coordinates, the pixels every one of them covers, and the
    variance of one frame about the mean at each of those pixels (the measured noise, whatever its kind)."""
    total = None
    count = None
    for i, k in enumerate(ks):
        f, ok = _frame(stack, k, fill_valid)
        s = (float(shifts[k][0]), float(shifts[k][1]))
        moved = _shifted(f, s) if resample is None else resample(f, k)
        cov = _coverage(f.shape, s, ok)
        if total is None:
            total = np.zeros(f.shape)
            squares = np.zeros(f.shape)
            count = np.zeros(f.shape, dtype=np.int32)
        moved = np.where(cov, moved, 0.0)
        total += moved
        squares += moved * moved
        count += cov
        report(progress, (i + 1) / len(ks), f"{label}: frame {i + 1} of {len(ks)}")
    full = count == len(ks)
    mean = np.where(count > 0, total / np.maximum(count, 1), 0.0)
    if not full.any():
        raise TenfoldInputError("frames: no pixel is covered by every used frame (the drift is larger than the "
                                "image); align a shorter range of frames")
    var = np.where(full, (squares - len(ks) * mean * mean) / max(len(ks) - 1, 1), np.nan)
    mean[count == 0] = np.median(mean[full])  # partly covered pixels keep the mean of the frames that cover them
    return mean.astype(np.float32), full, var


def _shift_precision(mean: np.ndarray, var: np.ndarray, band: _Band, n_used: int) -> float:
    """Standard deviation (px, per axis) of one frame's shift relative to the reference frame.

    Sandwich estimate of the correlation-peak estimator in real space on the registration crop of the mean:
    ``var(t_x) = sum_p (d_x T_w)^2 v_p / (sum_p d_x T_w d_x T)^2`` with ``T`` the mean, ``T_w`` the mean filtered by
    the registration weights and ``v_p`` the measured variance of one frame at pixel p (Poisson or not, and any
    residual the rigid model leaves); the leave-one-out template adds ``1 / (n_used - 1)`` of it, and the
    reference frame's own error counts once more.
    """
    h, w = band.grid.shape
    H, W = mean.shape
    r0, c0 = (H - h) // 2, (W - w) // 2
    t = mean[r0:r0 + h, c0:c0 + w].astype(np.float64)
    v = var[r0:r0 + h, c0:c0 + w]
    ok = np.isfinite(v)
    if ok.mean() < 0.5:
        return float("nan")
    v = np.where(ok, v, 0.0)
    win = _tukey_at(np.arange(h, dtype=float), h, TAPER, 0)[:, None] * _tukey_at(np.arange(w, dtype=float), w,
                                                                                 TAPER, 0)[None, :]
    spec = sfft.rfft2((t - np.sum(win * t) / win.sum()) * win).ravel()[band.index]
    weight = band.weight(float(np.median(v[ok])) * h * w, n_used - 1)
    out = []
    for q in (band.qx, band.qy):
        full_d = np.zeros(h * (w // 2 + 1), dtype=np.complex128)
        full_w = np.zeros_like(full_d)
        full_d[band.index] = 2j * np.pi * q * spec
        full_w[band.index] = 2j * np.pi * q * spec * weight
        d = sfft.irfft2(full_d.reshape(h, w // 2 + 1), s=(h, w))
        dw = sfft.irfft2(full_w.reshape(h, w // 2 + 1), s=(h, w))
        den = float(np.sum(dw * d * win))
        out.append(float(np.sum(dw * dw * win * win * v)) / den ** 2 if den > 0 else float("nan"))
    one = 0.5 * (out[0] + out[1])
    return float(math.sqrt(2.0 * one * (1.0 + 1.0 / max(n_used - 1, 1))))


def plain_mean(stack, *, valid=None) -> tuple[np.ndarray, np.ndarray]:
    """The unaligned mean of a stack (frames first), float64, summed one frame at a time (a NaN in any frame stays
    NaN in the mean), and where every frame is finite and ``valid``.

    Examples
    --------
    >>> m, ok = plain_mean(np.stack([np.zeros((16, 16)), np.full((16, 16), 3.0)]))
    >>> float(m[0, 0]), bool(ok.all())
    (1.5, True)
    """
    stack = _check_stack(stack)
    total = np.zeros(stack.shape[1:])
    ok_all = np.ones(stack.shape[1:], dtype=bool)
    for k in range(len(stack)):
        f = np.asarray(stack[k], dtype=np.float64)
        total += f
        ok_all &= np.isfinite(f) if valid is None else np.isfinite(f) & np.asarray(valid[k], dtype=bool)
    return total / len(stack), ok_all


def _check_stack(stack):
    arr = stack if hasattr(stack, "shape") and hasattr(stack, "dtype") else np.asarray(stack)
    if arr.ndim != 3:
        raise TenfoldInputError(f"frames: need a stack of 2-D frames (frames first), got shape {tuple(arr.shape)}")
    if not (np.issubdtype(arr.dtype, np.number) or arr.dtype == bool) or np.issubdtype(arr.dtype, np.complexfloating):
        raise TenfoldInputError(f"frames: data type {arr.dtype} is not a real grey level; give grey-level frames")
    return arr


# ----------------------------------------------------------------------------------------------------------------
# Non-rigid rows
# ----------------------------------------------------------------------------------------------------------------


def _row_fields(stack, ks, shifts, mean, fill_valid, progress) -> dict[int, np.ndarray]:
    """Per frame, the displacement (H, 2) of every row beyond its rigid shift, from strips registered to the mean."""
    from scipy.interpolate import make_smoothing_spline

    h, w = mean.shape
    n_strips = int(min(MAX_STRIPS, max(2, h // STRIP_ROWS)))
    edges = np.linspace(0, h, n_strips + 1).astype(int)
    hs = int(np.min(np.diff(edges)))
    c0 = (w - min(w, REGISTER_PX)) // 2
    cw = min(w, REGISTER_PX)
    grid = _Grid(hs, cw)
    tpl = np.stack([mean[e:e + hs, c0:c0 + cw] for e in edges[:-1]])
    tspec = _spectra(tpl, np.zeros((n_strips, 2)))
    centres = edges[:-1] + 0.5 * (hs - 1)
    fields = {}
    rows = np.arange(h, dtype=np.float64)
    for i, k in enumerate(ks):
        f, _ = _frame(stack, k, fill_valid)
        moved = _shifted(f, (float(shifts[k][0]), float(shifts[k][1])))
        strips = np.stack([moved[e:e + hs, c0:c0 + cw] for e in edges[:-1]])
        spec = _spectra(strips, np.zeros((n_strips, 2)))
        n0, signal = _power(spec, grid)
        band = _Band(grid, signal)
        cross = np.conj(band.take(tspec)) * band.take(spec) * band.weight(n0, 1.0)
        d, _ = _newton(cross, band, np.zeros((n_strips, 2)))
        d -= np.median(d, axis=0)  # the rigid part is already in the shift
        field_k = np.empty((h, 2))
        for a in range(2):
            lam = None if n_strips > 4 else 1e6
            spl = make_smoothing_spline(centres, d[:, a], lam=lam)
            field_k[:, a] = spl(np.clip(rows, centres[0], centres[-1]))  # held, not extrapolated, at the ends
        fields[k] = field_k
        report(progress, (i + 1) / len(ks), f"frames: non-rigid rows, frame {i + 1} of {len(ks)}")
    return fields


def _resampler(fields, shifts):
    from scipy.ndimage import map_coordinates

    def resample(frame: np.ndarray, k: int) -> np.ndarray:
        h, w = frame.shape
        d = fields[k]
        yy = np.arange(h, dtype=np.float64)[:, None] + shifts[k][1] + d[:, 1][:, None]
        xx = np.arange(w, dtype=np.float64)[None, :] + shifts[k][0] + d[:, 0][:, None]
        return map_coordinates(frame, [np.broadcast_to(yy, (h, w)), xx], order=3, mode="reflect")

    return resample


# ----------------------------------------------------------------------------------------------------------------
# Public
# ----------------------------------------------------------------------------------------------------------------


def align_frames(stack, *, reference: int = 0, nonrigid: bool = False, valid=None, first_frame: int = 0,
                 progress: ProgressCallback | None = None) -> FrameAlignment:
    """Register the frames of a stack to one reference frame and average them (see the module notes).

    Parameters
    ----------
    stack : array_like (N, H, W)
        Frames first; any real dtype; a memory-mapped array is read one frame at a time for the mean.
    reference : int
        Index (within ``stack``) of the frame whose coordinates the mean and the shifts use. If it is rejected as
        an outlier, the first used frame becomes the reference and a note says so.
    nonrigid : bool
        Also correct per-row displacements that change from frame to frame (slower; off by default).
    valid : array_like of bool (N, H, W), optional
        False marks pixels to ignore (besides NaN/inf, which are always ignored).
    first_frame : int
        Index of ``stack[0]`` in the file, so the table's ``frame`` column names file frames.
    progress : callable, optional
        ``progress(fraction, message)``; returning False cancels (raises ``Cancelled``).

    Returns
    -------
    FrameAlignment
        ``mean``, ``valid``, ``table`` (:data:`FRAME_COLUMNS`), ``info``.

    Raises
    ------
    TenfoldInputError
        Not a stack, frames too small, ``reference`` out of range, fewer than 2 frames, or no pixel covered by
        every used frame.

    Examples
    --------
    Four frames of one noise-free scene, moved by known amounts:

    >>> from tenfold.analysis.synthetic import render_image
    >>> xs, ys = np.meshgrid(np.arange(8.0, 120, 12), np.arange(8.0, 120, 12))
    >>> moves = [(0, 0), (1.3, -0.4), (2.5, 0.7), (-1.2, 2.25)]
    >>> stack = np.stack([render_image(xs.ravel() + mx, ys.ravel() + my, 500.0, shape=(128, 128), sigma_px=1.6,
    ...                                background=5.0, noise=False) for mx, my in moves])
    >>> out = align_frames(stack)
    >>> np.round(out.table[["shift_x_px", "shift_y_px"]].to_numpy(), 2).tolist()
    [[0.0, 0.0], [1.3, -0.4], [2.5, 0.7], [-1.2, 2.25]]
    """
    arr = _check_stack(stack)
    n, h, w = (int(s) for s in arr.shape)
    if min(h, w) < 16:
        raise TenfoldInputError(f"frames: frames of {h} x {w} px are too small to register (need at least 16 px on a "
                                "side)")
    if n < 2:
        raise TenfoldInputError("frames: alignment needs at least 2 frames; give a longer frame range or a single "
                                "frame")
    if isinstance(reference, bool) or not isinstance(reference, (int, np.integer)) or not 0 <= reference < n:
        raise TenfoldInputError(f"frames: reference={reference!r} must be a frame index 0..{n - 1} of the range")
    if valid is not None and np.shape(valid) != (n, h, w):
        raise TenfoldInputError(f"frames: valid mask shape {np.shape(valid)} differs from the stack {(n, h, w)}")
    notes: list[str] = []
    report(progress, 0.0, "frames: registration images")
    usable = np.ones(n, dtype=bool)
    reasons = [""] * n
    for k in range(n):
        f, ok = _frame(arr, k, valid, dtype=np.float32)
        if ok.mean() < 0.5 or float(np.ptp(f[ok])) == 0.0:
            usable[k] = False
            reasons[k] = "blank or mostly invalid frame"
    if usable.sum() < 2:
        raise TenfoldInputError("frames: fewer than 2 frames hold data (the others are constant or invalid); "
                                "check the frame range")
    offsets = np.zeros((n, 2), dtype=np.int64)
    # the first guess needs whole pixels only: a smaller central crop is enough
    crops = _registration_crops(arr, valid, offsets, GUESS_PX)
    grid = _Grid(*crops.shape[1:])
    spectra = _spectra(crops, np.zeros((n, 2)))
    n0, signal = _power(spectra[usable], grid)
    _check_structure(n0, signal, grid)
    guess, repeat = _first_guess(spectra, _Band(grid, signal), n0, usable)
    if repeat > PERIODIC_RATIO:
        notes.append(f"frames: the structure repeats (the second correlation peak is {100 * repeat:.0f} % of the "
                     "first), so a shift is known only up to a lattice translation; the smallest shift that fits is "
                     "taken, and a jump of more than half a lattice spacing between frames would be missed")
    del spectra
    report(progress, 0.1, "frames: first guess from consecutive frames")
    for attempt in range(3):
        # crops that follow each frame's whole-pixel shift hold the same specimen area (the windows then move by
        # the sub-pixel rest only)
        new = np.rint(guess - np.median(guess[usable], axis=0)).astype(np.int64)
        new[~usable] = 0
        if attempt == 0 or np.any(new != offsets):
            offsets = new
            crops = _registration_crops(arr, valid, offsets)
            grid = _Grid(*crops.shape[1:])
        spectra = _spectra(crops, guess - offsets)
        n0, signal = _power(spectra[usable], grid)
        band = _Band(grid, signal)
        reg = _register(crops, spectra, band, n0, usable.copy(), guess - offsets,
                        sub_progress(progress, 0.1 + 0.15 * attempt, 0.25 + 0.15 * attempt))
        guess = reg["shifts"] + offsets
        rest = reg["shifts"][reg["used"]]
        if np.all(np.abs(rest - np.median(rest, axis=0)) <= 0.75):  # every crop within a pixel of its content
            break
    box = crops.shape[1:]
    del crops
    reg["shifts"] = guess
    used = reg["used"]
    for k in range(n):
        reasons[k] = reasons[k] or reg["reasons"][k]
    ref = int(reference)
    if not used[ref]:
        new_ref = int(np.flatnonzero(used)[0])
        notes.append(f"frames: the reference frame {first_frame + ref} was left out ({reasons[ref]}); frame "
                     f"{first_frame + new_ref} is the reference instead")
        ref = new_ref
    shifts = reg["shifts"] - reg["shifts"][ref]
    _check_structure(n0, signal, grid)
    ks = np.flatnonzero(used)
    mean, full, var = _mean_of(arr, ks, shifts, valid, sub_progress(progress, 0.5, 0.75 if nonrigid else 1.0),
                               "frames")
    sd = _shift_precision(mean, var, band, len(ks))
    wobble = np.full(n, np.nan)
    method = "rigid"
    row_shift = None
    if nonrigid:
        fields = _row_fields(arr, ks, shifts, mean, valid, sub_progress(progress, 0.75, 0.9))
        row_shift = np.full((n, h, 2), np.nan)
        for k, fk in fields.items():
            wobble[k] = float(np.sqrt(np.mean(np.sum(fk ** 2, axis=1))))
            row_shift[k] = fk
        mean, full, _ = _mean_of(arr, ks, shifts, valid, sub_progress(progress, 0.9, 1.0), "frames (non-rigid)",
                                 resample=_resampler(fields, shifts))
        method = "rigid + non-rigid rows"
    table = pd.DataFrame({
        "frame": np.arange(n, dtype=np.int64) + int(first_frame),
        "shift_x_px": shifts[:, 0], "shift_y_px": shifts[:, 1],
        "correlation": reg["correlation"], "used": used, "reason": reasons,
        "shift_sd_px": np.where(usable, sd, np.nan), "wobble_rms_px": wobble,
    })
    table.loc[~usable, ["shift_x_px", "shift_y_px", "correlation"]] = np.nan
    table.loc[ref, "shift_sd_px"] = 0.0
    table = conform(table, FRAMES)
    info = _summary(table, ref + int(first_frame), reg, method, full, box, notes)
    report(progress, 1.0, "frames: aligned")
    return FrameAlignment(mean=mean, valid=full, table=table, info=info, row_shift_px=row_shift)


def _summary(table: pd.DataFrame, ref_frame: int, reg: dict, method: str, full: np.ndarray, crop, notes) -> dict:
    used = table["used"].to_numpy()
    t = table.loc[used]
    rejected = table.loc[~used, "frame"].astype(int).tolist()
    drift = [float("nan"), float("nan")]
    if len(t) >= 2:
        drift = [float(np.polyfit(t["frame"], t[c], 1)[0]) for c in ("shift_x_px", "shift_y_px")]
    path = float(np.sum(np.hypot(np.diff(t["shift_x_px"]), np.diff(t["shift_y_px"])))) if len(t) >= 2 else 0.0
    if rejected:
        notes.append(f"frames: {len(rejected)} of {len(table)} frames left out of the mean (frames "
                     f"{', '.join(map(str, rejected))}); see frames.csv for why")
    covered = float(full.mean())
    if covered < 1.0:
        notes.append(f"frames: the drift leaves {100 * (1 - covered):.3g} % of the field (at its edges) outside some "
                     "frame; those pixels are masked (no columns there)")
    return {
        "method": method, "reference": int(ref_frame), "n_frames": int(len(table)), "n_used": int(used.sum()),
        "rejected": rejected, "rounds": int(reg["rounds"]), "residual_drift_px": float(reg["last_change"]),
        "drift_px_per_frame": drift, "path_px": path,
        "shift_sd_px": float(np.nanmedian(table["shift_sd_px"])) if table["shift_sd_px"].notna().any() else None,
        "covered_fraction": covered, "register_crop_px": [int(crop[0]), int(crop[1])], "notes": list(notes),
    }


def shifts_figure(result):
    """The shift of every frame of an aligned frame series (``figures/frame_shifts``), frames left out marked.

    Parameters
    ----------
    result : AnalysisResult
        Reads ``tables['frames']`` and ``summary['frames']``; ``meta.pixel_size_nm`` adds a nm axis.

    Returns
    -------
    matplotlib.figure.Figure or None
        None when the image is not an aligned frame series.
    """
    table = getattr(result, "tables", {}).get("frames")
    if table is None or not len(table):
        return None
    from matplotlib.figure import Figure

    info = (getattr(result, "summary", None) or {}).get("frames") or {}
    fig = Figure(figsize=(7.0, 3.4), dpi=120, layout="constrained")
    ax = fig.add_subplot(1, 1, 1)
    used = table["used"].to_numpy(dtype=bool)
    for col, colour, marker, label in (("shift_x_px", "#0072B2", "o", "x"), ("shift_y_px", "#D55E00", "s", "y")):
        ax.errorbar(table["frame"][used], table[col][used], yerr=table["shift_sd_px"][used], color=colour,
                    marker=marker, ms=4, lw=1.0, capsize=2, label=f"shift {label}")
        if (~used).any():
            ax.plot(table["frame"][~used], table[col][~used], ls="none", marker="x", ms=7, color=colour,
                    label=f"shift {label}, left out")
    ax.axvline(info.get("reference", table["frame"].iloc[0]), color="#777777", lw=0.8, ls=":",
               label="reference frame")
    ax.set(xlabel="frame", ylabel="shift (px)",
           title=f"{info.get('method', 'rigid')} alignment: {info.get('n_used', int(used.sum()))} of {len(table)} "
                 "frames used")
    ps = getattr(getattr(result, "meta", None), "pixel_size_nm", None)
    if ps:
        sec = ax.secondary_yaxis("right", functions=(lambda v: v * ps, lambda v: v / ps))
        sec.set_ylabel("shift (nm)")
    ax.legend(fontsize=7, loc="best")
    return fig
