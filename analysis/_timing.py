"""Wall-clock seconds per pipeline stage, for ``summary['timings_s']`` and ``tenfold analyze --debug``.

The orchestrator starts one :class:`StageClock` per run with :func:`start` and marks the end of each stage with
:func:`lap` (one line after the stage's call, so the stage code itself is untouched); helpers deeper down (the
structure stages) reach the same clock through a context variable, so no signature changes. A lap records the
seconds since the previous lap (or the start) under the stage's name; a name seen twice adds up.

Example
-------
>>> clock = start()
>>> lap("columns")
>>> sorted(clock.as_dict())
['columns', 'total']
>>> stop(clock)
"""

from __future__ import annotations

import time
from contextvars import ContextVar

__all__ = ["StageClock", "start", "lap", "stop", "format_table", "with_stage"]


class StageClock:
    """Seconds per named stage, measured as laps of one monotonic clock (``time.perf_counter``)."""

    def __init__(self) -> None:
        self.seconds: dict[str, float] = {}
        self._t0 = self._last = time.perf_counter()

    def lap(self, name: str) -> float:
        """Book the time since the previous lap under ``name``; returns those seconds."""
        now = time.perf_counter()
        dt = now - self._last
        self.seconds[name] = self.seconds.get(name, 0.0) + dt
        self._last = now
        return dt

    def skip(self) -> None:
        """Start the next lap now: the time since the previous lap is booked nowhere (e.g. waiting for a user)."""
        self._last = time.perf_counter()

    def as_dict(self) -> dict[str, float]:
        """The stages in the order first seen, and 'total' (the sum of the stages), seconds rounded to 1 ms."""
        out = {k: round(v, 3) for k, v in self.seconds.items()}
        out["total"] = round(sum(self.seconds.values()), 3)
        return out


_CURRENT: ContextVar[StageClock | None] = ContextVar("tenfold_stage_clock", default=None)


def start() -> StageClock:
    """A new clock, made the current one of this thread / context (the one :func:`lap` books to)."""
    clock = StageClock()
    _CURRENT.set(clock)
    return clock


def lap(name: str) -> None:
    """Book the time since the previous lap under ``name`` on the current clock; nothing when there is none."""
    clock = _CURRENT.get()
    if clock is not None:
        clock.lap(name)


def stop(clock: StageClock) -> None:
    """Detach ``clock`` if it is the current one (later laps then go nowhere)."""
    if _CURRENT.get() is clock:
        _CURRENT.set(None)


def format_table(timings: dict[str, float]) -> str:
    """The timings as an aligned two-column text table, one stage a line, the share of the total beside it."""
    total = timings.get("total") or sum(v for k, v in timings.items() if k != "total") or 1.0
    width = max((len(k) for k in timings), default=5)
    return "\n".join(f"{k:<{width}}  {v:8.3f} s  {100.0 * v / total:5.1f} %" for k, v in timings.items())


def with_stage(timings: dict | None, name: str, seconds: float, *, first: bool = False) -> dict[str, float]:
    """A copy of a ``timings_s`` block with one more stage (first or last) and 'total' updated."""
    stages = {k: v for k, v in (timings or {}).items() if k != "total"}
    stages = {name: round(float(seconds), 3), **stages} if first else {**stages, name: round(float(seconds), 3)}
    stages["total"] = round(sum(stages.values()), 3)
    return stages
