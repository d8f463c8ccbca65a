"""Maps on a Dask distributed cluster: the local workers' table, resuming, and clear failures."""

from __future__ import annotations

import asyncio
import hashlib
import importlib.metadata
import json
import logging
import os
import signal
import socket
import sys
import threading
import time
import tomllib
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import pytest
from distributed import LocalCluster

import core
from app.cli import main
from core.cluster import execute_on_cluster
from core.errors import GradfenceInputError
from core.map_run import MapProgress, run_map
from core.maps import Chunk, Point, plan, read_table, table_csv
from core.scenario import Scenario, parse_scenario
from tests.core.test_maps import SMALL


@pytest.fixture(scope="module", autouse=True)
def dask_offload_thread() -> None:
    """Start the one thread dask.distributed keeps for the life of the process.

    It (de)serialises large messages on a process-wide pool that is never shut down; starting it
    before the leak check takes its snapshot means only what a test opens is counted.
    """
    from distributed.utils import offload

    async def start() -> None:
        await offload(int)

    asyncio.run(start())


@pytest.fixture(scope="module")
def local_run(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The small map on local workers: the table every cluster run must reproduce."""
    out = tmp_path_factory.mktemp("local")
    run_map(small(), out, jobs=1)
    return out


def small() -> Scenario:
    return parse_scenario(tomllib.loads(SMALL))


@contextmanager
def local_cluster(workers: int) -> Iterator[LocalCluster]:
    """A scheduler in this process and `workers` worker processes of one thread each."""
    with LocalCluster(
        n_workers=workers,
        threads_per_worker=1,
        processes=True,
        # Any free port for the scheduler's web server: 8787 may be taken by another cluster,
        # and dask warns when it is.
        dashboard_address=":0",
        silence_logs=logging.CRITICAL,  # the failure tests make workers log their errors
    ) as cluster:
        yield cluster


def closed_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def error_line(err: str) -> str:
    lines = [line for line in err.splitlines() if line.startswith("error:")]
    assert len(lines) == 1, err
    return lines[0]


def test_a_map_on_a_local_dask_cluster_writes_the_local_workers_table_byte_for_byte(
    tmp_path: Path, local_run: Path
) -> None:
    with local_cluster(2) as cluster:
        run_map(small(), tmp_path, cluster=cluster.scheduler_address)
    assert (tmp_path / "map.csv").read_bytes() == (local_run / "map.csv").read_bytes()


def test_a_map_resumed_on_a_cluster_trains_only_the_missing_stacks_to_the_same_table(
    tmp_path: Path, local_run: Path
) -> None:
    scenario = small()
    chunks = plan(scenario)
    assert [c.batch_size for c in chunks] == [8, 16, 32]  # one stack per batch size
    # As if a map had been stopped after its batch-size-16 stack: that stack's rows on file.
    on_file = [r for r in read_table(local_run / "map.csv") if r["batch_size"] == 16]
    text = table_csv(on_file, header=True).encode()
    (tmp_path / "map.csv").write_bytes(text)
    state = json.loads((local_run / "map-state.json").read_text())
    state["table"] = {"bytes": len(text), "sha256": hashlib.sha256(text).hexdigest()}
    (tmp_path / "map-state.json").write_text(json.dumps(state))  # vouching for that table

    progress: list[MapProgress] = []
    with local_cluster(2) as cluster:
        address = cluster.scheduler_address
        run_map(scenario, tmp_path, resume=True, on_progress=progress.append, cluster=address)
    assert (progress[0].done, progress[-1].done, progress[-1].computed) == (1, 3, 2)
    assert (tmp_path / "map.csv").read_bytes() == (local_run / "map.csv").read_bytes()


def test_ctrl_c_during_a_cluster_map_cancels_its_stacks_and_says_how_to_resume(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    preset = tmp_path / "small.toml"
    preset.write_text(SMALL)
    table = tmp_path / "out" / "map.csv"

    def press_ctrl_c_after_the_first_stack() -> None:
        deadline = time.monotonic() + 120
        while time.monotonic() < deadline:
            if table.exists() and len(table.read_text().splitlines()) > 1:
                break
            time.sleep(0.05)
        os.kill(os.getpid(), signal.SIGINT)

    with local_cluster(2) as cluster:
        presser = threading.Thread(target=press_ctrl_c_after_the_first_stack)
        presser.start()
        code = main(
            [
                "map",
                str(preset),
                "--out",
                str(table.parent),
                "--cluster",
                cluster.scheduler_address,
            ]
        )
        presser.join()
        deadline = time.monotonic() + 10
        while cluster.scheduler.tasks and time.monotonic() < deadline:
            time.sleep(0.05)
        left = len(cluster.scheduler.tasks)
    err = capsys.readouterr().err
    assert code == 1 and "--resume" in err and "Traceback" not in err
    assert left == 0  # the stacks not yet finished were cancelled, not left to run
    assert 0 < len(read_table(table)) < 54


def test_the_cluster_option_without_the_cluster_extra_fails_with_one_sentence(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    monkeypatch.setitem(sys.modules, "distributed", None)  # as if dask were not installed
    preset = tmp_path / "small.toml"
    preset.write_text(SMALL)
    code = main(
        ["map", str(preset), "--out", str(tmp_path / "out"), "--cluster", "tcp://127.0.0.1:8786"]
    )
    err = capsys.readouterr().err
    assert code == 2 and "Traceback" not in err
    assert error_line(err) == (
        "error: --cluster needs the cluster extra: pip install 'gradfence[cluster]'."
    )


def test_a_cluster_address_that_does_not_answer_fails_with_one_sentence_naming_it(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    preset = tmp_path / "small.toml"
    preset.write_text(SMALL)
    address = f"tcp://127.0.0.1:{closed_port()}"
    started = time.monotonic()
    code = main(
        [
            "map",
            str(preset),
            "--out",
            str(tmp_path / "out"),
            "--cluster",
            address,
            "--cluster-timeout",
            "0.5",
        ]
    )
    err = capsys.readouterr().err
    assert code == 2 and "Traceback" not in err
    line = error_line(err)
    assert f"nothing answers at {address} within 0.5 s" in line and "`dask scheduler`" in line
    assert line.endswith(".") and line.count(". ") == 0
    assert time.monotonic() - started < 5


def test_a_port_that_accepts_but_does_not_speak_dask_fails_in_bounded_time() -> None:
    # The kernel completes the connection from the backlog; nothing ever answers on it, as
    # when the address names a web server (a dashboard) instead of the scheduler.
    with socket.socket() as silent:
        silent.bind(("127.0.0.1", 0))
        silent.listen()
        address = f"tcp://127.0.0.1:{silent.getsockname()[1]}"
        started = time.monotonic()
        with pytest.raises(GradfenceInputError, match="does not answer as a Dask scheduler"):
            list(execute_on_cluster(address, SMALL, plan(small()), timeout=0.3))
    assert time.monotonic() - started < 5


def test_jobs_and_cluster_together_are_refused_with_one_sentence(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    preset = tmp_path / "small.toml"
    preset.write_text(SMALL)
    code = main(["map", str(preset), "--jobs", "2", "--cluster", "tcp://127.0.0.1:8786"])
    assert code == 2
    assert error_line(capsys.readouterr().err).startswith(
        "error: --jobs does not apply with --cluster"
    )


def test_a_stack_that_fails_on_a_worker_is_named_by_batch_size_and_the_workers_error() -> None:
    broken = Chunk(8, (Point(clip_index=7, threshold=1.0, batch_size=8, seed=0),))  # no 8th clip
    with local_cluster(1) as cluster, pytest.raises(GradfenceInputError) as failure:
        list(execute_on_cluster(cluster.scheduler_address, SMALL, [broken]))
    message = str(failure.value)
    assert message.startswith("a Dask worker failed the stack of batch size 8 (IndexError: ")
    assert "\n" not in message


def test_a_worker_with_another_gradfence_version_is_refused_before_any_stack_is_sent(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    monkeypatch.setattr(core, "__version__", "0.0.1")  # this machine, as if older
    with local_cluster(1) as cluster, pytest.raises(GradfenceInputError) as failure:
        list(execute_on_cluster(cluster.scheduler_address, SMALL, plan(small())))
    assert f"has Gradfence {importlib.metadata.version('gradfence')} with torch" in str(
        failure.value
    )
    assert "this machine Gradfence 0.0.1" in str(failure.value)
