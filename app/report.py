"""A notebook as one self-contained HTML file: notes, each entry's scenario, plots and summary.

Images are PNGs embedded as data: URIs and the style sheet is inline, so the file opens anywhere
with nothing fetched. The plots are the app's own (the same views, exported), so a report shows
what a teammate would see in the window. Entries whose cached results match their scenario hash
are used as they are; the rest are run first, with progress shown.
"""

from __future__ import annotations

import base64
import datetime
import html
import math
import re
import sys
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np
from PySide6 import QtCore, QtGui

from app.entry_card import EntryCard
from app.main_window import MainWindow
from app.run_entry_view import RunEntryView
from app.sweep_entry_view import SweepEntryView
from core import __version__
from core.analysis import sentence
from core.fan import member_for
from core.fileio import write_text_atomic
from core.profile import profile_sentence
from core.run_model import DONE, FAILED, RUNNING, STOPPED, NoteEntryModel
from core.scenario import dumps_scenario

STYLE = """
body { font-family: "DejaVu Sans", "Helvetica Neue", Arial, sans-serif; color: #1d1d1d;
       max-width: 1100px; margin: 2em auto; padding: 0 1.5em; line-height: 1.45; }
h1 { font-size: 1.9em; margin-bottom: 0.1em; }
h2 { font-size: 1.35em; margin-top: 2.2em; border-bottom: 1px solid #cccccc;
     padding-bottom: 0.2em; }
.kind { font-size: 0.7em; color: #ffffff; background: #5a5a5a; border-radius: 3px;
        padding: 1px 6px; vertical-align: middle; margin-right: 0.5em; }
.meta { color: #555555; font-size: 0.9em; }
.note { background: #f6f6f4; border-left: 4px solid #999999; padding: 0.4em 1em; }
img { max-width: 100%; border: 1px solid #dddddd; }
table { border-collapse: collapse; margin: 0.8em 0; font-size: 0.92em; }
th, td { border: 1px solid #cccccc; padding: 3px 8px; text-align: right; }
th { background: #eeeeee; }
td:nth-child(-n+2), th:nth-child(-n+2) { text-align: left; }
details summary { cursor: pointer; color: #333333; }
pre { background: #f4f4f4; padding: 0.6em; overflow-x: auto; font-size: 0.85em; }
.warn { color: #a00000; }
"""

Progress = Callable[[float, str], None]


def markdown_html(text: str) -> str:
    """A note's Markdown as an HTML fragment that loads nothing: raw HTML is shown as text,
    an image becomes its alt text and a link its text with the address after it."""
    import markdown

    fragment = markdown.markdown(text.replace("&", "&amp;").replace("<", "&lt;"))
    fragment = re.sub(r'<img[^>]*alt="([^"]*)"[^>]*/?>', r"[\1]", fragment)
    fragment = re.sub(r"<img[^>]*>", "", fragment)
    return re.sub(r'<a [^>]*href="([^"]*)"[^>]*>(.*?)</a>', r"\2 (\1)", fragment)


def png_data_uri(image: QtGui.QImage) -> str:
    buffer = QtCore.QBuffer()
    buffer.open(QtCore.QIODevice.OpenModeFlag.WriteOnly)
    image.save(buffer, "PNG")  # type: ignore[call-overload]  # the stubs say bytes; Qt takes str
    data = bytes(buffer.data().data())
    return "data:image/png;base64," + base64.b64encode(data).decode("ascii")


def _plot_image(view: RunEntryView | SweepEntryView) -> str:
    import pyqtgraph.exporters as exporters

    exporter = exporters.ImageExporter(view.canvas.ci)
    exporter.parameters()["width"] = 1600
    image = exporter.export(toBytes=True)
    return png_data_uri(image)


def _mean(values: np.ndarray) -> float:
    finite = values[np.isfinite(values)]
    return float(finite.mean()) if finite.size else math.nan


def _fmt(value: float, digits: int = 3) -> str:
    return "-" if not math.isfinite(value) else f"{value:.{digits}g}"


def _table(header: list[str], rows: list[list[str]]) -> str:
    head = "".join(f"<th>{html.escape(h)}</th>" for h in header)
    body = "".join(
        "<tr>" + "".join(f"<td>{html.escape(c)}</td>" for c in row) + "</tr>" for row in rows
    )
    return f"<table><tr>{head}</tr>{body}</table>"


def run_summary(view: RunEntryView) -> str:
    """Per batch size and method, at the preset's thresholds: final loss, clipping, outliers."""
    model = view.model
    rows = []
    for batch, stack in sorted(model.stacks.items()):
        last = stack.filled - 1
        for clip in model.scenario.clip:
            label = clip.display_name
            i = member_for(stack.members, label, 1.0)
            values = stack.values
            passed = values["outlier_pass"][: stack.filled, i]
            rows.append(
                [
                    str(batch),
                    label,
                    "-" if clip.threshold is None else f"{clip.threshold:g}",
                    _fmt(float(values["val_loss"][last, i]), 4),
                    _fmt(_mean(values["clipped_share"][: stack.filled, i])),
                    _fmt(_mean(passed)),
                ]
            )
    header = [
        "batch size",
        "method",
        "threshold",
        "final val. loss",
        "clipped share (mean)",
        "outlier pass-through (mean)",
    ]
    return _table(header, rows)


