"""NoteView: a study's note, Markdown rendered; double-click (or Edit) to edit it in place."""

from __future__ import annotations

from collections.abc import Callable

from PySide6 import QtCore, QtGui, QtWidgets

from core.entry_model import NoteModel

Commit = Callable[[NoteModel, str, str], None]  # model, new title, new text


class NoteView(QtWidgets.QFrame):
    selected = QtCore.Signal(object)

    def __init__(
        self,
        model: NoteModel,
        commit: Commit | None = None,
        parent: QtWidgets.QWidget | None = None,
        editable: bool = True,
    ) -> None:
        super().__init__(parent)
        self.model = model
        self.editable = editable
        self._commit = commit or _set_directly
        layout = QtWidgets.QVBoxLayout(self)
        layout.setContentsMargins(6, 2, 6, 6)
        self.label = QtWidgets.QLabel()
        self.label.setTextFormat(QtCore.Qt.TextFormat.MarkdownText)
        self.label.setWordWrap(True)
        self.label.setToolTip("Double-click to edit" if editable else "")
        self.label.setTextInteractionFlags(QtCore.Qt.TextInteractionFlag.LinksAccessibleByMouse)
        self.label.setOpenExternalLinks(True)
        layout.addWidget(self.label)

        self.editor = QtWidgets.QWidget()
        edit_layout = QtWidgets.QVBoxLayout(self.editor)
        edit_layout.setContentsMargins(0, 0, 0, 0)
        self.title_edit = QtWidgets.QLineEdit()
        self.title_edit.setPlaceholderText("title")
        self.text_edit = QtWidgets.QPlainTextEdit()
        self.text_edit.setPlaceholderText("Markdown: *emphasis*, **bold**, lists, `code`")
        self.text_edit.setMinimumHeight(160)
        buttons = QtWidgets.QHBoxLayout()
        hint = QtWidgets.QLabel("Markdown. Ctrl+Enter to finish, Esc to cancel.")
        hint.setStyleSheet("color: #555555")
        self.done_button = QtWidgets.QPushButton("Done")
        self.cancel_button = QtWidgets.QPushButton("Cancel")
        buttons.addWidget(hint, 1)
        buttons.addWidget(self.cancel_button)
        buttons.addWidget(self.done_button)
        edit_layout.addWidget(self.title_edit)
        edit_layout.addWidget(self.text_edit)
        edit_layout.addLayout(buttons)
        layout.addWidget(self.editor)
        self.editor.hide()
        self.done_button.clicked.connect(self.finish_editing)
        self.cancel_button.clicked.connect(self.cancel_editing)
        for keys, slot in (
            ("Ctrl+Return", self.finish_editing),
            ("Escape", self.cancel_editing),
        ):
            shortcut = QtGui.QShortcut(QtGui.QKeySequence(keys), self.editor)
            shortcut.setContext(QtCore.Qt.ShortcutContext.WidgetWithChildrenShortcut)
            shortcut.activated.connect(slot)
        model.subscribe(self._on_model_changed)
        self._render()

    def detach(self) -> None:
        """Stop listening to the model (before the view is dropped)."""
        self.model.unsubscribe(self._on_model_changed)

    @property
    def editing(self) -> bool:
        return not self.editor.isHidden()

    def _render(self) -> None:
        text = self.model.text.strip()
        self.label.setText(text if text else "*An empty note: double-click to write it.*")

    def _on_model_changed(self, what: str) -> None:
        if what in ("text", "title"):
            self._render()

    def start_editing(self) -> None:
        if not self.editable:
            return
        self.title_edit.setText(self.model.title)
        self.text_edit.setPlainText(self.model.text)
        self.label.hide()
        self.editor.show()
        self.text_edit.setFocus()

    def finish_editing(self) -> None:
        if not self.editing:
            return
        title, text = (
            self.title_edit.text().strip() or self.model.title,
            self.text_edit.toPlainText(),
        )
        self.editor.hide()
        self.label.show()
        if (title, text) != (self.model.title, self.model.text):
            self._commit(self.model, title, text)

    def cancel_editing(self) -> None:
        self.editor.hide()
        self.label.show()

    def mouseDoubleClickEvent(self, event: QtGui.QMouseEvent) -> None:
        self.start_editing()

    def mousePressEvent(self, event: QtGui.QMouseEvent) -> None:
        self.selected.emit(self)
        super().mousePressEvent(event)


def _set_directly(model: NoteModel, title: str, text: str) -> None:
    model.set_title(title)
    model.set_text(text)
