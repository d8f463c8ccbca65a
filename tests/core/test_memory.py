"""The memory estimate against the operating system's count, and what it refuses before any
training starts. Each refusal test names the old behaviour it guards against (issue 12)."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

from app.cli import main
from core import memory
from core.map_run import run_map
from core.scenario import parse_scenario
from tests.conftest import REPO
from tests.os_processes import workers_of
from tests.tiny_presets import tiny_map

LAPTOP_FREE = 8 * 2**30  # what a laptop has free: the refusals must not depend on this machine

# The settings that reached 14 GB in the previous version (and kept growing) after `check`
# passed: every key in range, the whole far too large.
RUNAWAY = """\
schema = 2
name = "Runaway"

[data]
task = "blobs"
dim = 512
n_train = 200000
n_val = 200000

[model]
hidden = [4096, 4096]

[train]
batch_size = 65536
steps = 10
"""


@pytest.fixture
def runaway(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    monkeypatch.setattr(memory, "available_bytes", lambda: LAPTOP_FREE)
    path = tmp_path / "runaway.toml"
    path.write_text(RUNAWAY)
    return path


@pytest.mark.parametrize(
    "command", [["check"], ["train"], ["map", "--jobs", "1"]], ids=["check", "train", "map"]
)
def test_settings_that_cannot_fit_are_refused_in_one_sentence_before_training(
    command: list[str], runaway: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    args = [command[0], str(runaway), *command[1:]]
    if command[0] == "map":
        args += ["--out", str(tmp_path / "out")]
    assert main(args) == 2
    captured = capsys.readouterr()
    errors = [line for line in captured.err.splitlines() if line.startswith("error: ")]
    assert len(errors) == 1 and "Traceback" not in captured.err
    assert "needs about" in errors[0] and "and 8.00 GB is free" in errors[0]
    assert "ok:" not in captured.out and "val loss" not in captured.out
    assert not (tmp_path / "out").exists()


def test_more_than_eight_hidden_layers_are_refused(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # The previous version took a hidden list of any length.
    path = tmp_path / "deep.toml"
    path.write_text('[model]\nhidden = [8, 8, 8, 8, 8, 8, 8, 8, 8]\n[[clip]]\nmethod = "none"\n')
    assert main(["check", str(path)]) == 2
    err = capsys.readouterr().err
    assert "model.hidden lists 9 hidden layers; at most 8 are allowed." in err


def test_jobs_are_capped_by_the_cores(tmp_path: Path) -> None:
    # The previous version started 64 processes for --jobs 64 on two cores (10 GB).
    seen: list[int] = []
    said: list[str] = []
    run_map(
        tiny_map(),
        tmp_path,
        jobs=64,
        on_progress=lambda p: seen.append(len(workers_of(os.getpid()))),
        warn=said.append,
    )
    cores = os.cpu_count() or 1
    assert max(seen) == cores - 1  # one process per core: the workers, and this one trains too
    assert said == [
        f"--jobs 64: {cores} process{'' if cores == 1 else 'es'} at once, as many as {cores} "
        "cores and the free memory take."
    ]


def test_jobs_are_capped_by_free_memory(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    scenario = tiny_map()
    one = memory.estimate(scenario, *memory.map_sizes(scenario)).total
    monkeypatch.setattr(memory, "available_bytes", lambda: int(one * 1.5))  # room for one
    seen: list[int] = []
    run_map(
        scenario, tmp_path, jobs=4, on_progress=lambda p: seen.append(len(workers_of(os.getpid())))
    )
    assert max(seen) == 0


# Shapes where each part of the estimate dominates in turn; each needs about a gigabyte.
SHAPES = {
    "data": {
        "data": {"task": "blobs", "dim": 8, "n_train": 200000, "n_val": 200000},
        "model": {"hidden": [16]},
        "train": {"batch_size": 256, "steps": 20},
    },
    "activations": {
        "data": {"task": "blobs", "dim": 64, "n_train": 100000, "n_val": 20000},
        "model": {"hidden": [512, 512]},
        "train": {"batch_size": 2048, "steps": 20},
    },
    "parameters": {
        "data": {"task": "blobs", "dim": 512, "n_train": 2000, "n_val": 500},
        "model": {"hidden": [2048, 2048]},
        "train": {"batch_size": 64, "steps": 10, "optimizer": "adam"},
    },
    "traced steps": {
        "data": {"task": "linear", "dim": 8, "n_train": 5000, "n_val": 500},
        "model": {"kind": "linear"},
        "train": {"batch_size": 4096, "steps": 1500, "eval_every": 500},
    },
}


@pytest.mark.slow
@pytest.mark.parametrize("shape", list(SHAPES))
def test_the_estimate_is_not_below_the_peak_the_system_measures(shape: str) -> None:
    # VmHWM: the kernel's count of the most resident memory this process image held. (Not
    # ru_maxrss: Linux folds the forking parent's peak into it at exec, so a child of a large
    # pytest process would report the parent's size.)
    trace = shape == "traced steps"
    script = textwrap.dedent(
        f"""\
        import json
        from core.engine import Engine
        from core.member import run_members
        from core.results import collect
        from core.scenario import parse_scenario
        scenario = parse_scenario(json.loads({json.dumps(json.dumps(SHAPES[shape]))}))
        collect(Engine(scenario, run_members(scenario), trace={trace}))
        status = open("/proc/self/status").read().split("VmHWM:")[1]
        print(int(status.split()[0]) * 1024)
        """
    )
    done = subprocess.run(
        [sys.executable, "-c", script],
        env={**os.environ, "PYTHONPATH": str(REPO)},
        capture_output=True,
        text=True,
        timeout=600,
        check=True,
    )
    peak = int(done.stdout.split()[-1])
    scenario = parse_scenario(SHAPES[shape])
    need = memory.estimate(scenario, len(scenario.clip), scenario.train.batch_size, trace=trace)
    assert peak <= need.total, f"measured {peak / 2**30:.2f} GB, estimated {need.describe()}"


def test_check_names_the_entry_of_a_study_that_cannot_fit(
    runaway: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    study = runaway.parent / "big.study.toml"
    study.write_text(
        'schema = 2\ntitle = "Big"\n[[entry]]\nkind = "map"\ntitle = "Too big"\n'
        'preset = "runaway.toml"\n'
    )
    assert main(["check", str(study)]) == 2
    err = capsys.readouterr().err
    assert f"error: {study}: entry 1 ('Too big'): Runaway: training a map chunk needs about" in err
