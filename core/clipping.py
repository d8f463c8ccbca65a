"""Clipping methods, on a stack of members that share one method.

Per-example methods turn the layer inputs a and output gradients dz into weights on each
example (or each example's unit) so that the clipped gradient is the re-weighted sum
(dz * w)^T a. Batch-mean methods turn the mean gradient into coefficients that multiply it.
A batch-mean kernel returns the quantity its rule watches (the largest compared value of the
step); a per-example kernel returns every compared value, which adaptive rules follow (see
core/rules.py). Both give the share of compared items that were clipped.

core/methods.py names, per method, the kernel here that the engine calls: a batch-mean kernel
is `(BatchContext, level) -> (coefficient, watched, share)`, a per-example kernel is
`ExampleContext -> Compared`.

Shapes: k members of this method, B examples, layer l maps in_l -> out_l.
"""

from __future__ import annotations

import functools
import math
from collections.abc import Callable
from dataclasses import dataclass

import torch


@dataclass
class ExampleWeights:
    rows: list[torch.Tensor]  # per layer: (k, B, out_l) or (k, B, 1) weight on dz for W_l
    bias: list[torch.Tensor]  # per layer: (k, B) weight on dz for b_l
    clipped_share: torch.Tensor  # (k,)


class BatchContext:
    """What a batch-mean kernel may read: the mean gradient of k members and their weights.

    Per-parameter views and the members' weights are made on first use: global-norm and value
    never need them, and the step is short enough for their cost to show.
    """

    def __init__(
        self,
        flat: torch.Tensor,
        views: Callable[[], list[torch.Tensor]],
        params: Callable[[], list[torch.Tensor]],
        eps: float,
        clipped_layers: int,
    ) -> None:
        self.flat = flat  # (k, P) the mean gradient
        self._views, self._params = views, params
        self.eps = eps  # the members' [[clip]] eps (AGC floor)
        self.clipped_layers = clipped_layers  # layers a method that spares the head may clip

    @functools.cached_property
    def views(self) -> list[torch.Tensor]:
        """Per parameter (k, *shape), views of `flat`."""
        return self._views()

    @functools.cached_property
    def params(self) -> list[torch.Tensor]:
        """Per parameter (k, *shape), the members' weights."""
        return self._params()


@dataclass
class ExampleContext:
    """What a per-example kernel may read: layer inputs and output gradients of k members."""

    inputs: list[torch.Tensor]  # per layer (k, B, in)
    dz: list[torch.Tensor]  # per layer (k, B, out), of the reduced loss
    norms: torch.Tensor  # (k, B) each example's pre-clip gradient norm
    member_params: Callable[[], list[torch.Tensor]]  # made on first use, as for BatchContext
    unreduce: float  # undoes the loss reduction folded into dz (B for mean, 1 for sum)
    layers: int
    clipped_layers: int
    eps: float
    microbatch: int
    share: bool  # compute the clipped share (logged steps)

    @functools.cached_property
    def params(self) -> list[torch.Tensor]:
        """Per parameter (k, *shape), the members' weights."""
        return self.member_params()


@dataclass
class Compared:
    """A per-example kernel's answer: what it compares with the threshold, and the weights it
    gives for a threshold."""

    watch: Callable[[], torch.Tensor]  # (k, n): per example (or group) the compared size
    weigh: Callable[[torch.Tensor], ExampleWeights]  # level (k,) -> weights


Squares = tuple[list[torch.Tensor | None], list[torch.Tensor | None]]


