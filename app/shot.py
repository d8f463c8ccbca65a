"""`gradfence shot`: a study trained offscreen for a while, then the window saved as a PNG."""

from __future__ import annotations

import os
import time
from pathlib import Path

from app.notices import print_notices
from core.errors import GradfenceInputError
from core.study import Study


def shot(
    path: Path,
    out: Path,
    seconds: float,
    size: tuple[int, int] = (1600, 1100),
    entry: int | None = None,
    present: bool = False,
    collapse: tuple[int, ...] = (),
) -> str:
    """Train a study's entries offscreen for `seconds` (or to the end); save the window.

    `entry` (1-based) scrolls that entry to the top and selects it; `size` is the window's.
    With `present`, the picture is of the presentation view at that entry instead. Entries in
    `collapse` (1-based) are folded to their headers. Results cached beside the study are shown
    without training again. Returns a line saying what was written.
    """
    os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
    study = Study.open(path)
    print_notices(study)
    for number, option in [(entry, "--entry"), *((n, "--collapse") for n in collapse)]:
        if number is not None and not 1 <= number <= len(study):
            raise GradfenceInputError(f"{option} {number}: {path} has entries 1 to {len(study)}.")
    from app.main_window import MainWindow
    from app.qt_app import application

    app = application()
    window = MainWindow(study)
    window.auto_train = False
    window.resize(*size)
    window.show()
    try:
        trained = window.runner.train_pending()
        deadline = time.monotonic() + seconds
        while time.monotonic() < deadline and window.runner.busy:
            app.processEvents()
            time.sleep(0.01)
        for _ in range(10):  # let the last records drain and the plots redraw
            app.processEvents()
            time.sleep(0.04)
        for view in window.views:
            if hasattr(view, "refresh"):
                view.refresh()
        for number in collapse:
            window.cards[number - 1].set_collapsed(True)
        for _ in range(5):  # the column lays out again around the folded entries
            app.processEvents()
            time.sleep(0.02)
        if entry is not None:
            card = window.cards[entry - 1]
            window.select_card(card)
            app.processEvents()
            window.scroll_area.verticalScrollBar().setValue(card.y())
        app.processEvents()
        target = window.present(full_screen=False) if present else window
        if present:
            target.resize(*size)
            for _ in range(5):
                app.processEvents()
                time.sleep(0.02)
        out.parent.mkdir(parents=True, exist_ok=True)
        saved = target.grab().save(str(out))
        left = sum(e.status == "training" for e in study.workable)
    finally:
        window.shut_down()
        window.close()
        window.deleteLater()
        app.processEvents()
    if not saved:
        raise RuntimeError(f"could not write {out}")
    still = f"; {left} still training when the picture was taken" if left else ""
    count = len(trained)
    return (
        f"wrote {out} ({size[0]}x{size[1]}, {count} {'entry' if count == 1 else 'entries'} "
        f"trained, {len(study.workable) - count} from the cache{still})"
    )
