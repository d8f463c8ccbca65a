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
    window = open_window(study)
    window.pool.start()  # workers import torch in the background; nothing trains until asked
    _end_cleanly_on_signals(app, window)
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


def _end_cleanly_on_signals(app: Any, window: MainWindow) -> None:
    """SIGTERM and SIGINT: stop the workers and leave the event loop (unsaved edits stay in the
    recovery copy). Python runs signal handlers between bytecodes, and the window's redraw
    timer gives it a chance at least 30 times a second."""

    def end(signum: int, frame: object) -> None:
        window.autosave.save_copy()
        window.shut_down()
        app.quit()

    for signum in (signal.SIGTERM, signal.SIGINT):
        signal.signal(signum, end)
