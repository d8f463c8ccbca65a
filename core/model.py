"""Stacks of K small models trained as one computation: parameters shaped (K, ...).

The backward pass is written out by hand so that each linear layer's inputs `a` and
output gradients `dz` are at hand: per-example gradient norms and re-weighted (clipped) sums
both come from them without materialising a per-example gradient.
"""

from __future__ import annotations

import math
import typing
from dataclasses import dataclass

import numpy as np
import torch

from core.scenario import Scenario


@dataclass(frozen=True)
class Architecture:
    sizes: tuple[int, ...]  # (inputs, hidden..., outputs)
    activation: str
    classification: bool
    linear: bool  # a single layer, parameters named weight/bias

    @property
    def layers(self) -> int:
        return len(self.sizes) - 1

    @property
    def param_names(self) -> tuple[str, ...]:
        if self.linear:
            return ("weight", "bias")
        return tuple(f"l{i}.{kind}" for i in range(self.layers) for kind in ("weight", "bias"))


def architecture(scenario: Scenario, dim: int) -> Architecture:
    """The model of a scenario for inputs of `dim` features."""
    out = scenario.data.classes if scenario.is_classification else 1
    hidden = scenario.model.hidden if scenario.model.kind == "mlp" else ()
    return Architecture(
        sizes=(dim, *hidden, out),
        activation=scenario.model.activation,
        classification=scenario.is_classification,
        linear=scenario.model.kind == "linear",
    )


@dataclass(frozen=True)
class ParamLayout:
    """Where each parameter lives in a member's flat parameter vector of size P."""

    shapes: tuple[tuple[int, ...], ...]

    @property
    def sizes(self) -> tuple[int, ...]:
        return tuple(math.prod(shape) for shape in self.shapes)

    @property
    def total(self) -> int:
        return sum(self.sizes)

    def views(self, flat: torch.Tensor) -> list[torch.Tensor]:
        """Per-parameter views (K, *shape) of a (K, P) tensor; they share its storage."""
        out, offset = [], 0
        for shape, size in zip(self.shapes, self.sizes, strict=True):
            out.append(flat[:, offset : offset + size].view(flat.shape[0], *shape))
            offset += size
        return out

    @staticmethod
    def flatten(tensors: list[torch.Tensor]) -> torch.Tensor:
        """(K, P) from per-parameter tensors (K, *shape)."""
        return torch.cat([t.reshape(t.shape[0], -1) for t in tensors], dim=1)


def param_layout(arch: Architecture) -> ParamLayout:
    shapes: list[tuple[int, ...]] = []
    for fan_in, fan_out in zip(arch.sizes[:-1], arch.sizes[1:], strict=True):
        shapes += [(fan_out, fan_in), (fan_out,)]
    return ParamLayout(tuple(shapes))


def bmm(a: torch.Tensor, b: torch.Tensor) -> torch.Tensor:
    """Batched a @ b, computed as (b^T a^T)^T when the result's last dimension is the thin one.

    Batched GEMM on CPU is several times slower when the output has few columns (a 64 -> 2 head,
    a gradient for 2 inputs); the transposed product has the same numbers, so each element of a
    member's result still depends on that member's operands alone.
    """
    if b.shape[-1] < a.shape[-2]:
        return torch.bmm(b.transpose(1, 2), a.transpose(1, 2)).transpose(1, 2)
    return torch.bmm(a, b)


def affine(
    bias: torch.Tensor, a: torch.Tensor, weight: torch.Tensor, scale: float = 1.0
) -> torch.Tensor:
    """scale (a @ W^T + b) for a (K, B, in), W (K, out, in), b (K, out): the layer's
    pre-activation, times `scale` inside the product (2 for tanh: exact, a power of two)."""
    if weight.shape[1] < a.shape[1]:
        return torch.baddbmm(
            bias.unsqueeze(2), weight, a.transpose(1, 2), beta=scale, alpha=scale
        ).transpose(1, 2)
    return torch.baddbmm(bias.unsqueeze(1), a, weight.transpose(1, 2), beta=scale, alpha=scale)


