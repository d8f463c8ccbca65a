"""Every clipping method against an independent reference on the same gradients (float64).

References (REFERENCES.md): torch.nn.utils.clip_grad_norm_ / clip_grad_value_ for the batch-mean
methods; a direct implementation of the AGC formula of Brock et al. 2021 (section 4) for
unit-agc; torch.func per-example gradients clipped one at a time (Abadi et al. 2016) for the
per-example methods.
"""

from __future__ import annotations

import dataclasses
from typing import Any

import numpy as np
import pytest
import torch

from core import clipping
from core.data import Dataset
from core.engine import Engine, Member, PassResult, StackPass
from core.reference import (
    clip_examples_by_norm,
    clip_examples_by_unit,
    clip_groups_by_norm,
    flat,
    load_member,
    module_for,
    per_example_grads,
)
from core.scenario import ClipConfig, Scenario, parse_scenario

F64 = torch.float64
RTOL = 1e-6  # float64 throughout; the only gap is torch's +1e-6 in clip_grad_norm_ (see below)


@dataclasses.dataclass
class Batch:
    scenario: Scenario
    engine: Engine
    x: torch.Tensor
    y: torch.Tensor
    outlier: torch.Tensor
    model: torch.nn.Sequential
    examples: list[torch.Tensor]  # reference per-example gradients

    @property
    def mean(self) -> torch.Tensor:
        return flat(self.examples).mean(dim=0)

    def run(
        self, *clips: ClipConfig, reduction: str = "mean", seeds: list[int] | None = None
    ) -> torch.Tensor:
        """The engine's clipped gradient (K, P) for one member per clip config."""
        return self.result(*clips, reduction=reduction, seeds=seeds).grads

    def result(
        self, *clips: ClipConfig, reduction: str = "mean", seeds: list[int] | None = None
    ) -> PassResult:
        """The engine's logged pass for one member per clip config."""
        members = [Member(c, s) for c, s in zip(clips, seeds or [0] * len(clips), strict=True)]
        K = len(members)
        grad_pass = StackPass(
            self.engine.arch, members, reduction, self.scenario.model.exclude_head, F64
        )
        params = [p.expand(K, *p.shape[1:]) for p in self.engine.params]
        result = grad_pass.run(
            params,
            self.x.expand(K, *self.x.shape),
            self.y.expand(K, *self.y.shape),
            self.outlier.expand(K, *self.outlier.shape),
            detail=True,
        )
        return result

    def weights(self) -> list[torch.Tensor]:
        return [p.detach() for p in self.model.parameters()]


def make_batch(
    activation: str = "tanh",
    batch: int = 12,
    exclude_head: bool = True,
    task: str = "blobs",
    outliers: dict[str, Any] | None = None,
    hidden: tuple[int, ...] = (8, 8),
) -> Batch:
    regression = task in ("linear", "teacher")
    scenario = parse_scenario(
        {
            "data": {"task": task, "dim": 3, "noise": 0.3}
            if regression
            else {"task": task, "dim": 3, "classes": 3, "noise": 1.0},
            "model": {
                "hidden": list(hidden),
                "activation": activation,
                "exclude_head": exclude_head,
            },
            "outliers": outliers or {"kind": "none"},
            "train": {"batch_size": batch},
        }
    )
    engine = Engine(scenario, [Member(ClipConfig(method="none"), 0)], dtype=F64)
    rows = engine.batches[0, 0]
    x, y, outlier = engine.x_train[rows], engine.y_train[rows], engine.outlier_train[rows]
    model = module_for(engine.arch).double()
    load_member(model, engine.params, 0)
    return Batch(
        scenario, engine, x, y, outlier, model, per_example_grads(engine.arch, model, x, y)
    )


def set_grads(model: torch.nn.Module, flat_grad: torch.Tensor) -> None:
    offset = 0
    for p in model.parameters():
        p.grad = flat_grad[offset : offset + p.numel()].view_as(p).clone()
        offset += p.numel()


