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
