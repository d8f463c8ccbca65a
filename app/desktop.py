"""Starting the desktop app, and `gradfence shot`: a notebook run offscreen, saved as a PNG."""

from __future__ import annotations

import os
import sys
import time
from pathlib import Path

from core.errors import GradfenceInputError
from core.notebook import load_notebook
from core.presets import shipped_dir

DEMO_NOTEBOOK = "demo.notebook.toml"


def demo_path() -> Path:
    return shipped_dir() / DEMO_NOTEBOOK


def _application() -> object:
    from PySide6 import QtWidgets

    app = QtWidgets.QApplication.instance()
    return app if app is not None else QtWidgets.QApplication(sys.argv[:1])


def launch(path: Path | None = None) -> int:
    """Open the window on a notebook (the demo when none is given) and run the event loop."""
    notebook = load_notebook(path or demo_path())  # bad input fails before any window opens
    headless = sys.platform.startswith("linux") and not (
        os.environ.get("DISPLAY")
        or os.environ.get("WAYLAND_DISPLAY")
        or os.environ.get("QT_QPA_PLATFORM")
    )
    if headless:
        raise GradfenceInputError(
            "no display to open a window on; use `gradfence shot NOTEBOOK --out FILE.png` to run "
            "a notebook without one, or set QT_QPA_PLATFORM=offscreen."
        )
    app = _application()
    from app.main_window import MainWindow

    window = MainWindow(notebook)
    window.show()
    window.pool.start()  # workers import torch in the background; nothing trains until asked
    return int(app.exec())  # type: ignore[attr-defined]


def shot(path: Path, out: Path, seconds: float) -> int:
    """Run a notebook's run entries offscreen for `seconds` (or to the end); save the window."""
    os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
    notebook = load_notebook(path)
    app = _application()
    from PySide6 import QtWidgets

    from app.main_window import MainWindow

    window = MainWindow(notebook)
    window.resize(1600, 1100)
    window.show()
    window.run_all()
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline and not window.all_finished():
        app.processEvents()  # type: ignore[attr-defined]
        time.sleep(0.01)
    for _ in range(10):  # let the last records drain and the plots redraw
        app.processEvents()  # type: ignore[attr-defined]
        time.sleep(0.04)
    for view in window.run_views:
        view.refresh()
    app.processEvents()  # type: ignore[attr-defined]
    out.parent.mkdir(parents=True, exist_ok=True)
    saved = window.grab().save(str(out))
    window.close()
    QtWidgets.QApplication.processEvents()
    if not saved:
        raise RuntimeError(f"could not write {out}")
    return 0
