"""The desktop window: a notebook's entries in a column, an outline, an inspector.

The window owns the document: the entry cards in order, the notebook's title and path, and an
undo stack through which every edit passes. Results are cached beside a saved notebook by
scenario hash; unsaved edits are copied to a recovery file at most every 30 s.
"""

from __future__ import annotations

import dataclasses
import functools
import itertools
import os
import time
from pathlib import Path
from typing import TYPE_CHECKING, Any

from PySide6 import QtCore, QtGui, QtWidgets

from app import commands
from app.entry_card import EntryCard
from app.note_view import NoteView
from app.presets_dialog import PresetBrowser
from app.run_entry_view import RunEntryView
from app.scenario_form import ScenarioForm
from app.sweep_entry_view import SweepEntryView
from app.toml_editor import TomlEditor
from app.workers import Task, WorkerPool
from core import cache
from core.errors import GradfenceInputError
from core.fileio import write_text_atomic
from core.notebook import (
    NOTEBOOK_SUFFIX,
    Entry,
    Notebook,
    dumps_notebook,
    load_notebook,
    loads_notebook,
    save_notebook,
)
from core.presets import PresetInfo, save_user_preset
from core.run_model import DONE, RUNNING, NoteEntryModel, RunEntryModel, ScenarioHolder
from core.scenario import Scenario, dumps_scenario
from core.sweep_model import SweepEntryModel
from core.userdata import (
    Recovery,
    add_recent,
    clear_recovery,
    find_recovery,
    recent_notebooks,
    write_recovery,
)

REDRAW_MS = 33  # plots are redrawn at most about 30 times a second
AUTOSAVE_VARIABLE = "GRADFENCE_AUTOSAVE_SECONDS"
AUTOSAVE_SECONDS = 30.0
NOTEBOOK_FILTER = f"Notebooks (*{NOTEBOOK_SUFFIX})"

ScenarioView = RunEntryView | SweepEntryView

if TYPE_CHECKING:
    from app.presentation import PresentationWindow


def autosave_seconds() -> float:
    try:
        return max(0.1, float(os.environ.get(AUTOSAVE_VARIABLE, AUTOSAVE_SECONDS)))
    except ValueError:
        return AUTOSAVE_SECONDS


