"""The engine against closed forms, and its guarantees: stacking changes nothing, runs repeat."""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch

from core import api
from core.engine import Engine, Member, StackPass, run_members
from core.reference import flat, load_member, module_for, per_example_grads
from core.results import collect
from core.scenario import ClipConfig, Scenario, load_scenario, parse_scenario
from tests.conftest import SCENARIOS


def frozen_linear(n_train: int = 2048, dim: int = 8, noise: float = 0.5) -> Scenario:
    """A linear task whose weights barely move (lr 1e-12): every batch sees the same model."""
    return parse_scenario(
        {
            "data": {"task": "linear", "dim": dim, "n_train": n_train, "n_val": 64, "noise": noise},
            "model": {"kind": "linear"},
            "train": {"steps": 4000, "lr": 1e-12, "eval_every": 1},
            "clip": [{"method": "none"}],
        }
    )


def population_gradients(engine: Engine) -> np.ndarray:
    """Exact per-example gradients (N, P) of (y_hat - y)^2 for the linear model at its start."""
    w = engine.initial[0][0].double().numpy()  # (1, dim)
    b = engine.initial[1][0].double().numpy()  # (1,)
    x = engine.dataset.x_train[: engine.dataset.n_train]
    y = engine.dataset.y_train[: engine.dataset.n_train]
    residual = x @ w[0] + b[0] - y
    return 2.0 * residual[:, None] * np.column_stack([x, np.ones(len(x))])


@pytest.mark.parametrize("batch", [4, 64, 1024])
def test_batch_mean_norm_follows_the_closed_form_with_finite_population(batch: int) -> None:
    # E|g_B|^2 = |G|^2 + tr(Sigma)/B * (N - B)/(N - 1) for B drawn without replacement from N.
    scenario = frozen_linear()
    engine = Engine(scenario, run_members(scenario), batch)
    g = population_gradients(engine)
    n = len(g)
    mean = g.mean(axis=0)
    trace = ((g - mean) ** 2).sum(axis=1).mean()  # tr(Sigma) with the population's 1/N
    expected = mean @ mean + trace / batch * (n - batch) / (n - 1)
    measured = collect(engine).metric("grad_norm_pre")[:, 0].astype(np.float64) ** 2
    standard_error = measured.std() / math.sqrt(len(measured))  # steps draw independent batches
    assert abs(measured.mean() - expected) < 4 * standard_error
    if batch == 1024:  # the finite-population factor (about 1/2 here) is what makes it hold
        assert abs(measured.mean() - (mean @ mean + trace / batch)) > 4 * standard_error


@pytest.mark.slow
def test_noise_scale_estimate_is_centred_on_the_exact_b_simple() -> None:
    # McCandlish et al. 2018: B_simple = tr(Sigma) / |G|^2, here from all per-example gradients.
    errors = []
    for seed in range(12):
        scenario = frozen_linear(noise=2.0).with_overrides(
            {"data.seed": seed, "train.seed": seed, "train.steps": 1500}
        )
        engine = Engine(scenario, run_members(scenario), 64)
        g = population_gradients(engine)
        mean = g.mean(axis=0)
        exact = ((g - mean) ** 2).sum(axis=1).mean() / (mean @ mean)
        errors.append(collect(engine).final("noise_scale")[0] / exact - 1.0)
    errors_array = np.asarray(errors)
    # One run averages about 40 batches (exponential weight 0.95): its relative error has an sd
    # of about 0.10 (measured over these seeds). Over 12 seeds the mean error must be within
    # three standard errors of zero, and no run may be off by more than four sd.
    spread = errors_array.std(ddof=1)
    assert abs(errors_array.mean()) < 3 * spread / math.sqrt(len(errors_array))
    assert np.abs(errors_array).max() < 0.4


def test_noise_scale_grows_as_the_loss_falls() -> None:
    # McCandlish et al. 2018 (c): B_simple grows as training progresses.
    scenario = parse_scenario(
        {
            "data": {"task": "linear", "dim": 8, "n_train": 2048, "noise": 0.5},
            "model": {"kind": "linear"},
            "train": {"steps": 600, "lr": 0.02, "batch_size": 64, "eval_every": 1},
            "clip": [{"method": "none"}],
        }
    )
    result = api.run(scenario)
    scale = result.metric("noise_scale")[:, 0]
    assert result.metric("val_loss")[-1, 0] < 0.5 * result.metric("val_loss")[0, 0]
    assert np.median(scale[-100:]) > 3 * np.median(scale[20:60])


