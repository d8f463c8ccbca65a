"""The model of a log entry: a user's own log of gradient norms and the advice replayed on it.

Reading and replaying a long log takes seconds, so it happens in a worker like training does;
its states are "not replayed", "replaying", "replayed", "stopped" and "failed". No Qt.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

from core.advice import Advice
from core.entry_model import FAILED, NOT_TRAINED, STOPPED, TRAINED, TRAINING, Observable
from core.log_entry import LogSource

WORDS = {
    NOT_TRAINED: "not replayed",
    TRAINING: "replaying",
    TRAINED: "replayed",
    STOPPED: "stopped",
    FAILED: "failed",
}


@dataclass
class LogModel(Observable):
    title: str
    source: LogSource
    status: str = NOT_TRAINED
    error: str = ""
    run_id: int = 0
    advice: Advice | None = None
    advised_source: LogSource | None = None  # the source `advice` was made from
    origin: Any = None
    kind: str = "log"
    _listeners: list[Callable[[str], None]] = field(default_factory=list, repr=False)

    @property
    def edited(self) -> bool:
        return self.advice is not None and self.advised_source != self.source

    def has_current_results(self) -> bool:
        return self.status == TRAINED and not self.edited

    def state_text(self) -> str:
        if self.status == FAILED:
            last = self.error.strip().splitlines()[-1] if self.error.strip() else ""
            return f"{FAILED}: {last}" if last else FAILED
        if self.edited and self.status != TRAINING:
            return "edited since this replay"
        return WORDS.get(self.status, self.status)

    def set_source(self, source: LogSource) -> None:
        if source != self.source:
            self.source = source
            self._emit("scenario")

    def with_advice_options(self, **options: Any) -> LogSource:
        return dataclasses.replace(self.source, **options)

    def begin(self, run_id: int) -> None:
        self.run_id, self.status, self.error = run_id, TRAINING, ""
        self._emit("status")

    def set_advice(self, run_id: int, advice: Advice, source: LogSource) -> None:
        if run_id != self.run_id:
            return
        self.advice, self.advised_source = advice, source
        self.status = TRAINED
        self._emit("status")

    def fail(self, run_id: int, message: str) -> None:
        if run_id == self.run_id:
            self.status, self.error = FAILED, message
            self._emit("status")

    def stop(self) -> None:
        if self.status == TRAINING:
            self.status = STOPPED
            self._emit("status")

    def reset(self) -> None:
        self.advice, self.advised_source, self.status, self.error = None, None, NOT_TRAINED, ""
        self._emit("status")

    def progress(self) -> float:
        return 1.0 if self.status == TRAINED else 0.0

    def progress_text(self) -> str:
        return "reading the log and replaying every rule"
