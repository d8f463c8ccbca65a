"""`gradfence handout`: one self-contained HTML file, checked with an HTML parser."""

from __future__ import annotations

import base64
import html
import os
import shutil
import signal
import subprocess
import sys
import time
import tomllib
from html.parser import HTMLParser
from pathlib import Path

import pytest
from PySide6 import QtGui

from app.main_window import MainWindow
from core import __version__
from core.entry_model import TRAINED
from core.scenario import parse_scenario
from core.study_file import load_study
from tests.conftest import REPO, SCENARIOS

# Tags that load something from elsewhere, and attributes that name what they load.
LOADING_TAGS = {"script", "link", "iframe", "object", "embed", "video", "audio", "source"}
URL_ATTRIBUTES = {"src", "href", "srcset", "data", "poster", "action", "background"}


class Collector(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.tags: list[str] = []
        self.images: list[str] = []
        self.urls: list[str] = []
        self.styles: list[str] = []
        self.pre: list[str] = []
        self._in: str | None = None

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append(tag)
        for name, value in attrs:
            if name == "src" and tag == "img":
                self.images.append(value or "")
            elif name in URL_ATTRIBUTES:
                self.urls.append(value or "")
            elif name == "style":
                self.styles.append(value or "")
        if tag in ("style", "pre"):
            self._in = tag

    def handle_endtag(self, tag: str) -> None:
        self._in = None

    def handle_data(self, data: str) -> None:
        if self._in == "style":
            self.styles.append(data)
        elif self._in == "pre":
            self.pre.append(data)


def check_self_contained(text: str, images: int) -> Collector:
    parsed = Collector()
    parsed.feed(text)
    parsed.close()
    assert not LOADING_TAGS & set(parsed.tags)
    assert parsed.urls == []  # no links, no external anything
    assert all("url(" not in s and "@import" not in s for s in parsed.styles)
    assert len(parsed.images) == images
    for src in parsed.images:
        prefix = "data:image/png;base64,"
        assert src.startswith(prefix)
        image = QtGui.QImage.fromData(base64.b64decode(src[len(prefix) :]), "PNG")
        assert not image.isNull() and image.width() >= 800
    return parsed


def test_the_guided_study_becomes_one_self_contained_handout(tmp_path: Path) -> None:
    for name in ("batch-size-coupling.study.toml", "batch-size-coupling.toml"):
        shutil.copy(SCENARIOS / name, tmp_path / name)
    study = tmp_path / "batch-size-coupling.study.toml"
    out = tmp_path / "handout.html"
    command = [sys.executable, "-m", "app.cli", "handout", str(study), "--out", str(out)]
    env = {**os.environ, "QT_QPA_PLATFORM": "offscreen"}
    first = subprocess.run(command, cwd=REPO, env=env, capture_output=True, text=True, timeout=600)
    assert first.returncode == 0, first.stderr
    assert "3 to train, 0 cached" in first.stderr and "100%" in first.stderr
    assert f"wrote {out}" in first.stdout
    text = out.read_text(encoding="utf-8")
    parsed = check_self_contained(text, images=3)  # two fans and the map
    entries = load_study(study).entries
    for entry in entries:
        assert html.escape(entry.title) in text
    assert f"Gradfence {__version__}" in text
    scenarios = [e.scenario for e in entries if e.scenario is not None]
    shown = [parse_scenario(tomllib.loads(html.unescape(p))) for p in parsed.pre]
    assert shown == scenarios  # each entry's scenario, as TOML that loads back to it
    assert "outlier pass-through" in text and "window from" in text

    out.unlink()
    again = subprocess.run(command, cwd=REPO, env=env, capture_output=True, text=True, timeout=600)
    assert again.returncode == 0, again.stderr
    assert "0 to train, 3 cached" in again.stderr  # results cached by scenario hash
    check_self_contained(out.read_text(encoding="utf-8"), images=3)


def test_file_export_handout_trains_what_is_missing_then_writes(
    window: MainWindow, tmp_path: Path
) -> None:
    assert window.fan_views[0].model.status != TRAINED
    out = tmp_path / "exported.html"
    assert window.files.export_handout(out)  # trains the fan first, with a progress dialog
    assert window.fan_views[0].model.status == TRAINED
    text = out.read_text(encoding="utf-8")
    parsed = check_self_contained(text, images=1)
    assert "Quick blobs" in text and "<em>Markdown</em>" in text
    assert len(parsed.pre) == 1


def test_note_markdown_in_a_handout_loads_nothing() -> None:
    from app.handout import markdown_html

    text = "*A* <script>x()</script> ![chart](http://host/p.png) [docs](https://host/d)\n\n- **b**"
    fragment = markdown_html(text)
    assert "<em>A</em>" in fragment and "<li><strong>b</strong></li>" in fragment
    assert (
        "&lt;script&gt;" in fragment
        and "[chart]" in fragment
        and "docs (https://host/d)" in fragment
    )
    check_self_contained(f"<html><body>{fragment}</body></html>", images=0)


def test_the_handout_is_built_from_the_study_and_never_makes_a_main_window(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    from PySide6 import QtWidgets

    import app.handout as handout
    from tests.app.conftest import STUDY

    path = tmp_path / "small.study.toml"
    path.write_text(STUDY)
    seen: list[str] = []
    # Windows an earlier test left for Qt to delete later are not the handout's.
    earlier = QtWidgets.QApplication.topLevelWidgets()  # held, so that no id is reused
    before = {id(w) for w in earlier}

    def windows() -> None:
        new = [w for w in QtWidgets.QApplication.topLevelWidgets() if id(w) not in before]
        seen.extend(type(w).__name__ for w in new)
        assert not any(isinstance(w, QtWidgets.QMainWindow) for w in new)

    entry_html = handout.entry_html

    def checked_entry(index: int, model: object) -> str:
        text = entry_html(index, model)
        windows()
        return text

    monkeypatch.setattr(handout, "entry_html", checked_entry)
    out = tmp_path / "small.html"
    count, failed = handout.write_handout(path, out, progress=lambda share, text: windows())
    assert (count, failed) == (2, [])
    parsed = check_self_contained(out.read_text(encoding="utf-8"), images=1)
    assert len(parsed.pre) == 1
    assert "MainWindow" not in seen and "FanView" in seen  # the fan's view, made on its own


def handout_study(folder: Path, steps: int) -> Path:
    from tests.tiny_presets import TINY_FAN, study_text, tiny_map_text

    (folder / "fan.toml").write_text(TINY_FAN)
    (folder / "map.toml").write_text(tiny_map_text(steps=steps))
    path = folder / "handout.study.toml"
    path.write_text(study_text(("fan", "Fan", "fan.toml"), ("map", "Map", "map.toml")))
    return path


@pytest.mark.slow
def test_the_handout_exits_soon_after_its_file_with_nothing_left_running(
    tmp_path: Path, mark: str
) -> None:
    # The previous version's handout could hang after its file in the pool's shutdown; and
    # without a display (over SSH) Qt aborted it (exit 134) looking for one.
    from tests.os_processes import gone, start

    out = tmp_path / "page.html"
    args = ["handout", str(handout_study(tmp_path, 60)), "--out", str(out)]
    process = start(args, mark, display=False)
    try:
        deadline = time.monotonic() + 300
        while not out.exists() and process.poll() is None and time.monotonic() < deadline:
            time.sleep(0.02)
        assert out.exists()
        written = time.monotonic()
        _, err = process.communicate(timeout=10)  # the bound
    finally:
        process.kill()
        process.communicate()
    assert time.monotonic() - written < 10.0
    assert process.returncode == 0, err
    assert gone(mark, 10.0) == []


@pytest.mark.slow
@pytest.mark.parametrize("signum", [signal.SIGINT, signal.SIGTERM], ids=["SIGINT", "SIGTERM"])
def test_a_handout_stopped_while_it_trains_ends_its_workers(
    signum: int, tmp_path: Path, mark: str
) -> None:
    # Stopped with work queued, the previous version left its workers behind (SIGTERM) or
    # hung in the pool's shutdown.
    from tests.os_processes import gone, start, wait_for, workers_of

    out = tmp_path / "page.html"
    process = start(["handout", str(handout_study(tmp_path, 5000)), "--out", str(out)], mark)
    try:
        assert wait_for(lambda: workers_of(process.pid), 120)
        time.sleep(3.0)  # the workers train now
        process.send_signal(signum)
        _, err = process.communicate(timeout=10)  # the bound
    finally:
        process.kill()
        process.communicate()
    assert process.returncode == 1 and "stopped." in err and "Traceback" not in err
    assert not out.exists()
    assert gone(mark, 10.0) == []
