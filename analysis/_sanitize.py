"""Image sanitising before the stages measure anything: flat areas, outliers, memory, and the notes that say so.

* **Flat areas** (padding, zero corners after a rotation, a blanked or partly read file: pixels that are exactly
  constant over at least ``FLAT_WINDOW_PX`` x ``FLAT_WINDOW_PX``) are masked like NaN pixels, with a note giving
  their share. No detector noise is exactly constant over such an area; left in, every pixel of it is a tied local
  maximum and the detection time and memory grow with the flat area instead of with the columns.
* **Outliers** (hot pixels, a stray 1e38: beyond the 0.5-99.5 percentile range by 3 x its width) are clipped
  to the other pixels' range for the scale estimate only; the fits see the data as recorded.
* **Masked reach**: no column is reported within ``2 sigma + 0.5`` px of a masked pixel, so sparse masked pixels
  remove far more columns than their own share; the note gives that share too.
* **Memory**: an image whose analysis would not fit into the memory available is refused before it is read.
* **Precision** (:func:`to_float32`): the analysis works in float32 (24-bit mantissa). Data whose signal would not
  survive that cast is brought into range first, with a note: a large constant offset (counts + 2e9 in int32,
  uint32, int64 or float64) is subtracted, values beyond float32's safe range are divided by a power of ten, values
  so small that float32 holds them without precision (1e-44, 1e-300) are multiplied by one, and a few wild pixels
  (a stray 1e38) far beyond the rest are masked like NaN instead of scaling the whole image down.

Every function is vectorised (filters over the whole image, no per-pixel loop) and allocates a few image-sized
byte or float32 arrays at most.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage

from ._errors import TenfoldInputError

__all__ = ["mask_flat", "clip_for_scale", "masked_reach_note", "check_memory", "available_memory", "to_float32",
           "float32_plan", "Float32Plan",
           "BYTES_PER_PIXEL", "BYTES_PER_COLUMN"]

#: side of the smallest exactly constant square treated as a flat (non-image) area
FLAT_WINDOW_PX = 15
#: share of exactly-zero pixels outside flat areas above which a note warns of a damaged or partly read file
ZERO_SHARE_NOTE = 0.25
#: percentile range kept for the scale estimate (hot pixels and single wild values lie beyond it)
CLIP_PERCENTILES = (0.5, 99.5)
#: an outlier lies this many percentile-range widths beyond the range (the bundled samples' extremes reach 1.5)
OUTLIER_SPANS = 3.0
#: measured peak memory of one analysis (benchmarks/bench_memory.py): below this per pixel, plus per column
BYTES_PER_PIXEL = 40
BYTES_PER_COLUMN = 2048


def mask_flat(image, ok: np.ndarray, *, label: str = "image") -> tuple[np.ndarray, list[str]]:
    """Mask exactly constant areas of at least ``FLAT_WINDOW_PX`` squared; return the new mask and notes.

    Parameters
    ----------
    image : (H, W) array
        The micrograph (any real dtype; not modified).
    ok : (H, W) bool array
        Valid pixels so far (not modified).
    label : str
        Name of the image in messages.

    Returns
    -------
    ok : (H, W) bool array
        ``ok`` without the flat areas (the same object when there are none).
    notes : list of str
        What was masked and its share of the image; a note on a large share of exact zeros elsewhere.

    Raises
    ------
    TenfoldInputError
        Fewer than 16 valid pixels are left outside the flat areas.
    """
    img = np.asarray(image)
    h, w = img.shape
    notes: list[str] = []
    if min(h, w) < FLAT_WINDOW_PX:
        return ok, notes
    # a flat area holds a row of FLAT_WINDOW_PX equal pixels: without one (almost every real image) there is none,
    # and the full-size filters below are skipped (a 4096^2 image: 1 s -> 0.05 s)
    eq = (img[:, 1:] == img[:, :-1]).view(np.uint8)
    if not ndimage.minimum_filter1d(eq, FLAT_WINDOW_PX - 1, axis=1, mode="constant", cval=0).any():
        flat3 = np.zeros(img.shape, dtype=bool)
    else:
        # a pixel whose 3 x 3 neighbourhood is exactly constant; then the union of all-such windows (an opening)
        flat3 = ndimage.maximum_filter(img, size=3) == ndimage.minimum_filter(img, size=3)
        flat3 &= ok
    del eq
    if np.count_nonzero(flat3) >= (FLAT_WINDOW_PX - 2) ** 2:
        core = ndimage.minimum_filter(flat3.view(np.uint8), size=FLAT_WINDOW_PX - 2)
        flat = ndimage.maximum_filter(core, size=FLAT_WINDOW_PX).view(bool) & flat3
        del core
    else:
        flat = np.zeros_like(flat3)
    del flat3
    n_flat = int(np.count_nonzero(flat))
    if n_flat:
        values = np.unique(img[flat][:: max(1, n_flat // 100_000)])
        shown = ", ".join(f"{float(v):g}" for v in values[:3]) + (" ..." if values.size > 3 else "")
        notes.append(
            f"{label}: {100 * n_flat / img.size:.3g} % of the image is flat (exactly constant, value {shown}, over "
            f"areas of at least {FLAT_WINDOW_PX} x {FLAT_WINDOW_PX} px: padding, rotation corners, a blanked or "
            "partly read file); masked like NaN pixels, no columns are reported there"
        )
        ok = ok & ~flat
    del flat
    if np.count_nonzero(ok) < 16:
        raise TenfoldInputError(f"{label}: the image is flat (exactly constant) almost everywhere; it holds no "
                                "structure to analyse, check that the file was read completely")
    zeros = np.count_nonzero((img == 0) & ok)
    if zeros > ZERO_SHARE_NOTE * img.size:
        expected = poisson_zeros(img, ok)
        n_ok = int(np.count_nonzero(ok))
        if zeros > expected + ZERO_EXCESS_SIGMAS * math.sqrt(expected) + ZERO_EXCESS_SHARE * n_ok:
            counts = f" (counting statistics at the measured level predict {100 * expected / img.size:.3g} %)"
            notes.append(f"{label}: {100 * zeros / img.size:.3g} % of the pixels are exactly 0"
                         f"{counts if expected else ''}: a damaged, truncated or padded file, or a detector without "
                         "offset; check the file if that is unexpected")
    return ok, notes


#: the zero-share note needs this many standard deviations above the Poisson expectation ...
ZERO_EXCESS_SIGMAS = 5.0
#: ... and this share of the valid pixels on top (the local-mean model is approximate)
ZERO_EXCESS_SHARE = 0.01
#: side of the window (px) over which the local count level is measured
ZERO_LEVEL_WINDOW_PX = 5


def poisson_zeros(image, ok: np.ndarray) -> float:
    """Exact zeros that Poisson counting statistics predict at the measured local level (0 for non-count data).

    An honest low-dose image of whole-number counts has many zeros: a pixel with mean count lambda reads 0 with
    probability exp(-lambda) (Poisson distribution). The local mean over ``ZERO_LEVEL_WINDOW_PX`` squared valid
    pixels stands in for lambda; by Jensen's inequality (exp(-x) is convex) the noise of that estimate raises the
    prediction, so the note errs towards silence. Data that are not non-negative whole numbers are not counts,
    and no zero is expected there.
    """
    img = np.asarray(image)
    vals = img[ok]
    if vals.size == 0 or vals.min() < 0 or (img.dtype.kind == "f" and not np.all(vals == np.floor(vals))):
        return 0.0
    w = ok.astype(np.float32)
    size = ZERO_LEVEL_WINDOW_PX
    level = ndimage.uniform_filter(np.where(ok, img, 0).astype(np.float32), size=size)
    norm = ndimage.uniform_filter(w, size=size)
    with np.errstate(invalid="ignore", divide="ignore"):
        level /= norm
    return float(np.exp(-level[ok], dtype=np.float64).sum())


def clip_for_scale(image: np.ndarray, ok: np.ndarray) -> tuple[np.ndarray, dict]:
    """The image with outliers clipped (for the scale estimate), and what was done.

    An outlier lies more than ``OUTLIER_SPANS`` widths of the ``CLIP_PERCENTILES`` range beyond it (hot pixels, a stray
    1e38); outliers are clipped to the lowest and highest values of the other valid pixels. A clean image comes
    back unchanged (the same object).
    """
    vals = image[ok]
    if vals.size < 16:
        return image, {}
    step = max(1, vals.size // 1_000_000)
    lo, hi = np.percentile(vals[::step], CLIP_PERCENTILES)
    span = float(hi - lo)
    with np.errstate(invalid="ignore", over="ignore"):
        wild = ok & ((image < lo - OUTLIER_SPANS * span) | (image > hi + OUTLIER_SPANS * span))
    n = int(np.count_nonzero(wild))
    if n == 0 or span <= 0:
        return image, {}
    tame = image[ok & ~wild]
    a, b = float(tame.min()), float(tame.max())
    return np.clip(image, a, b), {"outliers_clipped": n, "clipped_to": [a, b],
                                  "how": f"values beyond the {CLIP_PERCENTILES} percentile range by more than "
                                         f"{OUTLIER_SPANS:g} x its width (hot pixels) set to the nearest other value"}


def best_window(ok: np.ndarray, size: tuple[int, int]) -> tuple[slice, slice]:
    """The ``size`` window (on a coarse grid) holding the most valid pixels; centred when all are valid."""
    h, w = ok.shape
    ch, cw = min(size[0], h), min(size[1], w)
    if ok.all() or (ch, cw) == (h, w):
        r0, c0 = (h - ch) // 2, (w - cw) // 2
        return slice(r0, r0 + ch), slice(c0, c0 + cw)
    integ = np.zeros((h + 1, w + 1))
    integ[1:, 1:] = ok.cumsum(0).cumsum(1)
    step = max(1, min(ch, cw) // 8)
    rs = np.unique(np.r_[np.arange(0, h - ch + 1, step), h - ch])
    cs = np.unique(np.r_[np.arange(0, w - cw + 1, step), w - cw])
    r, c = np.meshgrid(rs, cs, indexing="ij")
    count = integ[r + ch, c + cw] - integ[r, c + cw] - integ[r + ch, c] + integ[r, c]
    k = np.unravel_index(np.argmax(count), count.shape)
    r0, c0 = int(rs[k[0]]), int(cs[k[1]])
    return slice(r0, r0 + ch), slice(c0, c0 + cw)


def prepare_for_scale(img: np.ndarray, ok: np.ndarray, crop_px: int) -> tuple[np.ndarray, np.ndarray, dict]:
    """The scale estimate's view: the most valid ``crop_px`` window, outliers clipped; with a record of both."""
    rows, cols = best_window(ok, (crop_px, crop_px))
    sub, okc = img[rows, cols], ok[rows, cols]
    sub, clip = clip_for_scale(sub, okc)
    return sub, okc, {"window": [rows.start, cols.start, rows.stop - rows.start, cols.stop - cols.start], **clip}


