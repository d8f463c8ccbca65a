"""The replay against the engine's own rules: levels() is level() step by step, to the bit, and a
member's own metrics replay to exactly the steps the engine clipped and skipped."""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch

from core import api
from core.normlog import parse_log_text
from core.replay import (
    SpikeRule,
    decide,
    default_clips,
    find_spikes,
    replay,
    replay_rules,
    rule_key,
    threshold_grid,
)
from core.results import metrics_csv
from core.rules import EmaRule, FixedRule, PercentileRule, Rule, ZScoreRule, make_rule
from core.scenario import ClipConfig, parse_scenario


def spiky_sequence(rng: np.random.Generator, n: int) -> np.ndarray:
    """Log-normal norms with spikes, ties, +inf, -inf and NaN."""
    x = np.exp(rng.normal(0.0, 0.5, n))
    x[rng.random(n) < 0.03] *= 30.0
    x[rng.random(n) < 0.05] = 1.0  # ties
    x[rng.random(n) < 0.02] = math.inf
    x[rng.random(n) < 0.02] = math.nan
    x[rng.random(n) < 0.01] = -math.inf
    return x


def random_rules(rng: np.random.Generator) -> list[Rule]:
    return [
        FixedRule(float(rng.uniform(0.5, 3.0))),
        PercentileRule(float(rng.uniform(0.1, 100.0)), int(rng.integers(0, 40))),
        PercentileRule(100.0, int(rng.integers(0, 3))),
        EmaRule(
            float(rng.uniform(1.0, 4.0)), float(rng.uniform(0.0, 0.999)), int(rng.integers(0, 40))
        ),
        ZScoreRule(
            float(rng.uniform(0.5, 4.0)), float(rng.uniform(0.0, 0.999)), int(rng.integers(0, 40))
        ),
    ]


@pytest.mark.parametrize("seed", range(25))
def test_levels_equal_level_step_by_step_to_the_bit_for_every_rule(seed: int) -> None:
    # The reference is each rule's own streaming level(), the one the engine calls every step
    # (for percentile, np.percentile of the history itself).
    rng = np.random.default_rng(seed)
    watched = spiky_sequence(rng, int(rng.integers(1, 600)))
    for rule in random_rules(rng):
        fast = rule.levels(watched)
        streaming = np.array([rule.level(float(v)) for v in watched])
        assert fast.tobytes() == streaming.tobytes(), type(rule).__name__


def test_percentile_levels_are_np_percentile_of_the_finite_history_at_every_step() -> None:
    # numpy's default (linear) percentile of everything finite seen so far, current step included.
    rng = np.random.default_rng(7)
    watched = spiky_sequence(rng, 3000)
    for p in (0.5, 50.0, 90.0, 99.9):
        levels = PercentileRule(p, warmup=10).levels(watched)
        for t in rng.choice(len(watched), size=200, replace=False):
            history = watched[: t + 1][np.isfinite(watched[: t + 1])]
            expected = math.inf if len(history) <= 10 else float(np.percentile(history, p))
            assert levels[t] == expected


def test_levels_neither_read_nor_change_the_rules_state() -> None:
    watched = spiky_sequence(np.random.default_rng(3), 200)
    for rule in (PercentileRule(90.0, 5), EmaRule(2.0, 0.9, 5), ZScoreRule(2.5, 0.9, 5)):
        rule.level(50.0)  # some state that levels() must not start from
        before = {k: (list(v) if isinstance(v, list) else v) for k, v in vars(rule).items()}
        fresh = make_rule(_clip_of(rule)).levels(watched)
        np.testing.assert_array_equal(rule.levels(watched), fresh)
        after = {k: (list(v) if isinstance(v, list) else v) for k, v in vars(rule).items()}
        assert after == before


