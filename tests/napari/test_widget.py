"""The analysis dock: regions, run in a worker, cancel, bad input, hand correction, export."""

from __future__ import annotations

from importlib import resources

import numpy as np
import pandas as pd
import pytest
from scipy.spatial import cKDTree

from conftest import layer
from tenfold.napari_plugin._layers import motif_polygons
from tenfold.napari_plugin._plots import PlotsWidget
from tenfold.napari_plugin._widget import PipelineWidget

NAME = "decagonal_haadf_high_dose"
# region analysed in the tests, (row0, col0, row1, col1) in px: a central 320 px square
BOX = (352.0, 352.0, 672.0, 672.0)
WAIT_MS = 120_000


def _truth(kind: str) -> pd.DataFrame:
    return pd.read_csv(resources.files("tenfold.sample_images") / f"{NAME}_{kind}.csv")


def _inside(x, y, box, margin=0.0):
    r0, c0, r1, c1 = box
    return (x >= c0 + margin) & (x <= c1 - margin) & (y >= r0 + margin) & (y <= r1 - margin)


@pytest.fixture
def viewer_widget(make_napari_viewer, sample_path):
    viewer = make_napari_viewer()
    image, = viewer.open(str(sample_path(NAME)), plugin="tenfold")
    widget = PipelineWidget(viewer)
    viewer.window.add_dock_widget(widget, name="Tenfold analysis")
    return viewer, widget, image


def _add_region(viewer, image):
    """A rectangle drawn in a Shapes layer of napari's default scale 1, i.e. vertices in world units (nm)."""
    r0, c0, r1, c1 = BOX
    px = image.scale[-1]
    corners = np.array([[r0, c0], [r0, c1], [r1, c1], [r1, c0]]) * px
    return viewer.add_shapes([corners], shape_type="rectangle", name="regions")


def _run(qtbot, widget, action="run"):
    getattr(widget, action)()
    assert widget.worker is not None
    qtbot.waitUntil(lambda: widget.worker is None, timeout=WAIT_MS)


@pytest.fixture
def analysed(viewer_widget, qtbot, notes):
    viewer, widget, image = viewer_widget
    _add_region(viewer, image)
    assert widget.regions_combo.currentText() == "regions"
    _run(qtbot, widget)
    assert notes["error"] == [], notes["error"]
    return viewer, widget, image


def test_run_in_region_finds_ground_truth_columns_and_rings(analysed):
    viewer, widget, image = analysed
    points = layer(viewer, "columns")
    found = np.asarray(points.data)  # (row, col) = image px, layers share the image's scale
    assert tuple(points.scale) == tuple(image.scale)
    truth = _truth("columns")
    tx, ty = truth["x_px"].to_numpy(), truth["y_px"].to_numpy()
    # recall against truth well inside the box, precision against truth in a slightly larger box: the region
    # test on a border column may go either way by a fraction of a pixel
    inner = _inside(tx, ty, BOX, margin=2.0)
    outer = _inside(tx, ty, BOX, margin=-2.0)
    tree = cKDTree(found[:, ::-1])
    d_inner, _ = tree.query(np.c_[tx[inner], ty[inner]])
    recall = np.mean(d_inner < 1.0)
    d_found, _ = cKDTree(np.c_[tx[outer], ty[outer]]).query(found[:, ::-1])
    precision = np.mean(d_found < 1.0)
    assert inner.sum() > 400  # the box holds a meaningful sample
    assert recall >= 0.95 and precision >= 0.95, (recall, precision)
    # the layer carries only the ids (napari's features table redraws every cell on every edit); the table is the
    # result's, row for row
    assert list(points.features.columns) == ["id"]
    cols = widget.session.result.tables["columns"]
    np.testing.assert_array_equal(points.features["id"], cols["id"])
    assert {"id", "species", "intensity", "pos_err_nm"} <= set(cols.columns)

    feats = widget.session.result.tables["motifs"]
    rings = feats[feats["kind"] == "ring10"]
    truth_m = _truth("motifs")
    truth_rings = truth_m[truth_m["kind"] == "ring10"]
    members = truth.set_index("id")
    # a ground-truth ring is expected when all its members lie inside the box
    full = np.array([
        bool(np.all(_inside(members.loc[ids, "x_px"], members.loc[ids, "y_px"], BOX)))
        for ids in (np.array(m.split(), int) for m in truth_rings["members"])
    ])
    expected = truth_rings[full]
    d, _ = cKDTree(rings[["centre_x_px", "centre_y_px"]].to_numpy()).query(
        expected[["centre_x_px", "centre_y_px"]].to_numpy())
    assert len(expected) >= 20
    assert np.mean(d < 2.0) >= 0.9
    d, _ = cKDTree(truth_rings[["centre_x_px", "centre_y_px"]].to_numpy()).query(
        rings[["centre_x_px", "centre_y_px"]].to_numpy())
    assert np.mean(d < 2.0) >= 0.9
    # one outline segment per ring member, all in the rings layer
    ring_layer = layer(viewer, "rings")
    all_rings = feats[feats["kind"].str.startswith("ring")]
    assert len(ring_layer.data) == sum(len(p) for p in motif_polygons(all_rings, cols))
    for name in ("motif centres", "network", "rings", "pentagons", "selected"):
        assert tuple(layer(viewer, name).scale) == tuple(image.scale)
        assert layer(viewer, name).name == f"{name} [{image.name}]"  # results carry their image
    assert widget.run_button.isEnabled() and not widget.cancel_button.isEnabled()