def masked_reach_note(ok: np.ndarray, sigma_px: float, *, label: str = "image") -> str | None:
    """A note when masked pixels exclude columns from a clearly larger share of the image than their own."""
    masked = ~ok
    n_masked = int(np.count_nonzero(masked))
    if n_masked == 0:
        return None
    reach = int(math.ceil(2.0 * sigma_px + 0.5))
    # the image edge keeps columns out anyway: count only what the mask costs beyond that, so a masked band along
    # the edges (the drift margin of an aligned frame series) costs no more than its own area
    lost = ndimage.maximum_filter(masked.view(np.uint8), size=2 * reach + 1, mode="constant", cval=1)
    edge = ndimage.maximum_filter(np.zeros(ok.shape, np.uint8), size=2 * reach + 1, mode="constant", cval=1)
    share_lost = float(np.count_nonzero(lost) - np.count_nonzero(edge)) / ok.size
    share_masked = n_masked / ok.size
    if share_lost < 1.5 * share_masked or share_lost < 0.01:
        return None
    return (f"{label}: masked pixels ({100 * share_masked:.3g} % of the image) keep columns out of "
            f"{100 * share_lost:.3g} % of it (no column is reported within {reach} px of a masked pixel); "
            "scattered NaN/inf or flat pixels cost many columns, repair or crop the image if that matters")


