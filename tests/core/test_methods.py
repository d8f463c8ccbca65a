"""A new clipping method is one row of core/methods.py and one kernel: shown here with a
test-only variant registered the same way, which validation, the engine, fans and maps then
take with nothing else taught its name."""

from __future__ import annotations

from collections.abc import Iterator

import pytest
import torch

from core import api, methods
from core.clipping import BatchContext, BatchResult
from core.fan import fan_members
from core.maps import plan
from core.methods import BATCH_NORM, MethodSpec
from core.scenario import ClipConfig, applicable_fields, parse_scenario
from tests.core.test_clipping import RTOL, make_batch

SOFT = "soft-norm"


def soft_norm(ctx: BatchContext, level: torch.Tensor) -> BatchResult:
    """g <- g * t / (t + |g|): a smooth relative of global-norm clipping."""
    norm = torch.linalg.vector_norm(ctx.flat, dim=1)
    return (level / (level + norm)).unsqueeze(1), norm, (norm > level).to(norm.dtype)


@pytest.fixture
def soft() -> Iterator[MethodSpec]:
    spec = MethodSpec(
        id=SOFT,
        clips="the whole batch-mean gradient, softly",
        per_example=False,
        unit="L2 norm of the batch-mean gradient (soft)",
        help="Shrinks the batch-mean gradient smoothly: g <- g * t / (t + |g|).",
        color="#123456",
        counts="steps",
        compares=BATCH_NORM,
        threshold=0.5,
        grid=(0.01, 10.0, 4),
        kernel=soft_norm,
    )
    methods.register(spec)
    yield spec
    methods.unregister(SOFT)


def test_a_registered_method_is_a_valid_choice_with_its_own_default_threshold(
    soft: MethodSpec,
) -> None:
    scenario = parse_scenario({"clip": [{"method": SOFT}]})
    assert scenario.clip[0].threshold == 0.5 and scenario.clip[0].spec is soft
    assert scenario.thresholds_for(scenario.clip[0]) == pytest.approx((0.01, 0.1, 1.0, 10.0))
    assert "clip.0.threshold" in applicable_fields(scenario)
    assert "clip.0.eps" not in applicable_fields(scenario)  # its row names no options


def test_the_engine_applies_a_registered_kernel_to_the_mean_gradient(soft: MethodSpec) -> None:
    # Reference: the mean of torch.func per-example gradients, shrunk by the formula itself.
    b = make_batch()
    got = b.run(ClipConfig(method=SOFT, threshold=0.3))[0]
    mean = b.mean
    expected = mean * 0.3 / (0.3 + torch.linalg.vector_norm(mean))
    torch.testing.assert_close(got, expected, rtol=RTOL, atol=1e-12)


def test_fans_maps_and_runs_take_a_registered_method_with_nothing_else_changed(
    soft: MethodSpec,
) -> None:
    scenario = parse_scenario(
        {
            "data": {"n_train": 256, "n_val": 64},
            "model": {"hidden": [8]},
            "train": {"steps": 20, "batch_size": 16, "eval_every": 10},
            "clip": [{"method": "none"}, {"method": SOFT}],
            "map": {"batch_sizes": [16], "thresholds": [0.1, 1.0]},
        }
    )
    assert sum(m.method == SOFT for m in fan_members(scenario)) == 17
    assert sum(len(c.points) for c in plan(scenario)) == 3
    result = api.run(scenario)
    share = result.metric("clipped_share")[:, 1]
    assert ((share == 0) | (share == 1)).all()  # it counts steps, as its row says


def test_an_unknown_method_is_refused_with_the_registered_ones_listed(soft: MethodSpec) -> None:
    from core.errors import GradfenceInputError

    with pytest.raises(GradfenceInputError, match=f"choose one of .*{SOFT}"):
        parse_scenario({"clip": [{"method": "soft-nrom"}]})
