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
import queue as _queue
import threading

__all__ = ["run_in_process", "rerun_job", "estimate_job", "export_job", "shutdown"]

_LOCK = threading.Lock()
_STATE: dict = {}  # pool, progress queue, cancel event of the one helper process
_CHILD: dict = {}  # in the helper process: its queue and cancel event


def _init_child(progress_queue, cancel_event) -> None:
    _CHILD["queue"], _CHILD["cancel"] = progress_queue, cancel_event


def _progress(fraction: float, message: str) -> bool:
    _CHILD["queue"].put((float(fraction), str(message)))
    return not _CHILD["cancel"].is_set()


def _call(fn, args, kwargs):
    """Runs in the helper process: ``fn(*args, progress=..., **kwargs)``."""
    return fn(*args, progress=_progress, **kwargs)


def _warm():
    from tenfold.analysis import pipeline  # noqa: F401  (imports and numba caches loaded before the first run)
    from tenfold.analysis.refine import warm_up

    warm_up()
    return True


def _pool():
    with _LOCK:
        if "pool" not in _STATE:
            import multiprocessing as mp
            from concurrent.futures import ProcessPoolExecutor

            ctx = mp.get_context("spawn")
            _STATE["queue"], _STATE["cancel"] = ctx.Queue(), ctx.Event()
            _STATE["pool"] = ProcessPoolExecutor(max_workers=1, mp_context=ctx, initializer=_init_child,
                                                 initargs=(_STATE["queue"], _STATE["cancel"]))
            _STATE["pool"].submit(_warm)
        return _STATE["pool"]


def start() -> None:
    """Start the helper process now (it loads the analysis code while the user sets up the first run)."""
    _pool()


def shutdown() -> None:
    """Stop the helper process (at exit; a new one starts on the next job)."""
    with _LOCK:
        pool = _STATE.pop("pool", None)
    if pool is not None:
        pool.shutdown(wait=False, cancel_futures=True)


atexit.register(shutdown)


def run_in_process(fn, *args, emit, cancel: threading.Event, **kwargs):
    """Call ``fn(*args, progress=..., **kwargs)`` in the helper process and return its value.

    ``emit(fraction, message)`` is called (in the calling thread) for every progress report; setting ``cancel``
    makes the job's next progress report return False, so the pipeline raises ``Cancelled``, which is raised here
    too. ``fn`` and its arguments must be picklable (module-level functions, tables, arrays).
    """
    from concurrent.futures.process import BrokenProcessPool

    pool = _pool()
    progress_queue, child_cancel = _STATE["queue"], _STATE["cancel"]
    child_cancel.clear()
    while True:  # leftovers of an earlier job
        try:
            progress_queue.get_nowait()
        except _queue.Empty:
            break
    try:
        future = pool.submit(_call, fn, args, kwargs)
    except BrokenProcessPool:
        shutdown()
        future = _pool().submit(_call, fn, args, kwargs)
        progress_queue, child_cancel = _STATE["queue"], _STATE["cancel"]
    while True:
        try:
            emit(*progress_queue.get(timeout=0.05))
        except _queue.Empty:
            if future.done():
                break
        if cancel.is_set():
            child_cancel.set()
    try:
        return future.result()
    except BrokenProcessPool:
        shutdown()  # the next job starts a fresh helper
        raise


# ---------------------------------------------------------------- job bodies (run in the helper process)
def rerun_job(result, columns, *, params, regions, progress):
    """Fit the hand-added columns, then recompute motifs, ladder and tiling from the edited columns."""
    from tenfold.analysis import pipeline

    from ._layers import fit_added

    fitted = fit_added(result, columns, dark_columns=params.dark_columns)
    return pipeline.rerun_from_columns(result, fitted, params=params, regions=regions, progress=progress)


def estimate_job(micrograph, *, dark_columns, progress):
    from tenfold.analysis.pipeline import estimate_defaults

    progress(0.1, "estimating column spacing and diameter")
    return estimate_defaults(micrograph, dark_columns=dark_columns)


def export_job(result, folder, *, overwrite, progress):
    from tenfold.analysis.export import write_results

    write_results(result, folder, overwrite=overwrite, figures=True, progress=progress)
    return f"results written to {folder}"
