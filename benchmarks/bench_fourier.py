"""Speed of the Fourier and phason stages.

* Power spectrum + spots + decagonal indexing (with its uncertainty draws) of a 4096 x 4096 decagonal image
  (the phason-strained generator of ``analysis/_phason_sample.py``, 0.04 nm/px). Target: under 5 s.
* Real-space lift of a tiling with about 10 000 vertices (pentagrid, edge 40 px): integer coordinates, strain fit,
  bootstrap (200 resamples) and flip test. Target: under 1 s.
* Kinematic diffraction (non-uniform FFT) of 1e6 columns on a 1024 x 1024 grid. Target: under 10 s.

Run: ``python benchmarks/bench_fourier.py [--size 4096] [--half 55]``
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import pandas as pd

from tenfold.analysis._pentagrid import pentagrid_tiling
from tenfold.analysis._phason_sample import phason_strained_image, strain_with_singular_values
from tenfold.analysis.fourier import analyze_fourier
from tenfold.analysis.phason import phason_from_network


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--size", type=int, default=4096)
    ap.add_argument("--half", type=float, default=55.0, help="pentagrid half-width in edges (55: ~10 000 vertices)")
    a = ap.parse_args(argv)

    w = strain_with_singular_values(0.043, 0.032)
    img, _ = phason_strained_image(phason_strain=w, size_px=a.size, rng=1)
    analyze_fourier(img[:256, :256], pixel_size_nm=0.04)  # warm-up (imports, candidate table)
    t0 = time.perf_counter()
    spots, info = analyze_fourier(img, pixel_size_nm=0.04, edge_px=50.0)
    t1 = time.perf_counter()
    idx = info["indexing"] or {}
    print(f"spectrum + spots + indexing, {a.size} x {a.size}: {t1 - t0:.2f} s "
          f"({idx.get('n_indexed', 0)} of {len(spots)} spots indexed; phason singular values "
          f"{np.round((idx.get('phason') or {}).get('singular_values', [np.nan] * 2), 4).tolist()}, truth "
          f"[0.043, 0.032])")

    t = pentagrid_tiling(a.half, rng=2, phason_strain=w).scaled(40.0)
    net = pd.DataFrame({"motif_a": t.edges[:, 0], "motif_b": t.edges[:, 1]})
    mot = pd.DataFrame({"motif_id": np.arange(len(t.vertices)), "centre_x_px": t.vertices[:, 0],
                        "centre_y_px": t.vertices[:, 1]})
    t0 = time.perf_counter()
    tab, pinfo = phason_from_network(net, mot, orientation_deg=0.0)
    t1 = time.perf_counter()
    print(f"real-space lift + fit + 200 bootstraps, {len(t.vertices)} vertices: {t1 - t0:.2f} s "
          f"(singular values {np.round(pinfo['singular_values'], 4).tolist()} +- "
          f"{np.round(pinfo['singular_values_se'], 4).tolist()})")
    from tenfold.analysis.fourier import column_diffraction

    rng = np.random.default_rng(0)
    x, y = rng.uniform(0, 4096, 1_000_000), rng.uniform(0, 4096, 1_000_000)
    t0 = time.perf_counter()
    inten, _ = column_diffraction(x, y, n_image=4096, n_grid=1024)
    print(f"kinematic diffraction, 1e6 columns on a 1024^2 grid: {time.perf_counter() - t0:.2f} s")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
