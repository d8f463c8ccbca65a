"""The presentation view: one entry at a time, arrow keys to move, live plots, Esc to leave."""

from __future__ import annotations

import pytest
from PySide6 import QtCore, QtWidgets
from pytestqt.qtbot import QtBot

from app.fan_view import FanView
from app.main_window import MainWindow
from app.note_view import NoteView
from app.presentation import TITLE_PT, PresentationWindow
from core.entry_model import TRAINED
from tests.app.conftest import trained


def test_arrow_keys_move_through_the_entries_and_escape_leaves(
    qtbot: QtBot, window: MainWindow
) -> None:
    window.select_card(window.cards[0])
    shown = window.present(full_screen=False)
    qtbot.waitExposed(shown)
    assert shown.index == 0 and isinstance(shown.views[0], NoteView)
    assert shown.title_label.text() == "A note" and shown.title_label.font().pointSize() == TITLE_PT
    assert shown.position_label.text() == "note - 1 / 2"
    qtbot.keyClick(shown, QtCore.Qt.Key.Key_Right)
    assert shown.index == 1 and isinstance(shown.views[1], FanView)
    assert shown.title_label.text() == "Quick blobs"
    run_view = shown.views[1]
    assert isinstance(run_view, FanView)
    before = run_view.slider.value()
    qtbot.keyClick(run_view.slider, QtCore.Qt.Key.Key_Left)  # the entry's slider has focus
    assert shown.index == 0 and run_view.slider.value() == before
    qtbot.keyClick(shown, QtCore.Qt.Key.Key_Right)
    qtbot.keyClick(shown, QtCore.Qt.Key.Key_Right)  # the last entry: it stays
    assert shown.index == 1
    qtbot.keyClick(shown, QtCore.Qt.Key.Key_Left)
    assert shown.index == 0
    qtbot.keyClick(shown, QtCore.Qt.Key.Key_End)
    assert shown.index == 1
    qtbot.keyClick(shown, QtCore.Qt.Key.Key_Escape)
    qtbot.waitUntil(lambda: window.presentation is None)


def test_a_fan_trained_from_the_presentation_fills_its_plots_there(
    qtbot: QtBot, window: MainWindow
) -> None:
    window.select_card(window.cards[1])
    shown: PresentationWindow = window.present(full_screen=False)
    view = shown.views[1]
    assert isinstance(view, FanView) and view.model is window.fan_views[0].model
    view.train_button.click()
    qtbot.waitUntil(lambda: view.model.status == TRAINED, timeout=90_000)
    window._on_redraw_tick()
    x, _ = view.curves[("global-norm", "loss")].getOriginalDataset()
    assert x is not None and len(x) == 16
    shown.close()
    assert window.presentation is None


def drawn_tick_labels(axis: object) -> list[str]:
    """The tick labels pyqtgraph actually draws on an axis (after dropping those that would
    overlap), from its own drawing specs."""
    from PySide6 import QtGui

    image = QtGui.QImage(10, 10, QtGui.QImage.Format.Format_ARGB32)
    painter = QtGui.QPainter(image)
    try:
        specs = axis.generateDrawSpecs(painter)  # type: ignore[attr-defined]
    finally:
        painter.end()
    return [text for _, _, text in specs[2] if text] if specs else []


@pytest.mark.parametrize("size", [(1280, 720), (1920, 1080)], ids=["1280x720", "1920x1080"])
def test_a_presented_fan_fits_its_screen_and_every_axis_has_three_ticks(
    qtbot: QtBot, window: MainWindow, size: tuple[int, int]
) -> None:
    """Issue 14: nothing cut off at 1280x720 and 1920x1080, every axis with at least three
    labelled ticks."""
    import pyqtgraph as pg

    trained(qtbot, window)
    window.select_card(window.cards[1])
    shown = window.present(full_screen=False)
    shown.resize(*size)
    qtbot.waitExposed(shown)
    window._on_redraw_tick()
    QtWidgets.QApplication.processEvents()
    view = shown.views[1]
    assert isinstance(view, FanView)
    page = shown.pages[1]
    right = page.viewport().width()
    for widget in view.findChildren(QtWidgets.QWidget):
        if widget.isVisible() and widget.parentWidget() is not None:
            box = widget.geometry().translated(widget.parentWidget().mapTo(view, QtCore.QPoint()))
            assert box.right() <= right + 1, (type(widget).__name__, box, right)
    plots = [item for item in view.canvas.ci.items if isinstance(item, pg.PlotItem)]
    assert len(plots) == 6
    width = view.canvas.viewport().width()
    for plot in plots:
        assert plot.sceneBoundingRect().right() <= width + 1, plot.titleLabel.text
        for name in ("left", "bottom"):
            labels = drawn_tick_labels(plot.getAxis(name))
            assert len(labels) >= 3, (plot.titleLabel.text, name, labels)
    shown.close()
