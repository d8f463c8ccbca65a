"""The model of a run entry: its scenario, its state, and the fan's metrics as they arrive.

No Qt: views subscribe with a callback and change the entry by calling its methods.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Protocol

import numpy as np

from core.engine import Member, StepRecord, metric_names
from core.fan import batch_ladder, fan_members
from core.scenario import Scenario

IDLE, RUNNING, DONE, STOPPED, FAILED = "idle", "running", "done", "stopped", "failed"


class ScenarioHolder(Protocol):
    """What an inspector edits: an entry model with a scenario (run and sweep entries)."""

    title: str
    scenario: Scenario

    def set_scenario(self, scenario: Scenario) -> None: ...

    def subscribe(self, listener: Callable[[str], None]) -> None: ...

    def unsubscribe(self, listener: Callable[[str], None]) -> None: ...

    def set_title(self, title: str) -> None: ...


class Observable:
    """Listeners called with what changed: "title", "scenario", "status" or "data"."""

    _listeners: list[Callable[[str], None]]
    title: str

    def subscribe(self, listener: Callable[[str], None]) -> None:
        self._listeners.append(listener)

    def unsubscribe(self, listener: Callable[[str], None]) -> None:
        if listener in self._listeners:
            self._listeners.remove(listener)

    def _emit(self, what: str) -> None:
        for listener in list(self._listeners):
            listener(what)

    def set_title(self, title: str) -> None:
        if title != self.title:
            self.title = title
            self._emit("title")


@dataclass
class NoteEntryModel(Observable):
    """A note entry: a title and Markdown text."""

    title: str
    text: str = ""
    _listeners: list[Callable[[str], None]] = field(default_factory=list, repr=False)

    def set_text(self, text: str) -> None:
        if text != self.text:
            self.text = text
            self._emit("text")


@dataclass
class StackData:
    """One batch size of the fan: metric arrays (logged steps, members), filled as they come."""

    batch_size: int
    members: list[Member]
    names: tuple[str, ...]
    steps: np.ndarray
    values: dict[str, np.ndarray]
    filled: int = 0
    done: bool = False
    example_norms: np.ndarray | None = None  # latest (K, B)
    outlier: np.ndarray | None = None

    @classmethod
    def empty(cls, scenario: Scenario, batch: int, members: list[Member]) -> StackData:
        every, total = scenario.train.eval_every, scenario.train.steps
        rows = total // every + (0 if total % every == 0 else 1)
        names = metric_names(scenario.is_classification)
        return cls(
            batch_size=batch,
            members=members,
            names=names,
            steps=np.full(rows, np.nan),
            values={n: np.full((rows, len(members)), np.nan) for n in names},
        )

    def add(self, record: StepRecord) -> None:
        if self.filled >= len(self.steps):
            return
        row = self.filled
        self.steps[row] = record.step
        for name in self.names:
            self.values[name][row] = record.values[name]
        self.filled += 1
        if record.example_norms is not None:
            self.example_norms, self.outlier = record.example_norms, record.outlier


@dataclass
class RunEntryModel(Observable):
    """A run entry of a notebook."""

    title: str
    scenario: Scenario
    status: str = IDLE
    stale: bool = False  # the results belong to another scenario: never drawn as current
    error: str = ""
    run_id: int = 0
    stacks: dict[int, StackData] = field(default_factory=dict)
    results_hash: str = ""  # hash of the scenario the stacks were trained on
    _listeners: list[Callable[[str], None]] = field(default_factory=list, repr=False)

    @property
    def batch_sizes(self) -> tuple[int, ...]:
        return batch_ladder(self.scenario)

    def set_scenario(self, scenario: Scenario) -> None:
        """Replace the scenario; results of another scenario become stale (an undo back to
        theirs makes them current again)."""
        if scenario == self.scenario:
            return
        self.scenario = scenario
        self.stale = bool(self.stacks) and self.results_hash != scenario.hash()
        self._emit("scenario")

    def restore(self, stacks: dict[int, StackData]) -> None:
        """Finished results of the current scenario (from the cache)."""
        self.stacks, self.results_hash = stacks, self.scenario.hash()
        self.status, self.stale, self.error = DONE, False, ""
        self._emit("status")

    def begin(self, run_id: int) -> dict[int, list[Member]]:
        """Start a run: fresh arrays for every batch size; returns the members per batch size."""
        self.run_id = run_id
        members = fan_members(self.scenario)
        self.stacks = {b: StackData.empty(self.scenario, b, members) for b in self.batch_sizes}
        self.results_hash = self.scenario.hash()
        self.status, self.stale, self.error = RUNNING, False, ""
        self._emit("status")
        return {b: members for b in self.stacks}

    def add_records(self, run_id: int, batch: int, records: list[StepRecord]) -> None:
        if run_id != self.run_id or batch not in self.stacks:
            return  # a late message from a run that was stopped or replaced
        for record in records:
            self.stacks[batch].add(record)
        self._emit("data")

    def finish_stack(self, run_id: int, batch: int) -> None:
        if run_id != self.run_id or batch not in self.stacks:
            return
        self.stacks[batch].done = True
        if all(s.done for s in self.stacks.values()) and self.status == RUNNING:
            self.status = DONE
            self._emit("status")

    def fail(self, run_id: int, message: str) -> None:
        if run_id != self.run_id:
            return
        self.status, self.error = FAILED, message
        self._emit("status")

    def stop(self) -> None:
        if self.status == RUNNING:
            self.status = STOPPED
            self._emit("status")

    def reset(self) -> None:
        self.stacks, self.status, self.stale, self.error = {}, IDLE, False, ""
        self._emit("status")

    def progress(self) -> float:
        """Share of all logged rows received, 0..1."""
        if not self.stacks:
            return 0.0
        total = sum(len(s.steps) for s in self.stacks.values())
        return sum(s.filled for s in self.stacks.values()) / max(total, 1)


def regime(clip_rate: float) -> str:
    """How a threshold behaves: never clips, clips now and then, or clips nearly always."""
    if not math.isfinite(clip_rate) or clip_rate < 0.01:
        return "idle"
    if clip_rate < 0.9:
        return "safety net"
    return "always on"
