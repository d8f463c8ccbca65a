"""Threshold rules against their published definitions and worked values (REFERENCES.md)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from core.rules import EXAMPLE_WINDOW, EmaRule, FixedRule, PercentileRule, ZScoreRule


def test_fixed_rule_always_gives_its_threshold() -> None:
    rule = FixedRule(0.7)
    assert [rule.level(v) for v in (0.1, 10.0, math.inf)] == [0.7, 0.7, 0.7]


def test_percentile_rule_is_autoclip_with_the_current_step_included() -> None:
    # Seetharaman et al. 2020: threshold = p-th percentile of the history, current included.
    rule = PercentileRule(50.0, warmup=0)
    levels = [rule.level(v) for v in (1.0, 2.0, 3.0, 4.0, 100.0)]
    # Hand-computed medians of [1], [1,2], [1,2,3], [1..4], [1,2,3,4,100].
    assert levels == [1.0, 1.5, 2.0, 2.5, 3.0]
    high = PercentileRule(90.0, warmup=0)
    for v in (1.0, 2.0, 3.0, 4.0):
        high.level(v)
    # Linear interpolation at position 0.9 * 4 = 3.6: 4 + 0.6 * (100 - 4) = 61.6.
    assert high.level(100.0) == pytest.approx(61.6)


def test_percentile_rule_does_not_clip_during_warmup() -> None:
    rule = PercentileRule(10.0, warmup=3)
    assert [rule.level(v) for v in (5.0, 6.0, 7.0)] == [math.inf] * 3
    assert rule.level(8.0) == pytest.approx(5.3)


def test_zscore_rule_reproduces_the_published_worked_value() -> None:
    # Kumar et al. 2025: mu = 1, sigma = 0.1, |g| = 2 -> z = 10; clip level
    # mu + z_t^2 sigma / z = 1 + 6.25 * 0.1 / 10 = 1.0625 for z_t = 2.5.
    rule = ZScoreRule(z=2.5, alpha=0.97, warmup=2)
    assert rule.level(0.9) == math.inf and rule.level(1.1) == math.inf  # mean 1, std 0.1
    assert rule.level(2.0) == pytest.approx(1.0625, rel=1e-5)


def test_zscore_rule_leaves_ordinary_steps_alone_and_is_not_raised_by_a_spike() -> None:
    rule = ZScoreRule(z=2.5, alpha=0.97, warmup=2)
    rule.level(0.9)
    rule.level(1.1)
    assert rule.level(1.05) == math.inf  # z = 0.5: no clipping
    before = rule.mean
    rule.level(50.0)  # a spike is folded in at its clipped value only
    assert rule.mean - before < 0.01


def test_ema_rule_is_k_times_the_moving_average() -> None:
    rule = EmaRule(k=2.0, alpha=0.5, warmup=2)
    assert rule.level(1.0) == math.inf and rule.level(3.0) == math.inf  # average 2
    assert rule.level(2.0) == pytest.approx(4.0)
    # The average moves halfway to the (unclipped) 2.0: still 2.0, so the next level is 4.0.
    assert rule.level(100.0) == pytest.approx(4.0)
    # 100 entered at its clipped value 4: the average is now 3, the level 6.
    assert rule.level(1.0) == pytest.approx(6.0)


def test_example_percentile_is_numpys_percentile_of_the_latest_examples() -> None:
    # The reference is np.percentile over the last EXAMPLE_WINDOW values fed so far (current
    # step included); the warm-up counts steps, as for the batch-mean rule.
    rng = np.random.default_rng(3)
    rule = PercentileRule(90.0, warmup=2)
    fed: list[float] = []
    for step, size in enumerate([300, 300, 700, 5, 2000, 64]):
        values = rng.lognormal(size=size)
        fed += values.tolist()
        level = rule.level_of_examples(values)
        if step < 2:
            assert level == math.inf
        else:
            assert level == np.percentile(fed[-EXAMPLE_WINDOW:], 90.0)


def test_example_percentile_clips_the_same_share_of_examples_at_any_batch_size() -> None:
    # A p-th percentile of the values it is taken over is exceeded by (100 - p)% of them; taken
    # over examples, not over each batch's largest, that share cannot depend on the batch size.
    rng = np.random.default_rng(4)
    shares = {}
    for batch in (8, 512):
        rule = PercentileRule(90.0, warmup=5)
        clipped = []
        for _ in range(400 if batch == 8 else 40):
            values = rng.lognormal(size=batch)
            level = rule.level_of_examples(values)
            if math.isfinite(level):
                clipped.append(float((values > level).mean()))
        shares[batch] = float(np.mean(clipped))
    assert shares[8] == pytest.approx(0.10, abs=0.015)
    assert shares[512] == pytest.approx(0.10, abs=0.015)


def test_example_ema_and_zscore_follow_the_examples_and_ignore_non_finite_ones() -> None:
    # Hand-computed: warm-up of one step on [1, 3] gives mean 2; the EMA level is k * 2 = 4;
    # the next step's values [2, 10] enter clipped at 4: mean 3, so 0.5 * 2 + 0.5 * 3 = 2.5.
    ema = EmaRule(k=2.0, alpha=0.5, warmup=1)
    assert ema.level_of_examples(np.array([1.0, 3.0, math.nan])) == math.inf
    assert ema.level_of_examples(np.array([2.0, 10.0, math.inf])) == pytest.approx(4.0)
    assert ema.level_of_examples(np.array([1.0])) == pytest.approx(5.0)
    # zscore: warm-up [0, 2] and [1, 1]: mean 1, variance 0.5; level 1 + 2 * sqrt(0.5).
    z = ZScoreRule(z=2.0, alpha=0.97, warmup=2)
    assert z.level_of_examples(np.array([0.0, 2.0])) == math.inf
    assert z.level_of_examples(np.array([1.0, 1.0])) == math.inf
    assert z.level_of_examples(np.array([50.0])) == pytest.approx(1.0 + 2.0 * math.sqrt(0.5))
    assert FixedRule(0.7).level_of_examples(np.array([5.0])) == 0.7
