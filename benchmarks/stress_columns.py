"""Stress matrix of the column finder: recall, precision, error / Cramer-Rao bound, honesty of pos_err, species.

Every cell is a synthetic image from ``synthetic.stress_sample`` (structures and conditions in
``synthetic.STRESS_CELLS``; ``--full`` adds a seeded random draw, ``synthetic.stress_draw``). Per cell it runs
``find_columns`` with its defaults (``pixel_size_nm`` given, ``dark_columns`` for dark-contrast cells because it is
the imaging mode, no other hint) and ``trackpy.locate`` on the same image for the time ratio, and scores the table
with ``synthetic.score_columns`` against the truth and the exact pixel Fisher bound (``synthetic.crlb_columns_px``).

The six multislice cells (``ms_{phonon,static}_{low,moderate,high}``) tile the cached abTEM simulation of
``benchmarks/data/multislice_decagonal.npz`` (``benchmarks/simulate_multislice.py``; ``synthetic.multislice_sample``)
and are scored the same way, against the atom positions (static) or the noise-free peaks (frozen phonons), with a
neighbours-known Fisher bound, leaving out columns within 3 widths + 1 px of the border; see docs/columns.md,
"Multislice cells". ``--quick`` and ``--full`` include them; ``--multislice`` runs only them.

Targets (issue 10), marked PASS / FAIL / - (not applicable) per cell:

* ``rp``: recall and precision >= 0.995 where the dimmest species' peak SNR >= 5 and spacing >= 3.3 sigma,
  >= 0.98 where 3 <= SNR < 5;
* ``rms``: RMS error / bound <= 1.3 in the worst species and for crowded columns (and <= 1.15 as the median over
  cells, printed in the summary);
* ``bias``: radial bias of ring columns toward their cluster centre under 0.2 bound;
* ``err``: actual / reported pos_err within 0.85-1.2 for every species;
* ``species``: where the species' measured intensities are more than 4 spreads apart (or there is one species):
  the number of classes right and agreement >= 0.99.

Run (2-core machine; ``nice -n 10`` when others share it)::

    python benchmarks/stress_columns.py --quick                 # ~26 cells, a few minutes
    python benchmarks/stress_columns.py --cell dec_broad_2048   # one named cell (repeat --cell for more)
    python benchmarks/stress_columns.py --full --n-random 100   # quick cells + a seeded random draw
    python benchmarks/stress_columns.py --list                  # the named cells and their conditions
    python benchmarks/stress_columns.py --multislice            # the six multislice cells, ~1 min

Writes ``stress_<set>.csv``, ``stress_<set>.md`` and ``stress_<set>.png`` in ``--out`` (default
benchmarks/results/).
"""

from __future__ import annotations

import argparse
import functools
import math
import sys
import time
import warnings
import zlib
from dataclasses import asdict
from pathlib import Path

import numpy as np
import pandas as pd

from tenfold.analysis import synthetic as S
from tenfold.analysis.columns import find_columns

RESULTS = Path(__file__).resolve().parent / "results"
RP_STRICT, RP_LOOSE = 0.995, 0.98
RMS_MEDIAN, RMS_WORST = 1.15, 1.3
BIAS_MAX = 0.2
ERR_RANGE = (0.85, 1.2)
SPECIES_MIN, SPECIES_SEP = 0.99, 4.0


def cell_seed(name: str) -> int:
    """Stable seed of a named cell (CRC-32 of its name)."""
    return zlib.crc32(name.encode())


def build_cell(name: str, cond: S.StressCondition | None = None):
    """Image, truth (with the bound ``crlb_px`` per column) and parameters of a named cell.

    The bound is computed on the specimen positions without row jitter (the jitter is unknown to a finder too).
    """
    cond = S.STRESS_CELLS[name] if cond is None else cond
    img, truth, params = S.stress_sample(cond, rng=cell_seed(name))
    probe = S.stress_probe(cond.probe, tail_fraction=cond.tail_fraction)
    bound = S.crlb_columns_px(truth["x_px"], truth["y_px"], truth["counts"], shape=img.shape,
                              sigma_px=params["sigma_px"], background=S.stress_background(cond, params),
                              probe=probe, dark_columns=cond.dark)
    truth = pd.concat([truth, bound], axis=1)
    return img, truth, params


