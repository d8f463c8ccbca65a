"""TomlEditor: a fan or map entry's scenario as TOML, validated as you type.

Valid text replaces the model's scenario; invalid text shows the validator's sentence and the
model keeps its last valid scenario.
"""

from __future__ import annotations

from PySide6 import QtCore, QtGui, QtWidgets

from app.scenario_form import Commit, set_directly
from core.entry_model import TrainedEntry
from core.errors import GradfenceInputError
from core.scenario import dumps_scenario, loads_scenario

DEBOUNCE_MS = 300


class TomlEditor(QtWidgets.QWidget):
    def __init__(
        self,
        model: TrainedEntry,
        commit: Commit | None = None,
        parent: QtWidgets.QWidget | None = None,
    ) -> None:
        super().__init__(parent)
        self.model = model
        self._commit = commit or set_directly
        layout = QtWidgets.QVBoxLayout(self)
        self.editor = QtWidgets.QPlainTextEdit()
        self.editor.setFont(
            QtGui.QFontDatabase.systemFont(QtGui.QFontDatabase.SystemFont.FixedFont)
        )
        self.status = QtWidgets.QLabel()
        self.status.setWordWrap(True)
        layout.addWidget(self.editor, 1)
        layout.addWidget(self.status)
        self._timer = QtCore.QTimer(self)
        self._timer.setSingleShot(True)
        self._timer.setInterval(DEBOUNCE_MS)
        self._timer.timeout.connect(self.validate)
        self._show(dumps_scenario(model.scenario))
        self.editor.textChanged.connect(self._timer.start)
        model.subscribe(self._on_model_changed)

    def _show(self, text: str) -> None:
        self.editor.blockSignals(True)
        self.editor.setPlainText(text)
        self.editor.blockSignals(False)
        self.status.setText("valid")
        self.status.setStyleSheet("color: #006000")

    def validate(self) -> bool:
        """Check the text now; on success it becomes the entry's scenario."""
        self._timer.stop()
        try:
            scenario = loads_scenario(self.editor.toPlainText(), "TOML tab")
        except GradfenceInputError as exc:
            self.status.setText(f"{exc} The entry keeps its last valid scenario.")
            self.status.setStyleSheet("color: #B00000")
            return False
        self.status.setText("valid")
        self.status.setStyleSheet("color: #006000")
        self._applying = True
        try:
            self._commit(self.model, scenario)
        finally:
            self._applying = False
        return True

    _applying = False

    def detach(self) -> None:
        self._timer.stop()
        self.model.unsubscribe(self._on_model_changed)

    def _on_model_changed(self, what: str) -> None:
        if what == "scenario" and not self._applying:
            self._show(dumps_scenario(self.model.scenario))
