"""State shared by the analysis and plots docks of one viewer: the current result and where it is drawn."""

from __future__ import annotations

import weakref

from qtpy.QtCore import QObject, Signal

__all__ = ["Session", "session_for"]

_SESSIONS: "weakref.WeakValueDictionary[int, Session]" = weakref.WeakValueDictionary()


class Session(QObject):
    """The current :class:`AnalysisResult` of one viewer and the pixel frame its layers use.

    ``changed`` is emitted (on the GUI thread) after a run, a re-run from columns or a new selection.
    """

    changed = Signal()

    def __init__(self, viewer) -> None:
        super().__init__()
        self.viewer = viewer
        self.result = None
        self.frame: dict | None = None
        self.image_layer = None
        self.regions: list = []

    def set_result(self, result, frame: dict, image_layer, regions) -> None:
        self.result, self.frame, self.image_layer, self.regions = result, frame, image_layer, list(regions or [])
        self.changed.emit()


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
