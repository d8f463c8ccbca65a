"""Training in persistent worker processes, never in the GUI process.

Tiny torch ops hold the GIL most of the time, so a training thread would starve the event loop.
Each worker is a spawned process with one torch thread; it trains one stack at a time and sends
its records in batches every ~30 ms. A timer on the GUI thread drains the queue at about 30 Hz.
Stopping a run is a message; workers are started once and reused.
"""

from __future__ import annotations

import multiprocessing
import os
import queue
import time
import traceback
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from PySide6 import QtCore

SEND_EVERY = 0.03  # seconds between record batches from a worker: about the drain rate
DRAIN_MS = 33  # GUI drain period: about 30 Hz


@dataclass(frozen=True)
class Task:
    """A stack of a run entry's fan, (with `chunk`) a chunk of a sweep entry, or (with
    `profile`) a sweep entry's norm profile."""

    run_id: int
    batch_size: int
    scenario_toml: str
    members: list[Any]  # core.engine.Member, pickled
    chunk: Any = None  # core.sweep.Chunk
    profile: bool = False


def worker_main(inbox: Any, outbox: Any) -> None:
    """The loop of one worker process: train tasks, watch for stops between logged steps."""
    import signal

    signal.signal(signal.SIGINT, signal.SIG_IGN)  # the GUI decides when workers end
    import torch

    torch.set_num_threads(1)
    from core.engine import Engine
    from core.scenario import loads_scenario

    stopped: set[int] = set()
    outbox.put(("ready", 0, 0, None))
    while True:
        message = inbox.get()
        if message[0] == "quit":
            return
        if message[0] == "stop":
            stopped.add(message[1])
            continue
        task: Task = message[1]
        if task.run_id in stopped:
            continue
        try:
            if task.profile:
                from core.profile import norm_profile

                profile = norm_profile(loads_scenario(task.scenario_toml, "<worker>"))
                outbox.put(("profile", task.run_id, 0, profile))
                outbox.put(("done", task.run_id, 0, None))
                continue
            if task.chunk is not None:
                from core.sweep import run_chunk

                rows = run_chunk(task.scenario_toml, task.chunk)
                outbox.put(("rows", task.run_id, task.batch_size, rows))
                outbox.put(("done", task.run_id, task.batch_size, None))
                continue
            scenario = loads_scenario(task.scenario_toml, "<worker>")
            engine = Engine(scenario, task.members, task.batch_size, keep_norms=True)
            batch: list[Any] = []
            last = time.monotonic()
            cancelled = False
            for record in engine.records():
                batch.append(record)
                now = time.monotonic()
                if now - last >= SEND_EVERY:
                    outbox.put(("records", task.run_id, task.batch_size, batch))
                    batch, last = [], now
                    if _stop_requested(inbox, stopped, task.run_id):
                        cancelled = True
                        break
            if batch and not cancelled:
                outbox.put(("records", task.run_id, task.batch_size, batch))
            outbox.put(("stopped" if cancelled else "done", task.run_id, task.batch_size, None))
        except Exception:  # a failing run shows in its entry; the worker lives on
            outbox.put(("error", task.run_id, task.batch_size, traceback.format_exc()))


def _stop_requested(inbox: Any, stopped: set[int], run_id: int) -> bool:
    """Read pending control messages without blocking; keep any task for later."""
    held = []
    while True:
        try:
            message = inbox.get_nowait()
        except queue.Empty:
            break
        if message[0] == "stop":
            stopped.add(message[1])
        else:
            held.append(message)
    for message in held:
        inbox.put(message)
    return run_id in stopped


Handler = Callable[[str, int, int, Any], None]


class WorkerPool(QtCore.QObject):
    """Starts worker processes once, hands out stack tasks, drains results on the GUI thread."""

    state_changed = QtCore.Signal(str)

    def __init__(self, size: int | None = None, parent: QtCore.QObject | None = None) -> None:
        super().__init__(parent)
        # One core stays with the GUI: a worker per remaining core (at least one).
        self.size = size or max(1, (os.cpu_count() or 2) - 1)
        self._context = multiprocessing.get_context("spawn")
        self._outbox: Any = self._context.Queue()
        self._inboxes: list[Any] = []
        self._processes: list[Any] = []
        self._handlers: dict[int, Handler] = {}
        self._ready = 0
        self._next = 0
        self.busy: dict[int, int] = {}  # run_id -> stacks still training
        self.steps_received = 0
        self._last_step: dict[tuple[int, int], int] = {}
        self._timer = QtCore.QTimer(self)
        self._timer.setInterval(DRAIN_MS)
        self._timer.timeout.connect(self._drain)

    @property
    def started(self) -> bool:
        return bool(self._processes)

    def start(self) -> None:
        """Spawn the workers (importing torch there takes a second or two; this returns at once)."""
        if self._processes:
            return
        for _ in range(self.size):
            inbox = self._context.Queue()
            process = self._context.Process(
                target=worker_main, args=(inbox, self._outbox), daemon=True
            )
            process.start()
            self._inboxes.append(inbox)
            self._processes.append(process)
        self._timer.start()
        self.state_changed.emit(self.describe())

    def describe(self) -> str:
        if not self._processes:
            return "workers: not started"
        if self._ready < len(self._processes):
            return f"workers: starting ({self._ready}/{len(self._processes)} ready)"
        active = sum(self.busy.values())
        return (
            f"workers: {len(self._processes)} ready, {active} stacks training"
            if active
            else f"workers: {len(self._processes)} idle"
        )

    def submit(self, task: Task, handler: Handler) -> None:
        self.start()
        self._handlers[task.run_id] = handler
        self.busy[task.run_id] = self.busy.get(task.run_id, 0) + 1
        self._inboxes[self._next % len(self._inboxes)].put(("task", task))
        self._next += 1
        self.state_changed.emit(self.describe())

    def stop(self, run_id: int) -> None:
        for inbox in self._inboxes:
            inbox.put(("stop", run_id))
        self.busy.pop(run_id, None)
        self.state_changed.emit(self.describe())

    def _drain(self) -> None:
        for _ in range(500):  # bounded: never hold the event loop for long
            try:
                kind, run_id, batch, payload = self._outbox.get_nowait()
            except queue.Empty:
                break
            if kind == "ready":
                self._ready += 1
                self.state_changed.emit(self.describe())
                continue
            if kind == "records":
                # Training steps covered by these records (every stack counts its own steps).
                last = self._last_step.get((run_id, batch), 0)
                self.steps_received += payload[-1].step - last
                self._last_step[(run_id, batch)] = payload[-1].step
            if kind in ("done", "stopped", "error") and run_id in self.busy:
                self.busy[run_id] -= 1
                if self.busy[run_id] <= 0:
                    del self.busy[run_id]
                self.state_changed.emit(self.describe())
            handler = self._handlers.get(run_id)
            if handler is not None:
                handler(kind, run_id, batch, payload)

    def shutdown(self) -> None:
        """End every worker (used on quit and by tests)."""
        self._timer.stop()
        for inbox in self._inboxes:
            inbox.put(("quit",))
        for process in self._processes:
            process.join(timeout=5)
            if process.is_alive():
                process.kill()
                process.join(timeout=5)
        for q in [*self._inboxes, self._outbox]:
            q.close()
            q.join_thread()
        self._processes, self._inboxes = [], []
        self._ready = 0
