"""Studies in the window: build, save, reopen; undo and redo of every edit; notes edited in
place; results of an earlier scenario faded, never drawn as current; results cached by scenario
hash; presets."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from pytestqt.qtbot import QtBot

from app.file_actions import StudyFiles
from app.main_window import MainWindow
from app.note_view import NoteView
from app.presets_dialog import PresetBrowser
from app.scenario_form import ScenarioForm
from core import cache
from core.entry_model import NOT_TRAINED, TRAINED
from core.presets import list_presets, shipped_dir, user_dir
from core.study import Study
from core.study_file import load_study
from tests.app.conftest import trained


def preset(name: str):  # type: ignore[no-untyped-def]
    return next(p for p in list_presets() if p.path.stem == name)


def titles(win: MainWindow) -> list[str]:
    return [c.model.title for c in win.cards]


def test_a_built_study_saves_and_reopens_equal(
    qtbot: QtBot, window: MainWindow, tmp_path: Path
) -> None:
    window.files.new_study()
    assert window.cards == [] and window.study.path is None
    note = window.add_note()
    assert isinstance(note.body, NoteView) and note.body.editing
    note.body.title_edit.setText("Why this study")
    note.body.text_edit.setPlainText("Watch **pass-through**.\n\n- one\n- two")
    note.body.finish_editing()
    window.add_preset(preset("outliers-meet-batch-size"), "fan")
    window.add_preset(preset("batch-size-coupling"), "map")
    fan = window.fan_views[0]
    window.commit_scenario(fan.model, fan.model.scenario.with_overrides({"train.lr": 0.07}))
    assert [c.kind for c in window.cards] == ["note", "fan", "map"]
    assert window.study.modified and window.windowTitle().endswith("*")

    path = tmp_path / "sub" / "built.study.toml"
    assert window.files.save_to(path)
    assert not window.study.modified and not window.windowTitle().endswith("*")
    reopened = load_study(path)
    assert reopened.entries == window.study.to_file().entries
    assert reopened.entries[0].text == "Watch **pass-through**.\n\n- one\n- two"
    assert reopened.entries[1].scenario is not None
    assert reopened.entries[1].scenario.train.lr == 0.07  # the edit, written inline
    # The unedited map keeps its preset reference, relative to the new folder.
    assert reopened.entries[2].preset is not None
    assert (path.parent / str(reopened.entries[2].preset)).resolve() == (
        shipped_dir() / "batch-size-coupling.toml"
    ).resolve()

    other = MainWindow(Study.from_file(reopened))
    qtbot.addWidget(other)
    assert other.study.to_file().entries == window.study.to_file().entries
    other.close()


def test_move_and_delete_are_undone_and_redone(window: MainWindow) -> None:
    start = titles(window)
    assert start == ["A note", "Quick blobs"]
    window.move_card(window.cards[0], 1)
    assert titles(window) == ["Quick blobs", "A note"]
    window.delete_card(window.cards[0])
    assert titles(window) == ["A note"] and window.fan_views == []
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
    run = window.fan_views[0].model
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
    assert window.outline.item(1).text() == "fan: Renamed"  # type: ignore[union-attr]
    assert window.cards[1].title_label.text() == "Renamed"
    window.undo_stack.undo()
    assert window.outline.item(1).text() == "fan: Quick blobs"  # type: ignore[union-attr]


def test_an_edit_keeps_the_earlier_curves_faded_and_never_as_current(
    qtbot: QtBot, window: MainWindow
) -> None:
    view = trained(qtbot, window)

    def drawn(curves: dict) -> int:  # type: ignore[type-arg]
        xs = (c.getOriginalDataset()[0] for c in curves.values())
        return sum(0 if x is None else len(x) for x in xs)

    assert drawn(view.curves) > 0 and drawn(view.faded) == 0
    model = view.model
    window.commit_scenario(model, model.scenario.with_overrides({"train.lr": 0.2}))
    view.refresh()
    assert model.edited and view.state_label.text() == "edited since these results"
    assert drawn(view.curves) == 0  # nothing of the earlier scenario is drawn as current
    assert drawn(view.faded) > 0 and "before the edit" in view.readout.text()
    assert view.hist_clean.opacity() < 0.5  # the histogram is of the earlier results too
    window.undo_stack.undo()  # back to the scenario the results belong to
    view.refresh()
    assert not model.edited and drawn(view.curves) > 0 and drawn(view.faded) == 0
    assert view.hist_clean.opacity() == 1.0


def test_faded_curves_made_after_an_edit_lie_beneath_and_keep_a_member_switched_off(
    qtbot: QtBot, window: MainWindow
) -> None:
    # Faded curves are made when a fan first has earlier results (FanPlots._add_series); a
    # member switched off stays off through the edit, its new curves and its faded ones.
    view = trained(qtbot, window)
    assert view.faded == {}
    off, on = list(view.method_checks)[:2]
    view.method_checks[off].setChecked(False)
    model = view.model
    window.commit_scenario(model, model.scenario.with_overrides({"train.lr": 0.2}))
    view.refresh()
    faded = {
        label: [c for (name, _), c in view.faded.items() if name == label] for label in (off, on)
    }
    assert faded[off] and faded[on]
    assert not any(c.isVisible() for c in faded[off]) and all(c.isVisible() for c in faded[on])
    assert not view.method_checks[off].isChecked() and not view.curves[(off, "loss")].isVisible()
    assert all(c.zValue() < view.curves[(on, "loss")].zValue() for c in faded[on])
    view.method_checks[off].setChecked(True)
    assert all(c.isVisible() for c in faded[off])


def test_a_curve_is_set_again_for_other_results_with_as_many_rows(
    qtbot: QtBot, window: MainWindow
) -> None:
    """The plots skip a curve whose member has no new rows; results of the same shape in
    another stack (a restore from the cache, a retrain) must still be drawn."""
    import dataclasses

    view = trained(qtbot, window)
    batch = view.batch_size
    stack = view.model.stacks[batch]
    label = view.model.scenario.clip[0].display_name
    curve = view.curves[(label, "loss")]
    before = np.array(curve.getOriginalDataset()[1])
    other = dataclasses.replace(stack, values={name: 2.0 * v for name, v in stack.values.items()})
    view.model.stacks = {**view.model.stacks, batch: other}
    view.refresh()
    after = np.array(curve.getOriginalDataset()[1])
    assert after.shape == before.shape and after.size > 0
    np.testing.assert_array_equal(after, 2.0 * before)  # the new values, not the old ones kept


def test_results_are_cached_beside_the_study_by_scenario_hash(
    qtbot: QtBot, window: MainWindow
) -> None:
    view = trained(qtbot, window)
    path = window.study.path
    assert path is not None
    folder = cache.cache_dir(path)
    assert cache.path_for(folder, view.model).is_file()

    again = MainWindow(Study.open(path))
    again.auto_train = False
    qtbot.addWidget(again)
    cached = again.fan_views[0].model
    assert cached.status == TRAINED and not cached.edited  # drawn at once, nothing trained
    assert not again.pool.started
    for batch, stack in view.model.stacks.items():
        np.testing.assert_array_equal(
            cached.stacks[batch].values["val_loss"], stack.values["val_loss"]
        )
    # A changed scenario finds nothing: it is not trained, and shows its results as earlier.
    again.commit_scenario(cached, cached.scenario.with_overrides({"train.lr": 0.3}))
    assert cached.edited and not again.pool.started
    again.fan_views[0].refresh()
    assert "before the edit" in again.fan_views[0].readout.text()
    again.close()

    text = path.read_text().replace("steps = 80", "steps = 70")
    path.write_text(text)
    changed = MainWindow(Study.open(path))
    qtbot.addWidget(changed)
    assert changed.fan_views[0].model.status == NOT_TRAINED
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
        StudyFiles, "ask_unsaved", lambda self: QtWidgets.QMessageBox.StandardButton.Cancel
    )
    assert not window.close()
    assert window.isVisible()
    monkeypatch.setattr(
        StudyFiles, "ask_unsaved", lambda self: QtWidgets.QMessageBox.StandardButton.Save
    )
    assert window.close()
    assert window.study.path is not None and len(load_study(window.study.path).entries) == 3


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
    browser._choose("map")
    assert browser.choice == (info, "map")
    window.add_preset(*browser.choice)
    assert window.cards[-1].kind == "map"

    from core.presets import save_user_preset

    scenario = window.fan_views[0].model.scenario
    path = save_user_preset(scenario, "My blobs, tuned")
    assert path == user_dir() / "my-blobs-tuned.toml"
    with pytest.raises(FileExistsError):
        save_user_preset(scenario, "My blobs, tuned")
    listed = [p for p in list_presets() if p.path == path]
    assert listed and not listed[0].shipped and listed[0].name == "My blobs, tuned"
    assert not (shipped_dir() / path.name).exists()  # shipped presets are never written


def test_recent_studies_new_and_collapse(
    window: MainWindow, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    from core.userdata import recent_studies

    assert window.study.path is not None
    other = tmp_path / "other.study.toml"
    other.write_text('schema = 2\ntitle = "Other"\n[[entry]]\nkind = "note"\ntitle = "Hi"\n')
    assert window.open_path(other)
    assert window.study.title == "Other" and titles(window) == ["Hi"]
    assert recent_studies()[0] == other.resolve()
    window.files.fill_recent_menu(window.recent_menu)
    assert window.recent_menu.actions()[0].text() == str(other.resolve())
    bad = tmp_path / "bad.study.toml"
    bad.write_text("schema = 2\n[[entry]]\nkind = 'chart'\n")
    from PySide6 import QtWidgets

    warnings: list[str] = []
    monkeypatch.setattr(QtWidgets.QMessageBox, "warning", lambda *a: warnings.append(a[2]))
    assert not window.open_path(bad)
    assert "entry 1" in warnings[0] and "kind = 'chart'" in warnings[0]
    assert window.study.title == "Other"  # a file that does not load changes nothing

    window.files.new_study()
    assert window.cards == [] and window.study.path is None
    assert "not saved" in window.windowTitle()
    card = window.add_note()
    card.body.finish_editing()  # type: ignore[union-attr]
    card.set_collapsed(True)
    assert card.collapsed and card.body.isHidden()
    card.set_collapsed(False)
    assert not card.collapsed


def test_after_an_edit_the_earlier_curves_stay_faded_until_the_new_ones_have_arrived(
    qtbot: QtBot, window: MainWindow
) -> None:
    view = trained(qtbot, window)

    def drawn(curves: dict) -> int:  # type: ignore[type-arg]
        xs = (c.getOriginalDataset()[0] for c in curves.values())
        return sum(0 if x is None else len(x) for x in xs)

    model = view.model
    model.set_scenario(model.scenario.with_overrides({"train.steps": 400}))
    window.runner.train(model)
    view.refresh()
    assert drawn(view.curves) == 0 and drawn(view.faded) > 0  # nothing new yet: the old, faded
    qtbot.waitUntil(lambda: model.current_stack(view.batch_size) is not None, timeout=60_000)
    qtbot.waitUntil(lambda: drawn(view.curves) > 0, timeout=5_000)  # the next redraw tick
    if model.status == "training":  # both, to compare, while the rest trains
        assert drawn(view.faded) > 0
    qtbot.waitUntil(lambda: model.status == "trained", timeout=90_000)
    window._on_redraw_tick()
    view.refresh()
    assert drawn(view.curves) > 0 and drawn(view.faded) == 0 and model.before == {}
