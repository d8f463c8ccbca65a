"""The desktop window: the notebook's entries in a column, an outline, an inspector."""

from __future__ import annotations

import itertools
import time
from pathlib import Path
from typing import Any

from PySide6 import QtCore, QtGui, QtWidgets

from app.note_view import NoteView
from app.run_entry_view import RunEntryView
from app.scenario_form import ScenarioForm
from app.sweep_entry_view import SweepEntryView
from app.toml_editor import TomlEditor
from app.workers import Task, WorkerPool
from core.errors import GradfenceInputError
from core.notebook import Notebook, load_notebook
from core.run_model import RUNNING, RunEntryModel
from core.scenario import dumps_scenario
from core.sweep_model import SweepEntryModel

REDRAW_MS = 33  # plots are redrawn at most about 30 times a second


class MainWindow(QtWidgets.QMainWindow):
    def __init__(self, notebook: Notebook, pool: WorkerPool | None = None) -> None:
        super().__init__()
        self.pool = pool or WorkerPool(parent=self)
        self.pool.state_changed.connect(self._on_pool_state_changed)
        self._run_ids = itertools.count(1)
        self.run_views: list[RunEntryView] = []
        self.sweep_views: list[SweepEntryView] = []
        self.entry_widgets: list[QtWidgets.QWidget] = []
        self.selected_view: RunEntryView | SweepEntryView | None = None
        self.resize(1500, 1000)

        self.column = QtWidgets.QWidget()
        self.column_layout = QtWidgets.QVBoxLayout(self.column)
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

        self._build_actions()
        self.show_notebook(notebook)

    # -- building ----------------------------------------------------------------------------

    def _build_actions(self) -> None:
        def action(text: str, shortcut: str, slot: Any, tip: str) -> QtGui.QAction:
            a = QtGui.QAction(text, self)
            if shortcut:
                a.setShortcut(QtGui.QKeySequence(shortcut))
            a.setStatusTip(tip)
            a.triggered.connect(slot)
            return a

        self.open_action = action(
            "&Open notebook...", "Ctrl+O", self._on_open, "Open a .notebook.toml file"
        )
        self.quit_action = action("&Quit", "Ctrl+Q", self.close, "Quit Gradfence")
        self.run_action = action(
            "&Run entry", "Ctrl+R", self.run_selected, "Train the selected run entry's fan"
        )
        self.run_all_action = action(
            "Run &all", "Ctrl+Shift+R", self.run_all, "Train every run entry"
        )
        self.stop_action = action("&Stop", "Ctrl+.", self.stop_all, "Stop every running entry")
        self.reset_action = action(
            "Re&set entry", "", self.reset_selected, "Forget the selected entry's results"
        )
        menu = self.menuBar()
        file_menu = menu.addMenu("&File")
        file_menu.addAction(self.open_action)
        file_menu.addSeparator()
        file_menu.addAction(self.quit_action)
        run_menu = menu.addMenu("&Run")
        for a in (self.run_action, self.run_all_action, self.stop_action, self.reset_action):
            run_menu.addAction(a)
        view_menu = menu.addMenu("&View")
        for dock in self.findChildren(QtWidgets.QDockWidget):
            view_menu.addAction(dock.toggleViewAction())
        toolbar = self.addToolBar("Run")
        toolbar.setObjectName("run-toolbar")
        for a in (self.run_action, self.run_all_action, self.stop_action):
            toolbar.addAction(a)

    def show_notebook(self, notebook: Notebook) -> None:
        self.stop_all()
        for old in self.entry_widgets:
            self.column_layout.removeWidget(old)
            old.deleteLater()
        self.entry_widgets, self.run_views, self.sweep_views = [], [], []
        self.outline.clear()
        self.notebook = notebook
        self.setWindowTitle(f"Gradfence - {notebook.title}")
        for entry in notebook.entries:
            widget: QtWidgets.QWidget
            if entry.kind == "note":
                widget = NoteView(entry.title, entry.text)
            elif entry.kind == "run" and entry.scenario is not None:
                view = RunEntryView(RunEntryModel(entry.title, entry.scenario))
                view.run_requested.connect(self.run_view)
                view.stop_requested.connect(self.stop_view)
                view.selected.connect(self.select_view)
                self.run_views.append(view)
                widget = view
            elif entry.scenario is not None:
                sweep = SweepEntryView(SweepEntryModel(entry.title, entry.scenario))
                sweep.run_requested.connect(self.run_sweep)
                sweep.stop_requested.connect(self.stop_sweep)
                sweep.selected.connect(self.select_view)
                self.sweep_views.append(sweep)
                widget = sweep
            else:
                continue
            self.column_layout.addWidget(widget)
            self.entry_widgets.append(widget)
            self.outline.addItem(f"{entry.kind}: {entry.title}")
        self.column_layout.addStretch(1)
        first: list[RunEntryView | SweepEntryView] = [*self.run_views, *self.sweep_views]
        if first:
            self.select_view(first[0])

    # -- selection and inspector -------------------------------------------------------------

    def select_view(self, view: RunEntryView | SweepEntryView) -> None:
        self.selected_view = view
        self.inspector.clear()
        self.inspector.addTab(ScenarioForm(view.model), "Form")
        self.inspector.addTab(TomlEditor(view.model), "TOML")
        self.inspector_dock.setWindowTitle(f"Inspector - {view.model.title}")

    def _on_outline_row_changed(self, row: int) -> None:
        if 0 <= row < len(self.entry_widgets):
            widget = self.entry_widgets[row]
            self.scroll_area.ensureWidgetVisible(widget)
            if isinstance(widget, RunEntryView | SweepEntryView):
                self.select_view(widget)

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
            elif kind == "error":
                model.fail(rid, str(payload))

        for chunk in model.begin(run_id):
            self.pool.submit(Task(run_id, chunk.batch_size, text, [], chunk=chunk), handle)

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
        for sweep in getattr(self, "sweep_views", []):
            self.stop_sweep(sweep)

    def reset_selected(self) -> None:
        if isinstance(self.selected_view, RunEntryView):
            self.stop_view(self.selected_view)
            self.selected_view.model.reset()

    def all_finished(self) -> bool:
        views: list[RunEntryView | SweepEntryView] = [*self.run_views, *self.sweep_views]
        return all(v.model.status != RUNNING for v in views)

    # -- timers, files, closing --------------------------------------------------------------

    def _on_redraw_tick(self) -> None:
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

    def _on_open(self) -> None:
        path, _ = QtWidgets.QFileDialog.getOpenFileName(
            self, "Open notebook", "", "Notebooks (*.notebook.toml)"
        )
        if path:
            self.open_path(Path(path))

    def open_path(self, path: Path) -> None:
        try:
            notebook = load_notebook(path)
        except GradfenceInputError as exc:
            QtWidgets.QMessageBox.warning(self, "Cannot open notebook", str(exc))
            return
        self.show_notebook(notebook)

    def closeEvent(self, event: QtGui.QCloseEvent) -> None:
        self.stop_all()
        self._redraw_timer.stop()
        self._speed_timer.stop()
        self.pool.shutdown()
        super().closeEvent(event)
