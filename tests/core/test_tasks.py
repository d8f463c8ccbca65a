"""The tasks' loss floors against the noise their samplers actually draw."""

from __future__ import annotations

import math

import numpy as np
import pytest

from core.data import build_dataset
from core.scenario import parse_scenario
from core.tasks import floor_source, loss_floor


@pytest.mark.parametrize("task", ["linear", "teacher"])
def test_the_regression_floor_is_the_squared_error_of_the_tasks_own_target_function(
    task: str,
) -> None:
    # Closed form: targets are f*(x) + noise * N(0, 1), so E (y - f*(x))^2 = noise^2. Checked on
    # a drawn validation set against f* rebuilt from the task's parameters, within 4 standard
    # errors of the mean of squared noise (its sd is noise^2 * sqrt(2 / n)).
    scenario = parse_scenario(
        {"data": {"task": task, "dim": 4, "noise": 0.5, "n_val": 20000}, "model": {"kind": "mlp"}}
    )
    ds = build_dataset(scenario)
    p = ds.truth
    if task == "linear":
        target = ds.x_val @ p["weight"] + p["bias"]
    else:
        target = np.tanh(ds.x_val @ p["w1"].T + p["b1"]) @ p["w2"]
    measured = float(((ds.y_val - target) ** 2).mean())
    floor = loss_floor(scenario)
    assert floor == 0.25
    assert abs(measured - floor) < 4 * floor * math.sqrt(2 / len(ds.y_val))
    assert "noise^2 = 0.25" in floor_source(scenario)


def test_classification_has_no_known_floor() -> None:
    scenario = parse_scenario({"data": {"task": "blobs"}})
    assert loss_floor(scenario) == 0.0 and "classification" in floor_source(scenario)
