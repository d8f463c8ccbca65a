"""The two-batch-size estimators of McCandlish et al. 2018 (arXiv 1812.06162, appendix A) on
logs from a known process, and carrying a threshold to another batch size."""

from __future__ import annotations

import math

import numpy as np
import pytest

from core.noise import (
    carry_threshold,
    estimate_noise,
    noise_gap,
    noise_series,
    two_batch_terms,
)
from core.normlog import NormLog

DIM = 8
G = np.array([1.0, -0.5, 0.25, 0.0, 0.0, 0.5, 0.0, 0.0])  # |G|^2 = 1.5625
SIGMA_DIAG = np.array([4.0, 2.0, 1.0, 1.0, 0.5, 0.5, 2.0, 1.0])  # tr(Sigma) = 12
G_SQ, TRACE = float(G @ G), float(SIGMA_DIAG.sum())


def known_process_log(
    rng: np.random.Generator, steps: int, small: int = 4, big: int = 16
) -> NormLog:
    """Per-example gradients N(G, Sigma); the small batch is the first `small` of the batch."""
    examples = G + rng.standard_normal((steps, big, DIM)) * np.sqrt(SIGMA_DIAG)  # (steps, B, D)
    small_mean = examples[:, :small].mean(axis=1)
    big_mean = examples.mean(axis=1)
    return NormLog(
        name="known.csv",
        source="csv",
        steps=np.arange(1, steps + 1),
        norm=np.linalg.norm(big_mean, axis=1),
        batch=np.full(steps, float(big)),
        small_norm=np.linalg.norm(small_mean, axis=1),
        small_batch=np.full(steps, float(small)),
    )


def test_the_estimators_are_unbiased_over_fifty_replications() -> None:
    # McCandlish et al. 2018, appendix A: both per-step estimators are unbiased, since
    # E|g_B|^2 = |G|^2 + tr(Sigma)/B at each batch size. B_simple here is the ratio of the window
    # means (numerator and denominator averaged separately), which is consistent but biased at
    # order 1/n; its expected bias is the delta-method term (R Var(G) - Cov(S, G)) / (n |G|^4)
    # of the per-step terms, and the check is against that.
    rng = np.random.default_rng(2018)
    reps, steps = 50, 400
    g_err, trace_err, ratio_err, g_terms, s_terms = [], [], [], [], []
    for _ in range(reps):
        log = known_process_log(rng, steps)
        noise = estimate_noise(log, window=None, resamples=10)
        assert noise is not None and noise.measurements == steps
        g_err.append(noise.g_sq - G_SQ)
        trace_err.append(noise.trace_sigma - TRACE)
        ratio_err.append(noise.b_simple - TRACE / G_SQ)
        assert log.small_norm is not None and log.batch is not None and log.small_batch is not None
        g_t, s_t = two_batch_terms(log.norm, log.small_norm, log.batch, log.small_batch)
        g_terms.append(g_t)
        s_terms.append(s_t)
    for errors in (g_err, trace_err):
        e = np.asarray(errors)
        assert abs(e.mean()) < 3 * e.std(ddof=1) / math.sqrt(reps)
    g_all, s_all = np.concatenate(g_terms), np.concatenate(s_terms)
    ratio = TRACE / G_SQ
    cov = np.cov(s_all, g_all)
    bias = (ratio * cov[1, 1] - cov[0, 1]) / (steps * G_SQ**2)
    e = np.asarray(ratio_err)
    assert abs(e.mean() - bias) < 3 * e.std(ddof=1) / math.sqrt(reps)
    assert abs(bias) < 0.05 * ratio  # the ratio estimator's bias is small at 400 steps


def exact_log(g_sq: float, trace: float, small: np.ndarray, big: np.ndarray) -> NormLog:
    """Norms exactly sqrt(|G|^2 + tr(Sigma)/B): no sampling noise at all."""
    rows = len(big)
    return NormLog(
        name="exact.csv",
        source="csv",
        steps=np.arange(1, rows + 1),
        norm=np.sqrt(g_sq + trace / big),
        batch=big.astype(np.float64),
        small_norm=np.sqrt(g_sq + trace / small),
        small_batch=small.astype(np.float64),
    )


def test_without_sampling_noise_the_estimators_return_signal_and_noise_exactly() -> None:
    # Closed form: with |g_B|^2 = |G|^2 + tr(Sigma)/B at both sizes, appendix A's estimators
    # solve the two equations exactly, whatever the batch sizes of each row.
    small = np.array([4, 4, 8, 8, 16] * 4)
    big = np.array([32, 64, 64, 128, 128] * 4)
    g_sq, trace = two_batch_terms(*_four(exact_log(2.0, 30.0, small, big)))
    np.testing.assert_allclose(g_sq, 2.0, rtol=1e-12)
    np.testing.assert_allclose(trace, 30.0, rtol=1e-12)


