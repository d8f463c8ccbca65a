"""What a run is made of and what it yields, without torch: members and step records.

The engine, the entry models and the views share these; the window imports them without
loading torch.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from core.scenario import ClipConfig, Scenario

GRADIENT_METRICS = (
    "batch_loss",
    "grad_norm_pre",
    "grad_norm_post",
    "clip_level",
    "clip_coef",
    "clipped_share",
    "outlier_share",
    "outlier_pass",
    "outlier_shift",
    "clean_cosine",
    "update_norm",
    "example_norm_p50",
    "example_norm_p90",
    "example_norm_p99",
    "example_norm_max",
    "noise_scale",
    "lr",
    "batch_outliers",
    "skipped",
)
# Metrics that stay meaningful after a member diverged (the others read NaN from then on).
KEPT_AFTER_DIVERGING = ("lr", "batch_outliers")


def metric_names(classification: bool) -> tuple[str, ...]:
    """Metric columns in the order of metrics.csv (after step)."""
    val = ("val_loss", "val_accuracy" if classification else "val_r2")
    return GRADIENT_METRICS[:1] + val + GRADIENT_METRICS[1:] + ("diverged",)


@dataclass(frozen=True)
class Member:
    """One trained model: a clipping method at one threshold, from one seed."""

    clip: ClipConfig
    seed: int

    @property
    def method(self) -> str:
        return self.clip.method

    @property
    def name(self) -> str:
        return self.clip.display_name

    @property
    def threshold(self) -> float:
        return math.nan if self.clip.threshold is None else self.clip.threshold


def run_members(scenario: Scenario) -> list[Member]:
    """The members of `gradfence train`: each [[clip]] table at its threshold, at train.seed."""
    return [Member(c, scenario.train.seed) for c in scenario.clip]


@dataclass(frozen=True)
class StepRecord:
    """What one logged step measured: each metric is an array over the K members."""

    step: int
    values: dict[str, np.ndarray]
    newly_diverged: tuple[int, ...] = ()
    example_norms: np.ndarray | None = None  # (K, B) pre-clip norms, when the engine keeps them
    outlier: np.ndarray | None = None  # (K, B) bool, beside example_norms
