"""Sweeps: batch size x threshold x seed, trained as stacks on persistent worker processes.

A sweep is cut into chunks (one batch size, at most CHUNK members each) that depend on the
scenario alone, never on the number of workers, so every point's numbers are the same whatever
`jobs` is and a resumed sweep ends with the same table as an uninterrupted one.
"""

from __future__ import annotations

import csv
import io
import json
import math
import multiprocessing
import os
from collections import deque
from collections.abc import Callable, Iterator
from concurrent.futures import FIRST_COMPLETED, Future, ProcessPoolExecutor, wait
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np

from core.engine import Engine, Member
from core.errors import GradfenceInputError
from core.fileio import write_text_atomic
from core.results import collect, format_value
from core.scenario import Scenario, dumps_scenario, loads_scenario

CHUNK = 24  # members per stack: large enough to batch well, small enough to spread over cores
COLUMNS = (
    "method",
    "label",
    "threshold",
    "batch_size",
    "seed",
    "final_val_loss",
    "diverged",
    "clipped_share",
    "clean_clipped_share",
    "outlier_share",
    "outlier_pass",
)
STATE_FILE = "sweep-state.json"


@dataclass(frozen=True)
class Point:
    """One grid point of a sweep: a [[clip]] table at one threshold, batch size and seed."""

    clip_index: int
    threshold: float
    batch_size: int
    seed: int

    def key(self, scenario: Scenario) -> tuple[str, str, int, int]:
        label = scenario.clip[self.clip_index].display_name
        return (label, _threshold_text(self.threshold), self.batch_size, self.seed)


@dataclass(frozen=True)
class Chunk:
    batch_size: int
    points: tuple[Point, ...]

    @property
    def cost(self) -> float:
        return float(self.batch_size * len(self.points))


def plan(scenario: Scenario) -> list[Chunk]:
    """Every point of the sweep, grouped into stacks of one batch size."""
    chunks = []
    for batch in scenario.sweep.batch_sizes:
        points = [
            Point(i, t, batch, seed)
            for i, clip in enumerate(scenario.clip)
            for t in scenario.thresholds_for(clip)
            for seed in scenario.sweep.seeds
        ]
        for start in range(0, len(points), CHUNK):
            chunks.append(Chunk(batch, tuple(points[start : start + CHUNK])))
    return chunks


def members_of(scenario: Scenario, chunk: Chunk) -> list[Member]:
    out = []
    for p in chunk.points:
        clip = scenario.clip[p.clip_index]
        threshold = None if math.isnan(p.threshold) else p.threshold
        out.append(Member(replace(clip, threshold=threshold), p.seed))
    return out


def run_chunk(scenario_text: str, chunk: Chunk) -> list[dict[str, Any]]:
    """Train one chunk and summarise each member (runs inside a worker process)."""
    scenario = loads_scenario(scenario_text, "<sweep>")
    members = members_of(scenario, chunk)
    result = collect(Engine(scenario, members, chunk.batch_size))
    clean_steps = result.metric("batch_outliers") == 0  # (logged, K)
    rows = []
    for i, (point, member) in enumerate(zip(chunk.points, members, strict=True)):
        share = result.metric("clipped_share")[:, i]
        clean_share = share[clean_steps[:, i]]
        rows.append(
            {
                "method": member.method,
                "label": member.name,
                "threshold": point.threshold,
                "batch_size": chunk.batch_size,
                "seed": point.seed,
                "final_val_loss": float(result.final("val_loss")[i]),
                "diverged": result.diverged_at[i] is not None,
                "clipped_share": _mean(share),
                "clean_clipped_share": _mean(clean_share),
                "outlier_share": _mean(result.metric("outlier_share")[:, i]),
                "outlier_pass": _mean(result.metric("outlier_pass")[:, i]),
            }
        )
    return rows


def _mean(values: np.ndarray) -> float:
    finite = values[np.isfinite(values)]
    return float(finite.mean()) if finite.size else math.nan


def _threshold_text(threshold: float) -> str:
    return "" if math.isnan(threshold) else repr(float(threshold))


def _init_worker() -> None:
    import signal

    import torch

    torch.set_num_threads(1)  # several workers share the cores; one thread each
    # Ctrl-C goes to the whole process group: the parent decides what stops, not each worker.
    signal.signal(signal.SIGINT, signal.SIG_IGN)


@dataclass
class SweepProgress:
    done: int
    total: int
    computed: int  # chunks computed in this call (not resumed)


