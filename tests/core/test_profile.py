"""The norm profile's predicted pass-through against a Monte Carlo over real batches, its units,
and its file form."""

from __future__ import annotations

import json
import math
from typing import Any

import numpy as np
import pytest
import torch

from core.analysis import MethodWindows, Window
from core.data import build_dataset
from core.engine import Engine, Member, init_seed
from core.maps import threshold_text
from core.model import architecture, init_params
from core.profile import (
    NormProfile,
    Suggestion,
    norm_profile,
    profile_sentence,
    suggest_thresholds,
    suggestion_line,
)
from core.results import collect
from core.scenario import ClipConfig, Scenario, load_scenario, parse_scenario
from tests.conftest import SCENARIOS

F64 = torch.float64

LINEAR: dict[str, Any] = {
    "data": {"task": "linear", "dim": 4, "n_train": 2048, "n_val": 64, "noise": 0.5},
    "outliers": {"kind": "target-shift", "placement": "batch", "rate": 0.5, "scale": 20.0},
    "model": {"kind": "linear"},
    "train": {"steps": 10, "lr": 0.01},
    "map": {"batch_sizes": [4, 16, 64, 256], "thresholds": [0.5, 2.0, 8.0]},
}


def linear(**changes: Any) -> Scenario:
    raw = json.loads(json.dumps(LINEAR))
    for key, value in changes.items():
        table, name = key.split("__")
        raw.setdefault(table, {})[name] = value
    return parse_scenario(raw)


