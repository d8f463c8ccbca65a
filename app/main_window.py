"""The desktop window: it arranges a study's entries in a column, an outline, an inspector,
menus, a toolbar and a status bar.

It owns no document state: the study (core.study) holds the entries and the window listens to
it, adding, removing and moving cards as it says. Edits go through the undo stack as commands
on the study and its entries (app.commands). Training goes through a runner (core.runner); file
actions, autosave and recovery, and the presentation view are units of their own.
"""

from __future__ import annotations

import time
from pathlib import Path
from typing import TYPE_CHECKING, Any

from PySide6 import QtCore, QtGui, QtWidgets

from app import commands
from app.autosave import Autosave
from app.entry_card import EntryCard
from app.file_actions import StudyFiles
from app.inspector import Inspector
from app.menus import build_menus
from app.presets_dialog import PresetBrowser
from app.views import EntryView, WorkedView, make_view, redraw_cards
from core.entry_model import TRAINING, EntryModel, NoteModel, TrainedEntry, WorkedEntry
from core.fan_model import FanModel
from core.log_entry import LogSource
from core.log_model import LogModel
from core.map_model import MapModel
from core.pool import DESKTOP_NICE, WorkerPool, desktop_workers
from core.presets import PresetInfo
from core.runner import Runner
from core.scenario import Scenario
from core.study import Study, StudyEvent
from core.study_file import EntryRecord

if TYPE_CHECKING:
    from app.presentation import PresentationWindow

REDRAW_MS = 33  # the pool is drained and plots redrawn about 30 times a second
RETRAIN_MS = 800  # after an edit, the pause before an entry trains again by itself


