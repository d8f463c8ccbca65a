"""Crash recovery: an app killed by SIGKILL after an autosave offers the edit at the next start."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from pytestqt.qtbot import QtBot

from app.autosave import Autosave
from app.desktop import open_window
from app.main_window import MainWindow
from core.study import Study
from core.study_file import load_study
from core.userdata import Recovery, find_recovery
from tests.app.conftest import STUDY
from tests.conftest import REPO

EDIT = "An edit that was never saved"

# The first session: the real window on the study, one note added through its own editor,
# then the event loop, which autosaves, until the test kills the process.
FIRST_SESSION = f"""
import sys
from pathlib import Path
from PySide6 import QtWidgets
from app.desktop import open_window
from core.study import Study

app = QtWidgets.QApplication([])
window = open_window(Study.open(Path(sys.argv[1])))
card = window.add_note()
card.body.text_edit.setPlainText({EDIT!r})
card.body.finish_editing()
print("edited", flush=True)
app.exec()
"""


@pytest.mark.skipif(sys.platform == "win32", reason="SIGKILL is POSIX")
def test_a_killed_app_offers_its_autosaved_edit_on_the_next_start(
    qtbot: QtBot, tmp_path: Path, private_home: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    path = tmp_path / "crash.study.toml"
    path.write_text(STUDY)
    env = {
        **os.environ,
        "QT_QPA_PLATFORM": "offscreen",
        "GRADFENCE_HOME": str(private_home),
        "GRADFENCE_AUTOSAVE_SECONDS": "0.5",
    }
    log = tmp_path / "first-session.log"
    with log.open("w") as out:
        process = subprocess.Popen(
            [sys.executable, "-c", FIRST_SESSION, str(path)],
            cwd=REPO,
            env=env,
            stdout=out,
            stderr=subprocess.STDOUT,
        )
    try:
        deadline = time.monotonic() + 60
        found = None
        while time.monotonic() < deadline and process.poll() is None:
            found = find_recovery(path)
            if found is not None and EDIT in found.text:
                break
            time.sleep(0.1)
        assert found is not None and EDIT in found.text, log.read_text()
    finally:
        process.send_signal(signal.SIGKILL)
        process.wait(timeout=10)
    assert process.returncode == -signal.SIGKILL
    assert EDIT not in path.read_text()  # the file itself was never written

    offered: list[Recovery] = []

    def accept(self: Autosave, recovery: Recovery) -> bool:
        offered.append(recovery)
        return True

    monkeypatch.setattr(Autosave, "ask_restore", accept)
    window = open_window(Study.open(path))
    qtbot.addWidget(window)
    assert len(offered) == 1 and offered[0].study == path.resolve()
    texts = [e.text for e in window.study.to_file().entries if e.kind == "note"]
    assert EDIT in texts
    assert window.study.modified and window.windowTitle().endswith("*")
    assert window.files.save()
    assert find_recovery(path) is None  # saved: nothing left to offer
    assert EDIT in [e.text for e in load_study(path).entries]
    window.close()


def test_declining_the_offer_drops_the_copy_and_the_file_is_untouched(
    qtbot: QtBot, tmp_path: Path, no_modal_questions: list[str]
) -> None:
    path = tmp_path / "nb.study.toml"
    path.write_text(STUDY)
    first = MainWindow(Study.open(path))
    qtbot.addWidget(first)
    first.add_note().body.finish_editing()  # type: ignore[union-attr]
    assert first.autosave.save_copy() is not None
    assert first.autosave.save_copy() is None  # unchanged since the last copy: not written again
    first.pool.shutdown()  # as if the process died here: no close, no prompt
    second = open_window(Study.open(path))
    qtbot.addWidget(second)
    assert no_modal_questions == ["restore"]
    assert find_recovery(path) is None
    assert len(second.cards) == 2 and path.read_text() == STUDY
    second.close()
    first.autosave.stop()


def test_a_never_saved_study_is_offered_back_at_the_next_start(
    qtbot: QtBot, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    path = tmp_path / "nb.study.toml"
    path.write_text(STUDY)
    first = MainWindow(Study.open(path))
    qtbot.addWidget(first)
    first.files.new_study()
    card = first.add_note()
    card.body.text_edit.setPlainText(EDIT)  # type: ignore[union-attr]
    card.body.finish_editing()  # type: ignore[union-attr]
    assert first.autosave.save_copy() is not None and find_recovery(None) is not None
    first.pool.shutdown()

    offered: list[Recovery] = []
    monkeypatch.setattr(Autosave, "ask_restore", lambda self, r: offered.append(r) or True)
    second = open_window(Study.open(path))
    qtbot.addWidget(second)
    assert [r.study for r in offered] == [None]
    texts = [c.model.text for c in second.cards]  # type: ignore[union-attr]
    assert second.study.path is None and texts == [EDIT]
    assert second.study.modified
    second.close()  # the conftest answers "discard": the copy goes
    assert find_recovery(None) is None
    first.autosave.stop()
