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


@pytest.mark.slow
def test_shot_exits_soon_after_its_picture_with_work_still_queued(
    tmp_path: Path, mark: str
) -> None:
    # The previous version wrote the PNG and then never exited: the pool's shutdown blocked for
    # ever in a queue's join_thread() while two maps still had chunks queued. A bad cache file
    # beside one map is set aside with a warning, not fatal.
    import json
    import subprocess
    import time

    from core import cache
    from core.study import Study
    from tests.os_processes import gone, start
    from tests.tiny_presets import study_text, tiny_map_text

    for name in ("one", "two"):
        text = tiny_map_text(steps=3000).replace("Tiny map", f"Map {name}")
        (tmp_path / f"{name}.toml").write_text(text)
    study = tmp_path / "maps.study.toml"
    study.write_text(study_text(("map", "One", "one.toml"), ("map", "Two", "two.toml")))
    bad = cache.path_for(cache.cache_dir(study), Study.open(study).entries[0])  # type: ignore[arg-type]
    bad.parent.mkdir()
    bad.write_text(json.dumps(None))
    out = tmp_path / "maps.png"
    process = start(["shot", str(study), "--out", str(out), "--seconds", "3"], mark)
    try:
        deadline = time.monotonic() + 300
        while not out.exists() and process.poll() is None and time.monotonic() < deadline:
            time.sleep(0.02)
        assert out.exists()
        written = time.monotonic()
        stdout, err = process.communicate(timeout=10)  # the bound
    except subprocess.TimeoutExpired:
        process.kill()
        process.communicate()
        raise
    assert time.monotonic() - written < 10.0
    assert process.returncode == 0, err
    assert "2 still training when the picture was taken" in stdout
    assert f"warning: {bad}: holds null, not a table; set aside" in err
    assert gone(mark, 10.0) == []
    assert not QtGui.QImage(str(out)).isNull()