STACK_PRESET = {
    "data": {"task": "blobs", "noise": 1.2, "n_train": 1000},
    "outliers": {"kind": "label-flip", "placement": "batch", "rate": 0.3, "count": 2},
    "train": {
        "steps": 120,
        "batch_size": 32,
        "eval_every": 10,
        "optimizer": "sgd",
        "momentum": 0.9,
    },
}


def test_a_member_trained_alone_equals_the_same_member_in_a_stack_of_16() -> None:
    # Each member's rows of every batched matmul are computed independently, and SGD is
    # element-wise, so we expect identical numbers; 1e-5 relative is the stated bound.
    target = ClipConfig(method="example-norm", threshold=0.8)
    others = [
        ClipConfig(method=m, threshold=t, label=f"{m} {t}")
        for m, t in [
            ("global-norm", 0.1),
            ("global-norm", 1.0),
            ("value", 0.01),
            ("tensor-norm", 0.3),
            ("unit-agc", 0.01),
            ("unit-agc", 0.1),
            ("example-agc", 0.02),
            ("example-norm", 0.1),
            ("example-norm", 5.0),
            ("microbatch-norm", 0.5),
            ("global-norm", 0.01),
            ("value", 0.1),
            ("tensor-norm", 3.0),
            ("example-agc", 0.2),
            ("microbatch-norm", 2.0),
        ]
    ]
    scenario = parse_scenario(STACK_PRESET)
    alone = collect(Engine(scenario, [Member(target, 0)]))
    stacked = collect(Engine(scenario, [Member(c, 0) for c in [*others[:7], target, *others[7:]]]))
    assert len(stacked.members) == 16
    for name, values in alone.metrics.items():
        np.testing.assert_allclose(stacked.metrics[name][:, 7], values[:, 0], rtol=1e-5, atol=0)


def test_members_with_the_same_seed_share_batches_and_start() -> None:
    scenario = parse_scenario(STACK_PRESET)
    engine = Engine(
        scenario,
        [
            Member(ClipConfig(method="none"), 0),
            Member(ClipConfig(method="global-norm", threshold=0.1), 0),
            Member(ClipConfig(method="none"), 1),
        ],
    )
    np.testing.assert_array_equal(engine.batch_indices(0), engine.batch_indices(1))
    assert not np.array_equal(engine.batch_indices(0), engine.batch_indices(2))
    for p in engine.initial:
        torch.testing.assert_close(p[0], p[1], rtol=0, atol=0)
        assert not torch.equal(p[0], p[2])


def test_the_same_run_twice_gives_identical_arrays() -> None:
    scenario = parse_scenario(STACK_PRESET)
    first, second = api.run(scenario), api.run(scenario)
    for name in first.metrics:
        np.testing.assert_array_equal(first.metrics[name], second.metrics[name])


def test_logging_every_step_does_not_change_a_trajectory() -> None:
    # A logged step measures more, but applies the same gradient, computed the same way.
    scenario = parse_scenario(
        {
            **STACK_PRESET,
            "clip": [
                {"method": "global-norm", "threshold": 0.5},
                {"method": "example-norm", "threshold": 0.5},
                {"method": "microbatch-norm", "threshold": 0.5, "microbatch": 4},
            ],
        }
    )
    sparse = collect(Engine(scenario, run_members(scenario)))
    dense = collect(Engine(scenario.with_overrides({"train.eval_every": 1}), run_members(scenario)))
    rows = sparse.steps - 1  # the dense run's rows of the sparse run's logged steps
    for name in ("val_loss", "grad_norm_pre", "outlier_share", "outlier_pass"):
        np.testing.assert_array_equal(dense.metric(name)[rows], sparse.metric(name))


