"""The ``tenfold`` command: a thin front over :mod:`tenfold.analysis.pipeline`.

Sub-commands
------------
``tenfold analyze IMAGE --out DIR``  find columns, motifs, ladders, tiling and Fourier spots; write tables,
                                     workbook, figures and summary.json to DIR.
``tenfold batch INPUTS --out DIR``   the same on many images, one sub-folder each, plus DIR/comparison.csv.
``tenfold info IMAGE``               print the calibration and size the reader finds, and the automatic scale.
``tenfold samples``                  list the bundled synthetic micrographs (paths to try the tool on).

Errors print one line on stderr and exit with status 2 (bad input) or 1 (anything else); ``--debug`` shows the
traceback. Progress goes to stderr.
"""

from __future__ import annotations

import argparse
import json
import re
import sys
import time
import warnings
from contextlib import contextmanager
from pathlib import Path

from . import __version__, _stop
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


def _pixel_size(text: str) -> float:
    from .io import PLAUSIBLE_PIXEL_NM

    v = _positive(text)
    lo, hi = PLAUSIBLE_PIXEL_NM
    if not lo <= v <= hi:
        raise argparse.ArgumentTypeError(f"{text} nm per pixel is outside {lo:g} - {hi:g} nm, the range of "
                                         "atomic-resolution images; give the pixel size in nm (e.g. 0.015)")
    return v


#: Python names in messages -> the option a command-line user typed
_FLAGS = {
    "pixel_size_nm": "--pixel-size", "frame_range": "--frames", "n_species": "--species",
    "ring_order": "--ring-order", "radius_tolerance": "--radius-tolerance", "min_mass": "--min-intensity",
    "dark_columns": "--dark-columns", "rng": "--seed", "overwrite=True": "--overwrite", "out_dir": "--out",
    **{f"{base}_{unit}": flag for base, flag in (
        ("column_diameter", "--column-diameter"), ("column_spacing", "--column-spacing"),
        ("ring_radius", "--ring-radius"), ("ladder_r_max", "--ladder-range"), ("d0", "--ladder-base"),
        ("tiling_edge", "--tiling-edge")) for unit in ("nm", "px")},
}
#: the bare word "frame" is ordinary English ("the corrected frame"); only ``frame=K`` or ``frame/`` names the option
_FRAME_RE = re.compile(r"(?<![\w.-])frame(?=[=/])")
_FLAG_RE = re.compile(r"(?<![\w.-])(?:parameter )?(" + "|".join(re.escape(k) for k in sorted(_FLAGS, key=len, reverse=True))
                      + r")(?![\w])")


def _flag_names(message: str) -> str:
    """A core message with the Python parameter names replaced by the command-line options.

    A message about a parameters file (``--params FILE: ...``) keeps the file's key names: that is what the user
    has to edit.
    """
    if message.startswith("--params "):
        return message
    return _FRAME_RE.sub("--frame", _FLAG_RE.sub(_flag_or_path, message))


def _flag_or_path(m: re.Match) -> str:
    """The option for a parameter name; a name inside a path ('/data/out_dir/frame.tif') stays as it is."""
    text, a, b = m.string, m.start(1), m.end(1)
    after = text[b:b + 2]
    in_path = after[:1] == "." and after[1:].isalnum() or (a > 0 and text[a - 1] == "/" and after[:1] in ("/", ":"))
    return m.group(0) if in_path else _FLAGS[m.group(1)]


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


def _seed(text: str) -> int:
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number 0 or larger, got {text!r}") from None
    if v < 0:
        raise argparse.ArgumentTypeError(f"expected a whole number 0 or larger, got {text!r}")
    return v


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


def _tile_size(text: str) -> int | None:
    if text.lower() == "auto":
        return None
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected 'auto', 0 (never tile) or a whole number >= 64, got {text!r}") from None
    if v != 0 and v < 64:
        raise argparse.ArgumentTypeError(f"expected 'auto', 0 (never tile) or a whole number >= 64, got {text!r}")
    return v


