"""The runner: trains a study's entries on a worker pool and routes results to their models.

The window, `gradfence shot` and the handout all train through it. It turns an entry into jobs
(a fan: its batch sizes, the smallest first and the members nearest the slider before the rest;
a map: its chunks and its norm profile), hands them to the pool, and calls the entry's methods
with what comes back. It gives one progress figure over what it was asked to train and a status
line in plain words. A removed entry stops training. No Qt.
"""

from __future__ import annotations

import math
import time
from collections.abc import Sequence
from typing import Any, Protocol

from core.entry_model import TRAINING, WorkedEntry
from core.errors import GradfenceInputError
from core.fan import fan_factors, fan_members
from core.fan_model import FanModel
from core.log_model import LogModel
from core.map_model import MapModel
from core.memory import check_map_fits, check_stacks_fit
from core.scenario import dumps_scenario
from core.study import Study, StudyEvent
from core.work import CHUNK, FAN, FAR, LOG, LONG, NEAR, PROFILE, URGENT, Handler, Job

STEPS_NEAR = 2  # fan thresholds on each side of the slider's that train first


class Pool(Protocol):
    def new_run_id(self) -> int: ...

    def submit(self, job: Job, handler: Handler) -> None: ...

    def stop(self, run_id: int) -> None: ...


def fan_jobs(model: FanModel, focus: float | None = None) -> list[tuple[int, tuple[int, ...]]]:
    """(batch size, member columns) in the order to train them (the first len(batch sizes) are
    the members near `focus`, when it is given).

    With `focus` (the slider's factor), each batch size first trains the members within two
    fan steps of it (and the members that have no threshold fan), smallest batch first, so the
    curves under the slider arrive first; then the rest of every batch size, largest first (the
    longest job starts early, so the whole fan ends sooner).
    """
    members = fan_members(model.scenario)
    everyone = tuple(range(len(members)))
    sizes = sorted(model.batch_sizes)
    if focus is None:  # nobody is looking at a slider: the costliest first ends soonest
        return [(b, everyone) for b in reversed(sizes)]
    factors = fan_factors()
    centre = int(min(range(len(factors)), key=lambda i: abs(math.log(factors[i] / focus))))
    near = set(range(centre - STEPS_NEAR, centre + STEPS_NEAR + 1))
    first: list[int] = []
    position: dict[str, int] = {}
    for column, member in enumerate(members):
        fanned = sum(m.name == member.name for m in members) > 1
        slot = position.get(member.name, 0)
        position[member.name] = slot + 1
        if not fanned or slot in near:
            first.append(column)
    rest = tuple(c for c in everyone if c not in first)
    jobs = [(b, tuple(first)) for b in sizes]
    if rest:
        jobs += [(b, rest) for b in reversed(sizes)]  # the costliest first: it ends the fan
    return jobs