def test_skipping_a_spike_keeps_parameters_and_optimizer_state() -> None:
    scenario = parse_scenario(
        {
            **STACK_PRESET,
            "train": {**STACK_PRESET["train"], "steps": 60},
            "clip": [
                {
                    "method": "global-norm",
                    "threshold": 1e-6,
                    "on_spike": "skip",
                    "skip_factor": 1.0,
                    "label": "always skips",
                },
                {"method": "none"},
            ],
        }
    )
    engine = Engine(scenario, run_members(scenario))
    result = collect(engine)
    torch.testing.assert_close(engine.params[0][0], engine.initial[0][0], rtol=0, atol=0)
    assert not torch.equal(engine.params[0][1], engine.initial[0][1])
    assert "momentum_buffer" not in engine.optimizer_state(0)  # torch.optim never stepped it
    assert float(engine.optimizer_state(1)["momentum_buffer"].abs().max()) > 0.0
    np.testing.assert_array_equal(result.metric("update_norm")[:, 0], 0.0)


SKIPPING_ADAM = {
    # Half the batches carry one target shifted by 60: their batch-mean norm is far above the
    # skip level 1 * 4, the clean batches' stays below it (checked in the test).
    "data": {"task": "linear", "dim": 4, "n_train": 512, "n_val": 64, "noise": 0.5},
    "outliers": {"kind": "target-shift", "placement": "batch", "rate": 0.5, "scale": 60.0},
    "model": {"kind": "linear"},
    "train": {"steps": 40, "batch_size": 16, "optimizer": "adam", "lr": 0.05, "eval_every": 1},
    "clip": [
        {"method": "global-norm", "threshold": 4.0, "on_spike": "skip", "skip_factor": 1.0},
        {"method": "none"},
        {"method": "global-norm", "threshold": 1.0, "label": "clips"},
    ],
}


@pytest.mark.parametrize("optimizer", ["adam", "adamw"])
def test_a_member_that_skips_steps_is_torch_adam_run_on_its_real_steps_only(
    optimizer: str,
) -> None:
    # Reference: torch.optim.Adam (AdamW) on a torch.nn.Linear, fed the batches of the engine's
    # member, with the global-norm clip g * min(1, c / |g|) (Pascanu et al. 2013) and the skip
    # rule of DESIGN.md (drop the step when |g| exceeds skip_factor * threshold) done by hand:
    # a skipped step must leave parameters, moments and the step count (bias correction) alone.
    scenario = parse_scenario(
        {
            **SKIPPING_ADAM,
            "train": {**SKIPPING_ADAM["train"], "optimizer": optimizer, "weight_decay": 0.01},
        }
    )
    engine = Engine(scenario, run_members(scenario), dtype=torch.float64)
    skipped = collect(engine).metric("skipped")[:, 0] > 0
    assert 8 <= skipped.sum() <= 32  # the member really skips part of the run

    linear = torch.nn.Linear(4, 1, dtype=torch.float64)
    with torch.no_grad():
        linear.weight.copy_(engine.initial[0][0])
        linear.bias.copy_(engine.initial[1][0])
    kind = torch.optim.Adam if optimizer == "adam" else torch.optim.AdamW
    reference = kind(linear.parameters(), lr=engine.lr, weight_decay=0.01)
    x_all = torch.as_tensor(engine.dataset.x_train)
    y_all = torch.as_tensor(engine.dataset.y_train)
    reference_skips = []
    for rows in engine.batch_indices(0):
        index = torch.as_tensor(rows)
        reference.zero_grad()
        loss = torch.nn.functional.mse_loss(linear(x_all[index]).squeeze(-1), y_all[index])
        loss.backward()
        grads = [p.grad for p in linear.parameters() if p.grad is not None]
        norm = float(torch.sqrt(sum((g * g).sum() for g in grads)))
        reference_skips.append(not norm <= 1.0 * 4.0)
        if reference_skips[-1]:
            continue
        for g in grads:
            g.mul_(min(1.0, 4.0 / norm))
        reference.step()
    np.testing.assert_array_equal(skipped, reference_skips)
    torch.testing.assert_close(engine.params[0][0], linear.weight.detach(), rtol=1e-12, atol=0)
    torch.testing.assert_close(engine.params[1][0], linear.bias.detach(), rtol=1e-12, atol=0)
    state = engine.optimizer_state(0)
    real_steps = int((~skipped).sum())
    assert float(state["step"]) == real_steps
    moments = reference.state[linear.weight]["exp_avg"]
    torch.testing.assert_close(state["exp_avg"][:4], moments[0], rtol=1e-12, atol=0)