def _workers(text: str) -> int:
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number >= 1, got {text!r}") from None
    if v < 1:
        raise argparse.ArgumentTypeError(f"expected a whole number >= 1, got {text!r}")
    return v


def _add_scale_out_options(p: argparse.ArgumentParser) -> None:
    """--tile-size, --workers, --scheduler (same meaning on analyze and batch)."""
    from .parallel import AUTO_TILE_ABOVE_PX, AUTO_TILE_SIZE

    g = p.add_argument_group("large images and parallel work (dask)")
    g.add_argument("--tile-size", type=_tile_size, default=None, metavar="PX|auto",
                   help=f"find columns in overlapping tiles of PX x PX pixels (0 = never); default auto: tiles of "
                   f"{AUTO_TILE_SIZE} px when a side exceeds {AUTO_TILE_ABOVE_PX} px. Uncompressed TIFF and MRC "
                   "files are then memory-mapped, not read whole")
    g.add_argument("--workers", type=_workers, default=None, metavar="N",
                   help="worker processes for tiles (analyze) or images (batch) on an embedded dask cluster; "
                   "default: the number of CPU cores; 1 = serial")
    g.add_argument("--scheduler", metavar="ADDRESS",
                   help="use a running dask scheduler (e.g. tcp://host:8786) instead of an embedded cluster; its "
                   "workers must see the same files and output folder")


def _execution(args):
    from .parallel import Execution

    return Execution(tile_size=args.tile_size, workers=args.workers, scheduler=args.scheduler)


def _read_for(args, execution, progress=None):
    """The micrograph: memory-mapped when it will be tiled and the file allows it, else read whole."""
    from ._input import read_for_run

    return read_for_run(args.image, execution, pixel_size_nm=args.pixel_size, frame=args.frame,
                        frame_range=args.frames, align=not args.no_align, nonrigid=args.nonrigid,
                        align_reference=args.align_reference, progress=progress)


