"""Advice on a user's own run from its log of norms: rule replays, suggestions, noise, carrying.

`advise` gathers everything into a typed `Advice`; `advice_json` is the contents of advice.json
(non-finite numbers written as null, documented in docs/advise-contract.md) and `advice_lines`
the plain lines `gradfence advise` prints. All of it is open-loop (see core.replay).
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from core.errors import GradfenceInputError
from core.fileio import write_text_atomic
from core.formats import json_number
from core.noise import (
    Carry,
    Interval,
    NoiseEstimate,
    carry_threshold,
    estimate_noise,
    noise_gap,
)
from core.normlog import NormLog
from core.replay import (
    OPEN_LOOP,
    Replay,
    SpikeRule,
    default_clips,
    find_spikes,
    replay_rules,
)
from core.scenario import ClipConfig
from core.suggest import Suggestions, suggest

ADVICE_SCHEMA = 1


@dataclass(frozen=True)
class Advice:
    """Everything `gradfence advise` reports on one log."""

    log: NormLog
    spike_rule: SpikeRule
    spikes: np.ndarray  # (rows,) bool
    replays: list[Replay]
    suggestions: Suggestions
    noise: NoiseEstimate | None
    noise_note: str | None  # why there is no noise estimate
    carried: Carry | None
    threshold: float | None  # the threshold C the user gave
    carried_source: str | None = None  # "given" or "suggested": which threshold was carried

    @property
    def spike_count(self) -> int:
        return int(self.spikes.sum())


def advise(
    log: NormLog,
    threshold: float | None = None,
    to_batch: int | None = None,
    from_batch: int | None = None,
    max_clip_share: float = 0.01,
    clip_share: float | None = None,
    spike_rule: SpikeRule | None = None,
    base: ClipConfig | None = None,
    window: int | None = 1000,
    seed: int = 0,
) -> Advice:
    """Replay every rule on the log, suggest thresholds, estimate the noise, carry a threshold.

    `base` holds the adaptive rules' parameters and skip_factor (ClipConfig's defaults when
    None); the noise estimate uses the last `window` rows (spikes left out);
    `from_batch` defaults to the log's batch size at its last row that gives one.
    """
    if threshold is not None and not (math.isfinite(threshold) and threshold > 0):
        raise GradfenceInputError(f"The threshold {threshold:g} must be a number above 0.")
    if not 0 < max_clip_share <= 1:
        raise GradfenceInputError(
            f"The largest clip share {max_clip_share:g} must be above 0 and at most 1."
        )
    if clip_share is not None and not 0 <= clip_share <= 1:
        raise GradfenceInputError(f"The clip share {clip_share:g} must be from 0 to 1.")
    if to_batch is not None and to_batch < 1:
        raise GradfenceInputError(f"The target batch size {to_batch} must be at least 1.")
    spike_rule = spike_rule or SpikeRule()
    base = base or ClipConfig(method="global-norm")
    if to_batch is not None and from_batch is None:
        from_batch = _last_batch(log)
    spikes = find_spikes(log.norm, spike_rule)
    clips = default_clips(log.norm, threshold, base)
    replays = replay_rules(log.norm, clips, spikes, log.precision)
    suggestions = suggest(log.norm, spikes, clip_share, max_clip_share, base, log.precision)
    noise = estimate_noise(log, window=window, leave_out=spikes, seed=seed)
    carried = None
    source = None
    if to_batch is not None and from_batch is not None:
        carried_from = threshold
        source = "given"
        if carried_from is None:
            carried_from = suggestions.rules[0].value
            source = "suggested"
        if carried_from is not None:
            carried = carry_threshold(carried_from, from_batch, to_batch, noise)
    return Advice(
        log=log,
        spike_rule=spike_rule,
        spikes=spikes,
        replays=replays,
        suggestions=suggestions,
        noise=noise,
        noise_note=noise_gap(log, window, spikes),
        carried=carried,
        threshold=threshold,
        carried_source=source if carried is not None else None,
    )


def _last_batch(log: NormLog) -> int:
    if log.batch is not None:
        known = np.flatnonzero(np.isfinite(log.batch))
        if len(known):
            return int(log.batch[known[-1]])
    raise GradfenceInputError(
        f"{log.name} gives no batch size, so a threshold cannot be carried to another one; "
        "give it with --batch-size or --batch-column."
    )


# ---------------------------------------------------------------------------------------------
# advice.json


def _number(value: float | None) -> float | str | None:
    """JSON has no inf or NaN: NaN is null and an infinity "inf" or "-inf", as in every file of
    the tool (core.formats.json_number)."""
    if value is None:
        return None
    return json_number(float(value))


def _interval_json(interval: Interval | None) -> dict[str, float | str | None] | None:
    if interval is None:
        return None
    return {"low": _number(interval.low), "high": _number(interval.high)}


def _replay_json(r: Replay, steps: np.ndarray) -> dict[str, Any]:
    fired = np.flatnonzero(r.clipped | r.skipped)
    return {
        "rule": r.clip.rule,
        "on_spike": r.clip.on_spike,
        "parameters": {k: _number(v) for k, v in r.parameters.items()},
        "clip_rate": _number(r.clip_rate),
        "skip_rate": _number(r.skip_rate),
        "clip_rate_thirds": [_number(v) for v in r.clip_rate_thirds],
        "spikes_caught": r.spikes_caught,
        "first_fired_step": int(steps[fired[0]]) if len(fired) else None,
    }


def _noise_json(noise: NoiseEstimate | None) -> dict[str, Any] | None:
    if noise is None:
        return None
    return {
        "g_sq": _number(noise.g_sq),
        "trace_sigma": _number(noise.trace_sigma),
        "b_simple": _number(noise.b_simple),
        "batch_small": noise.batch_small,
        "batch_big": noise.batch_big,
        "batch_pairs": [
            {"batch_small": p.batch_small, "batch_big": p.batch_big, "steps": p.steps}
            for p in noise.batch_pairs
        ],
        "measurements": noise.measurements,
        "first_step": noise.first_step,
        "last_step": noise.last_step,
        "interval": {
            "level": noise.level,
            "g_sq": _interval_json(noise.g_sq_interval),
            "trace_sigma": _interval_json(noise.trace_sigma_interval),
            "b_simple": _interval_json(noise.b_simple_interval),
            "method": "block bootstrap over steps",
            "block": noise.block,
            "resamples": noise.resamples,
            "seed": noise.seed,
        },
        "estimator": "two batch sizes, McCandlish et al. 2018 (arXiv 1812.06162), appendix A; "
        "B_simple is the ratio of the window means",
    }


def _carried_json(carry: Carry | None, source: str | None) -> dict[str, Any] | None:
    if carry is None:
        return None
    return {
        "from_batch": carry.from_batch,
        "to_batch": carry.to_batch,
        "threshold": _number(carry.threshold),
        "threshold_source": source,
        "carried_threshold": _number(carry.carried_threshold),
        "interval": _interval_json(carry.interval),
        "signal_limit": _number(carry.signal_limit),
        "noise_limit": _number(carry.noise_limit),
        "predicted_norm_from": _number(carry.predicted_from),
        "predicted_norm_to": _number(carry.predicted_to),
        "sentence": carry.sentence(
            "The suggested fixed threshold" if source == "suggested" else "A threshold"
        ),
    }


def advice_json(advice: Advice) -> dict[str, Any]:
    """The contents of advice.json (docs/advise-contract.md)."""
    log = advice.log
    s = advice.suggestions
    spike_steps = log.steps[advice.spikes]
    return {
        "schema": ADVICE_SCHEMA,
        "log": log.name,
        "source": log.source,
        "member": log.member,
        "steps": log.rows,
        "first_step": int(log.steps[0]),
        "last_step": int(log.steps[-1]),
        "every_step_logged": log.every_step,
        "nonfinite_steps": log.nonfinite_steps,
        "open_loop": OPEN_LOOP,
        "spikes": {
            "definition": advice.spike_rule.describe(),
            "window": advice.spike_rule.window,
            "factor": advice.spike_rule.factor,
            "count": advice.spike_count,
            "steps": [int(v) for v in spike_steps],
        },
        "threshold": _number(advice.threshold),
        "rules": {r.key: _replay_json(r, log.steps) for r in advice.replays},
        "suggestions": {
            "basis": s.basis,
            "target_share": _number(s.target_share),
            "max_clip_share": _number(s.max_clip_share),
            "rules": {
                g.rule: {
                    "parameter": g.parameter,
                    "value": _number(g.value),
                    "clip_rate": _number(g.clip_rate),
                    "spikes_caught": g.spikes_caught,
                    "note": g.note or None,
                }
                for g in s.rules
            },
            "separating": None
            if s.separation is None
            else {
                "lower": _number(s.separation.lower),
                "upper": _number(s.separation.upper),
                "threshold": _number(s.separation.threshold),
            },
            "separating_note": s.separation_note,
        },
        "noise": _noise_json(advice.noise),
        "noise_note": advice.noise_note,
        "carried": _carried_json(advice.carried, advice.carried_source),
    }


def write_advice(advice: Advice, folder: Path) -> Path:
    """Write advice.json into `folder` (atomically); returns its path."""
    path = folder / "advice.json"
    write_text_atomic(path, json.dumps(advice_json(advice), indent=2, allow_nan=False) + "\n")
    return path


# ---------------------------------------------------------------------------------------------
# The printed lines


def _percent(value: float) -> str:
    if not math.isfinite(value):
        return "-"
    if value == 0:
        return "0"
    return f"{100 * value:.2f}%" if value < 0.1 else f"{100 * value:.1f}%"


def advice_lines(advice: Advice) -> list[str]:
    """What `gradfence advise` prints: the log, the rules table, suggestions, noise, carry."""
    log = advice.log
    gaps = (
        ""
        if log.every_step
        else "; not every step is logged, and the rules see only the logged ones"
    )
    member = f" (member {log.member})" if log.member is not None else ""
    lines = [
        f"{log.name}{member}: {log.rows} logged steps ({int(log.steps[0])} to "
        f"{int(log.steps[-1])}{gaps}), {log.nonfinite_steps} non-finite norms, "
        f"{advice.spike_count} spikes ({advice.spike_rule.describe()}).",
        OPEN_LOOP,
        "",
    ]
    table = [("rule", "clips", "skips", "by third", "spikes caught")]
    for r in advice.replays:
        thirds = " / ".join(_percent(v) for v in r.clip_rate_thirds)
        skips = _percent(r.skip_rate) if r.clip.on_spike == "skip" else "-"
        caught = f"{r.spikes_caught}/{advice.spike_count}" if advice.spike_count else "-"
        table.append((r.key, _percent(r.clip_rate), skips, thirds, caught))
    widths = [max(len(row[c]) for row in table) for c in range(len(table[0]))]
    for i, row in enumerate(table):
        lines.append("  ".join(cell.ljust(w) for cell, w in zip(row, widths, strict=True)).rstrip())
        if i == 0:
            lines.append("  ".join("-" * w for w in widths))
    s = advice.suggestions
    what = "the spikes only" if s.basis == "spikes" else f"{_percent(s.target_share)} of steps"
    lines += ["", f"Suggested (to clip {what}, at most {_percent(s.max_clip_share)} of steps):"]
    for g in s.rules:
        if g.value is None:
            lines.append(f"  {g.rule}: none ({g.note})")
            continue
        caught = f", {g.spikes_caught} of {advice.spike_count} spikes" if advice.spike_count else ""
        lines.append(
            f"  {g.rule}: {g.parameter} = {g.value:.4g} (clips {_percent(g.clip_rate)} of "
            f"steps{caught})"
        )
    lines.append(s.separation_note)
    lines.append("")
    noise = advice.noise
    if noise is None:
        lines.append(advice.noise_note or "No noise estimate.")
    else:
        sizes = ", ".join(f"{p.batch_small} and {p.batch_big}" for p in noise.batch_pairs)
        b = noise.b_simple_interval
        lines.append(
            f"Noise (two batch sizes {sizes}; {noise.measurements} steps from {noise.first_step} "
            f"to {noise.last_step}): |G|^2 = {noise.g_sq:.4g}, tr(Sigma) = "
            f"{noise.trace_sigma:.4g}, B_simple = {noise.b_simple:.4g} "
            f"({noise.level:.0%} interval {b.low:.4g} to {b.high:.4g})."
        )
    if advice.carried is not None:
        label = "The suggested fixed threshold" if advice.carried_source == "suggested" else None
        lines.append(advice.carried.sentence(label or "A threshold"))
    return lines
