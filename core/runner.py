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
from typing import Any, NamedTuple, Protocol

import numpy as np

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
# Members x batch size of one fan stack at most: past it a step's per-example arrays leave the
# core's cache. Measured on the demo's first fan at B = 512, one thread: global-norm 0.19 s per
# member in stacks of 6, 0.32 s in stacks of 12; example-norm 0.27 s and 0.35 s.
STACK_ROWS = 3072


class Pool(Protocol):
    def new_run_id(self) -> int: ...

    def submit(self, job: Job, handler: Handler) -> None: ...

    def stop(self, run_id: int) -> None: ...


class FanJob(NamedTuple):
    batch_size: int
    columns: tuple[int, ...]  # member indices into fan_members
    near: bool  # members under the slider, trained before the rest


def fan_jobs(model: FanModel, focus: float | None = None) -> list[FanJob]:
    """The fan's stacks in the order to train them.

    Each stack holds the members of one clipping method (method none rides with the first
    batch-mean method): a stack that mixes a per-example method with a batch-mean one pays for
    the per-example weighting of every member; on the demo's first fan at B = 512 one mixed
    stack of 12 + 12 members took 14.8 s, the two apart 5.6 s (bench/ui.py's baseline trains
    the mixed stacks). A stack holds at most STACK_ROWS / B members. A member's numbers do not
    depend on its stack.

    With `focus` (the slider's factor), each batch size first trains the members within two
    fan steps of it, smallest batch first, so the curves under the slider arrive first; then
    the rest of every batch size, largest first (the longest jobs start early, so the whole
    fan ends sooner).
    """
    members = fan_members(model.scenario)
    sizes = sorted(model.batch_sizes)
    kinds: dict[str, list[int]] = {}
    for column, member in enumerate(members):
        if member.method != "none":
            kinds.setdefault(member.method, []).append(column)
    plain = [c for c, m in enumerate(members) if m.method == "none"]
    batch_mean = [k for k in kinds if not members[kinds[k][0]].clip.spec.per_example]
    if plain:
        host = batch_mean[0] if batch_mean else None
        if host is None:
            kinds = {"none": plain, **kinds}
        else:
            kinds[host] = sorted(plain + kinds[host])
    groups = list(kinds.values())
    if focus is None:  # nobody is looking at a slider: the costliest first ends soonest
        return [
            FanJob(b, part, False) for b in reversed(sizes) for g in groups for part in _parts(g, b)
        ]
    factors = fan_factors()
    centre = int(min(range(len(factors)), key=lambda i: abs(math.log(factors[i] / focus))))
    near = set(range(centre - STEPS_NEAR, centre + STEPS_NEAR + 1))
    first: set[int] = set()
    position: dict[str, int] = {}
    for column, member in enumerate(members):
        fanned = sum(m.name == member.name for m in members) > 1
        slot = position.get(member.name, 0)
        position[member.name] = slot + 1
        if not fanned or slot in near:
            first.add(column)
    jobs = [
        FanJob(b, part, True)
        for b in sizes
        for g in groups
        for part in _parts([c for c in g if c in first], b)
    ]
    jobs += [
        FanJob(b, part, False)
        for b in reversed(sizes)  # the costliest first: they end the fan
        for g in groups
        for part in _parts([c for c in g if c not in first], b)
    ]
    return jobs


def _parts(columns: list[int], batch: int) -> list[tuple[int, ...]]:
    """`columns` cut into stacks of at most STACK_ROWS / batch members, of even sizes."""
    if not columns:
        return []
    count = math.ceil(len(columns) / max(1, STACK_ROWS // batch))
    return [tuple(int(c) for c in part) for part in np.array_split(columns, count)]


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
            if not self._fits(entry, run_id, [(len(j.columns), j.batch_size) for j in jobs]):
                return
            for stack in jobs:
                urgency = NEAR if stack.near else FAR
                self.pool.submit(
                    Job(run_id, FAN, text, stack.batch_size, stack.columns, priority=urgency),
                    handler,
                )
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
