"""Screenshot of the Tenfold napari plugin on a bundled sample: docs/images/viewer.png.

Run ``xvfb-run -a -s "-screen 0 1600x1200x24" python docs/make_screenshot.py [--all]`` (or with a display). It
opens the high-dose sample, marks a region, runs the analysis dock, opens the plots dock and saves a window
screenshot; with ``--all`` also one per state a user passes through (``docs/images/state_*.png``: opened, region
drawn, after the run, zoom on a selected cluster, a ring picked with the rings layer active, columns coloured by intensity
with the legend, each plots tab, after an edit and re-run, after export, a run with the scan distortion corrected).
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

os.environ.setdefault("QT_API", "pyside6")

OUT = Path(__file__).resolve().parent / "images" / "viewer.png"
SAMPLE = "decagonal_haadf_high_dose"
#: analysed region (row0, col0, row1, col1) in px, and the view shown (a zoom on part of it)
REGION_PX = (256, 256, 768, 768)
ZOOM = 3.0


def _default_wait(widget) -> None:
    import time

    from qtpy.QtWidgets import QApplication

    while widget.worker is not None:
        QApplication.processEvents()
        time.sleep(0.01)


def make_screenshot(path=OUT, *, viewer=None, wait=None, size=(1500, 900), states: bool = False) -> Path:
    """Analyse a region of the sample in a viewer and save a screenshot of the window.

    Parameters
    ----------
    path : str or Path
        PNG to write.
    viewer : napari.Viewer, optional
        Viewer to use (tests pass their own); a new one is made otherwise.
    wait : callable(widget), optional
        Blocks until ``widget.worker`` is None (tests pass a pytest-qt wait); default: a processEvents loop.
    size : (int, int)
        Window size in pixels.
    states : bool
        Also save ``state_*.png`` beside ``path``, one per step a user goes through.

    Returns
    -------
    Path
        The written file.
    """
    import napari

    from tenfold.napari_plugin._plots import PlotsWidget
    from tenfold.napari_plugin._sample_data import load_sample
    from tenfold.napari_plugin._widget import PipelineWidget

    viewer = viewer or napari.Viewer()
    wait = wait or _default_wait
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)

    def shot(name):
        if states:
            viewer.screenshot(str(path.parent / f"state_{name}.png"), canvas_only=False, flash=False)

    data, kwargs, _ = load_sample(SAMPLE)[0]
    image = viewer.add_image(data, **kwargs)
    widget = PipelineWidget(viewer)
    plots = PlotsWidget(viewer)
    viewer.window.add_dock_widget(widget, name="Tenfold analysis", area="right")
    viewer.window.add_dock_widget(plots, name="Tenfold plots", area="right")
    viewer.window._qt_window.resize(*size)
    shot("1_opened")
    r0, c0, r1, c1 = REGION_PX
    px = image.scale[-1]
    corners = np.array([[r0, c0], [r0, c1], [r1, c1], [r1, c0]], float) * px
    regions = viewer.add_shapes([corners], shape_type="rectangle", name="regions", edge_width=0.08,
                                units=("nm", "nm"))
    assert widget.regions_combo.currentText() == regions.name  # chosen and restyled by the dock
    shot("2_region_drawn")
    widget.run()
    wait(widget)
    viewer.canvas.overlays.scale_bar.visible = True
    viewer.canvas.overlays.scale_bar.font_size = 14
    centre = np.array([(r0 + r1) / 2, (c0 + c1) / 2]) * px
    viewer.reset_view()
    viewer.scene.camera.zoom *= ZOOM
    viewer.scene.camera.center = tuple(centre)
    viewer.layers.selection.active = widget.result_layer("columns")
    widget.colour_by.setCurrentText("species")
    plots.tabs.setCurrentIndex(0)  # summary
    plots.draw_all()
    viewer.screenshot(str(path), canvas_only=False, flash=False)
    if not states:
        return path
    shot("3_after_run")
    plots.tabs.setCurrentWidget(plots.table)  # motifs table
    plots.select_motif_row(0)
    record = widget.session.record
    motif = record.result.tables["motifs"].iloc[int(plots._table_rows[0])]
    widget._show_selection()
    shot("4_zoom_on_a_cluster")
    # with the rings layer active a click in a ring's centre picks the ring (inspector shows it), not the inner
    # pentagon that other layers' clicks pick first
    viewer.layers.selection.active = widget.result_layer("rings")
    widget.pick(motif["centre_x_px"], motif["centre_y_px"], kinds="rings")
    shot("4b_ring_selected_with_the_rings_layer_active")
    widget.colour_by.setCurrentText("intensity")
    shot("4c_coloured_by_intensity")
    widget.colour_by.setCurrentText("species")
    for i in range(plots.tabs.count()):
        plots.tabs.setCurrentIndex(i)
        if plots.tabs.tabText(i) == "Fourier":
            plots.show_power_spectrum()
            wait(plots)  # the plots dock's worker, same protocol
        shot(f"5_plots_{plots.tabs.tabText(i).lower()}")
    points = widget.result_layer("columns")
    points.selected_data = {len(points.data) // 2}
    points.remove_selected()
    widget.rerun_from_columns()
    wait(widget)
    shot("6_after_edit_and_rerun")
    import tempfile

    widget.choose_folder = lambda: tempfile.mkdtemp(prefix="tenfold_shot_")
    widget.export()
    wait(widget)
    shot("7_after_export")
    widget.correct_distortion.setChecked(True)
    widget.run()
    wait(widget)
    shot("8_distortion_corrected_overlays_on_the_atoms")
    widget.correct_distortion.setChecked(False)
    return path


if __name__ == "__main__":
    import sys

    print(make_screenshot(states="--all" in sys.argv))
    os._exit(0)  # skip Qt/vispy teardown
