"""A study as one self-contained HTML file: notes, each entry's plots, tables and scenario.

It is built from the study itself: each entry's view is made on its own, offscreen (never a
window), and its plots are exported as PNG data: URIs; the style sheet is inline, so the file
opens anywhere with nothing fetched. Entries whose cached results match their scenario are used
as they are; the rest are trained first through the runner, with progress shown.
"""

from __future__ import annotations

import base64
import datetime
import html
import math
import os
import re
import sys
from collections.abc import Callable
from pathlib import Path

import numpy as np
from PySide6 import QtCore, QtGui, QtWidgets

from app.axes import tick_text
from app.fan_view import FanView
from app.log_view import LogView, percent, rule_title, summary_lines
from app.map_view import MapView
from app.notices import print_notices
from app.views import make_view
from core import __version__
from core.analysis import sentence
from core.entry_model import FAILED, NoteModel
from core.fan import member_for
from core.fan_model import FanModel
from core.fileio import write_text_atomic
from core.log_model import LogModel
from core.map_model import MapModel
from core.profile import profile_sentence
from core.replay import OPEN_LOOP
from core.scenario import dumps_scenario
from core.study import Study

STYLE = """
body { font-family: "DejaVu Sans", "Helvetica Neue", Arial, sans-serif; color: #1d1d1d;
       max-width: 1100px; margin: 2em auto; padding: 0 1.5em; line-height: 1.45; }
h1 { font-size: 1.9em; margin-bottom: 0.1em; }
h2 { font-size: 1.35em; margin-top: 2.2em; padding: 0.15em 0 0.15em 0.6em; }
h2.note { border-left: 6px solid #b8a98a; }
h2.fan { border-left: 6px solid #2f7f8f; }
h2.map { border-left: 6px solid #6e4c9a; }
h2.log { border-left: 6px solid #9a6b2f; }
.lines { white-space: pre-wrap; font-size: 0.9em; }
.kind { font-size: 0.7em; font-weight: bold; margin-right: 0.5em; }
.headline { color: #555555; font-size: 0.95em; margin-top: -0.4em; }
.small { color: #777777; font-size: 0.8em; }
.note { background: #f6f4ef; padding: 0.4em 1em; }
img { max-width: 100%; border: 1px solid #dddddd; }
table { border-collapse: collapse; margin: 0.8em 0; font-size: 0.92em; }
th, td { border: 1px solid #cccccc; padding: 3px 8px; text-align: right; }
th { background: #eeeeee; }
td:nth-child(-n+2), th:nth-child(-n+2) { text-align: left; }
details summary { cursor: pointer; color: #333333; }
pre { background: #f4f4f4; padding: 0.6em; overflow-x: auto; font-size: 0.85em; }
.warn { color: #a33a1e; }
"""
VIEW_SIZE = (1500, 1100)  # the size a view is laid out at before its plots are exported

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


def _plot_image(view: FanView | MapView | LogView) -> str:
    import pyqtgraph.exporters as exporters

    exporter = exporters.ImageExporter(view.canvas.ci)
    exporter.parameters()["width"] = 1600
    return png_data_uri(exporter.export(toBytes=True))


def _settle() -> None:
    for _ in range(3):
        QtWidgets.QApplication.processEvents()


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


def fan_summary(model: FanModel) -> str:
    """Per batch size and method, the member at the entry's own threshold: final loss,
    clipping, and what the outliers kept."""
    rows = []
    for batch, stack in sorted(model.stacks.items()):
        for clip in model.scenario.clip:
            label = clip.display_name
            i = member_for(stack.members, label, 1.0)
            filled = stack.rows(i)
            values = stack.values
            counts = clip.spec.counts if clip.method != "none" else ""
            rows.append(
                [
                    str(batch),
                    label,
                    "-" if clip.threshold is None else tick_text(clip.threshold),
                    _fmt(float(values["val_loss"][filled - 1, i]), 4) if filled else "-",
                    f"{_fmt(_mean(values['clipped_share'][:filled, i]))} {counts}".strip(),
                    _fmt(_mean(values["outlier_pass"][:filled, i])),
                    _fmt(_mean(values["outlier_share"][:filled, i])),
                ]
            )
    header = [
        "batch size",
        "member",
        "threshold",
        "final validation loss",
        "clipped share (mean, of what it counts)",
        "outlier pass-through (mean)",
        "outlier share of the update (mean)",
    ]
    return _table(header, rows)


def map_summary(model: MapModel) -> str:
    lines = [html.escape(sentence(w)) for w in model.results.values()]
    parts = ["<p>" + "<br>".join(lines) + "</p>"]
    rows = []
    for result in model.results.values():
        for w in result.windows:
            if w.lower is None or w.upper is None:
                rows.append([result.label, str(w.batch_size), "none", "none"])
                continue
            # At the end of the grid tried, a window may reach further: <= and >= say so.
            lower = ("<= " if w.at_lower_edge else "") + tick_text(w.lower)
            upper = (">= " if w.at_upper_edge else "") + tick_text(w.upper)
            rows.append([result.label, str(w.batch_size), lower, upper])
        if result.common is None:
            rows.append([result.label, "every size: none", "", ""])
        else:
            low, high = result.common
            rows.append([result.label, "every size", tick_text(low), tick_text(high)])
    parts.append(_table(["method", "batch size", "window from", "window to"], rows))
    if model.profile is not None:
        parts.append(f"<p>{html.escape(profile_sentence(model.profile))}</p>")
    return "".join(parts)


