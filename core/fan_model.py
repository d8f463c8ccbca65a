"""The model of a fan entry: its scenario, its state, and the fan's metrics as they arrive.

A fan trains every [[clip]] table at many thresholds over a ladder of batch sizes (core/fan.py).
Records may arrive for a few members of a batch size at a time (the members nearest the slider
first), so each member of a batch size fills its own rows. When training starts again after an
edit, the earlier results stay as `before` and are drawn faded until the new ones arrive.

No Qt: views subscribe with a callback and change the entry by calling its methods.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from core.entry_model import (
    FAILED,
    NOT_TRAINED,
    STOPPED,
    TRAINED,
    TRAINING,
    Observable,
    state_words,
)
from core.fan import batch_ladder, fan_members
from core.member import Member, StepRecord, metric_names
from core.scenario import Scenario


def logged_steps(scenario: Scenario) -> np.ndarray:
    """The steps that carry a record: every multiple of eval_every, and the last step."""
    every, total = scenario.train.eval_every, scenario.train.steps
    steps = list(range(every, total + 1, every))
    if not steps or steps[-1] != total:
        steps.append(total)
    return np.asarray(steps, dtype=np.float64)


@dataclass
class StackData:
    """One batch size of the fan: metric arrays (logged steps, members), filled as they come."""

    batch_size: int
    members: list[Member]
    names: tuple[str, ...]
    steps: np.ndarray  # (rows,) every logged step, known in advance
    values: dict[str, np.ndarray]  # name -> (rows, members), NaN until it arrives
    filled: np.ndarray  # (members,) rows received per member
    finished: np.ndarray  # (members,) bool, the member's training ended
    example_norms: np.ndarray | None = None  # (members, B) at the latest step received
    outlier: np.ndarray | None = None  # (members, B) bool, beside example_norms

    @classmethod
    def empty(cls, scenario: Scenario, batch: int, members: list[Member]) -> StackData:
        steps = logged_steps(scenario)
        names = metric_names(scenario.is_classification)
        k = len(members)
        return cls(
            batch_size=batch,
            members=members,
            names=names,
            steps=steps,
            values={n: np.full((len(steps), k), np.nan) for n in names},
            filled=np.zeros(k, dtype=np.int64),
            finished=np.zeros(k, dtype=bool),
        )

    @property
    def done(self) -> bool:
        return bool(self.finished.all())

    @property
    def any_filled(self) -> bool:
        return bool(self.filled.any())

    def rows(self, member: int) -> int:
        """How many logged rows of `member` have arrived."""
        return int(self.filled[member])

    def add(self, record: StepRecord, columns: Sequence[int]) -> None:
        """A record of the members at `columns` (the record's values are in that order)."""
        row = int(np.searchsorted(self.steps, record.step))
        if row >= len(self.steps) or self.steps[row] != record.step:
            return  # not a logged step of this scenario: a late message of another run
        cols = np.asarray(columns, dtype=np.int64)
        for name in self.names:
            self.values[name][row, cols] = record.values[name]
        self.filled[cols] = row + 1
        if record.example_norms is not None and record.outlier is not None:
            if self.example_norms is None or self.outlier is None:
                width = record.example_norms.shape[1]
                self.example_norms = np.full((len(self.members), width), np.nan)
                self.outlier = np.zeros((len(self.members), width), dtype=bool)
            self.example_norms[cols] = record.example_norms
            self.outlier[cols] = record.outlier

    def mark_finished(self) -> None:
        self.finished[:] = True
        self.filled[:] = len(self.steps)


@dataclass
class FanModel(Observable):
    """A fan entry of a study."""

    title: str
    scenario: Scenario
    status: str = NOT_TRAINED
    error: str = ""
    run_id: int = 0
    stacks: dict[int, StackData] = field(default_factory=dict)
    results_hash: str = ""  # hash of the scenario the stacks were trained on
    before: dict[int, StackData] = field(default_factory=dict)  # earlier results, drawn faded
    origin: Any = None
    kind: str = "fan"
    _listeners: list[Callable[[str], None]] = field(default_factory=list, repr=False)

    @property
    def batch_sizes(self) -> tuple[int, ...]:
        return batch_ladder(self.scenario)

    @property
    def edited(self) -> bool:
        """Results exist, but for another scenario than the one now in the entry."""
        return bool(self.stacks) and self.results_hash != self.scenario.hash()

    def has_current_results(self) -> bool:
        return self.status == TRAINED and not self.edited

    def state_text(self) -> str:
        return state_words(self.status, self.edited, self.error)

    def set_scenario(self, scenario: Scenario) -> None:
        """Replace the scenario; results of another scenario stay, marked as edited since (an
        undo back to theirs makes them current again)."""
        if scenario == self.scenario:
            return
        self.scenario = scenario
        self._emit("scenario")

    def restore(self, stacks: dict[int, StackData]) -> None:
        """Finished results of the current scenario (from the cache)."""
        self.stacks, self.results_hash, self.before = stacks, self.scenario.hash(), {}
        self.status, self.error = TRAINED, ""
        self._emit("status")

    def begin(self, run_id: int) -> dict[int, list[Member]]:
        """Start training: fresh arrays for every batch size; the earlier results stay as
        `before` until new ones arrive. Returns the members per batch size."""
        self.run_id = run_id
        members = fan_members(self.scenario)
        drawn = {b: s for b, s in self.stacks.items() if s.any_filled}
        self.before = drawn or self.before
        self.stacks = {b: StackData.empty(self.scenario, b, members) for b in self.batch_sizes}
        self.results_hash = self.scenario.hash()
        self.status, self.error = TRAINING, ""
        self._emit("status")
        return {b: members for b in self.stacks}

    def add_records(
        self, run_id: int, batch: int, columns: Sequence[int], records: list[StepRecord]
    ) -> None:
        if run_id != self.run_id or batch not in self.stacks:
            return  # a late message from a run that was stopped or replaced
        for record in records:
            self.stacks[batch].add(record, columns)
        self._emit("data")

    def finish(self, run_id: int, batch: int, columns: Sequence[int]) -> None:
        if run_id != self.run_id or batch not in self.stacks:
            return
        stack = self.stacks[batch]
        stack.finished[np.asarray(columns, dtype=np.int64)] = True
        if all(s.done for s in self.stacks.values()) and self.status == TRAINING:
            self.status, self.before = TRAINED, {}
            self._emit("status")

    def fail(self, run_id: int, message: str) -> None:
        if run_id != self.run_id:
            return
        self.status, self.error = FAILED, message
        self._emit("status")

    def stop(self) -> None:
        if self.status == TRAINING:
            self.status = STOPPED
            self._emit("status")

    def reset(self) -> None:
        self.stacks, self.before, self.status, self.error = {}, {}, NOT_TRAINED, ""
        self.results_hash = ""
        self._emit("status")

    def progress(self) -> float:
        """Share of all logged rows received, 0..1."""
        if not self.stacks:
            return 0.0
        total = sum(s.filled.size * len(s.steps) for s in self.stacks.values())
        return sum(int(s.filled.sum()) for s in self.stacks.values()) / max(total, 1)

    def progress_text(self) -> str:
        done = sum(s.done for s in self.stacks.values())
        return f"{done} of {len(self.stacks)} batch sizes"

    def current_stack(self, batch: int) -> StackData | None:
        """The results of the current scenario at `batch`, once any have arrived."""
        stack = self.stacks.get(batch)
        if stack is None or not stack.any_filled or self.edited:
            return None
        return stack

    def earlier_stack(self, batch: int) -> StackData | None:
        """Results of an earlier scenario at `batch`, drawn faded ("before the edit") until the
        current training ends."""
        if self.edited:
            stack = self.stacks.get(batch)
            return stack if stack is not None and stack.any_filled else None
        return self.before.get(batch)

    def shown_stack(self, batch: int) -> StackData | None:
        """What a summary of `batch` shows: the current results, else the earlier ones."""
        return self.current_stack(batch) or self.earlier_stack(batch)


def clip_regime(share: float, counts: str) -> str:
    """How a threshold behaves, in words, with the share and what it counts."""
    if not math.isfinite(share):
        return "no clipping measured yet"
    pct = f"{share:.0%}" if share >= 0.01 or share == 0 else f"{share:.1%}"
    noun = counts if counts.endswith("s") else f"{counts}s"
    singular = noun[:-1]
    if share < 0.0005:
        return f"never clips (0% of {noun})"
    if share < 0.2:
        return f"clips on spikes ({pct} of {noun})"
    if share < 0.995:
        return f"clips often ({pct} of {noun})"
    return f"clips every {singular} ({pct} of {noun})"