def _add_frame_options(group, *, reference: bool) -> None:
    """The frame-series options of analyze, info and batch (one wording everywhere)."""
    group.add_argument("--no-align", action="store_true",
                       help="with --frames: average the frames as they are (default: register them to the first "
                       "frame of the range, sub-pixel, before averaging)")
    group.add_argument("--nonrigid", action="store_true",
                       help="with --frames: also correct per-row scan distortions that change from frame to frame "
                       "(slower)")
    if reference:
        group.add_argument("--align-reference", type=int, metavar="K",
                           help="with --frames: the frame (file index) whose coordinates the results use; default "
                           "the first frame of the range")


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
            "pair_peaks.csv, tiles.csv, network.csv, spots.csv, results.xlsx, figures/, summary.json and "
            "parameters.toml (repeat the run with --params DIR/parameters.toml) into DIR. "
            "Every automatic choice is recorded in summary.json and can be overridden below."
        ),
    )
    a.add_argument("image", type=Path, help="micrograph: TIFF (ImageJ/OME calibration), MRC, PNG/JPEG, or vendor "
                   "formats with the 'vendor' extra")
    a.add_argument("--out", type=Path, required=True, metavar="DIR", help="results folder (must not exist or be empty)")
    a.add_argument("--overwrite", action="store_true", help="replace an existing results folder")
    a.add_argument("--params", type=Path, metavar="FILE",
                   help="parameters file (the parameters.toml every run writes) to repeat a run; options given on "
                   "the command line as well override the file's values")
    cal = a.add_argument_group("calibration and image")
    cal.add_argument("--pixel-size", type=_pixel_size, metavar="NM", help="pixel size in nm; overrides the file")
    cal.add_argument("--frame", type=int, metavar="K", help="for a stack: analyse frame K (0-based)")
    cal.add_argument("--frames", type=_frames, metavar="A:B",
                     help="for a stack: analyse the aligned mean of frames A..B-1 (see --no-align); writes frames.csv "
                     "and aligned_mean.tif")
    _add_frame_options(cal, reference=True)
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
                     help="ring radius (centre to column), nm or px suffix; default: a ring-shell scan of trial radii "
                     "around the columns (recorded in summary.json)")
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
    a.add_argument("--seed", type=_seed, default=0, help="seed for bootstraps and mixture fits (default 0)")
    _add_scale_out_options(a)
    a.add_argument("--quiet", action="store_true", help="no progress messages")
    a.add_argument("--debug", action="store_true", help="show the full traceback and the readers' messages on failure")

    i = sub.add_parser("info", help="show calibration, size and automatic scale of a micrograph",
                       description="Read a micrograph and print its size, pixel size and where the pixel size came "
                       "from, and the automatic column spacing and width estimate (JSON on stdout).")
    i.add_argument("image", type=Path)
    i.add_argument("--pixel-size", type=_pixel_size, metavar="NM", help="pixel size in nm; overrides the file")
    i.add_argument("--frame", type=int, metavar="K", help="for a stack: show frame K (0-based)")
    i.add_argument("--frames", type=_frames, metavar="A:B", help="for a stack: show the aligned mean of frames A..B-1")
    _add_frame_options(i, reference=True)
    i.add_argument("--dark-columns", action="store_true",
                   help="columns darker than the background (HRTEM-like contrast), for the automatic scale; "
                   "default: bright (HAADF)")
    i.add_argument("--debug", action="store_true", help="show the full traceback and the readers' messages on failure")

    b = sub.add_parser(
        "batch",
        help="analyse many micrographs with the same parameters and compare them",
        description=(
            "Analyse every image (files, folders, glob patterns) with the same parameters into DIR/<image stem>/, "
            "then write DIR/comparison.csv, DIR/comparison.xlsx and DIR/figures/comparison.png|svg: one row per "
            "image and region with the status ('ok' or the error), column counts and density, species fractions, "
            "ring and pentagon counts, ladder base and verdict, thick/thin ratio with its uncertainty, Fourier "
            "order and distortion, notes. A failed image is recorded and skipped; running the same command again "
            "skips finished images (resume)."
        ),
    )
    b.add_argument("inputs", nargs="+", metavar="INPUT", help="image files, folders or glob patterns")
    b.add_argument("--out", type=Path, required=True, metavar="DIR", help="batch folder (created if needed)")
    b.add_argument("--params", type=Path, metavar="FILE", help="parameters file (parameters.toml) for every image")
    b.add_argument("--pixel-size", type=_positive, metavar="NM", help="pixel size in nm for every image; overrides "
                   "the files and the parameters file")
    b.add_argument("--frame", type=int, metavar="K", help="for stacks: analyse frame K")
    b.add_argument("--frames", type=_frames, metavar="A:B",
                   help="for stacks: analyse the aligned mean of frames A..B-1 (see --no-align)")
    _add_frame_options(b, reference=False)
    b.add_argument("--rerun", action="store_true",
                   help="analyse every image again and replace its sub-folder (default: skip finished images)")
    b.add_argument("--no-figures", action="store_true", help="no per-image figures (the comparison figure is drawn)")
    _add_scale_out_options(b)
    b.add_argument("--quiet", action="store_true", help="no progress bar")
    b.add_argument("--debug", action="store_true", help="show the full traceback on failure")

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
        _stop.raise_if_pending()
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


def _on_signal(signum, frame):
    _stop.record(signum)  # kept even when the exception below lands in a callback that swallows it
    raise _stop.Signalled(signum)


def _install_signal_handlers() -> dict:
    """SIGTERM and SIGHUP end the run like Ctrl-C: work folders are removed, nothing half-written stays.

    Returns the previous handlers (restored when :func:`main` returns, for callers that run it in-process).
    """
    import signal
    import threading

    if threading.current_thread() is not threading.main_thread():
        return {}
    old = {}
    for name in ("SIGTERM", "SIGHUP"):
        if hasattr(signal, name):
            sig = getattr(signal, name)
            old[sig] = signal.signal(sig, _on_signal)
    return old


