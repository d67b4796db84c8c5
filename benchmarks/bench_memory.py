"""Peak memory and time of one analysis (run_pipeline) against the image size, and on flat (padded) images.

Target (analysis/_sanitize.py, BYTES_PER_PIXEL / BYTES_PER_COLUMN): peak memory under 40 bytes per pixel plus
2 kB per column; a flat area costs no more than the same area of image; time grows with the pixels, not with
the flat share.

Each case runs in a fresh process: the baseline is the resident peak after the imports, the numba warm-up and a
small analysis; the figure is the growth of the resident peak (ru_maxrss) during the measured run, and
tracemalloc's peak of the numpy allocations beside it.

    python benchmarks/bench_memory.py            # 768^2, 1536^2, 2304^2 tiles of a bundled sample; flat cases
    python benchmarks/bench_memory.py --quick    # 768^2 and the flat cases only
"""

from __future__ import annotations

import json
import subprocess
import sys

def _child(tiles: int, flat: str) -> dict:
    import resource
    import time
    import tracemalloc
    import warnings
    from pathlib import Path

    import numpy as np

    from tenfold.analysis._errors import TenfoldWarning
    from tenfold.analysis.io import micrograph_from_array, read_micrograph
    from tenfold.analysis.pipeline import Parameters, run_pipeline

    sample = Path(__file__).resolve().parents[1] / "sample_images" / "decagonal_haadf_vacancies.tif"
    base = read_micrograph(sample)
    warnings.simplefilter("ignore", TenfoldWarning)
    run_pipeline(micrograph_from_array(base.data[:128, :128], pixel_size_nm=0.04), Parameters(fourier=False))
    img = np.tile(base.data, (tiles, tiles))
    if flat == "median":
        img[img.shape[0] // 8:] = np.median(img)
    elif flat == "zero":
        img[img.shape[0] // 8:] = 0
    mg = micrograph_from_array(img, pixel_size_nm=0.04, name="bench")
    before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    tracemalloc.start()
    t0 = time.perf_counter()
    res = run_pipeline(mg, Parameters())
    seconds = time.perf_counter() - t0
    _, traced = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    after = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    n = int(res.summary["n_columns"])
    return {"shape": list(img.shape), "flat": flat, "columns": n, "seconds": round(seconds, 1),
            "rss_growth_mb": round((after - before) / 2**20, 1), "traced_peak_mb": round(traced / 2**20, 1),
            "bytes_per_pixel": round(max(after - before, traced) / img.size, 1),
            "bytes_per_pixel_after_2kB_per_column": round((max(after - before, traced) - 2048 * n) / img.size, 1)}


def main(argv: list[str]) -> None:
    if argv and argv[0] == "--child":
        print(json.dumps(_child(int(argv[1]), argv[2])))
        return
    quick = "--quick" in argv
    cases = [(1, "none"), (1, "zero"), (1, "median")] + ([] if quick else [(2, "none"), (3, "none"), (3, "median")])
    print(f"{'shape':>12} {'flat':>7} {'columns':>8} {'s':>6} {'RSS+ MB':>8} {'traced MB':>9} {'B/px':>6} "
          f"{'B/px - 2kB/col':>14}")
    for tiles, flat in cases:
        out = subprocess.run([sys.executable, __file__, "--child", str(tiles), flat], capture_output=True, text=True)
        if out.returncode:
            print(f"{tiles}x tile, {flat}: failed\n{out.stderr[-2000:]}")
            continue
        r = json.loads(out.stdout.strip().splitlines()[-1])
        print(f"{'x'.join(map(str, r['shape'])):>12} {r['flat']:>7} {r['columns']:>8} {r['seconds']:>6} "
              f"{r['rss_growth_mb']:>8} {r['traced_peak_mb']:>9} {r['bytes_per_pixel']:>6} "
              f"{r['bytes_per_pixel_after_2kB_per_column']:>14}")


if __name__ == "__main__":
    main(sys.argv[1:])
