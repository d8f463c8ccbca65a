"""The tool speaks in its own words: studies of notes, fans, maps and logs; commands train, map,
advise and handout; states in plain words. Words of the genres it must not read as never reach a
screen, a command's help or a handout."""

from __future__ import annotations

import re
from pathlib import Path

import pytest
from PySide6 import QtWidgets
from pytestqt.qtbot import QtBot

from app.cli import build_parser, main
from app.main_window import MainWindow
from core.study_file import ENTRY_KINDS
from tests.app.conftest import trained

FORBIDDEN = ("Run all", "Run entry", "workers:", "best in fan", " x preset", "stacks")
FORBIDDEN_WORDS = ("stale",)  # as a word, in any case
OLD_NOUNS = ("run", "sweep", "report")


def offending(text: str) -> list[str]:
    found = [w for w in FORBIDDEN if w in text]
    found += [w for w in FORBIDDEN_WORDS if re.search(rf"\b{w}\b", text, re.IGNORECASE)]
    return found


def screen_texts(window: QtWidgets.QWidget) -> list[str]:
    """Every string a person can see or hover in a window: labels, buttons, boxes, tips, menus,
    titles, table cells, and the plots' titles and axis names."""
    texts = [window.windowTitle()]
    for widget in [window, *window.findChildren(QtWidgets.QWidget)]:
        texts += [widget.toolTip(), widget.statusTip(), widget.windowTitle()]
        for name in ("text", "placeholderText", "title", "currentText"):
            getter = getattr(widget, name, None)
            if callable(getter):
                try:
                    value = getter()
                except TypeError:
                    continue
                if isinstance(value, str):
                    texts.append(value)
        if isinstance(widget, QtWidgets.QComboBox):
            texts += [widget.itemText(i) for i in range(widget.count())]
        if isinstance(widget, QtWidgets.QTabWidget):
            texts += [widget.tabText(i) for i in range(widget.count())]
        if isinstance(widget, QtWidgets.QListWidget):
            texts += [widget.item(i).text() for i in range(widget.count())]  # type: ignore[union-attr]
        for action in widget.actions():
            texts += [action.text(), action.toolTip(), action.statusTip()]
        canvas = getattr(widget, "canvas", None)
        if canvas is not None:
            for item in canvas.ci.items:
                label = getattr(item, "titleLabel", None)
                if label is not None:
                    texts.append(label.text)
                for axis in ("left", "bottom"):
                    getter = getattr(item, "getAxis", None)
                    if getter is not None:
                        texts.append(getter(axis).labelText)
    return [t for t in texts if t]


def menu_items(window: MainWindow) -> list[str]:
    items = []
    for menu in window.menuBar().findChildren(QtWidgets.QMenu):
        items += [a.text().replace("&", "") for a in menu.actions() if a.text()]
    return items


def test_the_commands_are_ours_and_the_old_ones_are_gone(
    capsys: pytest.CaptureFixture[str],
) -> None:
    parser = build_parser()
    commands = next(a for a in parser._actions if a.dest == "command").choices
    assert {"train", "map", "handout", "advise", "open", "shot", "check", "presets"} <= set(
        commands
    )
    for old in OLD_NOUNS:
        assert old not in commands
        assert main([old, "x"]) == 2
        assert "invalid choice" in capsys.readouterr().err


def test_every_help_text_is_free_of_the_old_words(capsys: pytest.CaptureFixture[str]) -> None:
    parser = build_parser()
    commands = next(a for a in parser._actions if a.dest == "command").choices
    texts = [parser.format_help()] + [sub.format_help() for sub in commands.values()]
    for text in texts:
        assert offending(text) == [], text


def test_entry_kinds_and_menus_use_our_nouns(window: MainWindow) -> None:
    assert set(ENTRY_KINDS) == {"note", "fan", "map", "log"}
    items = menu_items(window)
    for wanted in ("Train", "Train all", "Stop", "Add note", "Add fan...", "Add map...", "Present"):
        assert wanted in items
    toolbar = [
        a.text().replace("&", "") for a in window.findChildren(QtWidgets.QToolBar)[0].actions()
    ]
    assert [t for t in toolbar if t] == [
        "Train",
        "Train all",
        "Stop",
        "Add note",
        "Add fan...",
        "Add map...",
        "Add log...",
        "Present",
    ]
    for item in items:
        words = set(re.findall(r"[a-z]+", item.lower()))
        assert not words & set(OLD_NOUNS), item


def test_no_screen_of_a_trained_study_shows_the_old_words(qtbot: QtBot, window: MainWindow) -> None:
    view = trained(qtbot, window)
    window.present(full_screen=False)
    window._on_redraw_tick()
    texts = screen_texts(window)
    assert window.presentation is not None
    texts += screen_texts(window.presentation)
    assert any("clips" in t for t in texts) and any(view.model.title in t for t in texts)
    bad = {t: offending(t) for t in texts if offending(t)}
    assert bad == {}
    assert window.status_label.text() == "ready"  # never a worker count
    window.presentation.close()


def test_a_handout_is_free_of_the_old_words(window: MainWindow, tmp_path: Path) -> None:
    out = tmp_path / "words.html"
    assert window.files.export_handout(out)
    text = out.read_text(encoding="utf-8")
    assert offending(re.sub(r"<[^>]+>", " ", text)) == []


@pytest.mark.parametrize(
    "path", sorted((Path(__file__).parents[2] / "scenarios").glob("*.study.toml")), ids=str
)
def test_the_shipped_studies_speak_in_our_words(path: Path) -> None:
    """The notes of a shipped study are on screen too: they name our menus and entry kinds."""
    from core.study_file import load_study

    study = load_study(path)
    for entry in study.entries:
        text = f"{entry.title}\n{entry.text}"
        assert offending(text) == [], text
        assert not re.search(r"\b(notebook|run entry|sweep|report)\b", text, re.IGNORECASE), text
