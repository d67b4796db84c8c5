"""Issue 18: overlays in the image frame, picking and inspecting, results per image, parameters, batch, summary."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from conftest import add_box, layer, run_and_wait
from tenfold.napari_plugin._widget import PipelineWidget, labelled


def test_messages_name_the_dock_controls_not_flags():
    note = ("scan distortion measured (largest element of the correction 0.0130) but not applied; run with "
            "--correct-distortion to compute the structure in the corrected frame")
    text = labelled(note)
    assert "--" not in text and "tick 'correct scan distortion' and run again" in text
    assert labelled("give --min-intensity or correct_distortion") == \
        "give 'Minimum intensity' or 'correct scan distortion'"
    # plain words in prose stay as they are
    assert labelled("phason (real space): only 4 vertices") == "phason (real space): only 4 vertices"


def test_corrected_run_is_drawn_on_the_atoms(make_napari_viewer, sample_path, qtbot, notes):
    # the sheared sample has a 3 % fast-scan shear (its truth file): with the correction the tables move by
    # pixels, the markers must stay on the fitted atom positions of the (unresampled) image
    viewer = make_napari_viewer()
    image, = viewer.open(str(sample_path("decagonal_haadf_sheared")), plugin="tenfold")
    widget = PipelineWidget(viewer)
    viewer.window.add_dock_widget(widget)
    add_box(viewer, image, box=(200.0, 200.0, 560.0, 560.0))
    widget.correct_distortion.setChecked(True)
    run_and_wait(qtbot, widget)
    assert notes["error"] == [], notes["error"]
    result = widget.session.result
    cols = result.tables["columns"]
    assert result.summary["distortion_correction"]["applied"]
    shift = np.hypot(cols["x_px"] - cols["x_raw_px"], cols["y_px"] - cols["y_raw_px"])
    assert shift.max() > 2.0  # the tables are in the corrected frame ...
    drawn = np.asarray(layer(viewer, "columns").data)
    np.testing.assert_allclose(drawn, cols[["y_raw_px", "x_raw_px"]].to_numpy(), atol=1e-6)  # ... the markers not
    # a re-run with nothing edited keeps every column where it was (positions go back to the corrected frame)
    run_and_wait(qtbot, widget, "rerun_from_columns")
    new = widget.session.result.tables["columns"]
    np.testing.assert_allclose(new[["x_px", "y_px"]].to_numpy(), cols[["x_px", "y_px"]].to_numpy(), atol=1e-6)
    assert (new["fit_status"] != "moved").all()


def test_second_click_selects_the_ring_around_the_pentagon(small_run):
    viewer, widget, plots, _ = small_run
    result = widget.session.result
    motifs = result.tables["motifs"]
    rings = motifs[motifs["kind"].str.startswith("ring") & motifs["complete"]]
    inner = motifs[(motifs["kind"] == "pentagon") & motifs["parent_ring"].isin(rings["motif_id"])]
    pent = inner.iloc[0]
    ring_row = int(np.flatnonzero(motifs["motif_id"].to_numpy() == pent["parent_ring"])[0])
    x, y = pent["centre_x_px"], pent["centre_y_px"]
    first = widget.pick(x, y)
    assert first[0] == "motif" and motifs["kind"].iloc[first[1]] == "pentagon"
    seen = {first[1]}
    for _ in range(4):  # further clicks walk outwards: the ring comes, then back to the innermost
        seen.add(widget.pick(x, y)[1])
    assert ring_row in seen
    # with the rings layer active the first click means the ring
    assert widget.pick(x, y, kinds="rings") == ("motif", ring_row)
    assert "ring10" in widget.inspector.text() and "radius (nm)" in widget.inspector.text()
    assert len(layer(viewer, "selected").data) == 10  # its outline, drawn
    col = widget.pick(result.tables["columns"]["x_px"].iloc[7], result.tables["columns"]["y_px"].iloc[7],
                      kinds="columns")
    assert col == ("column", 7)
    text = widget.inspector.text()
    assert "position error (1 sigma) (nm)" in text and "integrated intensity" in text and "pos_err" not in text


def test_summary_tab_and_info_line(small_run):
    from tenfold.analysis.export import summary_table

    viewer, widget, plots, _ = small_run
    plots.tabs.setCurrentWidget(plots.summary_table)
    table = summary_table(widget.session.result)
    assert plots.summary_table.rowCount() == len(table) > 10
    quantities = [plots.summary_table.item(i, 1).text() for i in range(plots.summary_table.rowCount())]
    assert "real space (tiling lift): strain singular value 1" in quantities
    assert any(q.startswith("matrix D[1,1]") for q in quantities)
    plots.tabs.setCurrentWidget(plots.table)
    assert "motifs" in plots.info.text()
    plots.tabs.setCurrentWidget(plots.notes)
    assert plots.info.text() == ""  # the info line belongs to the tab it was written for
    assert plots.image_choice.currentText() == widget.session.image


def test_parameters_round_trip_and_cli_only_options(make_napari_viewer, tmp_path, notes):
    widget = PipelineWidget(make_napari_viewer())
    widget.min_intensity.setText("250")
    widget.nm_fields["tiling_edge_nm"].setText("2.0")
    widget.nm_fields["ladder_r_max_nm"].setText("3.5")
    widget.fourier_window.setCurrentText("periodic_smooth")
    widget.phason.setChecked(False)
    p = widget.parameters()
    assert (p.min_mass, p.tiling_edge_nm, p.ladder_r_max_nm, p.fourier_window, p.phason) == \
        (250.0, 2.0, 3.5, "periodic_smooth", False)
    path = tmp_path / "parameters.toml"
    widget.save_parameters(path)
    assert path.is_file() and notes["error"] == []
    other = PipelineWidget(make_napari_viewer())
    other.load_parameters(path)
    assert other.parameters() == p
    widget.min_intensity.setText("-3")
    widget.save_parameters(path)  # refused: named by its label, the file left as it was
    assert "Minimum intensity" in notes["error"][-1]
    assert other.parameters() == p


def test_stack_frames_average_a_3d_layer(make_napari_viewer, notes):
    from tenfold.napari_plugin._layers import micrograph_from_layer

    viewer = make_napari_viewer()
    base = np.random.default_rng(0).random((32, 32)).astype(np.float32)
    stack = np.stack([base + v for v in (1.0, 2.0, 4.0)])
    ly = viewer.add_image(stack, name="stack")
    mean = micrograph_from_layer(ly, frames="1:3", align=False)  # through io.micrograph_from_array
    np.testing.assert_allclose(mean.data, base + 3.0, rtol=1e-6)
    assert mean.meta.frames == "mean of frames 1-2" and mean.alignment is None
    np.testing.assert_allclose(micrograph_from_layer(ly, frames="2").data, base + 4.0, rtol=1e-6)
    from tenfold.analysis._errors import TenfoldInputError

    with pytest.raises(TenfoldInputError, match="Stack frames"):
        micrograph_from_layer(ly)
    with pytest.raises(TenfoldInputError, match="Stack frames"):
        micrograph_from_layer(ly, frames="2:9")


def test_batch_from_the_dock(make_napari_viewer, sample_path, tmp_path, qtbot, notes):
    import tifffile

    from tenfold.analysis.io import read_micrograph

    data = read_micrograph(str(sample_path("decagonal_haadf_high_dose"))).data
    files = []
    for k, (r, c) in enumerate(((300, 300), (500, 420))):
        path = tmp_path / f"crop{k}.tif"
        tifffile.imwrite(path, data[r:r + 200, c:c + 200])
        files.append(str(path))
    widget = PipelineWidget(make_napari_viewer())
    widget.fourier.setChecked(False)
    widget.batch(files, tmp_path / "batch")
    assert widget.worker is not None
    qtbot.waitUntil(lambda: widget.worker is None, timeout=300_000)
    assert notes["error"] == [], notes["error"]
    table = pd.read_csv(tmp_path / "batch" / "comparison.csv")
    assert len(table) == 2 and (table["status"] == "ok").all()
    assert "batch: 2 images, 0 failed" in widget.status.text()
