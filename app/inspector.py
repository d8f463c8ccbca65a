"""Inspector: the pages that edit the selected entry (a fan's or map's form and TOML, a log's
source, a hint for a note), made afresh for each entry and dropped when another is selected."""

from __future__ import annotations

from collections.abc import Callable

from PySide6 import QtCore, QtWidgets

from app.log_form import LogForm
from app.scenario_form import ScenarioForm
from app.toml_editor import TomlEditor
from core.entry_model import EntryModel, TrainedEntry
from core.fan_model import FanModel
from core.log_entry import LogSource
from core.log_model import LogModel
from core.map_model import MapModel
from core.scenario import Scenario

Page = ScenarioForm | TomlEditor | LogForm


class Inspector(QtWidgets.QTabWidget):
    def __init__(
        self,
        commit_scenario: Callable[[TrainedEntry, Scenario], None],
        commit_log: Callable[[LogModel, LogSource], None],
        parent: QtWidgets.QWidget | None = None,
    ) -> None:
        super().__init__(parent)
        self._commit_scenario, self._commit_log = commit_scenario, commit_log
        self.pages: list[Page] = []
        self.model: EntryModel | None = None

    def show_entry(self, model: EntryModel) -> None:
        self.clear_pages()
        self.model = model
        if isinstance(model, FanModel | MapModel):
            self.pages = [
                ScenarioForm(model, commit=self._commit_scenario),
                TomlEditor(model, commit=self._commit_scenario),
            ]
            self.addTab(self.pages[0], "Form")
            self.addTab(self.pages[1], "TOML")
        elif isinstance(model, LogModel):
            self.pages = [LogForm(model, commit=self._commit_log)]
            self.addTab(self.pages[0], "Log")
        else:
            hint = QtWidgets.QLabel("A note: double-click it in the study to edit its Markdown.")
            hint.setWordWrap(True)
            hint.setAlignment(QtCore.Qt.AlignmentFlag.AlignTop)
            self.addTab(hint, "Note")

    def clear_pages(self) -> None:
        for page in self.pages:
            page.detach()
        self.pages, self.model = [], None
        while self.count():
            widget = self.widget(0)
            self.removeTab(0)
            if widget is not None:
                widget.deleteLater()
