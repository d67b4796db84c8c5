"""The dock's long jobs (run, re-run, estimate, export) in a separate process, with progress and cancel.

A worker *thread* still shares the interpreter lock with the GUI thread, and the pipeline, its numpy / scipy /
pandas calls and matplotlib's figure rendering hold that lock for up to seconds at a time: the GUI froze although
the work was "in the background". One helper process (started once, with the 'spawn' method so no Qt state is
copied into it) does the work instead; the GUI process's worker thread only waits for it, passes progress
messages on and sets the cancel flag. No Qt or napari in this module: the child process imports only this and
``tenfold.analysis``.
"""

from __future__ import annotations

import atexit
import os
import pickle
import subprocess
import sys
import threading

__all__ = ["run_in_process", "analysis_job", "rerun_job", "estimate_job", "align_job", "export_job", "batch_job",
           "start", "shutdown"]

_LOCK = threading.Lock()
_STATE: dict = {}  # the helper process


def _send(stream, obj) -> None:
    pickle.dump(obj, stream, protocol=pickle.HIGHEST_PROTOCOL)
    stream.flush()


def _serve() -> None:
    """The helper process's loop: read a job, run it, send progress (waiting for 'go on' or 'stop' after each)
    and then the outcome. Runs as ``python -m tenfold.napari_plugin._compute``."""
    requests = sys.stdin.buffer
    replies = os.fdopen(os.dup(1), "wb")
    os.dup2(2, 1)  # anything printed by the analysis goes to stderr, never into the reply stream
    from tenfold.analysis import pipeline  # noqa: F401  (imports and numba caches loaded before the first job)
    from tenfold.analysis.refine import warm_up

    warm_up()
    try:  # napari's shape triangulation compiles into the same on-disk numba cache the GUI process then loads
        from napari.layers.shapes._accelerated_triangulate_dispatch import warmup_numba_cache

        warmup_numba_cache()
    except Exception:  # noqa: BLE001 - napari absent or its private warm-up moved: the GUI thread warms it then
        pass
    while True:
        try:
            fn, args, kwargs = pickle.load(requests)
        except EOFError:
            return

        def progress(fraction: float, message: str) -> bool:
            _send(replies, ("progress", float(fraction), str(message)))
            return pickle.load(requests) == "go on"

        try:
            _send(replies, ("done", fn(*args, progress=progress, **kwargs)))
        except BaseException as exc:  # sent back and raised in the GUI process's worker thread
            _send(replies, ("failed", exc))


def _helper() -> subprocess.Popen:
    with _LOCK:
        proc = _STATE.get("proc")
        if proc is None or proc.poll() is not None:
            # a fresh interpreter running only this module: no Qt state copied, the user's script not re-run
            proc = subprocess.Popen([sys.executable, "-m", "tenfold.napari_plugin._compute"],
                                    stdin=subprocess.PIPE, stdout=subprocess.PIPE)
            _STATE["proc"] = proc
        return proc


def start() -> None:
    """Start the helper process now (it loads the analysis code while the user sets up the first run)."""
    _helper()


def shutdown() -> None:
    """Stop the helper process (at exit; a new one starts with the next job)."""
    with _LOCK:
        proc = _STATE.pop("proc", None)
    if proc is not None and proc.poll() is None:
        proc.kill()
        proc.wait()


atexit.register(shutdown)


def run_in_process(fn, *args, emit, cancel: threading.Event, **kwargs):
    """Call ``fn(*args, progress=..., **kwargs)`` in the helper process and return its value.

    ``emit(fraction, message)`` is called (in the calling thread) for every progress report; once ``cancel`` is
    set the job's next progress report returns False, so the pipeline raises ``Cancelled``, which is raised here
    too (as is any other error of the job). ``fn`` and its arguments must be picklable (module-level functions,
    tables, arrays). One job at a time.
    """
    proc = _helper()
    try:
        _send(proc.stdin, (fn, args, kwargs))
        while True:
            reply = pickle.load(proc.stdout)
            if reply[0] == "progress":
                emit(reply[1], reply[2])
                _send(proc.stdin, "stop" if cancel.is_set() else "go on")
            elif reply[0] == "done":
                return reply[1]
            else:
                raise reply[1]
    except (EOFError, BrokenPipeError, pickle.UnpicklingError) as exc:
        shutdown()  # the helper died (killed, out of memory): the next job starts a fresh one
        raise RuntimeError(f"the analysis process stopped unexpectedly ({type(exc).__name__}); try again") from None


# ---------------------------------------------------------------- job bodies (run in the helper process)
def rerun_job(result, columns, *, params, regions, progress):
    """Recompute motifs, ladder and tiling from the edited columns (hand-added columns are fitted there)."""
    from tenfold.analysis import pipeline

    return pipeline.rerun_from_columns(result, columns, params=params, regions=regions, progress=progress)


def _micrograph(source, progress, share: float):
    """The micrograph of a dock's layer record (``_layers.layer_source``), built here in the helper: aligning a
    frame range takes the first ``share`` of the job's progress."""
    from tenfold.analysis._progress import sub_progress

    from ._layers import micrograph_from_source

    aligning = source["frame_range"] is not None and source["align"]
    return micrograph_from_source(source, progress=sub_progress(progress, 0.0, share) if aligning else None), \
        (share if aligning else 0.0)


def analysis_job(source, params, *, regions, preview_px, progress):
    """Run (or, with ``preview_px``, preview on the central square without the Fourier stage) the pipeline on
    the micrograph of a dock's layer record."""
    from tenfold.analysis._progress import sub_progress
    from tenfold.analysis.pipeline import run_pipeline

    from ._layers import crop_centre

    micrograph, done = _micrograph(source, progress, 0.4)
    if preview_px:
        micrograph, _ = crop_centre(micrograph, preview_px)
    return run_pipeline(micrograph, params, regions=regions, progress=sub_progress(progress, done, 1.0))


def align_job(source, *, progress):
    """Align and average the frame range of a stack layer; returns the micrograph (``alignment`` attached)."""
    micrograph, _ = _micrograph(dict(source, align=True), progress, 1.0)
    if micrograph.alignment is None:
        raise RuntimeError("no alignment was made (a single frame?)")
    return micrograph


def batch_job(inputs, out_dir, *, params, frame, frame_range, rerun, progress, align=True, nonrigid=False):
    """``batch.run_batch`` with the dock's progress (fraction, message); returns a one-line report."""
    from tenfold.analysis.batch import run_batch

    def images_done(done, total, message):
        return progress(done / max(total, 1), f"batch: {done} of {total} images; {message}")

    table = run_batch(inputs, out_dir, params, frame=frame, frame_range=frame_range, rerun=rerun,
                      progress=images_done, align=align, nonrigid=nonrigid)
    failed = int((table["status"] != "ok").sum()) if "status" in table else 0
    return (f"batch: {len(table)} images, {failed} failed; comparison.csv, comparison.xlsx and the figure in "
            f"{out_dir}")


def estimate_job(source, *, dark_columns, progress):
    from tenfold.analysis.pipeline import estimate_defaults

    micrograph, done = _micrograph(source, progress, 0.8)
    progress(max(done, 0.1), "estimating column spacing and diameter")
    return estimate_defaults(micrograph, dark_columns=dark_columns)


def export_job(result, folder, *, overwrite, progress):
    from tenfold.analysis.export import write_results

    write_results(result, folder, overwrite=overwrite, figures=True, progress=progress)
    return f"results written to {folder}"


if __name__ == "__main__":
    _serve()