#: command-line option (argparse dest) -> the Parameters fields it sets
_DEST_FIELDS = {
    "pixel_size": ("pixel_size_nm",), "dark_columns": ("dark_columns",), "species": ("n_species",),
    "flatten": ("flatten",), "min_mass": ("min_mass",), "ring_order": ("ring_order",),
    "radius_tolerance": ("radius_tolerance",), "no_pentagons": ("pentagons",), "half_step": ("half_step",),
    "no_fourier": ("fourier",), "seed": ("rng",),
    **{dest: (f"{base}_nm", f"{base}_px") for dest, base in (
        ("column_diameter", "column_diameter"), ("column_spacing", "column_spacing"), ("ring_radius", "ring_radius"),
        ("ladder_range", "ladder_r_max"), ("ladder_base", "d0"), ("tiling_edge", "tiling_edge"))},
}


def _explicit_options(parser: argparse.ArgumentParser, argv: list[str] | None, command: str) -> set[str]:
    """The dests of the options actually typed after ``command`` (a default is not a choice)."""
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    sp = sub.choices[command]
    saved = [(a, a.default, a.required) for a in sp._actions]
    try:
        for a in sp._actions:
            a.default = argparse.SUPPRESS
            a.required = False
        ns, _ = parser.parse_known_args(argv)
    finally:
        for a, d, r in saved:
            a.default, a.required = d, r
    return set(vars(ns)) - {"command"}


def _params_with_file(args):
    """Parameters from ``--params FILE`` (if given) with the options typed on the command line on top."""
    from .pipeline import Parameters

    cli = _params(args).validate()
    if getattr(args, "params", None) is None:
        return cli
    from ._params_file import load_parameters

    try:
        base = load_parameters(args.params)
    except TenfoldInputError as exc:
        raise TenfoldInputError(f"--params {exc}") from None
    explicit = getattr(args, "explicit_options", set())
    merged = base.to_dict()
    for dest in explicit & set(_DEST_FIELDS):
        for name in _DEST_FIELDS[dest]:  # a length typed in one unit replaces the file's value in either unit
            merged[name] = getattr(cli, name)
    return Parameters.from_dict(merged).validate()


def _analyze(args) -> int:
    from .export import figure_service, write_results
    from .pipeline import run_pipeline

    from ._guards import check_lengths
    from ._outdir import check_output_folder
    from .io import check_image_file

    # before any work: fail in a second, not after a minute; nothing opens the input before it is known to be a
    # regular file (a FIFO would block the first open for ever)
    check_image_file(args.image)
    check_output_folder(args.out, overwrite=args.overwrite, inputs=[args.image], flag="--out")
    params = _params_with_file(args)
    execution = _execution(args)
    prog = _Progress(args.quiet)
    prog(0.0, f"reading {args.image}")
    t_read = time.perf_counter()
    mg = _read_for(args, execution, progress=prog if args.frames else None)
    t_read = time.perf_counter() - t_read
    check_lengths(params, mg.data.shape, mg.meta.pixel_size_nm)
    execution = _capped(execution, mg.data.shape)
    regions = None
    if args.region:
        from .region import parse_region

        ps = mg.meta.pixel_size_nm
        regions = []
        for k, text in enumerate(args.region, start=1):
            reg = parse_region(text, pixel_size_nm=ps, unit=args.region_unit)
            reg.label = k
            regions.append(reg)
    # a process forked here imports matplotlib while the columns are found and draws each figure once the
    # pipeline says its data are final (export.figure_service)
    with figure_service(enabled=not args.no_figures) as service:
        result = run_pipeline(mg, params, regions=regions, progress=prog, execution=execution,
                              stage_done=service.stage_done if service is not None else None)
        from ._timing import format_table, with_stage

        result.summary["timings_s"] = with_stage(result.summary.get("timings_s"), "read", t_read, first=True)
        prog(1.0, f"writing {args.out}")
        t_export = time.perf_counter()
        write_results(result, args.out, overwrite=args.overwrite, figures=not args.no_figures)
    if args.debug:  # export is timed here only: summary.json is one of the files it writes
        timings = with_stage(result.summary["timings_s"], "export", time.perf_counter() - t_export)
        print("timings (wall seconds)\n" + format_table(timings), file=sys.stderr)
    s = result.summary
    cal = f"{s['pixel_size_nm']} nm/px ({s['calibration_source']})" if s["calibrated"] else "UNCALIBRATED (px only)"
    m = result.tables["motifs"]
    n_rings = int(m["kind"].str.startswith("ring").sum()) if len(m) else 0
    ratio = (s.get("tiling") or {}).get("thick_thin_ratio")
    print(f"{args.image}: {s['n_columns']} columns, {n_rings} ring motifs, "
          f"{int((m['kind'] == 'pentagon').sum()) if len(m) else 0} pentagons, thick/thin = "
          f"{_na_why(s) if ratio is None else f'{ratio:.3f}'}; calibration {cal}; results in {args.out}")
    for note in s.get("notes", []):
        print(f"note: {_flag_names(note)}", file=sys.stderr)
    return 0