def model_grads(model: torch.nn.Module) -> torch.Tensor:
    return torch.cat([p.grad.reshape(-1) for p in model.parameters()])  # type: ignore[union-attr]


@pytest.mark.parametrize("activation", ["tanh", "relu", "gelu"])
def test_unclipped_gradient_equals_the_mean_of_torch_func_per_example_gradients(
    activation: str,
) -> None:
    b = make_batch(activation)
    got = b.run(ClipConfig(method="none"))[0]
    torch.testing.assert_close(got, b.mean, rtol=RTOL, atol=1e-12)


@pytest.mark.parametrize("scale", [0.3, 3.0])
def test_global_norm_matches_torch_clip_grad_norm(scale: float) -> None:
    b = make_batch()
    threshold = scale * float(b.mean.norm())
    got = b.run(ClipConfig(method="global-norm", threshold=threshold))[0]
    set_grads(b.model, b.mean)
    total = torch.nn.utils.clip_grad_norm_(b.model.parameters(), threshold)
    assert float(total) == pytest.approx(
        float(b.mean.norm()), rel=1e-12
    )  # returns the pre-clip norm
    # torch divides by |g| + 1e-6; with |g| of order 0.1-1 that is a relative gap below 1e-5.
    torch.testing.assert_close(got, model_grads(b.model), rtol=1e-5, atol=1e-12)
    # Pascanu et al. 2013: the output norm is min(|g|, c) and the direction is unchanged.
    assert float(got.norm()) == pytest.approx(min(float(b.mean.norm()), threshold), rel=1e-12)
    assert float(torch.nn.functional.cosine_similarity(got, b.mean, dim=0)) == pytest.approx(1.0)


def test_value_clipping_matches_torch_clip_grad_value() -> None:
    b = make_batch()
    threshold = 0.3 * float(b.mean.abs().max())
    got = b.run(ClipConfig(method="value", threshold=threshold))[0]
    set_grads(b.model, b.mean)
    torch.nn.utils.clip_grad_value_(b.model.parameters(), threshold)
    torch.testing.assert_close(got, model_grads(b.model), rtol=RTOL, atol=1e-15)


def test_value_clipping_worked_example() -> None:
    # REFERENCES.md: [0.9, 100] with c = 1 -> [0.9, 1.0].
    g = torch.tensor([[0.9, 100.0]], dtype=F64)
    coef, _, share = clipping.value(g, torch.tensor([1.0], dtype=F64))
    torch.testing.assert_close(g * coef, torch.tensor([[0.9, 1.0]], dtype=F64))
    assert float(share[0]) == 0.5


def test_tensor_norm_matches_clip_grad_norm_applied_to_each_tensor() -> None:
    b = make_batch()
    threshold = 0.05
    got = b.run(ClipConfig(method="tensor-norm", threshold=threshold))[0]
    set_grads(b.model, b.mean)
    for p in b.model.parameters():
        torch.nn.utils.clip_grad_norm_([p], threshold)
    torch.testing.assert_close(got, model_grads(b.model), rtol=1e-4, atol=1e-12)


def agc_numpy(
    grads: list[np.ndarray], weights: list[np.ndarray], lam: float, eps: float, clipped: int
) -> np.ndarray:
    """Brock et al. 2021, section 4, written directly: for unit i, if |G_i| / max(|W_i|, eps) >
    lambda then G_i <- lambda * max(|W_i|, eps) / |G_i| * G_i; a unit is a row of an (out, in)
    weight, a bias vector is one unit; parameters past the clipped layers are left alone."""
    out = []
    for index, (g, w) in enumerate(zip(grads, weights, strict=True)):
        g = g.copy()
        if index < 2 * clipped:
            g_units = g.reshape(1, -1) if g.ndim == 1 else g
            w_units = w.reshape(1, -1) if w.ndim == 1 else w
            for unit in range(g_units.shape[0]):
                w_norm = max(np.linalg.norm(w_units[unit]), eps)
                g_norm = np.linalg.norm(g_units[unit])
                if g_norm / w_norm > lam:
                    g_units[unit] *= lam * w_norm / g_norm
            g = g_units.reshape(g.shape)
        out.append(g.reshape(-1))
    return np.concatenate(out)