def example_sq_norms(
    inputs: list[torch.Tensor],
    dz: list[torch.Tensor],
    scale: float = 1.0,
    first: torch.Tensor | None = None,
    known: Squares | None = None,
) -> torch.Tensor:
    """Per-example squared gradient norm (K, B), times `scale`: scale sum_l |dz_l|^2 (|a_l|^2 + 1).

    `first`, when given, is the first layer's factor scale (|a_0|^2 + 1) (K, B): its inputs are
    the data, so a caller can compute it once for the whole training set (`input_factor`).
    `known` holds factors |a_l|^2 + 1 and squares |dz_l|^2 already taken, None where not
    (`core.model.Workspace.squares`).
    """
    factors, squares = known if known is not None else ([None] * len(dz), [None] * len(dz))
    if first is None:
        first = input_factor(inputs[0], scale)
    total: torch.Tensor = torch.mul(_square(dz[0], squares[0]), first)
    for layer in range(1, len(dz)):
        factor = factors[layer]
        if factor is None:
            factor = torch.linalg.vecdot(inputs[layer], inputs[layer]).add_(1.0)
        total.addcmul_(_square(dz[layer], squares[layer]), factor, value=scale)
    return total


def _square(t: torch.Tensor, known: torch.Tensor | None) -> torch.Tensor:
    """|t|^2 per example of t (..., n), unless already `known`."""
    return torch.linalg.vecdot(t, t) if known is None else known


def input_factor(x: torch.Tensor, scale: float = 1.0) -> torch.Tensor:
    """scale (|x|^2 + 1) per example of x (..., in): the first layer's factor of the norms."""
    factor: torch.Tensor = torch.linalg.vecdot(x, x).add_(1.0)
    return factor if scale == 1.0 else factor.mul_(scale)


def _cap(threshold: torch.Tensor, norm: torch.Tensor) -> torch.Tensor:
    """min(1, threshold / norm), with a zero norm left alone."""
    return torch.clamp(threshold / norm, max=1.0)


def _share_over(values: torch.Tensor, threshold: torch.Tensor, wanted: bool) -> torch.Tensor:
    """Share of the values (k, n) above each member's threshold (k,); NaN when not wanted."""
    if not wanted:
        return torch.full_like(threshold, math.nan)
    return (values > threshold[:, None]).to(values.dtype).mean(dim=1)


def example_norm(
    norms: torch.Tensor, threshold: torch.Tensor, layers: int, share: bool = True
) -> ExampleWeights:
    """DP-SGD style: g_i <- g_i * min(1, C / |g_i|). norms (k, B), threshold (k,)."""
    scale = _cap(threshold[:, None], norms)  # (k, B)
    rows = scale.unsqueeze(-1)
    return ExampleWeights([rows] * layers, [scale] * layers, _share_over(norms, threshold, share))


def microbatch_group_norms(
    inputs: list[torch.Tensor], dz: list[torch.Tensor], group: int
) -> torch.Tensor:
    """Norm of each group's mean gradient (k, B / group), groups of consecutive examples."""
    k, batch = dz[0].shape[:2]
    groups = batch // group
    total = torch.zeros(k, groups, dtype=dz[0].dtype)
    for a, d in zip(inputs, dz, strict=True):
        d_g = d.reshape(k * groups, group, d.shape[-1])
        a_g = a.reshape(k * groups, group, a.shape[-1])
        bias_sum = d_g.sum(dim=1)  # (k * groups, out)
        sq = (bias_sum * bias_sum).sum(-1)
        if group * (d.shape[-1] + a.shape[-1]) < d.shape[-1] * a.shape[-1]:
            # Gram form: |sum_i dz_i a_i^T|^2 = sum_ij (dz_i.dz_j)(a_i.a_j), no (out, in) blocks.
            gram = torch.bmm(d_g, d_g.transpose(1, 2)) * torch.bmm(a_g, a_g.transpose(1, 2))
            sq = sq + gram.sum(dim=(1, 2))
        else:
            weight_sum = torch.bmm(d_g.transpose(1, 2), a_g)  # (k * groups, out, in)
            sq = sq + (weight_sum * weight_sum).sum(dim=(1, 2))
        total = total + sq.reshape(k, groups)
    return torch.sqrt(total) / group


def microbatch_norm(
    group_norms: torch.Tensor, threshold: torch.Tensor, group: int, layers: int, share: bool = True
) -> ExampleWeights:
    """Clip each group's mean gradient to the threshold; every example takes its group's scale."""
    scale = _cap(threshold[:, None], group_norms).repeat_interleave(group, dim=1)  # (k, B)
    clipped = _share_over(group_norms, threshold, share)
    return ExampleWeights([scale.unsqueeze(-1)] * layers, [scale] * layers, clipped)


