"""Gradient signal and noise from two norms per step, and carrying a threshold to a new batch size.

With the batch-mean gradient's norm at two batch sizes on the same step (|g_small| at B_small,
|g_big| at B_big), E|g_B|^2 = |G|^2 + tr(Sigma)/B gives the unbiased two-batch estimators of
McCandlish, Kaplan, Amodei et al. 2018 ("An Empirical Model of Large-Batch Training",
arXiv 1812.06162, appendix A):

    |G|^2    ~ (B_big |g_big|^2 - B_small |g_small|^2) / (B_big - B_small)
    tr(Sigma) ~ (|g_small|^2 - |g_big|^2) / (1/B_small - 1/B_big)

Each step's estimates are very noisy; they are averaged over a window of steps (numerator and
denominator of B_simple = tr(Sigma)/|G|^2 averaged separately, then divided). Intervals come
from a block bootstrap over steps (blocks keep neighbouring steps' correlation), seeded.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from core.normlog import NormLog

# Fewer usable steps than this give no estimate: the bootstrap needs a few blocks.
MIN_MEASUREMENTS = 10


@dataclass(frozen=True)
class Interval:
    """A bootstrap interval (nearest-rank percentiles of the resampled values)."""

    low: float
    high: float


@dataclass(frozen=True)
class BatchPair:
    """The two batch sizes of some of the steps used."""

    batch_small: int
    batch_big: int
    steps: int


@dataclass(frozen=True)
class NoiseEstimate:
    """|G|^2 and tr(Sigma) over a window of steps, with bootstrap intervals."""

    g_sq: float
    trace_sigma: float
    g_sq_interval: Interval
    trace_sigma_interval: Interval
    b_simple_interval: Interval
    measurements: int  # steps with both norms in the window
    first_step: int
    last_step: int
    batch_small: int  # the two sizes at the window's last step
    batch_big: int
    batch_pairs: tuple[BatchPair, ...]
    level: float
    block: int
    resamples: int
    seed: int
    g_sq_draws: np.ndarray = field(repr=False)  # (resamples,) bootstrap means
    trace_draws: np.ndarray = field(repr=False)

    @property
    def b_simple(self) -> float:
        """tr(Sigma)/|G|^2; inf when the signal estimate is not positive (noise dominates)."""
        return _ratio(self.trace_sigma, self.g_sq)

    def predicted_norm(self, batch: float) -> float:
        """sqrt(|G|^2 + tr(Sigma)/B), negative estimates taken as 0."""
        return _predicted(self.g_sq, self.trace_sigma, batch)

    def predicted_norm_interval(self, batch: float) -> Interval:
        values = _predicted_array(self.g_sq_draws, self.trace_draws, batch)
        return _interval(values, self.level)


def _ratio(numerator: float, denominator: float) -> float:
    if denominator > 0:
        return numerator / denominator
    return math.inf if numerator > 0 else math.nan


def _predicted(g_sq: float, trace: float, batch: float) -> float:
    return math.sqrt(max(g_sq, 0.0) + max(trace, 0.0) / batch)


def _predicted_array(g_sq: np.ndarray, trace: np.ndarray, batch: float) -> np.ndarray:
    predicted: np.ndarray = np.sqrt(np.maximum(g_sq, 0.0) + np.maximum(trace, 0.0) / batch)
    return predicted


def _interval(values: np.ndarray, level: float) -> Interval:
    """Nearest-rank percentiles, so that infinite draws need no interpolation."""
    ordered = np.sort(values[~np.isnan(values)])
    if len(ordered) == 0:
        return Interval(math.nan, math.nan)
    tail = (1.0 - level) / 2.0
    low = ordered[max(0, math.ceil(tail * len(ordered)) - 1)]
    high = ordered[min(len(ordered) - 1, math.ceil((1.0 - tail) * len(ordered)) - 1)]
    return Interval(float(low), float(high))


def two_batch_terms(
    norm_big: np.ndarray, norm_small: np.ndarray, batch_big: np.ndarray, batch_small: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Per-step unbiased estimates (|G|^2, tr(Sigma)), McCandlish et al. 2018, appendix A."""
    big_sq, small_sq = np.square(norm_big), np.square(norm_small)
    g_sq = (batch_big * big_sq - batch_small * small_sq) / (batch_big - batch_small)
    trace = (small_sq - big_sq) / (1.0 / batch_small - 1.0 / batch_big)
    return g_sq, trace


