"""Shared fixtures of the app tests: a small study in a window, and training it."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest
from PySide6 import QtWidgets
from pytestqt.qtbot import QtBot

from app.autosave import Autosave
from app.fan_view import FanView
from app.file_actions import StudyFiles
from app.main_window import MainWindow
from core.entry_model import TRAINED
from core.study import Study

STUDY = """\
schema = 2
title = "Test study"

[[entry]]
kind = "note"
title = "A note"
text = "Some *Markdown*."

[[entry]]
kind = "fan"
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

    def unsaved(self: StudyFiles) -> QtWidgets.QMessageBox.StandardButton:
        asked.append("unsaved")
        return QtWidgets.QMessageBox.StandardButton.Discard

    def restore(self: Autosave, found: object) -> bool:
        asked.append("restore")
        return False

    monkeypatch.setattr(StudyFiles, "ask_unsaved", unsaved)
    monkeypatch.setattr(Autosave, "ask_restore", restore)
    return asked


@pytest.fixture
def window(qtbot: QtBot, tmp_path: Path) -> Iterator[MainWindow]:
    path = tmp_path / "test.study.toml"
    path.write_text(STUDY)
    win = MainWindow(Study.open(path))
    win.auto_train = False  # tests train when they say so
    qtbot.addWidget(win)
    win.show()
    yield win
    win.close()  # ends the worker processes; the leak fixture checks that they are gone


def trained(qtbot: QtBot, win: MainWindow) -> FanView:
    view: FanView = win.fan_views[0]
    win.runner.train(view.model)
    qtbot.waitUntil(lambda: view.model.status == TRAINED, timeout=90_000)
    win._on_redraw_tick()
    return view
