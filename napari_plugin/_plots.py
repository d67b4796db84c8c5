"""The plots dock: every result of the current run, readable without export.

Tabs: summary (the headline numbers with errors and units, the same table as the workbook's 'summary' sheet),
distances (pair distribution with the tau ladder and the ladder table), species (intensity histogram),
motifs (table), tiling (counts, thick/thin ratio, map), Fourier (dominant order, distortion, spots, power
spectrum as a plot in 1/nm: never a layer beside the nm layers) and notes (the run's notes and checks).
Clicking a pair-distance peak, a histogram bar or a table row selects those columns or motifs in the viewer
and zooms to them.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
from qtpy.QtCore import Qt, QTimer
from qtpy.QtWidgets import (
    QAbstractItemView,
    QComboBox,
    QSplitter,
    QHBoxLayout,
    QHeaderView,
    QLabel,
    QPlainTextEdit,
    QPushButton,
    QTableWidget,
    QTableWidgetItem,
    QTabWidget,
    QVBoxLayout,
    QWidget,
)

from ._layers import KIND_COLOURS, NETWORK_COLOUR, PALETTE, SPECIES_PALETTE, UNCLASSIFIED_COLOUR, data_to_data
from ._layers import display_maps, layer_name, motif_polygons
from ._session import session_for


__all__ = ["PlotsWidget", "MAX_TABLE_ROWS", "spacing_check", "SPACING_TOLERANCE"]

#: The motif table lists at most this many motifs (best score first); the layers always hold all of them.
MAX_TABLE_ROWS = 400
_TABLE_COLUMNS = ("motif_id", "kind", "complete", "score", "radius_nm", "n_members")
_LADDER_COLUMNS = ("set", "rung", "ideal", "measured", "deviation_pct", "uncertainty_pct")
#: Relative disagreement between the column spacing used and the first pair-distance peak above which the dock
#: warns (our choice: a tenth of the spacing is more than any column-position error of a working fit).
SPACING_TOLERANCE = 0.10
#: Tile types to colours in the tiling map.
TILE_COLOURS = {"thick_rhombus": PALETTE[0], "thin_rhombus": PALETTE[1], "pentagon": PALETTE[2],
                "star": PALETTE[4], "boat": PALETTE[5], "hexagon": PALETTE[6], "other": PALETTE[7]}
#: The golden ratio tau = (1 + sqrt 5) / 2; in an infinite Penrose rhombus tiling thick : thin = tau
#: (de Bruijn, Indag. Math. 43 (1981) 39; from memory).
TAU = (1 + math.sqrt(5)) / 2


def spacing_check(result) -> str | None:
    """A warning when the column spacing used differs from the first column pair-distance peak by more than
    :data:`SPACING_TOLERANCE`, else None."""
    summary = result.summary
    used = ((summary.get("automatic") or {}).get("spacing") or {}).get("value_px")
    params = result.parameters or {}
    ps = result.meta.pixel_size_nm
    if params.get("column_spacing_px"):
        used = params["column_spacing_px"]
    elif params.get("column_spacing_nm") and ps:
        used = params["column_spacing_nm"] / ps
    peaks = result.tables.get("pair_peaks")
    if not used or peaks is None or not len(peaks):
        return None
    first = peaks[peaks["set"] == "columns"]["distance_px"].dropna()
    if not len(first):
        return None
    d = float(first.min())
    if abs(used / d - 1) <= SPACING_TOLERANCE:
        return None
    unit, f = ("nm", ps) if ps else ("px", 1.0)
    return (f"column spacing used ({used * f:.3g} {unit}) differs from the first peak of the pair distribution "
            f"({d * f:.3g} {unit}) by {100 * (used / d - 1):+.0f} %: check 'Column spacing (nm)' (columns may be "
            "missed or split)")


def _import_matplotlib_in_background() -> None:
    """Import matplotlib's Qt canvas and figure (and the analysis modules the tabs use) in a daemon thread, once
    (about a second of import work that froze the GUI when the plots dock opened); the first figure drawn waits
    for it if it is not done."""
    import sys
    import threading

    if "matplotlib.backends.backend_qtagg" in sys.modules or getattr(_import_matplotlib_in_background, "started",
                                                                      False):
        return
    _import_matplotlib_in_background.started = True

    def load():
        import matplotlib.backends.backend_qtagg  # noqa: F401
        import matplotlib.colors  # noqa: F401
        import matplotlib.figure  # noqa: F401

        import tenfold.analysis.export  # noqa: F401  (the summary tab's table)
        import tenfold.analysis.fourier  # noqa: F401

    threading.Thread(target=load, name="tenfold-matplotlib-import", daemon=True).start()


def _canvas(figsize=(4.2, 3.4)):
    from matplotlib.backends.backend_qtagg import FigureCanvasQTAgg
    from matplotlib.figure import Figure

    # fixed margins: matplotlib's constrained layout took about as long as the drawing itself
    figure = Figure(figsize=figsize, dpi=90)
    figure.subplots_adjust(left=0.17, right=0.97, bottom=0.23, top=0.9)
    canvas = FigureCanvasQTAgg(figure)
    canvas.setMinimumHeight(280)
    canvas.setMinimumWidth(360)
    return figure, canvas


def _table(headers) -> QTableWidget:
    table = QTableWidget(0, len(headers))
    table.setHorizontalHeaderLabels(list(headers))
    table.setSelectionBehavior(QAbstractItemView.SelectRows)
    table.setSelectionMode(QAbstractItemView.SingleSelection)
    table.setEditTriggers(QAbstractItemView.NoEditTriggers)
    # column widths are fitted once after filling (ResizeToContents would refit every column on every cell set)
    table.horizontalHeader().setSectionResizeMode(QHeaderView.Interactive)
    table.verticalHeader().setVisible(False)
    return table


def _fill(table: QTableWidget, frame: pd.DataFrame) -> None:
    table.setUpdatesEnabled(False)
    table.setRowCount(0)
    table.setRowCount(len(frame))
    for j, name in enumerate(frame.columns):
        for i, v in enumerate(frame[name].to_numpy()):  # small tables only (at most MAX_TABLE_ROWS rows)
            text = f"{v:.4g}" if isinstance(v, (float, np.floating)) else str(v)
            table.setItem(i, j, QTableWidgetItem(text))
    table.resizeColumnsToContents()
    table.setUpdatesEnabled(True)


class PlotsWidget(QWidget):
    """Plots of the current result, refreshed whenever the analysis dock finishes a run or re-run."""

    def __init__(self, napari_viewer) -> None:
        super().__init__()
        self.viewer = getattr(napari_viewer, "__wrapped__", napari_viewer)  # as the analysis dock
        self.session = session_for(napari_viewer)
        self.worker = None
        self._spectrum = None
        self._figures: dict = {}  # key -> (matplotlib figure, canvas), made when first drawn
        self._placeholders: dict = {}
        self._page: dict = {}  # key -> the tab page holding that figure
        # once the docks are built and shown: a thread importing now would share the interpreter lock with
        # (and so slow down) the construction the user is waiting for
        QTimer.singleShot(0, _import_matplotlib_in_background)
        self.setMinimumWidth(440)
        root = QVBoxLayout(self)
        row = QHBoxLayout()
        row.addWidget(QLabel("Results of"))
        self.image_choice = QComboBox()
        self.image_choice.setToolTip("The image whose result these plots show; every analysed image keeps its own")
        row.addWidget(self.image_choice, 1)
        root.addLayout(row)
        self.tabs = QTabWidget()
        root.addWidget(self.tabs, 1)
        self.info = QLabel("")
        self.info.setWordWrap(True)
        root.addWidget(self.info)

        self.summary_table = _table(("section", "quantity", "value", "\u00b1 (1 sigma)", "unit", "note"))
        self.summary_table.setToolTip("The run's headline results with their 1-sigma errors and units (also the "
                                      "'summary' sheet of results.xlsx)")
        self.tabs.addTab(self.summary_table, "Summary")

        splitter = QSplitter(Qt.Vertical)
        splitter.addWidget(self._placeholder("pair", "Column pair distribution g(r) with the matched tau-ladder "
                                                     "rungs; click a peak to select the column pairs at that "
                                                     "distance"))
        self.ladder_table = _table(_LADDER_COLUMNS)
        self.ladder_table.setMinimumHeight(int(self.ladder_table.horizontalHeader().sizeHint().height()
                                               + 5.5 * self.ladder_table.verticalHeader().defaultSectionSize()))
        self.ladder_table.setToolTip("Golden-ratio ladder d0 x tau^n: measured peak, deviation from the ideal "
                                     "ratio and its 1-sigma uncertainty, both in percent")
        splitter.addWidget(self.ladder_table)
        splitter.setStretchFactor(0, 3)
        splitter.setStretchFactor(1, 2)
        self.tabs.addTab(splitter, "Distances")
        self._page["pair"] = splitter

        page, lay = QWidget(), QVBoxLayout()
        page.setLayout(lay)
        lay.setContentsMargins(0, 0, 0, 0)
        lay.addWidget(self._placeholder("species", "Integrated column intensities by species; click a bar to "
                                                   "select those columns"), 1)
        self.tabs.addTab(page, "Species")
        self._page["species"] = page

        self.table = _table(_TABLE_COLUMNS)
        rows = self.table.verticalHeader().defaultSectionSize()
        self.table.setMinimumHeight(int(self.table.horizontalHeader().sizeHint().height() + 10.5 * rows + 4))
        self.table.setToolTip("Motifs, best score first; click a row to select (outline) the motif and zoom to it")
        self.tabs.addTab(self.table, "Motifs")

        page, lay = QWidget(), QVBoxLayout()
        page.setLayout(lay)
        self.tiling_label = QLabel("")
        self.tiling_label.setWordWrap(True)
        lay.addWidget(self.tiling_label)
        lay.addWidget(self._placeholder("tiling", "Cluster network edges coloured by the tile on their side"), 1)
        self.tabs.addTab(page, "Tiling")
        self._page["tiling"] = page

        page, lay = QWidget(), QVBoxLayout()
        page.setLayout(lay)
        self.fourier_label = QLabel("")
        self.fourier_label.setWordWrap(True)
        lay.addWidget(self.fourier_label)
        row = QHBoxLayout()
        self.spectrum_button = QPushButton("Show power spectrum")
        self.spectrum_button.setToolTip(
            "Log power spectrum of the image, or of the selected shape's bounding box in a regions layer, drawn "
            "here in 1/nm (1/px uncalibrated) with the located spots circled; computed in the background"
        )
        row.addWidget(self.spectrum_button)
        row.addStretch(1)
        lay.addLayout(row)
        lay.addWidget(self._placeholder("fourier", "", figsize=(4.2, 4.2)), 1)
        self.spots_table = _table(("shell", "d", "n_spots", "order", "strength"))
        self.spots_table.setToolTip("Spot shells of the power spectrum: lattice-plane spacing d, number of spots, "
                                    "rotational order (0 = none) and mean strength over background")
        lay.addWidget(self.spots_table)
        self.tabs.addTab(page, "Fourier")
        self._page["fourier"] = page

        page, lay = QWidget(), QVBoxLayout()
        page.setLayout(lay)
        self.frames_label = QLabel("align a stack (analysis dock, 'Align stack') or run on 'Stack frames' A:B")
        self.frames_label.setWordWrap(True)
        lay.addWidget(self.frames_label)
        lay.addWidget(self._placeholder("frames", "Shift of every frame relative to the reference frame: x and y "
                                                  "in px; filled markers: frames in the mean, red crosses: frames "
                                                  "left out"), 1)
        self.tabs.addTab(page, "Frames")
        self._page["frames"] = page

        self.notes = QPlainTextEdit()
        self.notes.setReadOnly(True)
        self.notes.setToolTip("The run's notes: automatic choices that could mislead, checks that failed")
        self.tabs.addTab(self.notes, "Notes")

        self.spectrum_button.clicked.connect(self.show_power_spectrum)
        self.table.cellClicked.connect(self.select_motif_row)
        self.session.changed.connect(self.refresh)
        self.session.aligned.connect(self._on_aligned)
        self.image_choice.currentTextChanged.connect(self._choose_image)
        self.tabs.currentChanged.connect(self._on_tab)
        self.refresh()

    # ---------------------------------------------------------------- figures, made when first drawn
    def _placeholder(self, key: str, tip: str, figsize=(4.2, 3.4)) -> QLabel:
        """A label standing where figure ``key`` will be: importing matplotlib's Qt backend took 1-1.5 s of
        frozen GUI when the dock opened, so it is imported in a background thread then and the figure is made
        when its tab is first drawn."""
        label = QLabel("run an analysis")
        label.setAlignment(Qt.AlignCenter)
        label.setMinimumHeight(280)
        label.setMinimumWidth(360)
        label.setToolTip(tip)
        label.figsize = figsize
        self._placeholders[key] = label
        return label

    def _figure(self, key: str):
        """(figure, canvas) of ``key``, made now if needed, in its placeholder's place (same parent)."""
        made = self._figures.get(key)
        if made is None:
            label = self._placeholders.pop(key)
            figure, canvas = _canvas(label.figsize)
            canvas.setToolTip(label.toolTip())
            parent = label.parentWidget()
            if isinstance(parent, QSplitter):
                parent.replaceWidget(parent.indexOf(label), canvas)
            else:
                parent.layout().replaceWidget(label, canvas)
            label.hide()
            label.deleteLater()
            if key == "pair":
                canvas.mpl_connect("button_press_event", self._on_pair_click)
            elif key == "species":
                canvas.mpl_connect("button_press_event", self._on_species_click)
            self._figures[key] = made = (figure, canvas)
        return made

    pair_figure = property(lambda self: self._figure("pair")[0])
    pair_canvas = property(lambda self: self._figure("pair")[1])
    species_figure = property(lambda self: self._figure("species")[0])
    species_canvas = property(lambda self: self._figure("species")[1])
    tiling_figure = property(lambda self: self._figure("tiling")[0])
    tiling_canvas = property(lambda self: self._figure("tiling")[1])
    fourier_figure = property(lambda self: self._figure("fourier")[0])
    fourier_canvas = property(lambda self: self._figure("fourier")[1])
    frames_figure = property(lambda self: self._figure("frames")[0])
    frames_canvas = property(lambda self: self._figure("frames")[1])

    def _choose_image(self, image: str) -> None:
        if image:
            self.session.show(image)

    def _on_tab(self, _index: int) -> None:
        self.info.setText(self._tab_info.get(self.tabs.currentIndex(), "") if hasattr(self, "_tab_info") else "")
        self._draw_current()

    # ---------------------------------------------------------------- drawing
    def refresh(self) -> None:
        """Redraw from the session's current result: the shown tab now, every other tab when it is opened
        (building and drawing the figures is the slow part, and it runs on the GUI thread)."""
        result = self.session.result
        self._spectrum = None
        self._bins = None
        self._peaks = None
        self._tab_info = {}
        self.info.setText("")
        self.image_choice.blockSignals(True)
        self.image_choice.clear()
        self.image_choice.addItems(list(self.session.records))
        if self.session.image:
            self.image_choice.setCurrentText(self.session.image)
        self.image_choice.blockSignals(False)
        for fig, _ in self._figures.values():
            fig.clear()
        if result is None:
            for key in ("pair", "species"):
                if key not in self._figures:  # its placeholder says so
                    continue
                fig, canvas = self._figures[key]
                ax = fig.add_subplot()
                ax.text(0.5, 0.5, "run an analysis", ha="center", va="center", transform=ax.transAxes)
                ax.set_axis_off()
                canvas.draw_idle()
            self._fill_table(None)
            self._todo = {self._index_of(self._page["frames"]): self._draw_frames}
            self._draw_current()
            return
        n = len(result.tables["motifs"])
        self._tab_info[self._index_of(self.table)] = (
            f"{n} motifs" + (f" (best {MAX_TABLE_ROWS} listed)" if n > MAX_TABLE_ROWS else ""))
        self._todo = {self._index_of(self.summary_table): self._fill_summary,
                      self._index_of(self._page["pair"]): self._draw_pairs,
                      self._index_of(self._page["species"]): self._draw_species,
                      self._index_of(self.table): lambda r: self._fill_table(r.tables["motifs"]),
                      self._index_of(self._page["tiling"]): self._draw_tiling,
                      self._index_of(self._page["fourier"]): self._draw_fourier_text,
                      self._index_of(self._page["frames"]): self._draw_frames,
                      self._index_of(self.notes): self._fill_notes}
        self.info.setText(self._tab_info.get(self.tabs.currentIndex(), ""))
        self._draw_current()

    def _index_of(self, widget) -> int:
        """Index of the tab holding ``widget`` (the tab page itself or a child of it)."""
        while widget is not None:
            i = self.tabs.indexOf(widget)
            if i >= 0:
                return i
            widget = widget.parentWidget()
        return -1

    def _fill_summary(self, result) -> None:
        from tenfold.analysis.export import summary_table

        table = summary_table(result)
        _fill(self.summary_table, table)

    def draw_all(self) -> None:
        """Build every tab now (for scripts and screenshots)."""
        for index in list(getattr(self, "_todo", {})):
            self._draw_tab(index)

    def _draw_current(self) -> None:
        self._draw_tab(self.tabs.currentIndex())

    def _draw_tab(self, index: int) -> None:
        draw = getattr(self, "_todo", {}).pop(index, None)
        if draw is not None and (self.session.result is not None or draw == self._draw_frames):
            draw(self.session.result)

    def _on_aligned(self, image: str) -> None:
        """A stack was just aligned: show its shifts."""
        self.tabs.setCurrentWidget(self._page["frames"])
        self._draw_frames(None)

    def _draw_frames(self, _result=None) -> None:
        """Shift x and y of every frame against the frame index: used frames joined and filled, frames left out
        as red crosses (their reasons in the label), the reference frame marked."""
        record = self.session.frames_table()
        if record is None:
            self.frames_label.setText("align a stack (analysis dock, 'Align stack') or run on 'Stack frames' A:B")
            return
        table, info, image = record
        figure = self.frames_figure
        figure.clear()
        ax = figure.add_subplot()
        frame = table["frame"].to_numpy()
        used = table["used"].to_numpy(bool)
        for column, colour, label in (("shift_x_px", PALETTE[0], "shift x"), ("shift_y_px", PALETTE[1], "shift y")):
            v = table[column].to_numpy(float)
            ax.plot(frame[used], v[used], "o-", color=colour, ms=4, lw=1.0, label=f"{label} (used)")
            if (~used).any():  # a shift measured for a frame left out: a red cross
                ax.plot(frame[~used], v[~used], "x", color=PALETTE[4], ms=8, mew=1.8)
        for k, f in enumerate(frame[~used]):  # every frame left out, measured or not: a red band
            ax.axvspan(f - 0.3, f + 0.3, color=PALETTE[4], alpha=0.25, lw=0, label="left out" if k == 0 else None)
        reference = info.get("reference")
        if reference is not None:
            ax.axvline(reference, color="0.5", lw=0.8, ls=":", label="reference frame")
        ax.set_xlabel("frame", fontsize=8)
        ax.set_ylabel("shift (px)", fontsize=8)
        ax.set_title(f"Frame shifts of {image}", fontsize=9)
        ax.tick_params(labelsize=7)
        figure.subplots_adjust(bottom=0.32)
        ax.legend(fontsize=7, frameon=False, ncol=2, loc="upper center", bbox_to_anchor=(0.5, -0.2))
        self._frames_ax = ax
        self._redraw(self.frames_canvas)
        left = table[~used]
        reasons = "; ".join(f"frame {int(r.frame)}: {r.reason}" for r in left.itertuples()) if len(left) else ""
        drift = info.get("residual_drift_px")
        self.frames_label.setText(
            f"{image}: {int(used.sum())} of {len(table)} frames used ({info.get('method', '')}, reference frame "
            f"{reference})" + (f", residual drift {drift:.3g} px" if isinstance(drift, (int, float)) else "")
            + (f"; left out: {reasons}" if reasons else ""))

    def _redraw(self, canvas) -> None:
        canvas.draw_idle()

    def _unit(self, result):
        ps = result.meta.pixel_size_nm
        return ("nm", ps) if ps else ("px", 1.0)

    def _draw_pairs(self, result) -> None:
        unit, f = self._unit(result)
        ax = self.pair_figure.add_subplot()
        curve = result.curves.get("pair_distribution_columns")
        if curve is not None and len(curve):
            ax.plot(curve["r_px"] * f, curve["g"], color=PALETTE[0], lw=1.2)
        ladder = result.tables.get("ladder")
        rungs = ladder[ladder["set"] == "columns"] if ladder is not None and len(ladder) else ladder
        if rungs is not None and len(rungs):
            for k, (x, n) in enumerate(zip(rungs["measured_px"].to_numpy(float) * f, rungs["rung"])):
                if not np.isfinite(x):
                    continue
                ax.axvline(x, color=PALETTE[4], lw=0.9, ls="--")
                # staggered heights so that neighbouring labels never overlap
                ax.annotate(rf"$\tau^{{{n:g}}}$", (x, 0.97 - 0.09 * (k % 3)), xycoords=("data", "axes fraction"),
                            xytext=(3, 0), textcoords="offset points", fontsize=9, color=PALETTE[4], va="top")
        ax.set_xlabel(f"pair distance r ({unit})", fontsize=8)
        ax.set_ylabel("g(r)", fontsize=8)
        ax.set_title("Column pair distribution and \u03c4 ladder (click a peak)", fontsize=9)
        ax.tick_params(labelsize=7)
        self._pair_ax = ax
        peaks = result.tables.get("pair_peaks")
        self._peaks = peaks[peaks["set"] == "columns"] if peaks is not None and len(peaks) else None
        self._redraw(self.pair_canvas)
        rows = ladder.copy() if ladder is not None and len(ladder) else pd.DataFrame(columns=_LADDER_COLUMNS)
        if len(rows):
            rows["ideal"] = rows["ideal_px"] * f
            rows["measured"] = rows["measured_px"] * f
        self.ladder_table.setHorizontalHeaderLabels(
            ["set", "rung n", f"ideal ({unit})", f"measured ({unit})", "deviation (%)", "\u00b1 (%)"])
        _fill(self.ladder_table, rows[list(_LADDER_COLUMNS)])

    def _draw_species(self, result) -> None:
        ax = self.species_figure.add_subplot()
        cols = result.tables["columns"]
        inten = cols["intensity"].to_numpy(float) if len(cols) else np.zeros(0)
        ok = np.isfinite(inten)
        if ok.any():
            bins = np.histogram_bin_edges(inten[ok], bins=60)
            self._bins = bins
            species = cols["species"].to_numpy()
            for s in np.unique(species[ok]):
                sel = ok & (species == s)
                colour = SPECIES_PALETTE[int(s) % len(SPECIES_PALETTE)] if s >= 0 else UNCLASSIFIED_COLOUR
                ax.hist(inten[sel], bins=bins, color=colour, alpha=0.85,
                        label="unclassified" if s < 0 else f"species {s}")
            ax.legend(fontsize=7, frameon=False)
        ax.set_xlabel("integrated intensity (image units px\u00b2)", fontsize=8)
        ax.set_ylabel("columns", fontsize=8)
        ax.set_title("Column intensities by species (click a bar)", fontsize=9)
        ax.tick_params(labelsize=7)
        self._species_ax = ax
        self._redraw(self.species_canvas)

    def _draw_tiling(self, result) -> None:
        self.tiling_figure.subplots_adjust(right=0.7)
        info = result.summary.get("tiling") or {}
        counts = info.get("tile_counts") or {}
        thick, thin = counts.get("thick_rhombus", 0), counts.get("thin_rhombus", 0)
        ratio = info.get("thick_thin_ratio")
        ratio_text = f"{ratio:.3f}" if isinstance(ratio, (int, float)) and math.isfinite(ratio) else "-"
        others = ", ".join(f"{k.replace('_', ' ')} {v}" for k, v in counts.items()
                           if v and k not in ("thick_rhombus", "thin_rhombus"))
        self.tiling_label.setText(
            f"thick rhombi {thick}, thin rhombi {thin}, thick/thin {ratio_text} (ideal Penrose tiling: "
            f"\u03c4 = {TAU:.3f})" + (f"; {others}" if others else "")
            + f"; cluster vertices: {result.summary.get('cluster_vertices', 'ring')}s")
        ax = self.tiling_figure.add_subplot()
        network, motifs = result.tables.get("network"), result.tables["motifs"]
        unit, f = self._unit(result)
        if network is not None and len(network) and len(motifs):
            from matplotlib.collections import LineCollection

            centres = motifs.set_index("motif_id")[["centre_x_px", "centre_y_px"]]
            ok = network["motif_a"].isin(centres.index) & network["motif_b"].isin(centres.index)
            net = network[ok]
            a = centres.loc[net["motif_a"]].to_numpy() * f
            b = centres.loc[net["motif_b"]].to_numpy() * f
            side = net["tile_left"].astype(str).where(net["tile_left"].astype(str) != "", net["tile_right"].astype(str))
            colours = [TILE_COLOURS.get(t, NETWORK_COLOUR) for t in side]
            ax.add_collection(LineCollection(np.stack([a, b], axis=1), colors=colours, linewidths=0.8))
            ax.autoscale()
            ax.set_aspect("equal")
            ax.invert_yaxis()
            from matplotlib.lines import Line2D

            shown = [t for t in TILE_COLOURS if (side == t).any()]
            handles = [Line2D([], [], color=TILE_COLOURS[t]) for t in shown]
            labels = [t.replace("_", " ") for t in shown]
            if not side.isin(list(TILE_COLOURS)).all():  # outer edges and unclassified faces: the network colour
                handles.append(Line2D([], [], color=NETWORK_COLOUR))
                labels.append("outer / no tile")
            ax.legend(handles, labels, fontsize=7, frameon=False, loc="upper left", bbox_to_anchor=(1.0, 1.0))
        else:
            ax.text(0.5, 0.5, "no cluster network", ha="center", va="center", transform=ax.transAxes)
        ax.set_xlabel(f"x ({unit})", fontsize=8)
        ax.set_ylabel(f"y ({unit})", fontsize=8)
        ax.set_title("Tiling map (edge colour: tile beside it)", fontsize=9)
        ax.tick_params(labelsize=7)
        self._redraw(self.tiling_canvas)

    def _draw_fourier_text(self, result) -> None:
        info = result.summary.get("fourier") or {}
        unit, f = self._unit(result)
        if not info:
            self.fourier_label.setText("Fourier stage not run ('Fourier spots' off)")
            _fill(self.spots_table, pd.DataFrame(columns=["shell", "d", "n_spots", "order", "strength"]))
            return
        order = info.get("rotational_order") or 0
        from tenfold.analysis.export import distortion_verdict

        dist = info.get("distortion")
        if info.get("distortion_matrix") is not None:
            significant, dev = distortion_verdict(info)
            applied = (result.summary.get("distortion_correction") or {}).get("applied")
            dist_text = (f"largest |D - identity| {dev:.4f}, "
                         + ("significant (beyond 3 standard errors)" if significant else "not significant")
                         + ("; corrected" if applied else "")
                         + (f"; spot-ellipse axis ratio {dist['axis_ratio']:.4f}" if dist else ""))
        else:
            dist_text = "not estimated"
        self.fourier_label.setText(
            f"dominant order: {order}-fold" if order else "dominant order: none found"
        )
        self.fourier_label.setText(self.fourier_label.text()
                                   + f"; {info.get('n_spots', 0)} spots; distortion: {dist_text}")
        shells = pd.DataFrame(info.get("shells") or [])
        if len(shells):
            shells = pd.DataFrame({"shell": shells["shell"], "d": shells["d_px"] * f, "n_spots": shells["n_spots"],
                                   "order": shells["order"], "strength": shells["strength"]})
        else:
            shells = pd.DataFrame(columns=["shell", "d", "n_spots", "order", "strength"])
        self.spots_table.setHorizontalHeaderLabels(["shell", f"d ({unit})", "spots", "order", "strength"])
        _fill(self.spots_table, shells)
        ax = self.fourier_figure.add_subplot()
        ax.text(0.5, 0.5, "press 'Show power spectrum'", ha="center", va="center", transform=ax.transAxes)
        ax.set_axis_off()
        self._redraw(self.fourier_canvas)

    def _fill_notes(self, result) -> None:
        from ._widget import labelled

        notes = [labelled(n) for n in result.summary.get("notes", [])]
        check = spacing_check(result)
        if check:
            notes.insert(0, "warning: " + check)
        edited = (result.summary.get("columns") or {}).get("hand_edited")
        if edited:
            notes.append("hand edits: " + ", ".join(f"{k} {v}" for k, v in edited.items()))
        self.notes.setPlainText("\n\n".join(notes) if notes else "no notes: nothing in this run asked for care")

    def _fill_table(self, motifs) -> None:
        self._table_rows = np.zeros(0, dtype=np.int64)
        if motifs is None or not len(motifs):
            self.table.setRowCount(0)
            return
        order = np.argsort(-motifs["score"].to_numpy(float), kind="stable")[:MAX_TABLE_ROWS]
        self._table_rows = order
        _fill(self.table, motifs.iloc[order][list(_TABLE_COLUMNS)])

    # ---------------------------------------------------------------- selection in the viewer
    def _zoom_to(self, world: np.ndarray) -> None:
        """Centre the view on (N, 2) world points and zoom so that they fill most of the canvas."""
        if not len(world):
            return
        lo, hi = world.min(axis=0), world.max(axis=0)
        self.viewer.scene.camera.center = tuple((lo + hi) / 2)
        extent = float(max(hi - lo))
        if extent > 0:
            self.viewer.scene.camera.zoom = 0.8 * min(self.viewer.canvas.size) / extent
        else:
            self.viewer.scene.camera.zoom = max(self.viewer.scene.camera.zoom, 1.0)

    def highlight_columns(self, ids) -> int:
        """Select the columns with these ids in the 'columns' layer and zoom to them; returns how many."""
        name = layer_name("columns", self.session.image)
        points = self.viewer.layers[name] if name in self.viewer.layers else None
        if points is None or "id" not in points.features:
            return 0
        idx = np.flatnonzero(np.isin(points.features["id"].to_numpy(), np.asarray(ids)))
        self.viewer.layers.selection.active = points
        points.selected_data = set(idx.tolist())
        data = np.asarray(points.data)[idx]
        self._zoom_to(data * np.asarray(points.scale) + np.asarray(points.translate))
        return len(idx)

    def columns_at_distance(self, distance_px: float, width_px: float) -> np.ndarray:
        """Ids of the columns that have a partner at ``distance_px`` +- ``width_px`` (one KD-tree query)."""
        from scipy.spatial import cKDTree

        cols = self.session.result.tables["columns"]
        xy = cols[["x_px", "y_px"]].to_numpy(float)
        ok = np.all(np.isfinite(xy), axis=1)
        xy, ids = xy[ok], cols["id"].to_numpy()[ok]
        if len(xy) < 2:
            return np.zeros(0, np.int64)
        pairs = cKDTree(xy).query_pairs(distance_px + width_px, output_type="ndarray")
        d = np.hypot(*(xy[pairs[:, 0]] - xy[pairs[:, 1]]).T)
        pairs = pairs[d >= distance_px - width_px]
        return np.unique(ids[pairs.ravel()])

    def select_peak(self, r: float) -> int:
        """Select the columns forming the pair-distance peak nearest ``r`` (plot units); returns how many."""
        if self._peaks is None or not len(self._peaks) or self.session.result is None:
            return 0
        _, f = self._unit(self.session.result)
        d = self._peaks["distance_px"].to_numpy(float)
        k = int(np.nanargmin(np.abs(d - r / f)))
        width = max(2.0 * float(self._peaks["width_px"].to_numpy(float)[k]), 0.02 * d[k])
        ids = self.columns_at_distance(d[k], width)
        label = self._peaks["label"].iloc[k]
        self._say(f"pair peak {label} at {d[k] * f:.3g}: {len(ids)} columns selected")
        return self.highlight_columns(ids)

    def select_intensity_bin(self, value: float) -> int:
        """Select the columns in the histogram bar containing ``value``; returns how many."""
        if self._bins is None or self.session.result is None:
            return 0
        k = int(np.clip(np.searchsorted(self._bins, value) - 1, 0, len(self._bins) - 2))
        lo, hi = self._bins[k], self._bins[k + 1]
        cols = self.session.result.tables["columns"]
        inten = cols["intensity"].to_numpy(float)
        ids = cols["id"].to_numpy()[(inten >= lo) & ((inten < hi) | (k == len(self._bins) - 2) & (inten <= hi))]
        self._say(f"intensity {lo:.4g}-{hi:.4g}: {len(ids)} columns selected")
        return self.highlight_columns(ids)

    def _say(self, text: str) -> None:
        """The info line, for the current tab only (cleared when another tab is opened)."""
        self._tab_info = getattr(self, "_tab_info", {})
        self._tab_info[self.tabs.currentIndex()] = text
        self.info.setText(text)

    def _on_pair_click(self, event) -> None:
        if event.inaxes is getattr(self, "_pair_ax", None) and event.xdata is not None:
            self.select_peak(float(event.xdata))

    def _on_species_click(self, event) -> None:
        if event.inaxes is getattr(self, "_species_ax", None) and event.xdata is not None:
            self.select_intensity_bin(float(event.xdata))

    def select_motif_row(self, row: int, column: int = 0) -> None:
        """Select (outline) the motif of a table row and zoom to it, with its neighbourhood."""
        record = self.session.record
        if record is None or row >= len(self._table_rows):
            return
        index = int(self._table_rows[row])
        motifs = record.result.tables["motifs"]
        if index >= len(motifs):
            return
        self.session.select("motif", index)
        frame = record.frame
        name = layer_name("selected", record.image)
        if name in self.viewer.layers:
            frame = self.viewer.layers[name].metadata.get("tenfold_frame") or frame
        xy = display_maps(frame)[0](motif_polygons(motifs.iloc[[index]], record.result.tables["columns"])[0])
        world = xy[:, ::-1] * np.asarray(frame["scale"]) + np.asarray(frame["translate"])
        self._zoom_to(world)
        # a motif alone fills the canvas; show its neighbourhood too
        self.viewer.scene.camera.zoom = self.viewer.scene.camera.zoom / 4
        kind = motifs["kind"].iloc[index]
        self._say(f"{kind} {int(motifs['motif_id'].iloc[index])} selected (outlined in green)")

    # ---------------------------------------------------------------- power spectrum
    def show_power_spectrum(self) -> None:
        """Compute the log power spectrum in a worker and draw it in the Fourier tab (axes in 1/nm; 1/px when
        uncalibrated). Not a layer: its units would clash with the nm layers."""
        from napari.layers import Image, Shapes
        from napari.qt.threading import create_worker
        from napari.utils.notifications import show_error

        from tenfold.analysis.fourier import power_spectrum

        from ._layers import META_KEY

        if self.worker is not None:
            return
        image_layer = self.session.image_layer
        if image_layer is None or image_layer not in self.viewer.layers:
            images = [ly for ly in self.viewer.layers if isinstance(ly, Image)]
            image_layer = images[-1] if images else None
        if image_layer is None:
            show_error("power spectrum: open a micrograph first")
            return
        data = np.asarray(image_layer.data)
        active = self.viewer.layers.selection.active
        where = "image"
        if isinstance(active, Shapes) and active.selected_data:
            verts = np.asarray(active.data[min(active.selected_data)])[:, -2:]
            rc = data_to_data(verts, active, image_layer)
            r0, c0 = np.floor(rc.min(axis=0)).astype(int).clip(0)
            r1, c1 = np.ceil(rc.max(axis=0)).astype(int) + 1
            data = data[r0:r1, c0:c1]
            where = f"selected shape ({data.shape[0]} x {data.shape[1]} px)"
        px = (image_layer.metadata.get(META_KEY) or {}).get("pixel_size_nm")

        def compute():
            try:
                return power_spectrum(np.asarray(data, np.float32), pixel_size_nm=px), None
            except Exception as exc:  # shown as a notification, never a traceback dialog
                return None, str(exc)

        worker = create_worker(compute, _start_thread=False)
        worker.returned.connect(lambda out: self._draw_spectrum(out, px, where))
        worker.finished.connect(self._spectrum_done)
        self.worker = worker
        self.spectrum_button.setEnabled(False)
        self._say(f"computing the power spectrum of the {where}...")
        worker.start()

    def _spectrum_done(self) -> None:
        self.worker = None
        self.spectrum_button.setEnabled(True)

    def _draw_spectrum(self, out, px, where) -> None:
        from napari.utils.notifications import show_error

        value, error = out
        if error:
            show_error(f"power spectrum: {error}")
            self._say(f"power spectrum: {error}")
            return
        spectrum, k_step = value
        self.tabs.setCurrentWidget(self._page["fourier"])  # builds the tab's text first
        unit = "1/nm" if px else "1/px"
        step = k_step / px if px else k_step
        n_rows, n_cols = spectrum.shape
        extent = (-(n_cols // 2 + 0.5) * step, (n_cols - n_cols // 2 - 0.5) * step,
                  (n_rows - n_rows // 2 - 0.5) * step, -(n_rows // 2 + 0.5) * step)
        self.fourier_figure.clear()
        ax = self.fourier_figure.add_subplot()
        ax.imshow(spectrum, cmap="magma", extent=extent, interpolation="nearest")
        result = self.session.result
        spots = result.tables.get("spots") if result is not None else None
        if spots is not None and len(spots):
            f = 1 / px if px else 1.0
            ax.scatter(spots["kx_per_px"] * f, spots["ky_per_px"] * f, s=40, facecolors="none",
                       edgecolors=KIND_COLOURS["other"], linewidths=0.8, label="located spots")
            ax.legend(fontsize=7, frameon=False, loc="upper right", labelcolor="white")
        ax.set_xlabel(f"k_x ({unit})", fontsize=8)
        ax.set_ylabel(f"k_y ({unit})", fontsize=8)
        ax.set_title(f"Log power spectrum of the {where}", fontsize=9)
        ax.tick_params(labelsize=7)
        self._spectrum = {"data": spectrum, "step": step, "unit": unit, "source": where, "extent": extent}
        self._redraw(self.fourier_canvas)
        self._say(f"power spectrum of the {where}, {step:.3g} {unit} per pixel")

    add_power_spectrum = show_power_spectrum  # the older name
