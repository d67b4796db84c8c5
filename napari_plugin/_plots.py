"""The plots dock: pair distribution with the tau ladder, species intensity histogram, motif table, FFT layer."""

from __future__ import annotations

import numpy as np
from qtpy.QtWidgets import (
    QAbstractItemView,
    QHBoxLayout,
    QLabel,
    QPushButton,
    QTableWidget,
    QTableWidgetItem,
    QVBoxLayout,
    QWidget,
)

from ._layers import PALETTE, data_to_data, spectrum_layer_kwargs
from ._session import session_for


__all__ = ["PlotsWidget", "MAX_TABLE_ROWS"]

#: The motif table lists at most this many motifs (best score first); the layers always hold all of them.
MAX_TABLE_ROWS = 400
_TABLE_COLUMNS = ("motif_id", "kind", "complete", "score", "radius_nm", "n_members")


class PlotsWidget(QWidget):
    """Plots of the current result, refreshed whenever the analysis dock finishes a run or re-run."""

    def __init__(self, napari_viewer) -> None:
        super().__init__()
        from matplotlib.backends.backend_qtagg import FigureCanvasQTAgg
        from matplotlib.figure import Figure

        self.viewer = napari_viewer
        self.session = session_for(napari_viewer)
        root = QVBoxLayout(self)
        self.figure = Figure(figsize=(4.2, 5.0), dpi=90, layout="constrained")
        self.canvas = FigureCanvasQTAgg(self.figure)
        self.canvas.setMinimumHeight(360)
        root.addWidget(self.canvas, 3)
        row = QHBoxLayout()
        self.spectrum_button = QPushButton("Add power spectrum")
        self.spectrum_button.setToolTip(
            "log power spectrum of the image, or of the selected shape's bounding box in a regions layer"
        )
        row.addWidget(self.spectrum_button)
        self.info = QLabel("")
        row.addWidget(self.info, 1)
        root.addLayout(row)
        self.table = QTableWidget(0, len(_TABLE_COLUMNS))
        self.table.setHorizontalHeaderLabels(list(_TABLE_COLUMNS))
        self.table.setSelectionBehavior(QAbstractItemView.SelectRows)
        self.table.setSelectionMode(QAbstractItemView.SingleSelection)
        self.table.setEditTriggers(QAbstractItemView.NoEditTriggers)
        root.addWidget(self.table, 2)
        self.spectrum_button.clicked.connect(self.add_power_spectrum)
        self.table.cellClicked.connect(self.select_motif_row)
        self.session.changed.connect(self.refresh)
        self.refresh()

    # ---------------------------------------------------------------- plots
    def refresh(self) -> None:
        """Redraw the plots and the motif table from the session's current result."""
        result = self.session.result
        self.figure.clear()
        ax_g, ax_h = self.figure.subplots(2, 1)
        if result is None:
            for ax in (ax_g, ax_h):
                ax.text(0.5, 0.5, "run an analysis", ha="center", va="center", transform=ax.transAxes)
                ax.set_axis_off()
            self.canvas.draw_idle()
            self._fill_table(None)
            return
        calibrated = result.meta.pixel_size_nm is not None
        unit = "nm" if calibrated else "px"
        curve = result.curves.get("pair_distribution_columns")
        if curve is not None and len(curve):
            ax_g.plot(curve[f"r_{unit}"], curve["g"], color=PALETTE[0], lw=1.2)
        ladder = result.tables.get("ladder")
        if ladder is not None and len(ladder):
            rungs = ladder[ladder["set"] == "columns"]
            for _, r in rungs.iterrows():  # a handful of rungs
                x = r[f"measured_{unit}"]
                if np.isfinite(x):
                    ax_g.axvline(x, color=PALETTE[1], lw=1.0, ls="--")
                    ax_g.annotate(f"\u03c4^{r['rung']:g}", (x, 1), xycoords=("data", "axes fraction"),
                                  xytext=(2, -10), textcoords="offset points", fontsize=7, color=PALETTE[1])
        ax_g.set_xlabel(f"pair distance r ({unit})")
        ax_g.set_ylabel("g(r)")
        ax_g.set_title("Column pair distribution and \u03c4 ladder", fontsize=9)
        cols = result.tables["columns"]
        if len(cols):
            inten = cols["intensity"].to_numpy(float)
            ok = np.isfinite(inten)
            bins = np.histogram_bin_edges(inten[ok], bins=60) if ok.any() else 10
            species = cols["species"].to_numpy()
            from tenfold.analysis.export import SPECIES_COLOURS  # the same colours as the columns layer

            for s in np.unique(species[ok]):
                sel = ok & (species == s)
                colour = SPECIES_COLOURS[int(s) % len(SPECIES_COLOURS)] if s >= 0 else PALETTE[7]
                ax_h.hist(inten[sel], bins=bins, color=colour, alpha=0.8,
                          label="unclassified" if s < 0 else f"species {s}")
            ax_h.legend(fontsize=7, frameon=False)
        ax_h.set_xlabel("integrated intensity (counts px\u00b2)")
        ax_h.set_ylabel("columns")
        ax_h.set_title("Column intensities by species", fontsize=9)
        for ax in (ax_g, ax_h):
            ax.tick_params(labelsize=7)
        self.canvas.draw_idle()
        self._fill_table(result.tables["motifs"])

    def _fill_table(self, motifs) -> None:
        self.table.setRowCount(0)
        self._table_rows = np.zeros(0, dtype=np.int64)
        if motifs is None or not len(motifs):
            self.info.setText("")
            return
        order = np.argsort(-motifs["score"].to_numpy(float), kind="stable")[:MAX_TABLE_ROWS]
        self._table_rows = order
        shown = motifs.iloc[order]
        self.table.setRowCount(len(shown))
        for j, name in enumerate(_TABLE_COLUMNS):
            values = shown[name].to_numpy()
            for i, v in enumerate(values):  # at most MAX_TABLE_ROWS rows of widgets
                text = f"{v:.3g}" if isinstance(v, (float, np.floating)) else str(v)
                self.table.setItem(i, j, QTableWidgetItem(text))
        n = len(motifs)
        self.info.setText(f"{n} motifs" + (f" (best {MAX_TABLE_ROWS} listed)" if n > MAX_TABLE_ROWS else ""))

    # ---------------------------------------------------------------- interaction
    def select_motif_row(self, row: int, column: int = 0) -> None:
        """Select the motif of a table row in the 'motifs' layer and centre the view on it."""
        layer = self.viewer.layers["motifs"] if "motifs" in self.viewer.layers else None
        if layer is None or row >= len(self._table_rows):
            return
        index = int(self._table_rows[row])
        if index >= len(layer.data):
            return
        layer.selected_data = {index}
        centre = np.asarray(layer.data[index]).mean(axis=0)
        self.viewer.scene.camera.center = tuple(layer.data_to_world(centre))
        self.viewer.layers.selection.active = layer

    def add_power_spectrum(self) -> None:
        """Add the log power spectrum as the 'power spectrum' image layer, scale in 1/nm (1/px uncalibrated)."""
        from napari.layers import Image, Shapes
        from napari.utils.notifications import show_error

        from tenfold.analysis.fourier import power_spectrum

        image_layer = self.session.image_layer
        if image_layer is None or image_layer not in self.viewer.layers:
            images = [ly for ly in self.viewer.layers if isinstance(ly, Image) and ly.name != "power spectrum"]
            image_layer = images[-1] if images else None
        if image_layer is None:
            show_error("power spectrum: open a micrograph first")
            return
        from ._layers import META_KEY

        data = np.asarray(image_layer.data, dtype=np.float32)
        active = self.viewer.layers.selection.active
        where = "image"
        if isinstance(active, Shapes) and active.name not in ("motifs", "network") and active.selected_data:
            verts = np.asarray(active.data[min(active.selected_data)])[:, -2:]
            rc = data_to_data(verts, active, image_layer)
            r0, c0 = np.floor(rc.min(axis=0)).astype(int).clip(0)
            r1, c1 = np.ceil(rc.max(axis=0)).astype(int) + 1
            data = data[r0:r1, c0:c1]
            where = f"selected shape ({data.shape[0]} x {data.shape[1]} px)"
        meta = image_layer.metadata.get(META_KEY) or {}
        px = meta.get("pixel_size_nm")
        try:
            spectrum, k_step = power_spectrum(data, pixel_size_nm=px)
        except Exception as exc:
            show_error(str(exc))
            return
        kwargs = spectrum_layer_kwargs(spectrum, k_step / px if px else k_step, px is not None)
        kwargs["metadata"]["source"] = where
        if "power spectrum" in self.viewer.layers:
            self.viewer.layers.remove("power spectrum")
        self.viewer.add_image(**kwargs)
        self.info.setText(f"power spectrum of the {where}")