def _trackpy_time(img, sigma_px, spacing_px) -> float:
    import trackpy as tp

    diameter = int(math.ceil(4.5 * sigma_px)) | 1
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t = time.perf_counter()
        tp.locate(img, diameter, separation=max(1.0, 0.5 * spacing_px), engine="numba")
        return time.perf_counter() - t


def _verdicts(row: dict) -> dict:
    def pf(ok):
        return "PASS" if ok else "FAIL"

    out = {}
    snr, sep = row["snr_dim"], row["spacing_over_sigma"]
    if sep >= 3.3 and snr >= 3:
        need = RP_STRICT if snr >= 5 else RP_LOOSE
        out["rp"] = pf(row["recall"] >= need and row["precision"] >= need)
    else:
        out["rp"] = "-"
    out["rms"] = "-" if not np.isfinite(row["rms_bound_worst"]) else pf(row["rms_bound_worst"] <= RMS_WORST)
    out["bias"] = "-" if not np.isfinite(row["radial_bias_worst"]) else pf(abs(row["radial_bias_worst"]) < BIAS_MAX)
    if np.isfinite(row["act_rep_min"]):
        out["err"] = pf(ERR_RANGE[0] <= row["act_rep_min"] and row["act_rep_max"] <= ERR_RANGE[1])
    else:
        out["err"] = "-"
    one = row["n_species_true"] == 1
    if one or (np.isfinite(row["species_separation"]) and row["species_separation"] > SPECIES_SEP):
        ok = row["n_species_found"] == row["n_species_true"] and (one or row["species_agreement"] >= SPECIES_MIN)
        out["species"] = pf(ok)
    else:
        out["species"] = "-"
    return out


def run_cell(name: str, cond: S.StressCondition | None = None, *, trackpy: bool = True) -> dict:
    """Build, find, score one cell; a flat row for the table."""
    cond = S.STRESS_CELLS[name] if cond is None else cond
    t0 = time.perf_counter()
    img, truth, params = build_cell(name, cond)
    t_build = time.perf_counter() - t0
    row = {"cell": name, "structure": cond.structure, "size_px": cond.size_px, "n_true": len(truth),
           "sigma_px": params["sigma_px"], "spacing_over_sigma": params["spacing_over_sigma"],
           "snr_dim": params["snr_dim"], "dim_ratio": cond.dim_ratio, "peak_counts": cond.peak_counts,
           "options": _options(cond), "build_s": t_build}
    return _find_and_score(row, img, truth, params["pixel_size_nm"], params["closest_spacing_px"],
                           params["sigma_px"], dark=cond.dark, trackpy=trackpy)


def _inside(table: pd.DataFrame, shape, margin_px: float) -> np.ndarray:
    x, y = table["x_px"].to_numpy(float), table["y_px"].to_numpy(float)
    return ((x >= margin_px) & (x <= shape[1] - 1 - margin_px) & (y >= margin_px) & (y <= shape[0] - 1 - margin_px))


def _find_and_score(row, img, truth, pixel_size_nm, closest_px, sigma_px, *, dark, trackpy,
                    margin_px: float = 0.0) -> dict:
    """``find_columns`` with its defaults, scored against the truth; ``trackpy.locate`` timed on the same image.

    With ``margin_px``, true and found columns closer than that to the border are left out of the score.
    """
    error = ""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        t = time.perf_counter()
        try:
            found, info = find_columns(img, pixel_size_nm=pixel_size_nm, dark_columns=dark)
        except Exception as exc:  # one bad cell never kills the matrix
            found, info = pd.DataFrame({"x_px": [], "y_px": []}), {}
            error = f"{type(exc).__name__}: {exc}"
        t_find = time.perf_counter() - t
    row["find_s"] = t_find
    row["n_warnings"] = len(caught)
    row["n_notes"] = len(info.get("notes", [])) if isinstance(info, dict) else 0
    row["error"] = error
    if margin_px > 0:
        truth = truth[_inside(truth, img.shape, margin_px)].reset_index(drop=True)
        if len(found):
            found = found[_inside(found, img.shape, margin_px)].reset_index(drop=True)
        row["n_true"] = len(truth)
    score = S.score_columns(found, truth, match_radius_px=0.5 * closest_px)
    for k, v in score.items():
        if isinstance(v, dict):
            row[k] = " ".join(f"{s}:{x:.2f}" for s, x in v.items())
        else:
            row[k] = v
    if trackpy:
        row["trackpy_s"] = _trackpy_time(img, sigma_px, closest_px)
        row["time_ratio"] = t_find / row["trackpy_s"]
    else:
        row["trackpy_s"] = row["time_ratio"] = float("nan")
    row.update(_verdicts(row))
    return row


