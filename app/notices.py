"""A study's notices on a terminal, for the commands that work on a study without a window."""

from __future__ import annotations

import sys
from typing import TextIO

from core.study import Study, StudyEvent, StudyListener


def print_notices(study: Study, stream: TextIO | None = None) -> StudyListener:
    """Print what the study has to say now, and subscribe to print what it says later (a cache
    file set aside, results that could not be cached). What reading the file noted is a `note:`;
    the rest is a `warning:`. Returns the listener, for `study.unsubscribe`."""
    out = stream or sys.stderr

    def line(text: str) -> None:
        word = "note" if text in study.file_notices else "warning"
        out.write(f"{word}: {text}\n")
        out.flush()

    for notice in study.notices:
        line(notice)

    def listen(event: StudyEvent) -> None:
        if event.what == "notice":
            line(event.detail)

    study.subscribe(listen)
    return listen
