"""Whole ``tenfold analyze`` on a 1024 x 1024 decagonal image: seconds, the per-stage table, and the ratio to
trackpy.locate on the same image.

The image is the stress generator's decagonal cell (``stress_sample(StressCondition(structure='decagonal',
size_px=1024), rng=3)``, about 2 400 columns), written as a calibrated TIFF. ``tenfold analyze --debug`` runs in a
fresh process each time, as a user runs it, so the figures include interpreter start, imports and the numba
cache load; the stage table is its ``summary['timings_s']`` plus the export seconds it prints. trackpy.locate is
timed in this process after its own warm-up, with the diameter the analysis chose (odd, >= 4.5 sigma).

Target (issue 15): whole analyze <= 4 s on an idle 2-core machine, reported as a ratio to trackpy.locate.
The machine's load average is printed beside the figures: on a shared machine compare runs made together.

Run: ``python benchmarks/bench_pipeline.py [--repeat 3] [--size 1024] [--no-figures]``
"""

from __future__ import annotations

import argparse
import json
import os
import re
import subprocess
import sys
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np


def _image(folder: Path, size: int) -> tuple[Path, np.ndarray]:
    from tenfold.analysis.io import write_tiff
    from tenfold.analysis.synthetic import StressCondition, stress_sample

    img, truth, params = stress_sample(StressCondition(structure="decagonal", size_px=size), rng=3)
    path = folder / f"decagonal_{size}.tif"
    write_tiff(path, img, pixel_size_nm=params["pixel_size_nm"])
    print(f"image: {size} x {size} px, {len(truth)} columns, pixel {params['pixel_size_nm']:.4g} nm")
    return path, img


def _analyze(image: Path, out: Path, figures: bool) -> tuple[float, dict, float]:
    """One ``tenfold analyze`` in a fresh interpreter: (wall s, timings_s, export s)."""
    cmd = [sys.executable, "-m", "tenfold.analysis.cli", "analyze", str(image), "--out", str(out), "--quiet",
           "--debug", "--overwrite"]
    if not figures:
        cmd.append("--no-figures")
    t = time.perf_counter()
    run = subprocess.run(cmd, capture_output=True, text=True, check=False)
    wall = time.perf_counter() - t
    if run.returncode != 0:
        raise SystemExit(f"tenfold analyze failed ({run.returncode}):\n{run.stderr[-2000:]}")
    timings = json.loads((out / "summary.json").read_text())["timings_s"]
    m = re.search(r"^export\s+([0-9.]+) s", run.stderr, flags=re.M)
    return wall, timings, float(m.group(1)) if m else float("nan")


def _trackpy_seconds(img: np.ndarray, diameter_px: float, repeat: int) -> tuple[float, int]:
    import trackpy as tp

    d = int(np.ceil(diameter_px)) | 1
    frame = img.astype(np.float32)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        tp.quiet()
        tp.locate(frame[:256, :256], d, engine="numba")  # trackpy's own numba warm-up
        best, n = np.inf, 0
        for _ in range(repeat):
            t = time.perf_counter()
            f = tp.locate(frame, d, engine="numba")
            best, n = min(best, time.perf_counter() - t), len(f)
    return best, n


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=3, help="runs of tenfold analyze (the fastest is reported)")
    ap.add_argument("--size", type=int, default=1024, help="image side in px")
    ap.add_argument("--no-figures", action="store_true", help="pass --no-figures to tenfold analyze")
    args = ap.parse_args(argv)
    print(f"load average before: {' '.join(f'{v:.2f}' for v in os.getloadavg())} on {os.cpu_count()} CPUs")
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        image, img = _image(tmp, args.size)
        runs = [_analyze(image, tmp / "out", not args.no_figures) for _ in range(max(args.repeat, 1))]
        walls = [r[0] for r in runs]
        wall, timings, export_s = min(runs, key=lambda r: r[0])
        diameter = json.loads((tmp / "out" / "summary.json").read_text())["automatic"].get("column_diameter_px")
    t_tp, n_tp = _trackpy_seconds(img, diameter or 7.0, args.repeat)
    stages = {k: v for k, v in timings.items() if k != "total"}
    stages["export"] = export_s
    accounted = sum(stages.values())
    stages["start-up (interpreter, imports)"] = wall - accounted
    print(f"tenfold analyze, whole: {wall:.2f} s (fastest of {len(walls)}: "
          f"{', '.join(f'{w:.2f}' for w in walls)})")
    width = max(len(k) for k in stages)
    for k, v in stages.items():
        print(f"  {k:<{width}}  {v:7.3f} s  {100 * v / wall:5.1f} %")
    print(f"trackpy.locate (diameter {int(np.ceil(diameter or 7.0)) | 1} px): {t_tp:.3f} s, {n_tp} features")
    print(f"ratio whole analyze / trackpy.locate: {wall / t_tp:.1f}")
    print(f"load average after: {' '.join(f'{v:.2f}' for v in os.getloadavg())}")


if __name__ == "__main__":
    main()
