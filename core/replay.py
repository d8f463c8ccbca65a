"""Replaying threshold rules on a log of norms: what each rule would have decided at every step.

The replay is open-loop: it feeds each rule the logged norms and shows the threshold level, the
steps it would clip or skip, and the spikes it would catch. It does not show how training would
have gone with that rule, since clipping or skipping a step changes every norm after it.

The decisions are the engine's (core/engine.py): a step is clipped when its norm is above the
level (`norm > level`, so a NaN norm is never clipped) and, under on_spike = "skip", skipped when
`not norm <= skip_factor * level` (so a non-finite norm is skipped once the rule clips at all).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, replace

import numpy as np

from core.rules import make_rule
from core.scenario import ClipConfig

OPEN_LOOP = (
    "This replay is open-loop: it shows what each rule would have decided on these logged "
    "norms, not how training would have gone with it (clipping or skipping a step changes the "
    "norms after it)."
)

# The rule parameters of ClipConfig that change the level sequence, per rule.
RULE_PARAMETERS = {
    "fixed": ("threshold",),
    "percentile": ("percentile", "warmup"),
    "ema": ("k", "alpha", "warmup"),
    "zscore": ("z", "alpha", "warmup"),
}


@dataclass(frozen=True)
class SpikeRule:
    """A spike is a finite norm above `factor` times the median of the `window` logged norms
    before it (a non-finite one among them counted as larger than any finite norm). The first
    `window` rows cannot be spikes: their trailing window is not full.
    """

    window: int = 50
    factor: float = 3.0

    def describe(self) -> str:
        return f"a norm above {self.factor:g} times the median of the {self.window} before it"


def find_spikes(norm: np.ndarray, rule: SpikeRule = SpikeRule()) -> np.ndarray:
    """(rows,) bool: the rows whose norm is a spike under `rule`."""
    norm = np.asarray(norm, dtype=np.float64)
    n, w = len(norm), rule.window
    spikes = np.zeros(n, dtype=bool)
    if n <= w:
        return spikes
    ranked = np.where(np.isfinite(norm), norm, np.inf)  # non-finite: above every finite norm
    current = norm[w:]
    # The median is at least the window's minimum, so only rows above factor * minimum can be
    # spikes; the exact median is taken for those alone.
    minimum = _trailing_minimum(ranked, w)[: n - w]
    with np.errstate(invalid="ignore", over="ignore"):
        candidates = np.flatnonzero(np.isfinite(current) & (current > rule.factor * minimum))
    if len(candidates) == 0:
        return spikes
    windows = np.lib.stride_tricks.sliding_window_view(ranked, w)  # row i: ranked[i : i + w]
    for start in range(0, len(candidates), 65536):
        chosen = candidates[start : start + 65536]
        median = np.median(windows[chosen], axis=1)
        with np.errstate(invalid="ignore", over="ignore"):
            spikes[chosen[current[chosen] > rule.factor * median] + w] = True
    return spikes


def _trailing_minimum(values: np.ndarray, w: int) -> np.ndarray:
    """min(values[i : i + w]) for every i, in O(n): block prefix and suffix minima (van Herk
    1992, Gil and Werman 1993; cited from memory)."""
    n = len(values)
    blocks = -(-n // w)
    padded = np.full(blocks * w, np.inf)
    padded[:n] = values
    shaped = padded.reshape(blocks, w)
    prefix = np.minimum.accumulate(shaped, axis=1).ravel()
    suffix = np.minimum.accumulate(shaped[:, ::-1], axis=1)[:, ::-1].ravel()
    starts = np.arange(n - w + 1)
    return np.minimum(suffix[starts], prefix[starts + w - 1])


@dataclass(frozen=True)
class Replay:
    """One rule's decisions at every row of a log."""

    clip: ClipConfig  # the rule, its parameters, on_spike and skip_factor
    levels: np.ndarray  # (rows,) the threshold level (inf: the rule does not clip yet)
    clipped: np.ndarray  # (rows,) bool: norm above the level (skipped rows included)
    skipped: np.ndarray  # (rows,) bool: dropped under on_spike = "skip"
    spikes: np.ndarray  # (rows,) bool, the log's spikes

    @property
    def rows(self) -> int:
        return len(self.levels)

    @property
    def clip_rate(self) -> float:
        """Share of rows whose norm was above the level (under skip, skipped rows too)."""
        return _share(self.clipped)

    @property
    def skip_rate(self) -> float:
        return _share(self.skipped)

    @property
    def clip_rate_thirds(self) -> tuple[float, float, float]:
        """The clip rate over the first, middle and last third of the rows."""
        first, middle, last = np.array_split(self.clipped, 3)
        return _share(first), _share(middle), _share(last)

    @property
    def spikes_caught(self) -> int:
        """Spikes the rule clipped or skipped."""
        return int((self.spikes & (self.clipped | self.skipped)).sum())

    @property
    def key(self) -> str:
        return rule_key(self.clip)

    @property
    def parameters(self) -> dict[str, float]:
        return rule_parameters(self.clip)


def _share(mask: np.ndarray) -> float:
    return float(mask.mean()) if len(mask) else math.nan


