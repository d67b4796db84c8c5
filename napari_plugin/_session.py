"""State shared by the analysis and plots docks of one viewer: every image's result and where it is drawn."""

from __future__ import annotations

import weakref
from dataclasses import dataclass, field

from qtpy.QtCore import QObject, Signal

__all__ = ["Session", "Record", "session_for"]

_SESSIONS: "weakref.WeakValueDictionary[int, Session]" = weakref.WeakValueDictionary()


@dataclass
class Record:
    """One image's current result: the result, the frame its layers use, the image layer, the regions and the
    table of the columns layer as last drawn (the layer itself carries only the ids)."""

    image: str
    result: object
    frame: dict
    image_layer: object
    regions: list = field(default_factory=list)
    picker: object = None


class Session(QObject):
    """The results of one viewer, one per image (keyed by the image layer's name), and which one is shown.

    ``changed`` is emitted (on the GUI thread) after a run, a re-run from columns or when another image's result
    becomes the current one; ``selected`` when the inspected column or motif changes.
    """

    changed = Signal()
    selected = Signal()
    aligned = Signal(str)

    def __init__(self, viewer) -> None:
        super().__init__()
        self.viewer = viewer
        self.records: dict[str, Record] = {}
        self.current: str | None = None
        self.selection: tuple | None = None  # ('column' | 'motif', row index in the current result's table)
        self.alignments: dict[str, tuple] = {}  # aligned-mean layer name -> (frames table, alignment info)
        self.last_aligned: str | None = None

    # the current record's fields, as the docks read them
    @property
    def record(self) -> Record | None:
        return self.records.get(self.current) if self.current is not None else None

    @property
    def result(self):
        return self.record.result if self.record else None

    @property
    def frame(self):
        return self.record.frame if self.record else None

    @property
    def image_layer(self):
        return self.record.image_layer if self.record else None

    @property
    def regions(self) -> list:
        return self.record.regions if self.record else []

    @property
    def image(self) -> str | None:
        return self.current

    def set_result(self, result, frame: dict, image_layer, regions, *, image: str | None = None) -> None:
        image = image if image is not None else getattr(image_layer, "name", None)
        self.records[image] = Record(image, result, frame, image_layer, list(regions or []))
        self.current = image
        self.selection = None
        self.changed.emit()

    def set_alignment(self, image: str, table, info: dict) -> None:
        """Record a frame series' alignment (shown in the plots dock) under the aligned-mean layer's name."""
        self.alignments[image] = (table, dict(info))
        self.last_aligned = image
        self.aligned.emit(image)

    def frames_table(self):
        """(table, info, image) of the frame alignment to show: the current result's, else the last one made."""
        result = self.result
        if result is not None and result.tables.get("frames") is not None:
            return result.tables["frames"], result.summary.get("frames") or {}, self.image
        image = self.current if self.current in self.alignments else self.last_aligned
        if image is None:
            return None
        return (*self.alignments[image], image)

    def show(self, image: str) -> None:
        """Make ``image``'s result the current one (no-op when it already is or has none)."""
        if image in self.records and image != self.current:
            self.current = image
            self.selection = None
            self.changed.emit()

    def select(self, kind: str | None, row: int | None = None) -> None:
        """Select a column or motif (row of the current result's table) or nothing; outlines it in the viewer."""
        from ._layers import draw_selection

        self.selection = (kind, row) if kind is not None else None
        draw_selection(self.viewer, self.record, kind, row)
        self.selected.emit()


def session_for(viewer) -> Session:
    """The one session of ``viewer``, created on first use (kept alive by the docks that hold it)."""
    # napari hands each plugin dock its own proxy of the viewer (add_plugin_dock_widget, ``napari -w``): key the
    # session on the viewer behind the proxy, so all docks of one viewer share it
    viewer = getattr(viewer, "__wrapped__", viewer)
    session = _SESSIONS.get(id(viewer))
    if session is None or session.viewer is not viewer:
        session = Session(viewer)
        _SESSIONS[id(viewer)] = session
    return session
