"""Starting the desktop app, and `gradfence shot`: a notebook run offscreen, saved as a PNG."""

from __future__ import annotations

import os
import sys
import time
from pathlib import Path
from typing import TYPE_CHECKING

from core.errors import GradfenceInputError
from core.notebook import Notebook, load_notebook
from core.presets import shipped_dir
from core.userdata import add_recent

if TYPE_CHECKING:
    from app.main_window import MainWindow

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
    window = open_window(notebook)
    window.pool.start()  # workers import torch in the background; nothing trains until asked
    return int(app.exec())  # type: ignore[attr-defined]


def open_window(notebook: Notebook) -> MainWindow:
    """The window on `notebook`, shown, with any edits a crash left unsaved offered back."""
    from app.main_window import MainWindow

    window = MainWindow(notebook)
    window.show()
    if notebook.path is not None:
        add_recent(notebook.path)
    window.offer_recovery(include_untitled=True)
    return window


def shot(
    path: Path,
    out: Path,
    seconds: float,
    size: tuple[int, int] = (1600, 1100),
    entry: int | None = None,
    present: bool = False,
    collapse: tuple[int, ...] = (),
) -> int:
    """Run a notebook's entries offscreen for `seconds` (or to the end); save the window.

    `entry` (1-based) scrolls that entry to the top and selects it; `size` is the window's.
    With `present`, the picture is of the presentation view at that entry instead. Entries in
    `collapse` (1-based) are folded to their headers.
    Results already cached beside the notebook are shown without training again.
    """
    os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
    notebook = load_notebook(path)
    for number, option in [(entry, "--entry"), *((n, "--collapse") for n in collapse)]:
        if number is not None and not 1 <= number <= len(notebook.entries):
            raise GradfenceInputError(
                f"{option} {number}: {path} has entries 1 to {len(notebook.entries)}."
            )
    app = _application()
    from PySide6 import QtWidgets

    from app.main_window import MainWindow

    window = MainWindow(notebook)
    window.resize(*size)
    window.show()
    window.run_pending()
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline and not window.all_finished():
        app.processEvents()  # type: ignore[attr-defined]
        time.sleep(0.01)
    for _ in range(10):  # let the last records drain and the plots redraw
        app.processEvents()  # type: ignore[attr-defined]
        time.sleep(0.04)
    for view in window.run_views:
        view.refresh()
    for number in collapse:
        window.cards[number - 1].set_collapsed(True)
    for _ in range(5):  # the column lays out again around the folded entries
        app.processEvents()  # type: ignore[attr-defined]
        time.sleep(0.02)
    if entry is not None:
        card = window.cards[entry - 1]
        window.select_card(card)
        app.processEvents()  # type: ignore[attr-defined]
        window.scroll_area.verticalScrollBar().setValue(card.y())
    app.processEvents()  # type: ignore[attr-defined]
    target: QtWidgets.QWidget = window
    if present:
        target = window.present(full_screen=False)
        target.resize(*size)
        for _ in range(5):
            app.processEvents()  # type: ignore[attr-defined]
            time.sleep(0.02)
    out.parent.mkdir(parents=True, exist_ok=True)
    saved = target.grab().save(str(out))
    window.close()
    QtWidgets.QApplication.processEvents()
    if not saved:
        raise RuntimeError(f"could not write {out}")
    return 0
