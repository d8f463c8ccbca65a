"""Notebook documents in the window: build, save, reopen; undo and redo of every edit; notes
edited in place; stale results never drawn; results cached by scenario hash; presets."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from pytestqt.qtbot import QtBot

from app.main_window import MainWindow
from app.note_view import NoteView
from app.presets_dialog import PresetBrowser
from app.scenario_form import ScenarioForm
from core import cache
from core.notebook import load_notebook
from core.presets import list_presets, shipped_dir, user_dir
from core.run_model import DONE, IDLE
from tests.app.conftest import trained


def preset(name: str):  # type: ignore[no-untyped-def]
    return next(p for p in list_presets() if p.path.stem == name)


def titles(win: MainWindow) -> list[str]:
    return [c.model.title for c in win.cards]


def test_a_built_notebook_saves_and_reopens_equal(
    qtbot: QtBot, window: MainWindow, tmp_path: Path
) -> None:
    window.new_notebook()
    assert window.cards == [] and window.path is None
    note = window.add_note()
    assert isinstance(note.body, NoteView) and note.body.editing
    note.body.title_edit.setText("Why this notebook")
    note.body.text_edit.setPlainText("Watch **pass-through**.\n\n- one\n- two")
    note.body.finish_editing()
    window.add_preset(preset("outliers-meet-batch-size"), "run")
    window.add_preset(preset("batch-size-coupling"), "sweep")
    run = window.run_views[0]
    window._commit_scenario(run.model, run.model.scenario.with_overrides({"train.lr": 0.07}))
    assert [c.kind for c in window.cards] == ["note", "run", "sweep"]
    assert window.is_modified() and window.windowTitle().endswith("*")

    path = tmp_path / "sub" / "built.notebook.toml"
    assert window.save_to(path)
    assert not window.is_modified()
    reopened = load_notebook(path)
    assert reopened.entries == window.current_notebook().entries
    assert reopened.entries[0].text == "Watch **pass-through**.\n\n- one\n- two"
    assert reopened.entries[1].scenario is not None
    assert reopened.entries[1].scenario.train.lr == 0.07  # the edit, written inline
    # The unedited sweep keeps its preset reference, relative to the new folder.
    assert reopened.entries[2].preset is not None
    assert (path.parent / str(reopened.entries[2].preset)).resolve() == (
        shipped_dir() / "batch-size-coupling.toml"
    ).resolve()

    other = MainWindow(reopened)
    qtbot.addWidget(other)
    assert other.current_notebook().entries == window.current_notebook().entries
    other.close()


def test_move_and_delete_are_undone_and_redone(window: MainWindow) -> None:
    start = titles(window)
    assert start == ["A note", "Quick blobs"]
    window.move_card(window.cards[0], 1)
    assert titles(window) == ["Quick blobs", "A note"]
    window.delete_card(window.cards[0])
    assert titles(window) == ["A note"] and window.run_views == []
    assert window.outline.count() == 1
    window.undo_stack.undo()
    assert titles(window) == ["Quick blobs", "A note"]
    window.undo_stack.undo()
    assert titles(window) == start and window.outline.count() == 2
    window.undo_stack.redo()
    window.undo_stack.redo()
    assert titles(window) == ["A note"]
    assert window.undo_stack.count() == 2


def test_form_edits_notes_and_titles_are_undone(window: MainWindow) -> None:
    run = window.run_views[0].model
    form = window.inspector.widget(0)
    assert isinstance(form, ScenarioForm)
    form.widgets["train.steps"].setValue(55)  # type: ignore[attr-defined]
    assert run.scenario.train.steps == 55
    window.undo_stack.undo()
    assert run.scenario.train.steps == 80
    assert form.widgets["train.steps"].value() == 80  # type: ignore[attr-defined]

    card = window.cards[0]
    assert isinstance(card.body, NoteView)
    card.body.start_editing()
    card.body.text_edit.setPlainText("Rewritten *in place*.")
    card.body.finish_editing()
    assert card.model.text == "Rewritten *in place*."  # type: ignore[union-attr]
    assert "in place" in card.body.label.text()
    window.undo_stack.undo()
    assert card.model.text == "Some *Markdown*."  # type: ignore[union-attr]
    window.undo_stack.redo()
    assert card.model.text == "Rewritten *in place*."  # type: ignore[union-attr]
    from app import commands

    window.undo_stack.push(commands.Rename(run, "Renamed"))
    assert window.outline.item(1).text() == "run: Renamed"  # type: ignore[union-attr]
    assert window.cards[1].title_label.text() == "Renamed"
    window.undo_stack.undo()
    assert window.outline.item(1).text() == "run: Quick blobs"  # type: ignore[union-attr]


def test_a_changed_scenario_shows_stale_and_never_the_old_plots(
    qtbot: QtBot, window: MainWindow
) -> None:
    view = trained(qtbot, window)

    def drawn() -> int:
        xs = (c.getOriginalDataset()[0] for c in view.curves.values())
        return sum(0 if x is None else len(x) for x in xs)

    assert drawn() > 0
    model = view.model
    window._commit_scenario(model, model.scenario.with_overrides({"train.lr": 0.2}))
    view.refresh()
    assert model.stale and "stale" in view.status_label.text()
    assert drawn() == 0 and "earlier scenario" in view.readout.text()
    assert not view.hist_clean.isVisible()
    window.undo_stack.undo()  # back to the scenario the results belong to
    view.refresh()
    assert not model.stale and drawn() > 0


def test_results_are_cached_beside_the_notebook_by_scenario_hash(
    qtbot: QtBot, window: MainWindow
) -> None:
    view = trained(qtbot, window)
    assert window.path is not None
    folder = cache.cache_dir(window.path)
    assert cache.run_path(folder, view.model.scenario).is_file()

    again = MainWindow(load_notebook(window.path))
    qtbot.addWidget(again)
    cached = again.run_views[0].model
    assert cached.status == DONE and not cached.stale  # drawn at once, nothing trained
    assert not again.pool.started
    for batch, stack in view.model.stacks.items():
        np.testing.assert_array_equal(
            cached.stacks[batch].values["val_loss"], stack.values["val_loss"]
        )
    # A changed scenario finds nothing: it is not run, and shows no results.
    again._commit_scenario(cached, cached.scenario.with_overrides({"train.lr": 0.3}))
    assert cached.stale
    again.run_views[0].refresh()
    assert "earlier scenario" in again.run_views[0].readout.text()
    again.close()

    text = window.path.read_text().replace("steps = 80", "steps = 70")
    window.path.write_text(text)
    changed = MainWindow(load_notebook(window.path))
    qtbot.addWidget(changed)
    assert changed.run_views[0].model.status == IDLE
    changed.close()


def test_closing_with_unsaved_changes_asks_and_cancel_keeps_the_window(
    window: MainWindow, monkeypatch: pytest.MonkeyPatch, no_modal_questions: list[str]
) -> None:
    from PySide6 import QtWidgets

    window.close()  # nothing changed: no question
    assert no_modal_questions == []
    window.show()
    window.add_note().body.finish_editing()  # type: ignore[union-attr]
    monkeypatch.setattr(
        MainWindow, "ask_unsaved", lambda self: QtWidgets.QMessageBox.StandardButton.Cancel
    )
    assert not window.close()
    assert window.isVisible()
    monkeypatch.setattr(
        MainWindow, "ask_unsaved", lambda self: QtWidgets.QMessageBox.StandardButton.Save
    )
    assert window.close()
    assert window.path is not None and len(load_notebook(window.path).entries) == 3


def test_presets_are_browsed_added_and_saved_as_user_presets(
    qtbot: QtBot, window: MainWindow
) -> None:
    browser = PresetBrowser(window)
    qtbot.addWidget(browser)
    browser.select("linear-target-shift")
    assert "where" in browser.table.headerItem().text(1)  # type: ignore[union-attr]
    info = browser.current()
    assert info is not None and info.shipped and info.scenario is not None
    assert info.scenario.notes and info.scenario.notes in browser.notes.text()
    browser._choose("sweep")
    assert browser.choice == (info, "sweep")
    window.add_preset(*browser.choice)
    assert window.cards[-1].kind == "sweep"

    from core.presets import save_user_preset

    scenario = window.run_views[0].model.scenario
    path = save_user_preset(scenario, "My blobs, tuned")
    assert path == user_dir() / "my-blobs-tuned.toml"
    with pytest.raises(FileExistsError):
        save_user_preset(scenario, "My blobs, tuned")
    listed = [p for p in list_presets() if p.path == path]
    assert listed and not listed[0].shipped and listed[0].name == "My blobs, tuned"
    assert not (shipped_dir() / path.name).exists()  # shipped presets are never written


def test_recent_notebooks_new_and_collapse(
    window: MainWindow, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    from core.userdata import recent_notebooks

    assert window.path is not None
    other = tmp_path / "other.notebook.toml"
    other.write_text('schema = 1\ntitle = "Other"\n[[entry]]\nkind = "note"\ntitle = "Hi"\n')
    assert window.open_path(other)
    assert window.notebook_title == "Other" and titles(window) == ["Hi"]
    assert recent_notebooks()[0] == other.resolve()
    window._fill_recent_menu()
    assert window.recent_menu.actions()[0].text() == str(other.resolve())
    bad = tmp_path / "bad.notebook.toml"
    bad.write_text("schema = 1\n[[entry]]\nkind = 'chart'\n")
    from PySide6 import QtWidgets

    warnings: list[str] = []
    monkeypatch.setattr(QtWidgets.QMessageBox, "warning", lambda *a: warnings.append(a[2]))
    assert not window.open_path(bad)
    assert "entry 1" in warnings[0] and "kind = 'chart'" in warnings[0]
    assert window.notebook_title == "Other"  # a file that does not load changes nothing

    window.new_notebook()
    assert window.cards == [] and window.path is None and "not saved" in window.windowTitle()
    card = window.add_note()
    card.body.finish_editing()  # type: ignore[union-attr]
    card.set_collapsed(True)
    assert card.collapsed and card.body.isHidden()
    card.set_collapsed(False)
    assert not card.collapsed