MULTISLICE_FILE = Path(__file__).resolve().parent / "data" / "multislice_decagonal.npz"
#: Multislice cells (benchmarks/simulate_multislice.py): frozen-phonon and static runs at the three doses of
#: ``synthetic.MULTISLICE_DOSES``, tiled on a 768 px field of 0.015 nm px (origin off the cell corner).
MS_SIZE_PX, MS_PIXEL_NM, MS_ORIGIN_NM = 768, 0.015, (0.0137, 0.0291)
MULTISLICE_CELLS = {f"ms_{run}_{dose}": (run, dose) for run in ("phonon", "static") for dose in S.MULTISLICE_DOSES}


@functools.lru_cache(maxsize=1)
def _ms_cell():
    return S.load_multislice_cell(MULTISLICE_FILE)


def build_multislice_cell(name: str):
    """Image, truth (with ``crlb_px``) and parameters of a multislice cell."""
    run, dose = MULTISLICE_CELLS[name]
    return S.multislice_sample(_ms_cell(), size_px=MS_SIZE_PX, pixel_size_nm=MS_PIXEL_NM,
                               dose_e_per_A2=S.MULTISLICE_DOSES[dose], run=run, origin_nm=MS_ORIGIN_NM,
                               rng=cell_seed(name))


def run_multislice_cell(name: str, *, trackpy: bool = True) -> dict:
    """Build, find, score one multislice cell; a flat row for the table (same fields as :func:`run_cell`)."""
    t0 = time.perf_counter()
    img, truth, params = build_multislice_cell(name)
    sigma_px = params["sigma_nm"] / MS_PIXEL_NM
    row = {"cell": name, "structure": "multislice_decagonal", "size_px": MS_SIZE_PX, "n_true": len(truth),
           "sigma_px": sigma_px, "spacing_over_sigma": params["closest_spacing_px"] / sigma_px,
           "snr_dim": params["snr_dim"], "dim_ratio": float("nan"),
           "peak_counts": max(params["peaks_by_species"].values()),
           "options": f"{MULTISLICE_CELLS[name][0]} {params['dose_e_per_A2']:.0e} e/A2",
           "build_s": time.perf_counter() - t0}
    offset = np.hypot(truth["peak_dx_px"], truth["peak_dy_px"]) * MS_PIXEL_NM * 1e3
    row["peak_offset_pm_max"] = float(offset.max())
    row["peak_offset_bound_max"] = float(np.max(offset / (truth["crlb_px"] * MS_PIXEL_NM * 1e3)))
    # the field is a window into an infinite crystal: columns within 3 sigma + 1 px of the border (as the Gaussian
    # cells leave empty) are left out of the score on both sides
    margin = 3.0 * sigma_px + 1.0
    return _find_and_score(row, img, truth, params["pixel_size_nm"], params["closest_spacing_px"], sigma_px,
                           dark=False, trackpy=trackpy, margin_px=margin)


def _options(cond: S.StressCondition) -> str:
    base = S.StressCondition()
    keys = ("gradient", "shear", "row_jitter_px", "dark", "rescale", "probe")
    opts = [f"{k}={getattr(cond, k)}" for k in keys if getattr(cond, k) != getattr(base, k)]
    return " ".join(opts) or "-"


def _fmt(v, nd=3):
    if isinstance(v, (float, np.floating)):
        return "nan" if not np.isfinite(v) else f"{v:.{nd}f}"
    return str(v)


