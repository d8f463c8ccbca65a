"""Starting the desktop app on a study (the demo when none is given).

The window shows before torch is imported: the study, its cached results and the views need
none of it. The workers start as soon as the window is up and import torch in the background,
so that Train finds them ready. SIGTERM and SIGINT close the window and its workers cleanly.
"""

from __future__ import annotations

import os
import signal
import sys
from pathlib import Path
from typing import TYPE_CHECKING, Any

from core.errors import GradfenceInputError
from core.presets import shipped_dir
from core.study import Study
from core.userdata import add_recent

if TYPE_CHECKING:
    from app.main_window import MainWindow

DEMO_STUDY = "demo.study.toml"


def demo_path() -> Path:
    return shipped_dir() / DEMO_STUDY


def has_display() -> bool:
    if not sys.platform.startswith("linux"):
        return True
    return bool(
        os.environ.get("DISPLAY")
        or os.environ.get("WAYLAND_DISPLAY")
        or os.environ.get("QT_QPA_PLATFORM")
    )


def launch(path: Path | None = None) -> int:
    """Open the window on a study and run the event loop."""
    study = Study.open(path or demo_path())  # bad input fails before any window opens
    if not has_display():
        raise GradfenceInputError(
            "no display to open a window on: run Gradfence in a desktop session, or over SSH "
            "with X forwarding (ssh -X); without a display, `gradfence shot STUDY --out "
            "FILE.png` pictures a study and `gradfence handout STUDY --out FILE.html` writes it "
            "as a page."
        )
    from app.qt_app import application

    app = application()
    ending = _EndOnSignals(app)  # before any worker starts: none may outlive this process
    window = open_window(study)  # a recovery question may wait here; a signal ends it too
    ending.window = window
    if ending.asked:
        ending.end_now()
        return 0
    window.pool.start()  # workers import torch in the background; nothing trains until asked
    return int(app.exec())


def open_window(study: Study) -> MainWindow:
    """The window on `study`, shown, with any edits a crash left unsaved offered back."""
    from app.main_window import MainWindow

    window = MainWindow(study)
    window.show()
    if study.path is not None:
        add_recent(study.path)
    window.autosave.offer(include_untitled=True)
    return window


class _EndOnSignals:
    """SIGTERM and SIGINT: keep unsaved edits in the recovery copy, stop the workers and leave
    every event loop (a question's too). Python runs signal handlers between bytecodes, and the
    window's redraw timer gives it a chance at least 30 times a second."""

    def __init__(self, app: Any) -> None:
        self.app = app
        self.window: MainWindow | None = None
        self.asked = False
        for signum in (signal.SIGTERM, signal.SIGINT):
            signal.signal(signum, self.on_signal)

    def on_signal(self, signum: int, frame: object) -> None:
        self.asked = True
        self.end_now()
        self.app.quit()
        from PySide6 import QtCore

        # Queued as well: a signal that lands just before the event loop starts still ends it.
        QtCore.QTimer.singleShot(0, self.app.quit)

    def end_now(self) -> None:
        if self.window is not None:
            self.window.autosave.save_copy()
            self.window.shut_down()
