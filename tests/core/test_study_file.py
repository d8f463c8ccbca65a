"""Study files: validated as strictly as presets, errors naming the entry; old files load."""

from __future__ import annotations

from pathlib import Path

import pytest

from app.cli import main
from core.errors import GradfenceInputError
from core.study_file import load_study
from tests.conftest import SCENARIOS

STUDIES = sorted(SCENARIOS.glob("*.study.toml"))


@pytest.mark.parametrize("path", STUDIES, ids=[p.name for p in STUDIES])
def test_shipped_studies_pass_check(path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["check", str(path)]) == 0
    assert "ok:" in capsys.readouterr().out


def test_a_fan_entry_combines_preset_inline_table_and_overrides(tmp_path: Path) -> None:
    (tmp_path / "base.toml").write_text('[train]\nsteps = 50\nlr = 0.3\n[data]\ntask = "moons"\n')
    path = tmp_path / "n.study.toml"
    path.write_text(
        'title = "N"\n[[entry]]\nkind = "fan"\ntitle = "R"\npreset = "base.toml"\n'
        '[entry.scenario.train]\nlr = 0.1\n[entry.set]\n"train.batch_size" = 64\n'
    )
    scenario = load_study(path).entries[0].scenario
    assert scenario is not None
    assert (scenario.train.steps, scenario.train.lr, scenario.train.batch_size) == (50, 0.1, 64)
    assert scenario.data.task == "moons"


@pytest.mark.parametrize(
    ("entry", "expected"),
    [
        (
            'kind = "fan"\ntitle = "Big batch"\n[entry.scenario.train]\nbatch_size = "lots"\n',
            'entry 2 ("Big batch"): train.batch_size must be a whole number',
        ),
        (
            'kind = "fan"\ntitle = "Typo"\n[entry.scenario.train]\nsteps = 5\n'
            '[entry.set]\n"train.stepz" = 3\n',
            'entry 2 ("Typo") [entry.set]: unknown key "train.stepz"; did you mean "train.steps"?',
        ),
        ('kind = "graph"\ntitle = "What"\n', "entry 2 (\"What\"): kind = 'graph' is not allowed"),
        (
            'kind = "map"\ntitle = "Missing"\npreset = "nowhere.toml"\n',
            'entry 2 ("Missing"): preset nowhere.toml',
        ),
        (
            'kind = "note"\ntitle = "Extra"\ntext = "x"\ncolour = "red"\n',
            'entry 2 ("Extra"): unknown key "colour"',
        ),
    ],
)
def test_a_bad_entry_is_named_by_position_title_and_key(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], entry: str, expected: str
) -> None:
    path = tmp_path / "bad.study.toml"
    path.write_text(
        f'schema = 2\ntitle = "T"\n[[entry]]\nkind = "note"\ntitle = "Fine"\n[[entry]]\n{entry}'
    )
    assert main(["check", str(path)]) == 2
    err = capsys.readouterr().err
    assert expected in err and "Traceback" not in err
    with pytest.raises(GradfenceInputError):
        load_study(path)


def test_opening_the_app_without_a_display_is_a_clear_input_error(
    monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    for name in ("DISPLAY", "WAYLAND_DISPLAY", "QT_QPA_PLATFORM"):
        monkeypatch.delenv(name, raising=False)
    assert main([]) == 2
    err = capsys.readouterr().err
    assert "no display" in err and "ssh -X" in err and "gradfence shot" in err
    assert "gradfence handout" in err and "offscreen" not in err


OLD_PRESET = """\
schema = 1
name = "An old preset"
[train]
steps = 30
[[clip]]
method = "global-norm"
sweep = [0.1, 1.0]
[sweep]
batch_sizes = [8, 16]
"""

OLD_NOTEBOOK = """\
schema = 1
title = "An old notebook"

[[entry]]
kind = "note"
title = "Words"
text = "Still here."

[[entry]]
kind = "run"
title = "A run entry"
preset = "old.toml"
[entry.set]
"sweep.seeds" = [0, 1]

[[entry]]
kind = "sweep"
title = "A sweep entry"
[entry.scenario.sweep]
batch_sizes = [16, 32]
"""


def test_a_schema_1_preset_loads_as_schema_2_with_a_notice_and_stays_unchanged(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    from core.scenario import load_scenario

    path = tmp_path / "old.toml"
    path.write_text(OLD_PRESET)
    notices: list[str] = []
    scenario = load_scenario(path, notices)
    assert scenario.map.batch_sizes == (8, 16) and scenario.clip[0].map_thresholds == (0.1, 1.0)
    assert scenario.schema == 2 and len(notices) == 1 and "schema 1" in notices[0]
    assert main(["check", str(path)]) == 0
    assert "note:" in capsys.readouterr().err
    assert path.read_text() == OLD_PRESET  # reading never rewrites a user's file


def test_an_old_notebook_opens_as_a_study_with_one_notice_and_stays_unchanged(
    tmp_path: Path,
) -> None:
    from core.study import Study

    (tmp_path / "old.toml").write_text(OLD_PRESET)
    path = tmp_path / "old.notebook.toml"
    path.write_text(OLD_NOTEBOOK)
    study = Study.open(path)
    assert [e.kind for e in study] == ["note", "fan", "map"]
    fan, mapped = study.trained_entries
    assert fan.scenario.map.seeds == (0, 1) and fan.scenario.map.batch_sizes == (8, 16)
    assert mapped.scenario.map.batch_sizes == (16, 32)
    assert any("schema 1" in n and "fans" in n for n in study.notices)
    assert not study.modified and path.read_text() == OLD_NOTEBOOK
    # Written back, it is a schema-2 study that loads to the same entries, with no notice.
    new = tmp_path / "old.study.toml"
    study.save(new)
    again = load_study(new)
    assert again.entries == study.to_file().entries
    assert not any("old.notebook" in n for n in again.notices)
    assert 'kind = "fan"' in new.read_text() and "[sweep]" not in new.read_text()


def test_an_empty_study_file_is_refused_in_one_sentence(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    path = tmp_path / "empty.study.toml"
    path.write_text("")
    assert main(["check", str(path)]) == 2
    assert "is empty" in capsys.readouterr().err