class MainWindow(QtWidgets.QMainWindow):
    def __init__(self, study: Study, pool: WorkerPool | None = None) -> None:
        super().__init__()
        self.pool = pool or WorkerPool(desktop_workers(), nice=DESKTOP_NICE)
        self.study = study
        self.runner = Runner(study, self.pool)
        self.cards: list[EntryCard] = []
        self.selected_card: EntryCard | None = None
        self.auto_train = True  # an edit retrains the entry after a short pause
        self._to_train: dict[int, WorkedEntry] = {}
        self.presentation: PresentationWindow | None = None
        self.undo_stack = QtGui.QUndoStack(self)
        self.files = StudyFiles(self)
        self.resize(1500, 1000)

        self.column = QtWidgets.QWidget()
        self.column_layout = QtWidgets.QVBoxLayout(self.column)
        self.column_layout.setSpacing(10)
        self.column_layout.addStretch(1)
        scroll = QtWidgets.QScrollArea()
        scroll.setWidgetResizable(True)
        scroll.setHorizontalScrollBarPolicy(QtCore.Qt.ScrollBarPolicy.ScrollBarAlwaysOff)
        scroll.setWidget(self.column)
        scroll.setStyleSheet("QScrollArea > QWidget > QWidget { background: #F4F2EE; }")
        self.scroll_area = scroll
        self.setCentralWidget(scroll)
        self.outline = QtWidgets.QListWidget()
        self.outline.currentRowChanged.connect(self._on_outline_row_changed)
        self._dock("Outline", self.outline, QtCore.Qt.DockWidgetArea.LeftDockWidgetArea)
        self.inspector = Inspector(self.commit_scenario, self.commit_log_source)
        self.inspector_dock = self._dock(
            "Inspector", self.inspector, QtCore.Qt.DockWidgetArea.RightDockWidgetArea
        )
        self.status_label = QtWidgets.QLabel("ready")
        self.speed_label = QtWidgets.QLabel("")
        self.statusBar().addWidget(self.status_label, 1)
        self.statusBar().addPermanentWidget(self.speed_label)
        self._last_steps, self._last_time = 0, time.monotonic()
        self._timer(1000, self._on_speed_tick)
        self._fan_turn = 0  # the card whose fan redraws first on the next tick
        self._redraw_timer = self._timer(REDRAW_MS, self._on_redraw_tick)
        self._retrain_timer = QtCore.QTimer(self)
        self._retrain_timer.setSingleShot(True)
        self._retrain_timer.timeout.connect(self._on_retrain_due)
        self.autosave = Autosave(self)
        self.menu_actions = build_menus(
            self, self.undo_stack, self._slots(), self.files.fill_recent_menu, self._set_auto
        )
        self.set_study(study)

    def _slots(self) -> dict[str, Any]:
        """What each action of app.menus does."""
        f, on_card = self.files, self.with_selected
        return {
            "new_study": f.new_study,
            "open_study": f.open_dialog,
            "save": f.save,
            "save_as": f.save_as,
            "export_handout": f.export_handout,
            "quit": self.close,
            "add_note": self.add_note,
            "add_fan": lambda: self.browse_presets("fan"),
            "add_map": lambda: self.browse_presets("map"),
            "add_log": self.add_log,
            "rename_entry": self.rename_selected,
            "move_up": lambda: on_card(lambda c: self.move_card(c, -1)),
            "move_down": lambda: on_card(lambda c: self.move_card(c, 1)),
            "fold": lambda: on_card(lambda c: c.set_collapsed(not c.collapsed)),
            "delete_entry": lambda: on_card(self.delete_card),
            "rename_study": self.rename_study,
            "save_preset": lambda: f.save_as_preset(self.selected_model()),
            "train": self.train_selected,
            "train_all": self.train_all,
            "stop": lambda: self.runner.stop_all(),
            "forget": self.forget_selected,
            "present": self.present,
        }

    def _set_auto(self, on: bool) -> None:
        self.auto_train = on

    @property
    def recent_menu(self) -> QtWidgets.QMenu:
        menu = self.menu_actions["recent"].menu()
        assert isinstance(menu, QtWidgets.QMenu)
        return menu

    def _dock(
        self, title: str, widget: QtWidgets.QWidget, area: QtCore.Qt.DockWidgetArea
    ) -> QtWidgets.QDockWidget:
        dock = QtWidgets.QDockWidget(title, self)
        dock.setObjectName(title.lower())
        dock.setWidget(widget)
        self.addDockWidget(area, dock)
        return dock

    def _timer(self, ms: int, slot: Any) -> QtCore.QTimer:
        timer = QtCore.QTimer(self)
        timer.timeout.connect(slot)
        timer.start(ms)
        return timer

    # -- the study ---------------------------------------------------------------------------

    def set_study(self, study: Study) -> None:
        """Show another study (no question asked: the file actions ask first)."""
        self.runner.close()
        self.study.unsubscribe(self._on_study_event)
        for card in self.cards:
            self._drop_card(card)
        self.cards, self.selected_card = [], None
        self.inspector.clear_pages()
        self.undo_stack.clear()
        self.autosave.forget()
        self.study = study
        self.runner = Runner(study, self.pool)
        study.subscribe(self._on_study_event)
        for index, entry in enumerate(study.entries):
            self._add_card(entry, index)
        self._refresh_outline()
        first = next((c for c in self.cards if c.kind != "note"), None)
        if first is not None:
            self.select_card(first)
        self._update_title()
        if study.notices:  # all of them at once: one after another, only the last would show
            self.show_message("  ".join(study.notices), 30_000)

    def _on_study_event(self, event: StudyEvent) -> None:
        entry = event.entry
        if event.what == "inserted" and entry is not None:
            self.select_card(self._add_card(entry, event.index))
        elif event.what == "removed" and entry is not None:
            card = self.card_of(entry)
            self.cards.remove(card)
            if self.selected_card is card:
                self.selected_card = None
                self.inspector.clear_pages()
                if self.cards:
                    self.select_card(self.cards[min(event.index, len(self.cards) - 1)])
            self._drop_card(card)
        elif event.what == "moved" and entry is not None:
            card = self.card_of(entry)
            self.cards.remove(card)
            self.cards.insert(event.index, card)
            self.column_layout.removeWidget(card)
            self.column_layout.insertWidget(event.index, card)
        elif event.what == "notice":
            self.show_message(event.detail, 30_000)
        elif event.what == "entry" and event.detail == "scenario":
            self._schedule_retrain(entry)
        if event.what in ("inserted", "removed", "moved") or event.detail == "title":
            self._refresh_outline()
        if event.what in ("title", "modified", "path", "inserted", "removed", "moved"):
            self._update_title()

    def _add_card(self, entry: EntryModel, index: int) -> EntryCard:
        view = make_view(entry, note_commit=self._commit_note)
        if not isinstance(view.model, NoteModel):
            view.train_requested.connect(self._on_train_requested)
            view.stop_requested.connect(lambda v: self.runner.stop(v.model))
        card = EntryCard(view, parent=self.column)
        card.move_requested.connect(self.move_card)
        card.delete_requested.connect(self.delete_card)
        card.selected.connect(self.select_card)
        self.cards.insert(index, card)
        self.column_layout.insertWidget(index, card)
        return card

    def _drop_card(self, card: EntryCard) -> None:
        card.detach()
        self.column_layout.removeWidget(card)
        card.hide()
        card.deleteLater()

    def card_of(self, item: EntryModel | QtWidgets.QWidget) -> EntryCard:
        return next(c for c in self.cards if item is c.model or item is c.body)

    @property
    def views(self) -> list[EntryView]:
        return [c.body for c in self.cards]

    @property
    def fan_views(self) -> list[Any]:
        return [c.body for c in self.cards if isinstance(c.model, FanModel)]

    @property
    def map_views(self) -> list[Any]:
        return [c.body for c in self.cards if isinstance(c.model, MapModel)]

    @property
    def log_views(self) -> list[Any]:
        return [c.body for c in self.cards if isinstance(c.model, LogModel)]

    def _update_title(self) -> None:
        path = self.study.path
        name = path.name if path is not None else "not saved"
        mark = " *" if self.study.modified else ""
        self.setWindowTitle(f"Gradfence - {self.study.title} ({name}){mark}")

    def _refresh_outline(self) -> None:
        self.outline.blockSignals(True)
        self.outline.clear()
        for card in self.cards:
            self.outline.addItem(f"{card.kind}: {card.model.title}")
            item = self.outline.item(self.outline.count() - 1)
            if item is not None:
                item.setToolTip(card.model.title)
        if self.selected_card in self.cards:
            self.outline.setCurrentRow(self.cards.index(self.selected_card))
        self.outline.blockSignals(False)

    def show_message(self, text: str, ms: int = 8000) -> None:
        self.statusBar().showMessage(text, ms)

    def widget(self) -> QtWidgets.QWidget:
        return self

    def study_saved(self) -> None:
        self.undo_stack.setClean()
        self.autosave.forget()

    def offer_recovery(self) -> bool:
        return self.autosave.offer()

    def selected_model(self) -> EntryModel | None:
        return self.selected_card.model if self.selected_card is not None else None

    # -- edits (each an undo command) --------------------------------------------------------

    def commit_scenario(self, model: TrainedEntry, scenario: Scenario) -> None:
        if scenario != model.scenario:
            self.undo_stack.push(commands.SetScenario(model, scenario))

    def commit_log_source(self, model: LogModel, source: LogSource) -> None:
        if source != model.source:
            self.undo_stack.push(commands.SetLogSource(model, source))

    def _commit_note(self, model: NoteModel, title: str, text: str) -> None:
        self.undo_stack.push(commands.EditNote(model, title, text))

    def _insert_index(self) -> int:
        if self.selected_card in self.cards:
            return self.cards.index(self.selected_card) + 1
        return len(self.cards)

    def add_note(self) -> EntryCard:
        note = NoteModel("New note", "")
        self.undo_stack.push(commands.InsertEntry(self.study, note, self._insert_index()))
        card = self.card_of(note)
        card.body.start_editing()  # type: ignore[union-attr]
        return card

    def add_entry(self, entry: EntryModel) -> EntryCard:
        self.undo_stack.push(commands.InsertEntry(self.study, entry, self._insert_index()))
        return self.card_of(entry)

    def add_preset(self, info: PresetInfo, kind: str) -> EntryCard:
        if info.scenario is None:
            raise ValueError(f"{info.path} does not load")
        preset_path = info.path.resolve()
        raw = {"kind": kind, "title": info.scenario.name, "preset": str(preset_path)}
        record = EntryRecord(
            kind,
            info.scenario.name,
            scenario=info.scenario,
            preset=str(preset_path),
            raw=raw,
            origin=info.scenario,
            preset_path=preset_path,
        )
        model: TrainedEntry = (FanModel if kind == "fan" else MapModel)(
            info.scenario.name, info.scenario, origin=record
        )
        return self.add_entry(model)

    def add_log(self, path: Path | None = None) -> EntryCard | None:
        """A log entry for a log file (asked for when `path` is None)."""
        if path is None:
            name, _ = QtWidgets.QFileDialog.getOpenFileName(
                self,
                "A log of gradient norms",
                str(self.study.folder()),
                "Logs (*.csv *.jsonl *.ndjson *.json);;All files (*)",
            )
            if not name:
                return None
            path = Path(name)
        model = LogModel(path.stem, LogSource(path.resolve()))
        card = self.add_entry(model)
        self.runner.train(model)
        return card

    def browse_presets(self, kind: str = "fan") -> None:
        dialog = PresetBrowser(self, kind)
        if dialog.exec() and dialog.choice is not None:
            self.add_preset(*dialog.choice)

    def move_card(self, card: EntryCard, delta: int) -> None:
        index = self.cards.index(card)
        if 0 <= index + delta < len(self.cards):
            self.undo_stack.push(commands.MoveEntry(self.study, card.model, delta))

    def delete_card(self, card: EntryCard) -> None:
        if card in self.cards:
            self.undo_stack.push(commands.DeleteEntry(self.study, card.model))

    def with_selected(self, action: Any) -> None:
        if self.selected_card is not None:
            action(self.selected_card)

    def rename_selected(self) -> None:
        card = self.selected_card
        if card is None:
            return
        title, ok = QtWidgets.QInputDialog.getText(
            self, "Rename entry", "Title:", text=card.model.title
        )
        if ok and title.strip() and title.strip() != card.model.title:
            self.undo_stack.push(commands.Rename(card.model, title.strip()))

    def rename_study(self) -> None:
        title, ok = QtWidgets.QInputDialog.getText(
            self, "Rename the study", "Title:", text=self.study.title
        )
        if ok and title.strip() and title.strip() != self.study.title:
            self.undo_stack.push(commands.RenameStudy(self.study, title.strip()))

    # -- training ----------------------------------------------------------------------------

    def _on_train_requested(self, view: WorkedView, focus: float) -> None:
        self.runner.train(view.model, focus=focus)

    def train_selected(self) -> None:
        card = self.selected_card
        if card is not None and isinstance(card.model, FanModel | MapModel | LogModel):
            self.runner.train(card.model, focus=getattr(card.body, "factor", None))

    def train_all(self) -> None:
        for card in self.cards:
            if isinstance(card.model, FanModel | MapModel | LogModel):
                self.runner.train(card.model, focus=getattr(card.body, "factor", None))

    def forget_selected(self) -> None:
        card = self.selected_card
        if card is not None and isinstance(card.model, FanModel | MapModel | LogModel):
            self.runner.stop(card.model)
            card.model.reset()

    def _schedule_retrain(self, entry: EntryModel | None) -> None:
        if not self.auto_train or not isinstance(entry, FanModel | MapModel | LogModel):
            return
        if entry.has_current_results():
            return  # an undo back to the results' own scenario
        self._to_train[id(entry)] = entry
        self._retrain_timer.start(RETRAIN_MS)

    def _on_retrain_due(self) -> None:
        due, self._to_train = list(self._to_train.values()), {}
        for entry in due:
            if entry in self.study.entries and not entry.has_current_results():
                self.runner.stop(entry)
                card = self.card_of(entry)
                self.runner.train(entry, focus=getattr(card.body, "factor", None))

    def all_finished(self) -> bool:
        return all(e.status != TRAINING for e in self.study.workable)

    # -- selection and inspector -------------------------------------------------------------

    def select_card(self, card: EntryCard) -> None:
        if card is self.selected_card and self.inspector.model is card.model:
            return
        if self.selected_card in self.cards and self.selected_card is not None:
            self.selected_card.set_selected(False)
        self.selected_card = card
        card.set_selected(True)
        if card in self.cards:
            self.outline.blockSignals(True)
            self.outline.setCurrentRow(self.cards.index(card))
            self.outline.blockSignals(False)
        self.inspector.show_entry(card.model)
        self.inspector_dock.setWindowTitle(f"Inspector - {card.model.title}")

    def _on_outline_row_changed(self, row: int) -> None:
        if 0 <= row < len(self.cards):
            card = self.cards[row]
            self.scroll_area.ensureWidgetVisible(card)
            self.select_card(card)

    # -- presentation, timers, closing -------------------------------------------------------

    def present(self, full_screen: bool = True) -> PresentationWindow:
        """Open the presentation view at the selected entry."""
        from app.presentation import PresentationWindow

        if self.presentation is not None:
            self.presentation.close()
        start = self.cards.index(self.selected_card) if self.selected_card in self.cards else 0
        shown = PresentationWindow(self.study, start, runner=self.runner, parent=self)
        shown.setAttribute(QtCore.Qt.WidgetAttribute.WA_DeleteOnClose)
        shown.closed.connect(self._on_presentation_closed)
        self.presentation = shown
        if full_screen:
            shown.showFullScreen()
        else:
            shown.show()
        return shown

    def _on_presentation_closed(self) -> None:
        self.presentation = None

    def _on_redraw_tick(self) -> None:
        self.pool.poll()
        drawn = self.presentation is not None and self.presentation.refresh_if_dirty()
        self._fan_turn = redraw_cards(self.cards, self._fan_turn, drawn)
        self.status_label.setText(self.runner.status_text())

    def _on_speed_tick(self) -> None:
        now = time.monotonic()
        steps = self.pool.steps_received
        rate = (steps - self._last_steps) / max(now - self._last_time, 1e-9)
        self._last_steps, self._last_time = steps, now
        self.speed_label.setText(f"{rate:,.0f} steps/s" if self.runner.busy else "")

    def open_path(self, path: Path) -> bool:
        return self.files.open_path(path)

    def closeEvent(self, event: QtGui.QCloseEvent) -> None:
        if not self.files.confirm_discard():
            event.ignore()
            return
        if self.presentation is not None:
            self.presentation.close()
        self.shut_down()
        super().closeEvent(event)

    def shut_down(self) -> None:
        """Stop training, the timers and the workers (on close, and on SIGTERM)."""
        from core.userdata import clear_recovery

        if not self.study.modified:
            clear_recovery(self.study.path)
        self.runner.stop_all()
        self._redraw_timer.stop()
        self.autosave.stop()
        self.pool.shutdown()
