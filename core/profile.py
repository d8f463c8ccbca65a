"""Norm profile and threshold suggestion: where a threshold sits against the gradient noise.

Norm profile: at a checkpoint of an unclipped run, per-example gradients of the clean training
data give |G|^2 and tr(Sigma); the predicted batch-mean norm is then
E|g_B|^2 = |G|^2 + tr(Sigma)/B * (N - B)/(N - 1) for B drawn without replacement from N, and an
outlier of gradient norm M moves the mean by M/B, below the noise sqrt(tr(Sigma)/B) once
B > M^2 / tr(Sigma): the hiding batch size.

Threshold suggestion: from a short unclipped warm-up, a percentile of the norms each method
compares with its threshold, and the clip rate it implies on that warm-up.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np

from core.formats import json_ready, number_from_json
from core.member import Member
from core.methods import BATCH_NORM, EXAMPLE_NORM
from core.scenario import ClipConfig, Scenario

if TYPE_CHECKING:  # torch loads only when a profile is computed, not to read one
    import torch

    from core.engine import Engine

MAX_EXAMPLES = 4096  # clean rows used for |G|^2 and tr(Sigma): enough for a few per cent


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

    def predicted_sq(self, batch: float) -> float:
        """E|g_B|^2 for batches of `batch` rows drawn without replacement (a real `batch`
        interpolates between batch sizes, for drawing)."""
        n = self.population
        fpc = (n - batch) / (n - 1) if n > 1 else 0.0
        return self.grad_sq + self.trace / batch * fpc

    @property
    def noise_scale(self) -> float:
        return self.trace / self.grad_sq if self.grad_sq > 0 else math.inf

    @property
    def hiding_batch(self) -> float | None:
        """The batch size past which one outlier's pull M/B is below the noise sqrt(tr/B)."""
        if self.outlier_norm is None or self.trace <= 0:
            return None
        return self.outlier_norm**2 / self.trace

    def as_json(self) -> dict[str, Any]:
        out = asdict(self)
        out["batch_sizes"] = list(self.batch_sizes)
        out["predicted_norm"] = [math.sqrt(self.predicted_sq(b)) for b in self.batch_sizes]
        out["noise_scale"] = self.noise_scale
        out["hiding_batch"] = self.hiding_batch
        ready: dict[str, Any] = json_ready(out)
        return ready

    @classmethod
    def from_json(cls, raw: dict[str, Any]) -> NormProfile:
        """The profile `as_json` wrote (its derived keys are ignored)."""
        return cls(
            checkpoint_step=int(raw["checkpoint_step"]),
            examples=int(raw["examples"]),
            population=int(raw["population"]),
            grad_sq=number_from_json(raw["grad_sq"]),
            trace=number_from_json(raw["trace"]),
            outlier_norm=None if raw["outlier_norm"] is None else float(raw["outlier_norm"]),
            batch_sizes=tuple(int(b) for b in raw["batch_sizes"]),
            thresholds={str(k): number_from_json(v) for k, v in raw["thresholds"].items()},
        )


def profile_sentence(profile: NormProfile) -> str:
    """The profile in one sentence: the noise, and where one outlier hides in it."""
    noise = (
        f"at step {profile.checkpoint_step}, |G|^2 = {profile.grad_sq:.3g} and "
        f"tr(Sigma) = {profile.trace:.3g} (noise scale B_simple = {profile.noise_scale:.3g})"
    )
    hiding = profile.hiding_batch
    if hiding is None:
        return f"norm profile: {noise}."
    return (
        f"norm profile: {noise}; one outlier of gradient norm {profile.outlier_norm:.3g} "
        f"hides in the gradient noise once the batch size passes about {hiding:.0f}."
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


def norm_profile(scenario: Scenario, checkpoint: int | None = None) -> NormProfile:
    """The norm profile at `checkpoint` steps (default: a fifth of the run, at most 100)."""
    step = min(100, scenario.train.steps // 5) if checkpoint is None else checkpoint
    engine = _checkpoint(scenario, step)
    ds = engine.dataset
    clean = np.flatnonzero(~ds.outlier_train[: ds.n_train])
    rng = np.random.default_rng(np.random.SeedSequence([scenario.data.seed, 0x70726F66]))
    used = np.sort(rng.choice(clean, size=min(len(clean), MAX_EXAMPLES), replace=False))
    mean, norms = _per_example(engine, used)
    grad_sq = float(mean @ mean)
    trace = float((norms**2).mean()) - grad_sq  # E|g_i - G|^2 = E|g_i|^2 - |G|^2
    outliers = np.flatnonzero(ds.outlier_train)
    outlier_norm = None
    if len(outliers):
        _, out_norms = _per_example(engine, outliers[:MAX_EXAMPLES])
        finite = out_norms[out_norms.isfinite()]
        outlier_norm = float(finite.median()) if len(finite) else None
    thresholds = {
        c.display_name: float(c.threshold)
        for c in scenario.clip
        if c.spec.compares == BATCH_NORM and c.threshold is not None
    }
    return NormProfile(
        checkpoint_step=step,
        examples=len(used),
        population=len(clean),
        grad_sq=grad_sq,
        trace=trace,
        outlier_norm=outlier_norm,
        batch_sizes=tuple(sorted(set(scenario.map.batch_sizes) | {scenario.train.batch_size})),
        thresholds=thresholds,
    )


@dataclass(frozen=True)
class Suggestion:
    label: str
    method: str
    threshold: float
    clip_rate: float  # share of warm-up steps (batch-mean) or examples (per-example) above it
    batch_size: int | None  # the batch size a batch-mean suggestion was derived at
    percentile: float


def suggest_thresholds(
    scenario: Scenario, warmup: int = 50, percentile: float = 90.0
) -> list[Suggestion]:
    """Percentile thresholds from an unclipped warm-up, for the norm methods of the scenario."""
    from core.engine import Engine
    from core.results import collect

    s = scenario.with_overrides({"train.steps": warmup, "train.eval_every": 1})
    engine = Engine(s, [Member(ClipConfig(method="none"), scenario.train.seed)], trace=True)
    result = collect(engine)
    batch_norms = result.metric("grad_norm_pre")[:, 0]
    assert engine.example_norms is not None
    example_norms = engine.example_norms[0].ravel()
    example_norms = example_norms[np.isfinite(example_norms)]
    out = []
    for c in scenario.clip:
        if c.spec.compares == BATCH_NORM:
            values, batch = batch_norms[np.isfinite(batch_norms)], scenario.train.batch_size
        elif c.spec.compares == EXAMPLE_NORM:
            values, batch = example_norms, None
        else:
            continue
        threshold = float(np.percentile(values, percentile))
        out.append(
            Suggestion(
                c.display_name,
                c.method,
                threshold,
                float((values > threshold).mean()),
                batch,
                percentile,
            )
        )
    return out
