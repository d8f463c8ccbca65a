"""Norm profile and threshold suggestion: where a threshold sits against the gradient noise.

Norm profile: at a checkpoint of an unclipped run, per-example gradients of the clean training
data give |G|^2 and tr(Sigma); the predicted batch-mean norm is then
E|g_B|^2 = |G|^2 + tr(Sigma)/B * (N - B)/(N - 1) for B drawn without replacement from N. Each
clipping method whose threshold is a norm gets its curve in the units it clips (the batch mean,
or the batch sum under the sum reduction; a group of m for microbatch-norm, which is the norm at
batch m whatever B is; one example for example-norm), and the predicted pass-through of a step
with the scenario's outliers against B (core/passthrough.py). The pass-through is set by the
threshold against the whole norm of the outlier step, not by the gradient noise alone. It is
the checkpoint's: where a clipped run's mean gradient moves far from the checkpoint's (large
batch sizes under hard clipping, which train further), the run's mean pass-through departs from
it (on the coupling preset: within 0.05 at every grid point but B = 512 below threshold 1).

Threshold suggestion: from a short unclipped warm-up, a percentile of the norms each method
compares with its threshold, and the clip rate it implies on that warm-up.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import asdict, dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np

from core.formats import json_ready, number_from_json
from core.member import Member
from core.methods import BATCH_NORM, EXAMPLE_NORM, GROUP_NORM
from core.scenario import ClipConfig, Scenario

if TYPE_CHECKING:  # torch loads only when a profile is computed, not to read one
    import torch

    from core.engine import Engine

MAX_EXAMPLES = 4096  # clean rows used for |G|^2 and tr(Sigma): enough for a few per cent
GRID_POINTS = 40  # batch sizes of the fine grid a plot draws
PROFILED = (BATCH_NORM, GROUP_NORM, EXAMPLE_NORM)  # thresholds that are norms of gradients


@dataclass(frozen=True)
class MethodProfile:
    """One [[clip]] table against the fine grid of batch sizes, in the units it clips."""

    label: str
    method: str
    compares: str  # core.methods: BATCH_NORM, GROUP_NORM or EXAMPLE_NORM
    unit: int  # examples per clipped unit: 0 for the whole batch, m for groups, 1 for examples
    threshold: float
    norm: tuple[float, ...]  # predicted clean norm of a unit at each grid batch size
    pass_through: tuple[float, ...]  # predicted pass-through of an outlier step (NaN: none)
    half_batch: float | None  # where pass-through rises through 0.5, interpolated in log B

    @classmethod
    def from_json(cls, raw: dict[str, Any]) -> MethodProfile:
        half = raw.get("half_batch")
        return cls(
            label=str(raw["label"]),
            method=str(raw["method"]),
            compares=str(raw["compares"]),
            unit=int(raw["unit"]),
            threshold=number_from_json(raw["threshold"]),
            norm=tuple(number_from_json(v) for v in raw["norm"]),
            pass_through=tuple(number_from_json(v) for v in raw["pass_through"]),
            half_batch=None if half is None else number_from_json(half),
        )


@dataclass(frozen=True)
class NormProfile:
    checkpoint_step: int
    examples: int  # clean rows the statistics come from
    population: int  # N, the clean rows a batch is drawn from
    grad_sq: float  # |G|^2
    trace: float  # tr(Sigma), population covariance of the per-example gradients
    outlier_norm: float | None  # median gradient norm of the outlier samples, M
    batch_sizes: tuple[int, ...]
    thresholds: dict[str, float] = field(default_factory=dict)  # batch-mean norm thresholds
    reduction: str = "mean"  # the loss reduction: under "sum" the batch is clipped by its sum
    grid: tuple[int, ...] = ()  # the fine grid of batch sizes of `methods`
    methods: dict[str, MethodProfile] = field(default_factory=dict)  # by [[clip]] label
    # Predicted mean pass-through on the map grid: {label: {threshold as map.csv writes it:
    # {batch size: value}}}, for every profiled table with a fixed threshold rule.
    pass_through: dict[str, dict[str, dict[str, float]]] = field(default_factory=dict)
    outliers: str = "none"  # "none", "finite", or "nonfinite" (no pass-through to predict)

    def predicted_sq(self, batch: float) -> float:
        """E|g_B|^2 of the batch mean for batches of `batch` rows drawn without replacement
        (a real `batch` interpolates between batch sizes, for drawing)."""
        n = self.population
        fpc = (n - batch) / (n - 1) if n > 1 else 0.0
        return self.grad_sq + self.trace / batch * fpc

    @property
    def noise_scale(self) -> float:
        return self.trace / self.grad_sq if self.grad_sq > 0 else math.inf

    def as_json(self) -> dict[str, Any]:
        out = asdict(self)
        out["batch_sizes"] = list(self.batch_sizes)
        out["grid"] = list(self.grid)
        out["predicted_norm"] = [math.sqrt(self.predicted_sq(b)) for b in self.batch_sizes]
        out["noise_scale"] = self.noise_scale
        ready: dict[str, Any] = json_ready(out)
        return ready

    @classmethod
    def from_json(cls, raw: dict[str, Any]) -> NormProfile:
        """The profile `as_json` wrote (its derived keys are ignored; keys an older file lacks
        take their defaults)."""
        outlier_norm = raw.get("outlier_norm")
        methods = raw.get("methods") or {}
        pass_through = raw.get("pass_through") or {}
        return cls(
            checkpoint_step=int(raw["checkpoint_step"]),
            examples=int(raw["examples"]),
            population=int(raw["population"]),
            grad_sq=number_from_json(raw["grad_sq"]),
            trace=number_from_json(raw["trace"]),
            outlier_norm=None if outlier_norm is None else number_from_json(outlier_norm),
            batch_sizes=tuple(int(b) for b in raw["batch_sizes"]),
            thresholds={str(k): number_from_json(v) for k, v in raw["thresholds"].items()},
            reduction=str(raw.get("reduction", "mean")),
            grid=tuple(int(b) for b in raw.get("grid", ())),
            methods={str(k): MethodProfile.from_json(v) for k, v in methods.items()},
            pass_through={
                str(label): {
                    str(t): {str(b): number_from_json(v) for b, v in by_batch.items()}
                    for t, by_batch in by_threshold.items()
                }
                for label, by_threshold in pass_through.items()
            },
            outliers=str(raw.get("outliers", "none")),
        )


def _at(grid: tuple[int, ...], values: tuple[float, ...], batch: int) -> float:
    return values[grid.index(batch)] if batch in grid else math.nan


def profile_sentence(profile: NormProfile) -> str:
    """The profile in one sentence: the noise, and what an outlier step passes per method."""
    noise = (
        f"at step {profile.checkpoint_step}, |G|^2 = {profile.grad_sq:.3g} and "
        f"tr(Sigma) = {profile.trace:.3g} (noise scale B_simple = {profile.noise_scale:.3g})"
    )
    if profile.outliers == "none":
        return f"norm profile: {noise}; the scenario has no outliers."
    if profile.outliers == "nonfinite" or profile.outlier_norm is None:
        return (
            f"norm profile: {noise}; the outliers' gradients are not finite, so there is no "
            "pass-through to predict."
        )
    lo, hi = min(profile.batch_sizes), max(profile.batch_sizes)
    parts = []
    for m in profile.methods.values():
        at_lo, at_hi = _at(profile.grid, m.pass_through, lo), _at(profile.grid, m.pass_through, hi)
        where = f"{m.label} at {m.threshold:.3g}"
        if abs(at_hi - at_lo) < 0.01:
            parts.append(f"{where} passes {at_lo:.2f} at every batch size")
            continue
        text = f"{where} passes {at_lo:.2f} at B = {lo} and {at_hi:.2f} at B = {hi}"
        if m.half_batch is not None:
            text += f", half from about B = {m.half_batch:.0f}"
        parts.append(text)
    passes = "; ".join(parts) if parts else "no method clips a norm it can be predicted for"
    return (
        f"norm profile: {noise}; predicted pass-through of a step with the outliers (gradient "
        f"norm about {profile.outlier_norm:.3g}): {passes}."
    )


def _checkpoint(scenario: Scenario, steps: int) -> Engine:
    """An unclipped member trained for `steps` steps, float64 for the statistics."""
    import torch

    from core.engine import Engine

    s = scenario.with_overrides({"train.steps": max(steps, 1), "train.eval_every": max(steps, 1)})
    engine = Engine(
        s, [Member(ClipConfig(method="none"), scenario.train.seed)], dtype=torch.float64
    )
    if steps > 0:
        for _ in engine.records():
            pass
    return engine


def _per_example(engine: Engine, rows: np.ndarray) -> tuple[torch.Tensor, torch.Tensor]:
    """Mean gradient (P,) and per-example gradient norms (n,) of the given rows, one pass."""
    import torch

    from core.engine import StackPass

    grad_pass = StackPass(
        engine.arch, engine.members, "mean", engine.scenario.model.exclude_head, engine.dtype
    )
    grad_pass.want_norms = True
    index = torch.as_tensor(rows)
    result = grad_pass.run(
        engine.params,
        engine.x_train[index].unsqueeze(0),
        engine.y_train[index].unsqueeze(0),
        engine.outlier_train[index].unsqueeze(0),
        detail=False,
    )
    assert result.norms is not None
    return result.grads[0], result.norms[0]


def _layers(engine: Engine, rows: np.ndarray) -> tuple[list[np.ndarray], list[np.ndarray]]:
    """Per layer, the rows' inputs a (n, in) and the output gradients dz (n, out) of each
    row's own loss: g_i . g_k = sum_l (dz_i . dz_k)(a_i . a_k + 1)."""
    import torch

    from core.model import backward, example_losses, forward

    index = torch.as_tensor(rows)
    with torch.no_grad():
        x, y = engine.x_train[index].unsqueeze(0), engine.y_train[index].unsqueeze(0)
        inputs, pre = forward(engine.arch, engine.params, x)
        _, d_out = example_losses(engine.arch, pre[-1], y)
        dz = backward(engine.arch, engine.params, inputs, pre, d_out)
    return [a[0].double().numpy() for a in inputs], [d[0].double().numpy() for d in dz]