def _split(flat_grad: torch.Tensor, like: list[torch.Tensor]) -> list[np.ndarray]:
    out, offset = [], 0
    for p in like:
        out.append(flat_grad[offset : offset + p.numel()].view_as(p).numpy())
        offset += p.numel()
    return out


@pytest.mark.parametrize("exclude_head", [True, False])
def test_unit_agc_matches_the_published_formula(exclude_head: bool) -> None:
    b = make_batch(exclude_head=exclude_head)
    lam, eps = 0.02, 1e-3
    got = b.run(ClipConfig(method="unit-agc", threshold=lam, eps=eps))[0]
    weights = b.weights()
    clipped_layers = b.engine.arch.layers - (1 if exclude_head else 0)
    expected = agc_numpy(
        _split(b.mean, weights), [w.numpy() for w in weights], lam, eps, clipped_layers
    )
    np.testing.assert_allclose(got.numpy(), expected, rtol=RTOL, atol=1e-15)
    if exclude_head:  # the head is the last weight and bias: untouched
        head = weights[-2].numel() + weights[-1].numel()
        unclipped = b.run(ClipConfig(method="none"))[0]
        np.testing.assert_array_equal(got.numpy()[-head:], unclipped.numpy()[-head:])


def test_agc_floors_a_zero_row_at_lambda_times_eps_and_scales_with_the_weights() -> None:
    # REFERENCES.md (a): a zero row has threshold lambda * eps; scaling W by s scales thresholds.
    lam, eps = 0.1, 1e-3
    g = torch.ones(1, 2, 3, dtype=F64)  # one member, a (2, 3) weight; row norms sqrt(3)
    w = torch.tensor([[[0.0, 0.0, 0.0], [1.0, 2.0, 2.0]]], dtype=F64)  # row norms 0 and 3
    bias_g, bias_w = torch.ones(1, 2, dtype=F64), torch.ones(1, 2, dtype=F64)
    for s in (1.0, 4.0):
        coef, _, _ = clipping.unit_agc(
            [g, bias_g], [s * w, s * bias_w], torch.tensor([lam], dtype=F64), eps, 1
        )
        rows = (g * coef[:, :6].view(1, 2, 3)).norm(dim=-1)[0]
        assert float(rows[0]) == pytest.approx(lam * eps)
        assert float(rows[1]) == pytest.approx(lam * 3.0 * s)


@pytest.mark.parametrize("activation", ["tanh", "gelu"])
def test_example_norm_matches_per_example_clipping_of_torch_func_gradients(activation: str) -> None:
    b = make_batch(activation)
    norms = flat(b.examples).norm(dim=1)
    threshold = float(norms.median())  # about half the examples clipped
    got = b.run(ClipConfig(method="example-norm", threshold=threshold))[0]
    torch.testing.assert_close(
        got, clip_examples_by_norm(b.examples, threshold), rtol=RTOL, atol=1e-15
    )


@pytest.mark.parametrize("batch", [4, 12])
@pytest.mark.parametrize("activation", ["tanh", "relu", "gelu"])
def test_per_example_norms_of_layers_of_several_widths_match_torch_func(
    activation: str, batch: int
) -> None:
    """The pass takes the squared norms of all hidden tensors of one width in one reduction
    (core.model.Workspace): widths 8, 5, 8 make a block of four tensors and one of two, laid
    out with the examples innermost at B = 12 and outermost at B = 4. Reference: the norms of
    torch.func's per-example gradients."""
    b = make_batch(activation, batch=batch, hidden=(8, 5, 8))
    norms = b.result(ClipConfig(method="example-norm", threshold=1.0)).norms
    assert norms is not None
    torch.testing.assert_close(norms[0], flat(b.examples).norm(dim=1), rtol=RTOL, atol=1e-15)


def test_example_norm_with_sum_reduction_is_the_clipped_sum() -> None:
    b = make_batch()
    got = b.run(ClipConfig(method="example-norm", threshold=0.5), reduction="sum")[0]
    expected = clip_examples_by_norm(b.examples, 0.5) * b.x.shape[0]
    torch.testing.assert_close(got, expected, rtol=RTOL, atol=1e-14)


