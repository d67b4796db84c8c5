"""The dock's export follows the command line's folder rules (it calls export.write_results): user files in the
folder are kept on overwrite, and a folder holding the input image is refused with a notification."""

from __future__ import annotations

import dataclasses
import sys
from pathlib import Path

import pytest

from tenfold.napari_plugin._widget import PipelineWidget

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from test_export import _demo_result  # noqa: E402  (made-up demo tables: folder plumbing only)

WAIT_MS = 60_000


@pytest.fixture
def widget(make_napari_viewer):
    viewer = make_napari_viewer()
    w = PipelineWidget(viewer)
    w.confirm_overwrite = lambda folder: True
    return w


def _export(qtbot, w, folder):
    w.export(folder)
    if w.worker is not None:
        qtbot.waitUntil(lambda: w.worker is None, timeout=WAIT_MS)


def test_gui_overwrite_keeps_user_files(widget, qtbot, tmp_path, notes):
    widget.session.set_result(_demo_result(), {}, None, [], image="demo")
    out = tmp_path / "res"
    _export(qtbot, widget, out)
    (out / "notes.txt").write_text("mine")
    _export(qtbot, widget, out)
    assert notes["error"] == [], notes["error"]
    assert (out / "notes.txt").read_text() == "mine" and (out / "columns.csv").is_file()


def test_gui_export_into_input_folder_refused(widget, qtbot, tmp_path, notes):
    image = tmp_path / "scan.tif"
    image.write_bytes(b"the user's image")
    result = _demo_result()
    widget.session.set_result(dataclasses.replace(result, meta=dataclasses.replace(result.meta, path=str(image))),
                              {}, None, [], image="demo")
    _export(qtbot, widget, tmp_path)
    assert any("holds the input image" in e for e in notes["error"]), notes
    assert sorted(p.name for p in tmp_path.iterdir()) == ["scan.tif"]