def fine_grid(scenario: Scenario, population: int) -> tuple[int, ...]:
    """Batch sizes for drawing: log-spaced from the smallest batch that can hold the outliers
    to four times the largest mapped one (at most the training set), the mapped ones included."""
    o = scenario.outliers
    low = o.count if o.kind != "none" and o.placement == "batch" else 1
    mapped = set(scenario.map.batch_sizes) | {scenario.train.batch_size}
    high = max(low, min(scenario.data.n_train, 4 * max(mapped), population))
    spaced = {round(float(b)) for b in np.geomspace(low, high, GRID_POINTS)}
    return tuple(sorted(spaced | {b for b in mapped if b <= scenario.data.n_train}))


def half_batch(grid: tuple[int, ...], values: tuple[float, ...]) -> float | None:
    """The batch size where `values` rises through 0.5, interpolated in log B (None: never)."""
    for (b0, v0), (b1, v1) in zip(
        zip(grid, values, strict=True), zip(grid[1:], values[1:], strict=True), strict=False
    ):
        if v0 < 0.5 <= v1:
            frac = (0.5 - v0) / (v1 - v0)
            return float(math.exp(math.log(b0) + frac * (math.log(b1) - math.log(b0))))
    return None


def norm_profile(scenario: Scenario, checkpoint: int | None = None) -> NormProfile:
    """The norm profile at `checkpoint` steps (default: a fifth of the run, at most 100)."""
    from core import passthrough
    from core.maps import threshold_text

    step = min(100, scenario.train.steps // 5) if checkpoint is None else checkpoint
    engine = _checkpoint(scenario, step)
    ds = engine.dataset
    clean = np.flatnonzero(~ds.outlier_train[: ds.n_train])
    rng = np.random.default_rng(np.random.SeedSequence([scenario.data.seed, 0x70726F66]))
    used = np.sort(rng.choice(clean, size=min(len(clean), MAX_EXAMPLES), replace=False))
    mean, norms = _per_example(engine, used)
    n, big_n = len(used), len(clean)
    trace = float((norms**2).mean() - mean @ mean)  # E|g_i - G|^2 = E|g_i|^2 - |G|^2
    # |G_hat|^2 of n < N rows overstates |G|^2 by the mean's variance tr(Sigma)/n (N-n)/(N-1).
    grad_sq = float(mean @ mean) - (trace / (n - 1) * (big_n - n) / big_n if n < big_n else 0.0)
    outliers = np.flatnonzero(ds.outlier_train)
    outlier_norm = None
    state = "none" if scenario.outliers.kind == "none" or not len(outliers) else "nonfinite"
    finite_rows = outliers[:0]
    if len(outliers):
        _, out_norms = _per_example(engine, outliers[:MAX_EXAMPLES])
        ok = out_norms.isfinite().numpy()
        finite = out_norms[out_norms.isfinite()]
        outlier_norm = float(finite.median()) if len(finite) else None
        finite_rows = outliers[: len(ok)][ok]
    if state == "nonfinite" and len(finite_rows) == len(outliers[:MAX_EXAMPLES]):
        state = "finite"
    grid = fine_grid(scenario, big_n)
    profile = NormProfile(
        checkpoint_step=step,
        examples=n,
        population=big_n,
        grad_sq=grad_sq,
        trace=trace,
        outlier_norm=outlier_norm,
        batch_sizes=tuple(sorted(set(scenario.map.batch_sizes) | {scenario.train.batch_size})),
        thresholds={
            c.display_name: float(c.threshold)
            for c in scenario.clip
            if c.spec.compares == BATCH_NORM and c.threshold is not None
        },
        reduction=scenario.train.loss_reduction,
        grid=grid,
        outliers=state,
    )
    model = None
    if state == "finite":
        size = min(len(clean), passthrough.CLEAN_EXAMPLES)
        subset = np.sort(rng.choice(clean, size=size, replace=False))
        picked = rng.permutation(finite_rows)[: passthrough.OUTLIER_EXAMPLES]
        stats = passthrough.gradient_stats(
            _layers(engine, subset),
            _layers(engine, np.sort(picked)),
            big_n,
            [v[0].double().numpy() for v in engine.layout.views(mean.unsqueeze(0))],
            grad_sq,
        )
        o = scenario.outliers
        model = passthrough.PassThroughModel(
            stats, o.placement, o.count, int(ds.outlier_train[: ds.n_train].sum()), rng
        )
    methods: dict[str, MethodProfile] = {}
    on_map: dict[str, dict[str, dict[str, float]]] = {}
    for c in scenario.clip:
        compares = c.spec.compares
        if compares not in PROFILED or c.threshold is None or c.rule != "fixed":
            continue
        unit = 0 if compares == BATCH_NORM else c.microbatch if compares == GROUP_NORM else 1
        batch_sum = compares == BATCH_NORM and scenario.train.loss_reduction == "sum"

        def norm_at(b: int, unit: int = unit, batch_sum: bool = batch_sum) -> float:
            size = b if unit == 0 else unit
            return math.sqrt(profile.predicted_sq(size)) * (b if batch_sum else 1.0)

        def passes(b: int, ts: list[float], unit: int = unit, bs: bool = batch_sum) -> np.ndarray:
            if model is None:
                return np.full(len(ts), math.nan)
            return model.predict(b, b if unit == 0 else unit, np.array(ts), bs)

        curve = tuple(float(passes(b, [float(c.threshold)])[0]) for b in grid)
        methods[c.display_name] = MethodProfile(
            label=c.display_name,
            method=c.method,
            compares=compares,
            unit=unit,
            threshold=float(c.threshold),
            norm=tuple(norm_at(b) for b in grid),
            pass_through=curve,
            half_batch=half_batch(grid, curve),
        )
        thresholds = [float(t) for t in scenario.thresholds_for(c)]
        by_batch = {b: passes(b, thresholds) for b in scenario.map.batch_sizes}
        on_map[c.display_name] = {
            threshold_text(t): {str(b): float(by_batch[b][i]) for b in by_batch}
            for i, t in enumerate(thresholds)
        }
    return dataclasses.replace(profile, methods=methods, pass_through=on_map)


@dataclass(frozen=True)
class Suggestion:
    label: str
    method: str
    threshold: float
    clip_rate: float  # share of the kept warm-up steps (or examples) above it
    batch_size: int | None  # the batch size a batch-mean suggestion was derived at
    percentile: float
    left_out: int = 0  # warm-up steps (examples) left out: those with outliers
    seen: int = 0  # warm-up steps (examples) in all
    train_batch: int = 0  # train.batch_size: the window a per-example suggestion is judged by
    kept: np.ndarray = field(default_factory=lambda: np.zeros(0), repr=False, compare=False)

    def clip_rate_at(self, threshold: float) -> float:
        """The share of the kept warm-up values above `threshold`."""
        return float((self.kept > threshold).mean()) if self.kept.size else math.nan

    def as_json(self) -> dict[str, Any]:
        """For profile.json: every field but the warm-up values themselves."""
        out = {k: v for k, v in self.__dict__.items() if k != "kept"}
        ready: dict[str, Any] = json_ready(out)
        return ready


def suggest_thresholds(
    scenario: Scenario, warmup: int = 50, percentile: float = 90.0
) -> list[Suggestion]:
    """Percentile thresholds from an unclipped warm-up, for the norm methods of the scenario.

    The percentile is of the ordinary norms: the steps whose batch held no outlier (batch-mean
    methods) or the clean examples (per-example methods). The scenario knows which these are;
    with outliers on half the steps no blind rule (a multiple of the median, the spike rule of
    core.replay) can tell them apart in a warm-up of 50 steps, and a percentile over all of
    them sits near the outliers' norm.
    """
    from core.engine import Engine
    from core.results import collect

    s = scenario.with_overrides({"train.steps": warmup, "train.eval_every": 1})
    engine = Engine(s, [Member(ClipConfig(method="none"), scenario.train.seed)], trace=True)
    result = collect(engine)
    batch_norms = result.metric("grad_norm_pre")[:, 0].astype(np.float64)
    clean_steps = result.metric("batch_outliers")[:, 0] == 0
    assert engine.example_norms is not None
    example_norms = engine.example_norms[0]  # (steps, B)
    clean_examples = ~engine.dataset.outlier_train[engine.batch_indices(0)]
    out = []
    for c in scenario.clip:
        if c.spec.compares == BATCH_NORM:
            values, ordinary, batch = batch_norms, clean_steps, scenario.train.batch_size
        elif c.spec.compares == EXAMPLE_NORM:
            values, ordinary, batch = example_norms.ravel(), clean_examples.ravel(), None
        else:
            continue
        finite = np.isfinite(values)
        kept = values[finite & ordinary]
        if not kept.size:
            continue
        threshold = float(np.percentile(kept, percentile))
        out.append(
            Suggestion(
                c.display_name,
                c.method,
                threshold,
                float((kept > threshold).mean()),
                batch,
                percentile,
                left_out=int(finite.sum()) - len(kept),
                seen=int(finite.sum()),
                train_batch=scenario.train.batch_size,
                kept=kept,
            )
        )
    return out


def suggestion_line(suggestion: Suggestion, windows: Any = None) -> str:
    """The suggestion in a sentence. Given the map's MethodWindows of its table, also whether it
    lies inside the window it should (its batch size's; a per-example threshold: the common
    window, else the training batch size's) and, if not, how often that window's edge would
    have clipped the same warm-up values: the reason it lies outside."""
    s = suggestion
    if s.batch_size is not None:
        what = f"norms of the {s.seen - s.left_out} of {s.seen} steps without outliers"
        what += f" at batch size {s.batch_size}"
    else:
        what = f"per-example norms of the {s.seen - s.left_out} of {s.seen} clean examples"
    text = (
        f"suggested {s.label} threshold: {s.threshold:.3g}, the {s.percentile:g}th percentile "
        f"of the unclipped warm-up {what} (clips {s.clip_rate:.0%} of them)."
    )
    window = _window_for(s, windows)
    if window is None:
        return text
    name, lower, upper, open_lo, open_hi = window
    span = _span(lower, upper, open_lo, open_hi)
    if (lower <= s.threshold or open_lo) and (s.threshold <= upper or open_hi):
        return text + f" It lies inside {name} ({span})."
    if s.threshold > upper:
        why = (
            f"its upper edge {upper:.3g} would clip {s.clip_rate_at(upper):.0%} of the same "
            "ordinary norms: the best thresholds there clip ordinary steps too, not only the "
            "outliers"
        )
        return text + f" It lies above {name} ({span}): {why}."
    why = (
        f"its lower edge {lower:.3g} would clip only {s.clip_rate_at(lower):.0%} of the "
        "same ordinary norms: the best thresholds there leave more of them alone"
    )
    return text + f" It lies below {name} ({span}): {why}."


def _span(lo: float, hi: float, open_lo: bool, open_hi: bool) -> str:
    low = f"<={lo:.3g}" if open_lo else f"{lo:.3g}"
    high = f">={hi:.3g}" if open_hi else f"{hi:.3g}"
    return low if lo == hi else f"{low} to {high}"


def _window_for(s: Suggestion, windows: Any) -> tuple[str, float, float, bool, bool] | None:
    """(name, lower, upper, open below, open above) of the window a suggestion is judged by."""
    if windows is None:
        return None
    if s.batch_size is None and windows.common is not None:
        lo, hi = windows.common
        edges = (windows.common_at_lower_edge, windows.common_at_upper_edge)
        return ("the common window of the map", lo, hi, *edges)
    batch = s.batch_size if s.batch_size is not None else s.train_batch
    for w in windows.windows:
        if w.batch_size == batch and w.lower is not None and w.upper is not None:
            name = f"batch size {w.batch_size}'s window in the map"
            return (name, w.lower, w.upper, w.at_lower_edge, w.at_upper_edge)
    return None
