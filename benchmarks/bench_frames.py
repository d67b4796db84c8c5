"""Frame-series alignment: shift precision at 1/12 of a normal dose per frame, and speed against one find_columns run.

Prints, for a drifting 12-frame stack of a decagonal stress cell (1024 px by default): the RMS error of the recovered
shifts against the rendered ones (px), the reported Cramer-Rao figure, the seconds of ``align_frames`` and of one
``find_columns`` on the aligned mean, and their ratio (the target is at most 1).

    python benchmarks/bench_frames.py [--size 1024] [--frames 12] [--seed 3] [--nonrigid] [--repeat 3]
    python benchmarks/bench_frames.py --columns [--cells dec_base,dec_dose100,...] [--frames 12]

``--columns`` prints, per stress cell, the recall and median RMS/bound of the columns found in one frame of the full
dose, in the aligned mean of the frames (each 1/N of the dose) and in their plain mean, with the shift RMS error;
columns within ``--margin`` px of the image edge are not scored (the aligned mean's masked drift margin moves its
edge inwards by up to the drift, and columns near any edge are less precise).
"""

from __future__ import annotations

import argparse
import time
from dataclasses import replace

import numpy as np

from tenfold.analysis.columns import find_columns, warm_up
from tenfold.analysis.frames import align_frames
from tenfold.analysis.synthetic import STRESS_CELLS, drifting_stack


def _score(image, valid, truth, bound, n_frames, margin=12):
    from tenfold.analysis.synthetic import score_columns

    cols, _ = find_columns(image, valid=valid, frames_averaged=n_frames)
    m = margin
    h, w = image.shape

    def inner(df):
        return df[(df["x_px"] > m) & (df["x_px"] < w - 1 - m) & (df["y_px"] > m) & (df["y_px"] < h - 1 - m)]

    t = inner(truth.assign(crlb_px=bound))
    return score_columns(inner(cols), t, match_radius_px=0.5 * float(np.min(_nearest(truth))))


def _nearest(truth):
    from scipy.spatial import cKDTree

    xy = truth[["x_px", "y_px"]].to_numpy()
    return cKDTree(xy).query(xy, k=2)[0][:, 1]


def columns_table(cells: list[str], n_frames: int, seed: int, margin: int) -> None:
    from tenfold.analysis.frames import plain_mean
    from tenfold.analysis.synthetic import column_signal, crlb_columns_px, stress_background

    print("| cell | shift RMS px | recall 1 frame / aligned / plain | RMS/bound 1 frame / aligned / plain |")
    print("| --- | --- | --- | --- |")
    for name in cells:
        cond = STRESS_CELLS[name]
        stack, truth, shifts, params = drifting_stack(cond, n_frames=n_frames, jump_px=2.0, jump_chance=0.3, rng=seed)
        n = cond.size_px
        probe = [tuple(c) for c in params["probe_components"]]
        signal = column_signal(truth["x_px"], truth["y_px"], truth["counts"], shape=(n, n),
                               sigma_px=params["sigma_px"], probe=probe)
        background = stress_background(cond, params)
        full = np.random.default_rng(seed + 1).poisson(background + signal).astype(np.float32)
        bound = crlb_columns_px(truth["x_px"], truth["y_px"], truth["counts"], shape=(n, n),
                                sigma_px=params["sigma_px"], background=background, probe=probe,
                                signal=signal)["crlb_px"].to_numpy()
        out = align_frames(stack)
        err = out.table[["shift_x_px", "shift_y_px"]].to_numpy() - shifts[["shift_x_px", "shift_y_px"]].to_numpy()
        pm, pok = plain_mean(stack)
        s = [_score(full, None, truth, bound, 1, margin), _score(out.mean, out.valid, truth, bound, n_frames, margin),
             _score(pm, pok, truth, bound, n_frames, margin)]
        print(f"| {name} | {np.sqrt(np.mean(err[1:] ** 2)):.4f} | "
              + " / ".join(f"{x['recall']:.3f}" for x in s) + " | "
              + " / ".join(f"{x['rms_bound_median']:.2f}" for x in s) + " |", flush=True)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", type=int, default=1024)
    ap.add_argument("--frames", type=int, default=12)
    ap.add_argument("--seed", type=int, default=3)
    ap.add_argument("--nonrigid", action="store_true")
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--columns", action="store_true")
    ap.add_argument("--cells", default="dec_base,dec_dose100,dec_dose30,dec_broad,fivefold_base,square,hardcore")
    ap.add_argument("--margin", type=int, default=12, help="columns this close to the image edge are not scored")
    a = ap.parse_args()
    if a.columns:
        columns_table(a.cells.split(","), a.frames, a.seed, a.margin)
        return
    stack, _, shifts, _ = drifting_stack(replace(STRESS_CELLS["dec_base"], size_px=a.size), n_frames=a.frames,
                                         wobble_px=0.3 if a.nonrigid else 0.0, rng=a.seed)
    warm_up()
    align_frames(stack[:2])  # imports and FFT plans
    t_align, t_find = [], []
    for _ in range(a.repeat):  # interleaved, fastest of each: a shared machine's load hits both alike
        t0 = time.perf_counter()
        out = align_frames(stack, nonrigid=a.nonrigid)
        t_align.append(time.perf_counter() - t0)
        t0 = time.perf_counter()
        cols, _ = find_columns(out.mean, valid=out.valid, frames_averaged=a.frames)
        t_find.append(time.perf_counter() - t0)
    t_align, t_find = min(t_align), min(t_find)
    err = out.table[["shift_x_px", "shift_y_px"]].to_numpy() - shifts[["shift_x_px", "shift_y_px"]].to_numpy()
    rms = float(np.sqrt(np.mean(err[1:] ** 2)))
    sd = float(np.sqrt(np.mean(out.table["shift_sd_px"].to_numpy()[1:] ** 2)))
    print(f"{a.frames} frames of {a.size}^2 px, 1/{a.frames} dose each, method {out.info['method']}")
    print(f"shift RMS error {rms:.4f} px (target 0.05), reported {sd:.4f} px, ratio {rms / sd:.2f}")
    print(f"align_frames {t_align:.2f} s, find_columns on the mean {t_find:.2f} s ({len(cols)} columns), "
          f"ratio {t_align / t_find:.2f} (target <= 1; fastest of {a.repeat}, interleaved)")


if __name__ == "__main__":
    main()