def available_memory() -> int | None:
    """Bytes of memory this process can still use: MemAvailable, capped by a cgroup limit (None if unknown)."""
    avail = None
    try:
        with open("/proc/meminfo") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    avail = int(line.split()[1]) * 1024
                    break
    except OSError:
        pass
    if avail is None:
        try:
            avail = os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
        except (ValueError, OSError, AttributeError):
            return None
    for path, used in (("/sys/fs/cgroup/memory.max", "/sys/fs/cgroup/memory.current"),
                       ("/sys/fs/cgroup/memory/memory.limit_in_bytes", "/sys/fs/cgroup/memory/memory.usage_in_bytes")):
        try:
            with open(path) as fh:
                limit = fh.read().strip()
            with open(used) as fh:
                cur = int(fh.read().strip())
        except (OSError, ValueError):
            continue
        if limit.isdigit() and int(limit) < 2**60:
            avail = min(avail, max(int(limit) - cur, 0))
        break
    return avail


def _size(n: float) -> str:
    return f"{n / 2**30:.1f} GB" if n >= 2**30 else f"{n / 2**20:.1f} MB"


def check_memory(shape, *, label: str, raw_bytes: int = 0, available: int | None = None) -> None:
    """Refuse an image whose analysis would not fit into the memory available, before it is read.

    Parameters
    ----------
    shape : tuple of int
        (rows, cols) of the analysed 2-D image.
    label : str
        File or array name for the message.
    raw_bytes : int
        Bytes the reader needs for the data as stored (a whole stack), on top of the analysis.
    available : int, optional
        Bytes available (default: :func:`available_memory`).
    """
    rows, cols = (int(s) for s in shape[-2:])
    need = BYTES_PER_PIXEL * rows * cols + int(raw_bytes)
    avail = available_memory() if available is None else available
    if avail is None or need <= avail:
        return
    side = int(math.sqrt(avail / (BYTES_PER_PIXEL + 1)))
    raise TenfoldInputError(
        f"{label}: image of {rows} x {cols} px needs about {_size(need)} of memory to analyse "
        f"({BYTES_PER_PIXEL} bytes per pixel), only {_size(avail)} is available; crop it (e.g. to "
        f"{side} x {side} px) or bin it 2 x 2 first"
    )


