"""A termination signal (SIGTERM, SIGHUP) that is never lost.

The command turns these signals into an exception, like Ctrl-C. Python runs a signal handler between any two
byte-codes, also inside a weakref callback or a ``__del__``, where an exception is printed as "Exception ignored"
and dropped: the run would go on and replace the old results. So the handler first records the signal here, and
the places that must not run after one (moving results into place, the progress callback) ask
:func:`raise_if_pending`.
"""

from __future__ import annotations

__all__ = ["Signalled", "record", "pending", "raise_if_pending", "reset"]

_received: list[int] = []


class Signalled(KeyboardInterrupt):
    """SIGTERM/SIGHUP, raised like SIGINT so every clean-up path runs."""

    def __init__(self, signum: int) -> None:
        super().__init__(signum)
        self.signum = signum


def record(signum: int) -> None:
    """Remember that ``signum`` arrived (the first one counts)."""
    _received.append(int(signum))


def pending() -> int | None:
    """The first recorded signal, or None."""
    return _received[0] if _received else None


def raise_if_pending() -> None:
    """Raise :class:`Signalled` when a signal was recorded (its first raise may have been swallowed)."""
    if _received:
        raise Signalled(_received[0])


def reset() -> None:
    """Forget recorded signals (at the start of a command run in-process)."""
    _received.clear()