class MainWindow(QtWidgets.QMainWindow):
    def __init__(self, notebook: Notebook, pool: WorkerPool | None = None) -> None:
        super().__init__()
        self.pool = pool or WorkerPool(parent=self)
        self.pool.state_changed.connect(self._on_pool_state_changed)
        self._run_ids = itertools.count(1)
        self.cards: list[EntryCard] = []
        self.selected_card: EntryCard | None = None
        self.selected_view: ScenarioView | None = None
        self.path: Path | None = None
        self.notebook_title = notebook.title
        self._restored = False  # holds edits that no undo command describes (a restored copy)
        self._last_autosave = ""
        self._inspector_pages: list[ScenarioForm | TomlEditor] = []
        self.presentation: PresentationWindow | None = None
        self.undo_stack = QtGui.QUndoStack(self)
        self.undo_stack.cleanChanged.connect(self._on_clean_changed)
        self.resize(1500, 1000)

        self.column = QtWidgets.QWidget()
        self.column_layout = QtWidgets.QVBoxLayout(self.column)
        self.column_layout.addStretch(1)
        scroll = QtWidgets.QScrollArea()
        scroll.setWidgetResizable(True)
        scroll.setHorizontalScrollBarPolicy(QtCore.Qt.ScrollBarPolicy.ScrollBarAlwaysOff)
        scroll.setWidget(self.column)
        self.scroll_area = scroll
        self.setCentralWidget(scroll)

        self.outline = QtWidgets.QListWidget()
        self.outline.currentRowChanged.connect(self._on_outline_row_changed)
        outline_dock = QtWidgets.QDockWidget("Outline", self)
        outline_dock.setObjectName("outline")
        outline_dock.setWidget(self.outline)
        self.addDockWidget(QtCore.Qt.DockWidgetArea.LeftDockWidgetArea, outline_dock)

        self.inspector = QtWidgets.QTabWidget()
        self.inspector_dock = QtWidgets.QDockWidget("Inspector", self)
        self.inspector_dock.setObjectName("inspector")
        self.inspector_dock.setWidget(self.inspector)
        self.addDockWidget(QtCore.Qt.DockWidgetArea.RightDockWidgetArea, self.inspector_dock)
        self.resizeDocks(
            [outline_dock, self.inspector_dock], [260, 360], QtCore.Qt.Orientation.Horizontal
        )

        self.worker_label = QtWidgets.QLabel(self.pool.describe())
        self.speed_label = QtWidgets.QLabel("0 steps/s")
        self.statusBar().addWidget(self.worker_label, 1)
        self.statusBar().addPermanentWidget(self.speed_label)
        self._last_steps, self._last_time = 0, time.monotonic()
        self._speed_timer = QtCore.QTimer(self)
        self._speed_timer.timeout.connect(self._on_speed_tick)
        self._speed_timer.start(1000)
        self._redraw_timer = QtCore.QTimer(self)
        self._redraw_timer.timeout.connect(self._on_redraw_tick)
        self._redraw_timer.start(REDRAW_MS)
        self._autosave_timer = QtCore.QTimer(self)
        self._autosave_timer.timeout.connect(self.autosave)
        self._autosave_timer.start(int(autosave_seconds() * 1000))

        self._build_actions()
        self.show_notebook(notebook)

    # -- building ----------------------------------------------------------------------------

    def _build_actions(self) -> None:
        def action(
            text: str, shortcut: str | QtGui.QKeySequence.StandardKey, slot: Any, tip: str
        ) -> QtGui.QAction:
            a = QtGui.QAction(text, self)
            if shortcut:
                a.setShortcut(QtGui.QKeySequence(shortcut))
            a.setStatusTip(tip)
            a.triggered.connect(slot)
            return a

        keys = QtGui.QKeySequence.StandardKey
        self.new_action = action("&New notebook", keys.New, self.new_notebook, "An empty notebook")
        self.open_action = action(
            "&Open notebook...", keys.Open, self._on_open, "Open a .notebook.toml file"
        )
        self.save_action = action("&Save", keys.Save, self.save, "Save the notebook")
        self.save_as_action = action(
            "Save &as...", keys.SaveAs, self.save_as, "Save the notebook under another name"
        )
        self.report_action = action(
            "Export &report...",
            "",
            self.export_report,
            "Write the notebook as one self-contained HTML file (runs what is not finished)",
        )
        self.quit_action = action("&Quit", "Ctrl+Q", self.close, "Quit Gradfence")
        self.undo_action = self.undo_stack.createUndoAction(self, "&Undo")
        self.undo_action.setShortcut(QtGui.QKeySequence(keys.Undo))
        self.redo_action = self.undo_stack.createRedoAction(self, "&Redo")
        self.redo_action.setShortcut(QtGui.QKeySequence(keys.Redo))
        self.add_note_action = action(
            "Add &note", "Ctrl+Shift+N", self.add_note, "A Markdown note below the selected entry"
        )
        self.add_preset_action = action(
            "Add from &preset...",
            "Ctrl+Shift+P",
            self.browse_presets,
            "Browse presets; add one as a run or a sweep entry",
        )
        self.move_up_action = action(
            "Move entry &up", "Alt+Up", lambda: self.move_selected(-1), "Move the entry up"
        )
        self.move_down_action = action(
            "Move entry &down", "Alt+Down", lambda: self.move_selected(1), "Move the entry down"
        )
        self.delete_action = action(
            "&Delete entry", "", self.delete_selected, "Delete the selected entry (undoable)"
        )
        self.collapse_action = action(
            "&Collapse or expand entry", "Ctrl+E", self.toggle_selected, "Fold the entry away"
        )
        self.rename_action = action(
            "Re&name entry...", "F2", self.rename_selected, "Change the entry's title"
        )
        self.save_preset_action = action(
            "Save scenario as p&reset...",
            "",
            self.save_selected_as_preset,
            "Keep the selected entry's scenario as one of your presets",
        )
        self.run_action = action(
            "&Run entry", "Ctrl+R", self.run_selected, "Train the selected run entry's fan"
        )
        self.run_all_action = action(
            "Run &all", "Ctrl+Shift+R", self.run_all, "Train every run entry"
        )
        self.stop_action = action("&Stop", "Ctrl+.", self.stop_all, "Stop every running entry")
        self.present_action = action(
            "&Present",
            "F5",
            self.present,
            "One entry at a time, full screen, large type; arrow keys move, Esc leaves",
        )
        self.reset_action = action(
            "Re&set entry", "", self.reset_selected, "Forget the selected entry's results"
        )
        menu = self.menuBar()
        file_menu = menu.addMenu("&File")
        for a in (self.new_action, self.open_action):
            file_menu.addAction(a)
        self.recent_menu = file_menu.addMenu("Open &recent")
        self.recent_menu.aboutToShow.connect(self._fill_recent_menu)
        file_menu.addSeparator()
        for a in (self.save_action, self.save_as_action):
            file_menu.addAction(a)
        file_menu.addSeparator()
        file_menu.addAction(self.report_action)
        file_menu.addSeparator()
        file_menu.addAction(self.quit_action)
        edit_menu = menu.addMenu("&Edit")
        edit_menu.addAction(self.undo_action)
        edit_menu.addAction(self.redo_action)
        edit_menu.addSeparator()
        for a in (
            self.add_note_action,
            self.add_preset_action,
            self.rename_action,
            self.move_up_action,
            self.move_down_action,
            self.collapse_action,
            self.delete_action,
        ):
            edit_menu.addAction(a)
        edit_menu.addSeparator()
        edit_menu.addAction(self.save_preset_action)
        run_menu = menu.addMenu("&Run")
        for a in (self.run_action, self.run_all_action, self.stop_action, self.reset_action):
            run_menu.addAction(a)
        view_menu = menu.addMenu("&View")
        view_menu.addAction(self.present_action)
        view_menu.addSeparator()
        for dock in self.findChildren(QtWidgets.QDockWidget):
            view_menu.addAction(dock.toggleViewAction())
        toolbar = self.addToolBar("Run")
        toolbar.setObjectName("run-toolbar")
        for a in (self.run_action, self.run_all_action, self.stop_action):
            toolbar.addAction(a)
        toolbar.addSeparator()
        for a in (self.add_note_action, self.add_preset_action):
            toolbar.addAction(a)
        toolbar.addSeparator()
        toolbar.addAction(self.present_action)

    # -- the document ------------------------------------------------------------------------

    def show_notebook(self, notebook: Notebook, path: Path | None = None) -> None:
        """Replace the document (no prompt: callers ask first)."""
        self.stop_all()
        for card in self.cards:
            card.detach()
            self.column_layout.removeWidget(card)
            card.deleteLater()
        self.cards, self.selected_card, self.selected_view = [], None, None
        self._clear_inspector()
        self.undo_stack.clear()
        self._restored = False
        self.notebook_title = notebook.title
        self.path = path or notebook.path
        self._last_autosave = ""
        for entry in notebook.entries:
            card = self._card_for(entry)
            self.cards.append(card)
            self.column_layout.insertWidget(len(self.cards) - 1, card)
            self._load_cached(card)
        self._refresh_outline()
        first = next((c for c in self.cards if c.kind != "note"), None)
        if first is not None:
            self.select_card(first)
        self._update_title()

    def _card_for(self, entry: Entry) -> EntryCard:
        body: NoteView | RunEntryView | SweepEntryView
        if entry.kind == "note":
            note = NoteEntryModel(entry.title, entry.text)
            body = NoteView(note, commit=self._commit_note)
        elif entry.scenario is None:
            raise ValueError(f"{entry.kind} entry {entry.title!r} has no scenario")
        elif entry.kind == "run":
            run = RunEntryModel(entry.title, entry.scenario)
            view = RunEntryView(run)
            view.run_requested.connect(self.run_view)
            view.stop_requested.connect(self.stop_view)
            body = view
        else:
            sweep_model = SweepEntryModel(entry.title, entry.scenario)
            sweep = SweepEntryView(sweep_model)
            sweep.run_requested.connect(self.run_sweep)
            sweep.stop_requested.connect(self.stop_sweep)
            body = sweep
        card = EntryCard(body, parent=self.column)
        card.origin = entry  # type: ignore[attr-defined]
        card.move_requested.connect(self.move_card)
        card.delete_requested.connect(self.delete_card)
        card.selected.connect(self.select_card)
        card.model.subscribe(functools.partial(self._on_entry_changed, card))
        return card

    def entry_of(self, card: EntryCard) -> Entry:
        """The card as a notebook entry, as it would be saved now."""
        model = card.model
        if isinstance(model, NoteEntryModel):
            return Entry("note", model.title, text=model.text)
        origin: Entry | None = getattr(card, "origin", None)
        if origin is not None and origin.kind == card.kind:
            return dataclasses.replace(origin, title=model.title, scenario=model.scenario)
        return Entry(card.kind, model.title, scenario=model.scenario)

    def current_notebook(self) -> Notebook:
        return Notebook(self.notebook_title, tuple(self.entry_of(c) for c in self.cards), self.path)

    def notebook_text(self) -> str:
        return dumps_notebook(self.current_notebook(), self._folder())

    def _folder(self) -> Path:
        return self.path.resolve().parent if self.path is not None else Path.cwd()

    def is_modified(self) -> bool:
        return self._restored or not self.undo_stack.isClean()

    def _on_clean_changed(self, _clean: bool) -> None:
        self._update_title()

    def _update_title(self) -> None:
        name = self.path.name if self.path is not None else "not saved"
        mark = " *" if self.is_modified() else ""
        self.setWindowTitle(f"Gradfence - {self.notebook_title} ({name}){mark}")

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

    # -- cards: the primitives the undo commands use -----------------------------------------

    def insert_card(self, card: EntryCard, index: int) -> None:
        index = max(0, min(index, len(self.cards)))
        self.cards.insert(index, card)
        self.column_layout.insertWidget(index, card)
        card.show()
        self._refresh_outline()
        self.select_card(card)

    def take_card(self, card: EntryCard) -> None:
        """Out of the column, kept alive for an undo; a running entry is stopped first."""
        if isinstance(card.body, RunEntryView):
            self.stop_view(card.body)
        elif isinstance(card.body, SweepEntryView):
            self.stop_sweep(card.body)
        index = self.cards.index(card)
        self.cards.remove(card)
        self.column_layout.removeWidget(card)
        card.hide()
        if self.selected_card is card:
            self.selected_card, self.selected_view = None, None
            self._clear_inspector()
            if self.cards:
                self.select_card(self.cards[min(index, len(self.cards) - 1)])
        self._refresh_outline()

    # -- edits (each an undo command) --------------------------------------------------------

    def _commit_scenario(self, model: ScenarioHolder, scenario: Scenario) -> None:
        if scenario != model.scenario:
            self.undo_stack.push(commands.SetScenario(model, scenario))

    def _commit_note(self, model: NoteEntryModel, title: str, text: str) -> None:
        self.undo_stack.push(commands.EditNote(model, title, text))

    def _insert_index(self) -> int:
        if self.selected_card in self.cards:
            return self.cards.index(self.selected_card) + 1
        return len(self.cards)

    def add_note(self) -> EntryCard:
        card = self._card_for(Entry("note", "New note", text=""))
        self.undo_stack.push(commands.InsertEntry(self, card, self._insert_index()))
        assert isinstance(card.body, NoteView)
        card.body.start_editing()
        return card

    def add_entry(self, entry: Entry) -> EntryCard:
        card = self._card_for(entry)
        self.undo_stack.push(commands.InsertEntry(self, card, self._insert_index()))
        self._load_cached(card)
        return card

    def add_preset(self, info: PresetInfo, kind: str) -> EntryCard:
        assert info.scenario is not None
        preset_path = info.path.resolve()
        raw = {"kind": kind, "title": info.scenario.name, "preset": str(preset_path)}
        entry = Entry(
            kind,
            info.scenario.name,
            scenario=info.scenario,
            preset=str(preset_path),
            raw=raw,
            origin=info.scenario,
            preset_path=preset_path,
        )
        return self.add_entry(entry)

    def browse_presets(self) -> None:
        dialog = PresetBrowser(self)
        if dialog.exec() and dialog.choice is not None:
            self.add_preset(*dialog.choice)

    def move_card(self, card: EntryCard, delta: int) -> None:
        index = self.cards.index(card)
        if 0 <= index + delta < len(self.cards):
            self.undo_stack.push(commands.MoveEntry(self, card, delta))

    def delete_card(self, card: EntryCard) -> None:
        if card in self.cards:
            self.undo_stack.push(commands.DeleteEntry(self, card))

    def move_selected(self, delta: int) -> None:
        if self.selected_card is not None:
            self.move_card(self.selected_card, delta)

    def delete_selected(self) -> None:
        if self.selected_card is not None:
            self.delete_card(self.selected_card)

    def toggle_selected(self) -> None:
        if self.selected_card is not None:
            self.selected_card.set_collapsed(not self.selected_card.collapsed)

    def rename_selected(self) -> None:
        card = self.selected_card
        if card is None:
            return
        title, ok = QtWidgets.QInputDialog.getText(
            self, "Rename entry", "Title:", text=card.model.title
        )
        if ok and title.strip() and title.strip() != card.model.title:
            self.undo_stack.push(commands.Rename(card.model, title.strip()))

    def save_selected_as_preset(self) -> None:
        if self.selected_view is None:
            QtWidgets.QMessageBox.information(
                self, "Save as preset", "Select a run or sweep entry first."
            )
            return
        scenario = self.selected_view.model.scenario
        name, ok = QtWidgets.QInputDialog.getText(
            self, "Save as preset", "Preset name:", text=scenario.name
        )
        if not ok or not name.strip():
            return
        try:
            try:
                path = save_user_preset(scenario, name.strip())
            except FileExistsError as exc:
                answer = QtWidgets.QMessageBox.question(
                    self, "Save as preset", f"{exc.args[0]} exists. Replace it?"
                )
                if answer != QtWidgets.QMessageBox.StandardButton.Yes:
                    return
                path = save_user_preset(scenario, name.strip(), overwrite=True)
        except (GradfenceInputError, OSError) as exc:
            QtWidgets.QMessageBox.warning(self, "Cannot save preset", str(exc))
            return
        self.statusBar().showMessage(f"Saved preset {path}", 8000)

    # -- selection and inspector -------------------------------------------------------------

    @property
    def run_views(self) -> list[RunEntryView]:
        return [c.body for c in self.cards if isinstance(c.body, RunEntryView)]

    @property
    def sweep_views(self) -> list[SweepEntryView]:
        return [c.body for c in self.cards if isinstance(c.body, SweepEntryView)]

    def card_of(self, view: QtWidgets.QWidget) -> EntryCard:
        return next(c for c in self.cards if c.body is view)

    def select_view(self, view: ScenarioView) -> None:
        self.select_card(self.card_of(view))

    def select_card(self, card: EntryCard) -> None:
        if card is self.selected_card and self._inspector_pages:
            return
        self.selected_card = card
        self._clear_inspector()
        if self.cards and card in self.cards:
            self.outline.blockSignals(True)
            self.outline.setCurrentRow(self.cards.index(card))
            self.outline.blockSignals(False)
        if isinstance(card.body, RunEntryView | SweepEntryView):
            view = card.body
            self.selected_view = view
            form = ScenarioForm(view.model, commit=self._commit_scenario)
            editor = TomlEditor(view.model, commit=self._commit_scenario)
            self._inspector_pages = [form, editor]
            self.inspector.addTab(form, "Form")
            self.inspector.addTab(editor, "TOML")
            self.inspector_dock.setWindowTitle(f"Inspector - {view.model.title}")
        else:
            self.selected_view = None
            hint = QtWidgets.QLabel(
                "A note: double-click it in the notebook to edit its Markdown in place."
            )
            hint.setWordWrap(True)
            hint.setAlignment(QtCore.Qt.AlignmentFlag.AlignTop)
            self.inspector.addTab(hint, "Note")
            self.inspector_dock.setWindowTitle(f"Inspector - {card.model.title}")

    def _clear_inspector(self) -> None:
        for page in self._inspector_pages:
            page.detach()
        self._inspector_pages = []
        while self.inspector.count():
            widget = self.inspector.widget(0)
            self.inspector.removeTab(0)
            if widget is not None:
                widget.deleteLater()

    def _on_outline_row_changed(self, row: int) -> None:
        if 0 <= row < len(self.cards):
            card = self.cards[row]
            self.scroll_area.ensureWidgetVisible(card)
            self.select_card(card)

    def _on_entry_changed(self, card: EntryCard, what: str) -> None:
        if what == "title":
            self._refresh_outline()
            if card is self.selected_card:
                self.inspector_dock.setWindowTitle(f"Inspector - {card.model.title}")
        elif what == "scenario":
            self._load_cached(card)
        elif what == "status":
            self._store_cached(card)

    # -- the results cache -------------------------------------------------------------------

    def _load_cached(self, card: EntryCard) -> None:
        """Show cached results of the entry's current scenario, if the notebook has any."""
        model = card.model
        if self.path is None or isinstance(model, NoteEntryModel) or model.status == RUNNING:
            return
        has_current = bool(model.results_hash) and model.results_hash == model.scenario.hash()
        if not has_current:
            cache.load(cache.cache_dir(self.path), model)

    def _store_cached(self, card: EntryCard) -> None:
        model = card.model
        if self.path is None or isinstance(model, NoteEntryModel):
            return
        try:
            cache.store(cache.cache_dir(self.path), model)
        except OSError as exc:  # a read-only folder costs the cache, nothing else
            self.statusBar().showMessage(f"Results not cached: {exc}", 8000)

    # -- files -------------------------------------------------------------------------------

    def confirm_discard(self) -> bool:
        """Ask about unsaved edits; True when it is fine to drop the document."""
        if not self.is_modified():
            return True
        answer = self.ask_unsaved()
        if answer == QtWidgets.QMessageBox.StandardButton.Save:
            return self.save()
        if answer == QtWidgets.QMessageBox.StandardButton.Discard:
            clear_recovery(self.path)
            return True
        return False

    def ask_unsaved(self) -> QtWidgets.QMessageBox.StandardButton:
        buttons = QtWidgets.QMessageBox.StandardButton
        return QtWidgets.QMessageBox.question(
            self,
            "Unsaved changes",
            f'"{self.notebook_title}" has changes that are not saved. Save them?',
            buttons.Save | buttons.Discard | buttons.Cancel,
            buttons.Save,
        )

    def new_notebook(self) -> None:
        if not self.confirm_discard():
            return
        self.show_notebook(Notebook("Untitled notebook", ()), path=None)
        self.path = None
        self._update_title()

    def _on_open(self) -> None:
        path, _ = QtWidgets.QFileDialog.getOpenFileName(
            self, "Open notebook", str(self._folder()), NOTEBOOK_FILTER
        )
        if path:
            self.open_path(Path(path))

    def open_path(self, path: Path) -> bool:
        if not self.confirm_discard():
            return False
        try:
            notebook = load_notebook(path)
        except GradfenceInputError as exc:
            QtWidgets.QMessageBox.warning(self, "Cannot open notebook", str(exc))
            return False
        self.show_notebook(notebook)
        add_recent(path)
        self.offer_recovery()
        return True

    def _fill_recent_menu(self) -> None:
        self.recent_menu.clear()
        recent = recent_notebooks()
        if not recent:
            self.recent_menu.addAction("(none yet)").setEnabled(False)
        for path in recent:
            self.recent_menu.addAction(str(path), lambda p=path: self.open_path(p))

    def save(self) -> bool:
        if self.path is None:
            return self.save_as()
        return self.save_to(self.path)

    def save_as(self) -> bool:
        name, _ = QtWidgets.QFileDialog.getSaveFileName(
            self, "Save notebook as", str(self._folder()), NOTEBOOK_FILTER
        )
        if not name:
            return False
        path = Path(name)
        if not path.name.endswith(NOTEBOOK_SUFFIX):
            path = path.with_name(path.name.removesuffix(".toml") + NOTEBOOK_SUFFIX)
        return self.save_to(path)

    def save_to(self, path: Path) -> bool:
        """Write the notebook atomically to `path`; it becomes the document's file."""
        try:
            save_notebook(self.current_notebook(), path)
        except OSError as exc:
            QtWidgets.QMessageBox.warning(self, "Cannot save", f"{path}: {exc.strerror or exc}.")
            return False
        clear_recovery(self.path)
        clear_recovery(path)
        self.path = path
        self._restored = False
        self._last_autosave = ""
        self.undo_stack.setClean()
        add_recent(path)
        for card in self.cards:
            self._store_cached(card)
        self._update_title()
        self.statusBar().showMessage(f"Saved {path}", 5000)
        return True

    def export_report(self, path: Path | None = None) -> bool:
        """Run what has no current results (with a progress dialog), then write the report."""
        from app.report import overall_progress, report_html

        if path is None:
            default = self.path.with_suffix("").with_suffix(".html") if self.path else None
            name, _ = QtWidgets.QFileDialog.getSaveFileName(
                self, "Export report", str(default or self._folder()), "HTML (*.html)"
            )
            if not name:
                return False
            path = Path(name).with_suffix(".html")
        todo = self.run_pending()
        if todo:
            dialog = QtWidgets.QProgressDialog(
                f"Running {len(todo)} entries for the report...", "Cancel", 0, 1000, self
            )
            dialog.setWindowTitle("Export report")
            dialog.setWindowModality(QtCore.Qt.WindowModality.WindowModal)
            dialog.show()
            while not self.all_finished():
                QtWidgets.QApplication.processEvents()
                if dialog.wasCanceled():
                    self.stop_all()
                    return False
                dialog.setValue(int(overall_progress(todo) * 1000))
                time.sleep(0.02)
            dialog.close()
        try:
            write_text_atomic(path, report_html(self))
        except OSError as exc:
            QtWidgets.QMessageBox.warning(self, "Cannot write report", f"{path}: {exc}")
            return False
        self.statusBar().showMessage(f"Wrote {path}", 8000)
        return True

    # -- autosave and recovery ---------------------------------------------------------------

    def autosave(self) -> Path | None:
        """Copy unsaved edits to the recovery file (only when they changed since last time)."""
        if not self.is_modified():
            return None
        try:
            text = self.notebook_text()
        except ValueError:
            return None
        if text == self._last_autosave:
            return None
        try:
            written = write_recovery(self.path, text)
        except OSError as exc:
            self.statusBar().showMessage(f"Autosave failed: {exc}", 8000)
            return None
        self._last_autosave = text
        return written

    def offer_recovery(self, include_untitled: bool = False) -> bool:
        """After a start or an open: offer the edits an earlier session left unsaved (with
        `include_untitled`, those of a notebook that was never saved, too)."""
        slots: list[Path | None] = [self.path]
        if include_untitled and self.path is not None:
            slots.append(None)
        for slot in slots:
            found = find_recovery(slot)
            if found is None:
                continue
            if not self.ask_restore(found):
                clear_recovery(slot)
                continue
            where = slot or Path.cwd() / "untitled.notebook.toml"
            try:
                notebook = loads_notebook(found.text, where, source="the recovery copy")
            except GradfenceInputError as exc:
                QtWidgets.QMessageBox.warning(self, "Cannot restore", str(exc))
                continue
            self.show_notebook(notebook, path=slot)
            self.path = slot
            self._restored = True
            self._update_title()
            return True
        return False

    def ask_restore(self, found: Recovery) -> bool:
        when = time.strftime("%Y-%m-%d %H:%M", time.localtime(found.saved_at))
        name = found.notebook.name if found.notebook else "an unsaved notebook"
        answer = QtWidgets.QMessageBox.question(
            self,
            "Restore unsaved changes?",
            f"Gradfence ended without saving the changes to {name} (autosaved {when}). "
            "Restore them?",
        )
        return answer == QtWidgets.QMessageBox.StandardButton.Yes

    # -- running -----------------------------------------------------------------------------

    def run_view(self, view: RunEntryView) -> None:
        model = view.model
        if model.status == RUNNING:
            return
        run_id = next(self._run_ids)
        text = dumps_scenario(model.scenario)

        def handle(kind: str, rid: int, batch: int, payload: Any) -> None:
            if kind == "records":
                model.add_records(rid, batch, payload)
            elif kind == "done":
                model.finish_stack(rid, batch)
            elif kind == "error":
                model.fail(rid, str(payload))

        # Smallest batch first: those finish in seconds, so the curves a person looks at first
        # (the preset's batch size and below) fill while the large stacks still train.
        for batch, members in sorted(model.begin(run_id).items()):
            self.pool.submit(Task(run_id, batch, text, members), handle)

    def run_sweep(self, view: SweepEntryView) -> None:
        model = view.model
        if model.status == RUNNING:
            return
        run_id = next(self._run_ids)
        text = dumps_scenario(model.scenario)

        def handle(kind: str, rid: int, batch: int, payload: Any) -> None:
            if kind == "rows":
                model.add_rows(rid, payload)
            elif kind == "profile":
                model.add_profile(rid, payload)
            elif kind == "error":
                model.fail(rid, str(payload))

        chunks = model.begin(run_id)
        self.pool.submit(Task(run_id, 0, text, [], profile=True), handle)
        for chunk in chunks:
            self.pool.submit(Task(run_id, chunk.batch_size, text, [], chunk=chunk), handle)

    def run_pending(self) -> list[ScenarioView]:
        """Start every entry without finished results of its current scenario; returns them."""
        views: list[ScenarioView] = [*self.run_views, *self.sweep_views]
        todo = [v for v in views if v.model.status != DONE or v.model.stale]
        for view in todo:
            if isinstance(view, RunEntryView):
                self.run_view(view)
            else:
                self.run_sweep(view)
        return todo

    def stop_sweep(self, view: SweepEntryView) -> None:
        if view.model.status == RUNNING:
            self.pool.stop(view.model.run_id)
            view.model.cancel()

    def stop_view(self, view: RunEntryView) -> None:
        if view.model.status == RUNNING:
            self.pool.stop(view.model.run_id)
            view.model.stop()

    def run_selected(self) -> None:
        if isinstance(self.selected_view, RunEntryView):
            self.run_view(self.selected_view)
        elif isinstance(self.selected_view, SweepEntryView):
            self.run_sweep(self.selected_view)

    def run_all(self) -> None:
        for view in self.run_views:
            self.run_view(view)
        for sweep in self.sweep_views:
            self.run_sweep(sweep)

    def stop_all(self) -> None:
        for view in self.run_views:
            self.stop_view(view)
        for sweep in self.sweep_views:
            self.stop_sweep(sweep)

    def reset_selected(self) -> None:
        if isinstance(self.selected_view, RunEntryView):
            self.stop_view(self.selected_view)
            self.selected_view.model.reset()

    def all_finished(self) -> bool:
        views: list[ScenarioView] = [*self.run_views, *self.sweep_views]
        return all(v.model.status != RUNNING for v in views)

    # -- timers, closing ---------------------------------------------------------------------

    def present(self, full_screen: bool = True) -> PresentationWindow:
        """Open the presentation view at the selected entry."""
        from app.presentation import PresentationWindow

        if self.presentation is not None:
            self.presentation.close()
        start = self.cards.index(self.selected_card) if self.selected_card in self.cards else 0
        shown = PresentationWindow(
            self.cards, start, run_view=self.run_view, run_sweep=self.run_sweep, parent=self
        )
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
        if self.presentation is not None:
            self.presentation.refresh_if_dirty()
        for view in self.run_views:
            view.refresh_if_dirty()
        for sweep in self.sweep_views:
            sweep.refresh_if_dirty()

    def _on_speed_tick(self) -> None:
        now = time.monotonic()
        steps = self.pool.steps_received
        rate = (steps - self._last_steps) / max(now - self._last_time, 1e-9)
        self._last_steps, self._last_time = steps, now
        self.speed_label.setText(f"{rate:,.0f} steps/s")

    def _on_pool_state_changed(self, text: str) -> None:
        self.worker_label.setText(text)

    def closeEvent(self, event: QtGui.QCloseEvent) -> None:
        if not self.confirm_discard():
            event.ignore()
            return
        if self.presentation is not None:
            self.presentation.close()
        if not self.is_modified():
            clear_recovery(self.path)
        self.stop_all()
        self._redraw_timer.stop()
        self._speed_timer.stop()
        self._autosave_timer.stop()
        self.pool.shutdown()
        super().closeEvent(event)
