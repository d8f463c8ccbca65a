"""The desktop window, offscreen: entries, live training in workers, scrubbing, editing."""

from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pytest
from pytestqt.qtbot import QtBot

from app.desktop import demo_path
from app.fan_view import FanView
from app.main_window import MainWindow
from core.entry_model import FAILED, NOT_TRAINED, STOPPED, TRAINED, TRAINING
from core.fan import fan_factors, member_for
from core.study import Study
from core.work import FAN, Job
from tests.app.conftest import trained


def curve_y(view: FanView, label: str, key: str = "loss") -> np.ndarray:
    _, y = view.curves[(label, key)].getOriginalDataset()
    return np.asarray(y)


def test_the_demo_study_opens_without_training(qtbot: QtBot, tmp_path: Path) -> None:
    # A copy without any cached results, as in a fresh clone.
    shipped = shutil.copytree(
        demo_path().parent, tmp_path / "scenarios", ignore=shutil.ignore_patterns("*.results")
    )
    win = MainWindow(Study.open(shipped / demo_path().name))
    qtbot.addWidget(win)
    assert win.outline.count() == 7
    assert len(win.fan_views) == 2 and len(win.map_views) == 1 and len(win.log_views) == 1
    assert all(e.status == NOT_TRAINED for e in win.study.workable)
    assert not win.pool.started  # nothing trains, and no worker starts, until asked
    win.close()


def test_a_fan_trains_in_workers_and_its_plots_fill(qtbot: QtBot, window: MainWindow) -> None:
    view = trained(qtbot, window)
    for batch, stack in view.model.stacks.items():
        assert (stack.filled == len(stack.steps)).all() and len(stack.steps) == 16, batch
        assert np.isfinite(stack.values["val_loss"]).all()
    assert len(curve_y(view, "global-norm")) == 16
    assert view.state_label.text() == "trained"


def test_stopping_an_entry_ends_its_training(qtbot: QtBot, window: MainWindow) -> None:
    view = window.fan_views[0]
    view.model.scenario = view.model.scenario.with_overrides({"train.steps": 4000})
    window.runner.train(view.model)
    qtbot.waitUntil(lambda: any(s.any_filled for s in view.model.stacks.values()), timeout=60_000)
    window.runner.stop(view.model)
    assert view.model.status == STOPPED
    qtbot.waitUntil(lambda: not window.pool.busy, timeout=10_000)
    qtbot.wait(300)
    counts = [int(s.filled.sum()) for s in view.model.stacks.values()]
    qtbot.wait(500)
    assert [int(s.filled.sum()) for s in view.model.stacks.values()] == counts  # nothing more
    assert max(int(s.filled.max()) for s in view.model.stacks.values()) < 800


def test_the_threshold_slider_switches_the_plotted_member(qtbot: QtBot, window: MainWindow) -> None:
    view = trained(qtbot, window)
    stack = view.model.stacks[view.batch_size]
    for position in (0, 5, len(fan_factors()) - 1):
        view.slider.setValue(position)
        member = member_for(stack.members, "global-norm", float(fan_factors()[position]))
        np.testing.assert_array_equal(
            curve_y(view, "global-norm"), stack.values["val_loss"][:, member]
        )
        assert stack.members[member].threshold == pytest.approx(0.5 * fan_factors()[position])
    assert view.factor_box.value() == pytest.approx(fan_factors()[-1], rel=1e-3)
    low, high = view.model.stacks[view.batch_size].values["clipped_share"][:, [1, 17]].mean(axis=0)
    assert low > high  # the smallest threshold clips more than the largest


def test_the_batch_size_selector_switches_the_plotted_stack(
    qtbot: QtBot, window: MainWindow
) -> None:
    view = trained(qtbot, window)
    sizes = view.model.batch_sizes
    assert len(sizes) == 4
    for batch in sizes:
        view.set_batch_size(batch)
        stack = view.model.stacks[batch]
        member = member_for(stack.members, "example-norm", view.factor)
        np.testing.assert_array_equal(
            curve_y(view, "example-norm"), stack.values["val_loss"][:, member]
        )
        assert f"Batch size {batch}" in view.readout.text()


def test_invalid_toml_shows_the_error_and_keeps_the_last_valid_scenario(window: MainWindow) -> None:
    editor = window.inspector.widget(1)
    before = window.fan_views[0].model.scenario
    editor.editor.setPlainText("[train]\nsteps = -3\n")
    assert not editor.validate()
    assert "train.steps" in editor.status.text() and "last valid" in editor.status.text()
    assert window.fan_views[0].model.scenario == before
    editor.editor.setPlainText("[train]\nsteps = 30\n")
    assert editor.validate()
    assert window.fan_views[0].model.scenario.train.steps == 30


def test_a_form_edit_changes_the_scenario_and_marks_its_results_as_edited_since(
    qtbot: QtBot, window: MainWindow
) -> None:
    view = trained(qtbot, window)
    form = window.inspector.widget(0)
    lr = form.widgets["train.lr"]
    lr.setText("0.05")
    lr.editingFinished.emit()
    assert view.model.scenario.train.lr == 0.05
    assert view.model.edited and view.state_label.text() == "edited since these results"
    noise = form.widgets["data.noise"]
    noise.setText("-1")  # out of range: the validator's sentence shows, nothing changes
    noise.editingFinished.emit()
    assert "data.noise = -1 is out of range" in form.error_label.text()
    assert view.model.scenario.data.noise == 1.0


def test_a_failing_run_shows_in_its_entry_and_the_app_lives_on(
    qtbot: QtBot, window: MainWindow
) -> None:
    view = window.fan_views[0]
    view.model.begin(run_id=999)
    window.pool.submit(
        Job(999, FAN, "not = [valid", 16, (0,)),
        lambda kind, rid, batch, payload: (
            view.model.fail(rid, str(payload)) if kind == "error" else None
        ),
    )
    qtbot.waitUntil(lambda: view.model.status == FAILED, timeout=60_000)
    window._on_redraw_tick()
    assert view.state_label.text().startswith("failed: ")
    view.model.reset()
    trained(qtbot, window)  # the same workers still train
    assert view.model.status == TRAINED and view.model.status != TRAINING


def test_an_edit_trains_the_entry_again_by_itself_after_a_pause_unless_turned_off(
    qtbot: QtBot, window: MainWindow
) -> None:
    view = trained(qtbot, window)
    form = window.inspector.widget(0)
    window.auto_train = False
    form.widgets["train.steps"].setValue(60)  # type: ignore[attr-defined]
    qtbot.wait(1500)
    assert view.model.status == TRAINED and view.model.edited  # left alone: the option is off
    window.menu_actions["auto_train"].setChecked(False)
    window.menu_actions["auto_train"].setChecked(True)
    assert window.auto_train
    form.widgets["train.steps"].setValue(70)  # type: ignore[attr-defined]
    assert view.model.status == TRAINED  # not at once: after a short pause
    qtbot.waitUntil(lambda: view.model.status == TRAINING, timeout=5_000)
    qtbot.waitUntil(lambda: view.model.status == TRAINED, timeout=90_000)
    assert not view.model.edited and view.model.scenario.train.steps == 70
