"""Engine benchmarks, each against a baseline measured in the same run, on one thread.

1. example-norm step time over global-norm step time in this engine (B = 256, 2-64-64-2 MLP).
2. the engine's example-norm step against a torch.func vmap(grad) per-example step (B = 256).
3. a 32-member threshold stack (B = 32) against 32 sequential runs of a plain nn.Module loop
   with clip_grad_norm_, both validating every 50 steps on the same 500 examples (headline).
4. the same stack against its matrix products alone: every bmm and baddbmm it calls, recorded
   with their shapes and memory layouts and replayed on their own, the practical limit of a
   stacked step (the rest is elementwise work and Python).
The engine computes tanh as 2 sigmoid(2z) - 1, its product giving 2z (core.model.tanh_of_doubled);
the baselines use nn.Tanh, as a plain loop would. Line 8 says how much of the stack's gain that
alone is worth. Times are the best of alternating rounds (see `paired`); the median of the
rounds' own ratios is printed too.
"""

from __future__ import annotations

import statistics
import sys
import time
from collections.abc import Callable
from pathlib import Path
from typing import NamedTuple

import numpy as np
import torch

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from core.engine import Engine, Member
from core.reference import module_for
from core.scenario import ClipConfig, Scenario, parse_scenario

ROUNDS = 9


class Pair(NamedTuple):
    first: float  # best time of the first workload over the rounds, s
    second: float  # best time of the second
    ratio: float  # second / first of the best times: the headline
    median_ratio: float  # the median of the rounds' own ratios, printed beside it


def paired(first: Callable[[], None], second: Callable[[], None]) -> Pair:
    """Best times of two workloads run in alternation, their ratio, and the median per-round ratio.

    Alternating round by round keeps a slow spell of a shared machine from landing on one side.
    The best of several runs is the estimate of a workload's own time, as the standard library's
    timeit advises: on a shared machine other processes only ever add time (on this one a bare
    gemm loop varies by 8% from run to run, a training run by a third and more).
    """
    first()  # warm-up: allocations, kernels, caches
    second()
    times_a, times_b = [], []
    for _ in range(ROUNDS):
        start = time.perf_counter()
        first()
        middle = time.perf_counter()
        second()
        end = time.perf_counter()
        times_a.append(middle - start)
        times_b.append(end - middle)
    ratios = [b / a for a, b in zip(times_a, times_b, strict=True)]
    best_a, best_b = min(times_a), min(times_b)
    return Pair(best_a, best_b, best_b / best_a, statistics.median(ratios))


STEPS = 300


def scenario(batch: int, steps: int, eval_every: int) -> Scenario:
    return parse_scenario(
        {
            "data": {
                "task": "blobs",
                "dim": 2,
                "classes": 2,
                "noise": 1.0,
                "n_train": 4096,
                "n_val": 500,
            },
            "outliers": {"kind": "label-flip", "placement": "batch", "rate": 0.1},
            "model": {"hidden": [64, 64], "activation": "tanh"},
            "train": {"steps": steps, "batch_size": batch, "eval_every": eval_every, "lr": 0.05},
        }
    )


def engine_steps(method: str, batch: int = 256) -> Callable[[], None]:
    s = scenario(batch, STEPS, eval_every=STEPS)  # one logged step at the end

    def run() -> None:
        engine = Engine(s, [Member(ClipConfig(method=method, threshold=1.0), 0)])
        for _ in engine.records():
            pass

    return run


def vmap_steps(batch: int = 256, steps: int = STEPS) -> Callable[[], None]:
    """A careful torch.func baseline: vmap(grad) per-example gradients, vectorised clipping."""
    s = scenario(batch, steps, eval_every=steps)
    engine = Engine(s, [Member(ClipConfig(method="example-norm"), 0)])
    x_all, y_all = engine.x_train, engine.y_train
    batches = engine.batches[0]
    model = module_for(engine.arch)
    names = [n for n, _ in model.named_parameters()]

    def loss_of(p: dict[str, torch.Tensor], xi: torch.Tensor, yi: torch.Tensor) -> torch.Tensor:
        out = torch.func.functional_call(model, p, (xi.unsqueeze(0),))
        return torch.nn.functional.cross_entropy(out, yi.unsqueeze(0))

    per_example = torch.func.vmap(torch.func.grad(loss_of), in_dims=(None, 0, 0))
    optimizer = torch.optim.SGD(model.parameters(), lr=0.05)

    def run() -> None:
        for step in range(steps):
            rows = batches[step]
            params = {n: p.detach() for n, p in model.named_parameters()}
            grads = per_example(params, x_all[rows], y_all[rows])
            norms = torch.sqrt(sum((grads[n].flatten(1) ** 2).sum(1) for n in names))
            scale = torch.clamp(1.0 / norms, max=1.0)  # threshold 1.0
            for n, p in model.named_parameters():
                p.grad = (grads[n] * scale.view(-1, *[1] * (grads[n].dim() - 1))).mean(0)
            optimizer.step()

    return run


def stack_steps(members: int = 32, batch: int = 32, steps: int = 300) -> float:
    s = scenario(batch, steps, eval_every=50)
    thresholds = np.geomspace(0.01, 10.0, members)
    clips = [
        ClipConfig(method="global-norm", threshold=float(t), label=f"t{i}")
        for i, t in enumerate(thresholds)
    ]

    def run() -> None:
        engine = Engine(s, [Member(c, 0) for c in clips])
        for _ in engine.records():
            pass

    return run


