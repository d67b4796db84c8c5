"""The ``tenfold`` command: a thin front over :mod:`tenfold.analysis.pipeline`.

Sub-commands
------------
``tenfold analyze IMAGE --out DIR``  find columns, motifs, ladders, tiling and Fourier spots; write tables,
                                     workbook, figures and summary.json to DIR.
``tenfold info IMAGE``               print the calibration and size the reader finds, and the automatic scale.
``tenfold samples``                  list the bundled synthetic micrographs (paths to try the tool on).

Errors print one line on stderr and exit with status 2 (bad input) or 1 (anything else); ``--debug`` shows the
traceback. Progress goes to stderr.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
import warnings
from pathlib import Path

from . import __version__
from ._errors import Cancelled, TenfoldInputError, TenfoldWarning

__all__ = ["main", "build_parser"]

_DESCRIPTION = (
    "Tenfold: locate atomic columns in HAADF-STEM / HRTEM micrographs of quasicrystals and approximants, group them "
    "into ring and pentagon cluster motifs, test inter-column and inter-cluster distances against golden-ratio "
    "(tau) ladders, classify the cluster tiling and check the Fourier transform for order and scan distortion."
)


def _positive(text: str) -> float:
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a positive number, got {text!r}") from None
    if not (v > 0 and v < float("inf")):
        raise argparse.ArgumentTypeError(f"expected a positive number, got {text!r}")
    return v


def _length(text: str) -> tuple[float, str]:
    """A length in nm (plain number or '0.28nm') or in pixels ('7px', for uncalibrated images)."""
    t = text.strip().lower()
    unit = "px" if t.endswith("px") else "nm"
    num = t[:-2] if t.endswith(("px", "nm")) else t
    try:
        v = float(num)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a length such as 0.28 (nm), 0.28nm or 7px, got {text!r}") from None
    if not (v > 0 and v < float("inf")):
        raise argparse.ArgumentTypeError(f"expected a positive length, got {text!r}")
    return v, unit


def _species(text: str) -> int | None:
    if text.lower() == "auto":
        return None
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected 'auto' or a whole number 0-8, got {text!r}") from None
    if not 0 <= v <= 8:
        raise argparse.ArgumentTypeError(f"expected 'auto' or a whole number 0-8, got {text!r}")
    return v


def _frames(text: str) -> tuple[int, int]:
    try:
        a, b = (int(t) for t in text.split(":"))
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected START:STOP (e.g. 0:10), got {text!r}") from None
    if not 0 <= a < b:
        raise argparse.ArgumentTypeError(f"expected START:STOP with 0 <= START < STOP, got {text!r}")
    return a, b


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="tenfold", description=_DESCRIPTION)
    p.add_argument("--version", action="version", version=f"tenfold {__version__}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")

    a = sub.add_parser(
        "analyze",
        help="analyse one micrograph and write the results folder",
        description=(
            "Find atomic columns (trackpy detection, then a vectorised 2-D Gaussian fit with per-column position "
            "uncertainty), classify them into species by integrated intensity, find ring and pentagon cluster "
            "motifs, fit golden-ratio distance ladders to column and cluster-centre pair distances, classify the "
            "cluster tiling and analyse the power spectrum. Writes columns.csv, motifs.csv, ladder.csv, "
            "pair_peaks.csv, tiles.csv, network.csv, spots.csv, results.xlsx, figures/ and summary.json into DIR. "
            "Every automatic choice is recorded in summary.json and can be overridden below."
        ),
    )
    a.add_argument("image", type=Path, help="micrograph: TIFF (ImageJ/OME calibration), MRC, PNG/JPEG, or vendor "
                   "formats with the 'vendor' extra")
    a.add_argument("--out", type=Path, required=True, metavar="DIR", help="results folder (must not exist or be empty)")
    a.add_argument("--overwrite", action="store_true", help="replace an existing results folder")
    cal = a.add_argument_group("calibration and image")
    cal.add_argument("--pixel-size", type=_positive, metavar="NM", help="pixel size in nm; overrides the file")
    cal.add_argument("--frame", type=int, metavar="K", help="for a stack: analyse frame K (0-based)")
    cal.add_argument("--frames", type=_frames, metavar="A:B", help="for a stack: analyse the mean of frames A..B-1")
    cal.add_argument("--region", action="append", metavar="X0,Y0,X1,Y1",
                     help="rectangle to analyse (repeatable: each is a labelled region); corners in --region-unit")
    cal.add_argument("--region-unit", choices=("nm", "px"), default="nm", help="unit of --region corners (default nm)")
    col = a.add_argument_group("atomic columns")
    col.add_argument("--dark-columns", action="store_true",
                     help="columns darker than the background (HRTEM-like contrast); default: bright (HAADF)")
    col.add_argument("--column-diameter", type=_length, metavar="LEN",
                     help="column diameter (about 4.5 x the Gaussian sigma), in nm or with a px suffix (e.g. 7px) for "
                     "uncalibrated images; default: from the image")
    col.add_argument("--column-spacing", type=_length, metavar="LEN",
                     help="typical nearest-column spacing, nm or px suffix; default: from the image")
    col.add_argument("--min-intensity", type=_positive, metavar="I", dest="min_mass",
                     help="drop columns whose integrated intensity (image units x px^2) is below I; default: none, "
                     "the significance cut decides")
    col.add_argument("--flatten", action="store_true", help="subtract a large-scale background (uneven illumination)")
    col.add_argument("--species", type=_species, default=None, metavar="N|auto",
                     help="number of column species by intensity ('auto' = by BIC, 0 = skip); default auto")
    mot = a.add_argument_group("motifs, ladders and tiling")
    mot.add_argument("--ring-order", type=int, default=10, choices=(5, 6, 8, 10, 12),
                     help="columns per ring motif (default 10)")
    mot.add_argument("--ring-radius", type=_length, metavar="LEN",
                     help="ring radius, nm or px suffix; default: from the pair distances")
    mot.add_argument("--radius-tolerance", type=float, default=0.12, metavar="FRAC",
                     help="relative tolerance on the ring radius (default 0.12)")
    mot.add_argument("--no-pentagons", action="store_true", help="skip the pentagon motif search")
    mot.add_argument("--ladder-range", type=_length, metavar="LEN",
                     help="largest pair distance for the ladder fit, nm or px suffix; default: automatic")
    mot.add_argument("--ladder-base", type=_length, metavar="LEN",
                     help="ladder base distance d0, nm or px suffix; default: the strongest short-range peak")
    mot.add_argument("--half-step", action="store_true", help="also test the half-step ladder tau^(n/2)")
    mot.add_argument("--tiling-edge", type=_length, metavar="LEN",
                     help="cluster-network edge length, nm or px suffix; default: automatic")
    a.add_argument("--no-fourier", action="store_true", help="skip the power-spectrum analysis")
    a.add_argument("--correct-distortion", action="store_true",
                   help="apply the scan-distortion correction measured from the Fourier spots to the column "
                        "positions before motifs, ladders, tiling and phasons (raw positions kept in columns.csv)")
    a.add_argument("--no-phason", action="store_true", help="skip the perpendicular-space (phason) analysis")
    a.add_argument("--fourier-window", choices=("hann", "periodic_smooth"), default="hann",
                   help="power-spectrum window: Hann (default) or the periodic-plus-smooth decomposition")
    a.add_argument("--no-figures", action="store_true", help="do not draw PNG/SVG figures")
    a.add_argument("--seed", type=int, default=0, help="seed for bootstraps and mixture fits (default 0)")
    a.add_argument("--quiet", action="store_true", help="no progress messages")
    a.add_argument("--debug", action="store_true", help="show the full traceback on failure")

    i = sub.add_parser("info", help="show calibration, size and automatic scale of a micrograph",
                       description="Read a micrograph and print its size, pixel size and where the pixel size came "
                       "from, and the automatic column spacing and width estimate (JSON on stdout).")
    i.add_argument("image", type=Path)
    i.add_argument("--pixel-size", type=_positive, metavar="NM", help="pixel size in nm; overrides the file")
    i.add_argument("--frame", type=int, metavar="K")
    i.add_argument("--frames", type=_frames, metavar="A:B")
    i.add_argument("--dark-columns", action="store_true")
    i.add_argument("--debug", action="store_true")

    sub.add_parser("samples", help="list the bundled synthetic sample micrographs",
                   description="Print the paths of the synthetic decagonal micrographs shipped with Tenfold, with "
                   "their ground-truth tables beside them.")
    return p


class _Progress:
    def __init__(self, quiet: bool) -> None:
        self.quiet = quiet
        self.t0 = time.perf_counter()
        self.last = ""

    def __call__(self, fraction: float, message: str) -> None:
        if self.quiet or message == self.last:
            return
        self.last = message
        print(f"[{time.perf_counter() - self.t0:6.1f} s] {100 * fraction:3.0f} %  {message}", file=sys.stderr, flush=True)


def _params(args) -> "object":
    from .pipeline import Parameters

    lengths = {}
    for base, value in (("column_diameter", args.column_diameter), ("column_spacing", args.column_spacing),
                        ("ring_radius", args.ring_radius), ("ladder_r_max", args.ladder_range),
                        ("d0", args.ladder_base), ("tiling_edge", args.tiling_edge)):
        if value is not None:
            lengths[f"{base}_{value[1]}"] = value[0]
    return Parameters(
        pixel_size_nm=args.pixel_size,
        dark_columns=args.dark_columns,
        n_species=args.species,
        flatten=args.flatten,
        min_mass=args.min_mass,
        ring_order=args.ring_order,
        radius_tolerance=args.radius_tolerance,
        pentagons=not args.no_pentagons,
        half_step=args.half_step,
        fourier=not args.no_fourier,
        correct_distortion=args.correct_distortion,
        phason=not args.no_phason,
        fourier_window=args.fourier_window,
        rng=args.seed,
        **lengths,
    )


def _check_out(out: Path, overwrite: bool) -> None:
    if out.exists() and not out.is_dir():
        raise TenfoldInputError(f"--out {out}: exists and is not a folder; choose another path")
    if out.is_dir() and any(out.iterdir()) and not overwrite:
        raise TenfoldInputError(f"--out {out}: folder exists and is not empty; choose another folder or add --overwrite")


def _analyze(args) -> int:
    from .export import write_results
    from .io import read_micrograph
    from .pipeline import run_pipeline

    _check_out(args.out, args.overwrite)  # before any work: fail in a second, not after a minute
    params = _params(args).validate()
    prog = _Progress(args.quiet)
    prog(0.0, f"reading {args.image}")
    mg = read_micrograph(args.image, pixel_size_nm=args.pixel_size, frame=args.frame, frame_range=args.frames)
    regions = None
    if args.region:
        from .region import parse_region

        ps = mg.meta.pixel_size_nm
        regions = []
        for k, text in enumerate(args.region, start=1):
            reg = parse_region(text, pixel_size_nm=ps, unit=args.region_unit)
            reg.label = k
            regions.append(reg)
    result = run_pipeline(mg, params, regions=regions, progress=prog)
    prog(1.0, f"writing {args.out}")
    write_results(result, args.out, overwrite=args.overwrite, figures=not args.no_figures)
    s = result.summary
    cal = f"{s['pixel_size_nm']} nm/px ({s['calibration_source']})" if s["calibrated"] else "UNCALIBRATED (px only)"
    m = result.tables["motifs"]
    n_rings = int(m["kind"].str.startswith("ring").sum()) if len(m) else 0
    ratio = (s.get("tiling") or {}).get("thick_thin_ratio")
    print(f"{args.image}: {s['n_columns']} columns, {n_rings} ring motifs, "
          f"{int((m['kind'] == 'pentagon').sum()) if len(m) else 0} pentagons, thick/thin = "
          f"{'n/a' if ratio is None else f'{ratio:.3f}'}; calibration {cal}; results in {args.out}")
    for note in s.get("notes", []):
        print(f"note: {note}", file=sys.stderr)
    return 0


def _info(args) -> int:
    from .io import read_micrograph
    from .pipeline import estimate_defaults

    mg = read_micrograph(args.image, pixel_size_nm=args.pixel_size, frame=args.frame, frame_range=args.frames)
    out = mg.meta.to_dict()
    out["automatic_scale"] = estimate_defaults(mg, dark_columns=args.dark_columns)
    print(json.dumps(out, indent=2, default=str))
    return 0


def _samples(args) -> int:
    from importlib.resources import files

    folder = files("tenfold.sample_images")
    paths = sorted(str(p) for p in folder.iterdir() if str(p).endswith(".tif"))
    if not paths:
        raise TenfoldInputError("no bundled samples found; rebuild them with: python -m tenfold.analysis.synthetic --bundle sample_images")
    print("\n".join(paths))
    return 0


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 2
    debug = getattr(args, "debug", False)
    handler = {"analyze": _analyze, "info": _info, "samples": _samples}[args.command]

    def _show(message, category, filename, lineno, file=None, line=None):
        print(f"warning: {message}", file=sys.stderr)

    warnings.showwarning = _show if not debug else warnings.showwarning
    warnings.simplefilter("always", TenfoldWarning)
    try:
        return handler(args)
    except TenfoldInputError as exc:
        if debug:
            raise
        print(f"tenfold: error: {exc}", file=sys.stderr)
        return 2
    except Cancelled as exc:
        print(f"tenfold: {exc}", file=sys.stderr)
        return 130
    except KeyboardInterrupt:
        print("tenfold: interrupted; no results written", file=sys.stderr)
        return 130
    except BrokenPipeError:  # output piped into e.g. `head`, which stopped reading: not an error
        return 0
    except Exception as exc:  # the one-line rule: no traceback for users unless they ask
        if debug:
            raise
        print(f"tenfold: error: {type(exc).__name__}: {exc} (run again with --debug for the traceback)", file=sys.stderr)
        return 1


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
