"""Batch of 8 images with 1 and with 2 workers (embedded dask cluster): wall time and speed-up.

The images are the bundled synthetic samples (1024^2 px, about 5 000 columns each), copied twice each to make 8.
Each run writes into a fresh folder with per-image figures off. Also runs a resume (every image finished) to show
its cost.

Run: ``python benchmarks/bench_batch.py [n_images]``
"""

from __future__ import annotations

import shutil
import sys
import tempfile
import time
from pathlib import Path

from tenfold.analysis.batch import run_batch
from tenfold.analysis.parallel import Execution

SAMPLES = Path(__file__).resolve().parents[1] / "sample_images"


def main(n_images: int = 8) -> None:
    tmp = Path(tempfile.mkdtemp())
    src = tmp / "in"
    src.mkdir()
    samples = sorted(SAMPLES.glob("decagonal_haadf_*.tif"))
    for k in range(n_images):
        shutil.copy(samples[k % len(samples)], src / f"img{k:02d}.tif")
    times = {}
    for workers in (1, 2):
        out = tmp / f"out{workers}"
        t = time.perf_counter()
        table = run_batch(src, out, figures=False, execution=Execution(workers=workers))
        times[workers] = time.perf_counter() - t
        ok = int((table["status"] == "ok").sum())
        print(f"{workers} worker(s): {times[workers]:.1f} s for {n_images} images ({ok} ok), "
              f"{times[workers] / n_images:.1f} s per image")
    t = time.perf_counter()
    run_batch(src, tmp / "out2", figures=False, execution=Execution(workers=2))
    print(f"resume with every image finished: {time.perf_counter() - t:.1f} s")
    print(f"speed-up 1 -> 2 workers: {times[1] / times[2]:.2f} x (2 cores, shared machine)")
    shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    main(*(int(a) for a in sys.argv[1:2]))
