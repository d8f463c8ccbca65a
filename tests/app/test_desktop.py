"""The window's end: closed, or stopped with SIGTERM or SIGINT, it leaves no process behind, as
the operating system sees it, and a bad cache file shows in its status bar."""

from __future__ import annotations

import signal
import time
from pathlib import Path

import pytest
from pytestqt.qtbot import QtBot

from app.main_window import MainWindow
from core import cache
from core.study import Study
from tests.os_processes import alive, gone, start, wait_for, workers_of
from tests.tiny_presets import TINY_FAN, study_text, tiny_map_text

HANG = 120.0


def write_study(folder: Path) -> Path:
    (folder / "fan.toml").write_text(TINY_FAN)
    (folder / "map.toml").write_text(tiny_map_text())
    path = folder / "window.study.toml"
    path.write_text(study_text(("fan", "Fan", "fan.toml"), ("map", "Map", "map.toml")))
    return path


@pytest.mark.slow
@pytest.mark.parametrize("signum", [signal.SIGTERM, signal.SIGINT], ids=["SIGTERM", "SIGINT"])
def test_a_signal_closes_the_window_and_its_workers(signum: int, tmp_path: Path, mark: str) -> None:
    # The previous version's window, sent SIGTERM, left its workers and the resource tracker
    # running for over a minute.
    window = start(["open", str(write_study(tmp_path))], mark)
    assert wait_for(lambda: workers_of(window.pid), HANG)
    time.sleep(1.0)  # the workers import torch; the window runs its event loop
    window.send_signal(signum)
    window.communicate(timeout=10)  # the bound on a hang
    assert gone(mark, 10.0) == []


def test_closing_the_window_ends_its_workers(qtbot: QtBot, tmp_path: Path) -> None:
    window = MainWindow(Study.open(write_study(tmp_path)))
    qtbot.addWidget(window)
    window.show()
    window.pool.start()
    pids = [w.process.pid for w in window.pool._workers]
    assert pids and all(alive(pid) for pid in pids)
    window.close()
    assert not any(alive(pid) for pid in pids)  # by the time close returns


def test_a_bad_cache_file_shows_in_the_status_bar(qtbot: QtBot, tmp_path: Path) -> None:
    # The previous version could not open a study with a map cache file holding [1, 2, 3].
    path = write_study(tmp_path)
    study = Study.open(path)
    map_entry = study.entries[1]
    bad = cache.path_for(cache.cache_dir(path), map_entry)  # type: ignore[arg-type]
    bad.parent.mkdir()
    bad.write_text("[1, 2, 3]")
    window = MainWindow(Study.open(path))
    qtbot.addWidget(window)
    window.auto_train = False
    window.show()
    message = window.statusBar().currentMessage()
    assert f"{bad}: holds a list, not a table; set aside as {bad.name}.bad" in message
    window.close()
