"""A drifting frame series: shifts recovered frame by frame, and the aligned mean against the plain mean.

Run:  python docs/examples/frame_series.py [OUTDIR]
Writes OUTDIR/frame_series.png: a 12-frame synthetic decagonal HAADF series (each frame 1/12 of the dose, steady
drift plus random jumps) with the shifts it was rendered with and the shifts Tenfold measured, and the same corner
of the plain mean and of the aligned mean. Prints the RMS shift error and the column counts found in both means.
"""

import sys
from dataclasses import replace
from pathlib import Path

import numpy as np
from matplotlib.figure import Figure

from tenfold.analysis.columns import find_columns
from tenfold.analysis.frames import align_frames, plain_mean
from tenfold.analysis.synthetic import STRESS_CELLS, drifting_stack

here = Path(__file__).resolve().parents[2]
out = Path(sys.argv[1]) if len(sys.argv) > 1 else here / "docs" / "images"
out.mkdir(parents=True, exist_ok=True)

stack, truth, shifts, _ = drifting_stack(replace(STRESS_CELLS["dec_base"], size_px=512), n_frames=12, jump_px=2.0,
                                         jump_chance=0.3, rng=11)
aligned = align_frames(stack)
plain, plain_ok = plain_mean(stack)
t = aligned.table
err = t[["shift_x_px", "shift_y_px"]].to_numpy() - shifts[["shift_x_px", "shift_y_px"]].to_numpy()
print(f"RMS shift error {np.sqrt(np.mean(err[1:] ** 2)):.4f} px, reported {np.median(t['shift_sd_px'][1:]):.4f} px")
for name, img, ok in (("plain mean", plain, plain_ok), ("aligned mean", aligned.mean, aligned.valid)):
    cols, _ = find_columns(img, valid=ok, frames_averaged=12)
    print(f"{name}: {len(cols)} columns ({len(truth)} in the field)")

fig = Figure(figsize=(12, 4), layout="constrained")
ax0, ax1, ax2 = fig.subplots(1, 3)
for c, colour in (("shift_x_px", "#0072B2"), ("shift_y_px", "#D55E00")):
    ax0.plot(shifts["frame"], shifts[c], "o", mfc="none", color=colour, label=f"{c} rendered")
    ax0.plot(t["frame"], t[c], "+", color=colour, ms=9, label=f"{c} measured")
ax0.set(xlabel="frame", ylabel="shift (px)", title="drift and jumps, 1/12 dose per frame")
ax0.legend(fontsize=7)
box = (slice(40, 140), slice(40, 140))
for ax, img, title in ((ax1, plain, "plain mean of 12 frames"), (ax2, aligned.mean, "aligned mean of 12 frames")):
    ax.imshow(img[box], cmap="gray")
    ax.set(title=title, xticks=[], yticks=[])
fig.savefig(out / "frame_series.png", dpi=120)
print("wrote", out / "frame_series.png")