def run_sweep(
    scenario: Scenario,
    out: Path,
    jobs: int | None = None,
    resume: bool = False,
    on_progress: Callable[[SweepProgress], None] | None = None,
) -> list[dict[str, Any]]:
    """Run every chunk not already in `out/sweep.csv`; returns the full table, sorted.

    Rows are appended to sweep.csv as chunks finish, so an interrupted sweep keeps its finished
    points; at the end the table is rewritten in grid order.
    """
    out.mkdir(parents=True, exist_ok=True)
    table_path, state_path = out / "sweep.csv", out / STATE_FILE
    scenario_hash = scenario.hash()
    done_rows: list[dict[str, Any]] = []
    if resume and table_path.exists():
        state = json.loads(state_path.read_text()) if state_path.exists() else {}
        if state.get("scenario_hash") != scenario_hash:
            raise GradfenceInputError(
                f"{out}: the sweep there was made from another scenario "
                f"(hash {state.get('scenario_hash')}, this one {scenario_hash}); "
                "use another --out folder or drop --resume."
            )
        done_rows = read_table(table_path)
    elif table_path.exists() and not resume:
        table_path.unlink()
    write_text_atomic(state_path, json.dumps({"scenario_hash": scenario_hash}) + "\n")

    chunks = plan(scenario)
    finished = {_row_key(r) for r in done_rows}
    todo = [c for c in chunks if not all(p.key(scenario) in finished for p in c.points)]
    # A chunk only partly on file (a kill that tore its append) is redone whole.
    keep = {p.key(scenario) for c in chunks if c not in todo for p in c.points}
    done_rows = [r for r in done_rows if _row_key(r) in keep]
    # Start from a clean file: finished chunks only, no torn line for new rows to join.
    write_text_atomic(table_path, table_csv(done_rows, header=True))
    progress = SweepProgress(len(chunks) - len(todo), len(chunks), 0)
    if on_progress:
        on_progress(replace(progress))

    text = dumps_scenario(scenario)
    rows = list(done_rows)
    for chunk_rows in _execute(text, sorted(todo, key=lambda c: -c.cost), jobs):
        rows += chunk_rows
        with table_path.open("a", encoding="utf-8", newline="") as f:
            f.write(table_csv(chunk_rows, header=False))
            f.flush()
            os.fsync(f.fileno())
        progress.done += 1
        progress.computed += 1
        if on_progress:
            on_progress(replace(progress))

    rows = sort_table(scenario, rows)
    write_text_atomic(table_path, table_csv(rows, header=True))
    return rows


def _execute(text: str, chunks: list[Chunk], jobs: int | None) -> Iterator[list[dict[str, Any]]]:
    """Yield each chunk's rows as it finishes.

    With jobs = N, N - 1 worker processes take chunks from the costly end of the queue while
    this process takes them from the cheap end: it starts at once, while a spawned worker first
    spends seconds importing torch.
    """
    if not chunks:
        return
    jobs = jobs or os.cpu_count() or 1
    import torch

    threads = torch.get_num_threads()
    torch.set_num_threads(1)  # like every worker: one thread per process
    queue = deque(chunks)  # costliest first
    pool = None
    try:
        if jobs > 1:
            context = multiprocessing.get_context("spawn")
            pool = ProcessPoolExecutor(jobs - 1, mp_context=context, initializer=_init_worker)
        pending: set[Future[list[dict[str, Any]]]] = set()
        while queue or pending:
            while pool is not None and queue and len(pending) < 2 * (jobs - 1):
                pending.add(pool.submit(run_chunk, text, queue.popleft()))
            finished = {f for f in pending if f.done()}
            for future in finished:
                pending.discard(future)
                yield future.result()
            if queue:
                yield run_chunk(text, queue.pop())
            elif pending and not finished:
                done, pending = wait(pending, return_when=FIRST_COMPLETED)
                for future in done:
                    yield future.result()
    finally:
        if pool is not None:
            pool.shutdown(wait=True, cancel_futures=True)
        torch.set_num_threads(threads)


def _row_key(row: dict[str, Any]) -> tuple[str, str, int, int]:
    return (
        str(row["label"]),
        _threshold_text(float(row["threshold"])),
        int(row["batch_size"]),
        int(row["seed"]),
    )


def sort_table(scenario: Scenario, rows: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """Rows in grid order: batch size, [[clip]] table, threshold, seed."""
    order = {c.display_name: i for i, c in enumerate(scenario.clip)}

    def key(r: dict[str, Any]) -> tuple[int, int, float, int]:
        t = float(r["threshold"])
        return (
            int(r["batch_size"]),
            order[str(r["label"])],
            -1.0 if math.isnan(t) else t,
            int(r["seed"]),
        )

    return sorted(rows, key=key)


def table_csv(rows: list[dict[str, Any]], header: bool) -> str:
    """Sweep rows as sweep.csv text (with or without the header line)."""
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    if header:
        writer.writerow(COLUMNS)
    for r in rows:
        writer.writerow([_cell(r[c]) for c in COLUMNS])
    return buffer.getvalue()


def _cell(value: Any) -> str:
    if isinstance(value, bool):
        return "1" if value else "0"
    if isinstance(value, float):
        return "" if math.isnan(value) else format_value(value)
    return str(value)


def read_table(path: Path) -> list[dict[str, Any]]:
    """sweep.csv back into typed rows; a last line cut short by a kill is dropped."""
    text = path.read_text(encoding="utf-8")
    if text and not text.endswith("\n"):
        text = text[: text.rfind("\n") + 1]  # the torn tail of an interrupted append
    with io.StringIO(text) as f:
        reader = csv.DictReader(f)
        rows = []
        for raw in reader:
            if None in raw.values() or len(raw) != len(COLUMNS):
                continue  # an incomplete row: its chunk is recomputed
            row: dict[str, Any] = {}
            for column in COLUMNS:
                value = raw[column]
                if column in ("method", "label"):
                    row[column] = value
                elif column in ("batch_size", "seed"):
                    row[column] = int(value)
                elif column == "diverged":
                    row[column] = value == "1"
                else:
                    row[column] = float(value) if value != "" else math.nan
            rows.append(row)
    return rows
