"""The window's menus and toolbar: every action with its shortcut and tip, in one place."""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

from PySide6 import QtGui, QtWidgets

from app import commands

if TYPE_CHECKING:
    from app.main_window import MainWindow


def build_menus(w: MainWindow) -> None:
    """Create the actions as attributes of `w` (`w.train_action` ...), its menus and toolbar."""
    keys = QtGui.QKeySequence.StandardKey

    def action(name: str, text: str, shortcut: Any, slot: Any, tip: str) -> QtGui.QAction:
        a = QtGui.QAction(text, w)
        if shortcut:
            a.setShortcut(QtGui.QKeySequence(shortcut))
        a.setStatusTip(tip)
        a.setToolTip(tip)
        a.triggered.connect(lambda _=False: slot())
        setattr(w, name, a)
        return a

    files = w.files
    file_actions = [
        action("new_action", "&New study", keys.New, files.new_study, "An empty study"),
        action(
            "open_action", "&Open study...", keys.Open, files.open_dialog, "Open a .study.toml file"
        ),
        None,
        action("save_action", "&Save", keys.Save, files.save, "Save the study"),
        action(
            "save_as_action", "Save &as...", keys.SaveAs, files.save_as, "Save under another name"
        ),
        None,
        action(
            "handout_action",
            "Export &handout...",
            "",
            files.export_handout,
            "Write the study as one self-contained HTML file (trains what is not trained)",
        ),
        None,
        action("quit_action", "&Quit", "Ctrl+Q", w.close, "Quit Gradfence"),
    ]
    w.undo_action = w.undo_stack.createUndoAction(w, "&Undo")
    w.undo_action.setShortcut(QtGui.QKeySequence(keys.Undo))
    w.redo_action = w.undo_stack.createRedoAction(w, "&Redo")
    w.redo_action.setShortcut(QtGui.QKeySequence(keys.Redo))
    edit_actions = [
        w.undo_action,
        w.redo_action,
        None,
        action(
            "add_note_action",
            "Add &note",
            "Ctrl+Shift+N",
            w.add_note,
            "A Markdown note below the selected entry",
        ),
        action(
            "add_fan_action",
            "Add &fan...",
            "Ctrl+Shift+F",
            lambda: w.browse_presets("fan"),
            "A fan from a preset: every method at 17 thresholds and 4 batch sizes, trained live",
        ),
        action(
            "add_map_action",
            "Add &map...",
            "Ctrl+Shift+M",
            lambda: w.browse_presets("map"),
            "A map from a preset: batch size x threshold x seed, its windows and verdict",
        ),
        action(
            "add_log_action",
            "Add &log...",
            "Ctrl+Shift+L",
            w.add_log,
            "Your own run's log of gradient norms: every rule replayed on it, thresholds advised",
        ),
        action("rename_action", "Re&name entry...", "F2", w.rename_selected, "Retitle the entry"),
        action(
            "move_up_action",
            "Move entry &up",
            "Alt+Up",
            lambda: w.with_selected(lambda c: w.move_card(c, -1)),
            "Move the entry up",
        ),
        action(
            "move_down_action",
            "Move entry &down",
            "Alt+Down",
            lambda: w.with_selected(lambda c: w.move_card(c, 1)),
            "Move the entry down",
        ),
        action(
            "collapse_action",
            "&Fold or unfold entry",
            "Ctrl+E",
            lambda: w.with_selected(lambda c: c.set_collapsed(not c.collapsed)),
            "Fold the entry to its header",
        ),
        action(
            "delete_action",
            "&Delete entry",
            "",
            lambda: w.with_selected(w.delete_card),
            "Delete the selected entry (undoable)",
        ),
        None,
        action(
            "rename_study_action",
            "Rename the s&tudy...",
            "",
            lambda: rename_study(w),
            "Change the study's title",
        ),
        action(
            "save_preset_action",
            "Save scenario as p&reset...",
            "",
            w.save_selected_as_preset,
            "Keep the selected entry's scenario as one of your presets",
        ),
    ]
    train_actions = [
        action(
            "train_action",
            "&Train",
            "Ctrl+T",
            w.train_selected,
            "Train the selected fan or map",
        ),
        action(
            "train_all_action",
            "Train &all",
            "Ctrl+Shift+T",
            w.train_all,
            "Train every fan and map of the study",
        ),
        action("stop_action", "&Stop", "Ctrl+.", lambda: w.runner.stop_all(), "Stop all training"),
        None,
        action(
            "forget_action",
            "&Forget results",
            "",
            w.forget_selected,
            "Drop the selected entry's results (the cache beside the file keeps its copy)",
        ),
    ]
    w.auto_train_action = QtGui.QAction("Train again after an &edit", w)
    w.auto_train_action.setCheckable(True)
    w.auto_train_action.setChecked(w.auto_train)
    w.auto_train_action.setStatusTip("An edit retrains its entry after a short pause")
    w.auto_train_action.toggled.connect(lambda on: setattr(w, "auto_train", on))
    train_actions.append(w.auto_train_action)
    present = action(
        "present_action",
        "&Present",
        "F5",
        w.present,
        "One entry at a time, full screen, large type; arrow keys move, Esc leaves",
    )
    bar = w.menuBar()
    menus = {
        "&File": file_actions,
        "&Edit": edit_actions,
        "&Train": train_actions,
        "&View": [present, None],
    }
    for title, entries in menus.items():
        menu = bar.addMenu(title)
        for entry in entries:
            if entry is None:
                menu.addSeparator()
            else:
                menu.addAction(entry)
        if title == "&File":
            w.recent_menu = QtWidgets.QMenu("Open &recent", menu)
            menu.insertMenu(menu.actions()[2], w.recent_menu)  # after Open study
            w.recent_menu.aboutToShow.connect(lambda: files.fill_recent_menu(w.recent_menu))
        if title == "&View":
            for dock in w.findChildren(QtWidgets.QDockWidget):
                menu.addAction(dock.toggleViewAction())
    toolbar = w.addToolBar("Study")
    toolbar.setObjectName("study-toolbar")
    for entry in (
        w.train_action,
        w.train_all_action,
        w.stop_action,
        None,
        w.add_note_action,
        w.add_fan_action,
        w.add_map_action,
        w.add_log_action,
        None,
        present,
    ):
        if entry is None:
            toolbar.addSeparator()
        else:
            toolbar.addAction(entry)


def rename_study(w: MainWindow) -> None:
    title, ok = QtWidgets.QInputDialog.getText(w, "Rename the study", "Title:", text=w.study.title)
    if ok and title.strip() and title.strip() != w.study.title:
        w.undo_stack.push(commands.RenameStudy(w.study, title.strip()))