class Runner:
    """Trains entries of one study on one pool."""

    def __init__(self, study: Study, pool: Pool) -> None:
        self.study, self.pool = study, pool
        self._started: dict[int, float] = {}  # id(entry) -> time.monotonic() it began
        self._batch: list[WorkedEntry] = []  # what the progress figure is over
        study.subscribe(self._on_study_event)

    def close(self) -> None:
        self.stop_all()
        self.study.unsubscribe(self._on_study_event)

    # -- training -----------------------------------------------------------------------------

    def train(self, entry: WorkedEntry, focus: float | None = None) -> None:
        """Start training `entry` (replaying a log) unless it is doing so already."""
        if entry.status == TRAINING:
            return
        run_id = self.pool.new_run_id()
        handler = self._handler_for(entry)
        if isinstance(entry, FanModel):
            text = dumps_scenario(entry.scenario)
            entry.begin(run_id)
            jobs = fan_jobs(entry, focus)
            if not self._fits(entry, run_id, [(len(c), b) for b, c in jobs]):
                return
            first = len(entry.batch_sizes) if focus is not None and len(jobs) > 1 else 0
            for index, (batch, columns) in enumerate(jobs):
                urgency = NEAR if index < first else FAR
                self.pool.submit(Job(run_id, FAN, text, batch, columns, priority=urgency), handler)
        elif isinstance(entry, MapModel):
            text = dumps_scenario(entry.scenario)
            chunks = entry.begin(run_id)
            if not self._fits(entry, run_id):
                return
            self.pool.submit(Job(run_id, PROFILE, text, priority=LONG), handler)
            for chunk in chunks:
                job = Job(run_id, CHUNK, text, chunk.batch_size, chunk=chunk, priority=LONG)
                self.pool.submit(job, handler)
        elif isinstance(entry, LogModel):
            entry.begin(run_id)
            self.pool.submit(Job(run_id, LOG, "", log=entry.source, priority=URGENT), handler)
        else:
            raise TypeError(f"cannot train {type(entry).__name__}")
        if not self.training():
            self._batch = []
        self._batch = [e for e in self._batch if e is not entry] + [entry]
        self._started[id(entry)] = time.monotonic()

    def _fits(
        self, entry: FanModel | MapModel, run_id: int, stacks: list[tuple[int, int]] | None = None
    ) -> bool:
        """Whether the entry's largest stack fits in free memory; if not, the entry fails now,
        with the sentence that says how much it needs, instead of a worker dying on it."""
        try:
            if stacks is None:
                check_map_fits(entry.scenario)
            else:
                check_stacks_fit(entry.scenario, stacks)
        except GradfenceInputError as exc:
            entry.fail(run_id, str(exc))
            return False
        return True

    def train_all(self, entries: Sequence[WorkedEntry] | None = None) -> list[WorkedEntry]:
        """Train every entry given (default: every entry of the study that trains)."""
        todo = list(entries if entries is not None else self.study.workable)
        for entry in todo:
            self.train(entry)
        return todo

    def train_pending(self) -> list[WorkedEntry]:
        """Train the entries without current results; returns them."""
        return self.train_all(self.study.pending())

    def stop(self, entry: WorkedEntry) -> None:
        if entry.status == TRAINING:
            self.pool.stop(entry.run_id)
            entry.stop()

    def stop_all(self) -> None:
        for entry in self.study.workable:
            self.stop(entry)
        for entry in self._batch:
            self.stop(entry)

    def training(self) -> list[WorkedEntry]:
        return [e for e in self._batch if e.status == TRAINING]

    @property
    def busy(self) -> bool:
        return bool(self.training())

    def _handler_for(self, entry: WorkedEntry) -> Handler:
        def handle(kind: str, run_id: int, batch: int, payload: Any) -> None:
            if kind == "error":
                entry.fail(run_id, str(payload))
            elif isinstance(entry, FanModel):
                if kind == "records":
                    columns, records = payload
                    entry.add_records(run_id, batch, columns, records)
                elif kind == "done":
                    entry.finish(run_id, batch, payload)
            elif isinstance(entry, MapModel):
                if kind == "rows":
                    entry.add_rows(run_id, payload)
                elif kind == "profile":
                    entry.add_profile(run_id, payload)
            elif isinstance(entry, LogModel) and kind == "advice":
                advice, source = payload
                entry.set_advice(run_id, advice, source)

        return handle

    # -- telling ------------------------------------------------------------------------------

    def progress(self) -> float:
        """One figure, 0..1, over the entries trained since the runner was last idle."""
        if not self._batch:
            return 1.0
        return sum(1.0 if e.status != TRAINING else e.progress() for e in self._batch) / len(
            self._batch
        )

    def seconds_left(self, entry: WorkedEntry) -> float | None:
        started = self._started.get(id(entry))
        share = entry.progress()
        if started is None or entry.status != TRAINING or share < 0.02:
            return None
        elapsed = time.monotonic() - started
        return elapsed * (1.0 - share) / share

    def status_text(self) -> str:
        """`training 'Batch size 8': 2 of 4 batch sizes, about 12 s left`, or `ready`."""
        busy = self.training()
        if not busy:
            return "ready"
        entry = busy[0]
        text = f"training '{entry.title}': {entry.progress_text()}"
        left = self.seconds_left(entry)
        text += f", about {left:.0f} s left" if left is not None else ", starting"
        if len(busy) > 1:
            text += f"; {len(busy) - 1} more {'entry' if len(busy) == 2 else 'entries'} queued"
        return text

    def _on_study_event(self, event: StudyEvent) -> None:
        entry = event.entry
        if event.what == "removed" and isinstance(entry, FanModel | MapModel | LogModel):
            self.stop(entry)
