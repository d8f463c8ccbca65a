"""The worker pool: the most urgent job first, workers niced for a window, a fan's members under
the slider before the rest; and under faults: killed workers, killed parents, shutting down with
work queued.

Whether a process still runs is asked of the operating system (/proc), never of multiprocessing
alone, which forgets the workers of a parent that was killed.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path
from typing import Any

import pytest
import torch

from core.fan import fan_factors, fan_members
from core.fan_model import FanModel
from core.log_entry import LogSource
from core.maps import plan, run_chunk, table_csv
from core.pool import WorkerPool
from core.runner import fan_jobs
from core.scenario import dumps_scenario
from core.study_file import load_study
from core.work import CHUNK, FAN, FAR, LOG, URGENT, Job
from tests.app.conftest import STUDY
from tests.conftest import SCENARIOS
from tests.os_processes import alive, carrying, gone, marked_env, wait_for
from tests.tiny_presets import tiny_map

HANG = 60.0  # seconds: a bound on a hang, not a measure of speed


def rows_in_this_process(text: str, chunk: Any) -> str:
    """A chunk trained here, as a worker trains it (with one torch thread), as map.csv lines."""
    threads = torch.get_num_threads()
    torch.set_num_threads(1)
    try:
        return table_csv(run_chunk(text, chunk), header=False)
    finally:
        torch.set_num_threads(threads)


def ready_pool() -> WorkerPool:
    pool = WorkerPool(1)
    pool.start()
    deadline = time.monotonic() + HANG
    while pool.ready < 1 and time.monotonic() < deadline:
        pool.wait(0.2)
    assert pool.ready == 1
    return pool


def worker_pid(pool: WorkerPool) -> int:
    pid = pool._workers[0].process.pid
    assert isinstance(pid, int)
    return pid


def collect(pool: WorkerPool, until: Any) -> None:
    deadline = time.monotonic() + HANG
    while not until() and time.monotonic() < deadline:
        pool.wait(0.2)
    assert until(), "the pool never delivered"


@pytest.mark.slow
def test_a_worker_killed_during_a_chunk_is_replaced_and_the_chunk_trained_again() -> None:
    # The previous version: the SIGKILL of one worker broke the whole process pool
    # (BrokenProcessPool, a traceback); here the chunk trains again on a fresh worker.
    scenario = tiny_map(steps=1500)
    text, chunk = dumps_scenario(scenario), plan(scenario)[0]
    messages: list[tuple[str, Any]] = []
    pool = ready_pool()
    try:
        first = worker_pid(pool)
        pool.submit(
            Job(pool.new_run_id(), CHUNK, text, chunk.batch_size, chunk=chunk),
            lambda kind, run, batch, payload: messages.append((kind, payload)),
        )
        time.sleep(0.5)  # inside the chunk (about 2 s of training)
        os.kill(first, signal.SIGKILL)
        collect(pool, lambda: any(kind == "done" for kind, _ in messages))
        assert pool.replaced == 1 and worker_pid(pool) != first and not alive(first)
    finally:
        pool.shutdown()
    kinds = [kind for kind, _ in messages]
    assert kinds == ["rows", "done"]  # the rows once, from the retried chunk
    assert table_csv(messages[0][1], header=False) == rows_in_this_process(text, chunk)


@pytest.mark.slow
def test_a_chunk_that_kills_its_worker_twice_is_reported_and_the_pool_goes_on() -> None:
    scenario = tiny_map(steps=1500)
    text, chunks = dumps_scenario(scenario), plan(scenario)
    messages: list[tuple[int, str, Any]] = []
    pool = ready_pool()
    try:
        doomed = pool.new_run_id()
        pool.submit(
            Job(doomed, CHUNK, text, chunks[0].batch_size, chunk=chunks[0]),
            lambda kind, run, batch, payload: messages.append((run, kind, payload)),
        )
        for deaths in (1, 2):  # the worker, then its replacement while it holds the same chunk
            time.sleep(0.3)
            os.kill(worker_pid(pool), signal.SIGKILL)
            # Until the pool has seen it die: a killed process with threads is a zombie in
            # /proc before waitpid can reap it, so /proc alone says too early.
            assert wait_for(lambda n=deaths: pool.poll() >= 0 and pool.replaced == n, HANG)
        collect(pool, lambda: any(kind == "error" for _, kind, _ in messages))
        error = next(payload for _, kind, payload in messages if kind == "error")
        assert "twice" in error and error.count(".") == 1  # one sentence
        later = pool.new_run_id()
        pool.submit(
            Job(later, CHUNK, text, chunks[-1].batch_size, chunk=chunks[-1]),
            lambda kind, run, batch, payload: messages.append((run, kind, payload)),
        )
        collect(pool, lambda: any(run == later and kind == "done" for run, kind, _ in messages))
    finally:
        pool.shutdown()
    rows = [payload for run, kind, payload in messages if run == later and kind == "rows"]
    assert [table_csv(r, header=False) for r in rows] == [rows_in_this_process(text, chunks[-1])]


def test_shutdown_with_work_queued_ends_the_workers_at_once() -> None:
    # The previous version's shutdown could wait for ever in a queue's join_thread() when
    # work was still queued (`shot` with two maps); the OS must see every worker gone.
    scenario = tiny_map(steps=3000)
    text = dumps_scenario(scenario)
    pool = WorkerPool(1)
    pool.start()
    run_id = pool.new_run_id()
    for chunk in plan(scenario) * 4:  # far more than the worker does before shutdown
        pool.submit(Job(run_id, CHUNK, text, chunk.batch_size, chunk=chunk), lambda *a: None)
    pid = worker_pid(pool)
    wait_for(lambda: pool.ready == 1 or pool.poll() < 0, HANG)
    time.sleep(0.3)  # training its first chunk now
    began = time.monotonic()
    pool.shutdown()
    took = time.monotonic() - began
    assert not alive(pid)
    assert took < 10.0  # the bound on a hang; shutdown's own limit is 2 s


def test_workers_end_with_a_parent_that_was_killed(tmp_path: Path, mark: str) -> None:
    # The previous version's workers went on training for as long as their job lasted once
    # their parent was killed (and kept the resource tracker alive with them).
    script = tmp_path / "parent.py"
    script.write_text(
        textwrap.dedent(
            """\
            import sys, time
            from core.maps import plan
            from core.pool import WorkerPool
            from core.scenario import dumps_scenario
            from core.work import CHUNK, Job
            from tests.tiny_presets import tiny_map

            if __name__ == "__main__":
                scenario = tiny_map(steps=200000)  # minutes of training
                text = dumps_scenario(scenario)
                pool = WorkerPool(1)
                chunk = plan(scenario)[0]
                pool.submit(Job(pool.new_run_id(), CHUNK, text, chunk.batch_size, chunk=chunk),
                            lambda *a: None)
                while pool.ready < 1:
                    pool.wait(0.2)
                print("training", flush=True)
                time.sleep(600)
            """
        )
    )
    with subprocess.Popen(
        [sys.executable, str(script)],
        env=marked_env(mark),
        stdout=subprocess.PIPE,
        stderr=subprocess.DEVNULL,
        text=True,
    ) as parent:
        try:
            assert parent.stdout is not None and parent.stdout.readline() == "training\n"
            time.sleep(0.5)
            spawned = [pid for pid in carrying(mark) if pid != parent.pid]
            assert spawned  # the worker and the resource tracker
        finally:
            parent.kill()
            parent.wait(timeout=HANG)
    assert gone(mark, 10.0) == []


@pytest.fixture
def fan(tmp_path: Path) -> FanModel:
    path = tmp_path / "s.study.toml"
    path.write_text(STUDY)
    scenario = load_study(path).entries[1].scenario
    assert scenario is not None
    return FanModel("Quick blobs", scenario)


def test_a_fan_trains_the_members_near_the_slider_first_smallest_batch_first(
    fan: FanModel,
) -> None:
    focus = float(fan_factors()[4])
    jobs = fan_jobs(fan, focus)
    sizes = sorted(fan.batch_sizes)
    members = fan_members(fan.scenario)
    first = [j for j in jobs if j.near]
    assert jobs[: len(first)] == first  # the near stacks before any other
    assert sorted({j.batch_size for j in first}) == sizes
    assert [j.batch_size for j in first] == sorted(j.batch_size for j in first)
    near = {round(float(f), 6) for f in fan_factors()[2:7]}
    for job in first:
        fanned = [members[c] for c in job.columns if members[c].method != "none"]
        assert {round(m.threshold / 0.5, 6) for m in fanned} == near  # the preset's is 0.5
    assert all(any(members[c].method == "none" for c in j.columns) for j in first[:1])
    rest = jobs[len(first) :]
    order = [j.batch_size for j in rest]
    assert order == sorted(order, reverse=True)  # the costliest first
    for size in sizes:
        every = sorted(c for j in jobs if j.batch_size == size for c in j.columns)
        assert every == list(range(len(members)))  # each member exactly once per batch size


def test_each_fan_stack_holds_one_clipping_method(fan: FanModel) -> None:
    members = fan_members(fan.scenario)
    for focus in (None, 1.0):
        for job in fan_jobs(fan, focus):
            methods = {members[c].method for c in job.columns} - {"none"}
            assert len(methods) == 1
            if "none" in {members[c].method for c in job.columns}:
                assert not members[job.columns[-1]].clip.spec.per_example


def test_an_urgent_job_overtakes_the_jobs_waiting_in_the_queue(
    fan: FanModel, tmp_path: Path
) -> None:
    pool = WorkerPool(1)
    order: list[str] = []

    def handler(name: str) -> Any:
        def handle(kind: str, run_id: int, batch: int, payload: Any) -> None:
            if kind == "done":
                order.append(name)
            elif kind == "error":
                order.append(f"{name} failed: {payload}")

        return handle

    text = dumps_scenario(fan.scenario)
    columns = tuple(range(len(fan_members(fan.scenario))))
    try:
        for i in range(4):
            job = Job(pool.new_run_id(), FAN, text, 16, columns, priority=FAR)
            pool.submit(job, handler(f"fan {i}"))
        log = LogSource(SCENARIOS / "logs" / "example-run.csv")
        pool.submit(Job(pool.new_run_id(), LOG, "", log=log, priority=URGENT), handler("log"))
        deadline = time.monotonic() + 120
        while len(order) < 5 and time.monotonic() < deadline:
            pool.wait(0.5)
    finally:
        pool.shutdown()
    # Two jobs were with the worker when the log's arrived; it went before the other two.
    assert order == ["fan 0", "fan 1", "log", "fan 2", "fan 3"]


@pytest.mark.skipif(not hasattr(os, "nice"), reason="niceness is POSIX")
def test_a_windows_workers_run_at_a_lower_priority_than_the_window() -> None:
    pool = WorkerPool(1, nice=10)
    try:
        pool.start()
        deadline = time.monotonic() + 60
        while not pool.ready and time.monotonic() < deadline:
            pool.wait(0.2)
        pid = pool._workers[0].process.pid
        # /proc/PID/stat field 19 is the nice value (proc(5)); the test process's own is 0 here.
        fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
        own = Path("/proc/self/stat").read_text().rsplit(")", 1)[1].split()
        assert int(fields[16]) == int(own[16]) + 10
    finally:
        pool.shutdown()


def test_a_member_trains_the_same_in_its_method_stack_as_in_one_of_every_member(
    fan: FanModel,
) -> None:
    """The fan's plan splits the stacks by method; a member's numbers must not depend on its
    stack (bit for bit: every member's arithmetic is its own rows of each batched product)."""
    from core.engine import Engine

    members = fan_members(fan.scenario)
    batch = sorted(fan.batch_sizes)[-1]

    def trained(columns: tuple[int, ...]) -> dict[int, list[float]]:
        engine = Engine(fan.scenario, [members[c] for c in columns], batch, keep_norms=True)
        out: dict[int, list[float]] = {c: [] for c in columns}
        for record in engine.records():
            for slot, c in enumerate(columns):
                out[c] += [float(record.values[k][slot]) for k in ("val_loss", "grad_norm_pre")]
        return out

    whole = trained(tuple(range(len(members))))
    for job in fan_jobs(fan, None):
        if job.batch_size == batch:
            for column, series in trained(job.columns).items():
                assert series == whole[column]
