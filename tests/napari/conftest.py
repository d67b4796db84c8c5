"""GUI-test set-up: Qt binding, napari's ``make_napari_viewer`` fixture, shared helpers.

Run with ``xvfb-run -a pytest tests/napari``. napari's pytest plugin (``napari.utils._testsupport``) is loaded
through its entry point; it is named here too so the fixture is found even with plugin autoload disabled.
"""

from __future__ import annotations

import os

os.environ.setdefault("QT_API", "pyside6")

import pytest  # noqa: E402

pytest.importorskip("napari")
pytest.importorskip("qtpy")

if os.environ.get("PYTEST_DISABLE_PLUGIN_AUTOLOAD"):
    pytest_plugins = ["napari.utils._testsupport", "pytestqt.plugin"]

# napari 0.9 / its pydantic, vispy and Qt stack warn about their own deprecations while a viewer is built; these
# are not ours to fix, so they are ignored for the GUI tests only (matched by category and origin).
_THIRD_PARTY_NOISE = (
    "ignore::pydantic.warnings.PydanticDeprecatedSince20",
)


def pytest_collection_modifyitems(config, items):
    here = os.path.dirname(__file__)
    for item in items:
        if str(item.fspath).startswith(here):
            item.add_marker(pytest.mark.gui)
            for spec in _THIRD_PARTY_NOISE:
                item.add_marker(pytest.mark.filterwarnings(spec))


@pytest.fixture
def notes(monkeypatch):
    """Record napari notifications (error / warning / info) instead of showing them; returns the lists."""
    import napari.utils.notifications as nn

    seen = {"error": [], "warning": [], "info": []}
    monkeypatch.setattr(nn, "show_error", lambda msg: seen["error"].append(str(msg)))
    monkeypatch.setattr(nn, "show_warning", lambda msg: seen["warning"].append(str(msg)))
    monkeypatch.setattr(nn, "show_info", lambda msg: seen["info"].append(str(msg)))
    return seen


@pytest.fixture
def sample_path():
    """Path of a bundled sample micrograph by name."""
    from importlib import resources

    def _path(name: str):
        return resources.files("tenfold.sample_images") / f"{name}.tif"

    return _path


@pytest.hookimpl(tryfirst=True, hookwrapper=True)
def pytest_runtest_makereport(item, call):
    # napari's viewer fixture reads item.rep_call in its teardown; napari's own test suite sets it in a conftest
    outcome = yield
    report = outcome.get_result()
    setattr(item, "rep_" + report.when, report)
    if report.when == "setup" and report.failed:
        item.rep_call = report  # the call phase never runs; napari's teardown still looks for it


WAIT_MS = 120_000
#: a central 256 px square of the 1024 px samples, (row0, col0, row1, col1) in px: small enough for quick runs
SMALL_BOX = (384.0, 384.0, 640.0, 640.0)


def run_and_wait(qtbot, widget, action="run", *args):
    """Press one of the dock's actions and wait (pytest-qt, no sleeps) until its worker is done."""
    getattr(widget, action)(*args)
    assert widget.worker is not None, f"{action} started no worker"
    qtbot.waitUntil(lambda: widget.worker is None, timeout=WAIT_MS)


def add_box(viewer, image, box=SMALL_BOX, name="regions"):
    """A rectangle in a Shapes layer of napari's default scale 1 (vertices in world nm)."""
    import numpy as np

    r0, c0, r1, c1 = box
    corners = np.array([[r0, c0], [r0, c1], [r1, c1], [r1, c0]]) * image.scale[-1]
    return viewer.add_shapes([corners], shape_type="rectangle", name=name)


@pytest.fixture
def small_run(make_napari_viewer, sample_path, qtbot, notes):
    """A viewer with the high-dose sample, the analysis and plots docks, and a finished run on SMALL_BOX."""
    from tenfold.napari_plugin._plots import PlotsWidget
    from tenfold.napari_plugin._widget import PipelineWidget

    viewer = make_napari_viewer()
    image, = viewer.open(str(sample_path("decagonal_haadf_high_dose")), plugin="tenfold")
    widget = PipelineWidget(viewer)
    plots = PlotsWidget(viewer)
    viewer.window.add_dock_widget(widget, name="Tenfold analysis")
    viewer.window.add_dock_widget(plots, name="Tenfold plots")
    add_box(viewer, image)
    run_and_wait(qtbot, widget)
    assert notes["error"] == [], notes["error"]
    return viewer, widget, plots, image


def layer(viewer, kind, image=None):
    """The result layer of this kind ('columns', 'rings', ...): of ``image``, or the only one in the viewer."""
    from tenfold.napari_plugin._layers import kind_of

    found = [ly for ly in viewer.layers if kind_of(ly.name)[0] == kind
             and (image is None or kind_of(ly.name)[1] == image)]
    assert len(found) == 1, [ly.name for ly in viewer.layers]
    return found[0]