#: largest magnitude kept as it is in float32 (its limit is 3.4e38; filters square values, so keep far below)
FLOAT32_SAFE = 1e30
#: smallest magnitude kept as it is (float32's normal range starts at 1.2e-38, and filters square values)
FLOAT32_TINY = 1e-15
#: bits of the interquartile range that must survive the float32 cast; fewer, and the offset is subtracted first
MIN_SIGNAL_BITS = 12
#: percentiles describing the bulk of the values (a few wild pixels lie beyond them)
_BULK = (0.1, 25.0, 50.0, 75.0, 99.9)


def _bulk(values: np.ndarray) -> np.ndarray:
    step = max(1, values.size // 1_000_000)
    return np.percentile(values[::step], _BULK)


def _power_of_ten(peak: float) -> int:
    """Exponent e so that peak / 10**e is about 1e6."""
    return int(math.floor(math.log10(peak))) - 6


@dataclass
class Float32Plan:
    """How to bring data into float32 without losing its signal: decided once, applied to the whole image or to
    every tile of a memory-mapped one (so all tiles get the same offset and scale).

    Attributes
    ----------
    wild_above : float or None
        Magnitudes beyond this are wild pixels: masked and set to ``fill`` (None: no such pixels).
    fill : float
        Value given to wild pixels (the median of the others), before offset and scale.
    exponent : int
        The data are divided by ``10**exponent`` (0: not scaled; negative: multiplied).
    offset : float
        Subtracted after scaling (0: none).
    notes : list of str
        What the plan does and why ('' steps say nothing).
    """

    wild_above: float | None = None
    fill: float = 0.0
    exponent: int = 0
    offset: float = 0.0
    notes: list = field(default_factory=list)

    def apply(self, image, valid=None) -> tuple[np.ndarray, np.ndarray]:
        """``image`` as float32 after the plan, and ``valid`` (finite pixels when None) without wild pixels."""
        img = np.asarray(image)
        with np.errstate(invalid="ignore", over="ignore"):
            ok = np.isfinite(img)
        if valid is not None:
            ok &= np.asarray(valid, dtype=bool)
        if not (self.wild_above is not None or self.exponent or self.offset):
            with np.errstate(over="ignore", invalid="ignore"):
                return img.astype(np.float32), ok
        data = img.astype(np.float64)
        if self.wild_above is not None:
            with np.errstate(invalid="ignore"):
                wild = np.abs(data) > self.wild_above
            data[wild] = self.fill
            ok &= ~wild
        if self.exponent:
            data /= 10.0 ** self.exponent
        if self.offset:
            data -= self.offset
        with np.errstate(over="ignore", invalid="ignore"):
            return data.astype(np.float32), ok


def float32_plan(values, dtype=None, *, label: str = "image") -> Float32Plan:
    """Decide how ``values`` (the valid pixels, or a strided sample of a large image) reach float32 intact.

    Parameters
    ----------
    values : array
        Finite pixel values (any shape; NaN/inf are ignored).
    dtype : numpy dtype, optional
        dtype of the image (default ``values.dtype``): only data wider than float32's 24-bit mantissa (32/64-bit
        integers, float64) can carry an offset that the cast would round the signal away in.
    label : str
        Name of the image in notes.

    Notes
    -----
    In order: (1) pixels beyond ``FLOAT32_SAFE`` while the 0.1-99.9 percentile range lies within it are wild (a
    stray 1e38) and masked; (2) a bulk beyond ``FLOAT32_SAFE`` is divided, one below ``FLOAT32_TINY``
    multiplied, by a power of ten (positions unaffected); (3) when float32's rounding step at the median exceeds
    the interquartile range / 2**``MIN_SIGNAL_BITS`` (a constant offset), the robust minimum (0.1 percentile), or
    the median when that is not enough, is subtracted.
    """
    v = np.asarray(values)
    dtype = np.dtype(dtype if dtype is not None else v.dtype)
    plan = Float32Plan()
    if v.size == 0 or np.iscomplexobj(v) or dtype.kind not in "iuf":
        return plan
    v = v.ravel()
    if v.dtype.kind == "f":
        finite = np.isfinite(v)
        if not finite.all():
            v = v[finite]
    if v.size == 0:
        return plan
    peak = max(float(v.max()), -float(v.min()))
    wide = dtype.kind in "iu" and dtype.itemsize >= 4 or dtype.kind == "f" and dtype.itemsize > 4
    # the percentiles (a partial sort of every value) only where a decision below needs them
    p = _bulk(v.astype(np.float64, copy=False)) if wide or peak > FLOAT32_SAFE else None
    bulk_peak = float(max(abs(p[0]), abs(p[-1]))) if p is not None else 0.0
    if peak > FLOAT32_SAFE and 0 < bulk_peak <= FLOAT32_SAFE:
        n = int(np.count_nonzero(np.abs(v) > FLOAT32_SAFE))
        plan.wild_above, plan.fill = FLOAT32_SAFE, float(p[2])
        plan.notes.append(f"{label}: {n} pixel{'s' if n != 1 else ''} with values beyond {FLOAT32_SAFE:.0e} (up to "
                          f"{peak:.3g}) while the rest stays below {bulk_peak:.3g}: broken pixels, masked like NaN "
                          "pixels")
        peak = float(np.max(np.abs(v[np.abs(v) <= FLOAT32_SAFE]), initial=0.0))
    if peak > FLOAT32_SAFE or 0 < peak < FLOAT32_TINY:
        e = plan.exponent = _power_of_ten(peak)
        p = None if p is None else p / 10.0 ** e
        what = "exceed the float32 range" if e > 0 else "are too small for the float32 precision"
        plan.notes.append(f"{label}: values up to {peak:.3g} {what} of the analysis; "
                          f"{'divided by' if e > 0 else 'multiplied by'} 1e{abs(e)} (intensities are in units of "
                          f"1e{e}, positions are unaffected)")
    iqr = (float(p[3] - p[1]) or float(p[4] - p[0])) if wide else 0.0
    if wide and iqr > 0 and _coarse(p[2], iqr):
        offset = math.floor(p[0])
        if _coarse(p[2] - offset, iqr):
            offset = float(np.round(p[2]))
        plan.offset = float(offset)
        plan.notes.append(f"{label}: the values carry a constant offset (median {p[2]:.10g}, interquartile range "
                          f"{iqr:.3g}) that the float32 precision of the analysis would round the signal away in; "
                          f"{offset:.10g} subtracted first (intensities are relative to it, positions are "
                          "unaffected)")
    return plan


def to_float32(image, valid=None, *, label: str = "image") -> tuple[np.ndarray, np.ndarray, list[str]]:
    """The image as float32 without losing its signal to the cast; with the validity mask and notes.

    The entry point for in-memory arrays (``find_columns`` takes any array); see :func:`float32_plan` for what
    is done when.

    Parameters
    ----------
    image : (H, W) array
        Any real dtype (not modified).
    valid : (H, W) bool array, optional
        Valid pixels so far (default: the finite ones).
    label : str
        Name of the image in notes.

    Returns
    -------
    data : (H, W) float32 array
        The values, offset and/or scaled as the notes say (a copy).
    valid : (H, W) bool array
        ``valid`` and finite, without wild pixels beyond float32's safe range.
    notes : list of str
        What was done and why (empty when the data fitted as they were).
    """
    img = np.asarray(image)
    with np.errstate(invalid="ignore", over="ignore"):
        ok = np.isfinite(img)
    if valid is not None:
        ok &= np.asarray(valid, dtype=bool)
    plan = float32_plan(img if ok.all() else img[ok], img.dtype, label=label)
    data, ok = plan.apply(img, ok)
    return data, ok, plan.notes


def _coarse(level: float, iqr: float) -> bool:
    """float32's rounding step at ``level`` is coarser than ``iqr`` / 2**MIN_SIGNAL_BITS."""
    return float(np.spacing(np.float32(abs(level)))) > iqr * 2.0 ** -MIN_SIGNAL_BITS
