"""Speed of find_columns against plain trackpy.locate on 4096 x 4096 images.

Two cases: a jittered grid with ~100 000 well-separated columns (``grid``), and a crowded decagonal cluster image from
the stress generator with ~50 000 columns 4 sigma apart (``crowded``, the issue's case).

Run: python benchmarks/bench_columns.py [grid|crowded] [size] ; prints wall times, their ratio, peak memory and
compile time. Target: find_columns within 2 x trackpy.locate, peak memory under 2 GB.
"""

import resource
import sys
import time
import warnings

import numpy as np

from tenfold.analysis.columns import find_columns
from tenfold.analysis.refine import warm_up
from tenfold.analysis.synthetic import render_image


def crowded(size=4096):
    from tenfold.analysis import synthetic as S

    cond = S.StressCondition(structure="decagonal", size_px=size, sigma_over_spacing=0.25, px_per_sigma=2.0,
                             peak_counts=500.0)
    t = time.perf_counter()
    img, truth, params = S.stress_sample(cond, rng=3)
    print(f"rendered {size}x{size}, {len(truth)} columns, sigma {params['sigma_px']:.2f} px in "
          f"{time.perf_counter() - t:.1f} s")
    return img, params["sigma_px"], params["closest_spacing_px"], params["pixel_size_nm"]


def main(case="grid", size=4096):
    if case == "crowded":
        img, sigma, spacing, ps = crowded(size)
        return _compare(img, sigma, spacing, ps)
    rng = np.random.default_rng(0)
    a = size / np.sqrt(100_000)  # square-ish jittered grid: ~100 000 columns
    g = np.arange(a / 2, size - a / 2, a)
    x, y = np.meshgrid(g, g)
    x = x.ravel() + rng.uniform(-0.15, 0.15, x.size) * a
    y = y.ravel() + rng.uniform(-0.15, 0.15, y.size) * a
    counts = rng.choice([800.0, 2000.0, 5000.0], x.size)
    t = time.perf_counter()
    img = render_image(x, y, counts, shape=(size, size), sigma_px=a / 6, background=20.0, rng=1)
    print(f"rendered {size}x{size}, {x.size} columns, sigma {a / 6:.2f} px in {time.perf_counter() - t:.1f} s")
    return _compare(img, a / 6, a, None)


def _compare(img, sigma, spacing, ps):
    print(f"numba compile / cache load: {warm_up():.2f} s (first call; cached afterwards)")
    import trackpy as tp

    diameter = int(np.ceil(4.5 * sigma)) | 1
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        tp.locate(img[:256, :256].astype(np.uint16), diameter, engine="numba")  # trackpy's own numba warm-up
        t = time.perf_counter()
        f = tp.locate(img.astype(np.uint16), diameter, separation=spacing / 2, engine="numba")
        t_tp = time.perf_counter() - t
    print(f"trackpy.locate: {t_tp:.2f} s, {len(f)} features")
    t = time.perf_counter()
    cols, info = find_columns(img, n_species=0, pixel_size_nm=ps)
    t_fc = time.perf_counter() - t
    r = info["refinement"]
    print(f"find_columns: {t_fc:.2f} s, {len(cols)} columns (last round: detect {r['detect_s']:.2f} s, refine "
          f"{r['refine_s']:.2f} s; rounds {len(info['automatic']['rounds'])}, neighbour passes "
          f"{r['neighbour_passes']})")
    print(f"ratio find_columns / trackpy.locate: {t_fc / t_tp:.2f}")
    print(f"peak RSS: {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f} MB")


if __name__ == "__main__":
    main(sys.argv[1] if len(sys.argv) > 1 else "grid", int(sys.argv[2]) if len(sys.argv) > 2 else 4096)
