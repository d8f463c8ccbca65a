"""The model of a sweep entry: its scenario, its progress, the sweep table and its analysis.

No Qt: views subscribe with a callback, as with core.run_model.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

from core.analysis import MethodWindows, analyse
from core.run_model import DONE, FAILED, IDLE, RUNNING, STOPPED
from core.scenario import Scenario
from core.sweep import Chunk, plan, sort_table

__all__ = ["DONE", "FAILED", "IDLE", "RUNNING", "STOPPED", "SweepEntryModel"]


@dataclass
class SweepEntryModel:
    title: str
    scenario: Scenario
    status: str = IDLE
    stale: bool = False
    error: str = ""
    run_id: int = 0
    rows: list[dict[str, Any]] = field(default_factory=list)
    chunks_done: int = 0
    chunks_total: int = 0
    started: float = 0.0
    results: dict[str, MethodWindows] = field(default_factory=dict)
    _listeners: list[Callable[[str], None]] = field(default_factory=list, repr=False)

    def subscribe(self, listener: Callable[[str], None]) -> None:
        self._listeners.append(listener)

    def _emit(self, what: str) -> None:
        for listener in list(self._listeners):
            listener(what)

    def set_scenario(self, scenario: Scenario) -> None:
        if scenario == self.scenario:
            return
        self.scenario = scenario
        if self.rows:
            self.stale = True
        self._emit("scenario")

    def begin(self, run_id: int) -> list[Chunk]:
        chunks = sorted(plan(self.scenario), key=lambda c: -c.cost)
        self.run_id, self.rows, self.results = run_id, [], {}
        self.chunks_done, self.chunks_total = 0, len(chunks)
        self.status, self.stale, self.error, self.started = RUNNING, False, "", time.monotonic()
        self._emit("status")
        return chunks

    def add_rows(self, run_id: int, rows: list[dict[str, Any]]) -> None:
        if run_id != self.run_id or self.status != RUNNING:
            return  # late rows of a cancelled or replaced sweep
        self.rows += rows
        self.chunks_done += 1
        if self.chunks_done == self.chunks_total:
            self.rows = sort_table(self.scenario, self.rows)
            self.results = analyse(self.rows, self.scenario.sweep.tolerance)
            self.status = DONE
            self._emit("status")
        self._emit("data")

    def fail(self, run_id: int, message: str) -> None:
        if run_id == self.run_id:
            self.status, self.error = FAILED, message
            self._emit("status")

    def cancel(self) -> None:
        if self.status == RUNNING:
            self.status = STOPPED
            self._emit("status")

    def seconds_left(self) -> float | None:
        """Estimated from the chunks done so far (costliest first, so it errs long)."""
        if self.status != RUNNING or self.chunks_done == 0:
            return None
        elapsed = time.monotonic() - self.started
        return elapsed / self.chunks_done * (self.chunks_total - self.chunks_done)