def exact_gradients(scenario: Scenario) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per-example gradients (rows, P) of (y_hat - y)^2 at the initial weights, in closed form
    (2 r x for the weights, 2 r for the bias), and the clean and outlier row indices."""
    ds = build_dataset(scenario)
    arch = architecture(scenario, ds.dim)
    weight, bias = (p[0].double().numpy() for p in init_params(arch, [init_seed(scenario, 0)], F64))
    residual = ds.x_train @ weight[0] + bias[0] - ds.y_train
    grads = 2.0 * residual[:, None] * np.column_stack([ds.x_train, np.ones(len(residual))])
    flags = ds.outlier_train
    clean = np.flatnonzero(~flags[: ds.n_train])
    return grads, clean, np.flatnonzero(flags)


def monte_carlo_pass(
    scenario: Scenario, batch: int, unit: int, threshold: float, draws: int = 6000
) -> float:
    """Independent reference: draw real batches as core.sampler does (clean rows without
    replacement, `count` pool outliers at random positions, or for dataset placement a uniform
    batch of the training set that holds at least one outlier), clip each unit of `unit`
    consecutive examples by its mean's norm (by the sum's norm for the whole batch under the
    sum reduction) and measure |sum of clipped outlier parts| / |sum of outlier parts|."""
    grads, clean, outliers = exact_gradients(scenario)
    o = scenario.outliers
    rng = np.random.default_rng(11)
    total_sum = scenario.train.loss_reduction == "sum"
    passes = []
    n_train = scenario.data.n_train
    while len(passes) < draws:
        if o.placement == "batch":
            rows = rng.choice(clean, batch, replace=False)
            slots = rng.choice(batch, o.count, replace=False)
            rows[slots] = rng.choice(outliers, o.count, replace=False)
        else:
            rows = rng.choice(n_train, batch, replace=False)
        is_out = np.isin(rows, outliers)
        if not is_out.any():
            continue
        g = grads[rows].reshape(batch // unit, unit, -1)  # (units, unit, P)
        sums = g.sum(axis=1)
        compared = np.linalg.norm(sums if total_sum else sums / unit, axis=1)
        cap = np.minimum(1.0, threshold / compared)  # (units,)
        outlier_part = (g * is_out.reshape(batch // unit, unit, 1)).sum(axis=1)
        kept, whole = cap @ outlier_part, outlier_part.sum(axis=0)
        passes.append(float(np.linalg.norm(kept) / np.linalg.norm(whole)))
    return float(np.mean(passes))


def predicted(profile: NormProfile, label: str, threshold: float, batch: int) -> float:
    return profile.pass_through[label][threshold_text(threshold)][str(batch)]


CASES = [
    # (scenario changes, [[clip]] table, unit of the reference: 0 = the whole batch)
    ({}, {"method": "global-norm"}, 0),
    ({"train__loss_reduction": "sum"}, {"method": "global-norm"}, 0),
    ({"outliers__count": 3}, {"method": "example-norm"}, 1),
    ({"outliers__count": 3}, {"method": "microbatch-norm", "microbatch": 4}, 4),
    ({"outliers__placement": "dataset", "outliers__fraction": 0.01}, {"method": "global-norm"}, 0),
]


@pytest.mark.parametrize(("changes", "clip", "unit"), CASES, ids=lambda v: str(v)[:40])
def test_predicted_pass_through_matches_a_monte_carlo_over_real_batches(
    changes: dict[str, Any], clip: dict[str, Any], unit: int
) -> None:
    # The profile draws a Gaussian clean fluctuation with the clean gradients' covariance and
    # the finite-population factor; the reference draws real rows of the linear task, whose
    # per-example gradients are exact. Agreement within 0.02: the reference's Monte Carlo error
    # is about 0.003, the profile's 0.01 at most; the worst gap seen is 0.007.
    scenario = linear(**changes)
    scenario = scenario.with_overrides({"clip": [clip]})
    profile = norm_profile(scenario, checkpoint=0)
    label = scenario.clip[0].display_name
    checked = 0
    for batch in scenario.map.batch_sizes:
        for threshold in scenario.map.thresholds or ():
            expected = monte_carlo_pass(scenario, batch, unit or batch, threshold, draws=1500)
            assert predicted(profile, label, threshold, batch) == pytest.approx(
                expected, abs=0.02
            ), (batch, threshold)
            checked += expected < 0.95
    assert checked >= 4  # most points really clip: the check is not of ones against ones


def test_the_curves_are_in_the_units_each_method_clips() -> None:
    # Closed form E|g_B|^2 = |G|^2 + tr(Sigma)/B (N - B)/(N - 1) (REFERENCES.md): the batch
    # mean's norm for global-norm, B times it under the sum reduction, the norm at batch m for
    # a group of m whatever B is, at batch 1 for one example.
    scenario = linear(train__loss_reduction="sum").with_overrides(
        {
            "clip": [
                {"method": "global-norm", "threshold": 30.0},
                {"method": "microbatch-norm", "threshold": 2.0, "microbatch": 4},
                {"method": "example-norm", "threshold": 2.0},
            ]
        }
    )
    profile = norm_profile(scenario, checkpoint=0)
    for i, b in enumerate(profile.grid):
        rms = math.sqrt(profile.predicted_sq(b))
        assert profile.methods["global-norm"].norm[i] == pytest.approx(b * rms)
        assert profile.methods["microbatch-norm"].norm[i] == pytest.approx(
            math.sqrt(profile.predicted_sq(4))
        )
        assert profile.methods["example-norm"].norm[i] == pytest.approx(
            math.sqrt(profile.grad_sq + profile.trace)
        )
    assert profile.methods["global-norm"].unit == 0 and profile.methods["microbatch-norm"].unit == 4


def test_the_coupling_preset_predicts_the_measured_pass_through_of_global_norm() -> None:
    # Measured: the engine's mean pass-through over every outlier step of a run at the preset's
    # own threshold, at each mapped batch size; the bound is 0.1, seen here within 0.03.
    scenario = load_scenario(SCENARIOS / "batch-size-coupling.toml")
    profile = norm_profile(scenario)
    clip = next(c for c in scenario.clip if c.method == "global-norm")
    curve = profile.methods[clip.display_name]
    for batch in scenario.map.batch_sizes:
        engine = Engine(scenario, [Member(clip, 0)], batch, outlier_steps=True)
        for _ in engine.records():
            pass
        measured = float(engine.outlier_step_means()["outlier_pass"][0])
        assert curve.pass_through[profile.grid.index(batch)] == pytest.approx(measured, abs=0.1)
    assert curve.half_batch is not None and 32 < curve.half_batch < 128
    sentence = profile_sentence(profile)
    assert "global-norm at 2 passes 0.06 at B = 8 and 1.00 at B = 512" in sentence
    assert "hides" not in sentence


def test_the_profile_reads_back_from_what_as_json_wrote() -> None:
    scenario = linear().with_overrides({"clip": [{"method": "global-norm", "threshold": 2.0}]})
    profile = norm_profile(scenario, checkpoint=0)
    text = json.dumps(profile.as_json())  # "inf" strings and nulls stay JSON
    again = NormProfile.from_json(json.loads(text))
    assert again.methods == profile.methods and again.pass_through == profile.pass_through
    assert again.grid == profile.grid and again.reduction == profile.reduction
    raw = json.loads(text)
    raw["methods"]["global-norm"]["half_batch"] = None
    raw["methods"]["global-norm"]["pass_through"][0] = None  # NaN as JSON writes it
    raw["outlier_norm"] = "inf"
    odd = NormProfile.from_json(raw)
    assert odd.methods["global-norm"].half_batch is None and odd.outlier_norm == math.inf
    assert math.isnan(odd.methods["global-norm"].pass_through[0])


def test_a_scenario_without_outliers_has_no_pass_through_to_predict() -> None:
    scenario = linear(outliers__kind="none").with_overrides(
        {"clip": [{"method": "global-norm", "threshold": 2.0}]}
    )
    profile = norm_profile(scenario, checkpoint=0)
    assert all(math.isnan(v) for v in profile.methods["global-norm"].pass_through)
    assert profile_sentence(profile).endswith("the scenario has no outliers.")


def test_engine_with_the_profiles_checkpoint_is_the_reference_start() -> None:
    # exact_gradients rebuilds the start from init_seed; it must be the engine's own.
    scenario = linear()
    engine = Engine(scenario, [Member(ClipConfig(method="none"), 0)])
    weight = init_params(engine.arch, [init_seed(scenario, 0)], F64)[0]
    np.testing.assert_allclose(weight[0].numpy(), engine.initial[0][0].double().numpy(), rtol=1e-6)


def test_the_suggestion_is_a_percentile_of_the_ordinary_warm_up_norms() -> None:
    # Reference: numpy's 90th percentile of the batch-mean norms of the warm-up steps whose batch
    # held no outlier, from a separate unclipped run of the same 50 steps. On the coupling
    # preset the earlier percentile over every step (9.66) sat among the outlier steps' norms.
    scenario = load_scenario(SCENARIOS / "batch-size-coupling.toml")
    suggestion = next(s for s in suggest_thresholds(scenario) if s.method == "global-norm")
    warm = scenario.with_overrides({"train.steps": 50, "train.eval_every": 1})
    run = collect(Engine(warm, [Member(ClipConfig(method="none"), 0)]))
    norms = run.metric("grad_norm_pre")[:, 0].astype(np.float64)
    clean = run.metric("batch_outliers")[:, 0] == 0
    assert suggestion.threshold == pytest.approx(np.percentile(norms[clean], 90.0), rel=1e-12)
    assert suggestion.seen - suggestion.left_out == int(clean.sum()) < 50
    assert suggestion.threshold < 0.5 * float(np.median(norms[~clean]))  # below outlier steps


def test_a_suggestion_outside_its_window_says_so_and_why() -> None:
    kept = np.array([1.0, 1.5, 2.0, 2.5])
    suggestion = Suggestion("global-norm", "global-norm", 2.45, 0.25, 32, 90.0, 6, 10, 32, kept)
    window = Window(32, 0.3, 0.6, False, False, (0.3, 0.6))
    windows = MethodWindows("global-norm", "global-norm", (window,), None, None, None, (), None)
    line = suggestion_line(suggestion, windows)
    # Every kept norm is above 0.6: the window's upper edge would clip all of them (by hand).
    assert "It lies above batch size 32's window in the map (0.3 to 0.6)" in line
    assert "would clip 100% of the same ordinary norms" in line
    assert "4 of 10 steps without outliers" in line
    inside = Window(32, 1.0, 10.0, False, True, (1.0, 10.0))
    wide = MethodWindows("global-norm", "global-norm", (inside,), None, None, None, (), None)
    assert suggestion_line(suggestion, wide).endswith(
        "It lies inside batch size 32's window in the map (1 to >=10)."
    )