def unit_ratios(
    inputs: list[torch.Tensor],
    dz: list[torch.Tensor],
    params: list[torch.Tensor],
    eps: float,
    clipped_layers: int,
    scale: float = 1.0,
) -> tuple[list[torch.Tensor], list[torch.Tensor], list[torch.Tensor], list[torch.Tensor]]:
    """Per-example unit gradient norms and AGC floors of the clipped layers.

    Returns, per layer: row norms |dz_ij| |a_i| (k, B, out), bias norms |dz_i| (k, B),
    row floors max(|W_j|, eps) (k, 1, out) and bias floors max(|b|, eps) (k, 1); `scale`
    undoes a factor already folded into dz.
    """
    rows, bias, row_floor, bias_floor = [], [], [], []
    for layer in range(clipped_layers):
        a, d = inputs[layer], dz[layer]
        weight, b = params[2 * layer], params[2 * layer + 1]
        rows.append(d.abs() * (a.norm(dim=-1, keepdim=True) * scale))
        bias.append(d.norm(dim=-1) * scale)
        row_floor.append(torch.clamp(weight.norm(dim=-1), min=eps).unsqueeze(1))
        bias_floor.append(torch.clamp(b.norm(dim=-1, keepdim=True), min=eps))
    return rows, bias, row_floor, bias_floor


def example_agc(
    ratios: tuple[list[torch.Tensor], list[torch.Tensor], list[torch.Tensor], list[torch.Tensor]],
    lam: torch.Tensor,
    layers: int,
) -> ExampleWeights:
    """AGC applied to each example's gradient unit by unit; unclipped layers keep weight 1."""
    rows, bias, row_floor, bias_floor = ratios
    k, batch = bias[0].shape if bias else (lam.shape[0], 1)
    one = torch.ones(k, batch, 1, dtype=lam.dtype)
    row_w, bias_w = [], []
    clipped = torch.zeros_like(lam)
    units = 0
    for layer in range(layers):
        if layer >= len(rows):
            row_w.append(one)
            bias_w.append(one[..., 0])
            continue
        row_limit = lam[:, None, None] * row_floor[layer]  # (k, 1, out)
        bias_limit = lam[:, None] * bias_floor[layer]  # (k, 1)
        row_w.append(_cap(row_limit, rows[layer]))
        bias_w.append(_cap(bias_limit, bias[layer]))
        clipped = clipped + (rows[layer] > row_limit).sum(dim=(1, 2))
        clipped = clipped + (bias[layer] > bias_limit).sum(dim=1)
        units += batch * (rows[layer].shape[-1] + 1)
    return ExampleWeights(row_w, bias_w, clipped / max(units, 1))


# ---------------------------------------------------------------------------------------------
# Batch-mean methods: a coefficient, broadcastable to the flat mean gradient (k, P), multiplies
# it. Each takes the flat gradient or its per-parameter views (k, *shape).

BatchResult = tuple[torch.Tensor, torch.Tensor, torch.Tensor]  # coefficient, watched, share


def global_norm(flat: torch.Tensor, threshold: torch.Tensor) -> BatchResult:
    """g <- g * min(1, t / |g|) over all parameters at once."""
    norm = torch.linalg.vector_norm(flat, dim=1)
    return _cap(threshold, norm).unsqueeze(1), norm, (norm > threshold).to(norm.dtype)


def value(flat: torch.Tensor, threshold: torch.Tensor) -> BatchResult:
    """Each coordinate clamped to [-t, t]; the coefficient is clamp(g) / g (1 where |g| <= t)."""
    size = flat.abs()
    t = threshold.unsqueeze(1)
    over = size > t
    coef = torch.where(over, t / size, 1.0)
    return coef, size.amax(dim=1), over.to(flat.dtype).mean(dim=1)


