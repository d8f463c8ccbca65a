"""Tasks, outliers and the batch sampler: deterministic, exact counts, clean validation."""

from __future__ import annotations

import math

import numpy as np
import pytest

from core.data import build_dataset
from core.sampler import plan_batches
from core.scenario import (
    CLASSIFICATION_TASKS,
    OUTLIER_KINDS,
    PLANAR_TASKS,
    TASKS,
    Scenario,
    parse_scenario,
)


def scenario_for(task: str, kind: str = "none", **outliers: object) -> Scenario:
    regression = task not in CLASSIFICATION_TASKS
    if kind == "label-flip" and regression:
        kind = "target-shift"
    if kind == "target-shift" and not regression:
        kind = "label-flip"
    return parse_scenario(
        {
            "data": {
                "task": task,
                "n_train": 600,
                "n_val": 200,
                "dim": 2 if task in PLANAR_TASKS else 5,
                "classes": 3 if task in ("blobs", "spirals") else 2,
            },
            "outliers": {"kind": kind, **outliers},
        }
    )


@pytest.mark.parametrize("task", TASKS)
def test_same_seed_same_arrays_other_seed_different(task: str) -> None:
    a = build_dataset(scenario_for(task))
    b = build_dataset(scenario_for(task))
    other = build_dataset(scenario_for(task).with_overrides({"data.seed": 1}))
    for name, array in a.arrays().items():
        np.testing.assert_array_equal(array, b.arrays()[name])
    assert not np.array_equal(a.x_train, other.x_train)


@pytest.mark.parametrize("kind", [k for k in OUTLIER_KINDS if k != "none"])
@pytest.mark.parametrize("task", ["blobs", "linear"])
def test_dataset_placement_corrupts_exactly_round_fraction_n(task: str, kind: str) -> None:
    scenario = scenario_for(task, kind, placement="dataset", fraction=0.033, scale=5.0)
    ds = build_dataset(scenario)
    assert ds.outlier_train.sum() == round(0.033 * 600) == 20
    clean = build_dataset(scenario.with_overrides({"outliers.kind": "none"}))
    changed = ~np.all(ds.x_train == clean.x_train, axis=1) | (ds.y_train != clean.y_train)
    # Each corrupted row differs from its clean version; no other row does.
    np.testing.assert_array_equal(changed, ds.outlier_train)


@pytest.mark.parametrize("kind", [k for k in OUTLIER_KINDS if k != "none"])
def test_validation_split_never_holds_an_outlier(kind: str) -> None:
    for placement in ("dataset", "batch"):
        scenario = scenario_for("teacher", kind, placement=placement, fraction=0.2)
        ds = build_dataset(scenario)
        clean = build_dataset(scenario.with_overrides({"outliers.kind": "none"}))
        np.testing.assert_array_equal(ds.x_val, clean.x_val)
        np.testing.assert_array_equal(ds.y_val, clean.y_val)
        assert np.isfinite(ds.x_val).all()


def test_outlier_kinds_do_what_they_say() -> None:
    base = {"placement": "dataset", "fraction": 0.1, "scale": 4.0}
    ref = build_dataset(scenario_for("blobs"))
    flip = build_dataset(scenario_for("blobs", "label-flip", **base))
    m = flip.outlier_train
    assert np.all(flip.y_train[m] != ref.y_train[m]) and np.all(flip.x_train == ref.x_train)
    scaled = build_dataset(scenario_for("blobs", "feature-scale", **base))
    np.testing.assert_allclose(scaled.x_train[m], 4.0 * ref.x_train[m])
    shifted = build_dataset(scenario_for("blobs", "feature-shift", **base))
    moves = shifted.x_train[m] - ref.x_train[m]
    np.testing.assert_allclose(np.linalg.norm(moves, axis=1), 4.0)
    np.testing.assert_allclose(moves, np.broadcast_to(moves[0], moves.shape))  # one direction
    lin = build_dataset(scenario_for("linear"))
    target = build_dataset(scenario_for("linear", "target-shift", **base))
    np.testing.assert_allclose(np.abs(target.y_train[m] - lin.y_train[m]), 4.0)
    bad = build_dataset(scenario_for("blobs", "nonfinite", **base))
    assert not np.isfinite(bad.x_train[m]).all(axis=1).any() and np.isfinite(bad.x_train[~m]).all()


def test_batch_placement_puts_exactly_count_outliers_in_a_rate_share_of_steps() -> None:
    scenario = scenario_for("blobs", "label-flip", placement="batch", rate=0.1, count=3)
    ds = build_dataset(scenario)
    steps = 3000
    plan = plan_batches(ds, scenario.outliers, 32, steps, seed=7)
    per_step = plan.outlier.sum(axis=1)
    assert set(np.unique(per_step)) <= {0, 3}
    hits = int((per_step == 3).sum())
    # Binomial(3000, 0.1): mean 300, sd 16.4; 4.5 sd leaves a false-alarm chance below 1e-5.
    assert abs(hits - 300) < 4.5 * math.sqrt(steps * 0.1 * 0.9)
    for row in plan.indices:  # no example twice in one batch
        assert len(set(row.tolist())) == 32


def test_batches_depend_on_the_seed_alone() -> None:
    scenario = scenario_for("moons", "label-flip", placement="batch", rate=0.5)
    ds = build_dataset(scenario)
    a = plan_batches(ds, scenario.outliers, 16, 100, seed=3)
    b = plan_batches(ds, scenario.outliers, 16, 100, seed=3)
    c = plan_batches(ds, scenario.outliers, 16, 100, seed=4)
    np.testing.assert_array_equal(a.indices, b.indices)
    assert not np.array_equal(a.indices, c.indices)


def test_burst_keeps_outliers_inside_the_window() -> None:
    for placement in ("batch", "dataset"):
        scenario = scenario_for(
            "blobs",
            "label-flip",
            placement=placement,
            rate=1.0,
            fraction=0.3,
            when="burst",
            start=40,
            length=20,
        )
        ds = build_dataset(scenario)
        plan = plan_batches(ds, scenario.outliers, 16, 100, seed=0)
        per_step = plan.outlier.sum(axis=1)
        assert per_step[:40].sum() == 0 and per_step[60:].sum() == 0
        assert per_step[40:60].sum() > 0


def test_linear_task_least_squares_recovers_the_teacher_within_the_noise() -> None:
    noise, n = 0.1, 4000
    scenario = parse_scenario({"data": {"task": "linear", "dim": 6, "n_train": n, "noise": noise}})
    ds = build_dataset(scenario)
    design = np.column_stack([ds.x_train, np.ones(n)])
    coef, *_ = np.linalg.lstsq(design, ds.y_train, rcond=None)  # the reference: numpy lstsq
    # Standard error of each coefficient with unit-variance inputs is about noise / sqrt(n).
    assert np.max(np.abs(coef[:-1] - ds.truth["weight"])) < 5 * noise / math.sqrt(n)
    assert abs(coef[-1] - float(ds.truth["bias"])) < 5 * noise / math.sqrt(n)
    residual = ds.y_train - design @ coef
    assert residual.std() == pytest.approx(noise, rel=0.05)
