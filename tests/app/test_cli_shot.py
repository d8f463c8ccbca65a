"""`gradfence shot`: a study trained offscreen to a PNG, with its options checked."""

from __future__ import annotations

from pathlib import Path

import pytest
from PySide6 import QtGui

from app.cli import main
from tests.app.conftest import STUDY


@pytest.fixture
def study(tmp_path: Path) -> Path:
    path = tmp_path / "shot.study.toml"
    path.write_text(STUDY)
    return path


def test_shot_writes_the_window_and_the_presentation_view(study: Path, tmp_path: Path) -> None:
    out = tmp_path / "window.png"
    assert (
        main(["shot", str(study), "--out", str(out), "--size", "1200x900", "--collapse", "1"]) == 0
    )
    image = QtGui.QImage(str(out))
    assert (image.width(), image.height()) == (1200, 900)
    slide = tmp_path / "slide.png"
    args = ["shot", str(study), "--out", str(slide), "--entry", "2", "--present"]
    assert main([*args, "--size", "1000x700"]) == 0  # the fan is cached by now: no training
    image = QtGui.QImage(str(slide))
    assert (image.width(), image.height()) == (1000, 700)


@pytest.mark.parametrize(
    ("option", "message"),
    [
        (["--entry", "3"], "--entry 3: "),
        (["--collapse", "1,9"], "--collapse 9: "),
        (["--size", "12x"], "is not WIDTHxHEIGHT"),
        (["--size", "100x100"], "200 to 8000 pixels"),
    ],
)
def test_bad_shot_options_exit_2_with_one_sentence(
    study: Path,
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    option: list[str],
    message: str,
) -> None:
    out = tmp_path / "never.png"
    assert main(["shot", str(study), "--out", str(out), *option]) == 2
    err = capsys.readouterr().err
    assert message in err and "Traceback" not in err
    assert not out.exists()
