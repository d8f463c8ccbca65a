"""Maps: batch size x threshold x seed, trained as stacks on persistent worker processes.

A map is cut into chunks (one batch size, at most CHUNK members each) that depend on the
scenario alone, never on the number of workers, so every point's numbers are the same whatever
`jobs` is and a resumed map ends with the same table as an uninterrupted one.
"""

from __future__ import annotations

import csv
import io
import math
import os
from collections import deque
from collections.abc import Callable, Iterator
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np

from core.errors import GradfenceInputError
from core.formats import format_value, single
from core.member import Member
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
TABLE_FILE = "map.csv"  # the names core.map_folder uses too


@dataclass(frozen=True)
class Point:
    """One grid point of a map: a [[clip]] table at one threshold, batch size and seed."""

    clip_index: int
    threshold: float
    batch_size: int
    seed: int

    def key(self, scenario: Scenario) -> tuple[str, str, int, int]:
        label = scenario.clip[self.clip_index].display_name
        return (label, threshold_text(self.threshold), self.batch_size, self.seed)


@dataclass(frozen=True)
class Chunk:
    batch_size: int
    points: tuple[Point, ...]

    @property
    def cost(self) -> float:
        return float(self.batch_size * len(self.points))


def plan(scenario: Scenario) -> list[Chunk]:
    """Every point of the map, grouped into stacks of one batch size."""
    chunks = []
    for batch in scenario.map.batch_sizes:
        points = [
            Point(i, t, batch, seed)
            for i, clip in enumerate(scenario.clip)
            for t in scenario.thresholds_for(clip)
            for seed in scenario.map.seeds
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
    """Train one chunk and summarise each member (runs inside a worker process).

    Measured values are rounded to float32, what the engine computes them in, so that a row
    read back from map.csv equals the row in memory and a resumed map analyses the same numbers.
    """
    from core.engine import Engine
    from core.results import collect

    scenario = loads_scenario(scenario_text, "<map>")
    members = members_of(scenario, chunk)
    engine = Engine(scenario, members, chunk.batch_size, outlier_steps=True)
    result = collect(engine)
    # Outlier share and pass-through: means over every step whose batch held an outlier, not
    # only the logged ones (the engine measures those steps for this).
    outlier_means = engine.outlier_step_means()
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
                "final_val_loss": single(float(result.final("val_loss")[i])),
                "diverged": result.diverged_at[i] is not None,
                "clipped_share": single(_mean(share)),
                "clean_clipped_share": single(_mean(clean_share)),
                "outlier_share": single(float(outlier_means["outlier_share"][i])),
                "outlier_pass": single(float(outlier_means["outlier_pass"][i])),
            }
        )
    return rows


def _mean(values: np.ndarray) -> float:
    finite = values[np.isfinite(values)]
    return float(finite.mean()) if finite.size else math.nan


def threshold_text(threshold: float) -> str:
    """A grid threshold as map.csv writes it (every digit; empty for method none)."""
    return "" if math.isnan(threshold) else repr(float(threshold))


@dataclass
class MapProgress:
    done: int  # chunks finished, resumed ones included
    total: int
    computed: int  # chunks computed in this call (not resumed)
    members_done: int = 0
    members_total: int = 0


class MapWorkerError(GradfenceInputError):
    """A chunk failed in a worker (twice, when the worker died); the message says how to go on."""