def _clip_of(rule: Rule) -> ClipConfig:
    if isinstance(rule, PercentileRule):
        return ClipConfig(rule="percentile", percentile=rule.percentile, warmup=rule.warmup)
    if isinstance(rule, EmaRule):
        return ClipConfig(rule="ema", k=rule.k, alpha=rule.alpha, warmup=rule.warmup)
    assert isinstance(rule, ZScoreRule)
    return ClipConfig(rule="zscore", z=rule.z_level, alpha=rule.alpha, warmup=rule.warmup)


def test_decisions_are_the_engines_comparisons_in_float32() -> None:
    # The engine (core/engine.py) clips when norm > level and skips when not
    # norm <= skip_factor * level, on float32 tensors; torch computes the reference here.
    rng = np.random.default_rng(11)
    watched = spiky_sequence(rng, 500).astype(np.float32).astype(np.float64)
    levels = np.where(rng.random(500) < 0.1, math.inf, rng.uniform(0.5, 3.0, 500))
    clip = ClipConfig(rule="percentile", on_spike="skip", skip_factor=1.7)
    clipped, skipped = decide(watched, levels, clip, "float32")
    norm = torch.tensor(watched, dtype=torch.float32)
    level = torch.tensor(levels.tolist(), dtype=torch.float32)
    factor = torch.full((500,), 1.7, dtype=torch.float32)
    np.testing.assert_array_equal(clipped, (norm > level).numpy())
    np.testing.assert_array_equal(skipped, (~(norm <= factor * level)).numpy())


def test_a_nan_norm_is_never_clipped_but_is_skipped_once_the_rule_clips() -> None:
    watched = np.array([1.0, math.nan, math.inf, math.nan])
    levels = np.array([math.inf, math.inf, 2.0, 2.0])
    clipped, skipped = decide(watched, levels, ClipConfig(on_spike="skip"))
    assert clipped.tolist() == [False, False, True, False]
    # At an infinite level, inf <= inf holds (not skipped) and NaN <= inf does not (skipped).
    assert skipped.tolist() == [False, True, True, True]


def spike_reference(norm: np.ndarray, rule: SpikeRule) -> np.ndarray:
    """The definition, one step at a time with numpy's median."""
    ranked = np.where(np.isfinite(norm), norm, np.inf)
    out = np.zeros(len(norm), dtype=bool)
    for t in range(rule.window, len(norm)):
        median = np.median(ranked[t - rule.window : t])
        out[t] = bool(np.isfinite(norm[t]) and norm[t] > rule.factor * median)
    return out


@pytest.mark.parametrize(("window", "factor"), [(50, 3.0), (7, 1.5), (10, 1.05)])
def test_spikes_are_norms_above_a_factor_times_the_trailing_median(
    window: int, factor: float
) -> None:
    rng = np.random.default_rng(window)
    norm = spiky_sequence(rng, 2000) * np.linspace(1.0, 4.0, 2000)  # a drifting level
    rule = SpikeRule(window, factor)
    np.testing.assert_array_equal(find_spikes(norm, rule), spike_reference(norm, rule))


def test_a_rule_reports_its_clip_rate_by_thirds_and_the_spikes_it_catches() -> None:
    norm = np.ones(90)
    norm[[70, 80]] = 10.0  # two spikes in the last third, both above the threshold
    norm[5] = 2.5  # above the threshold, not a spike (the window is not full)
    spikes = find_spikes(norm, SpikeRule(window=50, factor=3.0))
    assert np.flatnonzero(spikes).tolist() == [70, 80]
    result = replay(norm, ClipConfig(rule="fixed", threshold=2.0), spikes)
    assert result.clip_rate == pytest.approx(3 / 90)
    assert result.clip_rate_thirds == pytest.approx((1 / 30, 0.0, 2 / 30))
    assert result.spikes_caught == 2 and result.skip_rate == 0.0


