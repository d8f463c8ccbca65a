"""The runner (the window's, shot's and the handout's way to train) under faults."""

from __future__ import annotations

import dataclasses

import pytest

from core import memory
from core.entry_model import FAILED
from core.fan_model import FanModel
from core.map_model import MapModel
from core.runner import Runner
from core.study import Study
from core.work import InlinePool
from tests.tiny_presets import tiny_fan, tiny_map


@pytest.mark.parametrize("kind", ["fan", "map"])
def test_an_entry_too_large_for_free_memory_fails_at_once_in_one_sentence(
    kind: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    # The previous version sent such an entry to a worker, which the system killed for its
    # memory, twice, with a message about a dead process.
    scenario = tiny_fan() if kind == "fan" else tiny_map()
    big = dataclasses.replace(scenario.data, n_train=200_000, n_val=200_000, dim=512)
    scenario = dataclasses.replace(scenario, data=big)
    monkeypatch.setattr(memory, "available_bytes", lambda: 2**30)
    entry = FanModel("Too big", scenario) if kind == "fan" else MapModel("Too big", scenario)
    study = Study(entries=[entry])
    pool = InlinePool()
    runner = Runner(study, pool)
    runner.train(entry)
    assert entry.status == FAILED and pool.idle  # nothing was sent to train
    assert "needs about" in entry.error and "and 1.00 GB is free" in entry.error
    assert entry.error.count("\n") == 0
    assert entry.state_text() == f"failed: {entry.error}"
    runner.close()
