"""File actions of the window on its study: new, open, open recent, save, save as, export the
handout, and the question about unsaved edits before any of them drops the document."""

from __future__ import annotations

import time
from pathlib import Path

from PySide6 import QtCore, QtWidgets

from app.host import Host
from core.entry_model import EntryModel
from core.errors import GradfenceInputError
from core.fan_model import FanModel
from core.fileio import write_text_atomic
from core.map_model import MapModel
from core.presets import save_user_preset
from core.study import UNTITLED, Study
from core.study_file import OLD_SUFFIX, STUDY_SUFFIX, study_stem
from core.userdata import add_recent, clear_recovery, recent_studies

STUDY_FILTER = f"Studies (*{STUDY_SUFFIX} *{OLD_SUFFIX})"
Button = QtWidgets.QMessageBox.StandardButton


class StudyFiles:
    """Keeps the window's study on disk; replaces it through `host.set_study`."""

    def __init__(self, host: Host) -> None:
        self.host = host

    @property
    def window(self) -> QtWidgets.QWidget:
        return self.host.widget()

    @property
    def study(self) -> Study:
        return self.host.study

    def folder(self) -> Path:
        return self.study.folder()

    def confirm_discard(self) -> bool:
        """Ask about unsaved edits; True when it is fine to drop the document."""
        if not self.study.modified:
            return True
        answer = self.ask_unsaved()
        if answer == Button.Save:
            return self.save()
        if answer == Button.Discard:
            clear_recovery(self.study.path)
            return True
        return False

    def ask_unsaved(self) -> QtWidgets.QMessageBox.StandardButton:
        return QtWidgets.QMessageBox.question(
            self.window,
            "Unsaved changes",
            f'"{self.study.title}" has changes that are not saved. Save them?',
            Button.Save | Button.Discard | Button.Cancel,
            Button.Save,
        )

    def new_study(self) -> None:
        if self.confirm_discard():
            self.host.set_study(Study(UNTITLED))

    def open_dialog(self) -> None:
        path, _ = QtWidgets.QFileDialog.getOpenFileName(
            self.window, "Open study", str(self.folder()), STUDY_FILTER
        )
        if path:
            self.open_path(Path(path))

    def open_path(self, path: Path) -> bool:
        if not self.confirm_discard():
            return False
        try:
            study = Study.open(path)
        except GradfenceInputError as exc:
            QtWidgets.QMessageBox.warning(self.window, "Cannot open study", str(exc))
            return False
        self.host.set_study(study)
        add_recent(path)
        self.host.offer_recovery()
        return True

    def fill_recent_menu(self, menu: QtWidgets.QMenu) -> None:
        menu.clear()
        recent = recent_studies()
        if not recent:
            menu.addAction("(none yet)").setEnabled(False)
        for path in recent:
            menu.addAction(str(path), lambda p=path: self.open_path(p))

    def save(self) -> bool:
        path = self.study.path
        if path is None:
            return self.save_as()
        if path.name.endswith(OLD_SUFFIX):  # an older file: the new format goes beside it
            return self.save_to(path.with_name(study_stem(path) + STUDY_SUFFIX))
        return self.save_to(path)

    def save_as(self) -> bool:
        name, _ = QtWidgets.QFileDialog.getSaveFileName(
            self.window, "Save study as", str(self.folder()), STUDY_FILTER
        )
        if not name:
            return False
        path = Path(name)
        if not path.name.endswith(STUDY_SUFFIX):
            path = path.with_name(path.name.removesuffix(".toml") + STUDY_SUFFIX)
        return self.save_to(path)

    def save_to(self, path: Path) -> bool:
        """Write the study atomically to `path`; it becomes the document's file."""
        before = self.study.path
        try:
            self.study.save(path)
        except OSError as exc:
            QtWidgets.QMessageBox.warning(
                self.window, "Cannot save", f"{path}: {exc.strerror or exc}."
            )
            return False
        clear_recovery(before)
        clear_recovery(path)
        add_recent(path)
        self.host.study_saved()
        kept = f" (the older {before.name} is kept as it was)" if before and before != path else ""
        self.host.show_message(f"Saved {path}{kept}")
        return True

    def export_handout(self, path: Path | None = None) -> bool:
        """Train what has no current results (with a progress dialog), then write the handout."""
        from app.handout import handout_html

        if path is None:
            current = self.study.path
            default = current.with_name(study_stem(current) + ".html") if current else None
            name, _ = QtWidgets.QFileDialog.getSaveFileName(
                self.window, "Export handout", str(default or self.folder()), "HTML (*.html)"
            )
            if not name:
                return False
            path = Path(name).with_suffix(".html")
        runner = self.host.runner
        todo = runner.train_pending()
        if todo:
            dialog = QtWidgets.QProgressDialog(
                f"Training {len(todo)} entries for the handout...", "Stop", 0, 1000, self.window
            )
            dialog.setWindowTitle("Export handout")
            dialog.setWindowModality(QtCore.Qt.WindowModality.WindowModal)
            dialog.show()
            while runner.busy:
                QtWidgets.QApplication.processEvents()
                if dialog.wasCanceled():
                    runner.stop_all()
                    return False
                dialog.setValue(int(runner.progress() * 1000))
                dialog.setLabelText(runner.status_text())
                time.sleep(0.02)
            dialog.close()
        try:
            write_text_atomic(path, handout_html(self.study))
        except OSError as exc:
            QtWidgets.QMessageBox.warning(self.window, "Cannot write the handout", f"{path}: {exc}")
            return False
        self.host.show_message(f"Wrote {path}")
        return True

    def save_as_preset(self, model: EntryModel | None) -> None:
        """Keep a fan's or a map's scenario as one of the user's presets."""
        if not isinstance(model, FanModel | MapModel):
            QtWidgets.QMessageBox.information(self.window, "Save as preset", "Select a fan or map.")
            return
        name, ok = QtWidgets.QInputDialog.getText(
            self.window, "Save as preset", "Preset name:", text=model.scenario.name
        )
        if not ok or not name.strip():
            return
        try:
            try:
                path = save_user_preset(model.scenario, name.strip())
            except FileExistsError as exc:
                answer = QtWidgets.QMessageBox.question(
                    self.window, "Save as preset", f"{exc.args[0]} exists. Replace it?"
                )
                if answer != QtWidgets.QMessageBox.StandardButton.Yes:
                    return
                path = save_user_preset(model.scenario, name.strip(), overwrite=True)
        except (GradfenceInputError, OSError) as exc:
            QtWidgets.QMessageBox.warning(self.window, "Cannot save preset", str(exc))
            return
        self.host.show_message(f"Saved preset {path}")