def init_params(arch: Architecture, seeds: list[int], dtype: torch.dtype) -> list[torch.Tensor]:
    """Parameters [W0, b0, W1, b1, ...], each (K, out, in) or (K, out), one member per seed.

    Each member draws U(-1/sqrt(in), 1/sqrt(in)) for weights and biases, the default of
    torch.nn.Linear, from its own seed, so a member's start does not depend on its stack.
    """
    per_member = []
    for seed in seeds:
        rng = np.random.default_rng(np.random.SeedSequence([seed, 0x696E6974]))
        tensors = []
        for fan_in, fan_out in zip(arch.sizes[:-1], arch.sizes[1:], strict=True):
            bound = 1.0 / math.sqrt(fan_in)
            tensors.append(rng.uniform(-bound, bound, size=(fan_out, fan_in)))
            tensors.append(rng.uniform(-bound, bound, size=(fan_out,)))
        per_member.append(tensors)
    return [
        torch.tensor(np.stack([m[i] for m in per_member]), dtype=dtype)
        for i in range(2 * arch.layers)
    ]


class Workspace:
    """Where a pass writes its hidden activations a_l and their gradients dz_{l-1}: one block
    per hidden width holds every such tensor of that width, so that their per-example squared
    norms take one reduction per block (`squares`) instead of one per tensor (for a 2-64-64-2
    model at B = 256, one reduction over a block of four 16 us against four of 12 us, measured).

    Each tensor is a (K, B, width) view of one row of its block, laid out as the layer's product
    would lay it out itself (see `affine` and `bmm`): examples innermost when width < B. The
    views, and those of the sums, are made once: a view costs as much as a small kernel.
    """

    def __init__(self, arch: Architecture, members: int, batch: int, dtype: torch.dtype) -> None:
        self.shape = (members, batch)
        hidden = arch.sizes[1:-1]  # the width of a_l (l = 1 .. L-1) and of dz_{l-1}
        count = {width: hidden.count(width) for width in hidden}
        # Per width: the block, the dimension its width runs along, its per-row sums (K, 2n, B)
        # and the rows of those sums that hold activations (the first n).
        self._blocks: list[tuple[torch.Tensor, int, torch.Tensor, torch.Tensor]] = []
        # width -> (block, its sums, whether the examples run innermost)
        where: dict[int, tuple[torch.Tensor, torch.Tensor, bool]] = {}
        for width, n in count.items():
            across = width < batch
            block = torch.empty(
                (members, 2 * n, width, batch) if across else (members, 2 * n, batch, width),
                dtype=dtype,
            )
            sums = torch.empty(members, 2 * n, batch, dtype=dtype)
            self._blocks.append((block, 2 if across else 3, sums, sums[:, :n]))
            where[width] = (block, sums, across)
        self.a: list[torch.Tensor | None] = [None] * arch.layers
        self.dz: list[torch.Tensor | None] = [None] * arch.layers
        self.factors: list[torch.Tensor | None] = [None] * arch.layers  # |a_l|^2 + 1
        self.squares_of_dz: list[torch.Tensor | None] = [None] * arch.layers  # |dz_l|^2
        taken = dict.fromkeys(count, 0)
        for layer, width in enumerate(hidden, start=1):
            (block, sums, across), n, row = where[width], count[width], taken[width]
            taken[width] += 1
            a, d = block[:, row], block[:, n + row]
            self.a[layer] = a.transpose(1, 2) if across else a
            self.dz[layer - 1] = d.transpose(1, 2) if across else d
            self.factors[layer] = sums[:, row]
            self.squares_of_dz[layer - 1] = sums[:, n + row]

    def squares(self) -> tuple[list[torch.Tensor | None], list[torch.Tensor | None]]:
        """Per example (K, B): |a_l|^2 + 1 of each hidden activation and |dz_l|^2 of each of
        their gradients, None for the tensors outside the blocks (the data, the output's
        gradient), once the pass has written them; valid until the next pass."""
        for block, dim, sums, activations in self._blocks:
            torch.linalg.vecdot(block, block, dim=dim, out=sums)
            activations.add_(1.0)
        return self.factors, self.squares_of_dz


