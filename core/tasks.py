"""Synthetic tasks: each draws labelled examples from a distribution fixed by the data seed."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from core.scenario import DataConfig

TEACHER_WIDTH = 32


@dataclass(frozen=True)
class TaskSample:
    x: np.ndarray  # (n, dim) float64
    y: np.ndarray  # (n,) int64 class labels, or (n,) float64 regression targets
    truth: dict[str, np.ndarray] = field(default_factory=dict)  # the generating parameters


def draw_task(cfg: DataConfig, n: int, rng: np.random.Generator) -> TaskSample:
    """Draw n examples of the configured task; the task's own parameters come from rng first."""
    return TASKS[cfg.task](cfg, n, rng)


def _blobs(cfg: DataConfig, n: int, rng: np.random.Generator) -> TaskSample:
    centers = rng.normal(0.0, 2.0, size=(cfg.classes, cfg.dim))
    y = rng.integers(0, cfg.classes, size=n)
    x = centers[y] + cfg.noise * rng.normal(size=(n, cfg.dim))
    return TaskSample(x, y.astype(np.int64), {"centers": centers})


def _moons(cfg: DataConfig, n: int, rng: np.random.Generator) -> TaskSample:
    y = rng.integers(0, 2, size=n)
    t = rng.uniform(0.0, np.pi, size=n)
    upper = np.stack([np.cos(t), np.sin(t)], axis=1)
    lower = np.stack([1.0 - np.cos(t), 0.5 - np.sin(t)], axis=1)
    x = np.where(y[:, None] == 0, upper, lower) - np.array([0.5, 0.25])
    x = x + cfg.noise * rng.normal(size=(n, 2))
    return TaskSample(x, y.astype(np.int64))


def _spirals(cfg: DataConfig, n: int, rng: np.random.Generator) -> TaskSample:
    y = rng.integers(0, cfg.classes, size=n)
    r = rng.uniform(0.05, 1.0, size=n)
    theta = 2.0 * np.pi * y / cfg.classes + 3.0 * np.pi * r
    x = np.stack([r * np.cos(theta), r * np.sin(theta)], axis=1)
    x = x + cfg.noise * rng.normal(size=(n, 2))
    return TaskSample(x, y.astype(np.int64))


def _xor(cfg: DataConfig, n: int, rng: np.random.Generator) -> TaskSample:
    x = rng.uniform(-1.0, 1.0, size=(n, 2))
    y = (x[:, 0] * x[:, 1] > 0).astype(np.int64)
    x = x + cfg.noise * rng.normal(size=(n, 2))
    return TaskSample(x, y)


def _linear(cfg: DataConfig, n: int, rng: np.random.Generator) -> TaskSample:
    w = rng.normal(0.0, 1.0 / np.sqrt(cfg.dim), size=cfg.dim)
    b = rng.normal(0.0, 0.5)
    x = rng.normal(size=(n, cfg.dim))
    y = x @ w + b + cfg.noise * rng.normal(size=n)
    return TaskSample(x, y, {"weight": w, "bias": np.array(b)})


def _teacher(cfg: DataConfig, n: int, rng: np.random.Generator) -> TaskSample:
    w1 = rng.normal(0.0, 1.5 / np.sqrt(cfg.dim), size=(TEACHER_WIDTH, cfg.dim))
    b1 = rng.normal(0.0, 0.5, size=TEACHER_WIDTH)
    w2 = rng.normal(0.0, 1.0 / np.sqrt(TEACHER_WIDTH), size=TEACHER_WIDTH)
    x = rng.normal(size=(n, cfg.dim))
    y = np.tanh(x @ w1.T + b1) @ w2 + cfg.noise * rng.normal(size=n)
    return TaskSample(x, y, {"w1": w1, "b1": b1, "w2": w2})


TASKS: dict[str, Callable[[DataConfig, int, np.random.Generator], TaskSample]] = {
    "blobs": _blobs,
    "moons": _moons,
    "spirals": _spirals,
    "xor": _xor,
    "linear": _linear,
    "teacher": _teacher,
}
