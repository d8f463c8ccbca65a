"""Synthetic tasks: a distribution fixed by its parameters, from which examples are drawn.

Parameters (cluster centres, teacher weights) and samples come from separate generators, so
drawing more samples (an outlier pool, say) never changes the parameters or the other samples.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from core.scenario import REGRESSION_TASKS, DataConfig, Scenario

TEACHER_WIDTH = 32
Params = dict[str, np.ndarray]
Rng = np.random.Generator


@dataclass(frozen=True)
class Task:
    params: Callable[[DataConfig, Rng], Params]
    # (cfg, params, n, rng) -> x (n, dim) float64, y (n,) int64 labels or float64 targets
    sample: Callable[[DataConfig, Params, int, Rng], tuple[np.ndarray, np.ndarray]]


def _no_params(cfg: DataConfig, rng: Rng) -> Params:
    return {}


def _blobs_params(cfg: DataConfig, rng: Rng) -> Params:
    return {"centers": rng.normal(0.0, 2.0, size=(cfg.classes, cfg.dim))}


def _blobs(cfg: DataConfig, p: Params, n: int, rng: Rng) -> tuple[np.ndarray, np.ndarray]:
    y = rng.integers(0, cfg.classes, size=n)
    return p["centers"][y] + cfg.noise * rng.normal(size=(n, cfg.dim)), y.astype(np.int64)


def _moons(cfg: DataConfig, p: Params, n: int, rng: Rng) -> tuple[np.ndarray, np.ndarray]:
    y = rng.integers(0, 2, size=n)
    t = rng.uniform(0.0, np.pi, size=n)
    upper = np.stack([np.cos(t), np.sin(t)], axis=1)
    lower = np.stack([1.0 - np.cos(t), 0.5 - np.sin(t)], axis=1)
    x = np.where(y[:, None] == 0, upper, lower) - np.array([0.5, 0.25])
    return x + cfg.noise * rng.normal(size=(n, 2)), y.astype(np.int64)


def _spirals(cfg: DataConfig, p: Params, n: int, rng: Rng) -> tuple[np.ndarray, np.ndarray]:
    y = rng.integers(0, cfg.classes, size=n)
    r = rng.uniform(0.05, 1.0, size=n)
    theta = 2.0 * np.pi * y / cfg.classes + 3.0 * np.pi * r  # 1.5 turns per arm
    x = np.stack([r * np.cos(theta), r * np.sin(theta)], axis=1)
    return x + cfg.noise * rng.normal(size=(n, 2)), y.astype(np.int64)


def _xor(cfg: DataConfig, p: Params, n: int, rng: Rng) -> tuple[np.ndarray, np.ndarray]:
    x = rng.uniform(-1.0, 1.0, size=(n, 2))
    y = (x[:, 0] * x[:, 1] > 0).astype(np.int64)
    return x + cfg.noise * rng.normal(size=(n, 2)), y


def _linear_params(cfg: DataConfig, rng: Rng) -> Params:
    return {
        "weight": rng.normal(0.0, 1.0 / np.sqrt(cfg.dim), size=cfg.dim),
        "bias": np.array(rng.normal(0.0, 0.5)),
    }


def _linear(cfg: DataConfig, p: Params, n: int, rng: Rng) -> tuple[np.ndarray, np.ndarray]:
    x = rng.normal(size=(n, cfg.dim))
    return x, x @ p["weight"] + p["bias"] + cfg.noise * rng.normal(size=n)


def _teacher_params(cfg: DataConfig, rng: Rng) -> Params:
    return {
        "w1": rng.normal(0.0, 1.5 / np.sqrt(cfg.dim), size=(TEACHER_WIDTH, cfg.dim)),
        "b1": rng.normal(0.0, 0.5, size=TEACHER_WIDTH),
        "w2": rng.normal(0.0, 1.0 / np.sqrt(TEACHER_WIDTH), size=TEACHER_WIDTH),
    }


def _teacher(cfg: DataConfig, p: Params, n: int, rng: Rng) -> tuple[np.ndarray, np.ndarray]:
    x = rng.normal(size=(n, cfg.dim))
    y = np.tanh(x @ p["w1"].T + p["b1"]) @ p["w2"] + cfg.noise * rng.normal(size=n)
    return x, y


TASKS: dict[str, Task] = {
    "blobs": Task(_blobs_params, _blobs),
    "moons": Task(_no_params, _moons),
    "spirals": Task(_no_params, _spirals),
    "xor": Task(_no_params, _xor),
    "linear": Task(_linear_params, _linear),
    "teacher": Task(_teacher_params, _teacher),
}


def loss_floor(scenario: Scenario) -> float:
    """The validation loss no model can beat in expectation: the target-noise variance noise^2
    of the regression tasks (linear, teacher: squared error against targets with Gaussian noise
    of std data.noise); 0 for classification, whose cross-entropy floor is not known here."""
    if scenario.data.task in REGRESSION_TASKS:
        return float(scenario.data.noise) ** 2
    return 0.0


def floor_source(scenario: Scenario) -> str:
    """Where `loss_floor` comes from, in words (for windows.json)."""
    task = scenario.data.task
    if task in REGRESSION_TASKS:
        return (
            f"the target-noise variance data.noise^2 = {loss_floor(scenario):g} of the {task} "
            "task: the squared-error loss of its own target function, in expectation"
        )
    return f"0: the {task} task is classification, whose cross-entropy floor is not known here"
