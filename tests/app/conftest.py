"""Shared fixtures of the app tests: a small notebook in a window, and training it."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest
from PySide6 import QtWidgets
from pytestqt.qtbot import QtBot

from app.main_window import MainWindow
from app.run_entry_view import RunEntryView
from core.notebook import load_notebook
from core.run_model import DONE

NOTEBOOK = """\
schema = 1
title = "Test notebook"

[[entry]]
kind = "note"
title = "A note"
text = "Some *Markdown*."

[[entry]]
kind = "run"
title = "Quick blobs"
[entry.scenario]
name = "Quick blobs"
[entry.scenario.data]
task = "blobs"
n_train = 600
n_val = 200
noise = 1.0
[entry.scenario.outliers]
kind = "label-flip"
rate = 0.3
[entry.scenario.model]
hidden = [16]
[entry.scenario.train]
steps = 80
batch_size = 16
eval_every = 5
[[entry.scenario.clip]]
method = "none"
[[entry.scenario.clip]]
method = "global-norm"
threshold = 0.5
[[entry.scenario.clip]]
method = "example-norm"
threshold = 0.5
"""


@pytest.fixture(autouse=True)
def no_modal_questions(monkeypatch: pytest.MonkeyPatch) -> list[str]:
    """Offscreen, a modal question would wait for ever: unsaved changes are discarded and
    recovery copies declined unless a test says otherwise. Returns the questions asked."""
    asked: list[str] = []

    def unsaved(self: MainWindow) -> QtWidgets.QMessageBox.StandardButton:
        asked.append("unsaved")
        return QtWidgets.QMessageBox.StandardButton.Discard

    def restore(self: MainWindow, found: object) -> bool:
        asked.append("restore")
        return False

    monkeypatch.setattr(MainWindow, "ask_unsaved", unsaved)
    monkeypatch.setattr(MainWindow, "ask_restore", restore)
    return asked


@pytest.fixture
def window(qtbot: QtBot, tmp_path: Path) -> Iterator[MainWindow]:
    path = tmp_path / "test.notebook.toml"
    path.write_text(NOTEBOOK)
    win = MainWindow(load_notebook(path))
    qtbot.addWidget(win)
    win.show()
    yield win
    win.close()  # ends the worker processes; the leak fixture checks that they are gone


def trained(qtbot: QtBot, win: MainWindow) -> RunEntryView:
    view = win.run_views[0]
    win.run_view(view)
    qtbot.waitUntil(lambda: view.model.status == DONE, timeout=90_000)
    win._on_redraw_tick()
    return view
