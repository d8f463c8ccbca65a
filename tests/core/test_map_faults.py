"""A map under random kills: a worker, then the parent, SIGKILLed at random moments. Resumed, it
ends each time with the table of an uninterrupted map, byte for byte, and the operating system
shows no process of it left (workers and the resource tracker included).

SIGKILL runs no handler: whatever the moment (a worker importing torch or mid-chunk, the parent
mid-append), what is on file must be only finished rows and a torn tail at most. The previous
version lost or duplicated rows, and its workers outlived a killed parent.
"""

from __future__ import annotations

import os
import random
import signal
import time
from pathlib import Path

import pytest

from core.map_run import run_map
from tests.os_processes import gone, kill_all, new_mark, start, wait_for, workers_of
from tests.tiny_presets import tiny_map, tiny_map_text

TRIALS = 20
HANG = 120.0  # seconds: a bound on a hang, not a measure of speed


@pytest.fixture(scope="module")
def reference(tmp_path_factory: pytest.TempPathFactory) -> bytes:
    out = tmp_path_factory.mktemp("uninterrupted")
    run_map(tiny_map(), out, jobs=1)
    return (out / "map.csv").read_bytes()


@pytest.mark.slow
@pytest.mark.parametrize("seed", range(TRIALS))
def test_a_map_killed_at_random_resumes_to_the_uninterrupted_table(
    seed: int, tmp_path: Path, reference: bytes
) -> None:
    rng = random.Random(seed)
    preset = tmp_path / "tiny.toml"
    preset.write_text(tiny_map_text())
    out = tmp_path / "out"
    mark = new_mark()
    parent = start(["map", str(preset), "--out", str(out), "--jobs", "2"], mark)
    try:
        assert wait_for(lambda: workers_of(parent.pid) or parent.poll() is not None, HANG)
        time.sleep(rng.uniform(0.0, 3.5))  # importing torch, or inside a chunk, or between
        workers = workers_of(parent.pid)
        if workers:
            os.kill(rng.choice(workers), signal.SIGKILL)
        time.sleep(rng.uniform(0.1, 2.5))  # its replacement starting, a chunk being appended
        if parent.poll() is None:
            parent.send_signal(signal.SIGKILL)
        parent.communicate(timeout=HANG)
        assert parent.returncode in (0, -signal.SIGKILL)
        assert gone(mark, 10.0) == []
    finally:
        kill_all(mark)
        parent.kill()
        parent.communicate()

    table = out / "map.csv"
    if table.exists():  # nothing on file that an uninterrupted map does not hold
        finished = table.read_text().split("\n")[:-1]  # the last piece may be a torn line
        assert set(finished) <= set(reference.decode().split("\n"))
    run_map(tiny_map(), out, jobs=1, resume=True)
    assert table.read_bytes() == reference
