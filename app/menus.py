"""The window's menus and toolbar: every action with its shortcut and tip, in one table.

`build_menus` makes the actions of the table, connects each to the slot of the same name, and
lays them out in menus and the toolbar; it knows nothing of the window but its Qt base class.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass

from PySide6 import QtGui, QtWidgets

Keys = QtGui.QKeySequence.StandardKey


@dataclass(frozen=True)
class Item:
    name: str  # the slot's name, and the action's key in what build_menus returns
    text: str
    shortcut: str | QtGui.QKeySequence.StandardKey
    tip: str


SEPARATOR = None
MENUS: dict[str, list[Item | None]] = {
    "&File": [
        Item("new_study", "&New study", Keys.New, "An empty study"),
        Item("open_study", "&Open study...", Keys.Open, "Open a .study.toml file"),
        SEPARATOR,
        Item("save", "&Save", Keys.Save, "Save the study"),
        Item("save_as", "Save &as...", Keys.SaveAs, "Save the study under another name"),
        SEPARATOR,
        Item(
            "export_handout",
            "Export &handout...",
            "",
            "Write the study as one self-contained HTML file (trains what is not trained)",
        ),
        SEPARATOR,
        Item("quit", "&Quit", "Ctrl+Q", "Quit Gradfence"),
    ],
    "&Edit": [
        Item("add_note", "Add &note", "Ctrl+Shift+N", "A Markdown note below the selected entry"),
        Item(
            "add_fan",
            "Add &fan...",
            "Ctrl+Shift+F",
            "A fan from a preset: every method at 17 thresholds and 4 batch sizes, trained live",
        ),
        Item(
            "add_map",
            "Add &map...",
            "Ctrl+Shift+M",
            "A map from a preset: batch size x threshold x seed, its windows and verdict",
        ),
        Item(
            "add_log",
            "Add &log...",
            "Ctrl+Shift+L",
            "Your own run's log of gradient norms: every rule replayed on it, thresholds advised",
        ),
        SEPARATOR,
        Item("rename_entry", "Re&name entry...", "F2", "Retitle the selected entry"),
        Item("move_up", "Move entry &up", "Alt+Up", "Move the selected entry up"),
        Item("move_down", "Move entry &down", "Alt+Down", "Move the selected entry down"),
        Item("fold", "&Fold or unfold entry", "Ctrl+E", "Fold the entry to its header"),
        Item("delete_entry", "&Delete entry", "", "Delete the selected entry (undoable)"),
        SEPARATOR,
        Item("rename_study", "Rename the s&tudy...", "", "Change the study's title"),
        Item(
            "save_preset",
            "Save scenario as p&reset...",
            "",
            "Keep the selected entry's scenario as one of your presets",
        ),
    ],
    "&Train": [
        Item("train", "&Train", "Ctrl+T", "Train the selected fan or map (or replay a log)"),
        Item("train_all", "Train &all", "Ctrl+Shift+T", "Train every fan, map and log"),
        Item("stop", "&Stop", "Ctrl+.", "Stop all training"),
        SEPARATOR,
        Item(
            "forget",
            "&Forget results",
            "",
            "Drop the selected entry's results (the cache beside the file keeps its copy)",
        ),
    ],
    "&View": [
        Item(
            "present",
            "&Present",
            "F5",
            "One entry at a time, full screen, large type; arrow keys move, Esc leaves",
        ),
    ],
}
TOOLBAR = (
    "train",
    "train_all",
    "stop",
    None,
    "add_note",
    "add_fan",
    "add_map",
    "add_log",
    None,
    "present",
)


def build_menus(
    window: QtWidgets.QMainWindow,
    undo_stack: QtGui.QUndoStack,
    slots: Mapping[str, Callable[[], object]],
    fill_recent: Callable[[QtWidgets.QMenu], None],
    auto_train: Callable[[bool], None],
) -> dict[str, QtGui.QAction]:
    """The actions of MENUS, each calling `slots[name]`; also Undo, Redo, Open recent and the
    "Train again after an edit" toggle. Returns the actions by name."""
    actions: dict[str, QtGui.QAction] = {}
    for entries in MENUS.values():
        for item in entries:
            if item is None:
                continue
            action = QtGui.QAction(item.text, window)
            if item.shortcut:
                action.setShortcut(QtGui.QKeySequence(item.shortcut))
            action.setStatusTip(item.tip)
            action.setToolTip(item.tip)
            slot = slots[item.name]
            action.triggered.connect(lambda _=False, slot=slot: slot())
            actions[item.name] = action
    actions["undo"] = undo_stack.createUndoAction(window, "&Undo")
    actions["undo"].setShortcut(QtGui.QKeySequence(Keys.Undo))
    actions["redo"] = undo_stack.createRedoAction(window, "&Redo")
    actions["redo"].setShortcut(QtGui.QKeySequence(Keys.Redo))
    toggle = QtGui.QAction("Train again after an &edit", window)
    toggle.setCheckable(True)
    toggle.setChecked(True)
    toggle.setStatusTip("An edit retrains its entry after a short pause")
    toggle.toggled.connect(auto_train)
    actions["auto_train"] = toggle
    bar = window.menuBar()
    for title, entries in MENUS.items():
        menu = bar.addMenu(title)
        if title == "&Edit":
            menu.addAction(actions["undo"])
            menu.addAction(actions["redo"])
            menu.addSeparator()
        for item in entries:
            if item is None:
                menu.addSeparator()
            else:
                menu.addAction(actions[item.name])
        if title == "&File":
            recent = QtWidgets.QMenu("Open &recent", menu)
            menu.insertMenu(menu.actions()[2], recent)  # after Open study
            recent.aboutToShow.connect(lambda shown=recent: fill_recent(shown))
            actions["recent"] = recent.menuAction()
        if title == "&Train":
            menu.addAction(toggle)
        if title == "&View":
            menu.addSeparator()
            for dock in window.findChildren(QtWidgets.QDockWidget):
                menu.addAction(dock.toggleViewAction())
    toolbar = window.addToolBar("Study")
    toolbar.setObjectName("study-toolbar")
    for name in TOOLBAR:
        if name is None:
            toolbar.addSeparator()
        else:
            toolbar.addAction(actions[name])
    return actions