def test_members_that_never_skip_are_the_same_to_the_bit_beside_a_skipping_one() -> None:
    # The skipping member steps on a block of its own; the others must not notice.
    scenario = parse_scenario(SKIPPING_ADAM)
    members = run_members(scenario)
    together = collect(Engine(scenario, members))
    apart = collect(Engine(scenario, members[1:]))
    for name, values in apart.metrics.items():
        np.testing.assert_array_equal(together.metrics[name][:, 1:], values)


# ---------------------------------------------------------------------------------------------
# The split statistics of a logged step, recomputed by hand from torch.func per-example
# gradients (core.reference shares no code with the engine's backward or its clipping).

SPLIT_BATCH = 12
# Five flipped labels: enough for the outliers to pull against the clean mean; with groups of 2
# the first group is all outliers and drops out when they are taken out.
SPLIT_OUTLIERS = (0, 1, 5, 7, 10)


def split_batch() -> tuple[Engine, torch.Tensor, torch.Tensor, torch.Tensor, torch.Tensor]:
    """A blobs batch whose outliers have their labels flipped: their gradients point away
    from the clean ones. Returns the engine, x, y, the outlier mask and (B, P) gradients."""
    scenario = parse_scenario(
        {
            "data": {"task": "blobs", "dim": 3, "classes": 2, "noise": 0.5},
            "model": {"hidden": [8], "activation": "tanh"},
            "train": {"batch_size": SPLIT_BATCH},
        }
    )
    engine = Engine(scenario, [Member(ClipConfig(method="none"), 0)], dtype=torch.float64)
    rows = engine.batches[0, 0]
    x, y = engine.x_train[rows], engine.y_train[rows].clone()
    outlier = torch.zeros(SPLIT_BATCH, dtype=torch.bool)
    outlier[list(SPLIT_OUTLIERS)] = True
    y[outlier] = 1 - y[outlier]
    model = module_for(engine.arch).double()
    load_member(model, engine.params, 0)
    return engine, x, y, outlier, flat(per_example_grads(engine.arch, model, x, y))


def clip_rows(rows: torch.Tensor, c: float) -> torch.Tensor:
    """Each row times min(1, c / |row|)."""
    return rows * torch.clamp(c / rows.norm(dim=1, keepdim=True), max=1.0)


def by_hand(
    clip: ClipConfig, g: torch.Tensor, outlier: torch.Tensor, reduction: str
) -> dict[str, float]:
    """share, pass, shift and cosine of DESIGN.md section 5 and issue 11, from (B, P) rows."""
    c = float(clip.threshold or math.inf)
    total = (lambda rows: rows.mean(dim=0)) if reduction == "mean" else (lambda rows: rows.sum(0))
    clean = g[~outlier]
    m = clip.microbatch if clip.method == "microbatch-norm" else 1
    if clip.method == "global-norm":
        compared = total(g).norm()
        coef = min(1.0, c / float(compared))
        clipped = g * coef  # every example alike
        without = total(clean) * min(1.0, c / float(total(clean).norm()))
    else:
        # Each unit of m examples is clipped by its mean's norm; taken out, a unit keeps its
        # clean examples and averages over them, and an emptied unit drops out.
        units = [list(range(i, i + m)) for i in range(0, SPLIT_BATCH, m)]
        clipped = torch.empty_like(g)
        kept = []
        for unit in units:
            mean = g[unit].mean(dim=0)
            clipped[unit] = g[unit] * min(1.0, c / float(mean.norm()))
            rest = [i for i in unit if not outlier[i]]
            if rest:
                kept.append((rest, clip_rows(g[rest].mean(dim=0, keepdim=True), c)[0]))
        if reduction == "mean":
            without = torch.stack([v for _, v in kept]).mean(dim=0)
        else:
            without = sum(v * len(rest) for rest, v in kept)
    update = total(clipped)
    scale = 1.0 / SPLIT_BATCH if reduction == "mean" else 1.0
    out_part, clean_part = clipped[outlier].sum(0) * scale, clipped[~outlier].sum(0) * scale
    plain_out = g[outlier].sum(0) * scale
    clean_plain = clean.sum(0)
    return {
        "outlier_share": float(out_part.norm() / (out_part.norm() + clean_part.norm())),
        "old_share": float(out_part.norm() / update.norm()),
        "outlier_pass": float(out_part.norm() / plain_out.norm()),
        "outlier_shift": float((update - without).norm() / without.norm()),
        "clean_cosine": float(update @ clean_plain / (update.norm() * clean_plain.norm())),
    }


