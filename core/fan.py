"""The scrubbing fan of a run entry: many thresholds per method over a ladder of batch sizes,
trained together so that moving a threshold or batch size only switches which member is shown."""

from __future__ import annotations

import dataclasses
import functools
import math

import numpy as np

from core.member import Member
from core.scenario import Scenario

FAN_SIZE = 17  # odd, so the middle member is the preset's own threshold
FAN_SPAN = 30.0  # thresholds from t / 30 to t * 30
LADDER = (0.25, 1.0, 4.0, 16.0)  # batch sizes relative to train.batch_size


@functools.cache
def fan_factors() -> np.ndarray:
    """Multipliers of the preset's threshold, log-spaced, 1.0 in the middle (read-only)."""
    factors = np.geomspace(1.0 / FAN_SPAN, FAN_SPAN, FAN_SIZE)
    factors.flags.writeable = False
    return factors


def batch_ladder(scenario: Scenario) -> tuple[int, ...]:
    """Up to four batch sizes around the preset's that the rest of the preset allows."""
    base = scenario.train.batch_size
    low = (
        scenario.outliers.count
        if scenario.outliers.kind != "none" and scenario.outliers.placement == "batch"
        else 1
    )
    groups = [c.microbatch for c in scenario.clip if "microbatch" in c.spec.options]
    sizes = set()
    for factor in LADDER:
        b = round(base * factor)
        b = min(max(b, low), scenario.data.n_train)
        for g in groups:  # keep the microbatch group size a divisor
            b = max(g, b - b % g)
        sizes.add(b)
    return tuple(sorted(sizes))


def fan_members(scenario: Scenario) -> list[Member]:
    """Every [[clip]] table at each fan threshold, at train.seed. Method none, and a table whose
    rule sets the threshold itself (an adaptive rule), is one member."""
    members = []
    for clip in scenario.clip:
        if clip.method == "none" or clip.threshold is None or clip.rule != "fixed":
            members.append(Member(clip, scenario.train.seed))
            continue
        for factor in fan_factors():
            threshold = float(clip.threshold * factor)
            members.append(
                Member(dataclasses.replace(clip, threshold=threshold), scenario.train.seed)
            )
    return members


def member_for(members: list[Member], label: str, factor: float) -> int:
    """The index of the member of `label` whose threshold is nearest factor x its preset value."""
    candidates = [i for i, m in enumerate(members) if m.name == label]
    if len(candidates) == 1:
        return candidates[0]
    factors = fan_factors()
    position = int(np.argmin(np.abs(np.log(factors) - math.log(factor))))
    return candidates[position]
