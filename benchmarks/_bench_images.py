"""Synthetic decagonal test images for the benchmarks (shared by bench_export, bench_batch, bench_tiled)."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from tenfold.analysis.io import write_tiff
from tenfold.analysis.synthetic import decagonal_model, make_sample

#: columns per nm^2 of the decagonal model (edge 2 nm, ring radius 0.45 nm): 5357 columns on 40.96^2 nm^2
#: (the bundled high-dose sample)
COLUMNS_PER_NM2 = 5357 / 40.96**2
SIGMA_NM = 0.06


def decagonal_image(size: int, n_columns: float = 50_000, *, seed: int = 0):
    """A ``size`` x ``size`` HAADF-like counts image with about ``n_columns`` columns.

    The pixel size is chosen so that the field holds ``n_columns`` columns; returns (image, pixel_size_nm, truth).
    """
    width_nm = math.sqrt(n_columns / COLUMNS_PER_NM2)
    ps = width_nm / size
    model = decagonal_model(width_nm=width_nm, height_nm=width_nm, angle_deg=7.0, rng=seed)
    img, truth = make_sample(model, pixel_size_nm=ps, sigma_nm=SIGMA_NM, counts_by_species=[1118.0, 3090.0, 8000.0],
                             background=40.0, rng=seed + 1000, shape=(size, size))
    return img, ps, truth


def decagonal_tiff(path, size: int, n_columns: float = 50_000, *, seed: int = 0) -> Path:
    """Write :func:`decagonal_image` as a calibrated TIFF (kept when it exists already)."""
    path = Path(path)
    if not path.exists():
        img, ps, _ = decagonal_image(size, n_columns, seed=seed)
        path.parent.mkdir(parents=True, exist_ok=True)
        write_tiff(path, img.astype(np.float32), pixel_size_nm=ps)
    return path
