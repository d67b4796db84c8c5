"""The six dock bugs of issue 9, each driven through the widgets' values and callbacks."""

from __future__ import annotations

import importlib.util
import itertools
from pathlib import Path

import numpy as np
import pytest
from matplotlib import colormaps
from matplotlib.colors import to_rgba
from scipy.spatial import cKDTree

from conftest import layer, add_box, run_and_wait
from tenfold.napari_plugin._layers import (
    NUMERIC_RANGE,
    SPECIES_PALETTE,
    SPECIES_SYMBOLS,
    UNCLASSIFIED_COLOUR,
)
from tenfold.napari_plugin._widget import PipelineWidget


# ---------------------------------------------------------------- 1. colour columns by
@pytest.mark.parametrize("order", [("intensity", "pos_err_nm", "sigma_px", "residual", "species_prob"),
                                   ("residual", "sigma_px", "intensity")], ids=["forward", "other-order"])
def test_every_numeric_colour_choice_gets_its_own_gradient(small_run, order):
    viewer, widget, _, _ = small_run
    points = layer(viewer, "columns")
    lo_c, hi_c = NUMERIC_RANGE
    for prop in order:
        widget.colour_by.setCurrentText(prop)
        values = widget.session.result.tables["columns"][prop].to_numpy(float)
        face = np.asarray(points.face_color)
        ok = np.isfinite(values)
        if np.unique(values[ok].round(6)).size < 2:  # e.g. species_prob when one class holds every column
            assert len(np.unique(face.round(4), axis=0)) == 1, prop
            continue
        assert len(np.unique(face.round(4), axis=0)) > min(10, np.unique(values[ok].round(6)).size - 1), prop
        lo, hi = np.percentile(values[ok], [2, 98])
        # the feature's own range decides the colours: its low and high ends get the scale's two ends
        np.testing.assert_allclose(face[np.nanargmin(values)], colormaps["viridis"](lo_c), atol=1e-6)
        np.testing.assert_allclose(face[np.nanargmax(values)], colormaps["viridis"](hi_c), atol=1e-6)
        assert f"{lo:.3g}" in widget.colour_note.text() and f"{hi:.3g}" in widget.colour_note.text()
        # the legend is on the canvas too
        text = viewer.canvas.overlays.text
        assert text.visible and prop in text.text and f"{hi:.3g}" in text.text


# ---------------------------------------------------------------- 2. added points
def _empty_spot(points, box):
    """A position inside ``box`` (px) as far as possible from every column."""
    r0, c0, r1, c1 = box
    rr, cc = np.mgrid[r0 + 20:r1 - 20:0.5, c0 + 20:c1 - 20:0.5]
    grid = np.c_[rr.ravel(), cc.ravel()]
    d, _ = cKDTree(np.asarray(points.data)).query(grid)
    return grid[np.argmax(d)], d.max()


def test_added_point_has_no_borrowed_measurements(small_run, qtbot, notes):
    from conftest import SMALL_BOX

    viewer, widget, plots, _ = small_run
    points = layer(viewer, "columns")
    feats = points.features
    victim = int(np.flatnonzero(widget.session.result.tables["columns"]["species"].to_numpy() >= 0)[0])
    victim_id = int(feats["id"].iloc[victim])
    max_id = int(feats["id"].max())
    points.selected_data = {victim}  # napari now takes its features as the defaults for new points
    points.remove_selected()
    spot, clearance = _empty_spot(points, SMALL_BOX)
    assert clearance > 2.0
    points.add(spot[None])
    new = points.features.iloc[-1]
    assert int(new["id"]) == max_id + 1 and int(new["id"]) != victim_id
    np.testing.assert_allclose(points.face_color[-1], to_rgba(UNCLASSIFIED_COLOUR))
    assert points.features["id"].is_unique

    run_and_wait(qtbot, widget, "rerun_from_columns")
    assert notes["error"] == [], notes["error"]
    cols = widget.session.result.tables["columns"]
    row = cols[cols["id"] == max_id + 1].iloc[0]
    # nothing to fit on empty background: kept where it was placed, 'manual', NaN, never borrowed
    assert row["fit_status"] == "manual" and row["species"] == -1
    assert np.isnan(row["intensity"])


