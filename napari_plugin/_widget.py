"""The analysis dock: pick an image and regions, set parameters, run, correct by hand, export.

It only wires fields to :mod:`tenfold.analysis.pipeline`. Jobs run in a helper process (``_compute``), waited for
by a napari worker thread; the pipeline's progress callback feeds the progress bar and reads the cancel flag; the
micrograph is built in the helper too (frame choice and alignment of a stack through
``io.micrograph_from_array``), and the result layers in the worker thread, so the GUI thread only updates or
inserts finished layers (see docs/napari.md, Responsiveness).
"""

from __future__ import annotations

import math
import threading
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from qtpy.QtCore import QObject, Qt, QTimer, Signal
from qtpy.QtWidgets import (
    QCheckBox,
    QComboBox,
    QDoubleSpinBox,
    QFileDialog,
    QFormLayout,
    QGroupBox,
    QHBoxLayout,
    QLabel,
    QLineEdit,
    QMessageBox,
    QProgressBar,
    QPushButton,
    QScrollArea,
    QSpinBox,
    QVBoxLayout,
    QWidget,
)

from tenfold.analysis._lengths import DIAMETER_PER_SIGMA

from ._layers import (
    HIGHLIGHT_COLOUR,
    RESULT_KINDS,
    MotifPicker,
    circle,
    colour_kwargs,
    columns_from_points,
    display_maps,
    frame_of,
    highlight_vectors,
    kind_of,
    layer_name,
    motif_polygons,
    readable,
    regions_from_shapes,
    result_layers,
)
from ._session import session_for


__all__ = ["PipelineWidget", "PREVIEW_SIZE_PX"]

#: Side of the central square a preview analyses.
PREVIEW_SIZE_PX = 256
_WHOLE_IMAGE = "(whole image)"
#: Outline colour of the regions chosen for analysis (no fill, so the image stays visible).
REGION_COLOUR = "#e8e8e8"
_COLOUR_PROPS = ("species", "intensity", "pos_err_nm", "sigma_px", "residual", "species_prob", "region",
                 "fit_status")
_NM_FIELDS = (  # (Parameters name, label, estimate key)
    ("column_spacing_nm", "Column spacing (nm)", "column_spacing"),
    ("column_diameter_nm", "Column diameter (nm)", "column_diameter"),
    ("ring_radius_nm", "Ring radius (nm)", None),
    ("d0_nm", "Ladder base d0 (nm)", None),
    ("ladder_r_max_nm", "Ladder range (nm)", None),
    ("tiling_edge_nm", "Tiling edge (nm)", None),
)
_WINDOWS = ("hann", "periodic_smooth")
#: Pause between inserting two result layers (ms): the canvas paints in between.
_INSERT_GAP_MS = 20


@dataclass
class _Outcome:
    """What a worker hands back: never raises, so no traceback dialog can appear."""

    status: str  # 'ok' | 'cancelled' | 'error'
    message: str = ""
    result: object = None
    layers: list = field(default_factory=list)
    kind: str = "run"


class _Bridge(QObject):
    """Carries progress from the worker thread to the GUI thread (queued signal)."""

    progress = Signal(float, str)


def _job(kind, compute, frame, cancel, emit, build_columns, colour_by, image=None) -> _Outcome:
    """Worker body: run ``compute = (fn, args, kwargs)`` in the helper process (see ``_compute``), build the
    result layers here, report every failure as text."""
    from tenfold.analysis._errors import Cancelled, TenfoldInputError

    from ._compute import run_in_process

    fn, args, kwargs = compute
    try:
        result = run_in_process(fn, *args, emit=emit, cancel=cancel, **kwargs)
        if frame is None:  # export, estimate, align: no result layers; export returns its message
            return _Outcome("ok", message=result if isinstance(result, str) else "", result=result, kind=kind)
        emit(1.0, "building layers")
        layers = result_layers(result, frame, image=image, columns=build_columns, colour_by=colour_by)
        if cancel.is_set():
            raise Cancelled("cancelled")
        return _Outcome("ok", result=result, layers=layers, kind=kind)
    except Cancelled:
        return _Outcome("cancelled", "cancelled", kind=kind)
    except TenfoldInputError as exc:
        return _Outcome("error", str(exc), kind=kind)
    except Exception as exc:  # anything else is shown as a notification with its message, not a dialog
        return _Outcome("error", f"{kind} failed: {type(exc).__name__}: {exc}", kind=kind)


#: Parameters' Python names to the labels the dock shows them under (error messages name the field as labelled).
_LABELS = {"pixel_size_nm": "Pixel size (nm)", **{name: label for name, label, _ in _NM_FIELDS},
           "n_species": "Species", "ring_order": "Ring order", "radius_tolerance": "Radius tolerance",
           "dark_columns": "Contrast", "flatten": "flatten uneven background", "pentagons": "pentagons",
           "half_step": "half-step ladder", "fourier": "Fourier spots", "min_mass": "Minimum intensity",
           "correct_distortion": "correct scan distortion", "phason": "phason analysis",
           "fourier_window": "Fourier window"}
#: Command-line flags named in pipeline notes, and the dock control that does the same.
_FLAGS = {"--correct-distortion": "correct scan distortion", "--pixel-size": "Pixel size (nm)",
          "--column-spacing": "Column spacing (nm)", "--column-diameter": "Column diameter (nm)",
          "--ring-radius": "Ring radius (nm)", "--ladder-base": "Ladder base d0 (nm)",
          "--ladder-range": "Ladder range (nm)", "--tiling-edge": "Tiling edge (nm)",
          "--min-intensity": "Minimum intensity", "--species": "Species", "--ring-order": "Ring order",
          "--radius-tolerance": "Radius tolerance", "--dark-columns": "Contrast", "--flatten":
          "flatten uneven background", "--no-fourier": "Fourier spots", "--no-phason": "phason analysis",
          "--no-pentagons": "pentagons", "--half-step": "half-step ladder", "--fourier-window": "Fourier window",
          "--frames": "Stack frames", "--frame": "Stack frames"}


def labelled(message: str) -> str:
    """A pipeline message with parameter names replaced by the dock's field labels."""
    import re

    # the viewer draws every overlay back in the image's frame (see result_layers): no offset to warn about there
    message = re.sub(r"the image itself is not resampled, so overlays on it are offset by up to [0-9.]+ px",
                     "the image is not resampled; the viewer draws the overlays back in the image's frame, on the "
                     "atoms", message)
    for flag, label in sorted(_FLAGS.items(), key=lambda kv: -len(kv[0])):
        message = re.sub(rf"\brun with {re.escape(flag)}\b", f"tick '{label}' and run again", message)
        message = re.sub(rf"(?<![\w-]){re.escape(flag)}(?![\w-])", f"'{label}'", message)
    for name, label in sorted(_LABELS.items(), key=lambda kv: -len(kv[0])):
        message = re.sub(rf"\bparameters? {name}\b", f"'{label}'", message)
        if "_" in name:  # plain words (phason, fourier, flatten) also occur in prose
            message = re.sub(rf"(?<!')\b{name}\b", f"'{label}'", message)
    return message


#: Notes that describe the run rather than warn about it (shown as information).
_INFO_NOTES = ("preview:",)


def status_counts(result) -> str:
    """'N columns, N rings, N pentagons, N tiles (N thick, N thin)' for the status line."""
    tables = result.tables
    kinds = tables["motifs"]["kind"].astype(str) if len(tables["motifs"]) else None
    n_rings = int(kinds.str.startswith("ring").sum()) if kinds is not None else 0
    n_pent = int((kinds == "pentagon").sum()) if kinds is not None else 0
    tiles = tables.get("tiles")
    counts = tiles.groupby("tile")["count"].sum() if tiles is not None and len(tiles) else {}
    n_tiles = int(sum(counts.values)) if len(counts) else 0
    thick, thin = int(counts.get("thick_rhombus", 0)), int(counts.get("thin_rhombus", 0))
    return (f"{len(tables['columns'])} columns, {n_rings} rings, {n_pent} pentagons, {n_tiles} tiles "
            f"({thick} thick, {thin} thin)")


