"""Run results as arrays, and the files of `gradfence run --out`: metrics.csv, summary.json,
scenario.toml, and with tracing trace.npz and data.npz, so a run can be replayed elsewhere."""

from __future__ import annotations

import csv
import io
import json
import math
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from core.engine import Engine, Member, StepRecord, metric_names
from core.fileio import atomic_writer, write_text_atomic
from core.scenario import Scenario, dumps_scenario

MEMBER_COLUMNS = ("member", "method", "threshold", "batch_size", "seed", "step")


@dataclass
class RunResult:
    """Logged metrics of one stack: each metric is an array (logged steps, members)."""

    scenario: Scenario
    members: list[Member]
    batch_size: int
    steps: np.ndarray  # (logged,)
    metrics: dict[str, np.ndarray]
    diverged_at: list[int | None]
    engine: Engine | None = field(default=None, repr=False)

    @property
    def member_names(self) -> list[str]:
        return [m.name for m in self.members]

    def metric(self, name: str) -> np.ndarray:
        """(logged steps, members) values of one metric."""
        if name not in self.metrics:
            raise KeyError(f"no metric {name!r}; known: {', '.join(self.metrics)}")
        return self.metrics[name]

    def final(self, name: str) -> np.ndarray:
        """Each member's value at the last logged step (NaN for a diverged member)."""
        return np.asarray(self.metric(name)[-1])

    def summary(self) -> dict[str, Any]:
        final_loss = self.final("val_loss")
        return {
            "scenario_hash": self.scenario.hash(),
            "name": self.scenario.name,
            "members": [
                {
                    "member": i,
                    "method": m.method,
                    "label": m.name,
                    "threshold": _json_float(m.threshold),
                    "batch_size": self.batch_size,
                    "seed": m.seed,
                    "final_val_loss": _json_float(float(final_loss[i])),
                    "diverged": self.diverged_at[i] is not None,
                    "diverged_at": self.diverged_at[i],
                }
                for i, m in enumerate(self.members)
            ],
        }


def _json_float(value: float) -> float | None:
    return None if math.isnan(value) else value


def collect(engine: Engine, on_record: Callable[[StepRecord], None] | None = None) -> RunResult:
    """Run an engine to the end and gather its records into arrays."""
    names = metric_names(engine.arch.classification)
    rows: dict[str, list[np.ndarray]] = {n: [] for n in names}
    steps = []
    for record in engine.records():
        steps.append(record.step)
        for n in names:
            rows[n].append(record.values[n])
        if on_record is not None:
            on_record(record)
    return RunResult(
        scenario=engine.scenario,
        members=engine.members,
        batch_size=engine.batch_size,
        steps=np.asarray(steps, dtype=np.int64),
        metrics={n: np.stack(v) for n, v in rows.items()},
        diverged_at=list(engine.diverged_at),
        engine=engine,
    )


def format_value(value: float) -> str:
    """Shortest text that reads back to the same float, so reruns give identical files."""
    if math.isnan(value):
        return "nan"
    if math.isinf(value):  # clip_level before a rule clips, example_norm_max of a NaN example
        return "inf" if value > 0 else "-inf"
    if value == int(value) and abs(value) < 1e15:
        return str(int(value))
    return repr(float(value))


def metrics_csv(results: Iterable[RunResult]) -> str:
    """One row per member and logged step."""
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    header_written = False
    for result in results:
        names = list(result.metrics)
        if not header_written:
            writer.writerow([*MEMBER_COLUMNS, *names])
            header_written = True
        for i, m in enumerate(result.members):
            for row, step in enumerate(result.steps):
                values = [format_value(float(result.metrics[n][row, i])) for n in names]
                threshold = "" if math.isnan(m.threshold) else repr(m.threshold)
                writer.writerow(
                    [i, m.method, threshold, result.batch_size, m.seed, int(step), *values]
                )
    return buffer.getvalue()


def write_run(result: RunResult, out: Path, trace: bool = False) -> list[Path]:
    """Write the files of DESIGN section 7 into `out`; returns the paths written."""
    out.mkdir(parents=True, exist_ok=True)
    written = [out / "scenario.toml", out / "metrics.csv", out / "summary.json"]
    write_text_atomic(written[0], dumps_scenario(result.scenario))
    write_text_atomic(written[1], metrics_csv([result]))
    write_text_atomic(written[2], json.dumps(result.summary(), indent=2) + "\n")
    if trace:
        engine = result.engine
        if engine is None or engine.example_norms is None:
            raise ValueError("tracing needs a run made with trace=True")
        arrays: dict[str, np.ndarray] = {}
        for i in range(len(result.members)):
            arrays[f"m{i}_batch"] = engine.batch_indices(i)
            for name, tensor in zip(engine.arch.param_names, engine.initial, strict=True):
                arrays[f"m{i}_init_{name}"] = tensor[i].double().numpy()
            arrays[f"m{i}_example_norms"] = engine.example_norms[i]
        written += [out / "trace.npz", out / "data.npz"]
        _save_npz(written[3], arrays)
        _save_npz(written[4], engine.dataset.arrays())
    return written


def _save_npz(path: Path, arrays: dict[str, np.ndarray]) -> None:
    with atomic_writer(path, "wb") as f:
        np.savez_compressed(f, **arrays)  # type: ignore[arg-type]