def tensor_norm(views: list[torch.Tensor], threshold: torch.Tensor) -> BatchResult:
    """Each parameter tensor rescaled by its own norm."""
    norms = torch.stack([torch.linalg.vector_norm(v.flatten(1), dim=1) for v in views])  # (T, k)
    caps = _cap(threshold, norms)
    coef = torch.cat(
        [c[:, None].expand(-1, v[0].numel()) for c, v in zip(caps, views, strict=True)], 1
    )
    return coef, norms.amax(dim=0), (norms > threshold).to(norms.dtype).mean(dim=0)


def unit_agc(
    views: list[torch.Tensor],
    params: list[torch.Tensor],
    lam: torch.Tensor,
    eps: float,
    clipped_layers: int,
) -> BatchResult:
    """AGC on the mean gradient: a unit is a row of W (k, out, in) or a whole bias vector."""
    coefs = [torch.ones_like(v) for v in views]
    ratios, clipped, units = [], torch.zeros_like(lam), 0
    for index in range(2 * clipped_layers):
        g, w = views[index], params[index]
        floor = torch.clamp(w.norm(dim=-1, keepdim=True), min=eps)  # rows (k, out, 1); bias (k, 1)
        grad_norm = g.norm(dim=-1, keepdim=True)
        limit = lam.reshape(-1, *([1] * (g.dim() - 1))) * floor
        coefs[index] = _cap(limit, grad_norm).expand_as(g)
        ratios.append((grad_norm / floor).flatten(1).amax(1))
        clipped = clipped + (grad_norm > limit).flatten(1).sum(1)
        units += grad_norm[0].numel()
    if not ratios:
        return torch.ones_like(lam[:, None]), torch.zeros_like(lam), torch.zeros_like(lam)
    coef = torch.cat([c.reshape(c.shape[0], -1) for c in coefs], dim=1)
    return coef, torch.stack(ratios).amax(dim=0), clipped / units


# ---------------------------------------------------------------------------------------------
# Kernels named in core/methods.py


def global_norm_kernel(ctx: BatchContext, level: torch.Tensor) -> BatchResult:
    return global_norm(ctx.flat, level)


def value_kernel(ctx: BatchContext, level: torch.Tensor) -> BatchResult:
    return value(ctx.flat, level)


def tensor_norm_kernel(ctx: BatchContext, level: torch.Tensor) -> BatchResult:
    return tensor_norm(ctx.views, level)


def unit_agc_kernel(ctx: BatchContext, level: torch.Tensor) -> BatchResult:
    return unit_agc(ctx.views, ctx.params, level, ctx.eps, ctx.clipped_layers)


def example_norm_kernel(ctx: ExampleContext) -> Compared:
    return Compared(
        watch=lambda: ctx.norms,
        weigh=lambda level: example_norm(ctx.norms, level, ctx.layers, ctx.share),
    )


def microbatch_norm_kernel(ctx: ExampleContext) -> Compared:
    group_norms = microbatch_group_norms(ctx.inputs, ctx.dz, ctx.microbatch) * ctx.unreduce
    return Compared(
        watch=lambda: group_norms,
        weigh=lambda level: microbatch_norm(
            group_norms, level, ctx.microbatch, ctx.layers, ctx.share
        ),
    )


def example_agc_kernel(ctx: ExampleContext) -> Compared:
    ratios = unit_ratios(ctx.inputs, ctx.dz, ctx.params, ctx.eps, ctx.clipped_layers, ctx.unreduce)

    def watch() -> torch.Tensor:
        """Each example's largest unit ratio (k, B); zeros when no layer is clipped."""
        rows, bias, row_floor, bias_floor = ratios
        if not rows:
            return torch.zeros_like(ctx.norms)
        worst = [torch.amax(r / f, dim=2) for r, f in zip(rows, row_floor, strict=True)]
        worst += [b / f for b, f in zip(bias, bias_floor, strict=True)]
        return torch.stack(worst).amax(dim=0)

    return Compared(watch=watch, weigh=lambda level: example_agc(ratios, level, ctx.layers))