_FROZEN = False


def _freeze_startup_objects() -> None:
    """Move every object alive once napari and Tenfold are loaded into the collector's permanent generation.

    napari runs a full ``gc.collect()`` whenever a layer is removed; with the ~350 000 objects of napari, Qt,
    pandas and scipy that took 0.6-1 s of frozen GUI per removal on our test machine. Those objects live as long
    as the viewer anyway; objects made later (results, layers) are still collected as usual.
    """
    global _FROZEN
    if not _FROZEN:
        import gc

        gc.freeze()  # no collect first: it took most of a second, and what little garbage it would free is tiny
        _FROZEN = True


def _rgba(hex_colour: str) -> np.ndarray:
    """'#rrggbb' as RGBA floats (without importing matplotlib, which costs a second on the GUI thread)."""
    return np.array([int(hex_colour[i:i + 2], 16) / 255 for i in (1, 3, 5)] + [1.0])


def _nm_text(value) -> str:
    return "-" if value is None or not math.isfinite(value) else f"{value:.3g}"


_WARMED = threading.Event()


def _warm_numba_in_background() -> None:
    """Compile (or load from numba's on-disk cache) napari's shape triangulation in a daemon thread, once.

    napari compiles it on the GUI thread the first time a shape is drawn (a regions rectangle), which froze the
    viewer 14-22 s because installing Tenfold installs numba; Tenfold's own kernels run in the helper process,
    which warms them (and this cache) when it starts.
    """
    if _WARMED.is_set():
        return
    _WARMED.set()

    def warm():
        try:
            from napari.layers.shapes._accelerated_triangulate_dispatch import warmup_numba_cache

            warmup_numba_cache()
        except Exception:  # noqa: BLE001 - a private napari helper that may move: napari then warms it itself
            pass

    threading.Thread(target=warm, name="tenfold-numba-warm-up", daemon=True).start()


#: Characters whose glyphs are made ahead, in idle time (legend, scale bar, status text on the canvas).
_GLYPHS = "0123456789.-+ " + "abcdefghijklmnopqrstuvwxyz" + "\u00b5():;,"  # the scale bar's and legend's
_MORE_GLYPHS = "ABCDEFGHIJKLMNOPQRSTUVWXYZ" + "[]/%=_'\"!?<>*#&"


def _warm_canvas(viewer) -> None:
    """Prepare, one step per event-loop turn while the user sets up the first run, what the first result shows on
    the canvas: the scale bar and the legend's text overlay (napari builds their visuals when they first become
    visible, about 0.1 s each) and the font's glyphs.

    vispy draws canvas text from a signed-distance-field atlas that napari fills on the GUI thread, 20-40 ms per
    new character (rendered at 256 pt and blurred on the CPU), during the paint that first shows it: the first
    run's legend froze the viewer for about half a second. One step per turn keeps each far below that;
    characters already made cost nothing.
    """
    viewer = getattr(viewer, "__wrapped__", viewer)  # a plugin dock's viewer proxy refuses private names
    overlays = viewer.canvas.overlays

    def show_text():
        if not overlays.text.visible:
            overlays.text.text = ""  # nothing to read yet; the legend fills it
            overlays.text.visible = True

    overlays_on = [lambda: setattr(overlays.scale_bar, "visible", True), show_text]
    try:  # napari's canvas internals: without them the glyphs are made when first drawn, as before
        info = viewer.window._qt_viewer.canvas._font_info
        font = info.font_manager.get_font(info.face)
        # the characters first: an overlay shown before its glyphs exist makes them all in one paint
        steps = [lambda c=c: font[c] for c in _GLYPHS] + overlays_on + [lambda c=c: font[c] for c in _MORE_GLYPHS]
    except Exception:  # noqa: BLE001
        steps = overlays_on

    def step():
        if steps:
            try:
                steps.pop(0)()
            except Exception:  # noqa: BLE001 - a glyph this font lacks is made (or not) when drawn
                pass
            QTimer.singleShot(5, step)

    QTimer.singleShot(200, step)


