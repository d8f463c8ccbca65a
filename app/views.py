"""The view of each kind of entry, made on its own: the window's cards, the presentation view
and the handout all ask here, so a new entry kind is one more line."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Protocol

from PySide6 import QtWidgets

from app.fan_view import FanView
from app.log_view import LogView
from app.map_view import MapView
from app.note_view import Commit, NoteView
from core.entry_model import TRAINING, EntryModel, NoteModel
from core.fan_model import FanModel
from core.log_model import LogModel
from core.map_model import MapModel

EntryView = NoteView | FanView | MapView | LogView
WorkedView = FanView | MapView | LogView


class Card(Protocol):
    """What the redraw needs of an entry card (app/entry_card.py imports this module)."""

    @property
    def body(self) -> EntryView: ...

    @property
    def model(self) -> EntryModel: ...

    def refresh_headline(self) -> None: ...


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


def redraw_cards(cards: Sequence[Card], turn: int, drawn: bool) -> int:
    """Redraw what changed in the cards, starting at card `turn`; at most one fan's plots (none
    when `drawn`), so that a tick stays short and input is answered between ticks. Returns the
    card to start at next time: the fans take turns."""
    start = turn % max(len(cards), 1)
    for index in [*range(start, len(cards)), *range(start)]:
        card = cards[index]
        body, model = card.body, card.model
        if isinstance(body, FanView):
            if drawn or not body.refresh_if_dirty():
                continue
            drawn, turn = True, index + 1
        elif isinstance(body, MapView | LogView):
            body.refresh_if_dirty()
        else:
            continue
        if isinstance(model, FanModel | MapModel | LogModel) and model.status == TRAINING:
            card.refresh_headline()
    return turn