def measured_rows(log: NormLog) -> np.ndarray | None:
    """(rows,) bool: rows with both norms finite and both batch sizes known; None without a
    second norm or a batch size."""
    if log.small_norm is None or log.batch is None or log.small_batch is None:
        return None
    rows: np.ndarray = (
        np.isfinite(log.norm)
        & np.isfinite(log.small_norm)
        & np.isfinite(log.batch)
        & np.isfinite(log.small_batch)
    )
    return rows


def _window_rows(log: NormLog, window: int | None, leave_out: np.ndarray | None) -> np.ndarray:
    rows = measured_rows(log)
    if rows is None:
        return np.zeros(0, dtype=np.int64)
    if leave_out is not None:
        rows = rows & ~leave_out
    if window is not None:
        rows[: max(0, log.rows - window)] = False
    return np.flatnonzero(rows)


def noise_gap(
    log: NormLog, window: int | None = None, leave_out: np.ndarray | None = None
) -> str | None:
    """Why the log gives no noise estimate, as a sentence; None when it gives one."""
    if log.small_norm is None:
        return (
            "The log has one norm per step, so gradient signal and noise cannot be told apart; "
            "log a second norm on a smaller batch (small_grad_norm) to separate them."
        )
    if log.batch is None:
        return "The log gives no batch size; give one (a column or --batch-size)."
    if log.small_batch is None:
        return "The log gives no small batch size; give one (a column or --small-batch-size)."
    count = len(_window_rows(log, window, leave_out))
    if count < MIN_MEASUREMENTS:
        where = "" if window is None else f" among the last {window} steps"
        return (
            f"Only {count} steps{where} have both norms and both batch sizes; the noise "
            f"estimate needs at least {MIN_MEASUREMENTS}."
        )
    return None


def estimate_noise(
    log: NormLog,
    window: int | None = 1000,
    leave_out: np.ndarray | None = None,
    block: int = 20,
    resamples: int = 2000,
    seed: int = 0,
    level: float = 0.95,
) -> NoiseEstimate | None:
    """|G|^2, tr(Sigma) and B_simple over the steps with both norms among the last `window` rows
    (all rows when None), leaving out the rows marked in `leave_out` (spikes: one outlier's
    gradient is not the noise a threshold should follow); None when `noise_gap` says why not."""
    if noise_gap(log, window, leave_out) is not None:
        return None
    index = _window_rows(log, window, leave_out)
    assert log.small_norm is not None and log.batch is not None and log.small_batch is not None
    g_terms, trace_terms = two_batch_terms(
        log.norm[index], log.small_norm[index], log.batch[index], log.small_batch[index]
    )
    g_draws, trace_draws = _block_bootstrap(g_terms, trace_terms, block, resamples, seed)
    pairs: dict[tuple[int, int], int] = {}
    for small, big in zip(
        log.small_batch[index].astype(np.int64).tolist(),
        log.batch[index].astype(np.int64).tolist(),
        strict=True,
    ):
        pairs[(small, big)] = pairs.get((small, big), 0) + 1
    last = int(index[-1])
    return NoiseEstimate(
        g_sq=float(g_terms.mean()),
        trace_sigma=float(trace_terms.mean()),
        g_sq_interval=_interval(g_draws, level),
        trace_sigma_interval=_interval(trace_draws, level),
        b_simple_interval=_interval(_ratios(trace_draws, g_draws), level),
        measurements=len(index),
        first_step=int(log.steps[index[0]]),
        last_step=int(log.steps[last]),
        batch_small=int(log.small_batch[last]),
        batch_big=int(log.batch[last]),
        batch_pairs=tuple(BatchPair(s, b, n) for (s, b), n in sorted(pairs.items())),
        level=level,
        block=block,
        resamples=resamples,
        seed=seed,
        g_sq_draws=g_draws,
        trace_draws=trace_draws,
    )


def _ratios(numerator: np.ndarray, denominator: np.ndarray) -> np.ndarray:
    positive = denominator > 0
    safe = np.where(positive, denominator, 1.0)
    return np.where(positive, numerator / safe, np.where(numerator > 0, np.inf, np.nan))