class PipelineWidget(QWidget):
    """Tenfold analysis dock.

    Attributes usable from scripts and tests: ``run()``, ``preview()``, ``cancel()``, ``rerun_from_columns()``,
    ``export(folder=None)``, ``estimate()``, ``load_parameters(path=None)``, ``save_parameters(path=None)``,
    ``batch(inputs=None, folder=None)``, ``result_layer(kind)``, ``pick(x_px, y_px, kinds=None)``;
    ``choose_folder``, ``choose_open_file``, ``choose_save_file``, ``choose_images`` and ``confirm_overwrite``
    are replaceable callables (the defaults open Qt dialogs); ``worker`` is the running worker or None.
    """

    def __init__(self, napari_viewer) -> None:
        super().__init__()
        _freeze_startup_objects()
        QTimer.singleShot(0, _warm_numba_in_background)  # after the docks are built (see _plots)
        from ._compute import start

        start()  # the helper process loads the analysis code while the user sets up the first run
        # the viewer itself, not the proxy napari hands a plugin dock: updating layers in place uses a few of
        # napari's private switches (see _layers.set_quietly), which the proxy refuses with a warning
        self.viewer = getattr(napari_viewer, "__wrapped__", napari_viewer)
        self.session = session_for(napari_viewer)
        self.worker = None
        self._cancel = threading.Event()
        self._bridge = _Bridge()
        self._bridge.progress.connect(self._on_progress)
        self.choose_folder = self._ask_folder
        self.confirm_overwrite = self._ask_overwrite
        self.choose_open_file = lambda: QFileDialog.getOpenFileName(
            self, "Load Tenfold parameters", "", "Parameters (*.toml)")[0] or None
        self.choose_save_file = lambda: QFileDialog.getSaveFileName(
            self, "Save Tenfold parameters", "parameters.toml", "Parameters (*.toml)")[0] or None
        self.choose_images = lambda: QFileDialog.getOpenFileNames(self, "Images for the batch")[0] or None
        self._px_lengths: dict = {}
        self._build()
        for ev in (napari_viewer.layers.events.inserted, napari_viewer.layers.events.removed,
                   napari_viewer.layers.events.moved):
            ev.connect(self._refresh_layers)
        napari_viewer.layers.selection.events.active.connect(self._on_active_layer)
        napari_viewer.mouse_drag_callbacks.append(self._on_click)
        self.session.selected.connect(self._show_selection)
        self.session.changed.connect(self._on_session_changed)
        self._refresh_layers()
        self._set_busy(False)
        _warm_canvas(self.viewer)

    # ---------------------------------------------------------------- layout
    def _build(self) -> None:
        outer = QVBoxLayout(self)
        outer.setContentsMargins(0, 0, 0, 0)
        scroll = QScrollArea()
        scroll.setWidgetResizable(True)
        inner = QWidget()
        scroll.setWidget(inner)
        outer.addWidget(scroll)
        root = QVBoxLayout(inner)

        box = QGroupBox("Input")
        form = QFormLayout(box)
        self.image_combo = QComboBox()
        self.regions_combo = QComboBox()
        self.pixel_size = QLineEdit()
        self.pixel_size.setPlaceholderText("from file")
        self.frames = QLineEdit()
        self.frames.setPlaceholderText("single image")
        form.addRow("Image", self.image_combo)
        form.addRow("Regions", self.regions_combo)
        form.addRow("Pixel size (nm)", self.pixel_size)
        form.addRow("Stack frames", self.frames)
        self.align_frames = QCheckBox("Align frames")
        self.align_frames.setChecked(True)
        self.nonrigid = QCheckBox("Non-rigid")
        self.align_button = QPushButton("Align stack")
        row = QHBoxLayout()
        for w in (self.align_frames, self.nonrigid, self.align_button):
            row.addWidget(w)
        form.addRow("", row)
        root.addWidget(box)

        self.nm_fields: dict[str, QLineEdit] = {}
        self.estimate_labels: dict[str, QLabel] = {}

        def nm_row(form, name, label, key):
            edit = QLineEdit()
            edit.setPlaceholderText("auto")
            row = QHBoxLayout()
            row.addWidget(edit, 1)
            if key is not None:
                est = QLabel("")
                est.setToolTip("automatic estimate used when the field is empty")
                row.addWidget(est)
                self.estimate_labels[key] = est
            self.nm_fields[name] = edit
            form.addRow(label, row)

        box = QGroupBox("Columns")
        form = QFormLayout(box)
        self.contrast = QComboBox()
        self.contrast.addItems(["bright columns (HAADF)", "dark columns (HRTEM, ABF)"])
        form.addRow("Contrast", self.contrast)
        for name, label, key in _NM_FIELDS[:2]:
            nm_row(form, name, label, key)
        self.min_intensity = QLineEdit()
        self.min_intensity.setPlaceholderText("none")
        form.addRow("Minimum intensity", self.min_intensity)
        self.species = QSpinBox()
        self.species.setRange(-1, 8)
        self.species.setValue(-1)
        self.species.setSpecialValueText("auto")
        form.addRow("Species", self.species)
        self.flatten = QCheckBox("flatten uneven background")
        form.addRow("", self.flatten)
        root.addWidget(box)

        box = QGroupBox("Motifs, ladder, tiling, Fourier")
        form = QFormLayout(box)
        self.ring_order = QComboBox()
        self.ring_order.addItems(["10", "12", "8", "6", "5"])
        form.addRow("Ring order", self.ring_order)
        self.radius_tolerance = QDoubleSpinBox()
        self.radius_tolerance.setRange(0.01, 0.49)
        self.radius_tolerance.setSingleStep(0.01)
        self.radius_tolerance.setValue(0.12)
        form.addRow("Radius tolerance", self.radius_tolerance)
        for name, label, key in _NM_FIELDS[2:]:
            nm_row(form, name, label, key)
        self.pentagons = QCheckBox("pentagons")
        self.pentagons.setChecked(True)
        self.half_step = QCheckBox("half-step ladder")
        self.fourier = QCheckBox("Fourier spots")
        self.fourier.setChecked(True)
        row = QHBoxLayout()
        for w in (self.pentagons, self.half_step, self.fourier):
            row.addWidget(w)
        form.addRow(row)
        self.correct_distortion = QCheckBox("correct scan distortion")
        self.phason = QCheckBox("phason analysis")
        self.phason.setChecked(True)
        row = QHBoxLayout()
        for w in (self.correct_distortion, self.phason):
            row.addWidget(w)
        form.addRow(row)
        self.fourier_window = QComboBox()
        self.fourier_window.addItems(list(_WINDOWS))
        form.addRow("Fourier window", self.fourier_window)
        root.addWidget(box)

        row = QHBoxLayout()
        self.load_button = QPushButton("Load parameters...")
        self.save_button = QPushButton("Save parameters...")
        self.batch_button = QPushButton("Batch...")
        for w in (self.load_button, self.save_button, self.batch_button):
            row.addWidget(w)
        root.addLayout(row)

        row = QHBoxLayout()
        self.estimate_button = QPushButton("Estimate")
        self.preview_button = QPushButton("Preview")
        self.run_button = QPushButton("Run")
        self.cancel_button = QPushButton("Cancel")
        for w in (self.estimate_button, self.preview_button, self.run_button, self.cancel_button):
            row.addWidget(w)
        root.addLayout(row)
        self.progress_bar = QProgressBar()
        self.progress_bar.setRange(0, 1000)
        self.status = QLabel("")
        self.status.setWordWrap(True)
        self.status.setMinimumHeight(3 * self.status.fontMetrics().lineSpacing())
        root.addWidget(self.progress_bar)
        root.addWidget(self.status)

        box = QGroupBox("Results")
        form = QFormLayout(box)
        self.showing = QLabel("no result yet")
        self.showing.setWordWrap(True)
        form.addRow("Showing", self.showing)
        self.colour_by = QComboBox()
        self.colour_by.addItems(list(_COLOUR_PROPS))
        form.addRow("Colour columns by", self.colour_by)
        self.colour_note = QLabel("")
        self.colour_note.setWordWrap(True)
        form.addRow("Legend", self.colour_note)
        row = QHBoxLayout()
        self.rerun_button = QPushButton("Re-run from columns")
        self.export_button = QPushButton("Export...")
        row.addWidget(self.rerun_button)
        row.addWidget(self.export_button)
        form.addRow(row)
        self.inspector = QLabel("click a column or motif (pan/zoom mode) to inspect it")
        self.inspector.setWordWrap(True)
        self.inspector.setTextFormat(Qt.RichText)
        form.addRow("Selected", self.inspector)
        root.addWidget(box)
        root.addStretch(1)

        self._add_tooltips()
        self.align_button.clicked.connect(self.align_stack)
        self.estimate_button.clicked.connect(self.estimate)
        self.preview_button.clicked.connect(self.preview)
        self.run_button.clicked.connect(self.run)
        self.cancel_button.clicked.connect(self.cancel)
        self.rerun_button.clicked.connect(self.rerun_from_columns)
        self.export_button.clicked.connect(lambda: self.export())
        self.load_button.clicked.connect(lambda: self.load_parameters())
        self.save_button.clicked.connect(lambda: self.save_parameters())
        self.batch_button.clicked.connect(lambda: self.batch())
        self.colour_by.currentTextChanged.connect(self._recolour)
        self.regions_combo.currentTextChanged.connect(self._style_regions)

    def _add_tooltips(self) -> None:
        tips = {
            self.image_combo: "Image layer to analyse; an image opened later is chosen automatically. Each image "
                              "keeps its own result layers (their names end in [image]).",
            self.regions_combo: "Shapes layer whose rectangles, polygons or ellipses are the regions analysed "
                                "(labels 1, 2, ... in the order drawn); '(whole image)' analyses everything.",
            self.pixel_size: "Pixel size in nm per pixel. Empty: the calibration stored in the file; without one "
                             "every nm value is left empty (never guessed).",
            self.frames: "For a stack (a 3-D image layer): 'K' analyses frame K, 'A:B' the mean of frames A to "
                         "B-1 (0-based), aligned first when 'Align frames' is ticked. Empty for a single image.",
            self.align_frames: "Register the frames of 'Stack frames' A:B to frame A (sub-pixel shifts, outlier "
                               "frames left out) before averaging, so drift does not smear the columns; results "
                               "are in frame A's coordinates. Off: the plain mean (with a note).",
            self.nonrigid: "Also correct scan distortion that changes from frame to frame (a smooth displacement "
                           "per image row); slower, off by default.",
            self.align_button: "Align and average the frames 'Stack frames' A:B of the chosen stack now (in the "
                               "background): adds the aligned mean as a new image layer, calibrated like the "
                               "stack, and plots each frame's shift in the plots dock (Frames tab).",
            self.contrast: "Bright columns on a dark background (HAADF) or dark columns on a bright one "
                           "(HRTEM, ABF).",
            self.nm_fields["column_spacing_nm"]: "Nearest-neighbour distance between columns, in nm. Empty: "
                                                 "measured from the image (Estimate shows the value).",
            self.nm_fields["column_diameter_nm"]: f"Full column diameter in nm (about {DIAMETER_PER_SIGMA:g} Gaussian "
                                                  "sigma). Empty: measured from the image (Estimate shows the value).",
            self.min_intensity: "Drop columns whose integrated intensity (image units x px\u00b2) is below this. "
                                "Empty: no cut (the significance test decides).",
            self.nm_fields["ring_radius_nm"]: "Radius of the ring motifs in nm. Empty: the pair-distance peak that "
                                              "fits the ring order best.",
            self.nm_fields["d0_nm"]: "Base distance d0 of the golden-ratio ladder d0 x tau^n, in nm. Empty: the "
                                     "strongest short-range pair-distance peak.",
            self.nm_fields["ladder_r_max_nm"]: "Largest pair distance the ladder analysis looks at, in nm. Empty: "
                                               "automatic.",
            self.nm_fields["tiling_edge_nm"]: "Edge length of the cluster network, in nm. Empty: from the pair "
                                              "distances of the cluster centres.",
            self.species: "Number of intensity classes of the columns: auto chooses by the Bayesian information "
                          "criterion; 0 skips classification; 1-8 fixes the number.",
            self.flatten: "Subtract a smooth background first (uneven illumination or thickness). Off by default.",
            self.ring_order: "Number of columns in a ring motif (10 for decagonal clusters).",
            self.radius_tolerance: "Relative tolerance on the ring radius (0.12 = +-12 %).",
            self.pentagons: "Also look for pentagons of columns (inside rings or free-standing).",
            self.half_step: "Also try half steps tau^(n/2) on the distance ladder.",
            self.fourier: "Locate the Bragg spots of the power spectrum and check it for scan distortion.",
            self.correct_distortion: "Apply the distortion measured from the Fourier spots to the column positions "
                                     "before motifs, ladders, tiling and phasons. The tables are then in the "
                                     "corrected frame; the overlays are drawn back in the image's frame, on the "
                                     "atoms.",
            self.phason: "Linear phason strain from both sides (real-space lift of the cluster tiling and the "
                         "Fourier spot positions) and the phason field layer.",
            self.fourier_window: "Window of the power spectrum: 'hann', or 'periodic_smooth' (no window; about "
                                 "half the uncertainty of the phason strain from the spots).",
            self.load_button: "Fill the fields from a parameters.toml (one written with every export, or saved "
                              "here).",
            self.save_button: "Write the fields to a parameters.toml (for the command line, a batch, or later).",
            self.batch_button: "Analyse a list of image files with these parameters, one results folder each, plus "
                               "a comparison table and figure (in the background; Cancel stops after the current "
                               "image, and a second start resumes).",
            self.estimate_button: "Measure the automatic column spacing and diameter now (runs in the background) "
                                  "and show them next to the fields.",
            self.preview_button: f"Analyse only the central {PREVIEW_SIZE_PX} x {PREVIEW_SIZE_PX} px, for a quick "
                                 "check of the parameters (without the Fourier stage: a crop that small cannot "
                                 "judge the scan distortion).",
            self.run_button: "Analyse the image (or only the regions) in the background; the result layers of this "
                             "image replace those of its last run, other images keep theirs.",
            self.cancel_button: "Stop the running job at its next progress report; layers stay as they were.",
            self.progress_bar: "Progress of the running job.",
            self.status: "What the last job did: counts of columns, rings, pentagons and tiles.",
            self.showing: "The image whose result the docks show; select one of its layers to show another.",
            self.colour_by: "Feature that colours the column markers: species in their own colours, numbers on "
                            "a colour scale from the feature's 2nd to 98th percentile.",
            self.colour_note: "What the marker colours mean (also written on the canvas).",
            self.rerun_button: "Recompute motifs, ladder and tiling from the edited columns layer (added points "
                               "are fitted, deleted ones left out); no new detection.",
            self.export_button: "Write tables (CSV, xlsx with a summary sheet), summary.json, parameters.toml and "
                                "figures to a folder; asks before overwriting.",
            self.inspector: "The selected column or motif. Click one in pan/zoom mode with a result layer "
                            "active; inside a pentagon that sits in a ring, a second click selects the ring (with "
                            "the rings layer active the first click does).",
        }
        for widget, tip in tips.items():
            widget.setToolTip(tip)

    # ---------------------------------------------------------------- layer choice
    def _refresh_layers(self, event=None) -> None:
        from napari.layers import Image, Shapes

        changed = getattr(event, "value", None) if event is not None and event.type in ("inserted", "removed") \
            else None
        if changed is not None and kind_of(getattr(changed, "name", ""))[0] in RESULT_KINDS \
                and not isinstance(changed, (Image, Shapes)):
            return  # a result layer is never an image or a regions choice: nothing to refresh
        images = [ly.name for ly in self.viewer.layers if isinstance(ly, Image) and ly.name != "power spectrum"]
        shapes = [ly.name for ly in self.viewer.layers
                  if isinstance(ly, Shapes) and kind_of(ly.name)[0] not in RESULT_KINDS]
        for combo, names in ((self.image_combo, images), (self.regions_combo, [_WHOLE_IMAGE] + shapes)):
            current = combo.currentText()
            combo.blockSignals(True)
            combo.clear()
            combo.addItems(names)
            added = getattr(event, "value", None) if event is not None and event.type == "inserted" else None
            if combo is self.regions_combo and isinstance(added, Shapes) and added.name in names:
                combo.setCurrentText(added.name)  # a Shapes layer just added is meant to mark regions
            elif combo is self.image_combo and isinstance(added, Image) and added.name in names:
                combo.setCurrentText(added.name)  # an image just opened is the one to analyse next
            elif combo is self.regions_combo and isinstance(added, Image) and added.name in images:
                combo.setCurrentText(_WHOLE_IMAGE)  # the old regions were drawn for another image
            elif current in names:
                combo.setCurrentText(current)
            combo.blockSignals(False)
        self._style_regions(self.regions_combo.currentText())

    def _style_regions(self, name: str) -> None:
        """Restyle the chosen regions layer: outlines only (no fill hiding the image), and napari's default
        pixel units relabelled as the image's when its scale is 1 (it was then drawn in the image's world units),
        so the scale bar keeps its unit."""
        from napari.layers import Shapes

        layer, image = self._layer(name), self._layer(self.image_combo.currentText())
        if not isinstance(layer, Shapes):
            return
        layer.current_face_color = "transparent"
        layer.current_edge_color = REGION_COLOUR
        # only what differs: each assignment redraws the layer (and ran on every layer inserted)
        if len(layer.data) and np.any(np.asarray(layer.face_color)[:, 3] != 0):
            layer.face_color = "transparent"
        if len(layer.data) and not np.allclose(layer.edge_color, _rgba(REGION_COLOUR)):
            layer.edge_color = REGION_COLOUR
        if image is not None and np.allclose(layer.scale[-2:], 1.0) and \
                {str(u) for u in layer.units} == {"pixel"} and {str(u) for u in image.units} != {"pixel"}:
            layer.units = tuple(image.units[-2:])

    def _layer(self, name: str):
        return self.viewer.layers[name] if name in self.viewer.layers else None

    def result_layer(self, kind: str, image: str | None = None):
        """The result layer of this kind ('columns', 'rings', ...) of ``image`` (default: the current one)."""
        return self._layer(layer_name(kind, image or self.session.image))

    # ---------------------------------------------------------------- parameters
    def parameters(self):
        """The :class:`Parameters` the fields describe (validated); raises TenfoldInputError naming the field."""
        from tenfold.analysis._errors import TenfoldInputError
        from tenfold.analysis.pipeline import Parameters

        values: dict = {}
        fields = [("pixel_size_nm", self.pixel_size), ("min_mass", self.min_intensity)] + list(self.nm_fields.items())
        for name, edit in fields:
            text = edit.text().strip()
            if not text:
                values[name] = None
                continue
            try:
                values[name] = float(text)
            except ValueError:
                raise TenfoldInputError(
                    f"{_LABELS.get(name, name)}: {text!r} is not a number; give a value or leave it empty for auto"
                ) from None
        for name, value in self._px_lengths.items():  # lengths in px from a loaded file, when no nm is given
            if values.get(name.replace("_px", "_nm")) is None:
                values[name] = value
        n = self.species.value()
        values.update(
            dark_columns=self.contrast.currentIndex() == 1,
            n_species=None if n < 0 else n,
            flatten=self.flatten.isChecked(),
            ring_order=int(self.ring_order.currentText()),
            radius_tolerance=float(self.radius_tolerance.value()),
            pentagons=self.pentagons.isChecked(),
            half_step=self.half_step.isChecked(),
            fourier=self.fourier.isChecked(),
            correct_distortion=self.correct_distortion.isChecked(),
            phason=self.phason.isChecked(),
            fourier_window=self.fourier_window.currentText(),
            rng=getattr(self, "_rng", 0),
        )
        try:
            return Parameters(**values).validate()
        except TenfoldInputError as exc:
            raise TenfoldInputError(labelled(str(exc))) from None

    def set_parameters(self, params) -> None:
        """Fill every field from a :class:`Parameters` (lengths given in px are kept and used as they are)."""
        def text(v):
            return "" if v is None else f"{v:.6g}"

        self.pixel_size.setText(text(params.pixel_size_nm))
        self.min_intensity.setText(text(params.min_mass))
        for name, edit in self.nm_fields.items():
            edit.setText(text(getattr(params, name)))
        self._px_lengths = {f"{name[:-3]}_px": getattr(params, f"{name[:-3]}_px") for name in self.nm_fields
                            if getattr(params, f"{name[:-3]}_px", None) is not None}
        self._px_lengths.update({f: getattr(params, f) for f in ("column_diameter_px", "column_spacing_px")
                                 if getattr(params, f) is not None})
        self.contrast.setCurrentIndex(1 if params.dark_columns else 0)
        self.species.setValue(-1 if params.n_species is None else int(params.n_species))
        self.flatten.setChecked(bool(params.flatten))
        self.ring_order.setCurrentText(str(params.ring_order))
        self.radius_tolerance.setValue(float(params.radius_tolerance))
        self.pentagons.setChecked(bool(params.pentagons))
        self.half_step.setChecked(bool(params.half_step))
        self.fourier.setChecked(bool(params.fourier))
        self.correct_distortion.setChecked(bool(params.correct_distortion))
        self.phason.setChecked(bool(params.phason))
        self.fourier_window.setCurrentText(params.fourier_window)
        self._rng = int(params.rng)

    def load_parameters(self, path=None) -> None:
        """Fill the fields from a parameters file (or a results folder holding one)."""
        from napari.utils.notifications import show_error

        from tenfold.analysis._params_file import load_parameters

        path = path or self.choose_open_file()
        if not path:
            return
        try:
            self.set_parameters(load_parameters(path))
        except Exception as exc:  # shown, never raised into Qt
            show_error(labelled(str(exc)))
            return
        kept = f" (lengths in px kept as given: {', '.join(self._px_lengths)})" if self._px_lengths else ""
        self.status.setText(f"parameters loaded from {path}{kept}")

    def save_parameters(self, path=None) -> None:
        """Write the fields to a parameters file; an existing file is replaced only when ``confirm_overwrite``
        says yes."""
        from napari.utils.notifications import show_error

        from tenfold.analysis._params_file import save_parameters

        path = path or self.choose_save_file()
        if not path:
            return
        path = Path(path)
        try:
            params = self.parameters()
            overwrite = path.exists() and self.confirm_overwrite(path)
            if path.exists() and not overwrite:
                self.status.setText(f"parameters not saved: {path} left as it was")
                return
            save_parameters(params, path, overwrite=overwrite)
        except Exception as exc:
            show_error(labelled(str(exc)))
            return
        self.status.setText(f"parameters saved to {path}")

    def _inputs(self, *, preview: bool = False):
        """(image layer, layer record, params, regions, frame) for a job; the helper process builds the
        micrograph from the record (``_layers.layer_source``: frame choice, alignment); raises
        TenfoldInputError."""
        import dataclasses

        from tenfold.analysis._errors import TenfoldInputError
        from tenfold.analysis.region import Region

        from ._layers import crop_offset, layer_source

        image_layer = self._layer(self.image_combo.currentText())
        if image_layer is None:
            raise TenfoldInputError("no image layer chosen: open a micrograph first (File > Open, or a sample)")
        params = self.parameters()
        source = layer_source(image_layer, pixel_size_nm=params.pixel_size_nm, frames=self.frames.text(),
                              align=self.align_frames.isChecked(), nonrigid=self.nonrigid.isChecked())
        regions_layer = self._layer(self.regions_combo.currentText())
        regions = regions_from_shapes(regions_layer, image_layer) if regions_layer is not None else []
        offset = (0, 0)
        if preview:
            offset, regions = crop_offset(np.shape(image_layer.data), PREVIEW_SIZE_PX), []
            # the distortion verdict needs the spot pattern of the whole field: a 256 px crop holds a few tiles,
            # and the indexing seeded from them called a clean image distorted while the full run did not
            params = dataclasses.replace(params, fourier=False, correct_distortion=False)
        regions = [Region(label=r.label, kind=r.kind, vertices_px=r.vertices_px) for r in regions]
        return image_layer, source, params, regions or None, frame_of(image_layer, offset_px=offset)

    # ---------------------------------------------------------------- actions
    def estimate(self) -> None:
        """Show the automatic column spacing and diameter next to their fields (in a worker)."""
        from napari.utils.notifications import show_error

        from ._compute import estimate_job

        if self.worker is not None:
            return
        try:
            _, source, params, _, _ = self._inputs()
        except Exception as exc:  # shown, never raised into Qt
            show_error(str(exc))
            return

        compute = (estimate_job, (source,), {"dark_columns": params.dark_columns})
        self._launch("estimate", compute, None, None, build_columns=False)

    def _show_estimate(self, est: dict) -> None:
        for key, label in self.estimate_labels.items():
            nm, px = est.get(f"{key}_nm"), est.get(f"{key}_px")
            label.setText(f"auto {_nm_text(nm)} nm" if nm is not None and math.isfinite(nm)
                          else f"auto {_nm_text(px)} px")
        self.estimates = est
        self.status.setText("estimate: " + ", ".join(
            f"{label.lower()} {lab.text()[5:]}" for (_, label, key) in _NM_FIELDS
            for k2, lab in self.estimate_labels.items() if k2 == key))

    def align_stack(self) -> None:
        """Align and average the frames 'Stack frames' A:B (empty: every frame) of the chosen stack layer in the
        helper process (``io.micrograph_from_array`` with ``align=True``); the aligned mean becomes a new image
        layer, calibrated like the stack, carrying the validity mask and the frames table, and the shifts are
        plotted in the plots dock."""
        from napari.utils.notifications import show_error

        from tenfold.analysis._errors import TenfoldInputError

        from ._compute import align_job
        from ._layers import is_stack, layer_source, parse_frames

        if self.worker is not None:
            return
        try:
            layer = self._layer(self.image_combo.currentText())
            if layer is None or not is_stack(layer):
                what = "no image is chosen" if layer is None else f"{layer.name!r} is a single image"
                raise TenfoldInputError(f"Align stack: choose a stack (a 3-D image layer) as 'Image'; {what}")
            n = int(np.shape(layer.data)[0])
            frame, frame_range = parse_frames(self.frames.text())
            if frame is not None:
                raise TenfoldInputError(f"'Stack frames': {self.frames.text().strip()!r} is one frame; give a range "
                                        "A:B to align (or leave it empty for every frame)")
            a, b = frame_range or (0, n)
            params = self.parameters()
            source = layer_source(layer, pixel_size_nm=params.pixel_size_nm, frames=f"{a}:{b}", align=True,
                                  nonrigid=self.nonrigid.isChecked())
        except Exception as exc:  # shown, never raised into Qt
            show_error(labelled(str(exc)))
            return
        self._align_input = (layer, (a, b))
        self._launch("align", (align_job, (source,), {}), None, None, build_columns=False)

    def _alignment_steps(self, micrograph) -> list:
        """Showing an alignment: add (or update) the aligned-mean layer, then plot its shifts and say so."""
        from napari.utils.notifications import show_warning

        from ._layers import FRAMES_KEY, image_layer_tuple

        stack, (a, b) = self._align_input
        alignment = micrograph.alignment
        data, kwargs, _ = image_layer_tuple(micrograph, f"{stack.name} aligned {a}-{b - 1}")
        kwargs["metadata"][FRAMES_KEY] = {"table": alignment.table, "info": alignment.info}
        kwargs["translate"] = tuple(stack.translate[-2:])
        name = kwargs["name"]

        def add_layer():
            old = self._layer(name)
            if old is not None and np.shape(old.data) == data.shape:  # a second alignment of the same frames
                old.data = data
                old.metadata.update(kwargs["metadata"])
                self.image_combo.setCurrentText(name)
            else:
                if old is not None:
                    self.viewer.layers.remove(old)
                self.viewer.add_image(data, **kwargs)  # chosen as the image to analyse next

        def plot():
            info = alignment.info
            self.session.set_alignment(name, alignment.table, info)
            drift = info.get("residual_drift_px")
            self.status.setText(
                f"aligned frames {a}-{b - 1} of {stack.name}: {info.get('n_used')} of {info.get('n_frames')} used "
                f"({info.get('method')}, reference {info.get('reference')}"
                + (f", residual drift {drift:.3g} px" if isinstance(drift, (int, float)) else "")
                + f"); new layer '{name}' (Run analyses it)")
            for note in info.get("notes", []):
                show_warning(labelled(note))

        return [add_layer, plot]

    def run(self) -> None:
        """Analyse the chosen image (inside the regions, if a regions layer is chosen) in a worker."""
        self._start_analysis(preview=False)

    def preview(self) -> None:
        """Analyse only the central PREVIEW_SIZE_PX square, for a quick check of the parameters."""
        self._start_analysis(preview=True)

    def _start_analysis(self, *, preview: bool) -> None:
        from napari.utils.notifications import show_error

        from ._compute import analysis_job

        if self.worker is not None:
            return
        try:
            image_layer, source, params, regions, frame = self._inputs(preview=preview)
        except Exception as exc:
            show_error(str(exc))
            return

        compute = (analysis_job, (source, params),
                   {"regions": regions or None, "preview_px": PREVIEW_SIZE_PX if preview else None})

        context = (image_layer, frame, regions)
        self._launch("preview" if preview else "run", compute, frame, context, build_columns=True,
                     image=image_layer.name)

    def rerun_from_columns(self) -> None:
        """Recompute motifs, ladder and tiling from the current image's (edited) columns layer, without
        re-detecting; columns added by hand are fitted first."""
        from napari.utils.notifications import show_error

        from ._compute import rerun_job

        session = self.session
        points = self.result_layer("columns")
        if self.worker is not None:
            return
        if session.result is None or points is None:
            show_error("re-run from columns: run an analysis first; there is no columns layer to start from")
            return
        try:
            params = self.parameters()
            columns = columns_from_points(points, points.metadata.get("tenfold_frame") or session.frame,
                                          session.result.tables["columns"])
        except Exception as exc:
            show_error(labelled(str(exc)))
            return
        result, regions = session.result, session.regions or None

        compute = (rerun_job, (result, columns), {"params": params, "regions": regions})

        context = (session.image_layer, session.frame, session.regions)
        self._launch("re-run", compute, session.frame, context, build_columns=False, image=session.image)

    def batch(self, inputs=None, folder=None) -> None:
        """Analyse image files with the dock's parameters through ``batch.run_batch`` (one results folder per
        image, the comparison table and figure), in the helper process; Cancel stops after the running image."""
        from napari.utils.notifications import show_error

        from ._compute import batch_job
        from ._layers import parse_frames

        if self.worker is not None:
            return
        inputs = inputs or self.choose_images()
        if not inputs:
            return
        folder = folder or self.choose_folder()
        if not folder:
            return
        try:
            params = self.parameters()
            frame, frame_range = parse_frames(self.frames.text())
        except Exception as exc:
            show_error(labelled(str(exc)))
            return
        compute = (batch_job, ([str(p) for p in inputs], str(folder)),
                   {"params": params, "frame": frame, "frame_range": frame_range, "rerun": False,
                    "align": self.align_frames.isChecked(), "nonrigid": self.nonrigid.isChecked()})
        self._launch("batch", compute, None, None, build_columns=False)

    def cancel(self) -> None:
        """Ask the running worker to stop at the next progress report."""
        self._cancel.set()
        self.status.setText("cancelling...")

    def _launch(self, kind, compute, frame, context, *, build_columns: bool, image: str | None = None) -> None:
        from napari.qt.threading import create_worker

        self._cancel = threading.Event()
        self._launch_colour = self.colour_by.currentText()
        self._context = context
        self._image = image
        worker = create_worker(
            _job, kind, compute, frame, self._cancel, self._bridge.progress.emit, build_columns,
            self.colour_by.currentText(), image, _start_thread=False,
        )
        worker.returned.connect(self._on_returned)
        worker.finished.connect(self._on_finished)
        self.worker = worker
        self._worker_done = False
        self._set_busy(True)
        self.progress_bar.setValue(0)
        self.status.setText(f"{kind}: starting")
        worker.start()

    # ---------------------------------------------------------------- worker callbacks (GUI thread)
    def _on_progress(self, fraction: float, message: str) -> None:
        self.progress_bar.setValue(int(round(1000 * min(max(fraction, 0.0), 1.0))))
        if not self._cancel.is_set():
            self.status.setText(message)

    def _on_returned(self, outcome: _Outcome) -> None:
        from napari.utils.notifications import show_error, show_info

        if outcome.status == "error":
            message = labelled(outcome.message)
            show_error(message)
            self.status.setText(message)
            return
        if outcome.status == "cancelled":
            self.status.setText(f"{outcome.kind} cancelled; layers unchanged")
            self.progress_bar.setValue(0)
            return
        if outcome.kind in ("export", "batch"):
            show_info(outcome.message)
            self.status.setText(outcome.message)
            return
        if outcome.kind == "estimate":
            self._show_estimate(outcome.result)
            return
        if outcome.kind == "align":  # the new layer, then the plot, each in its own event-loop turn
            self._pending, self._pending_outcome = [], outcome
            self._steps = self._alignment_steps(outcome.result)
            QTimer.singleShot(0, self._insert_next)
            return
        # an image's result layers are updated in place (one redraw each, no new visual, control widget or
        # selection move); new ones are inserted one per event-loop turn, so the GUI never stalls for the sum
        self._places = self._remove_old(outcome.layers, self._image, rebuilt_columns=outcome.kind != "re-run")
        self._pending = list(outcome.layers)
        self._pending_outcome = outcome
        QTimer.singleShot(0, self._insert_next)

    def _insert_next(self) -> None:
        """One step per event-loop turn: each result layer, then the steps of showing the outcome
        (``_outcome_steps``), with a short pause, not 0 ms, in between, so the canvas paints each change apart (a
        paint and the next step in one turn froze the GUI for their sum)."""
        if self._pending:
            self._put_layer(self._pending.pop(0))
            QTimer.singleShot(_INSERT_GAP_MS, self._insert_next)
            return
        outcome = self._pending_outcome
        if not hasattr(self, "_steps"):
            self._steps = self._outcome_steps(outcome)
        try:
            step = self._steps.pop(0)
            step()
        except Exception as exc:  # noqa: BLE001 - shown as one line; the dock is free again in any case
            from napari.utils.notifications import show_error

            self._steps = []
            show_error(f"{outcome.kind}: showing the result failed ({type(exc).__name__}: {exc})")
        if self._steps:
            QTimer.singleShot(_INSERT_GAP_MS, self._insert_next)
            return
        del self._steps
        self._pending_outcome = None
        self._go_idle()

    def _outcome_steps(self, outcome) -> list:
        """What showing a finished run, preview or re-run takes after its layers, one step per event-loop turn:
        select the image's columns layer (with napari's features table open this rebuilds it), the re-run's
        columns, the result in both docks, the notes."""
        image_layer, frame, regions = self._context
        image = self._image
        points = self._layer(layer_name("columns", image))

        def select():
            if points is not None:
                self.viewer.layers.selection.active = points

        def rerun_columns():
            if outcome.kind == "re-run" and points is not None:
                self._update_columns_layer(points, outcome.result.tables["columns"])

        def result():
            self.session.set_result(outcome.result, frame, image_layer, regions or [], image=image)
            built = outcome.kind != "re-run" and self.colour_by.currentText() == self._launch_colour
            self._recolour(self.colour_by.currentText(), colours=not built)  # a new layer has its colours
            self.viewer.canvas.overlays.scale_bar.visible = True
            summary = outcome.result.summary
            self.status.setText(f"{outcome.kind} of {image}: {status_counts(outcome.result)}"
                                + ("" if summary.get("calibrated", True) else " (uncalibrated: nm values are NaN)"))

        def notes():
            # what could mislead (scan distortion, masked pixels, a ladder that does not hold) is said, not
            # hidden; what only describes the run (a preview's crop, the analysed box) is information
            from napari.utils.notifications import show_info, show_warning

            from ._plots import spacing_check

            check = spacing_check(outcome.result)
            if check:
                show_warning(check)
            for note in outcome.result.summary.get("notes", []):
                if note.startswith("uncalibrated"):
                    continue
                (show_info if note.startswith(_INFO_NOTES) else show_warning)(labelled(note))

        return [select, rerun_columns, result, notes]

    def _update_columns_layer(self, points, table) -> None:
        """After a re-run the edited columns layer is kept; its ids (new ones for added columns) and the fitted
        positions of added columns are taken from the re-run's table when the rows still match."""
        if len(table) != len(points.data):
            return
        import pandas as pd

        from ._layers import set_quietly, species_symbols

        frame = points.metadata.get("tenfold_frame") or self.session.frame
        xy = display_maps(frame)[0](table[["x_px", "y_px"]].to_numpy(float))
        values = {"data": xy[:, ::-1]}
        ids = table["id"].to_numpy(np.int64)
        changed = "id" not in points.features or not np.array_equal(points.features["id"].to_numpy(), ids)
        if changed:  # only then: napari's features table, if open, rebuilds itself on every features event
            values["features"] = pd.DataFrame({"id": ids})
        values["symbol"] = species_symbols(table)
        set_quietly(points, announce_features=changed, **values)

    def _on_finished(self) -> None:
        self._worker_done = True
        self._go_idle()

    def _go_idle(self) -> None:
        if getattr(self, "_worker_done", False) and getattr(self, "_pending_outcome", None) is None:
            self.worker = None
            self._set_busy(False)

    def _set_busy(self, busy: bool) -> None:
        for w in (self.estimate_button, self.preview_button, self.run_button, self.rerun_button,
                  self.export_button, self.batch_button, self.load_button, self.align_button):
            w.setEnabled(not busy)
        self.cancel_button.setEnabled(busy)

    def _remove_old(self, new_layers, image, *, rebuilt_columns: bool = True) -> dict:
        """Remove, in one batch, the previous result layers of ``image`` that cannot be updated in place: those
        whose type changed and, after a run, kinds the new result has no layer for (a phason field that is no
        longer computed). Returns name -> (index among the layers left, visible, opacity), so that a new layer
        takes the place of the one it replaces."""
        layers = self.viewer.layers
        new = {ly.name: ly for ly in new_layers}
        kept = set(new) | ({layer_name("columns", image)} if not rebuilt_columns else set())
        old = [ly for ly in layers if kind_of(ly.name)[1] == image and kind_of(ly.name)[0] in RESULT_KINDS
               and (ly.name not in kept or type(ly) is not type(new.get(ly.name, ly)))]
        if not old:
            return {}
        removed = sorted(layers.index(ly) for ly in old)
        places = {}
        for ly in old:
            i = layers.index(ly)
            places[ly.name] = (i - sum(r < i for r in removed), ly.visible, ly.opacity)
        with layers.batched_update():
            for ly in old:
                layers.remove(ly)
        return places

    def _put_layer(self, new) -> None:
        """Update the result layer of this name in place, or insert a finished layer where the old one of its
        name was (same visibility and opacity) when that place is above the analysed image, else on top (a
        second image opened since). Inserting does not select the layer (each selection change rebuilds the
        layer controls and napari's features table); the columns layer is selected once at the end."""
        from ._layers import update_layer

        layers = self.viewer.layers
        image = self._context[0] if getattr(self, "_context", None) else None
        old = self._layer(new.name)
        if old is not None and type(old) is type(new):
            update_layer(old, new)
            if image is not None and image in layers and layers.index(old) < layers.index(image):
                layers.move(layers.index(old), len(layers))  # drawn under its image it would be hidden
            return
        if kind_of(new.name)[0] == "columns":
            new.events.data.connect(self._on_columns_edited)
        place = getattr(self, "_places", {}).pop(new.name, None)
        if place is None:
            index = len(layers)
        else:
            index, new.visible, new.opacity = place
            if image is not None and image in layers and index <= layers.index(image):
                index = len(layers)
            for other, (j, *_rest) in self._places.items():  # the later layers sit above this one
                if j >= index:
                    self._places[other] = (j + 1, *_rest)
        activate = getattr(layers, "_activate_on_insert", None)
        layers._activate_on_insert = False  # napari's switch (private): select the new layer on insert
        try:
            layers.insert(min(index, len(layers)), new)
        finally:
            if activate is not None:
                layers._activate_on_insert = activate

    def _on_columns_edited(self, event) -> None:
        """A point added by hand is a new column: its own id (napari would copy the last selected point's) and
        the grey of unclassified columns."""
        if getattr(event, "action", None) != "added":  # napari's ActionType is a str enum
            return
        layer = event.source
        n = len(layer.data)
        rows = np.unique(np.asarray(event.data_indices, np.int64) % max(n, 1))
        if not len(rows) or len(layer.features) != n:
            return
        from ._layers import UNCLASSIFIED_COLOUR, added_row_values, set_quietly
        from matplotlib.colors import to_rgba

        face = np.array(layer.face_color, copy=True)
        face[rows] = to_rgba(UNCLASSIFIED_COLOUR)
        # napari emits its 'features' event right after this 'added' one: napari's features table, if open,
        # rebuilds once, with these ids, instead of once more for an assignment of ours
        set_quietly(layer, features=added_row_values(layer.features, rows), face_color=face)

    def _aligned_columns(self, points):
        """The current result's columns table row-aligned with a (possibly edited) columns layer, by id."""
        table = self.session.result.tables["columns"]
        ids = points.features["id"].to_numpy() if "id" in points.features else np.zeros(0)
        return table.drop_duplicates("id").set_index("id").reindex(ids).reset_index()

    def _recolour(self, prop: str, *, colours: bool = True) -> None:
        """Colour the current image's column markers by ``prop`` (unless ``colours`` is False: the layer was
        built so) and write the legend (dock and canvas)."""
        points = self.result_layer("columns")
        if points is None or self.session.result is None:
            return
        table = self._aligned_columns(points)
        if prop not in table:
            return
        kwargs = colour_kwargs(table, prop)
        if colours:
            points.face_color = kwargs["face_color"]
        legend = kwargs.get("legend") or []
        if kwargs.get("limits"):
            (lo, c_lo), (hi, c_hi) = legend
            html = (f"{prop}: <span style='color:{c_lo}'>■</span> {lo} (blue) to "
                    f"<span style='color:{c_hi}'>■</span> {hi} (yellow); grey: not measured")
            canvas = f"{prop}: {lo} (blue) to {hi} (yellow); grey: not measured"
        else:
            html = f"{prop}: " + ", ".join(f"<span style='color:{c}'>■</span> {label}" for label, c in legend)
            names = _colour_names()
            canvas = f"{prop}: " + ", ".join(f"{label.replace('species ', '')} {names.get(c.lower(), c)}"
                                             for label, c in legend)
            if prop == "species":
                canvas += " (and one marker shape each)"
        self.colour_note.setText(html)
        overlay = self.viewer.canvas.overlays.text
        overlay.text = canvas
        overlay.visible = True
        overlay.font_size = 9
        overlay.color = "white"
        try:
            overlay.position = "top_left"  # the scale bar has the bottom
        except Exception:  # noqa: BLE001 - napari versions name the corners differently; keep its default
            pass

    # ---------------------------------------------------------------- selection and inspector
    def _on_active_layer(self, event=None) -> None:
        """Selecting a result layer of another image shows that image's result in both docks."""
        active = self.viewer.layers.selection.active
        if active is None:
            return
        kind, image = kind_of(active.name)
        if kind in RESULT_KINDS and image in self.session.records:
            self.session.show(image)

    def _on_session_changed(self) -> None:
        image = self.session.image
        images = list(self.session.records)
        others = [i for i in images if i != image]
        self.showing.setText(f"{image}" + (f" (also: {', '.join(others)})" if others else "") if image
                             else "no result yet")
        self.inspector.setText("click a column or motif (pan/zoom mode) to inspect it")

    def _on_click(self, viewer, event):
        """A click (no drag) with a result layer active selects the column or motif under it."""
        if event.type != "mouse_press" or getattr(event, "button", 1) != 1:
            return
        active = viewer.layers.selection.active
        if active is None or getattr(active, "mode", "pan_zoom") not in ("pan_zoom", None):
            return
        kind, image = kind_of(active.name)
        if kind not in RESULT_KINDS or image not in self.session.records:
            return
        start = np.asarray(event.position, float)[-2:]
        yield
        while event.type == "mouse_move":
            if np.hypot(*(np.asarray(event.position, float)[-2:] - start)) > 0:
                return  # a drag pans the view
            yield
        self.session.show(image)
        frame = active.metadata.get("tenfold_frame") or self.session.frame
        from ._layers import world_to_frame

        rc = world_to_frame(start[None], frame)[0]
        x, y = display_maps(frame)[1](np.array([[rc[1], rc[0]]]))[0]
        self.pick(x, y, kinds=kind if kind in ("rings", "pentagons", "columns") else None)

    def pick(self, x_px: float, y_px: float, kinds: str | None = None):
        """Select what a click at (x_px, y_px) (frame of the tables) means: with ``kinds`` 'columns' the nearest
        column, 'rings' / 'pentagons' the motif of that kind around the point, otherwise the innermost motif
        around it (the next one out on a repeated click, see ``MotifPicker``), else the nearest column.

        Returns ('column' | 'motif', row) or None."""
        record = self.session.record
        if record is None:
            return None
        result = record.result
        if kinds != "columns":
            if record.picker is None:
                record.picker = MotifPicker(result.tables["motifs"], result.tables["columns"])
            row = record.picker.pick(x_px, y_px, None if kinds == "columns" else
                                     (kinds if kinds in ("rings", "pentagons") else None))
            if row is not None:
                self.session.select("motif", row)
                return ("motif", row)
        cols = result.tables["columns"]
        if len(cols):
            d = np.hypot(cols["x_px"].to_numpy(float) - x_px, cols["y_px"].to_numpy(float) - y_px)
            k = int(np.nanargmin(d))
            if d[k] <= (record.frame.get("marker_px") or _marker_default(record)):
                self.session.select("column", k)
                return ("column", k)
        self.session.select(None)
        return None

    def _show_selection(self) -> None:
        record, sel = self.session.record, self.session.selection
        if record is None or sel is None:
            self.inspector.setText("nothing selected")
            return
        kind, row = sel
        table = record.result.tables["columns" if kind == "column" else "motifs"]
        pairs = readable(table.iloc[row], pixel_size_nm=record.result.meta.pixel_size_nm, kind=kind)
        rows = "".join(f"<tr><td>{label}</td><td align='right'>&nbsp;{value}</td></tr>" for label, value in pairs)
        self.inspector.setText(f"<b>{kind} in {record.image}</b><table>{rows}</table>")

    # ---------------------------------------------------------------- export
    def _ask_folder(self) -> str | None:
        folder = QFileDialog.getExistingDirectory(self, "Export Tenfold results to folder")
        return folder or None

    def _ask_overwrite(self, folder: Path) -> bool:
        answer = QMessageBox.question(
            self, "Overwrite results?", f"{folder} already holds files. Replace Tenfold's earlier results there? Other files are kept.",
            QMessageBox.Yes | QMessageBox.No, QMessageBox.No,
        )
        return answer == QMessageBox.Yes

    def export(self, folder=None) -> None:
        """Write the current result (tables, summary, figures) with ``export.write_results``, in a worker.

        An existing non-empty folder is only overwritten when ``confirm_overwrite(folder)`` says yes.
        """
        from napari.utils.notifications import show_error

        from ._compute import export_job

        if self.worker is not None:
            return
        result = self.session.result
        if result is None:
            show_error("export: nothing to export yet; run an analysis first")
            return
        folder = folder or self.choose_folder()
        if not folder:
            return
        folder = Path(folder)
        overwrite = False
        if folder.exists() and not folder.is_dir():
            show_error(f"export: {folder} is a file, not a folder; choose a folder for the results")
            return
        if folder.exists() and any(folder.iterdir()):
            if not self.confirm_overwrite(folder):
                self.status.setText(f"export cancelled: {folder} left as it was")
                return
            overwrite = True

        compute = (export_job, (result, folder), {"overwrite": overwrite})

        self._launch("export", compute, None, None, build_columns=False)


def _marker_default(record) -> float:
    from ._layers import _marker_px

    return _marker_px(record.result.tables["columns"], record.frame)


def _colour_names() -> dict:
    """Plain names of the legend colours, for the canvas text (which is one colour)."""
    from ._layers import PALETTE, SPECIES_PALETTE, UNCLASSIFIED_COLOUR

    species = ("blue", "orange", "green", "vermillion", "sky blue", "purple")
    other = ("blue", "orange", "teal", "yellow", "brick red", "violet", "sky blue", "grey")
    names = {c.lower(): n for c, n in zip(SPECIES_PALETTE, species)}
    names.update({c.lower(): n for c, n in zip(PALETTE, other)})
    names[UNCLASSIFIED_COLOUR.lower()] = "grey"
    return names
