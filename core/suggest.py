"""Threshold suggestions from a replayed log: per rule, the parameter that clips a chosen share of
steps, and the fixed threshold that separates the spikes from the rest where one exists.

Every suggested value is checked by an exact replay, and the clip rate reported is that
replay's. Like the replay, this is open-loop: the share is of the logged norms.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from decimal import ROUND_CEILING, ROUND_HALF_EVEN, Decimal

import numpy as np

from core.replay import replay
from core.scenario import ClipConfig
from core.wavelet import PrefixOrder

# Where the searches for ema's k and zscore's z stop (ClipConfig's upper bounds).
SEARCH_LIMITS = {"k": (1e-3, 1e6), "z": (1e-3, 100.0)}
BISECTIONS = 7  # after bracketing by factors of 2: k or z to within 2^(1/128), about 0.5%


@dataclass(frozen=True)
class Suggestion:
    """One rule's suggested parameter, and what an exact replay at it gives."""

    rule: str
    parameter: str  # "threshold", "percentile", "k" or "z"
    value: float | None  # None when no value in range reaches the target
    clip_rate: float
    spikes_caught: int
    clip: ClipConfig | None
    note: str = ""


@dataclass(frozen=True)
class Separation:
    """Fixed thresholds in [lower, upper) clip every spike and no other finite norm."""

    lower: float  # the largest finite norm that is not a spike
    upper: float  # the smallest spike
    threshold: float  # the shortest decimal in [lower, upper)


@dataclass(frozen=True)
class Suggestions:
    target_share: float  # of steps
    max_clip_share: float
    basis: str  # "spikes": clip the spikes only; "share": a share given
    rules: list[Suggestion]
    separation: Separation | None
    separation_note: str  # the sentence on separation, either way


def suggest(
    watched: np.ndarray,
    spikes: np.ndarray,
    clip_share: float | None = None,
    max_clip_share: float = 0.01,
    base: ClipConfig | None = None,
    precision: str = "float64",
) -> Suggestions:
    """Per rule, the parameter that clips at most the target share of steps: the spikes' share
    (default) or `clip_share`, never more than `max_clip_share`.

    The share counts finite norms: a +inf norm is clipped by every rule that clips at all, and a
    NaN by none, whatever the parameter.
    """
    base = base or ClipConfig(method="global-norm")
    watched = np.asarray(watched, dtype=np.float64)
    n = len(watched)
    wanted = spikes.mean() if clip_share is None else clip_share
    target = float(min(wanted, max_clip_share)) if n else 0.0
    budget = math.floor(target * n + 1e-9)
    rules = [_suggest_fixed(watched, spikes, budget, base, precision)]
    finite = int(np.isfinite(watched).sum())
    # A rule clips nothing before its warm-up is over (percentile: more than `warmup` values;
    # ema: max(warmup, 1) values before the step; zscore: max(warmup, 2)).
    for rule, parameter, needed in (
        ("percentile", "percentile", base.warmup + 1),
        ("ema", "k", max(base.warmup, 1) + 1),
        ("zscore", "z", max(base.warmup, 2) + 1),
    ):
        if finite < needed:
            note = f"the log has {finite} finite norms, too few for a warm-up of {base.warmup}"
            rules.append(Suggestion(rule, parameter, None, math.nan, 0, None, note))
        elif rule == "percentile":
            rules.append(_suggest_percentile(watched, spikes, budget, base, precision))
        else:
            rules.append(
                _suggest_by_search(
                    watched, spikes, budget, replace(base, rule=rule), parameter, precision
                )
            )
    separation, note = separate(watched, spikes)
    basis = "spikes" if clip_share is None else "share"
    return Suggestions(target, max_clip_share, basis, rules, separation, note)


def _result(
    rule: str, parameter: str, clip: ClipConfig, watched: np.ndarray, spikes: np.ndarray, p: str
) -> tuple[Suggestion, int]:
    outcome = replay(watched, replace(clip, on_spike="clip"), spikes, p)
    value = getattr(clip, parameter)
    suggestion = Suggestion(
        rule, parameter, value, outcome.clip_rate, outcome.spikes_caught, clip, ""
    )
    return suggestion, int((outcome.clipped & np.isfinite(watched)).sum())


def _suggest_fixed(
    watched: np.ndarray, spikes: np.ndarray, budget: int, base: ClipConfig, precision: str
) -> Suggestion:
    finite = np.sort(watched[np.isfinite(watched)])[::-1]
    if len(finite) == 0:
        return Suggestion("fixed", "threshold", None, math.nan, 0, None, "no finite norms")
    room = min(budget, len(finite) - 1)
    upper = math.inf if room == 0 else float(finite[room - 1])
    threshold = short_value(float(finite[room]), upper)
    clip = replace(base, rule="fixed", threshold=threshold)
    return _result("fixed", "threshold", clip, watched, spikes, precision)[0]


