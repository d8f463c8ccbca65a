"""The Python API for notebooks and scripts: load a preset, override, run, read arrays."""

from __future__ import annotations

from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Any

import torch

from core.engine import Engine
from core.member import Member, StepRecord, run_members
from core.results import RunResult, collect
from core.scenario import Scenario, load_scenario, parse_scenario

__all__ = ["Member", "RunResult", "Scenario", "load", "load_scenario", "run", "scenario_from"]


def load(path: str | Path, overrides: Mapping[str, Any] | None = None) -> Scenario:
    """A validated preset, with dotted overrides such as {"train.batch_size": 128}."""
    scenario = load_scenario(path)
    return scenario.with_overrides(overrides) if overrides else scenario


def scenario_from(tables: Mapping[str, Any]) -> Scenario:
    """A validated scenario from a dict shaped like a preset."""
    return parse_scenario(tables, "<dict>")


def run(
    scenario: Scenario,
    *,
    members: list[Member] | None = None,
    batch_size: int | None = None,
    trace: bool = False,
    dtype: torch.dtype = torch.float32,
    on_record: Callable[[StepRecord], None] | None = None,
) -> RunResult:
    """Train the scenario's members (its [[clip]] tables by default) and return the metrics."""
    engine = Engine(
        scenario, members or run_members(scenario), batch_size, dtype=dtype, trace=trace
    )
    return collect(engine, on_record)
