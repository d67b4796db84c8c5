"""Exact, cheaper replacements for a few scipy.ndimage filters on the detection's hot path.

``window_max`` / ``window_min``: the largest / smallest value over the square window about every pixel, the
window clipped at the array border. That is exactly ``scipy.ndimage.maximum_filter`` / ``minimum_filter`` in the
modes 'reflect' and 'nearest' (their border pixels all lie inside the clipped window; 'mirror' too for odd sizes),
computed with a handful of whole-array ``np.maximum`` / ``np.minimum`` calls per axis (runs doubled in length, 1,
2, 4, ... pixels, then two overlapping runs cover the window: a sparse-table scheme done with array shifts): 3-20
times faster than scipy's line-by-line filter at the sizes the finder uses, and equal to it value for value (a
maximum involves no rounding).

``gaussian_fft``: ``scipy.ndimage.gaussian_filter`` for wide kernels, by one FFT convolution.
"""

from __future__ import annotations

import numpy as np

__all__ = ["window_max", "window_min", "gaussian_fft"]


def _pad_value(dtype: np.dtype, largest: bool):
    """The value that never wins the comparison: -inf / +inf for floats, the dtype's extreme for integers."""
    if dtype == np.bool_:
        return not largest
    if np.issubdtype(dtype, np.floating):
        return -np.inf if largest else np.inf
    info = np.iinfo(dtype)
    return info.min if largest else info.max


def _sliding(a: np.ndarray, size: int, before: int, axis: int, op, fill) -> np.ndarray:
    """Running ``op`` (np.maximum / np.minimum) along ``axis`` over pixels ``i - before ... i - before + size - 1``."""
    n = a.shape[axis]

    def cut(start, stop):
        return (slice(None),) * axis + (slice(start, stop),)

    shape = list(a.shape)
    shape[axis] = n + size - 1
    padded = np.empty(shape, a.dtype)
    padded[cut(0, before)] = fill
    padded[cut(before + n, None)] = fill
    padded[cut(before, before + n)] = a
    run, k = padded, 1  # run[i] = op over padded[i : i + k] along the axis
    while 2 * k <= size:
        run = op(run[cut(0, -k)], run[cut(k, None)])
        k *= 2
    if k < size:  # two overlapping runs of k cover size pixels
        run = op(run[cut(0, n)], run[cut(size - k, size - k + n)])
    return run[cut(0, n)]


def _window(a, size: int, before, largest: bool) -> np.ndarray:
    a = np.asarray(a)
    before = size // 2 if before is None else int(before)
    if a.ndim != 2 or size < 1 or abs(size - 1 - 2 * before) > 1:
        raise ValueError(f"window filter needs a 2-D array, a size >= 1 and a window about its pixel, got shape "
                         f"{a.shape}, size {size}, before {before}")
    if size == 1:
        return a.copy()
    op = np.maximum if largest else np.minimum
    if a.dtype == np.bool_:
        op = np.logical_or if largest else np.logical_and
    fill = _pad_value(a.dtype, largest)
    return _sliding(_sliding(a, size, before, 0, op, fill), size, before, 1, op, fill)


def window_max(a, size: int, *, before: int | None = None) -> np.ndarray:
    """Largest value over the ``size`` x ``size`` window about every pixel, clipped at the border.

    The window spans ``before`` pixels before the pixel (default ``size // 2``) and ``size - 1 - before`` after it,
    on both axes; the two may differ by one. Equal to ``scipy.ndimage.maximum_filter(a, size=size)`` (mode
    'reflect' or 'nearest'; ``before`` = ``size // 2 + origin``); for a bool array, the binary dilation
    by the square.
    """
    return _window(a, size, before, True)


def window_min(a, size: int, *, before: int | None = None) -> np.ndarray:
    """Smallest value over the ``size`` x ``size`` window about every pixel, clipped at the border (as
    ``window_max``; equal to ``scipy.ndimage.minimum_filter(a, size=size)``)."""
    return _window(a, size, before, False)


def gaussian_fft(a: np.ndarray, sigma: float) -> np.ndarray:
    """``scipy.ndimage.gaussian_filter(a, sigma)`` (float64, mode 'reflect', truncated at 4 sigma) by one FFT
    convolution of the mirror-padded image: the same kernel and border, equal to ~1e-15 of the image's range, and
    several times faster for the wide kernels of a polarity or background estimate (cost independent of sigma).
    """
    from scipy import fft as sfft

    a = np.asarray(a, dtype=np.float64)
    radius = int(4.0 * float(sigma) + 0.5)
    u = np.arange(-radius, radius + 1, dtype=np.float64)
    k = np.exp(-0.5 * u * u / float(sigma) ** 2)
    k /= k.sum()
    p = np.pad(a, radius, mode="symmetric")
    shape = [sfft.next_fast_len(n, real=True) for n in p.shape]
    # the kernel centred on index 0 (negative offsets wrap to the end): a circular convolution of the padded
    # image whose wrap-around never reaches the pixels kept
    kr = np.zeros(shape[0])
    kc = np.zeros(shape[1])
    kr[u.astype(np.int64)] = k
    kc[u.astype(np.int64)] = k
    spec = sfft.rfft2(p, s=shape, workers=-1)
    spec *= sfft.fft(kr)[:, None] * sfft.rfft(kc)[None, :]
    out = sfft.irfft2(spec, s=shape, workers=-1)
    return out[radius:radius + a.shape[0], radius:radius + a.shape[1]]