def _suggest_percentile(
    watched: np.ndarray, spikes: np.ndarray, budget: int, base: ClipConfig, precision: str
) -> Suggestion:
    """AutoClip's p from each step's percentile rank in its own history.

    A finite norm at a step with h values in its history, r of them below it, is clipped at p
    when the virtual index (h - 1) p / 100 is below r (up to rounding), so the clip rate at p
    is the share of steps whose rank 100 r / (h - 1) exceeds p; the exact replay confirms it.
    """
    finite = np.isfinite(watched)
    count = np.cumsum(finite)
    after = count > base.warmup
    scored = np.flatnonzero(finite & after)
    percentile_rank = np.zeros(0)
    if len(scored):
        h = count[scored]
        below = PrefixOrder(watched[finite]).count_below(h, watched[scored])
        percentile_rank = np.where(h > 1, 100.0 * below / np.maximum(h - 1, 1), 0.0)
    ranks = np.sort(percentile_rank)[::-1]
    room = budget
    if room >= len(ranks):
        lower, upper = 0.0, 100.0 if len(ranks) == 0 else float(ranks[-1])
    else:
        lower = float(ranks[room])
        upper = 100.0 if room == 0 else float(ranks[room - 1])
    # Strictly above the (room+1)-th rank, and at most 100 (which clips no finite norm).
    value = min(100.0, short_value(float(np.nextafter(lower, math.inf)), max(upper, lower)))
    if value <= 0:
        value = min(100.0, short_value(1e-6, 100.0))
    best, clipped = _result(
        "percentile",
        "percentile",
        replace(base, rule="percentile", percentile=value),
        watched,
        spikes,
        precision,
    )
    # Rounding at a tie may clip one step more than the ranks say: step up until within budget.
    for _ in range(8):
        if clipped <= budget or value >= 100.0:
            break
        value = min(100.0, short_value(float(np.nextafter(value, math.inf)), 100.0))
        best, clipped = _result(
            "percentile",
            "percentile",
            replace(base, rule="percentile", percentile=value),
            watched,
            spikes,
            precision,
        )
    return best


def _suggest_by_search(
    watched: np.ndarray,
    spikes: np.ndarray,
    budget: int,
    base: ClipConfig,
    parameter: str,
    precision: str,
) -> Suggestion:
    """The smallest k (ema) or z (zscore) found whose replay clips at most `budget` steps.

    A larger parameter raises the level and feeds the running statistics larger (less clipped)
    norms, so the clip count falls as it grows; bracket by factors of 2, then bisect.
    """
    low_limit, high_limit = SEARCH_LIMITS[parameter]
    rule = base.rule
    cache: dict[float, tuple[Suggestion, int]] = {}

    def attempt(value: float) -> tuple[Suggestion, int]:
        if value not in cache:
            clip = replace(base, k=value) if parameter == "k" else replace(base, z=value)
            cache[value] = _result(rule, parameter, clip, watched, spikes, precision)
        return cache[value]

    start = float(getattr(base, parameter))
    good: float | None = None
    bad: float | None = None
    value = start
    if attempt(value)[1] <= budget:
        good = value
        while value / 2 >= low_limit:
            value /= 2
            if attempt(value)[1] > budget:
                bad = value
                break
            good = value
    else:
        bad = value
        while value * 2 <= high_limit:
            value *= 2
            if attempt(value)[1] <= budget:
                good = value
                break
            bad = value
    if good is None:
        return Suggestion(
            rule,
            parameter,
            None,
            math.nan,
            0,
            None,
            f"no {parameter} up to {high_limit:g} keeps the clip rate within the target",
        )
    if bad is not None:
        for _ in range(BISECTIONS):
            middle = math.sqrt(good * bad)
            if attempt(middle)[1] <= budget:
                good = middle
            else:
                bad = middle
    # A short value at or above the one found, kept if its replay stays within the target.
    tidy = short_value(good, good * 1.01)
    if attempt(tidy)[1] <= budget:
        good = tidy
    return attempt(good)[0]


def separate(watched: np.ndarray, spikes: np.ndarray) -> tuple[Separation | None, str]:
    """The fixed thresholds that clip every spike and no other finite norm, if any do."""
    finite = np.isfinite(watched)
    spike_norms = watched[spikes & finite]
    others = watched[~spikes & finite]
    if len(spike_norms) == 0:
        return None, "There are no spikes, so there is nothing for a fixed threshold to separate."
    smallest = float(spike_norms.min())
    largest = float(others.max()) if len(others) else 0.0
    if smallest > largest:
        threshold = short_value(largest, smallest)
        return Separation(largest, smallest, threshold), (
            f"The spikes stand apart: any fixed threshold from {largest:.4g} up to (not "
            f"including) {smallest:.4g} clips every spike and no other step, e.g. "
            f"{threshold:.4g}."
        )
    return None, (
        f"No fixed threshold separates the spikes from the rest: the smallest spike "
        f"({smallest:.4g}) is below the largest ordinary norm ({largest:.4g}), so a rule that "
        "follows the norm's level is needed to clip the spikes alone."
    )


def short_value(low: float, high: float) -> float:
    """The decimal with the fewest significant digits in [low, high) (low when none is)."""
    if not math.isfinite(low) or low <= 0:
        return low
    exact = Decimal(low)
    for digits in range(1, 18):
        unit = Decimal(1).scaleb(exact.adjusted() - digits + 1)
        # The nearest decimal may name `low` itself (0.0123 is the double nearest 0.0123).
        for rounding in (ROUND_HALF_EVEN, ROUND_CEILING):
            value = float(exact.quantize(unit, rounding=rounding))
            if low <= value < high:
                return value
    return low
