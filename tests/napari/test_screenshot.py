"""The documentation screenshot script runs and writes a non-trivial PNG."""

from __future__ import annotations

import importlib.util
from pathlib import Path

import numpy as np
import pytest

SCRIPT = Path(__file__).resolve().parents[2] / "docs" / "make_screenshot.py"


@pytest.mark.slow
def test_make_screenshot(make_napari_viewer, qtbot, tmp_path):
    import imageio.v3 as iio

    spec = importlib.util.spec_from_file_location("make_screenshot", SCRIPT)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    viewer = make_napari_viewer()
    out = module.make_screenshot(
        tmp_path / "viewer.png", viewer=viewer,
        wait=lambda w: qtbot.waitUntil(lambda: w.worker is None, timeout=120_000),
    )
    img = iio.imread(out)
    assert img.ndim == 3 and img.shape[0] > 300 and img.shape[1] > 600
    assert np.unique(img.reshape(-1, img.shape[-1]), axis=0).shape[0] > 100  # more than a blank window
    for name in ("columns", "rings", "pentagons", "motif centres", "network", "selected"):
        assert f"{name} [decagonal_haadf_high_dose]" in viewer.layers
