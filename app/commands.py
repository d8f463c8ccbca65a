"""Every edit of a study as an undoable command: entries added, deleted and moved; scenarios
changed in the form or the TOML tab; notes and titles rewritten.

Commands change the study and its entry models, never a widget: the window, the inspector and
every view follow the models they listen to, so undo and redo replay exactly.
"""

from __future__ import annotations

from PySide6 import QtGui

from core.entry_model import EntryModel, NoteModel, TrainedEntry
from core.log_entry import LogSource
from core.log_model import LogModel
from core.scenario import Scenario
from core.study import Study


class InsertEntry(QtGui.QUndoCommand):
    def __init__(self, study: Study, entry: EntryModel, index: int) -> None:
        super().__init__(f'add {entry.kind} "{entry.title}"')
        self.study, self.entry, self.index = study, entry, index

    def redo(self) -> None:
        self.study.insert(self.index, self.entry)

    def undo(self) -> None:
        self.study.remove(self.entry)


class DeleteEntry(QtGui.QUndoCommand):
    def __init__(self, study: Study, entry: EntryModel) -> None:
        super().__init__(f'delete "{entry.title}"')
        self.study, self.entry = study, entry
        self.index = study.index(entry)

    def redo(self) -> None:
        self.study.remove(self.entry)

    def undo(self) -> None:
        self.study.insert(self.index, self.entry)


class MoveEntry(QtGui.QUndoCommand):
    def __init__(self, study: Study, entry: EntryModel, delta: int) -> None:
        super().__init__(f'move "{entry.title}" {"down" if delta > 0 else "up"}')
        self.study, self.entry = study, entry
        self.start = study.index(entry)
        self.end = max(0, min(len(study) - 1, self.start + delta))

    def redo(self) -> None:
        self.study.move(self.entry, self.end)

    def undo(self) -> None:
        self.study.move(self.entry, self.start)


class SetScenario(QtGui.QUndoCommand):
    def __init__(self, model: TrainedEntry, scenario: Scenario) -> None:
        super().__init__(f'edit the scenario of "{model.title}"')
        self.model, self.old, self.new = model, model.scenario, scenario

    def redo(self) -> None:
        self.model.set_scenario(self.new)

    def undo(self) -> None:
        self.model.set_scenario(self.old)


class SetLogSource(QtGui.QUndoCommand):
    def __init__(self, model: LogModel, source: LogSource) -> None:
        super().__init__(f'edit the log of "{model.title}"')
        self.model, self.old, self.new = model, model.source, source

    def redo(self) -> None:
        self.model.set_source(self.new)

    def undo(self) -> None:
        self.model.set_source(self.old)


class EditNote(QtGui.QUndoCommand):
    def __init__(self, model: NoteModel, title: str, text: str) -> None:
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
    def __init__(self, model: EntryModel, title: str) -> None:
        super().__init__(f'rename "{model.title}"')
        self.model, self.old, self.new = model, model.title, title

    def redo(self) -> None:
        self.model.set_title(self.new)

    def undo(self) -> None:
        self.model.set_title(self.old)


class RenameStudy(QtGui.QUndoCommand):
    def __init__(self, study: Study, title: str) -> None:
        super().__init__(f'rename the study "{study.title}"')
        self.study, self.old, self.new = study, study.title, title

    def redo(self) -> None:
        self.study.set_title(self.new)

    def undo(self) -> None:
        self.study.set_title(self.old)
