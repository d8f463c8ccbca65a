"""Threshold rules: how each step's threshold follows the quantity a method compares with it.

A rule watches one number per step (the largest compared quantity: the batch-mean norm for
global-norm, the largest example's norm for example-norm, the largest unit ratio for AGC) and
gives the threshold to apply on that step; `math.inf` means "do not clip yet".
"""

from __future__ import annotations

import math

import numpy as np

from core.scenario import ClipConfig
from core.wavelet import PrefixOrder


class FixedRule:
    def __init__(self, threshold: float) -> None:
        self.threshold = threshold

    def level(self, watched: float) -> float:
        return self.threshold

    def levels(self, watched: np.ndarray) -> np.ndarray:
        """What `level` returns at every step of `watched`."""
        return np.full(len(watched), float(self.threshold))


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

    def levels(self, watched: np.ndarray) -> np.ndarray:
        """What `level` returns at every step of `watched`, from a fresh history, to the bit.

        np.percentile's default (linear) method, mirrored: virtual index (h - 1) * p / 100,
        its floor and the next order statistic (both the maximum at or past the end), and
        numpy's two-sided lerp; the order statistics of every prefix come from one wavelet
        matrix. The rule's own state is neither read nor changed.
        """
        values = np.asarray(watched, dtype=np.float64)
        finite = np.isfinite(values)
        count = np.cumsum(finite)  # history length after each step
        out = np.full(len(values), math.inf)
        active = (count > self.warmup) & (count > 0)
        if not active.any():
            return out
        h = count[active]
        q = np.true_divide(self.percentile, 100)  # as np.percentile turns p into a quantile
        virtual = (h - 1) * q
        floor = np.floor(virtual)
        above = virtual >= h - 1
        previous = np.where(above, -1.0, floor)  # numpy's index; -1 is the last (the maximum)
        gamma = virtual - previous
        low = np.where(above, h - 1, floor).astype(np.int64)
        high = np.where(above, h - 1, floor + 1).astype(np.int64)
        stats = PrefixOrder(values[finite]).kth(np.concatenate((h, h)), np.concatenate((low, high)))
        a, b = stats[: len(h)], stats[len(h) :]
        diff = b - a
        level = a + diff * gamma
        upper = gamma >= 0.5
        level[upper] = b[upper] - diff[upper] * (1 - gamma[upper])
        out[active] = level
        return out


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

    def levels(self, watched: np.ndarray) -> np.ndarray:
        """What `level` returns at every step of `watched`, from a fresh start, to the bit."""
        values = np.asarray(watched, dtype=np.float64)
        out = np.full(len(values), math.inf)
        start, seen = _warm_up(values, max(self.warmup, 1))
        if start >= len(values):
            return out
        mean = float(np.mean(seen))
        k, alpha, keep = self.k, self.alpha, 1.0 - self.alpha
        limits: list[float] = []
        append = limits.append
        # The recursion of `level` over Python floats, the same operations in the same order;
        # `w - w == 0.0` is math.isfinite(w) without a call.
        for w in values[start:].tolist():
            limit = k * mean
            append(limit)
            if w - w == 0.0:
                mean = alpha * mean + keep * (limit if limit < w else w)  # min(w, limit)
        out[start:] = limits
        return out


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

    def levels(self, watched: np.ndarray) -> np.ndarray:
        """What `level` returns at every step of `watched`, from a fresh start, to the bit."""
        values = np.asarray(watched, dtype=np.float64)
        out = np.full(len(values), math.inf)
        start, seen = _warm_up(values, max(self.warmup, 2))
        if start >= len(values):
            return out
        mean, var = float(np.mean(seen)), float(np.var(seen))
        z_level, alpha, keep = self.z_level, self.alpha, 1.0 - self.alpha
        z_squared = self.z_level**2
        inf, sqrt = math.inf, math.sqrt
        limits: list[float] = []
        append = limits.append
        # The recursion of `level` over Python floats, the same operations in the same order;
        # `w - w == 0.0` is math.isfinite(w) without a call. A non-finite norm has z = inf.
        for w in values[start:].tolist():
            sigma = sqrt(var)
            if w - w == 0.0:
                z = (w - mean) / (sigma + 1e-6)
                if z > z_level:
                    limit = mean + (z_squared / z) * sigma
                    append(limit)
                    if limit - limit != 0.0:
                        continue
                    delta = limit - mean
                else:
                    append(inf)
                    delta = w - mean
            else:
                limit = mean + (z_squared / inf) * sigma
                append(limit if inf > z_level else inf)
                if not inf > z_level or limit - limit != 0.0:
                    continue
                delta = limit - mean
            mean += keep * delta
            var = alpha * (var + keep * delta * delta)
        out[start:] = limits
        return out


Rule = FixedRule | PercentileRule | EmaRule | ZScoreRule


def _warm_up(values: np.ndarray, needed: int) -> tuple[int, np.ndarray]:
    """The first step after the warm-up of a rule that needs `needed` finite values, and them.

    The step whose value completes the warm-up still returns inf; `len(values)` when the
    warm-up never completes.
    """
    positions = np.flatnonzero(np.isfinite(values))
    if len(positions) < needed:
        return len(values), values[positions]
    return int(positions[needed - 1]) + 1, values[positions[:needed]]


def make_rule(clip: ClipConfig) -> Rule:
    """The rule object of one [[clip]] table (threshold already resolved)."""
    if clip.rule == "percentile":
        return PercentileRule(clip.percentile, clip.warmup)
    if clip.rule == "ema":
        return EmaRule(clip.k, clip.alpha, clip.warmup)
    if clip.rule == "zscore":
        return ZScoreRule(clip.z, clip.alpha, clip.warmup)
    return FixedRule(clip.threshold if clip.threshold is not None else math.inf)
