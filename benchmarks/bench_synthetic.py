"""Speed and memory of the synthetic renderer: 4096 x 4096 px, 100 000 columns (target: well under 10 s, 2 cores).

Run: python benchmarks/bench_synthetic.py
"""

from __future__ import annotations

import resource
import time

import numpy as np

from tenfold.analysis.synthetic import decagonal_model, expected_image, render_image


def main() -> None:
    rng = np.random.default_rng(0)
    n, size = 100_000, 4096
    x, y = rng.uniform(0, size - 1, n), rng.uniform(0, size - 1, n)
    counts = rng.uniform(500, 5000, n)
    for label, fn in (("expected_image", lambda: expected_image(x, y, counts, shape=(size, size), sigma_px=1.5,
                                                              background=20.0)),
                      ("render_image (Poisson)", lambda: render_image(x, y, counts, shape=(size, size), sigma_px=1.5,
                                                                      background=20.0, rng=1))):
        t = time.perf_counter()
        fn()
        print(f"{label:24s} {size}x{size} px, {n} columns, sigma 1.5 px: {time.perf_counter() - t:.2f} s")
    t = time.perf_counter()
    m = decagonal_model(width_nm=160.0, height_nm=160.0, rng=1)
    print(f"decagonal_model 160 x 160 nm: {len(m.columns)} columns in {time.perf_counter() - t:.2f} s")
    print(f"peak resident memory: {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f} MB")


if __name__ == "__main__":
    main()
