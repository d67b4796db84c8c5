"""Figures drawn partly in a forked helper process (export.BACKGROUND_FIGURES): the same files as a serial run,
all-or-nothing on cancel, and a failed helper's figures drawn by the parent instead."""

from __future__ import annotations

import os
import sys

import pytest

from tenfold.analysis import export
from tenfold.analysis._errors import Cancelled
from tenfold.analysis.export import FIGURES, write_results
from test_export import _demo_result

pytestmark = pytest.mark.skipif(not sys.platform.startswith("linux"), reason="the helper process needs Linux")


@pytest.fixture
def four_figures(monkeypatch):
    """This module's two makers plus two more, so both the helper and the parent draw some; the helper is used
    even when earlier tests left idle threads behind (the one-thread rule protects GUIs, not this test)."""
    monkeypatch.setattr(export, "_fork_is_safe", lambda: True)
    monkeypatch.setattr(export, "_load_figure_modules", lambda: None)
    for k in list(FIGURES):
        if k not in ("species_histogram", "columns_overlay"):
            monkeypatch.delitem(FIGURES, k)
    monkeypatch.setitem(FIGURES, "overlay_copy", export.columns_overlay)
    monkeypatch.setitem(FIGURES, "histogram_copy", export.species_histogram)
    return FIGURES


def _names(folder):
    return sorted(p.name for p in (folder / "figures").iterdir())


def test_helper_writes_the_same_files_as_serial(tmp_path, monkeypatch, four_figures):
    res = _demo_result()
    write_results(res, tmp_path / "helper")
    monkeypatch.setattr(export, "BACKGROUND_FIGURES", False)
    write_results(res, tmp_path / "serial")
    assert _names(tmp_path / "helper") == _names(tmp_path / "serial")
    assert len(_names(tmp_path / "serial")) == 8  # four figures, PNG and SVG


def test_cancel_while_waiting_for_the_helper_leaves_nothing(tmp_path, four_figures):
    seen = []

    def stop_when_waiting(f, m):
        seen.append(m)
        return not m.startswith("waiting for the figures")

    with pytest.raises(Cancelled):
        write_results(_demo_result(), tmp_path / "out", progress=stop_when_waiting)
    assert seen[-1].startswith("waiting for the figures")  # cancelled while the helper was drawing
    assert list(tmp_path.iterdir()) == []
    with pytest.raises(ChildProcessError):  # the helper was killed and reaped: no child is left behind
        os.waitpid(-1, os.WNOHANG)


def test_failed_helper_figures_are_drawn_here(tmp_path, monkeypatch, four_figures):
    parent = os.getpid()

    def dies_in_helper(res):
        if os.getpid() != parent:
            os._exit(3)  # the helper process dies without a word
        return export.species_histogram(res)

    monkeypatch.setitem(FIGURES, "species_histogram", dies_in_helper)
    write_results(_demo_result(), tmp_path / "out")
    assert "species_histogram.png" in _names(tmp_path / "out") and len(_names(tmp_path / "out")) == 8


def test_no_fork_while_other_threads_run():
    import threading

    stop = threading.Event()
    t = threading.Thread(target=stop.wait)
    t.start()
    try:
        assert not export._fork_is_safe()  # a GUI (or any threaded caller) draws every figure itself
    finally:
        stop.set()
        t.join()
