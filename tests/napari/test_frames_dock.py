"""Issue 19, the dock side of frame series: a stack opens as a stack, 'Align stack' adds the aligned mean and plots
the shifts, runs on 'Stack frames' A:B align through ``io.micrograph_from_array``.

The stacks come from ``synthetic.drifting_stack``, whose frame shifts are known (the generator's truth), written as
an ImageJ TIFF with tifffile (the reference writer) so the plugin's reader opens them like a user's file.
"""

from __future__ import annotations

import numpy as np
import pytest

from conftest import run_and_wait

PX_NM = 0.05
N_FRAMES = 6
BLANK = 3  # a frame with no signal, which the alignment must leave out


@pytest.fixture(scope="module")
def drifting(tmp_path_factory):
    """(path of a 7-frame TIFF stack: 6 drifting frames with a blank one inserted at BLANK, the true shifts of
    the file's frames)."""
    import tifffile

    from tenfold.analysis.synthetic import StressCondition, drifting_stack

    stack, _, shifts, _ = drifting_stack(StressCondition(size_px=256, peak_counts=400.0), n_frames=N_FRAMES,
                                         jump_chance=0.0, rng=7)
    blank = np.full((1, *stack.shape[1:]), float(stack.mean()), np.float32)
    stack = np.concatenate([stack[:BLANK], blank, stack[BLANK:]]).astype(np.float32)
    truth = shifts[["shift_x_px", "shift_y_px"]].to_numpy()
    truth = np.insert(truth, BLANK, np.nan, axis=0)
    path = tmp_path_factory.mktemp("stack") / "drift.tif"
    tifffile.imwrite(path, stack, imagej=True, resolution=(1 / PX_NM, 1 / PX_NM), metadata={"unit": "nm"})
    return path, truth


@pytest.fixture
def stack_dock(make_napari_viewer, drifting, notes):
    from tenfold.napari_plugin._plots import PlotsWidget
    from tenfold.napari_plugin._widget import PipelineWidget

    path, truth = drifting
    viewer = make_napari_viewer()
    layer, = viewer.open(str(path), plugin="tenfold")
    widget = PipelineWidget(viewer)
    plots = PlotsWidget(viewer)
    viewer.window.add_dock_widget(widget)
    viewer.window.add_dock_widget(plots)
    return viewer, widget, plots, layer, truth


def test_stack_opens_as_a_stack(stack_dock, notes):
    viewer, widget, _, layer, truth = stack_dock
    assert np.shape(layer.data) == (N_FRAMES + 1, 256, 256)  # as written, frames first
    np.testing.assert_allclose(layer.scale, [1.0, PX_NM, PX_NM], rtol=1e-6)
    assert "uncalibrated" not in layer.name and notes["error"] == []
    assert widget.align_frames.isChecked() and not widget.nonrigid.isChecked()  # the defaults of issue 19


def test_align_stack_adds_the_aligned_mean_and_plots_the_shifts(stack_dock, qtbot, notes):
    from tenfold.napari_plugin._layers import FRAMES_KEY, META_KEY, VALID_KEY

    viewer, widget, plots, layer, truth = stack_dock
    widget.frames.setText("")  # every frame
    run_and_wait(qtbot, widget, "align_stack")
    assert notes["error"] == [], notes["error"]
    aligned = viewer.layers[f"{layer.name} aligned 0-{N_FRAMES}"]
    assert aligned.data.ndim == 2 and aligned.data.shape == (256, 256)
    np.testing.assert_allclose(aligned.scale, [PX_NM, PX_NM], rtol=1e-6)  # calibrated like the stack
    assert widget.image_combo.currentText() == aligned.name  # the next Run analyses it
    meta = aligned.metadata[META_KEY]
    assert meta["frames"].startswith("aligned mean of frames 0-6") and meta["frames_averaged"] == N_FRAMES
    assert aligned.metadata[VALID_KEY].shape == (256, 256)
    table = aligned.metadata[FRAMES_KEY]["table"]
    used = table["used"].to_numpy(bool)
    assert not used[BLANK] and table["reason"].iloc[BLANK]  # left out, with its reason
    assert used.sum() == N_FRAMES
    # the generator's shifts, recovered (0.1 px: issue 19 asks 0.05 px RMS at a lower dose over 12 frames)
    measured = table[["shift_x_px", "shift_y_px"]].to_numpy(float)
    np.testing.assert_allclose(measured[used], truth[used], atol=0.1)
    # plotted: x and y of the used frames, the left-out frame marked apart, in the Frames tab
    assert plots.tabs.currentWidget() is plots._page["frames"]
    lines = plots.frames_figure.axes[0].lines
    xs = [ln for ln in lines if ln.get_label() == "shift x (used)"][0]
    np.testing.assert_allclose(xs.get_ydata(), truth[used, 0], atol=0.1)
    band = [p for p in plots.frames_figure.axes[0].patches if p.get_label() == "left out"]
    assert len(band) == 1 and band[0].get_x() < BLANK < band[0].get_x() + band[0].get_width()
    assert f"frame {BLANK}: " in plots.frames_label.text()
    assert f"{N_FRAMES} of {N_FRAMES + 1} used" in widget.status.text()