def sweep_summary(view: SweepEntryView) -> str:
    model = view.model
    lines = [html.escape(sentence(w)) for w in model.results.values()]
    parts = ["<p>" + "<br>".join(lines) + "</p>"]
    rows = []
    for result in model.results.values():
        for w in result.windows:
            if w.lower is None or w.upper is None:
                rows.append([result.label, str(w.batch_size), "none", "none"])
                continue
            # At the end of the grid tried, a window may reach further: <= and >= say so.
            lower = ("<= " if w.at_lower_edge else "") + f"{w.lower:.3g}"
            upper = (">= " if w.at_upper_edge else "") + f"{w.upper:.3g}"
            rows.append([result.label, str(w.batch_size), lower, upper])
        if result.common is None:
            rows.append([result.label, "every size: none", "", ""])
        else:
            low, high = result.common
            rows.append([result.label, "every size", f"{low:.3g}", f"{high:.3g}"])
    parts.append(_table(["method", "batch size", "window from", "window to"], rows))
    if model.profile is not None:
        parts.append(f"<p>{html.escape(profile_sentence(model.profile))}</p>")
    return "".join(parts)


def _entry_html(index: int, card: EntryCard) -> str:
    model = card.model
    title = html.escape(model.title)
    head = f'<h2 id="entry-{index}"><span class="kind">{card.kind}</span>{title}</h2>'
    if isinstance(model, NoteEntryModel):
        return head + f'<div class="note">{markdown_html(model.text)}</div>'
    view = card.body
    assert isinstance(view, RunEntryView | SweepEntryView)
    parts = [head]
    scenario = model.scenario
    parts.append(
        f'<p class="meta">scenario "{html.escape(scenario.name)}", hash {scenario.hash()}</p>'
    )
    if model.status != DONE or model.stale:
        reason = {FAILED: "it failed", STOPPED: "it was stopped", RUNNING: "it did not finish"}
        why = reason.get(model.status, "it was not run")
        parts.append(f'<p class="warn">No results: {why}.</p>')
    elif isinstance(view, RunEntryView):
        view.refresh()
        parts.append(f'<img alt="{title}: plots" src="{_plot_image(view)}">')
        parts.append(run_summary(view))
    else:
        view.show_results()
        parts.append(f'<img alt="{title}: plots" src="{_plot_image(view)}">')
        parts.append(sweep_summary(view))
    toml = html.escape(dumps_scenario(scenario))
    parts.append(f"<details><summary>Scenario as TOML</summary><pre>{toml}</pre></details>")
    return "\n".join(parts)


def report_html(window: MainWindow) -> str:
    """The report of what the window holds now."""
    title = html.escape(window.notebook_title)
    when = datetime.datetime.now().astimezone().strftime("%Y-%m-%d %H:%M %Z")
    source = html.escape(str(window.path)) if window.path else "an unsaved notebook"
    body = "\n".join(_entry_html(i + 1, c) for i, c in enumerate(window.cards))
    return (
        "<!DOCTYPE html>\n"
        '<html lang="en"><head><meta charset="utf-8">'
        f"<title>{title}</title><style>{STYLE}</style></head><body>\n"
        f"<h1>{title}</h1>\n"
        f'<p class="meta">Gradfence {__version__}, {when}; from {source}.</p>\n'
        f"{body}\n"
        f'<p class="meta">Made with Gradfence {__version__} on {when}.</p>\n'
        "</body></html>\n"
    )


def overall_progress(todo: list[RunEntryView | SweepEntryView]) -> float:
    if not todo:
        return 1.0
    shares = []
    for view in todo:
        if isinstance(view, RunEntryView):
            shares.append(view.model.progress() if view.model.status == RUNNING else 1.0)
        else:
            m = view.model
            shares.append(m.chunks_done / max(m.chunks_total, 1) if m.status == RUNNING else 1.0)
    return sum(shares) / len(shares)


class TerminalProgress:
    """A bar redrawn in place on a terminal; into a log, a line every 10%."""

    def __init__(self) -> None:
        self.shown = -1
        self.tty = sys.stderr.isatty()

    def __call__(self, share: float, text: str) -> None:
        step = int(share * 100) if self.tty else int(share * 10) * 10
        if step == self.shown:
            return
        self.shown = step
        filled = round(share * 30)
        bar = "#" * filled + "." * (30 - filled)
        sys.stderr.write(f"{chr(13) if self.tty else ''}[{bar}] {step:3d}%  {text}")
        sys.stderr.write("" if self.tty and step < 100 else "\n")
        sys.stderr.flush()


def write_report(
    notebook_path: Path, out: Path, progress: Progress | None = None
) -> tuple[int, list[str]]:
    """`gradfence report`: run what is not cached, then write the HTML file. Returns the
    number of entries and the titles of those that failed."""
    import os

    os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
    from app.desktop import _application
    from core.notebook import load_notebook

    notebook = load_notebook(notebook_path)  # bad input fails before anything starts
    app = _application()
    window = MainWindow(notebook)
    window.resize(1500, 1000)
    window.show()
    report = progress or TerminalProgress()
    try:
        todo = window.run_pending()
        cached = len([*window.run_views, *window.sweep_views]) - len(todo)
        note = f"{len(todo)} to run, {cached} cached"
        while not window.all_finished():
            app.processEvents()  # type: ignore[attr-defined]
            report(overall_progress(todo), note)
            time.sleep(0.05)
        for _ in range(5):
            app.processEvents()  # type: ignore[attr-defined]
            time.sleep(0.02)
        report(1.0, note)
        write_text_atomic(out, report_html(window))
        views: list[RunEntryView | SweepEntryView] = [*window.run_views, *window.sweep_views]
        failed = [v.model.title for v in views if v.model.status == FAILED]
        count = len(window.cards)
    finally:
        window.close()
        window.deleteLater()  # Qt objects go before the interpreter's teardown
        app.processEvents()  # type: ignore[attr-defined]
    return count, failed
