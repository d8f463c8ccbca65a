"""Autosave and recovery for the window's study.

Every 30 s at most (`GRADFENCE_AUTOSAVE_SECONDS` overrides it), a modified study's text goes to
a recovery copy in the user folder, when it changed since the last copy. Saving or discarding
removes it. After a start or an open, a copy that differs from the file is offered back.
"""

from __future__ import annotations

import os
import time
from pathlib import Path

from PySide6 import QtCore, QtWidgets

from app.host import Host
from core.errors import GradfenceInputError
from core.study import Study
from core.study_file import loads_study
from core.userdata import Recovery, clear_recovery, find_recovery, write_recovery

AUTOSAVE_VARIABLE = "GRADFENCE_AUTOSAVE_SECONDS"
AUTOSAVE_SECONDS = 30.0


def autosave_seconds() -> float:
    try:
        return max(0.1, float(os.environ.get(AUTOSAVE_VARIABLE, AUTOSAVE_SECONDS)))
    except ValueError:
        return AUTOSAVE_SECONDS


class Autosave(QtCore.QObject):
    def __init__(self, host: Host) -> None:
        super().__init__(host.widget())
        self.host = host
        self._last = ""
        self.timer = QtCore.QTimer(self)
        self.timer.timeout.connect(self.save_copy)
        self.timer.start(int(autosave_seconds() * 1000))

    def forget(self) -> None:
        """The study was saved or replaced: the next copy starts afresh."""
        self._last = ""

    def save_copy(self) -> Path | None:
        """Copy unsaved edits to the recovery file (only when they changed since last time)."""
        study = self.host.study
        if not study.modified:
            return None
        try:
            text = study.text()
        except ValueError:
            return None
        if text == self._last:
            return None
        try:
            written = write_recovery(study.path, text)
        except OSError as exc:
            self.host.show_message(f"Autosave failed: {exc}")
            return None
        self._last = text
        return written

    def offer(self, include_untitled: bool = False) -> bool:
        """Offer the edits an earlier session left unsaved (with `include_untitled`, those of a
        study that was never saved, too)."""
        path = self.host.study.path
        slots: list[Path | None] = [path]
        if include_untitled and path is not None:
            slots.append(None)
        for slot in slots:
            found = find_recovery(slot)
            if found is None:
                continue
            if not self.ask_restore(found):
                clear_recovery(slot)
                continue
            where = slot or Path.cwd() / "untitled.study.toml"
            try:
                restored = loads_study(found.text, where, source="the recovery copy")
            except GradfenceInputError as exc:
                QtWidgets.QMessageBox.warning(self.host.widget(), "Cannot restore", str(exc))
                continue
            study = Study.from_file(restored, path=slot)
            on_disk = ""
            if slot is not None:
                try:
                    on_disk = Study.open(slot).text()
                except GradfenceInputError:
                    on_disk = ""
            study.mark_unsaved(on_disk)
            self.host.set_study(study)
            return True
        return False

    def ask_restore(self, found: Recovery) -> bool:
        when = time.strftime("%Y-%m-%d %H:%M", time.localtime(found.saved_at))
        name = found.study.name if found.study else "a study never saved"
        answer = QtWidgets.QMessageBox.question(
            self.host.widget(),
            "Restore unsaved changes?",
            f"Gradfence ended without saving the changes to {name} (autosaved {when}). "
            "Restore them?",
        )
        return answer == QtWidgets.QMessageBox.StandardButton.Yes

    def stop(self) -> None:
        self.timer.stop()