TABLE = [  # (column, header, decimals)
    ("cell", "cell", 0), ("n_true", "N", 0), ("spacing_over_sigma", "d/s", 2), ("sigma_px", "s px", 2),
    ("snr_dim", "SNR", 1), ("options", "options", 0), ("recall", "recall", 4), ("precision", "prec", 4),
    ("rms_bound_median", "rms/b med", 2), ("rms_bound_crowded", "rms/b crowd", 2),
    ("rms_bound_worst", "rms/b worst", 2), ("radial_bias_worst", "bias/b", 2), ("actual_over_reported", "act/rep", 0),
    ("n_species_found", "sp found", 0), ("n_species_true", "sp true", 0), ("species_agreement", "sp agree", 3),
    ("species_separation", "sp sep", 1), ("time_ratio", "t/tp", 1),
    ("rp", "rp", 0), ("rms", "rms", 0), ("bias", "bias", 0), ("err", "err", 0), ("species", "species", 0),
]


def markdown(df: pd.DataFrame) -> str:
    head = "| " + " | ".join(h for _, h, _ in TABLE) + " |"
    lines = [head, "|" + " --- |" * len(TABLE)]
    for _, r in df.iterrows():
        lines.append("| " + " | ".join(_fmt(r[c], nd) if nd else str(r[c]) for c, _, nd in TABLE) + " |")
    return "\n".join(lines)


def summary(df: pd.DataFrame) -> str:
    med = float(np.nanmedian(df["rms_bound_median"])) if len(df) else float("nan")
    worst = float(np.nanmax(df["rms_bound_worst"])) if df["rms_bound_worst"].notna().any() else float("nan")
    lines = [f"cells: {len(df)}; RMS/bound median over cells {med:.2f} (target <= {RMS_MEDIAN}: "
             f"{'PASS' if med <= RMS_MEDIAN else 'FAIL'}), worst cell {worst:.2f} (target <= {RMS_WORST}: "
             f"{'PASS' if worst <= RMS_WORST else 'FAIL'})"]
    for t in ("rp", "rms", "bias", "err", "species"):
        v = df[t].value_counts()
        lines.append(f"{t}: PASS {v.get('PASS', 0)}, FAIL {v.get('FAIL', 0)}, n/a {v.get('-', 0)}")
    ratio = df["time_ratio"].dropna()
    if len(ratio):
        lines.append(f"time ratio find_columns / trackpy.locate: median {ratio.median():.1f}, max {ratio.max():.1f}")
    errs = df.loc[df["error"] != "", ["cell", "error"]]
    for _, r in errs.iterrows():
        lines.append(f"error in {r['cell']}: {r['error']}")
    return "\n".join(lines)


