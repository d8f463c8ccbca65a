"""Threshold rules: how each step's threshold follows the quantity a method compares with it.

A rule watches one number per step (the largest compared quantity: the batch-mean norm for
global-norm, the largest example's norm for example-norm, the largest unit ratio for AGC) and
gives the threshold to apply on that step; `math.inf` means "do not clip yet".
"""

from __future__ import annotations

import math

import numpy as np

from core.scenario import ClipConfig


class FixedRule:
    def __init__(self, threshold: float) -> None:
        self.threshold = threshold

    def level(self, watched: float) -> float:
        return self.threshold


class PercentileRule:
    """AutoClip: the p-th percentile of the history of watched norms, current step included."""

    def __init__(self, percentile: float, warmup: int) -> None:
        self.percentile = percentile
        self.warmup = warmup
        self.history: list[float] = []

    def level(self, watched: float) -> float:
        if math.isfinite(watched):
            self.history.append(watched)
        if len(self.history) <= self.warmup or not self.history:
            return math.inf
        return float(np.percentile(self.history, self.percentile))


class EmaRule:
    """k times an exponential moving average of the watched norm, fed with the clipped norm."""

    def __init__(self, k: float, alpha: float, warmup: int) -> None:
        self.k, self.alpha, self.warmup = k, alpha, warmup
        self.seen: list[float] = []
        self.mean = math.nan

    def level(self, watched: float) -> float:
        if len(self.seen) < max(self.warmup, 1):
            if math.isfinite(watched):
                self.seen.append(watched)
                self.mean = float(np.mean(self.seen))
            return math.inf
        limit = self.k * self.mean
        if math.isfinite(watched):
            self.mean = self.alpha * self.mean + (1.0 - self.alpha) * min(watched, limit)
        return limit


class ZScoreRule:
    """Spike clipping on a running mean and variance of the norm (exponentially weighted).

    z = (n - mu) / (sigma + 1e-6); when z exceeds the level z_t the norm is clipped to
    mu + (z_t^2 / z) * sigma, and the statistics are updated with the clipped norm so that a
    spike does not raise them (update order from memory of the published method).
    """

    def __init__(self, z: float, alpha: float, warmup: int) -> None:
        self.z_level, self.alpha, self.warmup = z, alpha, warmup
        self.seen: list[float] = []
        self.mean = math.nan
        self.var = math.nan

    def level(self, watched: float) -> float:
        if len(self.seen) < max(self.warmup, 2):
            if math.isfinite(watched):
                self.seen.append(watched)
                self.mean, self.var = float(np.mean(self.seen)), float(np.var(self.seen))
            return math.inf
        sigma = math.sqrt(self.var)
        z = (watched - self.mean) / (sigma + 1e-6) if math.isfinite(watched) else math.inf
        limit = math.inf
        kept = watched
        if z > self.z_level:
            limit = self.mean + (self.z_level**2 / z) * sigma
            kept = limit
        if math.isfinite(kept):
            delta = kept - self.mean
            self.mean += (1.0 - self.alpha) * delta
            self.var = self.alpha * (self.var + (1.0 - self.alpha) * delta * delta)
        return limit


Rule = FixedRule | PercentileRule | EmaRule | ZScoreRule


def make_rule(clip: ClipConfig) -> Rule:
    """The rule object of one [[clip]] table (threshold already resolved)."""
    if clip.rule == "percentile":
        return PercentileRule(clip.percentile, clip.warmup)
    if clip.rule == "ema":
        return EmaRule(clip.k, clip.alpha, clip.warmup)
    if clip.rule == "zscore":
        return ZScoreRule(clip.z, clip.alpha, clip.warmup)
    return FixedRule(clip.threshold if clip.threshold is not None else math.inf)
