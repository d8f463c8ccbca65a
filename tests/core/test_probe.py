"""The probe against torch itself: clip_grad_norm_'s returned norm, a sub-batch gradient computed
directly with torch.autograd.grad, and the real gradients untouched by the extra pass."""

from __future__ import annotations

import csv
import math
from pathlib import Path

import pytest
import torch
from torch import nn

from core.normlog import load_log
from core.probe import LOG_HEADER, NormProbe


def small_model() -> tuple[nn.Sequential, torch.Tensor, torch.Tensor]:
    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(5, 16), nn.Tanh(), nn.Linear(16, 3))
    x = torch.randn(32, 5)
    y = torch.randint(0, 3, (32,))
    return model, x, y


def loss_of(model: nn.Module, x: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
    return nn.functional.cross_entropy(model(x), y)


def test_the_probe_records_the_norm_clip_grad_norm_returns(tmp_path: Path) -> None:
    model, x, y = small_model()
    loss_of(model, x, y).backward()
    with NormProbe(tmp_path / "log.csv", model.parameters(), batch_size=32) as probe:
        reading = probe.record(1)
    # torch.nn.utils.clip_grad_norm_ returns the pre-clip total norm of the gradients.
    returned = torch.nn.utils.clip_grad_norm_(model.parameters(), max_norm=1e-3)
    assert reading.grad_norm == float(returned)


def test_the_sub_batch_norm_is_that_of_the_sub_batch_gradient_and_the_real_one_stays(
    tmp_path: Path,
) -> None:
    model, x, y = small_model()
    loss_of(model, x, y).backward()
    real = [p.grad.clone() for p in model.parameters() if p.grad is not None]
    real_ids = [id(p.grad) for p in model.parameters()]
    probe = NormProbe(tmp_path / "log.csv", model.parameters(), batch_size=32, every=1)
    reading = probe.record(1, sub_batch=lambda: (loss_of(model, x[:8], y[:8]), 8))
    probe.close()
    # Directly: the gradient of the sub-batch's mean loss, by torch.autograd.grad.
    grads = torch.autograd.grad(loss_of(model, x[:8], y[:8]), list(model.parameters()))
    direct = torch.linalg.vector_norm(torch.cat([g.flatten() for g in grads]))
    assert reading.small_grad_norm == pytest.approx(float(direct), rel=1e-6)
    assert reading.small_batch_size == 8
    after = [p.grad for p in model.parameters()]
    assert [id(g) for g in after] == real_ids
    for before, now in zip(real, after, strict=True):
        assert now is not None and torch.equal(before, now)


def test_the_probe_writes_the_log_format_as_it_goes(tmp_path: Path) -> None:
    model, x, y = small_model()
    path = tmp_path / "log.csv"
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1)
    probe = NormProbe(path, model.parameters(), batch_size=32, every=3)
    for step in range(1, 8):
        optimizer.zero_grad()
        loss = loss_of(model, x, y)
        loss.backward()
        probe.record(step, loss=loss, lr=0.1, sub_batch=lambda: (loss_of(model, x[:4], y[:4]), 4))
        optimizer.step()
        with path.open() as f:  # flushed: readable while the probe is open
            assert len(list(csv.reader(f))) == step + 1
    probe.close()
    log = load_log(path)
    assert log.steps.tolist() == list(range(1, 8))
    assert log.batch is not None and (log.batch == 32).all()
    assert log.small_norm is not None and log.small_batch is not None
    measured = [i + 1 for i, v in enumerate(log.small_norm.tolist()) if not math.isnan(v)]
    assert measured == [3, 6]  # every 3rd step
    assert log.loss is not None and log.lr is not None and (log.lr == 0.1).all()
    with path.open() as f:
        assert next(csv.reader(f)) == list(LOG_HEADER)


def test_a_second_probe_appends_to_the_same_log(tmp_path: Path) -> None:
    model, x, y = small_model()
    loss_of(model, x, y).backward()
    path = tmp_path / "log.csv"
    with NormProbe(path, model.parameters()) as probe:
        probe.record(1)
    with NormProbe(path, model.parameters()) as probe:
        probe.record(2)
    assert load_log(path).steps.tolist() == [1, 2]
    other = tmp_path / "other.csv"
    other.write_text("a,b\n1,2\n")
    with pytest.raises(ValueError, match="already holds a log with other columns"):
        NormProbe(other, model.parameters())


def test_a_non_finite_norm_is_written_and_read_back_as_such(tmp_path: Path) -> None:
    weight = nn.Parameter(torch.ones(3))
    weight.grad = torch.tensor([1.0, math.inf, 0.0])
    path = tmp_path / "log.csv"
    with NormProbe(path, [weight]) as probe:
        assert probe.record(1).grad_norm == math.inf
        weight.grad = torch.tensor([math.nan, 0.0, 0.0])
        assert math.isnan(probe.record(2).grad_norm)
    log = load_log(path)
    assert log.nonfinite_steps == 2 and log.norm[0] == math.inf
