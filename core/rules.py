"""Threshold rules: how each step's threshold follows the quantity a method compares with it.

Batch-mean methods: `level(watched)` takes one number per step (the batch-mean norm for
global-norm, the largest tensor norm or unit ratio for the others) and gives the threshold to
apply on that step; `math.inf` means "do not clip yet". `levels` replays `level` on a whole log
(core/replay.py relies on the two agreeing to the bit).

Per-example methods: `level_of_examples(values)` takes every compared value of the step (each
example's norm, each group's norm, each example's largest unit ratio) and follows their
distribution, not the batch's largest: a threshold set from the largest of B values would sit
higher the larger B is, and bring the batch-size coupling back. Percentile takes the p-th
percentile of the last EXAMPLE_WINDOW values (the current step's included), a bounded window so
that a step costs the same at any batch size and the level follows training; ema keeps k times
an exponential average, per step, of the step's mean value (values above the level enter at the
level); zscore clips above mean + z * std of the examples, mean and variance being exponential
averages per step of the step's values (clipped at the level). The warm-up counts steps for
both kinds of rule.
"""

from __future__ import annotations

import math

import numpy as np

from core.scenario import ClipConfig
from core.wavelet import PrefixOrder

# Per-example percentile rules keep this many of the most recent compared values.
EXAMPLE_WINDOW = 1024


def _finite(values: np.ndarray) -> np.ndarray:
    values = np.asarray(values, dtype=np.float64).ravel()
    return values[np.isfinite(values)]


class FixedRule:
    def __init__(self, threshold: float) -> None:
        self.threshold = threshold

    def level(self, watched: float) -> float:
        return self.threshold

    def levels(self, watched: np.ndarray) -> np.ndarray:
        """What `level` returns at every step of `watched`."""
        return np.full(len(watched), float(self.threshold))

    def level_of_examples(self, values: np.ndarray) -> float:
        return self.threshold


class PercentileRule:
    """AutoClip: the p-th percentile of the history of watched norms, current step included."""

    def __init__(self, percentile: float, warmup: int) -> None:
        self.percentile = percentile
        self.warmup = warmup
        self.history: list[float] = []
        self._recent = np.empty(EXAMPLE_WINDOW)  # per-example: a ring of the latest values
        self._filled = 0
        self._next = 0
        self._steps = 0

    def level_of_examples(self, values: np.ndarray) -> float:
        """The p-th percentile of the last EXAMPLE_WINDOW finite values, this step's included."""
        finite = _finite(values)[-EXAMPLE_WINDOW:]
        if finite.size:
            self._steps += 1
            end = self._next + finite.size
            if end <= EXAMPLE_WINDOW:
                self._recent[self._next : end] = finite
            else:
                split = EXAMPLE_WINDOW - self._next
                self._recent[self._next :] = finite[:split]
                self._recent[: end - EXAMPLE_WINDOW] = finite[split:]
            self._next = end % EXAMPLE_WINDOW
            self._filled = min(EXAMPLE_WINDOW, self._filled + finite.size)
        if self._steps <= self.warmup or self._filled == 0:
            return math.inf
        return float(np.percentile(self._recent[: self._filled], self.percentile))

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
        self._example_steps: list[np.ndarray] = []

    def level_of_examples(self, values: np.ndarray) -> float:
        """k times an exponential average of the steps' mean values (clipped at the level)."""
        finite = _finite(values)
        if len(self._example_steps) < max(self.warmup, 1):
            if finite.size:
                self._example_steps.append(finite)
                self.mean = float(np.concatenate(self._example_steps).mean())
            return math.inf
        limit = self.k * self.mean
        if finite.size:
            step_mean = float(np.minimum(finite, limit).mean())
            self.mean = self.alpha * self.mean + (1.0 - self.alpha) * step_mean
        return limit

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
        self._example_steps: list[np.ndarray] = []

    def level_of_examples(self, values: np.ndarray) -> float:
        """mean + z * std of the examples' values, both exponential averages per step."""
        finite = _finite(values)
        if len(self._example_steps) < max(self.warmup, 2):
            if finite.size:
                self._example_steps.append(finite)
                seen = np.concatenate(self._example_steps)
                self.mean, self.var = float(seen.mean()), float(seen.var())
            return math.inf
        limit = self.mean + self.z_level * math.sqrt(self.var)
        if finite.size:
            kept = np.minimum(finite, limit)
            spread = float(((kept - self.mean) ** 2).mean())
            self.mean = self.alpha * self.mean + (1.0 - self.alpha) * float(kept.mean())
            self.var = self.alpha * self.var + (1.0 - self.alpha) * spread
        return limit

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
