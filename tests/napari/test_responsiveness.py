"""Issue 18, no freezes: what keeps the GUI thread free, checked by its mechanism (timings live in
``benchmarks/bench_gui.py``, never in tests).

* A second run of an image updates its result layers in place: the same layer objects, no new visual, control
  widget or selection move (each replacement froze the viewer 0.3-0.6 s with software OpenGL).
* With napari's own features table open, an added point and a re-run rebuild that table at most once each (it
  redraws every cell on each ``features`` event: 6-26 s stalls before).
* The plots dock makes its matplotlib figures when a tab is first drawn, not when the dock opens.
"""

from __future__ import annotations

import numpy as np

from conftest import layer, run_and_wait


def test_second_run_updates_the_layers_in_place(small_run, qtbot, notes):
    viewer, widget, plots, image = small_run
    before = {ly.name: ly for ly in viewer.layers}
    n_before = len(viewer.layers)
    n_pentagon_edges = len(layer(viewer, "pentagons").data)
    widget.pentagons.setChecked(False)  # a different result, with the same kinds of layers
    run_and_wait(qtbot, widget)
    assert notes["error"] == [], notes["error"]
    assert len(viewer.layers) == n_before
    for kind in ("columns", "rings", "pentagons", "motif centres", "network", "selected"):
        new = layer(viewer, kind)
        assert new is before[new.name], kind  # the same object, updated
    result = widget.session.result
    points = layer(viewer, "columns")
    assert len(points.data) == len(result.tables["columns"])
    np.testing.assert_allclose(np.asarray(points.data), result.tables["columns"][["y_px", "x_px"]].to_numpy(),
                               atol=1e-6)
    assert points.features["id"].tolist() == result.tables["columns"]["id"].tolist()
    from tenfold.napari_plugin._layers import motif_polygons

    motifs = result.tables["motifs"]
    rings = motifs[motifs["kind"].astype(str).str.startswith("ring")]
    n_ring_edges = sum(len(p) for p in motif_polygons(rings, result.tables["columns"]))  # one edge per vertex
    assert len(layer(viewer, "rings").data) == n_ring_edges
    assert n_pentagon_edges > 0 and len(layer(viewer, "pentagons").data) == 0  # emptied in place
    assert viewer.layers.selection.active is points


def test_features_table_rebuilds_once_per_edit(small_run, qtbot, notes):
    from napari_builtins._qt.features_table import FeaturesTable

    viewer, widget, _, _ = small_run
    table = FeaturesTable(viewer)
    viewer.window.add_dock_widget(table, area="left")
    points = layer(viewer, "columns")
    viewer.layers.selection.active = points
    model = table.table.model().sourceModel()
    rebuilds = []
    replace = model.replace_data
    model.replace_data = lambda df: (rebuilds.append(df), replace(df))[1]
    points.add(np.asarray(points.data)[5][None] + 3.0)
    assert len(rebuilds) == 1  # napari's own event; our id fix is made before it
    shown = rebuilds[-1]["id"].to_numpy()
    assert len(np.unique(shown)) == len(shown)  # the new point's own id, not a copy, is what the table shows
    rebuilds.clear()
    run_and_wait(qtbot, widget, "rerun_from_columns")
    assert notes["error"] == [], notes["error"]
    assert len(rebuilds) <= 1  # at most the columns' new ids; no layer replaced, no selection moved


def test_plots_dock_makes_figures_when_first_drawn(make_napari_viewer):
    from tenfold.napari_plugin._plots import PlotsWidget

    viewer = make_napari_viewer()
    plots = PlotsWidget(viewer)
    viewer.window.add_dock_widget(plots)
    assert plots._figures == {}  # placeholders only
    page = plots._page["pair"]
    figure = plots.pair_figure  # made on first use, where the placeholder was
    assert plots.pair_canvas.parentWidget() is page and "pair" in plots._figures
    assert plots.pair_figure is figure
