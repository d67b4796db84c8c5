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
