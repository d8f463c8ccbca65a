"""The results cache beside a study under bad files: each is set aside with a notice and the entry
trains again; never fatal, never kept in silence. Each test names the old behaviour it guards
against (issue 12)."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from core import cache
from core.entry_model import TRAINED
from core.fan_model import FanModel
from core.map_model import MapModel
from core.maps import COLUMNS
from core.runner import Runner
from core.study import Study
from core.work import InlinePool
from tests.os_processes import without_privileges
from tests.tiny_presets import TINY_FAN, study_text, tiny_map_text


def make_study(folder: Path) -> Path:
    (folder / "fan.toml").write_text(TINY_FAN)
    (folder / "map.toml").write_text(tiny_map_text(steps=20))
    path = folder / "faults.study.toml"
    path.write_text(study_text(("fan", "Fan", "fan.toml"), ("map", "Map", "map.toml")))
    return path


def train(study: Study) -> None:
    pool = InlinePool()
    runner = Runner(study, pool)
    runner.train_pending()
    while not pool.idle:
        pool.poll()
    runner.close()


def entries(study: Study) -> tuple[FanModel, MapModel]:
    fan, map_entry = study.entries
    assert isinstance(fan, FanModel) and isinstance(map_entry, MapModel)
    return fan, map_entry


def a_map_cache_file(study_path: Path) -> Path:
    _, map_entry = entries(Study.open(study_path))
    return cache.path_for(cache.cache_dir(study_path), map_entry)


def good_identity(study_path: Path) -> str:
    _, map_entry = entries(Study.open(study_path))
    return cache._identity(map_entry.scenario)


@pytest.mark.parametrize(
    "content",
    [
        "[1, 2, 3]",
        "null",
        '{"identity": IDENTITY, "rows": [{"method": 1}], "profile": {}}',
        '{"identity": IDENTITY, "rows": "none", "profile": {}}',
        "{not json",
    ],
    ids=["list", "null", "bad-row", "rows-not-a-list", "not-json"],
)
def test_a_bad_map_cache_file_is_set_aside_and_the_study_still_opens(
    content: str, tmp_path: Path
) -> None:
    # The previous version could not open, hand out or shoot a study with such a file beside it.
    study_path = make_study(tmp_path)
    path = a_map_cache_file(study_path)
    path.parent.mkdir()
    text = content.replace("IDENTITY", json.dumps(good_identity(study_path)))
    path.write_text(text)
    study = Study.open(study_path)
    _, map_entry = entries(study)
    assert not map_entry.has_current_results() and map_entry in study.pending()
    assert len(study.notices) == 1 and "set aside as" in study.notices[0]
    assert path.with_name(path.name + ".bad").read_text() == text  # kept for a person to see
    assert not path.exists()


def test_a_row_with_the_wrong_columns_is_caught(tmp_path: Path) -> None:
    study_path = make_study(tmp_path)
    path = a_map_cache_file(study_path)
    path.parent.mkdir()
    row = dict.fromkeys(COLUMNS[:-1], 0)  # one column short
    document = {"identity": good_identity(study_path), "rows": [row], "profile": {}}
    path.write_text(json.dumps(document))
    study = Study.open(study_path)
    assert "row 1 does not have the map table's columns" in study.notices[0]


def test_a_truncated_fan_file_is_set_aside_trained_again_and_written_anew(tmp_path: Path) -> None:
    # The previous version recomputed a truncated .npz at every open and never rewrote it.
    study_path = make_study(tmp_path)
    study = Study.open(study_path)
    train(study)
    fan, _ = entries(study)
    path = cache.path_for(cache.cache_dir(study_path), fan)
    whole = path.read_bytes()
    path.write_bytes(whole[: len(whole) // 2])
    again = Study.open(study_path)
    fan, map_entry = entries(again)
    assert not fan.has_current_results() and map_entry.has_current_results()
    assert any("set aside" in n for n in again.notices)
    train(again)
    assert path.is_file() and path.read_bytes() != whole[: len(whole) // 2]
    third = Study.open(study_path)
    fan, _ = entries(third)
    assert fan.has_current_results() and fan.status == TRAINED and third.notices == []


def test_a_results_folder_that_cannot_be_written_says_so(tmp_path: Path, shared_tmp: Path) -> None:
    # The previous version lost the results of a study in a read-only folder in silence.
    train(Study.open(make_study(tmp_path)))  # the same work once: its imports are done then
    folder = shared_tmp / "read-only"
    folder.mkdir()
    study_path = make_study(folder)
    folder.chmod(0o555)
    with without_privileges():
        study = Study.open(study_path)
        train(study)
    fan, map_entry = entries(study)
    assert fan.status == TRAINED and map_entry.status == TRAINED  # shown, only not cached
    lines = [n for n in study.notices if "not cached" in n]
    assert [line.split(" not cached")[0] for line in lines] == [
        "results of 'Fan'",
        "results of 'Map'",
    ]
    assert all("Permission denied" in line for line in lines)
    assert not cache.cache_dir(study_path).exists()
