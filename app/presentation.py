"""The presentation view: one entry at a time, full screen, large type, arrow keys to move.

It shows the study's own entry models through views of its own, so an entry training in the
study keeps filling its plots here, and the slider still scrubs the fan live.
"""

from __future__ import annotations

from collections.abc import Callable

from PySide6 import QtCore, QtGui, QtWidgets

from app.axes import overhanging_title
from app.fan_view import FanView
from app.map_view import MapView
from app.note_view import NoteView
from app.views import EntryView, make_view
from core.runner import Runner
from core.study import Study

TITLE_PT = 28
TEXT_PT = 20
PLOT_PT = 13


def enlarge_plots(canvas: object, points: int = PLOT_PT) -> None:
    """Larger titles and ticks for every plot of a canvas; axis names and legends grow less,
    so that they still fit beside and inside the plots."""
    import pyqtgraph as pg

    layout = canvas.ci  # type: ignore[attr-defined]
    tick_font, small_font = QtGui.QFont(), QtGui.QFont()
    tick_font.setPointSize(points - 1)
    small_font.setPointSize(points - 3)
    for item in layout.items:
        if isinstance(item, pg.LegendItem):
            for _, label in item.items:
                label.setText(label.text, size=f"{points - 2}pt")
            continue
        if not isinstance(item, pg.PlotItem):
            continue
        item.titleLabel.setText(item.titleLabel.text, size=f"{points}pt")
        overhanging_title(item)
        for name in ("left", "bottom"):
            axis = item.getAxis(name)
            axis.setStyle(tickFont=tick_font)
            axis.label.setFont(small_font)
        legend = item.legend
        if legend is not None:
            for _, label in legend.items:
                label.setText(label.text, size=f"{points - 3}pt")