def _capped(execution, shape):
    """``execution`` with ``--workers`` lowered to the cores and the tiles this image has (with a note)."""
    from dataclasses import replace

    from ._resources import cap_workers, n_tiles

    tiles = n_tiles(shape, execution.tiles_for(shape))
    workers, note = cap_workers(execution.workers, tasks=tiles, what=f"tile{'s' if tiles != 1 else ''}")
    if not note:
        return execution
    print(f"note: {note}", file=sys.stderr)
    return replace(execution, workers=workers)


def _na_why(summary: dict) -> str:
    """'n/a' for an empty tiling, pointing at the note that says why when there is one."""
    why = [n for n in summary.get("notes", []) if n.startswith("tiling:")]
    return "n/a (see the tiling note below)" if why else "n/a"


def _batch(args) -> int:
    from .batch import run_batch
    from .pipeline import Parameters

    params = Parameters()
    if args.params is not None:
        from ._params_file import load_parameters

        try:
            params = load_parameters(args.params)
        except TenfoldInputError as exc:
            raise TenfoldInputError(f"--params {exc}") from None
    if args.pixel_size is not None:
        params.pixel_size_nm = args.pixel_size
    params.validate()
    from tqdm import tqdm

    bar = None

    def progress(done: int, total: int, message: str) -> None:
        nonlocal bar
        if bar is None:
            bar = tqdm(total=total, initial=done, unit="image", file=sys.stderr, disable=args.quiet,
                       dynamic_ncols=True)
            bar.set_postfix_str(message[:60])
            return
        bar.update(done - bar.n)
        bar.set_postfix_str(message[:60])

    try:
        table = run_batch(args.inputs, args.out, params, frame=args.frame, frame_range=args.frames,
                          align=not args.no_align, nonrigid=args.nonrigid,
                          rerun=args.rerun, figures=not args.no_figures, execution=_execution(args),
                          progress=progress)
    finally:
        if bar is not None:
            bar.close()
    failed = table[table["status"] != "ok"]
    n_img = table["image"].nunique()
    print(f"{n_img - failed['image'].nunique()} of {n_img} images analysed; comparison in "
          f"{args.out / 'comparison.csv'}")
    for _, row in failed.iterrows():
        print(f"failed: {row['image']}: {row['status']}", file=sys.stderr)
    return 0 if failed.empty else 1