def forward(
    arch: Architecture,
    params: list[torch.Tensor],
    x: torch.Tensor,
    into: Workspace | None = None,
) -> tuple[list[torch.Tensor], list[torch.Tensor]]:
    """Layer inputs a_l (K, B, in_l) and pre-activations z_l (K, B, out_l); z[-1] is the output.

    A tanh layer's entry holds 2 z_l, the argument of the sigmoid its tanh is made of (its
    backward needs only a_l); the other activations' entries hold z_l. With `into`, the hidden
    activations are written into its blocks.
    """
    inputs, pre = [], []
    # Shared inputs (validation data, (N, in)) go against every member without a copy.
    a = x.expand(params[0].shape[0], -1, -1) if x.dim() == 2 else x
    for layer in range(arch.layers):
        weight, bias = params[2 * layer], params[2 * layer + 1]
        inputs.append(a)
        hidden = layer < arch.layers - 1
        doubled = hidden and arch.activation == "tanh"
        z = affine(bias, a, weight, 2.0 if doubled else 1.0)
        pre.append(z)
        target = None if into is None or not hidden else into.a[layer + 1]
        if target is not None:
            a = _activate_into(arch.activation, z, target)
        elif doubled:
            a = tanh_of_doubled(z)
        elif hidden:
            a = torch.relu(z) if arch.activation == "relu" else torch.nn.functional.gelu(z)
    return inputs, pre


def tanh_of_doubled(doubled: torch.Tensor, out: torch.Tensor | None = None) -> torch.Tensor:
    """tanh(z) from 2z, as 2 sigmoid(2z) - 1: the same function, and on this build of torch for
    CPU about four times faster than torch.tanh (49 against 182 us on a (32, 32, 64) float32
    batch, measured); its error is at most 2e-7 in float32 and 4e-16 in float64, absolute.

    The doubling is left to the layer's product (`affine` with scale 2, exact), and -1 + 2 s is
    one fused multiply-add with the same rounding as (2 s) - 1, so the activation costs two
    passes over the batch instead of four.
    """
    s = torch.sigmoid(doubled) if out is None else torch.sigmoid(doubled, out=out)
    return torch.add(_MINUS_ONE, s, alpha=2.0, out=s)


_MINUS_ONE = torch.tensor(-1.0)


def tanh(z: torch.Tensor) -> torch.Tensor:
    """tanh(z) as 2 sigmoid(2z) - 1 (see `tanh_of_doubled`)."""
    return tanh_of_doubled(torch.mul(z, 2.0))


def _activation_backward(
    name: str, grad: torch.Tensor, z: torch.Tensor, a: torch.Tensor, out: torch.Tensor | None
) -> torch.Tensor:
    """grad * act'(z), given a = act(z), with the fused kernels autograd itself uses (into
    `out` when given)."""
    aten = torch.ops.aten
    args: tuple[torch.Tensor | float, ...]
    if name == "tanh":  # grad * (1 - a^2)
        args, kernel = (grad, a), aten.tanh_backward
    elif name == "relu":  # grad where a > 0
        args, kernel = (grad, a, 0.0), aten.threshold_backward
    else:  # exact GELU: Phi(z) + z phi(z)
        args, kernel = (grad, z), aten.gelu_backward
    result = kernel(*args) if out is None else kernel.grad_input(*args, grad_input=out)
    return typing.cast(torch.Tensor, result)