@pytest.mark.parametrize("exclude_head", [True, False])
def test_example_agc_matches_unit_wise_clipping_of_each_example(exclude_head: bool) -> None:
    b = make_batch("relu", exclude_head=exclude_head)
    lam = 0.05
    got = b.run(ClipConfig(method="example-agc", threshold=lam))[0]
    layers = b.engine.arch.layers - (1 if exclude_head else 0)
    expected = clip_examples_by_unit(b.examples, b.weights(), lam, 1e-3, layers)
    torch.testing.assert_close(got, expected, rtol=RTOL, atol=1e-15)


@pytest.mark.parametrize("group", [2, 3, 4])
def test_microbatch_norm_matches_clipping_each_group_mean(group: int) -> None:
    b = make_batch(batch=12)
    threshold = 0.5 * float(flat(b.examples).norm(dim=1).median())
    got = b.run(ClipConfig(method="microbatch-norm", threshold=threshold, microbatch=group))[0]
    expected = clip_groups_by_norm(b.examples, threshold, group)
    torch.testing.assert_close(got, expected, rtol=RTOL, atol=1e-15)


def test_microbatch_of_one_is_example_norm_and_of_the_batch_is_global_norm() -> None:
    b = make_batch(batch=12)
    t = 0.2
    got = b.run(
        ClipConfig(method="microbatch-norm", threshold=t, microbatch=1, label="m1"),
        ClipConfig(method="example-norm", threshold=t),
        ClipConfig(method="microbatch-norm", threshold=t, microbatch=12, label="m12"),
        ClipConfig(method="global-norm", threshold=t),
    )
    torch.testing.assert_close(got[0], got[1], rtol=1e-12, atol=1e-15)
    torch.testing.assert_close(got[2], got[3], rtol=1e-12, atol=1e-15)


def test_a_mixed_stack_gives_each_member_what_it_gets_alone() -> None:
    b = make_batch()
    clips = [
        ClipConfig(method="none"),
        ClipConfig(method="value", threshold=0.01),
        ClipConfig(method="global-norm", threshold=0.05),
        ClipConfig(method="tensor-norm", threshold=0.05),
        ClipConfig(method="unit-agc", threshold=0.01),
        ClipConfig(method="example-norm", threshold=0.3),
        ClipConfig(method="example-agc", threshold=0.01),
        ClipConfig(method="microbatch-norm", threshold=0.3, microbatch=3),
    ]
    together = b.run(*clips)
    for i, clip in enumerate(clips):
        torch.testing.assert_close(together[i], b.run(clip)[0], rtol=1e-12, atol=1e-15)


def test_per_example_clipping_drops_a_non_finite_example() -> None:
    b = make_batch()
    b.x = b.x.clone()
    b.x[4, 0] = float("inf")
    got = b.run(ClipConfig(method="example-norm", threshold=0.4), ClipConfig(method="none"))
    keep = [i for i in range(b.x.shape[0]) if i != 4]
    kept = per_example_grads(b.engine.arch, b.model, b.x[keep], b.y[keep])
    # The dropped example counts in the mean's denominator with a zero gradient.
    expected = clip_examples_by_norm(kept, 0.4) * (len(keep) / b.x.shape[0])
    torch.testing.assert_close(got[0], expected, rtol=RTOL, atol=1e-15)
    assert not torch.isfinite(got[1]).all()  # the batch mean itself is not finite


def test_dp_noise_on_the_mean_has_std_sigma_c_over_b() -> None:
    # Abadi et al. 2016: N(0, sigma^2 C^2) on the clipped sum, so sigma * C / B on the mean.
    b = make_batch(batch=12)
    sigma, c = 2.0, 0.5
    clean = b.run(ClipConfig(method="example-norm", threshold=c))[0]
    noisy = ClipConfig(method="example-norm", threshold=c, noise_multiplier=sigma)
    draws = b.run(*[noisy] * 20, seeds=list(range(20))) - clean  # 20 members, 20 noise streams
    # 20 x P (about 130) draws: the sample std is within 4 of its standard errors 1/sqrt(2n).
    expected = sigma * c / 12
    n = draws.numel()
    assert float(draws.std()) == pytest.approx(expected, rel=4 / np.sqrt(2 * n))


