"""The worker pool: the most urgent job first, workers niced for a window, and a fan's members
under the slider trained before the rest."""

from __future__ import annotations

import os
import time
from pathlib import Path
from typing import Any

import pytest

from core.fan import fan_factors, fan_members
from core.fan_model import FanModel
from core.log_entry import LogSource
from core.pool import WorkerPool
from core.runner import fan_jobs
from core.scenario import dumps_scenario
from core.study_file import load_study
from core.work import FAN, FAR, LOG, URGENT, Job
from tests.app.conftest import STUDY
from tests.conftest import SCENARIOS


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
    first = jobs[: len(sizes)]
    assert [b for b, _ in first] == sizes
    for _, columns in first:
        fanned = [members[c] for c in columns if members[c].method != "none"]
        factors = {round(m.threshold / 0.5, 6) for m in fanned}  # the preset's threshold is 0.5
        near = {round(float(f), 6) for f in fan_factors()[2:7]}
        assert factors == near
        assert any(members[c].method == "none" for c in columns)
    rest = jobs[len(sizes) :]
    assert [b for b, _ in rest] == sorted(sizes, reverse=True)  # the costliest first
    every = sorted(c for _, columns in jobs if _ == sizes[0] for c in columns)
    assert every == list(range(len(members)))  # each member exactly once per batch size


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
