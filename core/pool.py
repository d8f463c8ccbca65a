"""Persistent worker processes that perform jobs (core.work), with no Qt.

Tiny torch ops hold the GIL most of the time, so training in a thread would starve a window's
event loop: each worker is a spawned process with one torch thread, started once (importing torch
takes seconds, so they start early and are reused). A job goes to the worker with the least
queued work; `poll()` (a window's timer, or `wait()` in a loop) delivers what workers send to the
job's handler. Stopping a run is a message. A worker that dies is replaced and its unfinished
jobs are given to the new one once; a job that kills a worker twice is reported as an error.
Workers end when asked, when their parent is gone, and within `shutdown`'s timeout in any case.
"""

from __future__ import annotations

import contextlib
import itertools
import multiprocessing
import os
import queue
import signal
import time
from collections import deque
from dataclasses import dataclass, field, replace
from typing import Any

from core.work import Handler, Job, perform

DONE_KINDS = ("done", "stopped", "error", "skipped")
PARENT_CHECK = 0.5  # seconds between a waiting worker's checks that its parent still lives


def worker_main(inbox: Any, outbox: Any) -> None:
    """The loop of one worker process: perform jobs, watch for stops between record batches."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl-C is the parent's to handle
    import torch

    torch.set_num_threads(1)
    import core.engine  # noqa: F401  (imported now, so that the first job starts at once)

    parent = multiprocessing.parent_process()
    stopped: set[int] = set()
    held: deque[Job] = deque()
    outbox.put(("ready", 0, 0, 0, os.getpid()))

    def read_control(block: bool) -> bool:
        """Read what is waiting (stops, quit, jobs to hold); False when it is time to end."""
        while True:
            try:
                message = inbox.get(timeout=PARENT_CHECK) if block else inbox.get_nowait()
            except queue.Empty:
                return parent is None or parent.is_alive()
            block = False
            if message[0] == "quit":
                return False
            if message[0] == "stop":
                stopped.add(message[1])
            else:
                held.append(message[1])

    while True:
        if not held and not read_control(block=True):
            return
        if not held:
            continue
        job = held.popleft()
        if job.run_id in stopped:
            outbox.put(("skipped", job.job_id, job.run_id, job.batch_size, None))
            continue

        def send(kind: str, payload: Any, job: Job = job) -> None:
            outbox.put((kind, job.job_id, job.run_id, job.batch_size, payload))

        ending = False

        def stop_requested(job: Job = job) -> bool:
            nonlocal ending
            if not read_control(block=False):
                ending = True
            return ending or job.run_id in stopped

        perform(job, send, stop_requested)
        if ending:
            return


@dataclass
class _Worker:
    process: Any
    inbox: Any
    jobs: list[Job] = field(default_factory=list)  # sent and not finished, in order
    ready: bool = False


class WorkerPool:
    """Worker processes for jobs; `size` defaults to one per core but one (the caller keeps a
    core: a window must stay responsive)."""

    def __init__(self, size: int | None = None) -> None:
        self.size = size or max(1, (os.cpu_count() or 2) - 1)
        self._context = multiprocessing.get_context("spawn")
        self._outbox: Any = None
        self._workers: list[_Worker] = []
        self._handlers: dict[int, Handler] = {}
        self._job_ids = itertools.count(1)
        self._run_ids = itertools.count(1)
        self.busy: dict[int, int] = {}  # run_id -> jobs not finished
        self.steps_received = 0
        self._last_step: dict[int, int] = {}
        self.replaced = 0  # workers that died and were replaced
        self._closing = False

    # -- life ---------------------------------------------------------------------------------

    @property
    def started(self) -> bool:
        return bool(self._workers)

    @property
    def ready(self) -> int:
        return sum(w.ready for w in self._workers)

    def start(self) -> None:
        """Spawn the workers; they import torch in the background. Returns at once."""
        if self._workers:
            return
        self._closing = False
        self._outbox = self._context.Queue()
        self._workers = [self._spawn() for _ in range(self.size)]

    def _spawn(self) -> _Worker:
        inbox = self._context.Queue()
        process = self._context.Process(
            target=worker_main, args=(inbox, self._outbox), daemon=True, name="gradfence-worker"
        )
        process.start()
        return _Worker(process, inbox)

    def shutdown(self, timeout: float = 2.0) -> None:
        """End every worker within `timeout` seconds (those that do not finish are killed)."""
        self._closing = True
        for w in self._workers:
            with contextlib.suppress(OSError, ValueError):
                w.inbox.put(("quit",))
        deadline = time.monotonic() + timeout / 2
        for w in self._workers:
            w.process.join(max(0.0, deadline - time.monotonic()))
        for w in self._workers:
            if w.process.is_alive():
                w.process.kill()
                w.process.join(timeout / 2)
        for q in [*(w.inbox for w in self._workers), self._outbox]:
            if q is not None:
                q.cancel_join_thread()  # never wait to flush into a pipe nobody reads
                q.close()
        self._workers, self._outbox = [], None
        self.busy.clear()

    # -- jobs ---------------------------------------------------------------------------------

    def new_run_id(self) -> int:
        return next(self._run_ids)

    def submit(self, job: Job, handler: Handler) -> None:
        self.start()
        job = replace(job, job_id=next(self._job_ids))
        self._handlers[job.run_id] = handler
        self.busy[job.run_id] = self.busy.get(job.run_id, 0) + 1
        self._send(min(self._workers, key=lambda w: len(w.jobs)), job)

    def _send(self, worker: _Worker, job: Job) -> None:
        worker.jobs.append(job)
        worker.inbox.put(("job", job))

    def stop(self, run_id: int) -> None:
        for w in self._workers:
            w.inbox.put(("stop", run_id))
        self.busy.pop(run_id, None)

    def poll(self, limit: int = 500) -> int:
        """Deliver up to `limit` waiting messages (never blocks); returns how many."""
        if not self._workers:
            return 0
        count = 0
        while count < limit:
            try:
                message = self._outbox.get_nowait()
            except queue.Empty:
                break
            self._deliver(message)
            count += 1
        self._replace_dead()
        return count

    def wait(self, timeout: float) -> int:
        """Block until a message arrives (or `timeout` passes), then deliver what is waiting."""
        if not self._workers:
            return 0
        try:
            message = self._outbox.get(timeout=timeout)
        except queue.Empty:
            self._replace_dead()
            return 0
        self._deliver(message)
        return 1 + self.poll()

    def _deliver(self, message: tuple[str, int, int, int, Any]) -> None:
        kind, job_id, run_id, batch, payload = message
        if kind == "ready":
            for w in self._workers:
                if w.process.pid == payload:
                    w.ready = True
            return
        if kind == "records" and payload[1]:
            # Training steps covered (each stack counts its own steps): the status bar's rate.
            last = payload[1][-1].step
            self.steps_received += last - self._last_step.get(job_id, 0)
            self._last_step[job_id] = last
        if kind in DONE_KINDS:
            for w in self._workers:
                w.jobs = [j for j in w.jobs if j.job_id != job_id]
            if run_id in self.busy:
                self.busy[run_id] -= 1
                if self.busy[run_id] <= 0:
                    del self.busy[run_id]
        if kind == "skipped":
            return
        handler = self._handlers.get(run_id)
        if handler is not None:
            handler(kind, run_id, batch, payload)

    def _replace_dead(self) -> None:
        if self._closing:
            return
        for index, w in enumerate(self._workers):
            if w.process.is_alive():
                continue
            self.replaced += 1
            w.inbox.cancel_join_thread()
            w.inbox.close()
            fresh = self._spawn()
            self._workers[index] = fresh
            for job in w.jobs:
                if job.run_id not in self.busy:
                    continue  # stopped meanwhile
                if not job.retried:
                    self._send(fresh, replace(job, retried=True))
                    continue
                self._deliver(
                    (
                        "error",
                        job.job_id,
                        job.run_id,
                        job.batch_size,
                        "a worker process ended while training this, twice (out of memory, or "
                        f"killed; exit code {w.process.exitcode}).",
                    )
                )

    @property
    def idle(self) -> bool:
        return not self.busy
