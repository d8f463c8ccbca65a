"""The presentation view: one entry at a time, arrow keys to move, live plots, Esc to leave."""

from __future__ import annotations

from PySide6 import QtCore
from pytestqt.qtbot import QtBot

from app.fan_view import FanView
from app.main_window import MainWindow
from app.note_view import NoteView
from app.presentation import TITLE_PT, PresentationWindow
from core.entry_model import TRAINED


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
