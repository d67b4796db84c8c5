"""Work-around for PySide6 >= 6.12 on Python < 3.12: keep None, True and False alive.

PySide6 6.12 no longer counts references to None, True and False (they are immortal from Python 3.12 on), but
still releases them: every Qt signal emitted from Python and every Python slot returning None takes one
reference away. On Python 3.11 the count eventually reaches zero and the interpreter aborts ("deallocating
None"), mid-session or at exit. Raising their counts by 2**40 makes them immortal in effect. Nothing is done on
Python >= 3.12 or with another Qt binding.
"""

from __future__ import annotations

import sys

__all__ = ["protect_singletons"]

_done = False


def _pyside_affected() -> bool:
    from importlib import metadata

    try:
        version = metadata.version("PySide6")
    except metadata.PackageNotFoundError:
        return False
    major, minor = (int(p) for p in version.split(".")[:2])
    return (major, minor) >= (6, 12)


def protect_singletons() -> bool:
    """Apply the work-around once when it is needed; returns True when it was applied (now or before)."""
    global _done
    if _done:
        return True
    if sys.version_info >= (3, 12) or sys.implementation.name != "cpython" or not _pyside_affected():
        return False
    import ctypes

    for obj in (None, True, False):
        ctypes.c_ssize_t.from_address(id(obj)).value += 1 << 40  # ob_refcnt is the first field of PyObject
    _done = True
    return True
