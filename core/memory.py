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


def estimate(scenario: Scenario, members: int, batch_size: int, seeds: int = 1) -> MemoryEstimate:
    """What one process training `members` members at `batch_size` holds at its peak."""
    d, t = scenario.data, scenario.train
    dim = 2 if d.task in ("moons", "spirals", "xor") else d.dim
    pool = 0
    if scenario.outliers.kind != "none" and scenario.outliers.placement == "batch":
        pool = min(scenario.outliers.count * t.steps, 1_000_000)
    rows = d.n_train + pool + d.n_val
    data = rows * (dim + 1) * (8 + 4) * 2  # numpy float64 and the float32 copy, x and y, twice
    params = parameter_count(scenario)
    optimizer_copies = 6 if t.optimizer != "sgd" else 5  # theta, grad, states, saved copies
    stack = members * params * 4 * optimizer_copies
    hidden = scenario.model.hidden if scenario.model.kind == "mlp" else ()
    width = dim + sum(hidden) + (d.classes if scenario.is_classification else 1)
    # Forward and backward keep a, z and dz per layer; logged steps split them clean/outlier.
    step = members * batch_size * width * 4 * 8
    step += members * params * 4 * 6  # the flat gradients: clipped, and four parts when logged
    evaluation = members * d.n_val * width * 4 * 2
    plan = seeds * t.steps * batch_size * 8
    return MemoryEstimate(data, stack, step + evaluation + plan)


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
    scenario: Scenario, members: int, batch_size: int, processes: int = 1, seeds: int = 1
) -> MemoryEstimate:
    """Raise one sentence when `processes` processes of this size do not fit in free memory."""
    need = estimate(scenario, members, batch_size, seeds)
    free = available_bytes()
    if free is not None and need.total * processes > free:
        many = f"{processes} processes of " if processes > 1 else ""
        raise GradfenceInputError(
            f"{scenario.name}: training needs about {many}{gigabytes(need.total)} "
            f"({need.describe()}) at batch size {batch_size} with {members} members, and "
            f"{gigabytes(free)} is free; lower data.n_train, model.hidden, the batch size or "
            "the number of members (or --jobs)."
        )
    return need


def processes_that_fit(scenario: Scenario, members: int, batch_size: int, wanted: int) -> int:
    """At most `wanted` and the cores, and no more than free memory holds (at least one)."""
    cores = os.cpu_count() or 1
    need = estimate(scenario, members, batch_size).total
    free = available_bytes()
    by_memory = wanted if free is None else max(1, math.floor(free / max(need, 1)))
    return max(1, min(wanted, cores, by_memory))
