"""Progress reporting and cancellation shared by every stage.

A progress callback is ``callback(fraction, message) -> bool | None``; returning ``False`` asks the run to stop.
Stages call :func:`report`; the orchestrator hands each stage a :func:`sub_progress` window of the whole run.
"""

from __future__ import annotations

from collections.abc import Callable

from ._errors import Cancelled

__all__ = ["ProgressCallback", "report", "sub_progress"]

ProgressCallback = Callable[[float, str], "bool | None"]


def report(progress: ProgressCallback | None, fraction: float, message: str) -> None:
    """Call ``progress`` and raise :class:`Cancelled` when it returns False."""
    if progress is None:
        return
    if progress(float(min(max(fraction, 0.0), 1.0)), message) is False:
        raise Cancelled(f"cancelled during: {message}")


def sub_progress(progress: ProgressCallback | None, lo: float, hi: float) -> ProgressCallback | None:
    """A callback mapping a stage's [0, 1] onto [lo, hi] of the parent's range."""
    if progress is None:
        return None

    def _inner(fraction: float, message: str) -> bool | None:
        return progress(lo + (hi - lo) * float(min(max(fraction, 0.0), 1.0)), message)

    return _inner
