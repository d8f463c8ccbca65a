"""Map benchmarks on the shipped coupling preset, baselines measured in the same run.

1. run_map with 2 worker processes against 1 (the whole map, worker start-up included).
2. run_map with 2 processes against a naive baseline that trains each grid point as its own
   plain nn.Module run (global-norm with clip_grad_norm_, example-norm with torch.func
   per-example gradients), on one thread. The baseline is timed on an evenly spread subset of
   the grid (seed 0, every third threshold) and scaled by the number of points of each
   (method, batch size) cell: a full naive run would take many minutes.
"""

from __future__ import annotations

import shutil
import statistics
import sys
import tempfile
import time
from collections import defaultdict
from pathlib import Path

import torch

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from core.engine import Engine, Member, _lr_factor
from core.map_run import run_map
from core.maps import plan
from core.scenario import ClipConfig, Scenario, load_scenario

PRESET = Path(__file__).resolve().parent.parent / "scenarios" / "batch-size-coupling.toml"
ROUNDS = 3


def time_map(scenario: Scenario, jobs: int) -> float:
    out = Path(tempfile.mkdtemp(prefix="gradfence-bench-"))
    try:
        start = time.perf_counter()
        run_map(scenario, out, jobs=jobs)
        return time.perf_counter() - start
    finally:
        shutil.rmtree(out)


def naive_point(scenario: Scenario, method: str, threshold: float, batch: int, seed: int) -> float:
    """Seconds to train one grid point the plain way, data and batches as the engine's."""
    engine = Engine(scenario, [Member(ClipConfig(method="none"), seed)], batch)
    x, y, x_val, y_val = engine.x_train, engine.y_train, engine.x_val, engine.y_val
    batches = engine.batches[0]
    t = scenario.train
    lr = t.lr * _lr_factor(t.lr_scaling, batch, t.reference_batch)
    start = time.perf_counter()
    torch.manual_seed(seed)
    model = torch.nn.Linear(x.shape[1], 1)
    optimizer = torch.optim.SGD(model.parameters(), lr=lr)
    names = [n for n, _ in model.named_parameters()]

    def loss_one(p: dict[str, torch.Tensor], xi: torch.Tensor, yi: torch.Tensor) -> torch.Tensor:
        out = torch.func.functional_call(model, p, (xi.unsqueeze(0),)).squeeze()
        return (out - yi) ** 2

    per_example = torch.func.vmap(torch.func.grad(loss_one), in_dims=(None, 0, 0))
    for step in range(t.steps):
        rows = batches[step]
        xb, yb = x[rows], y[rows]
        if method == "example-norm":
            params = {n: p.detach() for n, p in model.named_parameters()}
            grads = per_example(params, xb, yb)
            norms = torch.sqrt(sum((grads[n].flatten(1) ** 2).sum(1) for n in names))
            scale = torch.clamp(threshold / norms, max=1.0)
            for n, p in model.named_parameters():
                p.grad = (grads[n] * scale.view(-1, *[1] * (grads[n].dim() - 1))).mean(0)
        else:
            optimizer.zero_grad()
            loss = torch.nn.functional.mse_loss(model(xb).squeeze(-1), yb)
            loss.backward()
            if method == "global-norm":
                torch.nn.utils.clip_grad_norm_(model.parameters(), threshold)
        optimizer.step()
        if (step + 1) % t.eval_every == 0 or step + 1 == t.steps:
            with torch.no_grad():
                torch.nn.functional.mse_loss(model(x_val).squeeze(-1), y_val)
    return time.perf_counter() - start


def naive_time(scenario: Scenario) -> tuple[float, int, int]:
    """Estimated seconds for the whole grid, points measured, points in the grid."""
    torch.set_num_threads(1)
    cells: dict[tuple[str, int], int] = defaultdict(int)
    sample: dict[tuple[str, int], list[tuple[float, int]]] = defaultdict(list)
    for chunk in plan(scenario):
        for p in chunk.points:
            method = scenario.clip[p.clip_index].method
            cells[(method, p.batch_size)] += 1
            thresholds = scenario.thresholds_for(scenario.clip[p.clip_index])
            index = thresholds.index(p.threshold) if method != "none" else 0
            if p.seed == scenario.map.seeds[0] and index % 3 == 0:
                sample[(method, p.batch_size)].append((p.threshold, p.seed))
    total, measured = 0.0, 0
    for (method, batch), points in sample.items():
        seconds = [naive_point(scenario, method, t, batch, s) for t, s in points]
        measured += len(seconds)
        total += statistics.mean(seconds) * cells[(method, batch)]
    return total, measured, sum(cells.values())


def main() -> None:
    scenario = load_scenario(PRESET)
    points = sum(len(c.points) for c in plan(scenario))
    one, two, ratios = [], [], []
    for _ in range(ROUNDS):
        a = time_map(scenario, 1)
        b = time_map(scenario, 2)
        one.append(a)
        two.append(b)
        ratios.append(a / b)
    naive, measured, grid = naive_time(scenario)
    t1, t2 = statistics.median(one), statistics.median(two)
    print(f"{scenario.name}: {points} grid points, {len(plan(scenario))} stacks")
    print(f"map, 1 process: {t1:.2f} s; 2 processes: {t2:.2f} s (medians of {ROUNDS} rounds)")
    print(
        f"naive per-point nn.Module runs: {naive:.1f} s (timed {measured} of {grid} points, scaled)"
    )
    print(f"map_naive_over_jobs2: {naive / t2:.1f} x faster (target >= 10)")
    print(f"map_jobs2_over_jobs1: {statistics.median(ratios):.2f} x faster (target >= 1.6)")


if __name__ == "__main__":
    main()