def test_rerun_updates_layers_in_place_and_colour_by(analysed, qtbot):
    viewer, widget, _ = analysed
    n_layers = len(viewer.layers)
    widget.colour_by.setCurrentText("intensity")
    points = layer(viewer, "columns")
    assert points.face_color.shape == (len(points.data), 4)
    assert len(np.unique(points.face_color, axis=0)) > 3  # a colormap over intensities, not one colour
    _run(qtbot, widget)
    assert len(viewer.layers) == n_layers
    assert [ly.name for ly in viewer.layers].count(f"columns [{widget.session.image}]") == 1


def test_deleting_a_ring_member_then_rerun_makes_it_incomplete(analysed, qtbot, notes):
    viewer, widget, _ = analysed
    motifs = widget.session.result.tables["motifs"]
    ring = motifs[(motifs["kind"] == "ring10") & motifs["complete"]].iloc[0]
    victim = int(ring["members"].split()[0])
    points = layer(viewer, "columns")
    index = int(np.flatnonzero(points.features["id"].to_numpy() == victim)[0])
    n_before = len(points.data)
    points.selected_data = {index}
    points.remove_selected()
    assert len(points.data) == n_before - 1
    _run(qtbot, widget, "rerun_from_columns")
    assert notes["error"] == [], notes["error"]
    assert layer(viewer, "columns") is points  # the edited layer is kept, not replaced
    new = widget.session.result.tables["motifs"]
    d = np.hypot(new["centre_x_px"] - ring["centre_x_px"], new["centre_y_px"] - ring["centre_y_px"])
    same = new[(d < 2.0) & (new["kind"] == "ring10")]
    assert len(same) == 1
    assert not bool(same["complete"].iloc[0])
    assert str(victim) not in same["members"].iloc[0].split()
    assert widget.session.result.summary["columns"]["hand_edited"]


def test_cancel_mid_run_leaves_viewer_consistent(viewer_widget, qtbot, notes):
    viewer, widget, _ = viewer_widget
    names_before = [ly.name for ly in viewer.layers]
    widget._bridge.progress.connect(lambda f, m: widget.cancel())
    _run(qtbot, widget)
    assert [ly.name for ly in viewer.layers] == names_before
    assert "cancelled" in widget.status.text()
    assert widget.run_button.isEnabled() and widget.preview_button.isEnabled()
    assert not widget.cancel_button.isEnabled()
    assert widget.session.result is None
    assert notes["error"] == []


@pytest.mark.parametrize("field, text, expect", [
    ("column_diameter_nm", "-0.1", "Column diameter (nm)"),
    ("column_spacing_nm", "abc", "Column spacing (nm)"),
])
def test_bad_parameter_is_a_notification(viewer_widget, notes, field, text, expect):
    viewer, widget, _ = viewer_widget
    widget.nm_fields[field].setText(text)
    widget.run()
    assert widget.worker is None
    assert len(notes["error"]) == 1 and expect in notes["error"][0]
    assert widget.run_button.isEnabled()


def test_preview_analyses_the_central_square(viewer_widget, qtbot, notes):
    viewer, widget, image = viewer_widget
    _run(qtbot, widget, "preview")
    assert notes["error"] == [], notes["error"]
    pts = np.asarray(layer(viewer, "columns").data)
    world = pts * np.asarray(layer(viewer, "columns").scale) + np.asarray(layer(viewer, "columns").translate)
    px = world / np.asarray(image.scale)
    assert len(px) > 100
    assert px.min() >= 1024 // 2 - 128 - 1 and px.max() <= 1024 // 2 + 128 + 1