def example_losses(
    arch: Architecture, out: torch.Tensor, y: torch.Tensor
) -> tuple[torch.Tensor, torch.Tensor]:
    """Per-example loss (K, B) and its gradient with respect to the outputs (K, B, out).

    Cross-entropy for classification; squared error (y_hat - y)^2 for regression, as the
    per-example term of torch.nn.functional.mse_loss.
    """
    if arch.classification:
        log_p = torch.log_softmax(out, dim=-1)
        loss = -log_p.gather(-1, y.unsqueeze(-1)).squeeze(-1)
        d_out = torch.exp(log_p)
        d_out.scatter_add_(-1, y.unsqueeze(-1), torch.full_like(loss, -1.0).unsqueeze(-1))
        return loss, d_out
    residual = out.squeeze(-1) - y
    return residual * residual, (2.0 * residual).unsqueeze(-1)


def backward(
    arch: Architecture,
    params: list[torch.Tensor],
    inputs: list[torch.Tensor],
    pre: list[torch.Tensor],
    d_out: torch.Tensor,
    into: Workspace | None = None,
) -> list[torch.Tensor]:
    """Output gradients dz_l (K, B, out_l) of every layer, for each example's own loss; with
    `into`, those of the hidden layers are written into its blocks."""
    dz = [d_out]
    for layer in range(arch.layers - 1, 0, -1):
        weight = params[2 * layer]
        grad_a = bmm(dz[-1], weight)
        out = None if into is None else into.dz[layer - 1]
        dz.append(_activation_backward(arch.activation, grad_a, pre[layer - 1], inputs[layer], out))
    dz.reverse()
    return dz


class Evaluator:
    """Loss and accuracy (or R^2) of every member on one shared data set, e.g. validation.

    Validation activations are large (K x N x width); computing them into buffers kept from call
    to call avoids fresh multi-megabyte allocations, whose page faults cost as much as the maths.
    """

    def __init__(self, arch: Architecture, x: torch.Tensor, y: torch.Tensor, members: int) -> None:
        self.arch, self.y = arch, y
        self.x = x.expand(members, -1, -1)
        n = x.shape[0]
        self.pre = [torch.empty(members, n, width, dtype=x.dtype) for width in arch.sizes[1:]]
        self.post = [torch.empty(members, n, width, dtype=x.dtype) for width in arch.sizes[1:-1]]
        self.ss_tot = ((y - y.mean()) ** 2).sum() if not arch.classification else y.new_ones(())

    @torch.no_grad()
    def __call__(self, params: list[torch.Tensor]) -> tuple[torch.Tensor, torch.Tensor]:
        """Mean loss (K,) and accuracy or R^2 (K,)."""
        a = self.x
        for layer in range(self.arch.layers):
            weight, bias = params[2 * layer], params[2 * layer + 1]
            z = self.pre[layer]
            hidden = layer < self.arch.layers - 1
            scale = 2.0 if hidden and self.arch.activation == "tanh" else 1.0  # see forward
            torch.baddbmm(
                bias.unsqueeze(1), a, weight.transpose(1, 2), beta=scale, alpha=scale, out=z
            )
            if hidden:
                a = _activate_into(self.arch.activation, z, self.post[layer])
        out, y = self.pre[-1], self.y
        if self.arch.classification:
            loss = torch.nn.functional.cross_entropy(
                out.transpose(1, 2), y.expand(out.shape[0], -1), reduction="none"
            ).mean(dim=1)
            accuracy = (out.argmax(dim=-1) == y).to(out.dtype).mean(dim=1)
            return loss, accuracy
        residual = out.squeeze(-1) - y
        ss_res = (residual * residual).sum(dim=1)
        return ss_res / y.shape[0], 1.0 - ss_res / self.ss_tot


def _activate_into(name: str, z: torch.Tensor, out: torch.Tensor) -> torch.Tensor:
    if name == "tanh":
        return tanh_of_doubled(z, out=out)
    if name == "relu":
        return torch.clamp(z, min=0.0, out=out)
    return out.copy_(torch.nn.functional.gelu(z))


@torch.no_grad()
def evaluate(
    arch: Architecture, params: list[torch.Tensor], x: torch.Tensor, y: torch.Tensor
) -> tuple[torch.Tensor, torch.Tensor]:
    """Mean loss (K,) and accuracy or R^2 (K,) of every member on shared data."""
    return Evaluator(arch, x, y, params[0].shape[0])(params)
