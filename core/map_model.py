"""The model of a map entry: its scenario, its progress, the map table and its analysis.

No Qt: views subscribe with a callback, as with core.fan_model. After an edit the earlier table
and analysis stay (drawn faded, "before the edit") until a new map is complete.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

from core.analysis import MethodWindows, analyse
from core.entry_model import (
    FAILED,
    NOT_TRAINED,
    STOPPED,
    TRAINED,
    TRAINING,
    Observable,
    state_words,
)
from core.maps import Chunk, plan, sort_table
from core.profile import NormProfile
from core.scenario import Scenario
from core.tasks import loss_floor


@dataclass
class MapModel(Observable):
    """A map entry: the chunks of the map and the norm profile, trained in the workers."""

    title: str
    scenario: Scenario
    status: str = NOT_TRAINED
    error: str = ""
    run_id: int = 0
    rows: list[dict[str, Any]] = field(default_factory=list)
    members_done: int = 0
    members_total: int = 0
    chunks_left: int = 0
    started: float = 0.0
    results: dict[str, MethodWindows] = field(default_factory=dict)
    profile: NormProfile | None = None
    results_hash: str = ""
    results_scenario: Scenario | None = None  # the scenario `results` were computed for
    origin: Any = None
    kind: str = "map"
    _pending_profile: NormProfile | None = field(default=None, repr=False)
    _listeners: list[Callable[[str], None]] = field(default_factory=list, repr=False)

    @property
    def edited(self) -> bool:
        return bool(self.results) and self.results_hash != self.scenario.hash()

    def has_current_results(self) -> bool:
        return self.status == TRAINED and not self.edited

    def state_text(self) -> str:
        return state_words(self.status, self.edited, self.error)

    def set_scenario(self, scenario: Scenario) -> None:
        if scenario == self.scenario:
            return
        self.scenario = scenario
        self._emit("scenario")

    def restore(self, rows: list[dict[str, Any]], profile: NormProfile | None) -> None:
        """A finished map of the current scenario (from the cache)."""
        self.rows = sort_table(self.scenario, rows)
        self.results = analyse(self.rows, self.scenario.map.tolerance, loss_floor(self.scenario))
        self.results_scenario = self.scenario
        self.profile, self.results_hash = profile, self.scenario.hash()
        self.members_total = self.members_done = len(self.rows)
        self.chunks_left = 0
        self.status, self.error = TRAINED, ""
        self._emit("status")

    def begin(self, run_id: int) -> list[Chunk]:
        """Start: returns the chunks to train, costliest first; the profile is asked for too.
        The earlier results stay on show until the new map is complete."""
        chunks = sorted(plan(self.scenario), key=lambda c: -c.cost)
        self.run_id, self.rows = run_id, []
        self.members_done, self.members_total = 0, sum(len(c.points) for c in chunks)
        self.chunks_left = len(chunks)
        self.status, self.error, self.started = TRAINING, "", time.monotonic()
        self._pending_profile = None
        self._emit("status")
        return chunks

    def add_rows(self, run_id: int, rows: list[dict[str, Any]]) -> None:
        if run_id != self.run_id or self.status != TRAINING:
            return  # late rows of a stopped or replaced map
        self.rows += rows
        self.members_done += len(rows)
        self.chunks_left -= 1
        self._finish_if_complete()
        self._emit("data")

    def add_profile(self, run_id: int, profile: NormProfile) -> None:
        if run_id != self.run_id or self.status != TRAINING:
            return
        self._pending_profile = profile
        self._finish_if_complete()
        self._emit("data")

    def _finish_if_complete(self) -> None:
        if self.chunks_left == 0 and self._pending_profile is not None:
            self.rows = sort_table(self.scenario, self.rows)
            self.results = analyse(
                self.rows, self.scenario.map.tolerance, loss_floor(self.scenario)
            )
            self.results_scenario = self.scenario
            self.profile = self._pending_profile
            self.results_hash = self.scenario.hash()
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
        self.rows, self.results, self.profile = [], {}, None
        self.results_hash, self.status, self.error = "", NOT_TRAINED, ""
        self._emit("status")

    def progress(self) -> float:
        if self.status != TRAINING:
            return 1.0 if self.status == TRAINED else 0.0
        return self.members_done / max(self.members_total, 1)

    def progress_text(self) -> str:
        return f"{self.members_done} of {self.members_total} members"

    def seconds_left(self) -> float | None:
        """Estimated from the members done so far (costliest first, so it errs long)."""
        if self.status != TRAINING or self.members_done == 0:
            return None
        elapsed = time.monotonic() - self.started
        return elapsed / self.members_done * (self.members_total - self.members_done)