def test_rerun_fits_a_column_added_by_hand(small_run, qtbot, notes):
    viewer, widget, _, _ = small_run
    points = layer(viewer, "columns")
    cols = widget.session.result.tables["columns"]
    k = int(np.flatnonzero(cols["fit_status"].isin(["ok", "fixed_width"]).to_numpy())[len(cols) // 2])
    truth = cols.iloc[k]
    points.selected_data = {k}
    points.remove_selected()
    points.add(np.array([[truth["y_px"] - 0.6, truth["x_px"] + 0.8]]))  # placed by eye, a pixel off
    run_and_wait(qtbot, widget, "rerun_from_columns")
    assert notes["error"] == [], notes["error"]
    cols = widget.session.result.tables["columns"]
    row = cols[cols["fit_status"] == "added"].iloc[0]
    # the same fit as detection (a held width counts as fitted), started a pixel off, lands on the detected
    # position and intensity
    assert np.hypot(row["x_px"] - truth["x_px"], row["y_px"] - truth["y_px"]) < 0.3
    assert row["intensity"] == pytest.approx(truth["intensity"], rel=0.2)
    # the marker moved onto the fitted position
    k_new = int(np.flatnonzero(points.features["id"].to_numpy() == row["id"])[0])
    np.testing.assert_allclose(np.asarray(points.data)[k_new], [row["y_px"], row["x_px"]], atol=1e-6)


# ---------------------------------------------------------------- 3. docks from the plugin menu
def test_plugin_menu_docks_share_one_session(make_napari_viewer, sample_path, qtbot, notes):
    viewer = make_napari_viewer()
    image, = viewer.open(str(sample_path("decagonal_haadf_high_dose")), plugin="tenfold")
    _, analysis = viewer.window.add_plugin_dock_widget("tenfold", "Analysis")
    _, plots = viewer.window.add_plugin_dock_widget("tenfold", "Plots")
    assert analysis.session is plots.session
    add_box(viewer, image)
    run_and_wait(qtbot, analysis)
    assert notes["error"] == [], notes["error"]
    plots.tabs.setCurrentWidget(plots.table)
    assert plots.table.rowCount() > 0
    plots.tabs.setCurrentWidget(plots.pair_canvas.parentWidget())  # a tab is drawn when it is opened
    assert len(plots.pair_figure.axes[0].lines) >= 1
    # a second run updates the layers in place through the dock's viewer (napari hands plugin docks a proxy that
    # refuses private names with a warning, an error here)
    points = analysis.result_layer("columns")
    run_and_wait(qtbot, analysis)
    assert notes["error"] == [] and analysis.result_layer("columns") is points


# ---------------------------------------------------------------- 4. a second image
def _dock_on_sample(make_napari_viewer, sample_path):
    """A viewer with the high-dose sample, the analysis dock and the small region drawn."""
    viewer = make_napari_viewer()
    image, = viewer.open(str(sample_path("decagonal_haadf_high_dose")), plugin="tenfold")
    widget = PipelineWidget(viewer)
    viewer.window.add_dock_widget(widget)
    add_box(viewer, image)
    return viewer, widget


def test_second_image_is_chosen_and_its_results_are_on_top(make_napari_viewer, sample_path, qtbot, notes):
    viewer, widget = _dock_on_sample(make_napari_viewer, sample_path)
    run_and_wait(qtbot, widget)
    second, = viewer.open(str(sample_path("decagonal_haadf_vacancies")), plugin="tenfold")
    assert widget.image_combo.currentText() == second.name
    assert widget.regions_combo.currentText() == "(whole image)"
    run_and_wait(qtbot, widget, "preview")
    assert notes["error"] == [], notes["error"]
    names = [ly.name for ly in viewer.layers]
    first = "decagonal_haadf_high_dose"
    for kind in ("columns", "rings", "motif centres", "network"):
        assert names.count(f"{kind} [{second.name}]") == 1
        assert names.index(f"{kind} [{second.name}]") > names.index(second.name), names
        assert f"{kind} [{first}]" in names  # the first image keeps its results
    assert widget.session.image_layer is second
    assert set(widget.session.records) == {first, second.name}
    # selecting a layer of the first image shows its result again
    viewer.layers.selection.active = viewer.layers[f"columns [{first}]"]
    assert widget.session.image == first and widget.session.image_layer is not second


# ---------------------------------------------------------------- 5. power spectrum
def test_power_spectrum_is_a_plot_not_a_layer(small_run, qtbot, notes):
    viewer, _, plots, image = small_run
    n_layers = len(viewer.layers)
    plots.show_power_spectrum()
    qtbot.waitUntil(lambda: plots.worker is None, timeout=60_000)
    assert notes["error"] == [], notes["error"]
    assert len(viewer.layers) == n_layers
    assert {str(u) for ly in viewer.layers for u in ly.units} == {"nanometer"}  # the scale bar keeps its unit
    spec = plots._spectrum
    n = min(image.data.shape)
    assert spec["unit"] == "1/nm"
    assert spec["step"] == pytest.approx(1.0 / (n * image.scale[-1]))  # 1/(N px) per step, in 1/nm
    ax = plots.fourier_figure.axes[0]
    assert len(ax.images) == 1 and "1/nm" in ax.get_xlabel()


# ---------------------------------------------------------------- 6. species colours
def _cvd_matrices():
    # the Machado et al. (2009) simulation matrices already used for the exported figures' palette
    path = Path(__file__).resolve().parents[1] / "test_export.py"
    spec = importlib.util.spec_from_file_location("_export_tests", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module._CVD


def _srgb(hexes):
    return np.array([to_rgba(h)[:3] for h in hexes])


def _relative_luminance(srgb):
    # WCAG 2.0 (W3C Recommendation, 2008), relative luminance of sRGB colours
    lin = np.where(srgb <= 0.04045, srgb / 12.92, ((srgb + 0.055) / 1.055) ** 2.4)
    return lin @ np.array([0.2126, 0.7152, 0.0722])


def test_species_colours_visible_on_dark_and_bright():
    lum = _relative_luminance(_srgb(list(SPECIES_PALETTE) + [UNCLASSIFIED_COLOUR]))
    on_black = (lum + 0.05) / 0.05  # WCAG 2.0 contrast ratio (L1 + 0.05) / (L2 + 0.05)
    on_white = 1.05 / (lum + 0.05)
    assert on_black.min() >= 2.0 and on_white.min() >= 2.0, (on_black, on_white)
    assert len(set(SPECIES_SYMBOLS)) == len(SPECIES_SYMBOLS) >= 8  # n_species goes up to 8


@pytest.mark.parametrize("vision", ["protan", "deutan", "tritan", "normal"])
def test_species_colours_stay_apart_for_colour_blind_vision(vision):
    from skimage.color import deltaE_ciede2000, rgb2lab

    srgb = _srgb(SPECIES_PALETTE)
    lin = np.where(srgb <= 0.04045, srgb / 12.92, ((srgb + 0.055) / 1.055) ** 2.4)
    sim = np.clip(lin @ np.asarray(_cvd_matrices()[vision]).T, 0, 1)
    sim = np.where(sim <= 0.0031308, 12.92 * sim, 1.055 * sim ** (1 / 2.4) - 0.055)
    lab = rgb2lab(sim[None])[0]
    worst = min(deltaE_ciede2000(lab[i], lab[j]) for i, j in itertools.combinations(range(len(lab)), 2))
    # a CIEDE2000 difference above ~10 reads as clearly different colours (common practice); the markers differ
    # in shape too, so colour is never the only cue
    assert worst > 10


def test_five_species_drawn_in_visible_colours(make_napari_viewer, sample_path, qtbot, notes):
    viewer, widget = _dock_on_sample(make_napari_viewer, sample_path)
    widget.species.setValue(5)
    run_and_wait(qtbot, widget)
    assert notes["error"] == [], notes["error"]
    points = layer(viewer, "columns")
    species = widget.session.result.tables["columns"]["species"].to_numpy()
    assert set(species) == {0, 1, 2, 3, 4}
    face = np.asarray(points.face_color)
    for s in range(5):
        np.testing.assert_allclose(face[species == s], np.tile(to_rgba(SPECIES_PALETTE[s]), ((species == s).sum(), 1)))
        assert set(np.asarray(points.symbol)[species == s].astype(str)) == {SPECIES_SYMBOLS[s]}
    lum = _relative_luminance(face[:, :3])
    assert lum.min() > 0.1 and lum.max() < 0.45  # neither near-black nor near-white, on any column