def sequential_steps(members: int = 32, batch: int = 32, steps: int = 300) -> float:
    """What one would write without Gradfence: a plain loop per threshold, one after another."""
    s = scenario(batch, steps, eval_every=50)
    engine = Engine(s, [Member(ClipConfig(method="none"), 0)])
    x_all, y_all, x_val, y_val = engine.x_train, engine.y_train, engine.x_val, engine.y_val
    batches = engine.batches[0]
    thresholds = np.geomspace(0.01, 10.0, members)

    def run() -> None:
        for threshold in thresholds:
            torch.manual_seed(0)
            model = module_for(engine.arch)
            optimizer = torch.optim.SGD(model.parameters(), lr=0.05)
            for step in range(steps):
                rows = batches[step]
                loss = torch.nn.functional.cross_entropy(model(x_all[rows]), y_all[rows])
                optimizer.zero_grad()
                loss.backward()
                torch.nn.utils.clip_grad_norm_(model.parameters(), float(threshold))
                optimizer.step()
                if (step + 1) % 50 == 0:
                    with torch.no_grad():
                        torch.nn.functional.cross_entropy(model(x_val), y_val)

    return run


def gemms_of(run: Callable[[], None]) -> Callable[[], None]:
    """The matrix products `run` makes, recorded once, as a workload that does only those."""
    calls: list[tuple[str, list[object], dict[str, object]]] = []
    real = {"bmm": torch.bmm, "baddbmm": torch.baddbmm}

    def recorder(name: str) -> Callable[..., torch.Tensor]:
        def record(*args: object, **kwargs: object) -> torch.Tensor:
            layout = [(a.shape, a.stride()) if isinstance(a, torch.Tensor) else a for a in args]
            out = kwargs.get("out")
            spec = {"out": (out.shape, out.stride())} if isinstance(out, torch.Tensor) else {}
            calls.append((name, layout, spec))
            return real[name](*args, **kwargs)  # type: ignore[operator, no-any-return]

        return record

    torch.bmm, torch.baddbmm = recorder("bmm"), recorder("baddbmm")  # type: ignore[assignment]
    try:
        run()
    finally:
        torch.bmm, torch.baddbmm = real["bmm"], real["baddbmm"]  # type: ignore[assignment]

    def operand(shape: torch.Size, stride: tuple[int, ...]) -> torch.Tensor:
        size = 1 + sum((n - 1) * st for n, st in zip(shape, stride, strict=True))
        return torch.randn(size).as_strided(shape, stride)

    prepared = []
    for name, layout, spec in calls:
        args = [operand(*a) if isinstance(a, tuple) else a for a in layout]  # type: ignore[misc]
        out = operand(*spec["out"]) if "out" in spec else None  # type: ignore[misc]
        prepared.append((real[name], args, out))

    def replay() -> None:
        for fn, args, out in prepared:
            if out is None:
                fn(*args)
            else:
                fn(*args, out=out)

    return replay


def nn_tanh_share(batch: int = 32, members: int = 32) -> float:
    """How much faster core.model.tanh is than torch.tanh on one stacked hidden layer."""
    from core.model import tanh

    z = torch.randn(members, batch, 64)

    def plain() -> None:
        for _ in range(600):
            torch.tanh(z)

    def ours() -> None:
        for _ in range(600):
            tanh(z)

    return paired(ours, plain).ratio


def main() -> None:
    torch.set_num_threads(1)
    example = paired(engine_steps("global-norm"), engine_steps("example-norm"))
    vmap = paired(engine_steps("example-norm"), vmap_steps())
    stack = paired(stack_steps(), sequential_steps())
    gemm = paired(gemms_of(stack_steps()), stack_steps())
    tanh_gain = nn_tanh_share()
    ms = 1e3 / STEPS
    print(f"global-norm step, B=256: {example.first * ms:.3f} ms")
    print(f"example-norm step, B=256: {example.second * ms:.3f} ms")
    print(f"engine example-norm step: {vmap.first * ms:.3f} ms")
    print(f"torch.func vmap(grad) example-norm step: {vmap.second * ms:.3f} ms")
    print(f"32-member stack, {STEPS} steps at B=32: {stack.first:.3f} s")
    print(f"32 sequential nn.Module runs, {STEPS} steps at B=32: {stack.second:.3f} s")
    print(f"the stack's matrix products alone: {gemm.first:.3f} s")
    print(f"tanh as 2 sigmoid(2z) - 1 over torch.tanh on a stacked layer: {tanh_gain:.1f} x faster")
    print(
        f"(best of {ROUNDS} alternating rounds on one thread; the median of the rounds' own "
        f"ratios: example/global {example.median_ratio:.2f}, vmap/engine {vmap.median_ratio:.1f}, "
        f"sequential/stack {stack.median_ratio:.1f}, stack/gemms {gemm.median_ratio:.2f})"
    )
    print(f"stack32_over_its_gemms: {gemm.ratio:.2f} x (the practical limit is 1)")
    print(f"example_over_global_step: {example.ratio:.2f} x (target <= 1.2)")
    print(f"engine_over_vmap_example_step: {vmap.ratio:.1f} x faster (target >= 6)")
    print(f"stack32_over_sequential: {stack.ratio:.1f} x faster (target >= 12)")


if __name__ == "__main__":
    main()
