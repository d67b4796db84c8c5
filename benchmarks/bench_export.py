"""Export against analysis time on a 4096 x 4096 decagonal image with about 50 000 columns.

Runs the pipeline once, then :func:`write_results` with and without figures, and prints each part (CSV, workbook,
figures) and the ratio export / analysis. Target: export (with figures) under 25 % of the analysis time.
Also times ``trackpy.locate`` on the same image, and prints the whole run (analysis + export) as a ratio to it
(target: at most 5 x).

Run: ``python benchmarks/bench_export.py [size] [n_columns]``
"""

from __future__ import annotations

import resource
import sys
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

from _bench_images import decagonal_image  # noqa: E402

from tenfold.analysis import export as _export  # noqa: E402
from tenfold.analysis.io import micrograph_from_array  # noqa: E402
from tenfold.analysis.pipeline import run_pipeline  # noqa: E402
from tenfold.analysis.refine import warm_up  # noqa: E402


def _timed(label, func, *args, **kwargs):
    t = time.perf_counter()
    out = func(*args, **kwargs)
    dt = time.perf_counter() - t
    print(f"  {label:<38s} {dt:7.2f} s")
    return out, dt


def main(size: int = 4096, n_columns: float = 50_000) -> None:
    t = time.perf_counter()
    img, ps, truth = decagonal_image(size, n_columns)
    print(f"image {size}x{size}, {len(truth.columns)} columns in the model, {ps:.4f} nm/px "
          f"(rendered in {time.perf_counter() - t:.1f} s)")
    warm_up()
    import trackpy as tp

    sigma_px = 0.06 / ps
    diameter = int(np.ceil(4.5 * sigma_px)) | 1
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        tp.locate(img[:256, :256].astype(np.uint16), diameter, engine="numba")
        t = time.perf_counter()
        f = tp.locate(img.astype(np.uint16), diameter, separation=diameter / 2, engine="numba")
        t_tp = time.perf_counter() - t
    print(f"trackpy.locate: {t_tp:.2f} s, {len(f)} features")

    mg = micrograph_from_array(img, pixel_size_nm=ps)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result, t_an = _timed("analysis (run_pipeline)", run_pipeline, mg)
    print(f"  {result.summary['n_columns']} columns, {result.summary['n_motifs']} motifs")
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        tables = _export._ordered_tables(result)
        t = time.perf_counter()
        for name, df in tables.items():
            _export._write_csv(df, tmp / f"{name}.csv")
        print(f"  {'CSV tables':<38s} {time.perf_counter() - t:7.2f} s")
        sheets = {name: (df, _export._units(name, df)) for name, df in tables.items()}
        _timed("workbook (all tables)", _export._write_workbook, sheets, tmp / "results.xlsx")
        _export._load_figure_modules()
        t_figs = 0.0
        for name, maker in _export.FIGURES.items():
            t = time.perf_counter()
            fig = maker(result)
            if fig is not None:
                _export._save_figure(fig, tmp / name)
            dt = time.perf_counter() - t
            t_figs += dt
            print(f"    figure {name:<30s} {dt:7.2f} s")
        print(f"  {'figures in all':<38s} {t_figs:7.2f} s")
        _, t_nofig = _timed("write_results(figures=False)", _export.write_results, result, tmp / "a", figures=False)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            _, t_all = _timed("write_results(figures=True)", _export.write_results, result, tmp / "b")
    print(f"export / analysis: {100 * t_all / t_an:.0f} % with figures, {100 * t_nofig / t_an:.0f} % without "
          "(target < 25 %)")
    print(f"analysis + export / trackpy.locate: {(t_an + t_all) / t_tp:.1f} x with figures, "
          f"{(t_an + t_nofig) / t_tp:.1f} x without (target <= 5 x)")
    print(f"peak RSS: {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f} MB")


if __name__ == "__main__":
    main(*(int(a) for a in sys.argv[1:3]))
