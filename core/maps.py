"""Maps: batch size x threshold x seed. What a map's chunks are, how one trains, its table.

A map is cut into chunks (one batch size, at most CHUNK members each) that depend on the
scenario alone, never on the number of workers, so every point's numbers are the same whatever
trains them and a resumed map ends with the same table as an uninterrupted one. Running a whole
map (its folder, its workers) is core.map_run's.
"""

from __future__ import annotations

import csv
import io
import math
from collections.abc import Callable
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np

from core.formats import format_value, single
from core.member import Member
from core.scenario import Scenario, loads_scenario

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
    """A grid threshold as map.csv writes it (every digit, whole numbers without a point; empty
    for method none): profile.json's pass_through is keyed by this text."""
    return _cell(float(threshold), single=False)


def row_key(row: dict[str, Any]) -> tuple[str, str, int, int]:
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
    """A grid threshold keeps every digit (it names the point), and is empty for a method
    without one; measurements are float32, with inf and nan spelt out."""
    if isinstance(value, bool):
        return "1" if value else "0"
    if isinstance(value, float):
        return "" if math.isnan(value) and not single else format_value(value, single=single)
    return str(value)


def read_table(path: Path, warn: Callable[[str], None] | None = None) -> list[dict[str, Any]]:
    """map.csv back into typed rows (see core.map_folder.parse_rows)."""
    from core.map_folder import parse_rows

    text = path.read_text(encoding="utf-8", errors="replace")
    return parse_rows(text, COLUMNS, str(path), warn or (lambda line: None))
