"""Running a map: its folder, its chunks on local workers (or a Dask scheduler), the table.

`run_map` takes the map's folder (core.map_folder), skips the chunks already on file, trains the
rest costliest first, appends each chunk's rows as it finishes, and rewrites the table in grid
order at the end. Local chunks train on core.pool's workers and in this process at once; with a
scheduler's address they go to core.cluster instead. What a chunk is and how its rows are made
is core.maps's.
"""

from __future__ import annotations

import os
from collections import deque
from collections.abc import Callable, Iterator
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

from core.errors import GradfenceInputError
from core.maps import Chunk, plan, read_table, row_key, run_chunk, sort_table, table_csv
from core.scenario import Scenario, dumps_scenario


@dataclass
class MapProgress:
    done: int  # chunks finished, resumed ones included
    total: int
    computed: int  # chunks computed in this call (not resumed)
    members_done: int = 0
    members_total: int = 0


class MapWorkerError(GradfenceInputError):
    """A chunk failed in a worker (twice, when the worker died); the message says how to go on.
    `reason` is what happened, for a caller that words the way on itself."""

    def __init__(self, reason: str) -> None:
        self.reason = reason
        super().__init__(f"{reason}; the finished members are kept: continue with --resume.")


def run_map(
    scenario: Scenario,
    out: Path,
    jobs: int | None = None,
    resume: bool = False,
    fresh: bool = False,
    on_progress: Callable[[MapProgress], None] | None = None,
    warn: Callable[[str], None] | None = None,
    cluster: str | None = None,
    cluster_timeout: float = 10.0,
) -> list[dict[str, Any]]:
    """Train every chunk not already in `out/map.csv`; returns the full table, sorted.

    Rows are appended to map.csv as chunks finish, so an interrupted map keeps its finished
    members; at the end the table is rewritten in grid order. See core/map_folder.py for what
    the folder may hold and when it is refused. `jobs` is capped by the cores and by what the
    free memory holds. With `cluster`, a Dask scheduler's address, the chunks train on its
    workers instead (core.cluster) and `jobs` does not apply.
    """
    from core.map_folder import open_folder

    chunks = plan(scenario)
    total = sum(len(c.points) for c in chunks)
    warn = warn or (lambda text: None)
    from core.memory import check_map_fits, map_sizes, processes_that_fit

    check_map_fits(scenario)
    asked, wanted = jobs, jobs or os.cpu_count() or 1
    jobs = processes_that_fit(scenario, *map_sizes(scenario), wanted)
    if asked is not None and jobs < wanted and cluster is None:
        warn(
            f"--jobs {wanted}: {jobs} process{'' if jobs == 1 else 'es'} at once, as many as "
            f"{os.cpu_count() or 1} cores and the free memory take."
        )

    def summary(table: Path) -> str:
        rows = read_table(table)
        return f"{len(rows)} of {total} members finished"

    folder = open_folder(
        out, scenario.hash(), scenario.content(), total, resume, fresh, warn, summary
    )
    with folder:
        done_rows = read_table(folder.table, warn) if folder.table.exists() else []
        keys = {p.key(scenario) for c in chunks for p in c.points}
        stray = [r for r in done_rows if row_key(r) not in keys]
        if stray:
            rows_name = "row names" if len(stray) == 1 else "rows name"
            warn(f"{folder.table}: {len(stray)} {rows_name} no member of this map; dropped.")
        finished = {row_key(r) for r in done_rows}
        todo = [c for c in chunks if not all(p.key(scenario) in finished for p in c.points)]
        # A chunk only partly on file (a kill that tore its append) is redone whole.
        keep = {p.key(scenario) for c in chunks if c not in todo for p in c.points}
        done_rows = [r for r in done_rows if row_key(r) in keep]
        # Start from a clean file: finished chunks only, no torn line for new rows to join.
        folder.rewrite(table_csv(done_rows, header=True))
        progress = MapProgress(len(chunks) - len(todo), len(chunks), 0, len(done_rows), total)
        if on_progress:
            on_progress(replace(progress))
        text = dumps_scenario(scenario)
        rows = list(done_rows)
        ordered = sorted(todo, key=lambda c: -c.cost)
        if cluster is None:
            finishing = _execute(text, ordered, jobs)
        else:
            from core.cluster import execute_on_cluster  # dask.distributed: an optional extra

            finishing = execute_on_cluster(cluster, text, ordered, cluster_timeout)
        for chunk_rows in finishing:
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
    from core.pool import WorkerPool
    from core.work import CHUNK, Job

    pool = WorkerPool(jobs - 1) if jobs > 1 else None
    queue = deque(chunks)  # costliest first
    arrived: deque[list[dict[str, Any]]] = deque()
    pending = 0
    failure: list[str] = []
    threads: int | None = None
    ended_early = False  # stopped (Ctrl-C, SIGTERM, the consumer gone) or failed

    def handle(kind: str, run_id: int, batch: int, payload: Any) -> None:
        nonlocal pending
        if kind == "rows":
            arrived.append(payload)
        elif kind in ("done", "stopped"):
            pending -= 1
        elif kind == "error":
            pending -= 1
            text = str(payload).strip()
            last = text.splitlines()[-1].rstrip(".") if text else "no message"
            failure.append(f"a chunk at batch size {batch} failed in a worker: {last}")

    try:
        if pool is not None:
            pool.start()  # first: the workers import torch while this process does too
        import torch

        threads = torch.get_num_threads()
        torch.set_num_threads(1)  # like every worker: one thread per process
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
                raise MapWorkerError(failure[0])
            if queue:
                yield run_chunk(text, queue.pop())
                if pool is not None:
                    pool.poll()
            elif pending and pool is not None:
                pool.wait(0.5)
        if failure:  # the last chunks may fail after the loop's own check
            raise MapWorkerError(failure[0])
    except BaseException:
        ended_early = True
        raise
    finally:
        if pool is not None:
            # A stopped map keeps only the rows it has; a worker's chunk in flight is trained
            # again on resume, so there is nothing to wait for.
            pool.shutdown(at_once=ended_early)
        if threads is not None:
            import torch

            torch.set_num_threads(threads)
