"""NoteView: a notebook note, Markdown rendered."""

from __future__ import annotations

from PySide6 import QtCore, QtWidgets


class NoteView(QtWidgets.QFrame):
    def __init__(self, title: str, text: str, parent: QtWidgets.QWidget | None = None) -> None:
        super().__init__(parent)
        self.title = title
        layout = QtWidgets.QVBoxLayout(self)
        self.label = QtWidgets.QLabel()
        self.label.setTextFormat(QtCore.Qt.TextFormat.MarkdownText)
        self.label.setWordWrap(True)
        self.label.setText(f"### {title}\n\n{text}")
        layout.addWidget(self.label)