def run_map(
    scenario: Scenario,
    out: Path,
    jobs: int | None = None,
    resume: bool = False,
    fresh: bool = False,
    on_progress: Callable[[MapProgress], None] | None = None,
    warn: Callable[[str], None] | None = None,
) -> list[dict[str, Any]]:
    """Train every chunk not already in `out/map.csv`; returns the full table, sorted.

    Rows are appended to map.csv as chunks finish, so an interrupted map keeps its finished
    members; at the end the table is rewritten in grid order. See core/map_folder.py for what
    the folder may hold and when it is refused. `jobs` is capped by the cores and by what the
    free memory holds.
    """
    from core.map_folder import open_folder

    chunks = plan(scenario)
    total = sum(len(c.points) for c in chunks)
    warn = warn or (lambda text: None)
    cap = max(len(c.points) for c in chunks) if chunks else 1
    biggest = max((c.batch_size for c in chunks), default=scenario.train.batch_size)
    from core.memory import check_fits, processes_that_fit

    check_fits(scenario, cap, biggest, seeds=len(scenario.map.seeds))
    jobs = processes_that_fit(scenario, cap, biggest, jobs or os.cpu_count() or 1)

    def summary(table: Path) -> str:
        rows = read_table(table)
        return f"{len(rows)} of {total} members finished"

    folder = open_folder(
        out, scenario.hash(), scenario.content(), total, resume, fresh, warn, summary
    )
    with folder:
        done_rows = read_table(folder.table, warn) if folder.table.exists() else []
        keys = {p.key(scenario) for c in chunks for p in c.points}
        stray = [r for r in done_rows if _row_key(r) not in keys]
        if stray:
            warn(f"{folder.table}: {len(stray)} rows name no member of this map; dropped.")
        finished = {_row_key(r) for r in done_rows}
        todo = [c for c in chunks if not all(p.key(scenario) in finished for p in c.points)]
        # A chunk only partly on file (a kill that tore its append) is redone whole.
        keep = {p.key(scenario) for c in chunks if c not in todo for p in c.points}
        done_rows = [r for r in done_rows if _row_key(r) in keep]
        # Start from a clean file: finished chunks only, no torn line for new rows to join.
        folder.rewrite(table_csv(done_rows, header=True))
        progress = MapProgress(len(chunks) - len(todo), len(chunks), 0, len(done_rows), total)
        if on_progress:
            on_progress(replace(progress))
        text = dumps_scenario(scenario)
        rows = list(done_rows)
        ordered = sorted(todo, key=lambda c: -c.cost)
        for chunk_rows in _execute(text, ordered, jobs):
            rows += chunk_rows
            folder.append(table_csv(chunk_rows, header=False))
            progress.done += 1
            progress.computed += 1
            progress.members_done += len(chunk_rows)
            if on_progress:
                on_progress(replace(progress))
        rows = sort_table(scenario, rows)
        folder.rewrite(table_csv(rows, header=True))
    return rows


def _execute(text: str, chunks: list[Chunk], jobs: int) -> Iterator[list[dict[str, Any]]]:
    """Yield each chunk's rows as it finishes.

    With jobs = N, N - 1 worker processes (core.pool: a dead one is replaced and its chunk given
    to the new one once) take chunks from the costly end of the queue while this process takes
    them from the cheap end: it starts at once, while a spawned worker first spends seconds
    importing torch.
    """
    if not chunks:
        return
    import torch

    from core.pool import WorkerPool
    from core.work import CHUNK, Job

    threads = torch.get_num_threads()
    torch.set_num_threads(1)  # like every worker: one thread per process
    queue = deque(chunks)  # costliest first
    pool = WorkerPool(jobs - 1) if jobs > 1 else None
    arrived: deque[list[dict[str, Any]]] = deque()
    pending = 0
    failure: list[str] = []

    def handle(kind: str, run_id: int, batch: int, payload: Any) -> None:
        nonlocal pending
        if kind == "rows":
            arrived.append(payload)
        elif kind in ("done", "stopped"):
            pending -= 1
        elif kind == "error":
            pending -= 1
            failure.append(f"batch size {batch}: {str(payload).strip().splitlines()[-1]}")

    try:
        if pool is not None:
            pool.start()
        run_id = pool.new_run_id() if pool is not None else 0
        while queue or pending or arrived:
            while pool is not None and queue and pending < 2 * (jobs - 1):
                pool.submit(
                    Job(run_id, CHUNK, text, queue[0].batch_size, chunk=queue.popleft()), handle
                )
                pending += 1
            while arrived:
                yield arrived.popleft()
            if failure:
                raise MapWorkerError(
                    f"a worker failed on a chunk at {failure[0]}; the finished members are "
                    "kept: continue with --resume."
                )
            if queue:
                yield run_chunk(text, queue.pop())
                if pool is not None:
                    pool.poll()
            elif pending and pool is not None:
                pool.wait(0.5)
    finally:
        if pool is not None:
            pool.shutdown()
        torch.set_num_threads(threads)


def _row_key(row: dict[str, Any]) -> tuple[str, str, int, int]:
    return (
        str(row["label"]),
        threshold_text(float(row["threshold"])),
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
    """Map rows as map.csv text (with or without the header line)."""
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    if header:
        writer.writerow(COLUMNS)
    for r in rows:
        writer.writerow([_cell(r[c], single=c != "threshold") for c in COLUMNS])
    return buffer.getvalue()


def _cell(value: Any, single: bool) -> str:
    """A grid threshold keeps every digit (it names the point); measurements are float32."""
    if isinstance(value, bool):
        return "1" if value else "0"
    if isinstance(value, float):
        return "" if math.isnan(value) else format_value(value, single=single)
    return str(value)


def read_table(path: Path, warn: Callable[[str], None] | None = None) -> list[dict[str, Any]]:
    """map.csv back into typed rows (see core.map_folder.parse_rows)."""
    from core.map_folder import parse_rows

    text = path.read_text(encoding="utf-8", errors="replace")
    return parse_rows(text, COLUMNS, str(path), warn or (lambda line: None))
