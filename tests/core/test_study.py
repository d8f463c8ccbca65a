"""The study model alone, with no Qt: insert, move, remove, save, reopen, cache restore, pending
work, and the runner training its entries through a pool in this process."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from core import cache
from core.entry_model import NOT_TRAINED, TRAINED, NoteModel
from core.fan import fan_members
from core.fan_model import FanModel
from core.runner import Runner, fan_jobs
from core.study import Study, StudyEvent
from core.study_file import load_study
from core.work import InlinePool
from tests.app.conftest import STUDY


@pytest.fixture
def study_path(tmp_path: Path) -> Path:
    path = tmp_path / "s.study.toml"
    path.write_text(STUDY)
    return path


def record(study: Study) -> list[StudyEvent]:
    events: list[StudyEvent] = []
    study.subscribe(events.append)
    return events


def titles(study: Study) -> list[str]:
    return [e.title for e in study]


def train(study: Study) -> Runner:
    pool = InlinePool()
    runner = Runner(study, pool)
    runner.train_pending()
    while pool.poll():
        pass
    return runner


def test_a_study_opens_its_file_unmodified_with_its_entries_in_order(study_path: Path) -> None:
    study = Study.open(study_path)
    assert study.title == "Test study" and titles(study) == ["A note", "Quick blobs"]
    assert [e.kind for e in study] == ["note", "fan"]
    assert not study.modified and study.path == study_path


def test_insert_move_and_remove_say_what_changed_and_mark_the_study_modified(
    study_path: Path,
) -> None:
    study = Study.open(study_path)
    events = record(study)
    note = NoteModel("Second note", "text")
    study.insert(1, note)
    assert titles(study) == ["A note", "Second note", "Quick blobs"] and study.modified
    study.move(note, 2)
    assert titles(study) == ["A note", "Quick blobs", "Second note"]
    assert study.remove(note) == 2
    assert titles(study) == ["A note", "Quick blobs"]
    moves = [(e.what, e.index) for e in events if e.what in ("inserted", "moved", "removed")]
    assert moves == [("inserted", 1), ("moved", 2), ("removed", 2)]
    # Back to what the file holds: no longer modified, and the study said so.
    assert not study.modified and any(e.what == "modified" for e in events)


def test_an_entry_edit_marks_the_study_modified_and_saving_clears_it(
    study_path: Path, tmp_path: Path
) -> None:
    study = Study.open(study_path)
    fan = study.trained_entries[0]
    fan.set_scenario(fan.scenario.with_overrides({"train.lr": 0.07}))
    assert study.modified
    target = tmp_path / "other" / "copy.study.toml"
    study.save(target)
    assert not study.modified and study.path == target
    reopened = load_study(target)
    assert reopened.entries == study.to_file().entries
    scenario = reopened.entries[1].scenario
    assert scenario is not None and scenario.train.lr == 0.07


def test_pending_work_is_every_entry_without_current_results(study_path: Path) -> None:
    study = Study.open(study_path)
    assert study.pending() == study.trained_entries
    train(study)
    assert study.pending() == []
    fan = study.trained_entries[0]
    fan.set_scenario(fan.scenario.with_overrides({"train.steps": 40}))
    assert study.pending() == [fan] and fan.edited


def test_trained_results_are_stored_beside_the_file_and_restored_on_reopening(
    study_path: Path,
) -> None:
    study = Study.open(study_path)
    runner = train(study)
    assert runner.status_text() == "ready" and runner.progress() == 1.0
    fan = study.trained_entries[0]
    assert isinstance(fan, FanModel) and fan.status == TRAINED
    assert cache.path_for(cache.cache_dir(study_path), fan).is_file()
    again = Study.open(study_path)
    restored = again.trained_entries[0]
    assert isinstance(restored, FanModel) and restored.status == TRAINED
    for batch, stack in fan.stacks.items():
        np.testing.assert_array_equal(
            restored.stacks[batch].values["val_loss"], stack.values["val_loss"]
        )
    # An edit that the cache knows (an undo back, say) restores at once; one it does not know
    # keeps the results as "edited since" and leaves the entry pending.
    restored.set_scenario(restored.scenario.with_overrides({"train.lr": 0.3}))
    assert restored.edited and again.pending() == [restored]
    restored.set_scenario(fan.scenario)
    assert not restored.edited and restored.has_current_results()


def test_a_bad_cache_file_is_set_aside_with_a_notice_and_the_entry_trains_again(
    study_path: Path,
) -> None:
    study = Study.open(study_path)
    train(study)
    path = cache.path_for(cache.cache_dir(study_path), study.trained_entries[0])
    path.write_bytes(path.read_bytes()[:100])  # cut short, as by a full disk
    again = Study.open(study_path)
    assert again.trained_entries[0].status == NOT_TRAINED
    assert any("set aside" in n for n in again.notices)
    assert path.with_name(path.name + ".bad").is_file() and not path.exists()


def test_the_runner_reports_one_progress_figure_and_stops_a_removed_entry(
    study_path: Path,
) -> None:
    study = Study.open(study_path)
    pool = InlinePool()
    runner = Runner(study, pool)
    fan = study.trained_entries[0]
    runner.train(fan)
    assert runner.busy and runner.progress() == 0.0
    assert runner.status_text().startswith("training 'Quick blobs': 0 of 4 batch sizes")
    first = fan_jobs(fan)[0]  # one stack: one clipping method at the largest batch size
    pool.poll()
    members = len(fan_members(fan.scenario))
    assert runner.progress() == pytest.approx(len(first.columns) / (members * 4))
    study.remove(fan)
    assert not runner.busy and fan.status == "stopped"
    while pool.poll():
        pass
    assert fan.status == "stopped"  # nothing of a stopped run arrives later