def log_summary(model: LogModel) -> str:
    """Every rule replayed on the log, and what `gradfence advise` says after the table."""
    advice = model.advice
    if advice is None:
        return ""
    spikes = advice.spike_count
    rows = [
        [
            rule_title(r),
            r.clip.on_spike,
            percent(r.clip_rate),
            percent(r.skip_rate) if r.clip.on_spike == "skip" else "-",
            " / ".join(percent(v) for v in r.clip_rate_thirds),
            f"{r.spikes_caught} of {spikes}" if spikes else "-",
        ]
        for r in advice.replays
    ]
    header = ["rule", "on a spike", "clips", "skips", "by third", "spikes caught"]
    lines = html.escape("\n".join(line for line in summary_lines(advice) if line.strip()))
    return _table(header, rows) + f'<p class="lines">{lines}</p>'


def _log_html(model: LogModel) -> list[str]:
    return [
        f'<p class="small">{html.escape(str(model.source.path))}</p>',
        f"<p><i>{html.escape(OPEN_LOOP)}</i></p>",
    ]


def entry_html(index: int, model: object) -> str:
    """One entry: its heading, then its note, or its plots, tables and scenario."""
    if not isinstance(model, NoteModel | FanModel | MapModel | LogModel):
        raise TypeError(f"no handout form for {type(model).__name__}")
    title = html.escape(model.title)
    head = (
        f'<h2 class="{model.kind}" id="entry-{index}"><span class="kind">{model.kind}</span>'
        f"{title}</h2>"
    )
    if isinstance(model, NoteModel):
        return head + f'<div class="note">{markdown_html(model.text)}</div>'
    parts = [head]
    if isinstance(model, LogModel):
        parts += _log_html(model)
    if not model.has_current_results():
        parts.append(f'<p class="warn">No results: {html.escape(model.state_text())}.</p>')
    else:
        view = make_view(model, editable=False)
        assert isinstance(view, FanView | MapView | LogView)
        view.setAttribute(QtCore.Qt.WidgetAttribute.WA_DontShowOnScreen)
        view.resize(*VIEW_SIZE)
        view.show()  # laid out offscreen, on its own: no window is built for a handout
        _settle()
        view.refresh()
        if isinstance(view, MapView):
            view.show_results()
        _settle()
        parts.append(f'<p class="headline">{html.escape(view.headline())}</p>')
        parts.append(f'<img alt="{title}: plots" src="{_plot_image(view)}">')
        if isinstance(model, FanModel):
            parts.append(fan_summary(model))
        elif isinstance(model, MapModel):
            parts.append(map_summary(model))
        else:
            parts.append(log_summary(model))
        view.detach()
        view.close()
        view.deleteLater()
    if isinstance(model, LogModel):
        return "\n".join(parts)
    scenario = model.scenario
    toml = html.escape(dumps_scenario(scenario))
    parts.append(f"<details><summary>Scenario as TOML</summary><pre>{toml}</pre></details>")
    parts.append(
        f'<p class="small">scenario "{html.escape(scenario.name)}", hash {scenario.hash()}</p>'
    )
    return "\n".join(parts)


def handout_html(study: Study) -> str:
    """The handout of what the study holds now."""
    title = html.escape(study.title)
    when = datetime.datetime.now().astimezone().strftime("%Y-%m-%d %H:%M %Z")
    source = html.escape(str(study.path)) if study.path else "a study never saved"
    body = "\n".join(entry_html(i + 1, e) for i, e in enumerate(study.entries))
    return (
        "<!DOCTYPE html>\n"
        '<html lang="en"><head><meta charset="utf-8">'
        f"<title>{title}</title><style>{STYLE}</style></head><body>\n"
        f"<h1>{title}</h1>\n"
        f'<p class="small">Gradfence {__version__}, {when}; from {source}.</p>\n'
        f"{body}\n"
        f'<p class="small">Made with Gradfence {__version__} on {when}.</p>\n'
        "</body></html>\n"
    )


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


def write_handout(
    study_path: Path, out: Path, progress: Progress | None = None
) -> tuple[int, list[str]]:
    """`gradfence handout`: train what is not cached, then write the HTML file. Returns the
    number of entries and the titles of those that failed."""
    from app.qt_app import application
    from core.pool import WorkerPool
    from core.runner import Runner

    study = Study.open(study_path)  # bad input fails before anything starts
    print_notices(study)
    # No window is shown, so no display is needed: over SSH, Qt would abort looking for one.
    os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
    application()
    report = progress or TerminalProgress()
    pool = WorkerPool()
    runner = Runner(study, pool)
    try:
        todo = runner.train_pending()
        cached = len(study.workable) - len(todo)
        note = f"{len(todo)} to train, {cached} cached"
        while runner.busy:
            pool.wait(0.05)
            report(runner.progress(), note)
        report(1.0, note)
        text = handout_html(study)
        failed = [e.title for e in study.workable if e.status == FAILED]
    finally:
        runner.close()
        pool.shutdown()
    write_text_atomic(out, text)
    return len(study), failed
