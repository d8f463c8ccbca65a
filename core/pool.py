"""Persistent worker processes that perform jobs (core.work), with no Qt.

Tiny torch ops hold the GIL most of the time, so training in a thread would starve a window's
event loop: each worker is a spawned process with one torch thread, started once and reused. It
imports torch and the engine and trains a two-step warm-up as soon as it starts, so that the
first real job starts at once. Jobs wait in one queue here, the most urgent first (a log's
replay, then the fan members under the slider, then the rest of a fan, then maps), and each
worker is given at most two at a time: it is never idle while the queue holds work, and an urgent
job never waits behind a long queue in a worker. `poll()` (a window's timer, or `wait()` in a
loop) delivers what workers send to the job's handler. Stopping a run is a message.

A window's workers run at a lower priority (`nice`), so that they may use every core while the
window, at normal priority, still answers at once. A worker that dies is replaced and its
unfinished jobs go back to the queue once; a job that kills a worker twice is reported as an
error. Workers end when asked, within `shutdown`'s timeout in any case, and at once when their
parent is gone (a thread in each worker watches for that, so a killed parent leaves nothing
behind).

Each worker writes to a pipe of its own. A worker killed in the middle of a message then tears
only its own pipe, which is dropped with it; one queue shared by all workers would be left with a
torn message, or with its write lock held by the dead process, and every other worker would
block on it for ever.
"""

from __future__ import annotations

import contextlib
import heapq
import itertools
import multiprocessing
import multiprocessing.connection
import os
import queue
import signal
import sys
import threading
import time
import traceback
from collections import deque
from dataclasses import dataclass, field, replace
from typing import Any

from core.work import Handler, Job, perform

DONE_KINDS = ("done", "stopped", "error", "skipped")
# A job's result, sent once: a retried job whose first worker died after sending it sends it
# again, and a second copy (a map chunk's rows twice, say) must not reach the handler.
RESULT_KINDS = ("rows", "profile", "advice")
PARENT_CHECK = 0.5  # seconds between a waiting worker's checks that its parent still lives
DEPTH = 2  # jobs given to a worker at a time: one training, one waiting
DESKTOP_NICE = 10  # the window's workers yield the cores to the window itself


def desktop_workers() -> int:
    """A window's workers: one per core (they run niced, so the window keeps answering)."""
    return max(1, os.cpu_count() or 1)


def warm_up() -> None:
    """Train two steps of a tiny stack: torch's first calls of each kernel are slow."""
    from core.engine import Engine
    from core.member import Member
    from core.scenario import ClipConfig, parse_scenario

    scenario = parse_scenario(
        {
            "data": {"n_train": 64, "n_val": 16},
            "model": {"hidden": [4]},
            "train": {"steps": 2, "batch_size": 8, "eval_every": 1},
            "clip": [{"method": "global-norm"}, {"method": "example-norm"}],
        }
    )
    members = [Member(c, 0) for c in scenario.clip] + [Member(ClipConfig(method="none"), 0)]
    for _ in Engine(scenario, members, keep_norms=True).records():
        pass


def _end_with_parent() -> None:
    """End this process the moment its parent is gone, whatever it is doing (a chunk can take
    minutes, and an orphan would hold its memory and the resource tracker all that time)."""
    parent = multiprocessing.parent_process()
    if parent is None:
        return

    def watch() -> None:
        multiprocessing.connection.wait([parent.sentinel])
        os._exit(0)

    threading.Thread(target=watch, name="gradfence-parent-watch", daemon=True).start()