def test_align_errors_are_one_line(stack_dock, qtbot, notes, sample_path):
    viewer, widget, _, layer, _ = stack_dock
    widget.frames.setText("2")
    widget.align_stack()
    assert widget.worker is None and "'Stack frames'" in notes["error"][-1] and "\n" not in notes["error"][-1]
    widget.frames.setText("0:99")
    widget.align_stack()
    assert "'Stack frames'" in notes["error"][-1] and "up to 98" in notes["error"][-1]
    single, = viewer.open(str(sample_path("decagonal_haadf_high_dose")), plugin="tenfold")
    widget.image_combo.setCurrentText(single.name)
    widget.align_stack()
    assert "choose a stack" in notes["error"][-1] and widget.worker is None


def test_align_can_be_cancelled(stack_dock, qtbot, notes):
    viewer, widget, _, layer, _ = stack_dock
    n_layers = len(viewer.layers)
    widget.frames.setText("0:7")
    widget.align_stack()
    widget.cancel()  # at the alignment's first progress report
    qtbot.waitUntil(lambda: widget.worker is None, timeout=60_000)
    assert "cancelled" in widget.status.text() and len(viewer.layers) == n_layers and notes["error"] == []


def test_runs_on_a_stack_align_unless_told_not_to(stack_dock, qtbot, notes):
    viewer, widget, plots, layer, truth = stack_dock
    widget.frames.setText(f"0:{N_FRAMES + 1}")
    run_and_wait(qtbot, widget)
    assert notes["error"] == [], notes["error"]
    result = widget.session.result
    assert result.meta.frames.startswith("aligned mean of frames 0-6")
    frames = result.tables["frames"]
    np.testing.assert_allclose(frames["shift_x_px"].to_numpy()[frames["used"].to_numpy(bool)],
                               truth[~np.isnan(truth[:, 0]), 0], atol=0.1)
    assert len(widget.result_layer("columns").data) > 50
    # the same frames averaged as they are: the plain mean, and a note saying drift smears it
    widget.align_frames.setChecked(False)
    run_and_wait(qtbot, widget)
    result = widget.session.result
    assert result.meta.frames == "mean of frames 0-6" and result.tables.get("frames") is None
    assert any("averaged without alignment" in n for n in result.summary["notes"])


def test_run_on_the_aligned_layer_knows_its_frames(stack_dock, qtbot, notes):
    viewer, widget, plots, layer, _ = stack_dock
    widget.frames.setText("")
    run_and_wait(qtbot, widget, "align_stack")
    run_and_wait(qtbot, widget)  # the aligned mean is the chosen image now
    assert notes["error"] == [], notes["error"]
    result = widget.session.result
    assert result.meta.frames_averaged == N_FRAMES  # the noise model's frame count
    assert result.tables["frames"]["used"].sum() == N_FRAMES  # frames.csv of this run
    assert result.summary["frames"]["n_used"] == N_FRAMES
    assert result.meta.calibration_source == "imagej" and result.meta.pixel_size_nm == pytest.approx(PX_NM)
