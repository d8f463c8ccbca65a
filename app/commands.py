"""Every edit of a notebook as an undoable command: entries added, deleted and moved; scenarios
changed in the form or the TOML tab; notes and titles rewritten."""

from __future__ import annotations

from typing import TYPE_CHECKING

from PySide6 import QtGui

from core.run_model import NoteEntryModel
from core.scenario import Scenario

if TYPE_CHECKING:
    from app.entry_card import EntryCard
    from app.main_window import MainWindow
    from core.run_model import ScenarioHolder


class InsertEntry(QtGui.QUndoCommand):
    def __init__(self, window: MainWindow, card: EntryCard, index: int) -> None:
        super().__init__(f'add {card.kind} "{card.model.title}"')
        self.window, self.card, self.index = window, card, index

    def redo(self) -> None:
        self.window.insert_card(self.card, self.index)

    def undo(self) -> None:
        self.window.take_card(self.card)


class DeleteEntry(QtGui.QUndoCommand):
    def __init__(self, window: MainWindow, card: EntryCard) -> None:
        super().__init__(f'delete "{card.model.title}"')
        self.window, self.card = window, card
        self.index = window.cards.index(card)

    def redo(self) -> None:
        self.window.take_card(self.card)

    def undo(self) -> None:
        self.window.insert_card(self.card, self.index)


class MoveEntry(QtGui.QUndoCommand):
    def __init__(self, window: MainWindow, card: EntryCard, delta: int) -> None:
        super().__init__(f'move "{card.model.title}" {"down" if delta > 0 else "up"}')
        self.window, self.card = window, card
        self.start = window.cards.index(card)
        self.end = max(0, min(len(window.cards) - 1, self.start + delta))

    def redo(self) -> None:
        self.window.take_card(self.card)
        self.window.insert_card(self.card, self.end)

    def undo(self) -> None:
        self.window.take_card(self.card)
        self.window.insert_card(self.card, self.start)


class SetScenario(QtGui.QUndoCommand):
    def __init__(self, model: ScenarioHolder, scenario: Scenario) -> None:
        super().__init__(f'edit the scenario of "{model.title}"')
        self.model, self.old, self.new = model, model.scenario, scenario

    def redo(self) -> None:
        self.model.set_scenario(self.new)

    def undo(self) -> None:
        self.model.set_scenario(self.old)


class EditNote(QtGui.QUndoCommand):
    def __init__(self, model: NoteEntryModel, title: str, text: str) -> None:
        super().__init__(f'edit note "{model.title}"')
        self.model = model
        self.old, self.new = (model.title, model.text), (title, text)

    def _set(self, title: str, text: str) -> None:
        self.model.set_title(title)
        self.model.set_text(text)

    def redo(self) -> None:
        self._set(*self.new)

    def undo(self) -> None:
        self._set(*self.old)


class Rename(QtGui.QUndoCommand):
    def __init__(self, model: ScenarioHolder | NoteEntryModel, title: str) -> None:
        super().__init__(f'rename "{model.title}"')
        self.model, self.old, self.new = model, model.title, title

    def redo(self) -> None:
        self.model.set_title(self.new)

    def undo(self) -> None:
        self.model.set_title(self.old)
