"""Speed of the structure stages: motifs, ladder (columns and centres) and tiling, on decorated Penrose vertex sets.

Point sets: rings of ten columns (radius 0.45 nm, alternating two species) plus a centre column on every vertex of
a pentagrid Penrose tiling of edge 2 nm, at 0.04 nm/px, with 0.01 nm Gaussian jitter (tests/test_motifs.py builds
them). Prints seconds per stage for about 10k, 30k, 100k and 300k columns and the log-log slope of the total
time against N (1 = linear; O(N log N) shows as slightly above 1). Target: 100 000 columns under 5 s in total on
2 cores.

Run: ``python benchmarks/bench_structure.py [--sizes 10000 30000 ...] [--repeat 1]``
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

from test_motifs import PX_NM, decorated_pentagrid  # noqa: E402

from tenfold.analysis.ladder import fit_ladder  # noqa: E402
from tenfold.analysis.motifs import find_motifs  # noqa: E402
from tenfold.analysis.tiling import build_network  # noqa: E402

# Columns per unit half-width^2 of the pentagrid patch (about 11 columns per vertex); measured once.
_COLUMNS_PER_HW2 = 54.0


def _timed(fn, *a, **k):
    t0 = time.perf_counter()
    out = fn(*a, **k)
    return out, time.perf_counter() - t0


def run(n_target: int, repeat: int = 1) -> dict:
    hw = float(np.sqrt(n_target / _COLUMNS_PER_HW2))
    cols, _ = decorated_pentagrid(hw, rng=1)
    best = None
    for _ in range(repeat):
        (motifs, m_info), t_m = _timed(find_motifs, cols, pixel_size_nm=PX_NM)
        _, t_lc = _timed(fit_ladder, cols["x_px"], cols["y_px"], pixel_size_nm=PX_NM)
        rings = motifs[motifs["kind"] == "ring10"]
        _, t_lr = _timed(fit_ladder, rings["centre_x_px"], rings["centre_y_px"], point_set="centres",
                         pixel_size_nm=PX_NM)
        (_, _, t_info), t_t = _timed(build_network, motifs, pixel_size_nm=PX_NM)
        row = {"n_columns": len(cols), "n_rings": int(len(rings)), "motifs_s": t_m, "ladder_columns_s": t_lc,
               "ladder_centres_s": t_lr, "tiling_s": t_t, "total_s": t_m + t_lc + t_lr + t_t,
               "tiles": sum(t_info["tile_counts"].values())}
        if best is None or row["total_s"] < best["total_s"]:
            best = row
    return best


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", type=int, nargs="+", default=[10_000, 30_000, 100_000, 300_000])
    ap.add_argument("--repeat", type=int, default=1)
    args = ap.parse_args(argv)
    # Warm-up: imports and first-call overheads are not part of the scaling.
    run(3000)
    rows = [run(n, args.repeat) for n in args.sizes]
    print(f"{'columns':>9} {'rings':>7} {'motifs':>8} {'ladder-c':>9} {'ladder-r':>9} {'tiling':>8} {'total':>8}  (s)")
    for r in rows:
        print(f"{r['n_columns']:>9d} {r['n_rings']:>7d} {r['motifs_s']:>8.2f} {r['ladder_columns_s']:>9.2f} "
              f"{r['ladder_centres_s']:>9.2f} {r['tiling_s']:>8.2f} {r['total_s']:>8.2f}")
    if len(rows) >= 2:
        n = np.log([r["n_columns"] for r in rows])
        t = np.log([r["total_s"] for r in rows])
        slope = np.polyfit(n, t, 1)[0]
        print(f"log-log slope of total time vs N: {slope:.2f}")
    near = min(rows, key=lambda r: abs(r["n_columns"] - 100_000))
    print(f"{near['n_columns']} columns: {near['total_s']:.2f} s total (target < 5 s on 2 cores)")


if __name__ == "__main__":
    main()
