"""The generated data of a scenario: training set with outlier flags, clean validation split."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from core.outliers import corrupt
from core.scenario import Scenario
from core.tasks import TASKS


@dataclass(frozen=True)
class Dataset:
    """Rows [0, n_train) are the training set; rows from n_train on are the batch-outlier pool."""

    x_train: np.ndarray  # (n_train + n_pool, dim) float64
    y_train: np.ndarray  # (n_train + n_pool,) int64 labels or float64 targets
    outlier_train: np.ndarray  # (n_train + n_pool,) bool
    x_val: np.ndarray  # (n_val, dim), never corrupted
    y_val: np.ndarray
    n_train: int
    classes: int  # 0 for regression
    truth: dict[str, np.ndarray] = field(default_factory=dict)

    @property
    def classification(self) -> bool:
        return self.classes > 0

    @property
    def pool(self) -> np.ndarray:
        """Indices of the outlier pool used by batch placement (empty for dataset placement)."""
        return np.arange(self.n_train, len(self.x_train))

    @property
    def dim(self) -> int:
        return int(self.x_train.shape[1])

    def arrays(self) -> dict[str, np.ndarray]:
        """The contents of data.npz."""
        return {
            "x_train": self.x_train,
            "y_train": self.y_train,
            "outlier_train": self.outlier_train,
            "x_val": self.x_val,
            "y_val": self.y_val,
        }


def pool_size(scenario: Scenario) -> int:
    """Outlier pool of batch placement: enough distinct samples that few repeat in a run."""
    o = scenario.outliers
    if o.kind == "none" or o.placement != "batch":
        return 0
    return max(256, 8 * o.count)


def build_dataset(scenario: Scenario) -> Dataset:
    """Draw the task, split it and inject the outliers, all from data.seed.

    The task's parameters, the train/validation samples, the outlier pool and the corruption
    each have their own stream, so turning outliers on leaves the clean data as it was.
    """
    cfg, o = scenario.data, scenario.outliers
    param_seq, sample_seq, pool_seq, outlier_seq = np.random.SeedSequence(cfg.seed).spawn(4)
    task = TASKS[cfg.task]
    params = task.params(cfg, np.random.default_rng(param_seq))
    x, y = task.sample(cfg, params, cfg.n_train + cfg.n_val, np.random.default_rng(sample_seq))
    x_train, y_train = x[: cfg.n_train], y[: cfg.n_train]
    x_val, y_val = x[cfg.n_train :], y[cfg.n_train :]
    classes = cfg.classes if scenario.is_classification else 0
    n_pool = pool_size(scenario)
    outlier = np.zeros(cfg.n_train + n_pool, dtype=bool)

    if o.kind != "none":
        rng = np.random.default_rng(outlier_seq)
        direction = rng.normal(size=cfg.dim)
        direction /= np.linalg.norm(direction)
        if o.placement == "dataset":
            n_bad = round(o.fraction * cfg.n_train)
            bad = np.sort(rng.choice(cfg.n_train, size=n_bad, replace=False))
            x_train, y_train = x_train.copy(), y_train.copy()
            x_train[bad], y_train[bad] = corrupt(
                o.kind, x_train[bad], y_train[bad], o.scale, direction, classes, rng
            )
            outlier[bad] = True
        else:
            x_fresh, y_fresh = task.sample(cfg, params, n_pool, np.random.default_rng(pool_seq))
            x_pool, y_pool = corrupt(o.kind, x_fresh, y_fresh, o.scale, direction, classes, rng)
            x_train = np.concatenate([x_train, x_pool])
            y_train = np.concatenate([y_train, y_pool])
            outlier[cfg.n_train :] = True

    return Dataset(
        x_train=np.ascontiguousarray(x_train),
        y_train=np.ascontiguousarray(y_train),
        outlier_train=outlier,
        x_val=np.ascontiguousarray(x_val),
        y_val=np.ascontiguousarray(y_val),
        n_train=cfg.n_train,
        classes=classes,
        truth=params,
    )
