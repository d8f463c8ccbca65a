"""EntryCard: the frame around one entry of a study: a margin coloured by the entry's kind, a
header with its title and headline figure (a map's verdict, a fan's best member), and buttons
to fold, move and delete it, over the entry's own view."""

from __future__ import annotations

from PySide6 import QtCore, QtGui, QtWidgets

from app.colors import MUTED, kind_color
from app.views import EntryView
from core.entry_model import EntryModel

KIND_WORDS = {"note": "Note", "fan": "Fan", "map": "Map", "log": "Log"}


class ElidedLabel(QtWidgets.QLabel):
    """One line of text that yields its width to its neighbours and ends in "..." when short of
    room; the whole text is in the tooltip."""

    def __init__(self) -> None:
        super().__init__()
        self.setSizePolicy(
            QtWidgets.QSizePolicy.Policy.Ignored, QtWidgets.QSizePolicy.Policy.Preferred
        )

    def setText(self, text: str) -> None:
        super().setText(text)
        self.setToolTip(text)

    def paintEvent(self, event: QtGui.QPaintEvent) -> None:
        painter = QtGui.QPainter(self)
        shown = self.fontMetrics().elidedText(
            self.text(), QtCore.Qt.TextElideMode.ElideRight, self.width()
        )
        painter.drawText(self.rect(), int(self.alignment()), shown)


class EntryCard(QtWidgets.QFrame):
    move_requested = QtCore.Signal(object, int)  # card, +1 or -1
    delete_requested = QtCore.Signal(object)
    selected = QtCore.Signal(object)

    def __init__(self, body: EntryView, parent: QtWidgets.QWidget | None = None) -> None:
        super().__init__(parent)
        self.body = body
        self.model: EntryModel = body.model
        self.kind = self.model.kind
        color = kind_color(self.kind)
        self.setObjectName("entry-card")
        self.setStyleSheet(
            f"#entry-card {{ border: none; border-left: 6px solid {color}; "
            "background: #FFFFFF; margin: 2px 0px; }"
        )
        self.setSizePolicy(
            QtWidgets.QSizePolicy.Policy.Ignored, QtWidgets.QSizePolicy.Policy.Maximum
        )
        layout = QtWidgets.QVBoxLayout(self)
        layout.setContentsMargins(10, 4, 4, 6)
        layout.setSpacing(2)
        header = QtWidgets.QHBoxLayout()
        self.toggle = QtWidgets.QToolButton()
        self.toggle.setArrowType(QtCore.Qt.ArrowType.DownArrow)
        self.toggle.setAutoRaise(True)
        self.toggle.setToolTip("Fold or unfold this entry")
        self.toggle.clicked.connect(lambda: self.set_collapsed(not self.collapsed))
        self.title_label = QtWidgets.QLabel()
        font = self.title_label.font()
        font.setBold(True)
        font.setPointSizeF(font.pointSizeF() * 1.15)
        self.title_label.setFont(font)
        self.kind_label = QtWidgets.QLabel(KIND_WORDS.get(self.kind, self.kind))
        self.kind_label.setStyleSheet(f"color: {color}; font-weight: bold;")
        self.headline_label = ElidedLabel()
        self.headline_label.setStyleSheet(f"color: {MUTED};")
        header.addWidget(self.toggle)
        header.addWidget(self.kind_label)
        header.addWidget(self.title_label)
        header.addSpacing(12)
        header.addWidget(self.headline_label, 1)
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
        body.selected.connect(lambda _: self.selected.emit(self))
        self.model.subscribe(self._on_model_changed)
        self._show_title()
        self.refresh_headline()

    def _tool(self, tip: str, arrow: QtCore.Qt.ArrowType) -> QtWidgets.QToolButton:
        button = QtWidgets.QToolButton()
        button.setArrowType(arrow)
        button.setAutoRaise(True)
        button.setToolTip(tip)
        return button

    def _on_model_changed(self, what: str) -> None:
        if what == "title":
            self._show_title()
        elif what in ("status", "scenario"):
            self.refresh_headline()

    def _show_title(self) -> None:
        self.title_label.setText(self.model.title)

    def refresh_headline(self) -> None:
        headline = getattr(self.body, "headline", None)
        self.headline_label.setText(headline() if callable(headline) else "")

    def set_selected(self, selected: bool) -> None:
        self.title_label.setStyleSheet("text-decoration: underline;" if selected else "")

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
