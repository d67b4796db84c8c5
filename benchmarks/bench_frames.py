"""Frame-series alignment: shift precision at 1/12 of a normal dose per frame, and speed against one find_columns run.

Prints, for a drifting 12-frame stack of a decagonal stress cell (1024 px by default): the RMS error of the recovered
shifts against the rendered ones (px), the reported Cramer-Rao figure, the seconds of ``align_frames`` and of one
``find_columns`` on the aligned mean, and their ratio (the target is at most 1).

    python benchmarks/bench_frames.py [--size 1024] [--frames 12] [--seed 3] [--nonrigid]
"""

from __future__ import annotations

import argparse
import time
from dataclasses import replace

import numpy as np

from tenfold.analysis.columns import find_columns, warm_up
from tenfold.analysis.frames import align_frames
from tenfold.analysis.synthetic import STRESS_CELLS, drifting_stack


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", type=int, default=1024)
    ap.add_argument("--frames", type=int, default=12)
    ap.add_argument("--seed", type=int, default=3)
    ap.add_argument("--nonrigid", action="store_true")
    a = ap.parse_args()
    stack, _, shifts, _ = drifting_stack(replace(STRESS_CELLS["dec_base"], size_px=a.size), n_frames=a.frames,
                                         wobble_px=0.3 if a.nonrigid else 0.0, rng=a.seed)
    warm_up()
    align_frames(stack[:2])  # imports and FFT plans
    t0 = time.perf_counter()
    out = align_frames(stack, nonrigid=a.nonrigid)
    t_align = time.perf_counter() - t0
    t0 = time.perf_counter()
    cols, _ = find_columns(out.mean, valid=out.valid, frames_averaged=a.frames)
    t_find = time.perf_counter() - t0
    err = out.table[["shift_x_px", "shift_y_px"]].to_numpy() - shifts[["shift_x_px", "shift_y_px"]].to_numpy()
    rms = float(np.sqrt(np.mean(err[1:] ** 2)))
    sd = float(np.sqrt(np.mean(out.table["shift_sd_px"].to_numpy()[1:] ** 2)))
    print(f"{a.frames} frames of {a.size}^2 px, 1/{a.frames} dose each, method {out.info['method']}")
    print(f"shift RMS error {rms:.4f} px (target 0.05), reported {sd:.4f} px, ratio {rms / sd:.2f}")
    print(f"align_frames {t_align:.2f} s, find_columns on the mean {t_find:.2f} s ({len(cols)} columns), "
          f"ratio {t_align / t_find:.2f} (target <= 1)")


if __name__ == "__main__":
    main()
