"""EntryHeader: the line over a fan's, map's or log's plots: its state in plain words, and
Train (or Replay), Stop and Export. The view connects the buttons and says what to show."""

from __future__ import annotations

from PySide6 import QtWidgets

from app.colors import WARN

OK_INK = "#333333"


class EntryHeader(QtWidgets.QHBoxLayout):
    def __init__(self, train_text: str, train_tip: str) -> None:
        super().__init__()
        self.state_label = QtWidgets.QLabel()
        self._ink = ""  # the state line's colour as last set: a style sheet is set on a change only
        self.addWidget(self.state_label, 1)
        self.train_button = QtWidgets.QPushButton(train_text)
        self.train_button.setToolTip(train_tip)
        self.stop_button = QtWidgets.QPushButton("Stop")
        self.export_button = QtWidgets.QToolButton()
        self.export_button.setText("Export")
        self.export_button.setPopupMode(QtWidgets.QToolButton.ToolButtonPopupMode.InstantPopup)
        for button in (self.train_button, self.stop_button, self.export_button):
            self.addWidget(button)

    def show_state(self, text: str, warn: bool, working: bool) -> None:
        """The state line (in the warning colour for an edited or failed entry) and whether
        Train or Stop applies."""
        self.state_label.setText(text)
        ink = WARN if warn else OK_INK
        if ink != self._ink:  # not re-polished on every record batch
            self._ink = ink
            self.state_label.setStyleSheet(f"color: {ink}")
        self.train_button.setEnabled(not working)
        self.stop_button.setEnabled(working)