def worker_main(inbox: Any, outbox: Any, nice: int = 0) -> None:
    """One worker process: perform jobs until told to quit. `outbox` is the sending end of
    this worker's own pipe."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl-C is the parent's to handle
    _end_with_parent()
    if nice:
        with contextlib.suppress(OSError, AttributeError):
            os.nice(nice)
    try:
        _serve(inbox, outbox)
    except BaseException:
        traceback.print_exc()
        _leave(1)
    # Everything sent is in the pipe already (sends are synchronous), so the interpreter's
    # teardown has nothing to do but unload torch, which takes about 0.6 s: skip it.
    _leave(0)


def _leave(code: int) -> None:
    with contextlib.suppress(OSError, ValueError):
        sys.stdout.flush()
        sys.stderr.flush()
    os._exit(code)


def _serve(inbox: Any, outbox: Any) -> None:
    """The loop of a worker: perform jobs, watch for stops between record batches."""

    def post(message: tuple[str, int, int, int, Any]) -> None:
        try:
            outbox.send(message)
        except OSError:  # the parent closed its end: it is shutting down, nothing to tell
            _leave(0)

    import torch

    torch.set_num_threads(1)
    warm_up()

    parent = multiprocessing.parent_process()
    stopped: set[int] = set()
    held: deque[Job] = deque()
    post(("ready", 0, 0, 0, os.getpid()))

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
            post(("skipped", job.job_id, job.run_id, job.batch_size, None))
            continue

        def send(kind: str, payload: Any, job: Job = job) -> None:
            post((kind, job.job_id, job.run_id, job.batch_size, payload))

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
    inbox: Any  # a queue: the parent's sends never block, however busy the worker is
    outbox: Any  # the receiving end of the worker's own pipe
    jobs: list[Job] = field(default_factory=list)  # sent and not finished, in order
    ready: bool = False
    open: bool = True  # False once its pipe reached its end (the worker is gone)

    def close(self) -> None:
        with contextlib.suppress(OSError, ValueError):
            self.inbox.cancel_join_thread()  # never wait to flush into a pipe nobody reads
            self.inbox.close()
        with contextlib.suppress(OSError):
            self.outbox.close()


class WorkerPool:
    """Worker processes for jobs. `size` defaults to one per core but one (the caller keeps a
    core); a window passes desktop_workers() and DESKTOP_NICE instead."""

    def __init__(self, size: int | None = None, nice: int = 0) -> None:
        self.size = size or max(1, (os.cpu_count() or 2) - 1)
        self.nice = nice
        self._context = multiprocessing.get_context("spawn")
        self._queue: list[tuple[int, int, Job]] = []  # (priority, order, job): a heap
        self._order = itertools.count()
        self._workers: list[_Worker] = []
        self._delivered: set[int] = set()  # job ids whose result reached their handler
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
        for _ in range(self.size):
            self._workers.append(self._spawn())

    def _spawn(self) -> _Worker:
        inbox = self._context.Queue()
        receiving, sending = self._context.Pipe(duplex=False)
        process = self._context.Process(
            target=worker_main,
            args=(inbox, sending, self.nice),
            daemon=True,
            name="gradfence-worker",
        )
        try:
            process.start()
        finally:
            # Only the worker may hold the sending end: when it dies, the pipe then ends, and a
            # message it tore reads as an error instead of a wait for bytes that never come.
            sending.close()
        return _Worker(process, inbox, receiving)

    def shutdown(self, timeout: float = 2.0, at_once: bool = False) -> None:
        """End every worker within `timeout` seconds (those that do not finish are killed);
        `at_once` kills them without asking, when nothing they hold is wanted any more."""
        self._closing = True
        self._queue.clear()
        for w in self._workers:
            with contextlib.suppress(OSError, ValueError):
                if at_once:
                    w.process.kill()
                else:
                    w.inbox.put(("quit",))
        deadline = time.monotonic() + timeout / 2
        for w in self._workers:
            w.process.join(max(0.0, deadline - time.monotonic()))
        for w in self._workers:
            if w.process.is_alive():
                w.process.kill()
                w.process.join(timeout / 2)
        for w in self._workers:
            w.close()
        self._workers = []
        self.busy.clear()

    # -- jobs ---------------------------------------------------------------------------------

    def new_run_id(self) -> int:
        return next(self._run_ids)

    def submit(self, job: Job, handler: Handler) -> None:
        self.start()
        job = replace(job, job_id=next(self._job_ids))
        self._handlers[job.run_id] = handler
        self.busy[job.run_id] = self.busy.get(job.run_id, 0) + 1
        heapq.heappush(self._queue, (job.priority, next(self._order), job))
        self._dispatch()

    def _dispatch(self) -> None:
        """Give waiting jobs, most urgent first, to the workers that have room."""
        for worker in self._workers:
            while self._queue and len(worker.jobs) < DEPTH and worker.open:
                _, _, job = heapq.heappop(self._queue)
                if job.run_id not in self.busy:
                    continue  # stopped while it waited
                worker.jobs.append(job)
                worker.inbox.put(("job", job))

    def stop(self, run_id: int) -> None:
        self._queue = [item for item in self._queue if item[2].run_id != run_id]
        heapq.heapify(self._queue)
        for w in self._workers:
            w.inbox.put(("stop", run_id))
        self.busy.pop(run_id, None)

    def poll(self, limit: int = 500) -> int:
        """Deliver up to `limit` waiting messages (never blocks); returns how many."""
        if not self._workers:
            return 0
        count = 0
        progress = True
        while count < limit and progress:
            progress = False
            for w in list(self._workers):
                if count >= limit or not w.open:
                    continue
                message = self._receive(w)
                if message is None:
                    continue
                self._deliver(message)
                count += 1
                progress = True
        self._replace_dead()
        self._dispatch()
        return count

    def _receive(self, w: _Worker) -> tuple[str, int, int, int, Any] | None:
        """The next message of one worker, None when there is none (or its pipe ended)."""
        try:
            if not w.outbox.poll():
                return None
            message: tuple[str, int, int, int, Any] = w.outbox.recv()
        except (EOFError, OSError):  # the worker is gone, perhaps in the middle of a message
            w.open = False
            return None
        return message

    def wait(self, timeout: float) -> int:
        """Block until a message arrives or a worker ends (or `timeout` passes), then deliver
        what is waiting."""
        if not self._workers:
            return 0
        waiting = [w.outbox for w in self._workers if w.open]
        waiting += [w.process.sentinel for w in self._workers]
        multiprocessing.connection.wait(waiting, timeout)
        return self.poll()

    def _deliver(self, message: tuple[str, int, int, int, Any]) -> None:
        kind, job_id, run_id, batch, payload = message
        if kind == "ready":
            for w in self._workers:
                if w.process.pid == payload:
                    w.ready = True
            return
        if kind in RESULT_KINDS:
            if job_id in self._delivered:
                return  # a retried job's second copy of a result already delivered
            self._delivered.add(job_id)
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
            while w.open:  # what it sent before it died ("done", say) still counts
                message = self._receive(w)
                if message is None:
                    break
                self._deliver(message)
            self.replaced += 1
            w.close()
            self._workers[index] = self._spawn()
            for job in w.jobs:
                if job.run_id not in self.busy:
                    continue  # stopped meanwhile
                if not job.retried:
                    retry = replace(job, retried=True)
                    heapq.heappush(self._queue, (job.priority, next(self._order), retry))
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