def _four(log: NormLog) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    assert log.small_norm is not None and log.batch is not None and log.small_batch is not None
    return log.norm, log.small_norm, log.batch, log.small_batch


def test_a_threshold_carries_by_the_noise_limit_when_there_is_no_signal() -> None:
    # |G|^2 = 0: the batch-mean norm is sqrt(tr(Sigma)/B), so C' = C sqrt(B_old / B_new).
    log = exact_log(0.0, 40.0, np.full(30, 8), np.full(30, 64))
    carry = carry_threshold(2.0, 64, 256, estimate_noise(log))
    assert carry.carried_threshold == pytest.approx(2.0 * math.sqrt(64 / 256), rel=1e-12)
    assert carry.noise_limit == pytest.approx(1.0) and carry.signal_limit == 2.0


def test_a_threshold_carries_unchanged_when_there_is_no_noise() -> None:
    log = exact_log(3.0, 0.0, np.full(30, 8), np.full(30, 64))
    carry = carry_threshold(2.0, 64, 256, estimate_noise(log))
    assert carry.carried_threshold == pytest.approx(2.0, rel=1e-12)


def test_a_carried_threshold_lies_between_its_limits_with_its_interval() -> None:
    log = known_process_log(np.random.default_rng(5), 600)
    noise = estimate_noise(log)
    assert noise is not None
    for to_batch in (4, 64, 1024):
        carry = carry_threshold(1.0, 16, to_batch, noise)
        assert carry.carried_threshold is not None and carry.interval is not None
        low, high = sorted((carry.signal_limit, carry.noise_limit))
        assert low <= carry.carried_threshold <= high
        assert carry.interval.low <= carry.carried_threshold <= carry.interval.high
        # sqrt(|G|^2 + tr(Sigma)/B) with the estimates, by hand.
        expected = math.sqrt(noise.g_sq + noise.trace_sigma / to_batch)
        assert noise.predicted_norm(to_batch) == pytest.approx(expected)


def test_with_one_norm_only_signal_and_noise_cannot_be_told_apart() -> None:
    log = NormLog("one.csv", "csv", np.arange(1, 4), np.array([1.0, 2.0, 1.5]))
    assert noise_gap(log) is not None and "cannot be told apart" in str(noise_gap(log))
    assert estimate_noise(log) is None
    carry = carry_threshold(3.0, 32, 128, None)
    assert carry.carried_threshold is None and carry.interval is None
    assert (carry.signal_limit, carry.noise_limit) == (3.0, pytest.approx(1.5))
    assert "cannot be told apart" in carry.sentence()


def test_rows_without_both_sizes_or_norms_and_spike_rows_are_left_out() -> None:
    rows = 40
    small = np.where(np.arange(rows) < 20, 4.0, 8.0)
    log = exact_log(1.0, 10.0, small, np.full(rows, 32))
    assert log.small_norm is not None and log.small_batch is not None
    log.small_norm[::5] = np.nan  # not measured on these steps
    log.small_batch[1] = np.nan  # size unknown on this one
    log.norm[3] = np.inf
    spikes = np.zeros(rows, dtype=bool)
    spikes[[6, 7]] = True
    noise = estimate_noise(log, window=None, leave_out=spikes)
    assert noise is not None
    assert noise.measurements == rows - 8 - 1 - 1 - 2
    assert noise.g_sq == pytest.approx(1.0) and noise.trace_sigma == pytest.approx(10.0)
    assert [(p.batch_small, p.batch_big) for p in noise.batch_pairs] == [(4, 32), (8, 32)]
    assert (noise.batch_small, noise.batch_big) == (8, 32)  # at the last row used


def test_the_window_is_the_last_rows_of_the_log() -> None:
    log = known_process_log(np.random.default_rng(8), 500)
    noise = estimate_noise(log, window=100)
    assert noise is not None and (noise.first_step, noise.last_step) == (401, 500)
    assert noise.measurements == 100


def test_the_bootstrap_is_seeded() -> None:
    log = known_process_log(np.random.default_rng(9), 300)
    first, again, other = (estimate_noise(log, seed=s) for s in (0, 0, 1))
    assert first is not None and again is not None and other is not None
    assert first.b_simple_interval == again.b_simple_interval
    assert first.b_simple_interval != other.b_simple_interval
    assert first.g_sq_interval.low <= first.g_sq <= first.g_sq_interval.high


def test_the_series_is_a_trailing_mean_of_the_per_step_estimates() -> None:
    log = known_process_log(np.random.default_rng(10), 120)
    series = noise_series(log, window=25)
    assert series is not None
    g_t, s_t = two_batch_terms(*_four(log))
    for i in (0, 10, 24, 25, 119):
        start = max(0, i - 24)
        assert series.g_sq[i] == pytest.approx(g_t[start : i + 1].mean())
        assert series.trace_sigma[i] == pytest.approx(s_t[start : i + 1].mean())