class PresentationWindow(QtWidgets.QWidget):
    """Shows one entry of the study: Right, Down, Space or PageDown for the next; Left, Up,
    Backspace or PageUp for the one before; Home and End; Esc leaves."""

    closed = QtCore.Signal()

    def __init__(
        self,
        study: Study,
        index: int = 0,
        runner: Runner | None = None,
        parent: QtWidgets.QWidget | None = None,
    ) -> None:
        super().__init__(parent, QtCore.Qt.WindowType.Window)
        self.setWindowTitle(f"Gradfence - {study.title} - presentation")
        self.setObjectName("presentation")
        self.setStyleSheet("#presentation { background: #FFFFFF; }")
        self.study, self.runner = study, runner
        self.entries = list(study.entries)
        self.views: dict[int, EntryView] = {}
        self.pages: dict[int, QtWidgets.QScrollArea] = {}
        layout = QtWidgets.QVBoxLayout(self)
        layout.setContentsMargins(32, 16, 32, 10)
        self.title_label = QtWidgets.QLabel()
        title_font = self.title_label.font()
        title_font.setPointSize(TITLE_PT)
        title_font.setBold(True)
        self.title_label.setFont(title_font)
        self.title_label.setWordWrap(True)
        layout.addWidget(self.title_label)
        self.stack = QtWidgets.QStackedWidget()
        layout.addWidget(self.stack, 1)
        footer = QtWidgets.QHBoxLayout()
        self.position_label = QtWidgets.QLabel()
        hint = QtWidgets.QLabel("Left / Right to move, Esc to leave")
        for label in (self.position_label, hint):
            label.setStyleSheet("color: #666666; font-size: 12pt;")
        footer.addWidget(hint)
        footer.addStretch(1)
        footer.addWidget(self.position_label)
        layout.addLayout(footer)
        self.keys: dict[int, Callable[[], None]] = {}
        key = QtCore.Qt.Key
        for keys, slot in (
            ((key.Key_Right, key.Key_Space, key.Key_PageDown, key.Key_Down), self.next),
            ((key.Key_Left, key.Key_Backspace, key.Key_PageUp, key.Key_Up), self.previous),
            ((key.Key_Home,), lambda: self.show_entry(0)),
            ((key.Key_End,), lambda: self.show_entry(len(self.entries) - 1)),
            ((key.Key_Escape,), self.leave),
        ):
            for k in keys:
                self.keys[int(k.value)] = slot
        # Seen before any child: a slider or a box of the entry never takes the arrow keys.
        app = QtWidgets.QApplication.instance()
        if app is not None:
            app.installEventFilter(self)
        self.index = -1
        if self.entries:
            self.show_entry(index)

    def _view(self, index: int) -> EntryView:
        if index in self.views:
            return self.views[index]
        view = make_view(self.entries[index], editable=False)
        if isinstance(view, NoteView):
            view.label.setStyleSheet(f"font-size: {TEXT_PT}pt;")
            view.label.setAlignment(QtCore.Qt.AlignmentFlag.AlignTop)
        else:
            if self.runner is not None:
                runner = self.runner
                view.train_requested.connect(lambda v, f: runner.train(v.model, focus=f))
                view.stop_requested.connect(lambda v: runner.stop(v.model))
            if isinstance(view, FanView):
                view.use_columns(3)
                view.setMinimumHeight(0)
                view.canvas.setMinimumHeight(300)
            if isinstance(view, MapView):
                view.sentences.setStyleSheet(f"font-size: {PLOT_PT}pt;")
                view.drawn.connect(lambda v=view: enlarge_plots(v.canvas))
            enlarge_plots(view.canvas)
            view.setStyleSheet(
                "QLabel, QPushButton, QComboBox, QCheckBox, QDoubleSpinBox "
                f"{{ font-size: {PLOT_PT}pt; }}"
            )
        scroll = QtWidgets.QScrollArea()
        scroll.setWidgetResizable(True)
        scroll.setFrameShape(QtWidgets.QFrame.Shape.NoFrame)
        scroll.setHorizontalScrollBarPolicy(QtCore.Qt.ScrollBarPolicy.ScrollBarAlwaysOff)
        scroll.setWidget(view)
        scroll.setStyleSheet(
            "QScrollArea, QScrollArea > QWidget > QWidget { background: #FFFFFF; }"
        )
        self.stack.addWidget(scroll)
        self.views[index], self.pages[index] = view, scroll
        return view

    def show_entry(self, index: int) -> None:
        if not self.entries:
            return
        index = max(0, min(index, len(self.entries) - 1))
        view = self._view(index)
        self.index = index
        self.stack.setCurrentWidget(self.pages[index])
        entry = self.entries[index]
        self.title_label.setText(entry.title)
        self.position_label.setText(f"{entry.kind} - {index + 1} / {len(self.entries)}")
        if isinstance(view, FanView | MapView):
            view.refresh()

    def next(self) -> None:
        self.show_entry(self.index + 1)

    def previous(self) -> None:
        self.show_entry(self.index - 1)

    def leave(self) -> None:
        self.close()

    def refresh_if_dirty(self) -> bool:
        """Redraw the entry on screen for records that arrived; whether a fan's plots redrew."""
        view = self.views.get(self.index)
        if isinstance(view, FanView):
            return view.refresh_if_dirty()
        if isinstance(view, MapView):
            view.refresh_if_dirty()
        return False

    def eventFilter(self, watched: QtCore.QObject, event: QtCore.QEvent) -> bool:
        if (
            event.type() == QtCore.QEvent.Type.KeyPress
            and isinstance(watched, QtWidgets.QWidget)
            and watched.window() is self
            and isinstance(event, QtGui.QKeyEvent)
            and event.modifiers() == QtCore.Qt.KeyboardModifier.NoModifier
        ):
            slot = self.keys.get(event.key())
            if slot is not None:
                slot()
                return True
        return False

    def closeEvent(self, event: QtGui.QCloseEvent) -> None:
        app = QtWidgets.QApplication.instance()
        if app is not None:
            app.removeEventFilter(self)
        for view in self.views.values():
            view.detach()
        self.closed.emit()
        super().closeEvent(event)
