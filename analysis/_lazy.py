"""Imports of heavy third-party packages, without what they pull in but a run does not need.

trackpy's ``utils`` imports IPython when it is installed (to pick a logging handler when running inside IPython),
which costs about half a second at the start of every ``tenfold analyze``. When IPython is not loaded yet, this
process is not running inside IPython, so trackpy is imported with IPython hidden; it behaves the same, and
IPython stays importable afterwards. Inside IPython or napari's console IPython is already loaded and trackpy's
own choice applies.
"""

from __future__ import annotations

import sys

__all__ = ["import_trackpy"]


def import_trackpy():
    """The ``trackpy`` module, imported without IPython when IPython is not already loaded.

    Examples
    --------
    >>> tp = import_trackpy()
    >>> callable(tp.locate)
    True
    """
    if "trackpy" in sys.modules or "IPython" in sys.modules:
        import trackpy

        return trackpy
    sys.modules["IPython"] = None  # makes `import IPython` raise ImportError, which trackpy expects and handles
    try:
        import trackpy
    finally:
        if sys.modules.get("IPython", 0) is None:
            del sys.modules["IPython"]
    return trackpy
