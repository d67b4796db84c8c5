"""The one error type Tenfold raises for bad input, and its warning category."""

from __future__ import annotations

__all__ = ["TenfoldInputError", "TenfoldWarning", "Cancelled"]


class TenfoldInputError(ValueError):
    """Bad input at a public boundary.

    The message names the file or parameter, says what was wrong and what to do about it, in one line.
    """


class TenfoldWarning(UserWarning):
    """Something the user should know about a result (masked pixels, RGB conversion, polarity, calibration)."""


class Cancelled(Exception):
    """Raised inside the pipeline when the progress callback asked to stop."""