def _info(args) -> int:
    from .io import check_image_file, read_micrograph
    from .pipeline import estimate_defaults

    check_image_file(args.image)

    mg = read_micrograph(args.image, pixel_size_nm=args.pixel_size, frame=args.frame, frame_range=args.frames,
                         align=not args.no_align, nonrigid=args.nonrigid, align_reference=args.align_reference)
    out = mg.meta.to_dict()
    if mg.alignment is not None:
        out["frames_alignment"] = mg.alignment.info
        out["frames_table"] = mg.alignment.table.to_dict(orient="records")
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
    if args.command == "analyze":
        args.explicit_options = _explicit_options(parser, argv, args.command)
    handler = {"analyze": _analyze, "batch": _batch, "info": _info, "samples": _samples}[args.command]

    def _show(message, category, filename, lineno, file=None, line=None):
        print(f"warning: {_flag_names(str(message))}", file=sys.stderr)

    warnings.showwarning = _show if not debug else warnings.showwarning
    if debug:  # the --debug log: what the format libraries said while reading (captured, never printed otherwise)
        import logging

        logging.basicConfig(level=logging.WARNING, format="%(name)s: %(message)s")
        logging.getLogger("tenfold").setLevel(logging.DEBUG)
    warnings.simplefilter("always", TenfoldWarning)
    _stop.reset()
    old_handlers = _install_signal_handlers()
    old_hook = sys.unraisablehook
    sys.unraisablehook = _unraisable_hook(old_hook, debug)
    try:
        with _quiet_libraries(debug):
            code = handler(args)
        _stop.raise_if_pending()
        return code
    except TenfoldInputError as exc:
        if debug:
            raise
        print(f"tenfold: error: {_flag_names(str(exc))}", file=sys.stderr)
        return 2
    except Cancelled as exc:
        print(f"tenfold: {exc}", file=sys.stderr)
        return 130
    except KeyboardInterrupt as exc:
        signum = getattr(exc, "signum", None) or _stop.pending() or 2
        print(f"tenfold: interrupted (signal {signum}); nothing half-written is left", file=sys.stderr)
        return 128 + signum
    except BrokenPipeError:  # output piped into e.g. `head`, which stopped reading: not an error
        return 0
    except OSError as exc:  # a file system refusal anywhere (permissions, a folder where a file goes): name it
        if debug:
            raise
        where = f"{exc.filename}: " if exc.filename else ""
        print(f"tenfold: error: {where}{exc.strerror or exc} ({type(exc).__name__}); check the path and its "
              "permissions, or run again with --debug for the traceback", file=sys.stderr)
        return 1
    except Exception as exc:  # the one-line rule: no traceback for users unless they ask
        if debug:
            raise
        if _stop.pending() is not None:  # a failure the signal caused (e.g. a cluster torn down half-way)
            print(f"tenfold: interrupted (signal {_stop.pending()}); nothing half-written is left", file=sys.stderr)
            return 128 + _stop.pending()
        print(f"tenfold: error: {type(exc).__name__}: {exc} (run again with --debug for the traceback)", file=sys.stderr)
        return 1
    finally:
        import signal

        for sig, h in old_handlers.items():
            signal.signal(sig, h)
        if _stop.pending() is None:  # after a signal the process ends: keep atexit clean-up of half-made work quiet
            sys.unraisablehook = old_hook


def _unraisable_hook(default, debug: bool):
    """Errors Python can only print ("Exception ignored in ..."): after a termination signal they are its echo
    (a callback it interrupted, a cluster's atexit clean-up after start-up was cut short) and stay silent; the
    signal itself ends the run at the next check."""

    def hook(unraisable) -> None:
        if not debug and (isinstance(unraisable.exc_value, KeyboardInterrupt) or _stop.pending() is not None):
            return
        default(unraisable)

    return hook


@contextmanager
def _quiet_libraries(debug: bool):
    """What the format libraries log while a command runs goes to the ``--debug`` log, never to the terminal."""
    if debug:
        yield
        return
    from .io import _captured_log

    with _captured_log("tifffile"):
        yield


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