# ---------------------------------------------------------------------------------------------
# Fixed points (REFERENCES.md). Our regression loss is (y_hat - y)^2, twice the (x - a)^2 / 2 of
# the references, so a threshold C on ours corresponds to C / 2 on theirs: C = 2 here is C = 1.


def one_dim_dataset(targets: list[float]) -> Dataset:
    n = len(targets)
    return Dataset(
        x_train=np.zeros((n, 1)),
        y_train=np.array(targets, dtype=float),
        outlier_train=np.zeros(n, dtype=bool),
        x_val=np.zeros((n, 1)),
        y_val=np.array(targets, dtype=float),
        n_train=n,
        classes=0,
    )


def train_bias(targets: list[float], clips: list[ClipConfig], steps: int = 4000) -> list[float]:
    scenario = parse_scenario(
        {
            "data": {"task": "linear", "dim": 1},
            "model": {"kind": "linear", "exclude_head": False},
            "train": {"steps": steps, "lr": 0.02, "batch_size": 3, "eval_every": steps},
        }
    )
    engine = Engine(
        scenario,
        [Member(c, 0) for c in clips],
        batch_size=len(targets),
        dataset=one_dim_dataset(targets),
        dtype=F64,
    )
    for _ in engine.records():
        pass
    return engine.params[1][:, 0].tolist()  # the bias is the 1-D parameter x


def test_per_example_clipping_moves_the_fixed_point_and_global_clipping_does_not() -> None:
    # a = (0, 0, 100), C = 1 (REFERENCES.md, derived): x* = 0.5 clipped, 33.33 unclipped.
    none, global_, example = train_bias(
        [0.0, 0.0, 100.0],
        [
            ClipConfig(method="none"),
            ClipConfig(method="global-norm", threshold=2.0),
            ClipConfig(method="example-norm", threshold=2.0),
        ],
        steps=20000,
    )
    assert example == pytest.approx(0.5, abs=1e-6)
    assert none == pytest.approx(100 / 3, rel=1e-6)
    assert global_ == pytest.approx(100 / 3, rel=1e-3)


def test_chen_example_every_point_of_the_interval_is_stationary() -> None:
    # Chen, Wu, Hong 2020, Example 2: a = (-3, 3), c = 1: zero clipped gradient on [-2, 2].
    b_points = [-2.0, -0.7, 0.0, 1.3, 2.0, 2.5, -3.0]
    scenario = parse_scenario(
        {"data": {"task": "linear", "dim": 1}, "model": {"kind": "linear", "exclude_head": False}}
    )
    dataset = one_dim_dataset([-3.0, 3.0])
    engine = Engine(
        scenario, [Member(ClipConfig(method="none"), 0)], batch_size=2, dataset=dataset, dtype=F64
    )
    K = len(b_points)
    weight = torch.zeros(K, 1, 1, dtype=F64)
    bias = torch.tensor(b_points, dtype=F64).reshape(K, 1)
    grad_pass = StackPass(
        engine.arch,
        [Member(ClipConfig(method="example-norm", threshold=2.0), 0)] * K,
        "mean",
        False,
        F64,
    )
    x = torch.zeros(K, 2, 1, dtype=F64)
    y = torch.tensor([-3.0, 3.0], dtype=F64).expand(K, 2)
    grads = grad_pass.run(
        [weight, bias], x, y, torch.zeros(K, 2, dtype=torch.bool), detail=False
    ).grads
    bias_grad = grads[:, -1]
    np.testing.assert_allclose(bias_grad[:5].numpy(), 0.0, atol=1e-12)
    assert abs(float(bias_grad[5])) > 0.1 and abs(float(bias_grad[6])) > 0.1
