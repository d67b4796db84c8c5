"""Lazy heavy imports: trackpy without IPython (a start-up cost, checked in a fresh interpreter)."""

from __future__ import annotations

import subprocess
import sys


def test_trackpy_without_ipython_and_ipython_still_importable():
    code = ("import sys; from tenfold.analysis._lazy import import_trackpy; tp = import_trackpy(); "
            "assert 'IPython' not in sys.modules, 'IPython was imported'; assert callable(tp.locate); "
            "import importlib.util; importlib.util.find_spec('IPython'); print('ok')")  # raises if left hidden
    run = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300, check=False)
    assert run.returncode == 0, run.stderr[-2000:]
    assert run.stdout.strip() == "ok"


def test_import_tenfold_analysis_loads_no_heavy_package():
    code = ("import sys; import tenfold.analysis; "
            "heavy = [m for m in ('matplotlib', 'scipy', 'pandas', 'numba', 'trackpy', 'dask', 'skimage', "
            "'openpyxl', 'IPython') if m in sys.modules]; print(heavy)")
    run = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300, check=False)
    assert run.returncode == 0, run.stderr[-2000:]
    assert run.stdout.strip() == "[]"
