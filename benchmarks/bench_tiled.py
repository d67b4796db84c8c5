"""Tiled column finding on large images: wall time, peak memory (whole process tree) and agreement with untiled.

Each mode runs in its own process on the same uncompressed TIFF (memory-mapped in the tiled modes):

* ``untiled``   find_columns on the whole image (needs the memory for it: about 7 GB at 8192^2);
* ``tiled-1``   find_columns_tiled, serial;
* ``tiled-2``   find_columns_tiled on an embedded local cluster of 2 workers.

Prints seconds, peak memory (sum of the RSS of the process and its workers, sampled every 0.2 s), the number of
columns, and for the tiled modes how many columns match the untiled run within 1e-3 px.
Targets (issue 8): a 16384^2 tiled run under 4 GB peak; the same columns as untiled (compared at 8192^2).

Run: ``python benchmarks/bench_tiled.py --size 8192 [--modes untiled tiled-1 tiled-2] [--tile 2048]``
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))


def _peak_sampler(stop: threading.Event, out: list) -> None:
    import psutil

    me = psutil.Process()
    peak = 0
    while not stop.is_set():
        total = 0
        for p in [me, *me.children(recursive=True)]:
            try:
                total += p.memory_info().rss
            except psutil.Error:
                pass
        peak = max(peak, total)
        stop.wait(0.2)
    out.append(peak)


def _child(mode: str, image: str, tile: int, result: str) -> None:
    import warnings

    from tenfold.analysis.parallel import Execution, find_columns_tiled, read_micrograph_mapped

    stop, peak = threading.Event(), []
    th = threading.Thread(target=_peak_sampler, args=(stop, peak), daemon=True)
    th.start()
    mg = read_micrograph_mapped(image)
    t = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        if mode == "untiled":
            from tenfold.analysis.columns import find_columns

            cols, _ = find_columns(np.asarray(mg.data, dtype=np.float32), n_species=0)
        else:
            workers = int(mode.split("-")[1])
            cols, _ = find_columns_tiled(mg.data, tile_size=tile, n_species=0, execution=Execution(workers=workers))
    dt = time.perf_counter() - t
    stop.set()
    th.join()
    np.save(result, cols[["x_px", "y_px"]].to_numpy())
    print(json.dumps({"mode": mode, "seconds": dt, "peak_gb": peak[0] / 2**30, "n": len(cols)}))


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--size", type=int, default=8192)
    ap.add_argument("--tile", type=int, default=2048)
    ap.add_argument("--modes", nargs="+", default=["untiled", "tiled-1", "tiled-2"])
    ap.add_argument("--child", nargs=3, help=argparse.SUPPRESS)
    ap.add_argument("--keep", type=Path, help="folder to keep the image in between runs")
    args = ap.parse_args()
    if args.child:
        _child(args.child[0], args.child[1], args.tile, args.child[2])
        return
    import tifffile
    from scipy.spatial import cKDTree

    from _bench_images import decagonal_image

    folder = args.keep or Path(tempfile.mkdtemp())
    folder.mkdir(parents=True, exist_ok=True)
    image = folder / f"decagonal_{args.size}.tif"
    n_target = 50_000 * (args.size / 4096) ** 2
    if not image.exists():
        t = time.perf_counter()
        img, ps, truth = decagonal_image(args.size, n_target)
        tifffile.imwrite(image, img.astype(np.float32), imagej=True, resolution=(1 / ps, 1 / ps),
                         metadata={"unit": "nm"})
        del img
        print(f"wrote {image} ({image.stat().st_size / 2**30:.2f} GiB) in {time.perf_counter() - t:.0f} s")
    results = {}
    for mode in args.modes:
        out = folder / f"cols_{mode}.npy"
        r = subprocess.run([sys.executable, __file__, "--tile", str(args.tile), "--child", mode, str(image), str(out)],
                           capture_output=True, text=True)
        if r.returncode != 0:
            print(f"{mode}: failed\n{r.stderr[-2000:]}")
            continue
        info = json.loads(r.stdout.strip().splitlines()[-1])
        results[mode] = np.load(out)
        line = f"{mode:>8s}: {info['seconds']:7.1f} s, peak {info['peak_gb']:.2f} GB, {info['n']} columns"
        if mode != "untiled" and "untiled" in results:
            ref = results["untiled"]
            d, _ = cKDTree(ref).query(results[mode])
            d2, _ = cKDTree(results[mode]).query(ref)
            line += (f"; within 1e-3 px of untiled: {int((d < 1e-3).sum())} of {len(d)} "
                     f"({100 * (d < 1e-3).mean():.2f} %), untiled columns missing: {int((d2 > 1.0).sum())}, extra: "
                     f"{int((d > 1.0).sum())}")
        print(line, flush=True)
    if "tiled-1" in results and "tiled-2" in results:
        print("tiled-2 identical to tiled-1:", bool(np.array_equal(results["tiled-1"], results["tiled-2"])))


if __name__ == "__main__":
    main()
