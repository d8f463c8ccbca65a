"""A slow, obviously correct reference for tests and benchmarks: per-example gradients from
torch.func (vmap over grad) of a plain functional model, clipped one example at a time.

Nothing in the engine uses this module; it shares no code with core.model's hand-written
backward or core.clipping.
"""

from __future__ import annotations

import math
from collections.abc import Callable

import torch
from torch.func import functional_call, grad, vmap

from core.model import Architecture


def module_for(arch: Architecture) -> torch.nn.Sequential:
    """A torch.nn model with the architecture's layers (names 0.weight, 2.weight, ...)."""
    act: dict[str, Callable[[], torch.nn.Module]] = {
        "tanh": torch.nn.Tanh,
        "relu": torch.nn.ReLU,
        "gelu": torch.nn.GELU,
    }
    layers: list[torch.nn.Module] = []
    for i, (fan_in, fan_out) in enumerate(zip(arch.sizes[:-1], arch.sizes[1:], strict=True)):
        layers.append(torch.nn.Linear(fan_in, fan_out))
        if i < arch.layers - 1:
            layers.append(act[arch.activation]())
    return torch.nn.Sequential(*layers)


def load_member(model: torch.nn.Sequential, params: list[torch.Tensor], member: int) -> None:
    """Copy one member's (out, in) weights and biases into the module."""
    linears = [m for m in model if isinstance(m, torch.nn.Linear)]
    with torch.no_grad():
        for i, layer in enumerate(linears):
            layer.weight.copy_(params[2 * i][member])
            layer.bias.copy_(params[2 * i + 1][member])


def example_loss(arch: Architecture, out: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
    """The loss of one example: cross-entropy, or squared error as in mse_loss."""
    if arch.classification:
        return torch.nn.functional.cross_entropy(out.unsqueeze(0), y.unsqueeze(0))
    return torch.nn.functional.mse_loss(out.squeeze(-1), y)


def per_example_grads(
    arch: Architecture, model: torch.nn.Sequential, x: torch.Tensor, y: torch.Tensor
) -> list[torch.Tensor]:
    """Gradients of each example's own loss, [(B, out, in), (B, out), ...] in layer order."""
    params = {k: v.detach() for k, v in model.named_parameters()}

    def loss_of(p: dict[str, torch.Tensor], xi: torch.Tensor, yi: torch.Tensor) -> torch.Tensor:
        return example_loss(arch, functional_call(model, p, (xi.unsqueeze(0),)).squeeze(0), yi)

    grads = vmap(grad(loss_of), in_dims=(None, 0, 0))(params, x, y)
    return [grads[name] for name in params]


def flat(grads: list[torch.Tensor]) -> torch.Tensor:
    """(B, P) from per-parameter per-example gradients."""
    return torch.cat([g.reshape(g.shape[0], -1) for g in grads], dim=1)


def clip_examples_by_norm(grads: list[torch.Tensor], threshold: float) -> torch.Tensor:
    """DP-SGD clipping, one example at a time: mean_i g_i * min(1, C / |g_i|), flat (P,)."""
    total = torch.zeros(flat(grads).shape[1], dtype=grads[0].dtype)
    rows = flat(grads)
    for i in range(rows.shape[0]):
        norm = float(rows[i].norm())
        total += rows[i] * min(1.0, threshold / norm if norm > 0 else math.inf)
    return total / rows.shape[0]


def clip_groups_by_norm(grads: list[torch.Tensor], threshold: float, group: int) -> torch.Tensor:
    """Mean of each group of `group` consecutive examples, clipped, then averaged, flat (P,)."""
    rows = flat(grads)
    groups = rows.shape[0] // group
    total = torch.zeros(rows.shape[1], dtype=rows.dtype)
    for g in range(groups):
        mean = rows[g * group : (g + 1) * group].mean(dim=0)
        norm = float(mean.norm())
        total += mean * min(1.0, threshold / norm if norm > 0 else math.inf)
    return total / groups


def clip_examples_by_unit(
    grads: list[torch.Tensor],
    weights: list[torch.Tensor],
    lam: float,
    eps: float,
    clipped_layers: int,
) -> torch.Tensor:
    """Each example's gradient clipped unit by unit by the AGC rule, then averaged, flat (P,).

    `weights` are one member's parameters in layer order; a unit is a row of a weight matrix or
    a whole bias vector (Brock et al. 2021, section 4).
    """
    batch = grads[0].shape[0]
    out = []
    for index, (g, w) in enumerate(zip(grads, weights, strict=True)):
        clipped = g.clone()
        if index < 2 * clipped_layers:
            for i in range(batch):
                units = [clipped[i]] if w.dim() == 1 else list(clipped[i])
                weight_units = [w] if w.dim() == 1 else list(w)
                for unit, weight_unit in zip(units, weight_units, strict=True):
                    limit = lam * max(float(weight_unit.norm()), eps)
                    norm = float(unit.norm())
                    if norm > limit:
                        unit.mul_(limit / norm)
        out.append(clipped.mean(dim=0).reshape(-1))
    return torch.cat(out)
