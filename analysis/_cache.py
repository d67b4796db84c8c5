"""Where numba keeps Tenfold's compiled kernels: a per-user cache folder, never the installed sources.

numba's ``cache=True`` writes next to the module by default, i.e. into ``site-packages`` after ``pip install .``;
a later ``pip install -e .`` then leaves that ``__pycache__`` behind in a half-removed package. Setting
``NUMBA_CACHE_DIR`` (only when the user has not set it) before any kernel is defined moves the cache to
``$XDG_CACHE_HOME/tenfold/numba`` (``~/.cache/tenfold/numba``; ``%LOCALAPPDATA%\\tenfold\\numba`` on Windows,
``~/Library/Caches/tenfold/numba`` on macOS). numba keys the entries by source path and a checksum, so two installs
never mix.
"""

from __future__ import annotations

import os
import sys
from pathlib import Path

__all__ = ["numba_cache_dir", "use_user_cache_dir"]


def numba_cache_dir() -> Path:
    """The per-user folder for Tenfold's numba cache (not created here)."""
    if sys.platform == "win32":
        base = Path(os.environ.get("LOCALAPPDATA") or Path.home() / "AppData" / "Local")
    elif sys.platform == "darwin":
        base = Path.home() / "Library" / "Caches"
    else:
        base = Path(os.environ.get("XDG_CACHE_HOME") or Path.home() / ".cache")
    return base / "tenfold" / "numba"


def use_user_cache_dir() -> str:
    """Point numba's cache at :func:`numba_cache_dir` unless ``NUMBA_CACHE_DIR`` is set; return the folder used."""
    chosen = os.environ.get("NUMBA_CACHE_DIR")
    if not chosen:
        chosen = str(numba_cache_dir())
        os.environ["NUMBA_CACHE_DIR"] = chosen
    numba = sys.modules.get("numba")
    if numba is not None and not numba.config.CACHE_DIR:  # numba read the environment before we set it
        numba.config.CACHE_DIR = chosen
    return chosen
