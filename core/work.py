"""The work a worker does for a study, as plain data and one function, with no Qt.

A `Job` is one stack of a fan (some of its members at one batch size), one chunk of a map,
a map's norm profile, or a log entry's replay. `perform` does it and reports through
`send(kind, payload)`: "records" (the columns and a batch of StepRecords, about every 30 ms),
"rows", "profile", "advice", then "done",
"stopped" or "error" (a traceback). `InlinePool` performs jobs in the calling process, for
scripts and for tests that need no worker processes.
"""

from __future__ import annotations

import functools
import itertools
import time
import traceback
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

FAN, CHUNK, PROFILE, LOG = "fan", "chunk", "profile", "log"
# How urgent a job is (lower first): a log's replay takes a moment and is looked at at once; the
# fan members under the slider before the rest of the fan; maps, the longest, last.
URGENT, NEAR, FAR, LONG = 0, 1, 2, 3
SEND_EVERY = 0.03  # seconds between record batches: about the rate the window redraws

Send = Callable[[str, Any], None]
Handler = Callable[[str, int, int, Any], None]  # kind, run_id, batch size, payload


@dataclass(frozen=True)
class Job:
    run_id: int
    kind: str  # FAN, CHUNK or PROFILE
    scenario_toml: str
    batch_size: int = 0
    columns: tuple[int, ...] = ()  # a fan's members (indices into fan_members) to train
    chunk: Any = None  # core.maps.Chunk, for CHUNK
    log: Any = None  # core.log_entry.LogSource, for LOG
    priority: int = FAR
    job_id: int = 0  # set by the pool
    retried: bool = False  # set by a pool that gave it to a second worker


def perform(job: Job, send: Send, stop_requested: Callable[[], bool]) -> None:
    """Do one job, reporting as it goes; any failure is sent as an "error" with its traceback."""
    try:
        if job.kind == PROFILE:
            from core.profile import norm_profile
            from core.scenario import loads_scenario

            send("profile", norm_profile(loads_scenario(job.scenario_toml, "<worker>")))
            send("done", job.columns)
        elif job.kind == CHUNK:
            from core.maps import run_chunk

            send("rows", run_chunk(job.scenario_toml, job.chunk))
            send("done", job.columns)
        elif job.kind == LOG:
            send("advice", (advise_source(job.log), job.log))
            send("done", job.columns)
        else:
            _train_fan_stack(job, send, stop_requested)
    except Exception:  # a failing job shows in its entry; the worker lives on
        send("error", traceback.format_exc())


def advise_source(source: Any) -> Any:
    """The advice on a log entry's log (core.advice.Advice)."""
    from core.advice import advise
    from core.normlog import load_log

    log = load_log(source.path, source.columns, source.member)
    return advise(
        log,
        threshold=source.threshold,
        to_batch=source.to_batch,
        max_clip_share=source.max_clip_share,
    )


def _train_fan_stack(job: Job, send: Send, stop_requested: Callable[[], bool]) -> None:
    from core.engine import Engine
    from core.fan import fan_members
    from core.scenario import loads_scenario

    scenario = loads_scenario(job.scenario_toml, "<worker>")
    members = fan_members(scenario)
    engine = Engine(scenario, [members[i] for i in job.columns], job.batch_size, keep_norms=True)
    batch: list[Any] = []
    last = time.monotonic()
    for record in engine.records():
        batch.append(record)
        now = time.monotonic()
        if now - last >= SEND_EVERY:
            send("records", (job.columns, batch))
            batch, last = [], now
            if stop_requested():
                send("stopped", job.columns)
                return
    if batch:
        send("records", (job.columns, batch))
    send("done", job.columns)


class InlinePool:
    """Performs each job in this process when polled: no workers, no concurrency."""

    def __init__(self) -> None:
        self._jobs: deque[tuple[Job, Handler]] = deque()
        self._stopped: set[int] = set()
        self._run_ids = itertools.count(1)
        self.started = True

    def new_run_id(self) -> int:
        return next(self._run_ids)

    def submit(self, job: Job, handler: Handler) -> None:
        self._jobs.append((job, handler))

    def stop(self, run_id: int) -> None:
        self._stopped.add(run_id)

    def poll(self, limit: int = 1) -> int:
        """Perform up to `limit` queued jobs; returns how many."""
        done = 0
        while self._jobs and done < limit:
            job, handler = self._jobs.popleft()
            done += 1
            if job.run_id in self._stopped:
                continue

            def send(kind: str, payload: Any, job: Job = job, handler: Handler = handler) -> None:
                handler(kind, job.run_id, job.batch_size, payload)

            perform(job, send, functools.partial(self._stopped.__contains__, job.run_id))
        return done

    @property
    def idle(self) -> bool:
        return not self._jobs

    def shutdown(self) -> None:
        self._jobs.clear()
