"""Every result readable in the viewer: status line, plot tabs, clicks that select and zoom, tooltips, styling."""

from __future__ import annotations

import copy
import itertools

import numpy as np
import pytest
from matplotlib.backend_bases import MouseEvent
from qtpy.QtWidgets import QAbstractButton, QComboBox, QLineEdit, QSpinBox, QDoubleSpinBox

from conftest import layer, run_and_wait
from tenfold.napari_plugin._plots import TAU, spacing_check


def _click(canvas, ax, x, y_axes=0.5):
    """A left click on a matplotlib canvas at data x and axes-fraction y, through matplotlib's own event path."""
    canvas.draw()
    y_data = ax.transAxes.transform((0, y_axes))[1]
    px = ax.transData.transform((x, 0))[0]
    event = MouseEvent("button_press_event", canvas, px, y_data, button=1)
    canvas.callbacks.process("button_press_event", event)


def _in_view(viewer, world):
    centre = np.asarray(viewer.scene.camera.center)[-2:]
    lo, hi = world.min(axis=0), world.max(axis=0)
    return np.all(centre >= lo - 1e-6) and np.all(centre <= hi + 1e-6)


def test_status_line_counts_columns_rings_pentagons_tiles(small_run):
    viewer, widget, _, _ = small_run
    result = widget.session.result
    kinds = result.tables["motifs"]["kind"]
    tiles = result.tables["tiles"].groupby("tile")["count"].sum()
    text = widget.status.text()
    assert f"{len(result.tables['columns'])} columns" in text
    assert f"{int(kinds.str.startswith('ring').sum())} rings" in text
    assert f"{int((kinds == 'pentagon').sum())} pentagons" in text
    assert f"{int(tiles.sum())} tiles ({int(tiles.get('thick_rhombus', 0))} thick, " \
           f"{int(tiles.get('thin_rhombus', 0))} thin)" in text


def test_every_control_has_a_tooltip(small_run):
    _, widget, plots, _ = small_run
    kinds = (QLineEdit, QComboBox, QAbstractButton, QSpinBox, QDoubleSpinBox)
    for dock in (widget, plots):
        controls = [w for kind in kinds for w in dock.findChildren(kind) if not _inside_qt_parts(w)]
        assert len(controls) >= (20 if dock is widget else 1)
        bare = [getattr(w, "text", lambda: type(w).__name__)() for w in controls if not w.toolTip()]
        assert bare == [], bare


def _inside_qt_parts(w):
    """True for Qt's own sub-widgets (a table's corner button, a tab bar's scroll arrows, a combo's line edit)."""
    from qtpy.QtWidgets import QAbstractItemView, QAbstractSpinBox, QTabBar

    p = w.parent()
    while p is not None:
        if isinstance(p, (QAbstractItemView, QTabBar, QComboBox, QAbstractSpinBox)):
            return True
        p = p.parent()
    return False


def test_preview_note_is_information_not_warning(make_napari_viewer, sample_path, qtbot, notes):
    from tenfold.napari_plugin._widget import PipelineWidget

    viewer = make_napari_viewer()
    viewer.open(str(sample_path("decagonal_haadf_high_dose")), plugin="tenfold")
    widget = PipelineWidget(viewer)
    run_and_wait(qtbot, widget, "preview")
    assert any(n.startswith("preview:") for n in notes["info"])
    assert not any("preview" in n for n in notes["warning"])


def test_pair_peak_click_selects_the_pairs_and_zooms(small_run):
    viewer, _, plots, _ = small_run
    plots.tabs.setCurrentWidget(plots.pair_canvas.parentWidget())  # a tab is drawn when it is opened
    result = plots.session.result
    peaks = result.tables["pair_peaks"]
    first = peaks[peaks["set"] == "columns"].sort_values("distance_px").iloc[0]
    ps = result.meta.pixel_size_nm
    _click(plots.pair_canvas, plots._pair_ax, first["distance_px"] * ps)
    points = layer(viewer, "columns")
    chosen = np.array(sorted(points.selected_data))
    assert len(chosen) > 0.8 * len(points.data)  # nearest neighbours: nearly every column has one
    xy = result.tables["columns"][["x_px", "y_px"]].to_numpy()
    from scipy.spatial import cKDTree

    d, _ = cKDTree(xy).query(xy[chosen], k=2)
    width = max(2 * first["width_px"], 0.02 * first["distance_px"])
    assert np.all(d[:, 1] <= first["distance_px"] + width + 1e-9)  # each has a partner within the peak
    world = np.asarray(points.data)[chosen] * points.scale + points.translate
    assert _in_view(viewer, world)
    assert viewer.layers.selection.active is points


