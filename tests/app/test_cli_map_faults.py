"""`gradfence map` stopped from outside: SIGTERM, and workers killed. Finished members are kept,
the way to go on is one sentence to paste, and the operating system sees no process left. Each
test names the old behaviour it guards against (issue 12)."""

from __future__ import annotations

import os
import shlex
import signal
import time
from pathlib import Path

import pytest

from app.cli import main
from core.map_run import run_map
from core.maps import read_table
from core.scenario import load_scenario
from tests.os_processes import gone, start, wait_for, workers_of
from tests.tiny_presets import tiny_map_text

HANG = 120.0  # seconds: bounds on a hang, not measures of speed


def first_rows(table: Path) -> bool:
    return table.exists() and len(table.read_text().splitlines()) > 1


@pytest.mark.slow
def test_sigterm_stops_a_map_like_ctrl_c(
    tmp_path: Path, mark: str, capsys: pytest.CaptureFixture[str]
) -> None:
    # The previous version died at once on SIGTERM: workers and the resource tracker ran on
    # for over a minute, and nothing said how to go on.
    preset = tmp_path / "tiny.toml"
    preset.write_text(tiny_map_text(steps=400))
    out = tmp_path / "out"
    args = ["map", str(preset), "--set", "train.lr=0.03", "--out", str(out), "--jobs", "2"]
    process = start(args, mark)
    assert wait_for(lambda: first_rows(out / "map.csv") and workers_of(process.pid), HANG)
    process.send_signal(signal.SIGTERM)
    began = time.monotonic()
    _, err = process.communicate(timeout=10)  # the bound on a hang
    ended = time.monotonic() - began
    assert gone(mark, 10.0) == []  # workers and the resource tracker included
    assert process.returncode != 0 and "Traceback" not in err
    assert ended < 10.0
    assert 0 < len(read_table(out / "map.csv")) < 108
    # The sentence holds the command to paste, overrides and all; it resumes to the table an
    # uninterrupted map makes.
    resume = err.split("continue with `")[1].split("`")[0]
    words = shlex.split(resume)
    assert words[:2] == ["gradfence", "map"] and "--resume" in words and "train.lr=0.03" in words
    assert main([*words[1:], "--jobs", "1"]) == 0
    whole = tmp_path / "whole"
    run_map(load_scenario(preset).with_overrides({"train.lr": 0.03}), whole, jobs=1)
    assert (out / "map.csv").read_bytes() == (whole / "map.csv").read_bytes()
    capsys.readouterr()


@pytest.mark.slow
def test_a_chunk_whose_worker_is_killed_twice_ends_the_map_in_one_sentence(
    tmp_path: Path, mark: str
) -> None:
    # The previous version printed a BrokenProcessPool traceback after one SIGKILL, with no
    # word on how to go on.
    preset = tmp_path / "tiny.toml"
    preset.write_text(tiny_map_text(steps=400))
    out = tmp_path / "out"
    process = start(["map", str(preset), "--out", str(out), "--jobs", "2"], mark)
    killed: list[int] = []
    for _ in range(2):  # the worker, then the one that took its chunks over

        def fresh_worker() -> list[int]:
            return [w for w in workers_of(process.pid) if w not in killed]

        assert wait_for(fresh_worker, HANG)
        victim = fresh_worker()[0]
        os.kill(victim, signal.SIGKILL)
        killed.append(victim)
    _, err = process.communicate(timeout=HANG)
    assert gone(mark, 10.0) == []
    assert process.returncode == 2, err
    lines = [line for line in err.splitlines() if line.startswith("error: ")]
    assert len(lines) == 1 and "Traceback" not in err
    assert "failed in a worker: a worker process ended while training this, twice" in lines[0]
    assert f"continue with `gradfence map {preset} --out {out} --resume`." in lines[0]