def figure(df: pd.DataFrame, path: Path) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(1, 3, figsize=(15, 4.5))
    x = np.arange(len(df))
    ax[0].bar(x - 0.2, df["recall"], 0.4, label="recall")
    ax[0].bar(x + 0.2, df["precision"], 0.4, label="precision")
    ax[0].axhline(RP_STRICT, color="k", lw=0.8, ls="--")
    ax[0].set_ylim(max(0.0, min(0.9, float(np.nanmin(df[["recall", "precision"]].to_numpy())) - 0.02)), 1.005)
    ax[0].set_title("recall / precision (dashed: 0.995)")
    ax[1].bar(x - 0.2, df["rms_bound_median"], 0.4, label="median over species")
    ax[1].bar(x + 0.2, df["rms_bound_worst"], 0.4, label="worst (species, crowded)")
    ax[1].axhline(RMS_WORST, color="k", lw=0.8, ls="--")
    ax[1].axhline(1.0, color="grey", lw=0.8)
    ax[1].set_yscale("log")
    ax[1].set_title("RMS error / Cramer-Rao bound (dashed: 1.3)")
    ax[2].bar(x - 0.2, df["act_rep_min"], 0.4, label="min over species")
    ax[2].bar(x + 0.2, df["act_rep_max"], 0.4, label="max over species")
    for v in ERR_RANGE:
        ax[2].axhline(v, color="k", lw=0.8, ls="--")
    ax[2].set_yscale("log")
    ax[2].set_title("actual / reported pos_err (dashed: 0.85, 1.2)")
    for a in ax:
        a.set_xticks(x)
        a.set_xticklabels(df["cell"], rotation=90, fontsize=7)
        a.legend(fontsize=7)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    g = p.add_mutually_exclusive_group()
    g.add_argument("--quick", action="store_true", help="the named cells (default)")
    g.add_argument("--full", action="store_true", help="the named cells plus a seeded random draw")
    g.add_argument("--cell", action="append", metavar="NAME", help="run one named cell (repeatable)")
    g.add_argument("--list", action="store_true", help="list the named cells")
    g.add_argument("--multislice", action="store_true", help="only the multislice cells")
    p.add_argument("--n-random", type=int, default=100, help="random cells for --full (default 100)")
    p.add_argument("--seed", type=int, default=0, help="seed of the random draw (default 0)")
    p.add_argument("--out", type=Path, default=RESULTS, help="output folder (default benchmarks/results/)")
    p.add_argument("--no-trackpy", action="store_true", help="skip the trackpy.locate timing")
    args = p.parse_args(argv)
    if args.list:
        for name, cond in S.STRESS_CELLS.items():
            print(name, {k: v for k, v in asdict(cond).items() if v != getattr(S.StressCondition(), k)})
        for name, (run, dose) in MULTISLICE_CELLS.items():
            print(name, {"multislice": run, "dose_e_per_A2": S.MULTISLICE_DOSES[dose], "size_px": MS_SIZE_PX,
                         "pixel_size_nm": MS_PIXEL_NM})
        return 0
    ms = dict(MULTISLICE_CELLS)
    if args.cell:
        bad = [c for c in args.cell if c not in S.STRESS_CELLS and c not in ms]
        if bad:
            p.error(f"--cell {bad[0]!r} is not a named cell; see --list")
        cells, label = {c: S.STRESS_CELLS.get(c) for c in args.cell}, "cells"
    elif args.multislice:
        cells, label = dict.fromkeys(ms), "multislice"
    elif args.full:
        cells, label = {**S.STRESS_CELLS, **dict.fromkeys(ms), **S.stress_draw(args.n_random, rng=args.seed)}, "full"
    else:
        cells, label = {**S.STRESS_CELLS, **dict.fromkeys(ms)}, "quick"
    # warm-up: one small cell through every compiled path (numba caches, trackpy's engine), not timed
    run_cell("warm-up", S.StressCondition(size_px=256), trackpy=not args.no_trackpy)
    rows = []
    t0 = time.perf_counter()
    for name, cond in cells.items():
        if name in ms:
            r = run_multislice_cell(name, trackpy=not args.no_trackpy)
        else:
            r = run_cell(name, cond, trackpy=not args.no_trackpy)
        rows.append(r)
        print(f"{name:18s} N={r['n_true']:6d} d/s={r['spacing_over_sigma']:.2f} SNR={r['snr_dim']:6.1f} "
              f"recall={r['recall']:.4f} prec={r['precision']:.4f} rms/b={_fmt(r['rms_bound_median'], 2)}/"
              f"{_fmt(r['rms_bound_worst'], 2)} bias={_fmt(r['radial_bias_worst'], 2)} "
              f"act/rep=[{r['actual_over_reported']}] sp={r['n_species_found']}/{r['n_species_true']} "
              f"agree={_fmt(r['species_agreement'])} t/tp={_fmt(r['time_ratio'], 1)} "
              f"[rp {r['rp']} rms {r['rms']} bias {r['bias']} err {r['err']} species {r['species']}]"
              f"{' ERROR ' + r['error'] if r['error'] else ''}", flush=True)
    df = pd.DataFrame(rows)
    print(summary(df))
    print(f"total {time.perf_counter() - t0:.0f} s")
    args.out.mkdir(parents=True, exist_ok=True)
    df.to_csv(args.out / f"stress_{label}.csv", index=False, float_format="%.5g")
    (args.out / f"stress_{label}.md").write_text(markdown(df) + "\n\n" + summary(df).replace("\n", "  \n") + "\n")
    figure(df, args.out / f"stress_{label}.png")
    print(f"wrote {args.out / f'stress_{label}.csv'}, .md, .png")
    return 0


if __name__ == "__main__":
    sys.exit(main())