def _block_bootstrap(
    g_terms: np.ndarray, trace_terms: np.ndarray, block: int, resamples: int, seed: int
) -> tuple[np.ndarray, np.ndarray]:
    """Means of both terms over resampled series: consecutive blocks drawn with replacement."""
    n = len(g_terms)
    block = max(1, min(block, n // 2 or 1))
    starts = np.arange(0, n, block)
    g_sums = np.add.reduceat(g_terms, starts)
    trace_sums = np.add.reduceat(trace_terms, starts)
    counts = np.diff(np.append(starts, n)).astype(np.float64)
    rng = np.random.default_rng(seed)
    chosen = rng.integers(0, len(starts), size=(resamples, len(starts)))
    total = counts[chosen].sum(axis=1)
    return g_sums[chosen].sum(axis=1) / total, trace_sums[chosen].sum(axis=1) / total


@dataclass(frozen=True)
class NoiseSeries:
    """Trailing-window estimates at every step that has both norms, for a plot."""

    steps: np.ndarray
    g_sq: np.ndarray
    trace_sigma: np.ndarray
    window: int

    @property
    def b_simple(self) -> np.ndarray:
        return _ratios(self.trace_sigma, self.g_sq)


def noise_series(log: NormLog, window: int = 200) -> NoiseSeries | None:
    """Means of the two estimators over the trailing `window` measurements at each one."""
    rows = measured_rows(log)
    if rows is None or not rows.any():
        return None
    assert log.small_norm is not None and log.batch is not None and log.small_batch is not None
    index = np.flatnonzero(rows)
    g_terms, trace_terms = two_batch_terms(
        log.norm[index], log.small_norm[index], log.batch[index], log.small_batch[index]
    )
    return NoiseSeries(
        steps=log.steps[index],
        g_sq=_trailing_mean(g_terms, window),
        trace_sigma=_trailing_mean(trace_terms, window),
        window=window,
    )


def _trailing_mean(values: np.ndarray, window: int) -> np.ndarray:
    sums = np.concatenate(([0.0], np.cumsum(values)))
    ends = np.arange(1, len(values) + 1)
    starts = np.maximum(0, ends - window)
    return (sums[ends] - sums[starts]) / (ends - starts)


@dataclass(frozen=True)
class Carry:
    """A threshold C at one batch size carried to another.

    With a noise estimate, C keeps its ratio to the predicted batch-mean norm:
    C' = C sqrt(|G|^2 + tr(Sigma)/B_new) / sqrt(|G|^2 + tr(Sigma)/B_old). Without one, only the
    two limits are known: C when the gradient is signal-dominated, C sqrt(B_old/B_new) when it
    is noise-dominated; the carried threshold always lies between them.
    """

    threshold: float
    from_batch: int
    to_batch: int
    carried_threshold: float | None
    interval: Interval | None
    signal_limit: float
    noise_limit: float
    predicted_from: float | None  # predicted batch-mean norm at from_batch
    predicted_to: float | None
    level: float = 0.95  # of the interval

    def sentence(self, label: str = "A threshold") -> str:
        head = f"{label} of {self.threshold:.4g} at batch size {self.from_batch}"
        limits = (
            f"{self.signal_limit:.4g} if the gradient is signal-dominated, "
            f"{self.noise_limit:.4g} if it is noise-dominated"
        )
        if self.carried_threshold is None:
            return (
                f"{head} becomes somewhere between {limits} at batch size {self.to_batch}: with "
                "one norm per step, signal and noise cannot be told apart."
            )
        interval = ""
        if self.interval is not None:
            interval = (
                f" ({self.level:.0%} interval {self.interval.low:.4g} to {self.interval.high:.4g})"
            )
        return (
            f"{head} becomes {self.carried_threshold:.4g} at batch size {self.to_batch}"
            f"{interval}, keeping its ratio to the predicted batch-mean norm (limits: {limits})."
        )


def carry_threshold(
    threshold: float, from_batch: int, to_batch: int, noise: NoiseEstimate | None
) -> Carry:
    """Carry `threshold` from one batch size to another (see Carry)."""
    signal_limit = threshold
    noise_limit = threshold * math.sqrt(from_batch / to_batch)
    if noise is None:
        return Carry(
            threshold, from_batch, to_batch, None, None, signal_limit, noise_limit, None, None
        )
    before, after = noise.predicted_norm(from_batch), noise.predicted_norm(to_batch)
    carried = threshold * after / before if before > 0 else None
    draws_before = _predicted_array(noise.g_sq_draws, noise.trace_draws, from_batch)
    draws_after = _predicted_array(noise.g_sq_draws, noise.trace_draws, to_batch)
    with np.errstate(invalid="ignore", divide="ignore"):
        ratios = np.where(draws_before > 0, draws_after / draws_before, np.nan)
    interval = _interval(threshold * ratios, noise.level) if carried is not None else None
    return Carry(
        threshold,
        from_batch,
        to_batch,
        carried,
        interval,
        signal_limit,
        noise_limit,
        before,
        after,
        noise.level,
    )
