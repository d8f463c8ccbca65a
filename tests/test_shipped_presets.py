"""Every shipped preset passes `gradfence check`, loads, and runs to the end."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from app.cli import main
from core import api
from core.scenario import OUTLIER_KINDS, TASKS, load_scenario
from tests.conftest import SCENARIOS

PRESETS = sorted(p for p in SCENARIOS.glob("*.toml") if not p.name.endswith(".study.toml"))


def test_there_are_presets_for_every_task_and_outlier_kind() -> None:
    scenarios = [load_scenario(p) for p in PRESETS]
    assert len(scenarios) >= 5
    assert {s.data.task for s in scenarios} == set(TASKS)
    assert {s.outliers.kind for s in scenarios} >= set(OUTLIER_KINDS) - {"none"}
    assert all(s.notes.strip() for s in scenarios)


@pytest.mark.parametrize("path", PRESETS, ids=[p.stem for p in PRESETS])
def test_shipped_preset_passes_check(path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["check", str(path)]) == 0
    assert "ok:" in capsys.readouterr().out


@pytest.mark.parametrize("path", PRESETS, ids=[p.stem for p in PRESETS])
def test_shipped_preset_runs_to_the_end(path: Path) -> None:
    result = api.run(load_scenario(path))
    assert int(result.steps[-1]) == result.scenario.train.steps
    survivors = [i for i, d in enumerate(result.diverged_at) if d is None]
    assert survivors, "every member of a shipped preset diverged"
    assert all(math.isfinite(result.final("val_loss")[i]) for i in survivors)
    # outlier_share is |o| / (|o| + |c|) (DEVELOPERS.md): in [0, 1] by the triangle inequality
    # on every row metrics.csv would hold; NaN only after a member diverged.
    share = result.metric("outlier_share")
    finite = share[np.isfinite(share)]
    assert finite.size and finite.min() >= 0.0 and finite.max() <= 1.0
