"""The model of a sweep entry: its scenario, its progress, the sweep table and its analysis.

No Qt: views subscribe with a callback, as with core.run_model.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

from core.analysis import MethodWindows, analyse
from core.profile import NormProfile
from core.run_model import DONE, FAILED, IDLE, RUNNING, STOPPED, Observable
from core.scenario import Scenario
from core.sweep import Chunk, plan, sort_table

__all__ = ["DONE", "FAILED", "IDLE", "RUNNING", "STOPPED", "SweepEntryModel"]


@dataclass
class SweepEntryModel(Observable):
    """A sweep entry: the chunks of the sweep and the norm profile, trained in the workers."""

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
    profile: NormProfile | None = None
    results_hash: str = ""
    _listeners: list[Callable[[str], None]] = field(default_factory=list, repr=False)

    def set_scenario(self, scenario: Scenario) -> None:
        if scenario == self.scenario:
            return
        self.scenario = scenario
        self.stale = bool(self.rows) and self.results_hash != scenario.hash()
        self._emit("scenario")

    def restore(self, rows: list[dict[str, Any]], profile: NormProfile | None) -> None:
        """A finished sweep of the current scenario (from the cache)."""
        self.rows = sort_table(self.scenario, rows)
        self.results = analyse(self.rows, self.scenario.sweep.tolerance)
        self.profile, self.results_hash = profile, self.scenario.hash()
        self.chunks_done = self.chunks_total = len(plan(self.scenario))
        self.status, self.stale, self.error = DONE, False, ""
        self._emit("status")

    def begin(self, run_id: int) -> list[Chunk]:
        """Start: returns the chunks to train, costliest first; the profile is asked for too."""
        chunks = sorted(plan(self.scenario), key=lambda c: -c.cost)
        self.run_id, self.rows, self.results, self.profile = run_id, [], {}, None
        self.results_hash = self.scenario.hash()
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
        self._finish_if_complete()
        self._emit("data")

    def add_profile(self, run_id: int, profile: NormProfile) -> None:
        if run_id != self.run_id or self.status != RUNNING:
            return
        self.profile = profile
        self._finish_if_complete()
        self._emit("data")

    def _finish_if_complete(self) -> None:
        if self.chunks_done == self.chunks_total and self.profile is not None:
            self.status = DONE
            self._emit("status")

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