def test_rules_that_differ_in_the_spike_action_share_their_levels() -> None:
    norm = spiky_sequence(np.random.default_rng(5), 400)
    clips = default_clips(norm, threshold=1.3)
    replays = replay_rules(norm, clips)
    keys = [r.key for r in replays]
    assert len(set(keys)) == len(keys)
    assert "fixed threshold=1.3 clip" in keys and "fixed threshold=1.3 skip skip_factor=4" in keys
    by_key = {r.key: r for r in replays}
    for rule in ("percentile percentile=90 warmup=25", "ema k=2 alpha=0.97 warmup=25"):
        clip, skip = by_key[f"{rule} clip"], by_key[f"{rule} skip skip_factor=4"]
        assert clip.levels is skip.levels
        np.testing.assert_array_equal(clip.clipped, skip.clipped)
        assert skip.skipped.sum() > 0 and clip.skipped.sum() == 0


def test_the_threshold_grid_is_one_two_five_from_the_median_to_the_largest_norm() -> None:
    norm = np.array([0.3, 0.4, 0.5, 0.6, 7.0, math.inf, math.nan])
    assert threshold_grid(norm) == [0.5, 1.0, 2.0, 5.0]
    assert threshold_grid(norm, extra=[0.77]) == [0.5, 0.77, 1.0, 2.0, 5.0]
    assert rule_key(ClipConfig(rule="fixed", threshold=0.77)) == "fixed threshold=0.77 clip"


REPLAY_PRESET = {
    "name": "Replayed members",
    "data": {"task": "linear", "dim": 6, "n_train": 1024, "n_val": 64, "noise": 0.3, "seed": 4},
    "outliers": {
        "kind": "target-shift",
        "placement": "batch",
        "rate": 0.08,
        "count": 1,
        "scale": 40.0,
    },
    "model": {"kind": "linear"},
    "train": {"steps": 400, "batch_size": 16, "lr": 0.05, "eval_every": 1, "seed": 2},
    "clip": [
        {"method": "none"},
        {"method": "global-norm", "threshold": 2.0, "label": "fixed"},
        {
            "method": "global-norm",
            "rule": "percentile",
            "percentile": 80.0,
            "warmup": 10,
            "label": "p80",
        },
        {
            "method": "global-norm",
            "rule": "ema",
            "k": 1.5,
            "alpha": 0.9,
            "warmup": 10,
            "label": "ema",
        },
        {
            "method": "global-norm",
            "rule": "zscore",
            "z": 2.0,
            "alpha": 0.9,
            "warmup": 10,
            "label": "z",
        },
        {
            "method": "global-norm",
            "rule": "percentile",
            "percentile": 70.0,
            "warmup": 5,
            "on_spike": "skip",
            "skip_factor": 1.5,
            "label": "p70 skip",
        },
        {
            "method": "global-norm",
            "threshold": 1.0,
            "on_spike": "skip",
            "skip_factor": 2.0,
            "label": "fixed skip",
        },
    ],
}


def test_replaying_a_members_own_metrics_gives_exactly_the_steps_the_engine_clipped() -> None:
    # The reference is the engine itself: clipped_share is 1 on a step it clipped, the new
    # skipped metric 1 on a step it dropped, clip_level the level it applied.
    result = api.run(parse_scenario(REPLAY_PRESET))
    text = metrics_csv([result])
    clipped_share = result.metric("clipped_share")
    skipped = result.metric("skipped")
    applied = result.metric("clip_level")
    assert not any(result.diverged_at)
    for member in range(1, len(result.members)):
        log = parse_log_text(text, "metrics.csv", member=member)
        assert log.source == "metrics" and log.precision == "float32" and log.every_step
        clip = result.members[member].clip
        replayed = replay(log.norm, clip, precision=log.precision)
        np.testing.assert_array_equal(replayed.clipped, clipped_share[:, member] == 1.0)
        np.testing.assert_array_equal(replayed.skipped, skipped[:, member] == 1.0)
        np.testing.assert_array_equal(replayed.levels.astype(np.float32), applied[:, member])
        assert 0 < replayed.clipped.sum() < log.rows  # the rule did decide something
        if clip.on_spike == "skip":
            assert 0 < replayed.skipped.sum() < replayed.clipped.sum()
    assert np.isnan(applied[:, 0]).all() and (skipped[:, 0] == 0).all()  # method none
