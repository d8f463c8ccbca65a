"""The view of each kind of entry, made on its own: the window's cards, the presentation view
and the handout all ask here, so a new entry kind is one more line."""

from __future__ import annotations

from PySide6 import QtWidgets

from app.fan_view import FanView
from app.log_view import LogView
from app.map_view import MapView
from app.note_view import Commit, NoteView
from core.entry_model import EntryModel, NoteModel
from core.fan_model import FanModel
from core.log_model import LogModel
from core.map_model import MapModel

EntryView = NoteView | FanView | MapView | LogView
WorkedView = FanView | MapView | LogView


def make_view(
    model: EntryModel,
    *,
    note_commit: Commit | None = None,
    editable: bool = True,
    parent: QtWidgets.QWidget | None = None,
) -> EntryView:
    """A fresh view of `model`; notes are edited through `note_commit` when `editable`."""
    if isinstance(model, NoteModel):
        return NoteView(model, commit=note_commit, editable=editable, parent=parent)
    if isinstance(model, FanModel):
        return FanView(model, parent=parent)
    if isinstance(model, MapModel):
        return MapView(model, parent=parent)
    if isinstance(model, LogModel):
        return LogView(model, parent=parent)
    raise TypeError(f"no view for {type(model).__name__}")
