"""Batch sampler: every step's indices, fixed by the training seed and shared by all members."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from core.data import Dataset
from core.scenario import OutlierConfig

_BATCH_STREAM = 0x6261


@dataclass(frozen=True)
class BatchPlan:
    indices: np.ndarray  # (steps, batch) int64 rows of Dataset.x_train
    outlier: np.ndarray  # (steps, batch) bool

    @property
    def steps(self) -> int:
        return int(self.indices.shape[0])


def in_window(o: OutlierConfig, step: int) -> bool:
    """Whether outliers may appear on a step (counted from 0)."""
    return o.when == "always" or o.start <= step < o.start + o.length


def plan_batches(
    dataset: Dataset, outliers: OutlierConfig, batch_size: int, steps: int, seed: int
) -> BatchPlan:
    """Draw each step's batch uniformly without replacement, independently across steps.

    Dataset placement samples corrupted rows like any other (outside a burst it samples clean rows
    only); batch placement, on a step with probability `rate`, puts exactly `count` pool outliers
    in place of ordinary examples at random positions.
    """
    rng = np.random.default_rng(np.random.SeedSequence([seed, _BATCH_STREAM]))
    n = dataset.n_train
    indices = np.empty((steps, batch_size), dtype=np.int64)
    active = outliers.kind != "none"
    clean_rows = np.flatnonzero(~dataset.outlier_train[:n])
    pool = dataset.pool
    for step in range(steps):
        window = active and in_window(outliers, step)
        if active and outliers.placement == "dataset" and not window:
            indices[step] = clean_rows[rng.choice(len(clean_rows), batch_size, replace=False)]
        else:
            indices[step] = rng.choice(n, batch_size, replace=False)
        if active and outliers.placement == "batch" and window and rng.random() < outliers.rate:
            slots = rng.choice(batch_size, outliers.count, replace=False)
            indices[step, slots] = pool[rng.choice(len(pool), outliers.count, replace=False)]
    return BatchPlan(indices, dataset.outlier_train[indices])
