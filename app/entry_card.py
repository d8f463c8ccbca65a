"""EntryCard: the frame around one notebook entry, with its header (collapse, title, move,
delete) above the entry's own view."""

from __future__ import annotations

from PySide6 import QtCore, QtWidgets

from app.note_view import NoteView
from app.run_entry_view import RunEntryView
from app.sweep_entry_view import SweepEntryView
from core.run_model import NoteEntryModel, RunEntryModel
from core.sweep_model import SweepEntryModel

EntryBody = NoteView | RunEntryView | SweepEntryView
EntryModel = NoteEntryModel | RunEntryModel | SweepEntryModel

KIND_NAMES = {NoteView: "note", RunEntryView: "run", SweepEntryView: "sweep"}


class EntryCard(QtWidgets.QFrame):
    move_requested = QtCore.Signal(object, int)  # card, +1 or -1
    delete_requested = QtCore.Signal(object)
    selected = QtCore.Signal(object)

    def __init__(self, body: EntryBody, parent: QtWidgets.QWidget | None = None) -> None:
        super().__init__(parent)
        self.body = body
        self.model: EntryModel = body.model
        self.kind = KIND_NAMES[type(body)]
        self.setObjectName("entry-card")
        self.setFrameShape(QtWidgets.QFrame.Shape.Box)
        self.setStyleSheet("#entry-card { border: 1px solid #C8C8C8; border-radius: 4px; }")
        self.setSizePolicy(
            QtWidgets.QSizePolicy.Policy.Ignored, QtWidgets.QSizePolicy.Policy.Maximum
        )
        layout = QtWidgets.QVBoxLayout(self)
        layout.setContentsMargins(4, 4, 4, 4)
        layout.setSpacing(2)
        header = QtWidgets.QHBoxLayout()
        self.toggle = QtWidgets.QToolButton()
        self.toggle.setArrowType(QtCore.Qt.ArrowType.DownArrow)
        self.toggle.setAutoRaise(True)
        self.toggle.setToolTip("Collapse or expand this entry")
        self.toggle.clicked.connect(lambda: self.set_collapsed(not self.collapsed))
        self.kind_label = QtWidgets.QLabel(self.kind.upper())
        self.kind_label.setStyleSheet(
            "color: #FFFFFF; background: #5A5A5A; padding: 1px 5px; border-radius: 3px;"
            "font-size: 9pt;"
        )
        self.title_label = QtWidgets.QLabel()
        font = self.title_label.font()
        font.setBold(True)
        font.setPointSizeF(font.pointSizeF() * 1.15)
        self.title_label.setFont(font)
        header.addWidget(self.toggle)
        header.addWidget(self.kind_label)
        header.addWidget(self.title_label, 1)
        self.up_button = self._tool("Move up", QtCore.Qt.ArrowType.UpArrow)
        self.down_button = self._tool("Move down", QtCore.Qt.ArrowType.DownArrow)
        self.delete_button = QtWidgets.QToolButton()
        self.delete_button.setText("Delete")
        self.delete_button.setAutoRaise(True)
        self.delete_button.setToolTip("Delete this entry (Edit > Undo brings it back)")
        for button in (self.up_button, self.down_button, self.delete_button):
            header.addWidget(button)
        self.up_button.clicked.connect(lambda: self.move_requested.emit(self, -1))
        self.down_button.clicked.connect(lambda: self.move_requested.emit(self, 1))
        self.delete_button.clicked.connect(lambda: self.delete_requested.emit(self))
        layout.addLayout(header)
        layout.addWidget(body)
        if isinstance(body, RunEntryView | SweepEntryView):
            body.title_label.hide()  # the card's header carries the title
            body.setFrameShape(QtWidgets.QFrame.Shape.NoFrame)
        body.selected.connect(lambda _: self.selected.emit(self))
        self.model.subscribe(self._on_model_changed)
        self._show_title()

    def _tool(self, tip: str, arrow: QtCore.Qt.ArrowType) -> QtWidgets.QToolButton:
        button = QtWidgets.QToolButton()
        button.setArrowType(arrow)
        button.setAutoRaise(True)
        button.setToolTip(tip)
        return button

    def _on_model_changed(self, what: str) -> None:
        if what == "title":
            self._show_title()

    def _show_title(self) -> None:
        self.title_label.setText(self.model.title)

    @property
    def collapsed(self) -> bool:
        return self.body.isHidden()

    def set_collapsed(self, collapsed: bool) -> None:
        self.body.setVisible(not collapsed)
        self.toggle.setArrowType(
            QtCore.Qt.ArrowType.RightArrow if collapsed else QtCore.Qt.ArrowType.DownArrow
        )

    def mousePressEvent(self, event: object) -> None:
        self.selected.emit(self)

    def detach(self) -> None:
        """Stop listening to the model (the card is being dropped for good)."""
        self.model.unsubscribe(self._on_model_changed)
        self.body.detach()
