"""Whole ``tenfold analyze`` on a 1024 x 1024 decagonal image: seconds, the per-stage table, and the ratio to
trackpy.locate on the same image.

The image is the stress generator's decagonal cell (``stress_sample(StressCondition(structure='decagonal',
size_px=1024), rng=3)``, about 2 400 columns), written as a calibrated TIFF. ``tenfold analyze --debug`` runs in a
fresh process each time, as a user runs it, so the figures include interpreter start, imports and the numba
cache load; the stage table is its ``summary['timings_s']`` plus the export seconds it prints. trackpy.locate is
timed in this process after its own warm-up, with the diameter the analysis chose (odd, >= 4.5 sigma).

Target (issue 15): whole analyze <= 4 s on an idle 2-core machine, reported as a ratio to trackpy.locate; with
``--python`` the ratio of this tree's whole analyze to each other tree's is printed too (fastest and median run).
The machine's load average is printed beside the figures: on a shared machine compare runs made together.

Run: ``python benchmarks/bench_pipeline.py [--repeat 3] [--size 1024] [--no-figures] [--no-compile]
[--python OTHER ...]``;
``--python`` adds interpreters with another Tenfold installed (e.g. an older tree in its own venv): their runs are
interleaved with this one's, so a shared machine's load hits both alike. A stage an older tree does not time shows
as missing; its export seconds come from its ``--debug`` output when it prints them. Each tree is byte-compiled
first, as installing it does (``--no-compile``: not; an editable tree under PYTHONDONTWRITEBYTECODE then compiles
its source at every start).
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


def _compile(python: str) -> None:
    """Byte-compile the Tenfold tree ``python`` imports, as ``pip install`` does: an editable tree under
    PYTHONDONTWRITEBYTECODE would otherwise compile some 0.9 MB of source at every start (a few tenths of a s)."""
    code = "import os, tenfold.analysis as a; print(os.path.dirname(a.__file__))"
    folder = subprocess.run([python, "-c", code], capture_output=True, text=True, check=True).stdout.strip()
    subprocess.run([python, "-m", "compileall", "-q", folder], check=True)
    print(f"byte code compiled: {folder}")


def _analyze(python: str, image: Path, out: Path, figures: bool) -> tuple[float, dict, float]:
    """One ``tenfold analyze`` in a fresh interpreter: (wall s, timings_s, export s)."""
    cmd = [python, "-m", "tenfold.analysis.cli", "analyze", str(image), "--out", str(out), "--quiet",
           "--debug", "--overwrite"]
    if not figures:
        cmd.append("--no-figures")
    t = time.perf_counter()
    run = subprocess.run(cmd, capture_output=True, text=True, check=False)
    wall = time.perf_counter() - t
    if run.returncode != 0:
        raise SystemExit(f"tenfold analyze failed ({run.returncode}):\n{run.stderr[-2000:]}")
    timings = json.loads((out / "summary.json").read_text()).get("timings_s", {})
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
    ap.add_argument("--python", nargs="+", default=[], metavar="PYTHON",
                    help="other interpreters (other Tenfold trees) to time the same way, interleaved")
    ap.add_argument("--no-compile", action="store_true",
                    help="leave the trees' byte code alone (by default each is compiled first, as installing does)")
    args = ap.parse_args(argv)
    pythons = [sys.executable, *args.python]
    if not args.no_compile:
        for p in pythons:
            _compile(p)
    print(f"load average before: {' '.join(f'{v:.2f}' for v in os.getloadavg())} on {os.cpu_count()} CPUs")
    runs: dict[str, list] = {p: [] for p in pythons}
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        image, img = _image(tmp, args.size)
        for _ in range(max(args.repeat, 1)):
            for p in pythons:
                runs[p].append(_analyze(p, image, tmp / "out", not args.no_figures))
        diameter = json.loads((tmp / "out" / "summary.json").read_text())["automatic"].get("column_diameter_px")
    t_tp, n_tp = _trackpy_seconds(img, diameter or 7.0, args.repeat)
    tables = {}
    for i, p in enumerate(pythons):
        wall, timings, export_s = min(runs[p], key=lambda r: r[0])
        stages = {k: v for k, v in timings.items() if k != "total"}
        stages["export"] = export_s
        stages["start-up (interpreter, imports)"] = wall - sum(v for v in stages.values() if np.isfinite(v))
        stages["whole"] = wall
        tables[p] = stages
        print(f"#{i} {p}: tenfold analyze, whole {wall:.2f} s (fastest of {len(runs[p])}: "
              f"{', '.join(f'{r[0]:.2f}' for r in runs[p])}; median {np.median([r[0] for r in runs[p]]):.2f}); "
              f"ratio to trackpy.locate {wall / t_tp:.1f}")
    names = list(dict.fromkeys(k for t in tables.values() for k in t))
    width = max(len(k) for k in names)
    print(f"  {'stage (s)':<{width}}  " + "  ".join(f"{'#' + str(i):>8}" for i in range(len(pythons))))
    for k in names:
        print(f"  {k:<{width}}  " + "  ".join(f"{tables[p].get(k, float('nan')):8.3f}" for p in pythons))
    print(f"trackpy.locate (diameter {int(np.ceil(diameter or 7.0)) | 1} px, same image): {t_tp:.3f} s, "
          f"{n_tp} features")
    for i, p in enumerate(pythons[1:], start=1):  # this tree against the others, fastest and median runs
        mine, theirs = [r[0] for r in runs[pythons[0]]], [r[0] for r in runs[p]]
        print(f"whole analyze #0 / #{i}: fastest {min(mine) / min(theirs):.2f}, "
              f"median {np.median(mine) / np.median(theirs):.2f}")
    print(f"load average after: {' '.join(f'{v:.2f}' for v in os.getloadavg())}")


if __name__ == "__main__":
    main()