def rule_parameters(clip: ClipConfig) -> dict[str, float]:
    """The parameters that set a rule's level, and skip_factor under skip."""
    params: dict[str, float] = {}
    for name in RULE_PARAMETERS[clip.rule]:
        value = getattr(clip, name)
        params[name] = math.inf if value is None else value
    if clip.on_spike == "skip":
        params["skip_factor"] = clip.skip_factor
    return params


def rule_key(clip: ClipConfig) -> str:
    """A readable, unique key: 'percentile percentile=90 warmup=25 skip skip_factor=4'."""
    parts = [clip.rule]
    for name, value in rule_parameters(clip).items():
        if name == "skip_factor":
            continue
        parts.append(f"{name}={value:.12g}")
    parts.append(clip.on_spike)
    if clip.on_spike == "skip":
        parts.append(f"skip_factor={clip.skip_factor:.12g}")
    return " ".join(parts)


def rule_levels(clip: ClipConfig, watched: np.ndarray) -> np.ndarray:
    """The level at every step: exactly the sequence the engine's rule gives, step by step."""
    return make_rule(clip).levels(np.asarray(watched, dtype=np.float64))


def decide(
    watched: np.ndarray, levels: np.ndarray, clip: ClipConfig, precision: str = "float64"
) -> tuple[np.ndarray, np.ndarray]:
    """(clipped, skipped) per row, compared as the engine compares them.

    With precision "float32" the levels are rounded to float32 and compared in float32, as the
    engine does in its default dtype (its thresholds are a float32 tensor).
    """
    norm: np.ndarray = np.asarray(watched, dtype=np.float64)
    level: np.ndarray = np.asarray(levels, dtype=np.float64)
    factor: np.ndarray = np.asarray(clip.skip_factor, dtype=np.float64)
    with np.errstate(over="ignore", invalid="ignore"):
        if precision == "float32":  # a level beyond float32's range rounds to inf, as in torch
            norm, level, factor = (a.astype(np.float32) for a in (norm, level, factor))
        clipped = norm > level
        if clip.on_spike == "skip":
            skipped = ~(norm <= factor * level)
        else:
            skipped = np.zeros(len(norm), dtype=bool)
    return clipped, skipped


def replay(
    watched: np.ndarray,
    clip: ClipConfig,
    spikes: np.ndarray | None = None,
    precision: str = "float64",
    levels: np.ndarray | None = None,
) -> Replay:
    """Replay one rule (open-loop) on the watched norms; `levels` reuses a computed sequence."""
    if levels is None:
        levels = rule_levels(clip, watched)
    clipped, skipped = decide(watched, levels, clip, precision)
    if spikes is None:
        spikes = np.zeros(len(levels), dtype=bool)
    return Replay(clip, levels, clipped, skipped, spikes)


def replay_rules(
    watched: np.ndarray,
    clips: Sequence[ClipConfig],
    spikes: np.ndarray | None = None,
    precision: str = "float64",
) -> list[Replay]:
    """Replay several rules; rules that differ only in on_spike share one level sequence."""
    cache: dict[tuple[str, tuple[float, ...]], np.ndarray] = {}
    out = []
    for clip in clips:
        params = tuple(v for k, v in rule_parameters(clip).items() if k != "skip_factor")
        identity = (clip.rule, params)
        if identity not in cache:
            cache[identity] = rule_levels(clip, watched)
        out.append(replay(watched, clip, spikes, precision, cache[identity]))
    return out


def threshold_grid(norm: np.ndarray, extra: Sequence[float] = ()) -> list[float]:
    """Fixed thresholds worth a row: the 1-2-5 values from the median finite norm to the largest
    (at least three), and any thresholds given."""
    finite = np.sort(norm[np.isfinite(norm) & (norm > 0)])
    grid: set[float] = {float(t) for t in extra if t > 0}
    if len(finite):
        low, high = float(np.median(finite)), float(finite[-1])
        decade = math.floor(math.log10(low))
        candidates = [m * 10.0**e for e in range(decade - 1, decade + 12) for m in (1, 2, 5)]
        chosen = [c for c in candidates if low <= c <= high]
        if len(chosen) < 3:
            above = [c for c in candidates if c > low]
            below = [c for c in candidates if c <= low]
            chosen = sorted(set(below[-1:] + chosen + above[: 3 - len(chosen)]))
        grid.update(_tidy(c) for c in chosen)
    return sorted(grid)


def _tidy(value: float) -> float:
    return float(f"{value:.12g}")


def default_clips(
    norm: np.ndarray,
    threshold: float | None = None,
    base: ClipConfig | None = None,
    skip_factor: float | None = None,
) -> list[ClipConfig]:
    """The rules a log is replayed with: a fixed grid (with `threshold`) and the three adaptive
    rules at `base`'s parameters (ClipConfig defaults), each with on_spike clip and skip."""
    base = base or ClipConfig(method="global-norm")
    if skip_factor is not None:
        base = replace(base, skip_factor=skip_factor)
    extra = [threshold] if threshold is not None else []
    rules = [replace(base, rule="fixed", threshold=t) for t in threshold_grid(norm, extra)]
    rules += [replace(base, rule=r, threshold=None) for r in ("percentile", "ema", "zscore")]
    return [replace(c, on_spike=action) for c in rules for action in ("clip", "skip")]
