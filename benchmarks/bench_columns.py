"""Speed of find_columns against plain trackpy.locate, and tiled against untiled.

Cases (``--case``, repeatable; default all four):

* ``crowded-1024`` / ``crowded-4096``: decagonal clusters from the stress generator (sigma / spacing 0.25, 2 px per
  sigma, brightest peak 500 counts/px), about 3 000 / 51 000 columns;
* ``sparse-1024`` / ``sparse-4096``: a jittered grid of well separated columns (spacing 6 sigma, three brightness
  levels), about 6 000 / 100 000 columns.

Per case it prints trackpy.locate's time (diameter odd >= 4.5 sigma, separation half the spacing, its numba engine
warmed up first), find_columns' time with its defaults, their ratio, find_columns' own seconds per step
(``info['timings_s']``), and the peak memory. ``--tiled N`` also runs find_columns with tiles of N px and prints
the share of columns that agree with the untiled run within 1e-3 px, the counts and whether the notes match.

Run: ``python benchmarks/bench_columns.py [--case crowded-1024 ...] [--tiled 512]``. Targets (issue 15, on an idle
2-core machine): ratio <= 3 on 1024^2 images, <= 2 on 4096^2 images; tiled equal to untiled (>= 99.9 % of the
columns within 1e-3 px, the same count and notes). Compare ratios taken in the same run: the machine may be shared.
"""

from __future__ import annotations

import argparse
import math
import resource
import time
import warnings

import numpy as np

from tenfold.analysis.columns import find_columns
from tenfold.analysis.refine import warm_up
from tenfold.analysis.synthetic import render_image

CASES = ("crowded-1024", "sparse-1024", "crowded-4096", "sparse-4096")


def crowded(size):
    from tenfold.analysis import synthetic as S

    cond = S.StressCondition(structure="decagonal", size_px=size, sigma_over_spacing=0.25, px_per_sigma=2.0,
                             peak_counts=500.0)
    img, truth, params = S.stress_sample(cond, rng=3)
    return img, params["sigma_px"], params["closest_spacing_px"], params["pixel_size_nm"], len(truth)


def sparse(size):
    rng = np.random.default_rng(0)
    a = size / math.sqrt(6000 * (size / 1024) ** 2)
    g = np.arange(a / 2, size - a / 2, a)
    x, y = np.meshgrid(g, g)
    x = x.ravel() + rng.uniform(-0.15, 0.15, x.size) * a
    y = y.ravel() + rng.uniform(-0.15, 0.15, y.size) * a
    counts = rng.choice([800.0, 2000.0, 5000.0], x.size)
    img = render_image(x, y, counts, shape=(size, size), sigma_px=a / 6, background=20.0, rng=1)
    return img, a / 6, a, None, x.size


def trackpy_seconds(img, sigma, spacing):
    import trackpy as tp

    diameter = int(math.ceil(4.5 * sigma)) | 1
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        tp.locate(img[:256, :256].astype(np.uint16), diameter, engine="numba")  # trackpy's own numba warm-up
        t = time.perf_counter()
        f = tp.locate(img.astype(np.uint16), diameter, separation=spacing / 2, engine="numba")
    return time.perf_counter() - t, len(f)


def run(case, tiled=None):
    kind, size = case.split("-")
    img, sigma, spacing, ps, n_true = (crowded if kind == "crowded" else sparse)(int(size))
    t_tp, n_tp = trackpy_seconds(img, sigma, spacing)
    t = time.perf_counter()
    cols, info = find_columns(img, n_species=0, pixel_size_nm=ps)
    t_fc = time.perf_counter() - t
    steps = " ".join(f"{k} {v:.2f}" for k, v in info["timings_s"].items())
    print(f"{case:13s} {n_true:6d} columns | trackpy {t_tp:6.2f} s ({n_tp}) | find_columns {t_fc:6.2f} s "
          f"({len(cols)}) | ratio {t_fc / t_tp:5.1f} | steps: {steps} | refine passes "
          f"{info['refinement']['neighbour_passes']}", flush=True)
    if tiled:
        from scipy.spatial import cKDTree

        t = time.perf_counter()
        tcols, tinfo = find_columns(img, n_species=0, pixel_size_nm=ps, tile_size=tiled)
        t_t = time.perf_counter() - t
        d = cKDTree(tcols[["x_px", "y_px"]].to_numpy()).query(cols[["x_px", "y_px"]].to_numpy())[0] \
            if len(tcols) and len(cols) else np.zeros(0)
        print(f"{'':13s} tiled {tiled} px: {t_t:.2f} s, {tinfo['tiling']['n_tiles']} tiles, {len(tcols)} vs "
              f"{len(cols)} columns, within 1e-3 px {np.mean(d < 1e-3) if d.size else float('nan'):.5f}, largest "
              f"difference {d.max() if d.size else float('nan'):.2e} px, notes equal {tinfo['notes'] == info['notes']}",
              flush=True)


def main(argv=None):
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--case", action="append", choices=CASES, help="case to run (repeatable; default all)")
    p.add_argument("--tiled", type=int, default=None, metavar="PX", help="also run tiled with this tile size")
    args = p.parse_args(argv)
    print(f"numba kernels: compile / cache load {warm_up():.2f} s (once per process)")
    find_columns(crowded(256)[0], n_species=0)  # every compiled path once, not timed
    for case in args.case or CASES:
        run(case, args.tiled)
    print(f"peak RSS: {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f} MB")


if __name__ == "__main__":
    main()
