"""How much memory a scenario needs, from its sizes alone, checked before anything trains.

The estimate adds what a training process holds: its interpreter with torch (measured: about
230 MB resident after importing torch and the engine), the data (numpy float64 and the float32
copy the engine trains on), the stack's parameters with gradients and optimizer state, a step's
activations and gradients for every member (logged steps split them into clean and outlier
parts), the validation buffers, and the batch plan. It errs high rather than low; a run that
passes may still use less.
"""

from __future__ import annotations

import itertools
import math
import os
from collections.abc import Iterable
from dataclasses import dataclass

from core.errors import GradfenceInputError
from core.scenario import Scenario

PROCESS_BYTES = 300 * 2**20  # the interpreter, torch and the engine, with room to spare
GB = 2**30


@dataclass(frozen=True)
class MemoryEstimate:
    data: int
    stack: int
    activations: int
    process: int = PROCESS_BYTES

    @property
    def total(self) -> int:
        return self.data + self.stack + self.activations + self.process

    def describe(self) -> str:
        parts = (
            ("data", self.data),
            ("parameters and optimizer", self.stack),
            ("activations", self.activations),
            ("torch", self.process),
        )
        return ", ".join(f"{name} {gigabytes(size)}" for name, size in parts)


def gigabytes(size: float) -> str:
    return f"{size / GB:.2f} GB" if size < 10 * GB else f"{size / GB:.0f} GB"


def parameter_count(scenario: Scenario) -> int:
    dim = 2 if scenario.data.task in ("moons", "spirals", "xor") else scenario.data.dim
    out = scenario.data.classes if scenario.is_classification else 1
    hidden = scenario.model.hidden if scenario.model.kind == "mlp" else ()
    sizes = (dim, *hidden, out)
    return sum((a + 1) * b for a, b in itertools.pairwise(sizes))


def estimate(
    scenario: Scenario, members: int, batch_size: int, seeds: int = 1, trace: bool = False
) -> MemoryEstimate:
    """What one process training `members` members at `batch_size` holds at its peak; with
    `trace`, also every step's example norms (`gradfence train --trace`)."""
    d, t = scenario.data, scenario.train
    dim = 2 if d.task in ("moons", "spirals", "xor") else d.dim
    pool = 0
    if scenario.outliers.kind != "none" and scenario.outliers.placement == "batch":
        pool = min(scenario.outliers.count * t.steps, 1_000_000)
    rows = d.n_train + pool + d.n_val
    data = rows * (dim + 1) * (8 + 4) * 2  # numpy float64 and the float32 copy, x and y, twice
    params = parameter_count(scenario)
    # theta, its gradient, the optimizer's states and the saved copies (initial weights, the
    # step's start): measured, about seven per parameter under Adam, six under SGD; Adam's step
    # adds its denominator, a temporary the size of theta (peaks measured within 1% of seven).
    optimizer_copies = 8 if t.optimizer != "sgd" else 6
    stack = members * params * 4 * optimizer_copies
    hidden = scenario.model.hidden if scenario.model.kind == "mlp" else ()
    width = dim + sum(hidden) + (d.classes if scenario.is_classification else 1)
    # Forward and backward keep a, z and dz per layer; logged steps split them clean/outlier;
    # the clipped products and the batch gathered from the data add about as much again (ten
    # float32 copies per unit: measured peaks reach nine at a batch of 65536).
    step = members * batch_size * width * 4 * 10
    step += members * params * 4 * 7  # flat gradients: clipped, four parts when logged, noise
    evaluation = members * d.n_val * width * 4 * 2
    # The batch plan: int64 rows and their outlier flags per seed, each stacked once more.
    plan = seeds * t.steps * batch_size * (8 + 1 + 8 + 1)
    kept = members * t.steps * batch_size * 8 if trace else 0  # float64 norms, every step
    return MemoryEstimate(data, stack, step + evaluation + plan + kept)


def available_bytes() -> int | None:
    """Memory free for new work now (Linux: MemAvailable), None when the system will not say."""
    try:
        with open("/proc/meminfo", encoding="ascii") as f:
            for line in f:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    try:
        return os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
    except (ValueError, OSError, AttributeError):
        return None


def check_fits(
    scenario: Scenario,
    members: int,
    batch_size: int,
    processes: int = 1,
    seeds: int = 1,
    trace: bool = False,
    what: str = "training",
) -> MemoryEstimate:
    """Raise one sentence when `processes` processes of this size do not fit in free memory;
    `what` names the work in it."""
    need = estimate(scenario, members, batch_size, seeds, trace)
    free = available_bytes()
    if free is not None and need.total * processes > free:
        many = f"{processes} processes of " if processes > 1 else ""
        fewer = " (or --jobs)" if processes > 1 else ""
        raise GradfenceInputError(
            f"{scenario.name}: {what} needs about {many}{gigabytes(need.total)} "
            f"({need.describe()}) at batch size {batch_size} with {members} member"
            f"{'' if members == 1 else 's'}, and "
            f"{gigabytes(free)} is free; lower data.n_train, model.hidden, the batch size or "
            f"the number of members{fewer}."
        )
    return need


def check_train_fits(scenario: Scenario, trace: bool = False) -> MemoryEstimate:
    """`gradfence train`: one process, one member per [[clip]] table at train.batch_size."""
    return check_fits(scenario, len(scenario.clip), scenario.train.batch_size, trace=trace)


def map_sizes(scenario: Scenario) -> tuple[int, int]:
    """The members of a map's largest chunk and its largest batch size: its costliest process
    (taken together, so the estimate errs high)."""
    from core.maps import plan

    chunks = plan(scenario)
    members = max((len(c.points) for c in chunks), default=1)
    biggest = max((c.batch_size for c in chunks), default=scenario.train.batch_size)
    return members, biggest


def check_map_fits(scenario: Scenario) -> MemoryEstimate:
    """A map: its costliest chunk in one process."""
    members, biggest = map_sizes(scenario)
    seeds = len(scenario.map.seeds)
    return check_fits(scenario, members, biggest, seeds=seeds, what="training a map chunk")


def check_stacks_fit(scenario: Scenario, stacks: Iterable[tuple[int, int]]) -> None:
    """A fan's stacks, as (members, batch size): each must fit in one process."""
    for members, batch_size in sorted(set(stacks), reverse=True):
        check_fits(scenario, members, batch_size, what="training a fan's stack")


def check_fan_fits(scenario: Scenario) -> None:
    """A fan trained whole: every member at each batch size of its ladder."""
    from core.fan import batch_ladder, fan_members

    members = len(fan_members(scenario))
    check_stacks_fit(scenario, [(members, b) for b in batch_ladder(scenario)])


def processes_that_fit(scenario: Scenario, members: int, batch_size: int, wanted: int) -> int:
    """At most `wanted` and the cores, and no more than free memory holds (at least one)."""
    cores = os.cpu_count() or 1
    need = estimate(scenario, members, batch_size).total
    free = available_bytes()
    by_memory = wanted if free is None else max(1, math.floor(free / max(need, 1)))
    return max(1, min(wanted, cores, by_memory))
