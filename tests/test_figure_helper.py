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


# --------------------------------------------------------------------------------------------------------------
# the figure service (export.figure_service): a process forked before the analysis that draws the figures


@pytest.fixture
def service_figures(monkeypatch, four_figures):
    """The four figures of ``four_figures``; FIGURES is changed before the service forks, so it sees the same."""
    monkeypatch.setattr(export, "_warm_up", lambda: None)  # matplotlib is imported already; keeps the tests quick
    return four_figures


def _no_child_left():
    with pytest.raises(ChildProcessError):
        os.waitpid(-1, os.WNOHANG)


def _histogram_saying_where(res):
    """species_histogram, noting the drawing process in the file named by TENFOLD_TEST_PID_FILE."""
    with open(os.environ["TENFOLD_TEST_PID_FILE"], "a") as fh:
        fh.write(f"{os.getpid()}\n")
    return export.species_histogram(res)


def test_service_draws_the_same_files_as_serial(tmp_path, monkeypatch, service_figures):
    res = _demo_result()
    monkeypatch.setenv("TENFOLD_TEST_PID_FILE", str(tmp_path / "pids"))
    monkeypatch.setitem(FIGURES, "histogram_copy", _histogram_saying_where)
    with export.figure_service() as service:
        assert service is not None and export._SERVICE is service
        write_results(res, tmp_path / "service")
    assert export._SERVICE is None
    assert str(os.getpid()) not in (tmp_path / "pids").read_text().split()  # drawn by the service
    _no_child_left()  # the service (and its helper) ended with the block
    monkeypatch.setattr(export, "BACKGROUND_FIGURES", False)
    write_results(res, tmp_path / "serial")
    assert _names(tmp_path / "service") == _names(tmp_path / "serial")
    assert len(_names(tmp_path / "serial")) == 8


def test_service_takes_one_result_only(tmp_path, service_figures):
    res = _demo_result()
    with export.figure_service() as service:
        write_results(res, tmp_path / "first")
        assert not service.takes(res)
        write_results(res, tmp_path / "second")  # drawn here, as without a service
    assert _names(tmp_path / "first") == _names(tmp_path / "second")


def test_service_that_died_leaves_the_figures_to_this_process(tmp_path, service_figures):
    with export.figure_service() as service:
        os.kill(service.state["pid"], 9)
        write_results(_demo_result(), tmp_path / "out")
    assert len(_names(tmp_path / "out")) == 8
    _no_child_left()


def test_unpicklable_maker_is_drawn_here(tmp_path, monkeypatch, service_figures):
    def local_maker(res):  # a function inside a function cannot be sent to another process
        return export.species_histogram(res)

    monkeypatch.setitem(FIGURES, "local_copy", local_maker)
    with export.figure_service():
        write_results(_demo_result(), tmp_path / "out")
    assert "local_copy.png" in _names(tmp_path / "out") and len(_names(tmp_path / "out")) == 10


def test_cancel_while_the_service_draws_leaves_nothing(tmp_path, service_figures):
    seen = []

    def stop_when_waiting(f, m):
        seen.append(m)
        return not m.startswith("waiting for the figures")

    with export.figure_service():
        with pytest.raises(Cancelled):
            write_results(_demo_result(), tmp_path / "out", progress=stop_when_waiting)
        assert seen[-1].startswith("waiting for the figures")
    assert list(tmp_path.iterdir()) == []
    _no_child_left()


def test_no_service_without_figures_or_while_threads_run(monkeypatch):
    with export.figure_service(enabled=False) as service:
        assert service is None and export._SERVICE is None
    monkeypatch.setattr(export, "_fork_is_safe", lambda: False)
    with export.figure_service() as service:
        assert service is None


def test_service_draws_a_stage_figure_early_from_the_result_of_then(tmp_path, monkeypatch, service_figures):
    """After stage_done('columns', ...) the service draws the column figures from the result it was shown; the
    final job writes those (the pipeline calls stage_done only once the columns are final)."""
    early = _demo_result()
    late = _demo_result()
    late.tables["columns"] = late.tables["columns"].iloc[:3]  # differs from what the service was shown
    monkeypatch.setattr(export, "BACKGROUND_FIGURES", False)
    write_results(early, tmp_path / "serial_early")
    write_results(late, tmp_path / "serial_late")
    monkeypatch.setattr(export, "BACKGROUND_FIGURES", True)
    with export.figure_service() as service:
        service.stage_done("columns", early)
        service.stage_done("motifs", early)  # no early figures for this stage: nothing is sent
        write_results(late, tmp_path / "service")
        service.stage_done("columns", late)  # after the final job: nothing is sent
    png = "species_histogram.png"
    got = (tmp_path / "service" / "figures" / png).read_bytes()
    assert got == (tmp_path / "serial_early" / "figures" / png).read_bytes()
    assert got != (tmp_path / "serial_late" / "figures" / png).read_bytes()
    assert (tmp_path / "service" / "figures" / "histogram_copy.png").read_bytes() == \
        (tmp_path / "serial_late" / "figures" / "histogram_copy.png").read_bytes()  # not an early figure
    assert _names(tmp_path / "service") == _names(tmp_path / "serial_late")
    _no_child_left()


def test_service_dying_after_early_figures_leaves_them_to_this_process(tmp_path, service_figures):
    res = _demo_result()
    with export.figure_service() as service:
        service.stage_done("columns", res)
        os.kill(service.state["pid"], 9)
        write_results(res, tmp_path / "out")
    assert len(_names(tmp_path / "out")) == 8
    _no_child_left()