def test_histogram_bar_click_selects_those_columns(small_run):
    viewer, _, plots, _ = small_run
    cols = plots.session.result.tables["columns"]
    inten = cols["intensity"].to_numpy(float)
    target = float(np.nanmedian(inten))
    plots.tabs.setCurrentWidget(plots.species_canvas.parentWidget())
    _click(plots.species_canvas, plots._species_ax, target)
    bins = plots._bins
    k = np.searchsorted(bins, target) - 1
    expect = set(np.flatnonzero((inten >= bins[k]) & (inten < bins[k + 1])).tolist())
    points = layer(viewer, "columns")
    assert points.selected_data == expect and len(expect) > 0


def test_motif_table_shows_ten_rows_with_columns_not_cut(small_run, qtbot):
    viewer, _, plots, _ = small_run
    plots.tabs.setCurrentWidget(plots.table)
    viewer.window.show()  # napari's default window size
    qtbot.waitUntil(lambda: plots.table.isVisible())
    table = plots.table
    assert table.rowCount() >= 10
    rows_visible = table.viewport().height() / table.rowHeight(0)
    assert rows_visible >= 10, rows_visible
    for j in range(table.columnCount()):
        need = max(table.sizeHintForColumn(j), table.horizontalHeader().sectionSizeHint(j))
        assert table.columnWidth(j) >= need, table.horizontalHeaderItem(j).text()
    plots.select_motif_row(3)
    index = int(plots._table_rows[3])
    assert plots.session.selection == ("motif", index)
    selected = layer(viewer, "selected")
    starts = np.asarray(selected.data)[:, 0]
    assert len(starts) >= 5  # its outline: one segment per member
    world = starts * selected.scale + selected.translate
    assert _in_view(viewer, world)


def test_tau_labels_are_powers_and_do_not_overlap(small_run):
    _, _, plots, _ = small_run
    plots.tabs.setCurrentWidget(plots.pair_canvas.parentWidget())
    plots.pair_canvas.draw()
    renderer = plots.pair_canvas.get_renderer()
    texts = [t for t in plots._pair_ax.texts if "tau" in t.get_text()]
    assert len(texts) >= 3
    assert all(t.get_text().startswith(r"$\tau^{") for t in texts)  # rendered as tau with a superscript
    boxes = [t.get_window_extent(renderer) for t in texts]
    for a, b in itertools.combinations(boxes, 2):
        assert not a.overlaps(b)


def test_tiling_fourier_and_notes_tabs_show_the_results(small_run):
    _, _, plots, _ = small_run
    summary = plots.session.result.summary
    for i in range(plots.tabs.count()):  # each tab is built when it is opened
        plots.tabs.setCurrentIndex(i)
    counts = summary["tiling"]["tile_counts"]
    text = plots.tiling_label.text()
    assert f"thick rhombi {counts['thick_rhombus']}" in text and f"thin rhombi {counts['thin_rhombus']}" in text
    assert f"{TAU:.3f}" in text
    assert len(plots.tiling_figure.axes[0].collections) == 1  # the tiling map
    order = summary["fourier"]["rotational_order"]
    assert f"{order}-fold" in plots.fourier_label.text()
    assert plots.spots_table.rowCount() == len(summary["fourier"]["shells"])
    ladder = plots.session.result.tables["ladder"]
    assert plots.ladder_table.rowCount() == len(ladder)
    dev = float(plots.ladder_table.item(0, 4).text())
    assert dev == pytest.approx(ladder["deviation_pct"].iloc[0], rel=1e-3, abs=1e-6)
    for note in summary["notes"]:
        assert note in plots.notes.toPlainText()


def test_spacing_check_against_the_first_pair_peak(small_run):
    _, _, plots, _ = small_run
    result = plots.session.result
    assert spacing_check(result) is None  # automatic spacing agrees with the data
    wrong = copy.copy(result)
    wrong.summary = copy.deepcopy(result.summary)
    wrong.summary["automatic"]["spacing"]["value_px"] *= 1.5
    message = spacing_check(wrong)
    used = wrong.summary["automatic"]["spacing"]["value_px"]
    peaks = result.tables["pair_peaks"]
    first = peaks[peaks["set"] == "columns"]["distance_px"].min()
    assert message is not None and f"{100 * (used / first - 1):+.0f} %" in message
    assert "Column spacing (nm)" in message


def test_overlays_do_not_hide_each_other(small_run):
    viewer, widget, _, _ = small_run
    regions = viewer.layers["regions"]
    assert np.all(np.asarray(regions.face_color)[:, 3] == 0)  # region outline only
    rings, pentagons = layer(viewer, "rings"), layer(viewer, "pentagons")
    assert len(rings.data) and len(pentagons.data)
    assert pentagons.edge_width < rings.edge_width  # pentagons thinner ...
    names = [ly.name for ly in viewer.layers]
    assert names.index(pentagons.name) > names.index(rings.name)  # ... and drawn above the rings
    centres = layer(viewer, "motif centres")
    assert {str(s) for s in np.atleast_1d(centres.symbol)} == {"ring"}  # hollow: a centre column shows through
    assert centres.size.min() > layer(viewer, "columns").size.max()
    assert names.index(centres.name) < names.index(layer(viewer, "columns").name)  # and drawn below the columns