SPLIT_CLIPS = [
    ClipConfig(method="none"),
    ClipConfig(method="global-norm", threshold=0.05),
    ClipConfig(method="example-norm", threshold=0.3),
    ClipConfig(method="microbatch-norm", threshold=0.2, microbatch=4),
    ClipConfig(method="microbatch-norm", threshold=0.2, microbatch=2, label="pairs"),
]


@pytest.mark.parametrize("reduction", ["mean", "sum"])
def test_outlier_share_pass_shift_and_cosine_match_a_hand_recomputation(reduction: str) -> None:
    engine, x, y, outlier, g = split_batch()
    K = len(SPLIT_CLIPS)
    grad_pass = StackPass(
        engine.arch, [Member(c, 0) for c in SPLIT_CLIPS], reduction, True, torch.float64
    )
    params = [p.expand(K, *p.shape[1:]) for p in engine.params]
    detail = grad_pass.run(
        params, x.expand(K, *x.shape), y.expand(K, *y.shape), outlier.expand(K, -1), detail=True
    ).detail
    assert detail is not None
    old_shares = []
    for i, clip in enumerate(SPLIT_CLIPS):
        expected = by_hand(clip, g, outlier, reduction)
        for name in ("outlier_share", "outlier_pass", "outlier_shift", "clean_cosine"):
            assert float(detail[name][i]) == pytest.approx(expected[name], rel=1e-9), (
                clip.method,
                name,
            )
        assert 0.0 <= float(detail["outlier_share"][i]) <= 1.0
        old_shares.append(expected["old_share"])
    # The earlier share (outlier part over the whole update) leaves [0, 1] on this batch, where
    # the flipped labels pull against the clean examples; the new one cannot.
    assert max(old_shares) > 1.0


@pytest.mark.parametrize(
    "train",
    [
        {"optimizer": "sgd", "momentum": 0.9},
        {"optimizer": "adam", "lr": 0.01},
    ],
    ids=["momentum", "adam"],
)
def test_clean_cosine_is_one_without_outliers_or_clipping_whatever_the_optimizer(
    train: dict[str, object],
) -> None:
    # With nothing clipped and no outliers the clipped gradient is the clean examples' mean
    # (cosine 1 by definition); the optimizer's parameter change is not what it measures.
    scenario = parse_scenario(
        {
            "data": {"task": "linear", "dim": 4, "n_train": 512, "noise": 0.5},
            "model": {"kind": "linear"},
            "train": {"steps": 60, "batch_size": 16, "eval_every": 5, **train},
            "clip": [{"method": "none"}],
        }
    )
    cosine = api.run(scenario).metric("clean_cosine")[:, 0]
    np.testing.assert_allclose(cosine, 1.0, rtol=0, atol=1e-6)


def test_a_percentile_rule_on_example_norm_clips_one_share_of_examples_at_any_batch_size() -> None:
    # Definition of a percentile: the 90th percentile of the examples' norms is exceeded by 10%
    # of them. Fed each example (not each batch's largest, which grows with B), the rule clips
    # about 10% of clean examples at B = 8 and at B = 512; the 0.02 margin is ours.
    coupling = load_scenario(SCENARIOS / "batch-size-coupling.toml")
    clip = ClipConfig(method="example-norm", rule="percentile", percentile=90.0)
    clean = coupling.with_overrides({"outliers.kind": "none", "train.eval_every": 1})
    for batch in (8, 512):
        shares = collect(Engine(clean, [Member(clip, 0)], batch)).metric("clipped_share")[:, 0]
        assert abs(float(np.mean(shares[clip.warmup + 1 :])) - 0.10) < 0.02, batch
    # With the preset's outliers (gradient norm near 250 against ordinary ones below 10) the
    # outlier stands far above that level: most of its pull is cut.
    noisy = coupling.with_overrides({"train.eval_every": 1})
    passes = collect(Engine(noisy, [Member(clip, 0)], 32)).metric("outlier_pass")[:, 0]
    assert float(np.nanmean(passes)) < 0.1