def test_estimate_shows_values_next_to_fields(viewer_widget, notes, qtbot):
    import json

    viewer, widget, _ = viewer_widget
    _run(qtbot, widget, "estimate")  # in a worker: the GUI thread stays free
    assert notes["error"] == [], notes["error"]
    truth = json.loads((resources.files("tenfold.sample_images") / f"{NAME}_truth.json").read_text())
    text = widget.estimate_labels["column_spacing"].text()
    assert text.startswith("auto") and text.endswith("nm")
    assert widget.estimates["column_diameter_nm"] > 0
    # the Gaussian sigma of the synthetic columns; the estimate's diameter covers about +-2 sigma
    assert widget.estimates["column_diameter_px"] == pytest.approx(4.5 * truth["sigma_px"], rel=0.35)


def test_export_asks_before_overwriting(analysed, qtbot, tmp_path, notes):
    viewer, widget, _ = analysed
    out = tmp_path / "run1"
    widget.choose_folder = lambda: str(out)
    asked = []
    widget.confirm_overwrite = lambda folder: asked.append(folder) or False
    widget.export()
    qtbot.waitUntil(lambda: widget.worker is None, timeout=WAIT_MS)
    assert notes["error"] == [], notes["error"]
    assert (out / "columns.csv").exists()
    assert asked == []
    stamp = (out / "columns.csv").stat().st_mtime_ns
    widget.export()  # refused by the (injected) user
    assert asked == [out] and widget.worker is None
    assert (out / "columns.csv").stat().st_mtime_ns == stamp
    widget.confirm_overwrite = lambda folder: True
    widget.export()
    qtbot.waitUntil(lambda: widget.worker is None, timeout=WAIT_MS)
    assert notes["error"] == [], notes["error"]
    back = pd.read_csv(out / "columns.csv")
    assert len(back) == len(layer(viewer, "columns").data)


def test_plots_dock_follows_results(analysed, qtbot):
    viewer, widget, image = analysed
    plots = PlotsWidget(viewer)
    viewer.window.add_dock_widget(plots, name="Tenfold plots")
    plots.tabs.setCurrentWidget(plots.table)  # a tab is built when it is opened
    assert plots.table.rowCount() == min(len(widget.session.result.tables["motifs"]), 400)
    plots.tabs.setCurrentWidget(plots.pair_canvas.parentWidget())
    axes = plots.pair_figure.axes
    assert len(axes) == 1 and len(axes[0].lines) >= 1
    plots.select_motif_row(0)
    assert widget.session.selection == ("motif", int(plots._table_rows[0]))
    assert len(layer(viewer, "selected").data) >= 5  # the motif's outline, drawn


def test_added_point_gets_a_new_id_on_rerun(analysed, qtbot, notes):
    viewer, widget, image = analysed
    points = layer(viewer, "columns")
    n = len(points.data)
    old_ids = set(points.features["id"].astype(int))
    points.add(np.array([[500.0, 500.0]]))  # data coordinates of the points layer are image px
    _run(qtbot, widget, "rerun_from_columns")
    assert notes["error"] == [], notes["error"]
    cols = widget.session.result.tables["columns"]
    assert len(cols) == n + 1
    assert cols["id"].is_unique
    new = cols[~cols["id"].isin(old_ids)]
    assert len(new) == 1
    # placed on a column: fitted (moved onto it, width and intensity measured); species unclassified
    assert np.hypot(new["x_px"].iloc[0] - 500.0, new["y_px"].iloc[0] - 500.0) < 3.0
    assert new["species"].iloc[0] == -1
    if new["fit_status"].iloc[0] == "added":
        assert np.isfinite(new["intensity"].iloc[0])
    else:
        assert new["fit_status"].iloc[0] == "manual" and np.isnan(new["intensity"].iloc[0])


def test_uncalibrated_image_runs_in_pixels_with_nan_nm(make_napari_viewer, qtbot, notes, sample_path):
    from tenfold.analysis.io import read_micrograph

    viewer = make_napari_viewer()
    data = read_micrograph(str(sample_path(NAME))).data
    viewer.add_image(data, name="bare")  # no Tenfold metadata, napari's default scale 1 px: uncalibrated
    widget = PipelineWidget(viewer)
    _run(qtbot, widget, "preview")
    assert notes["error"] == [], notes["error"]
    feats = widget.session.result.tables["columns"]
    assert len(feats) > 100
    assert feats["pos_err_nm"].isna().all() and feats["x_nm"].isna().all()
    assert "uncalibrated" in widget.status.text()
    assert widget.session.result.summary["calibrated"] is False
