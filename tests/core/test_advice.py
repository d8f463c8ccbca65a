"""advice.json and the printed advice: the documented keys, strict JSON, suggestions that keep
their promise (checked by counting the norms with numpy), and the shipped example log."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest

from core.advice import advice_json, advice_lines, advise, write_advice
from core.errors import GradfenceInputError
from core.normlog import NormLog, load_log
from core.replay import OPEN_LOOP, SpikeRule
from core.suggest import separate, short_value
from core.synthetic_log import SyntheticRun, generate, write_csv
from tests.conftest import SCENARIOS

EXAMPLE = SCENARIOS / "logs" / "example-run.csv"


def plain_log(norm: np.ndarray, batch: float | None = 32.0) -> NormLog:
    rows = len(norm)
    return NormLog(
        name="plain.csv",
        source="csv",
        steps=np.arange(1, rows + 1),
        norm=norm,
        batch=None if batch is None else np.full(rows, batch),
    )


def steady_norms(rows: int = 2000, seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    norm = np.exp(rng.normal(0.0, 0.15, rows))
    norm[rng.choice(np.arange(100, rows), 12, replace=False)] *= 20.0
    norm[[500, 1500]] = [math.inf, math.nan]
    return norm


def test_advice_json_has_the_documented_keys_and_is_strict_json(tmp_path: Path) -> None:
    advice = advise(load_log(EXAMPLE), threshold=3.0, to_batch=128)
    path = write_advice(advice, tmp_path)
    data = json.loads(path.read_text())
    assert {"steps", "nonfinite_steps", "noise", "rules", "carried", "open_loop"} <= set(data)
    assert data["steps"] == 3000 and data["nonfinite_steps"] == 2
    assert data["open_loop"] == OPEN_LOOP
    noise = data["noise"]
    for key in ("g_sq", "trace_sigma", "b_simple", "batch_small", "batch_big", "interval"):
        assert key in noise
    assert set(noise["interval"]) >= {"g_sq", "trace_sigma", "b_simple", "level"}
    given = data["rules"]["fixed threshold=3 clip"]
    assert {"clip_rate", "skip_rate", "spikes_caught", "parameters"} <= set(given)
    assert given["parameters"] == {"threshold": 3.0}
    assert "percentile percentile=90 warmup=25 skip skip_factor=4" in data["rules"]
    carried = data["carried"]
    for key in ("from_batch", "to_batch", "threshold", "carried_threshold", "interval"):
        assert key in carried
    assert (carried["from_batch"], carried["to_batch"], carried["threshold"]) == (64, 128, 3.0)
    json.dumps(data, allow_nan=False)  # no NaN or Infinity anywhere


def test_non_finite_numbers_are_written_as_null_or_inf_never_as_bare_json_infinity() -> None:
    # Before its warm-up completes no adaptive rule fires; a log this short never warms up.
    advice = advise(plain_log(np.array([1.0, math.inf, 2.0, math.nan])))
    data = advice_json(advice)
    assert data["rules"]["percentile percentile=90 warmup=25 clip"]["first_fired_step"] is None
    assert data["noise"] is None and "cannot be told apart" in data["noise_note"]
    text = json.dumps(data, allow_nan=False)
    assert "Infinity" not in text and "NaN" not in text


def test_suggestions_clip_at_most_the_spikes_share_and_the_counts_agree_with_numpy() -> None:
    norm = steady_norms()
    advice = advise(plain_log(norm))
    spikes = advice.spikes
    assert spikes.sum() == 12
    s = advice.suggestions
    assert s.basis == "spikes" and s.target_share == pytest.approx(12 / 2000)
    by_rule = {g.rule: g for g in s.rules}
    fixed = by_rule["fixed"].value
    assert fixed is not None
    # The fixed threshold clips the norms above it: count them directly.
    finite_above = int((norm[np.isfinite(norm)] > fixed).sum())
    assert finite_above <= 12
    assert by_rule["fixed"].clip_rate == pytest.approx((finite_above + 1) / 2000)  # and the inf
    for g in s.rules:
        assert g.value is not None and g.clip_rate <= (12 + 1) / 2000 + 1e-12, g.rule


def test_a_chosen_share_is_capped_by_the_largest_clip_share() -> None:
    advice = advise(plain_log(steady_norms()), clip_share=0.2, max_clip_share=0.05)
    assert advice.suggestions.target_share == 0.05
    for g in advice.suggestions.rules:
        assert g.clip_rate <= 0.05 + 1 / 2000 + 1e-12, g.rule


def test_separated_spikes_get_a_separating_threshold_and_mixed_ones_a_sentence() -> None:
    norm = np.ones(200)
    spikes = np.zeros(200, dtype=bool)
    norm[[60, 120]], spikes[[60, 120]] = 8.0, True
    norm[30] = 2.0  # the largest ordinary norm
    separation, note = separate(norm, spikes)
    assert separation is not None and (separation.lower, separation.upper) == (2.0, 8.0)
    assert 2.0 <= separation.threshold < 8.0 and "stand apart" in note
    norm[30] = 9.0  # now an ordinary norm is above a spike
    separation, note = separate(norm, spikes)
    assert separation is None and note.startswith("No fixed threshold separates the spikes")


def test_short_values_have_the_fewest_digits_in_their_range() -> None:
    assert short_value(2.64, 5.145) == 3.0
    assert short_value(0.0123, 0.0124) == 0.0123
    assert short_value(0.012341, 0.01239) == 0.01235
    assert short_value(7.0, math.inf) == 7.0
    assert short_value(7.2, 7.2) == 7.2  # nothing in an empty range: the low end


def test_carrying_needs_a_batch_size() -> None:
    with pytest.raises(GradfenceInputError, match="gives no batch size"):
        advise(plain_log(steady_norms(), batch=None), threshold=1.0, to_batch=64)


def test_with_one_norm_the_carry_gives_both_limits() -> None:
    advice = advise(plain_log(steady_norms()), threshold=2.0, to_batch=128)
    carried = advice_json(advice)["carried"]
    assert carried["carried_threshold"] is None and carried["interval"] is None
    assert carried["signal_limit"] == 2.0 and carried["noise_limit"] == pytest.approx(1.0)


def test_without_a_threshold_the_suggested_one_is_carried() -> None:
    advice = advise(load_log(EXAMPLE), to_batch=256)
    assert advice.carried is not None and advice.carried_source == "suggested"
    assert advice.carried.threshold == advice.suggestions.rules[0].value


def test_the_printed_lines_say_the_replay_is_open_loop_and_show_every_rule() -> None:
    advice = advise(load_log(EXAMPLE), threshold=3.0, to_batch=128)
    lines = advice_lines(advice)
    assert OPEN_LOOP in lines
    for r in advice.replays:
        assert any(line.startswith(r.key + " ") for line in lines), r.key
    assert any(line.startswith("Noise (two batch sizes") for line in lines)
    assert any("becomes" in line and "at batch size 128" in line for line in lines)


def test_the_example_log_is_what_its_script_writes(tmp_path: Path) -> None:
    written = tmp_path / "example-run.csv"
    write_csv(written, generate(SyntheticRun(rows=3000, small_every=4, seed=15)), digits=6)
    assert written.read_bytes() == EXAMPLE.read_bytes()


def test_the_example_log_gives_back_the_noise_it_was_made_with() -> None:
    # The truth is the generator's |G|^2 and tr(Sigma) over the rows the estimate used (the last
    # 1000, spikes left out); six significant digits in the file change little.
    table = generate(SyntheticRun(rows=3000, small_every=4, seed=15))
    advice = advise(load_log(EXAMPLE), spike_rule=SpikeRule())
    noise = advice.noise
    assert noise is not None and (noise.batch_small, noise.batch_big) == (8, 64)
    used = slice(noise.first_step - 1, noise.last_step)
    for estimate, interval, truth in (
        (noise.g_sq, noise.g_sq_interval, table["g_sq"][used].mean()),
        (noise.trace_sigma, noise.trace_sigma_interval, table["trace_sigma"][used].mean()),
    ):
        half_width = (interval.high - interval.low) / 2
        assert abs(estimate - truth) < 1.5 * half_width  # within the 95% interval's reach


def test_a_log_shorter_than_the_warm_up_gets_no_adaptive_suggestion() -> None:
    advice = advise(plain_log(np.array([1.0, 2.0, 1.5, 1.2])))
    by_rule = {g.rule: g for g in advice.suggestions.rules}
    assert by_rule["fixed"].value is not None
    for rule in ("percentile", "ema", "zscore"):
        assert by_rule[rule].value is None and "too few for a warm-up of 25" in by_rule[rule].note
