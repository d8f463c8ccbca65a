"""The training engine: K members of one batch size trained together, yielding step records.

One gradient pass serves every member: a forward and a hand-written backward give each
layer's inputs a (K, B, in) and output gradients dz (K, B, out); per-example methods weight the
examples, the clipped gradient is the re-weighted sum (dz * w)^T a, and batch-mean methods
then rescale that mean. Members that share a seed share their batches and their start.
"""

from __future__ import annotations

import dataclasses
import functools
import math
from collections.abc import Iterator
from dataclasses import dataclass, field

import numpy as np
import torch

from core import clipping
from core.data import Dataset, build_dataset
from core.member import (
    KEPT_AFTER_DIVERGING,
    Member,
    StepRecord,
    metric_names,
    run_members,
)
from core.methods import MethodSpec
from core.model import (
    Architecture,
    Evaluator,
    ParamLayout,
    Workspace,
    architecture,
    backward,
    bmm,
    example_losses,
    forward,
    init_params,
    param_layout,
)
from core.rules import FixedRule, Rule, make_rule
from core.sampler import plan_batches
from core.scenario import ClipConfig, Scenario, resolve_clip

__all__ = [
    "Engine",
    "Member",
    "StackPass",
    "StepRecord",
    "init_seed",
    "metric_names",
    "run_members",
]

# A member whose clean batch loss exceeds this multiple of its starting validation loss (or 1,
# whichever is larger) has diverged, as has one whose loss or gradient is not finite.
EXPLODE_FACTOR = 1e4
# Exponential weight of the running estimates behind noise_scale, per logged step.
NOISE_SCALE_ALPHA = 0.95
# The split statistics an engine with outlier_steps=True averages over every outlier step.
OUTLIER_MEANS = ("outlier_share", "outlier_pass")


@dataclass
class _Group:
    """Members that share a method and its structural settings."""

    method: str
    spec: MethodSpec
    positions: list[int]
    index: torch.Tensor
    clips: list[ClipConfig]
    thresholds: torch.Tensor
    rules: list[Rule]
    eps: float
    microbatch: int
    adaptive: bool = field(init=False)

    stack_size: int = 0
    whole: bool = field(init=False)  # the group is the whole stack, in order

    def __post_init__(self) -> None:
        self.adaptive = not all(isinstance(r, FixedRule) for r in self.rules)
        self.unwatched = torch.full_like(self.thresholds, math.nan)  # when nothing watches
        self.whole = self.positions == list(range(self.stack_size))

    def take(self, tensor: torch.Tensor) -> torch.Tensor:
        """The group's rows of a stack-shaped tensor."""
        return tensor if self.whole else tensor[self.index]

    def put(self, tensor: torch.Tensor, rows: torch.Tensor) -> torch.Tensor:
        """`tensor` with the group's rows replaced (in place unless the group is the stack)."""
        if self.whole:
            return (
                rows
                if tensor.numel() == 0 or rows.shape == tensor.shape
                else rows.expand_as(tensor)
            )
        tensor[self.index] = rows
        return tensor

    def levels(self, watched: torch.Tensor) -> torch.Tensor:
        """This step's thresholds for the group, given its watched quantity (k,)."""
        if not self.adaptive:
            return self.thresholds
        values = watched.tolist()
        return torch.tensor(
            [r.level(v) for r, v in zip(self.rules, values, strict=True)], dtype=watched.dtype
        )

    def example_levels(self, values: torch.Tensor) -> torch.Tensor:
        """This step's thresholds for a per-example group, given every compared value (k, n)."""
        if not self.adaptive:
            return self.thresholds
        rows = values.double().numpy()
        return torch.tensor(
            [r.level_of_examples(row) for r, row in zip(self.rules, rows, strict=True)],
            dtype=values.dtype,
        )


@dataclass
class PassResult:
    """Everything one gradient pass produced for the stack."""

    grads: torch.Tensor  # (K, P) the clipped mean gradient, noise included
    loss: torch.Tensor  # (K, B) per-example loss
    norms: torch.Tensor | None  # (K, B) pre-clip per-example gradient norms, when computed
    watched: torch.Tensor  # (K,) the quantity each member's rule watched
    levels: torch.Tensor  # (K,) the threshold applied (inf: none)
    clipped_share: torch.Tensor  # (K,)
    skip: torch.Tensor  # (K,) bool, a spike dropped under on_spike = "skip"
    detail: dict[str, torch.Tensor] | None = None  # logged steps: split statistics


class StackPass:
    """The gradient pass of a stack: per-example statistics, clipping, noise."""

    def __init__(
        self,
        arch: Architecture,
        members: list[Member],
        reduction: str,
        exclude_head: bool,
        dtype: torch.dtype,
    ) -> None:
        self.arch = arch
        self.layout = param_layout(arch)
        self.members = members
        self.reduction = reduction
        self.dtype = dtype
        self.clipped_layers = arch.layers - 1 if exclude_head else arch.layers
        self.groups: list[_Group] = []
        keyed: dict[tuple[str, float, int], list[int]] = {}
        for i, m in enumerate(members):
            if m.method == "none":
                continue
            options = m.clip.spec.options
            eps = m.clip.eps if "eps" in options else 0.0
            group = m.clip.microbatch if "microbatch" in options else 0
            keyed.setdefault((m.method, eps, group), []).append(i)
        for (method, eps, group), positions in keyed.items():
            clips = [members[i].clip for i in positions]
            self.groups.append(
                _Group(
                    method=method,
                    spec=clips[0].spec,
                    positions=positions,
                    index=torch.tensor(positions, dtype=torch.long),
                    clips=clips,
                    thresholds=torch.tensor([c.threshold for c in clips], dtype=dtype),
                    rules=[make_rule(c) for c in clips],
                    eps=eps,
                    microbatch=group,
                    stack_size=len(members),
                )
            )
        self.want_norms = False  # set by an engine that traces per-example norms
        # Set by an engine whose data holds non-finite values; then per-example methods check
        # every batch for examples to drop (finite data cannot make a finite model's norm inf).
        self.data_nonfinite = True
        self.per_example = torch.tensor([m.clip.spec.per_example for m in members])
        self.any_per_example = bool(self.per_example.any())
        # A single group over the whole stack with one weight per example: the weighted dz of
        # the weight rows serves the bias too.
        self.scalar_weights = (
            len(self.groups) == 1 and self.groups[0].whole and self.groups[0].spec.one_weight
        )
        self.skips = torch.tensor([m.clip.on_spike == "skip" for m in members])
        self.any_skip = bool(self.skips.any())
        self.no_skip = torch.zeros(len(members), dtype=torch.bool)
        self._empty = torch.empty(0, dtype=dtype)
        self._buffer: tuple[torch.Tensor, list[torch.Tensor]] | None = None
        self._space: Workspace | None = None
        # Set by an engine, whose steps use their gradient up within the step: one buffer then
        # serves every step. Off for a caller that may keep PassResult.grads of several passes.
        self.reuse_buffer = False
        self.skip_factor = torch.tensor([m.clip.skip_factor for m in members], dtype=dtype)
        self.noisy = [i for i, m in enumerate(members) if m.clip.noise_multiplier > 0]
        self.noise_generators = {
            i: torch.Generator().manual_seed(int(members[i].seed) * 7919 + 1) for i in self.noisy
        }

    @torch.no_grad()
    def run(
        self,
        params: list[torch.Tensor],
        x: torch.Tensor,
        y: torch.Tensor,
        outlier: torch.Tensor,
        detail: bool,
        split: bool = False,
        has_outlier: bool | None = None,
        first: torch.Tensor | None = None,
    ) -> PassResult:
        """One pass: x (K, B, in), y (K, B), outlier (K, B) bool; params are (K, ...) views.

        `detail` adds every statistic of a logged step; `split` alone adds only the outlier
        share and pass-through (cheap: the outlier examples are gathered, not masked).
        `has_outlier`, when the caller knows it, is whether the batch holds any outlier.
        `first`, when the caller has it, is the batch's rows of `input_factor` (K, B), used
        when the pass takes per-example norms (`takes_norms`).
        """
        if has_outlier is None:
            has_outlier = bool(outlier.any())
        arch = self.arch
        K, B = x.shape[:2]
        # dz is taken of the reduced loss (mean or sum), so plain sums of dz^T a are the batch
        # gradient; per-example quantities divide the reduction out again.
        reduce = 1.0 / B if self.reduction == "mean" else 1.0
        # Every pass writes into a workspace, whether or not it takes norms, so that a step's
        # arithmetic never depends on whether it is logged.
        space = self._workspace(K, B)
        inputs, pre = forward(arch, params, x, space)
        loss, d_out = example_losses(arch, pre[-1], y)
        dz = backward(arch, params, inputs, pre, d_out * reduce, space)
        sq: torch.Tensor | None = None
        raw_norms = norms = None
        if self.takes_norms(detail):
            sq = clipping.example_sq_norms(inputs, dz, 1.0 / reduce**2, first, space.squares())
            if detail:
                raw_norms = norms = torch.sqrt(sq)
            else:  # nothing after reads the squares: the norms take their place
                raw_norms = norms = sq.sqrt_()
                sq = None
        # Between logged steps a stack of batch-mean methods never looks at per-example norms.

        maybe_nonfinite = self.data_nonfinite and self.any_per_example
        dropped: torch.Tensor | None = None  # (K, B) examples dropped as non-finite
        if norms is not None and maybe_nonfinite and not bool(torch.isfinite(norms).all()):
            # Per-example methods drop an example whose gradient is not finite (its norm is
            # above any threshold); batch-mean methods see the non-finite mean, as in practice.
            keep = (torch.isfinite(norms) | ~self.per_example[:, None]).unsqueeze(-1)
            dropped = ~keep.squeeze(-1)
            inputs = [torch.where(keep, a, 0.0) for a in inputs]
            dz = [torch.where(keep, d, 0.0) for d in dz]
            norms = torch.where(keep.squeeze(-1), norms, 0.0)

        watched = self.blank(K, math.nan)
        levels = self.blank(K, math.inf)
        share = self.blank(K, 0.0)
        rows_w: list[torch.Tensor] | None = None
        bias_w: list[torch.Tensor] | None = None
        batch_groups = []
        applied: list[tuple[_Group, torch.Tensor]] = []  # each group's level on this step
        for g in self.groups:
            if not g.spec.per_example:
                batch_groups.append(g)
                continue
            if rows_w is None or bias_w is None:
                if len(self.groups) == 1 and g.whole:  # the group's weights are all there is
                    rows_w = [self._empty] * arch.layers
                    bias_w = [self._empty] * arch.layers
                else:
                    rows_w = [torch.ones_like(d) for d in dz]
                    bias_w = [torch.ones_like(d[..., 0]) for d in dz]
            sub_inputs = [g.take(a) for a in inputs]
            sub_dz = [g.take(d) for d in dz]
            assert norms is not None  # computed whenever a per-example method is present
            weights, seen, level = self._example_weights(
                g,
                sub_inputs,
                sub_dz,
                g.take(norms),
                params,
                1.0 / reduce,
                detail,
                None if dropped is None else g.take(dropped),
            )
            watched, levels = g.put(watched, seen), g.put(levels, level)
            share = g.put(share, weights.clipped_share)
            applied.append((g, level))
            for layer in range(arch.layers):
                rows = weights.rows[layer]
                rows_w[layer] = g.put(
                    rows_w[layer], rows if g.whole else rows.expand_as(sub_dz[layer])
                )
                bias_w[layer] = g.put(bias_w[layer], weights.bias[layer])

        # The applied gradient is the same sum whether the step is logged or not, so logging
        # never changes a trajectory; logged steps add the clean and outlier parts beside it.
        into = self._flat_buffer(K) if self.reuse_buffer else None
        flat = self._gradient_sum(inputs, dz, rows_w, bias_w, into=into)
        light = split and not detail and has_outlier
        parts = None
        if detail or light:
            # A copy: batch-mean clipping below scales `flat` in place.
            parts = self._parts(
                inputs, dz, rows_w, bias_w, outlier, flat.clone(), detail, has_outlier
            )

        coef_all = torch.ones_like(flat) if parts is not None else None
        for g in batch_groups:
            sub = g.take(flat)
            level = g.thresholds
            if g.adaptive:
                unclipped = torch.full_like(g.thresholds, math.inf)
                level = g.levels(self._batch_coefs(g, sub, params, unclipped)[1])
            coef, seen, clipped = self._batch_coefs(g, sub, params, level)
            applied.append((g, level))
            watched, levels, share = (
                g.put(watched, seen),
                g.put(levels, level),
                g.put(share, clipped),
            )
            flat = flat.mul_(coef) if g.whole else g.put(flat, sub * coef)
            if coef_all is not None:
                coef_all = g.put(coef_all, coef.expand_as(sub))

        detail_stats = None
        if parts is not None and coef_all is not None:
            if detail:
                assert norms is not None and sq is not None and parts[2] is not None
                without = self._without_outliers(
                    inputs, dz, norms, params, outlier, parts[2], applied, reduce
                )
                detail_stats = self._detail(flat, parts, coef_all, sq, outlier, without)
            else:
                detail_stats = self._outlier_detail(parts, coef_all, outlier)

        if self.noisy:
            flat = flat.clone()
            for i in self.noisy:
                # DP-SGD: N(0, sigma^2 C^2) on the clipped sum, so sigma * C * reduce on the mean.
                sigma = self.members[i].clip.noise_multiplier * float(levels[i]) * reduce
                noise = torch.randn(
                    flat.shape[1], generator=self.noise_generators[i], dtype=self.dtype
                )
                flat[i] += sigma * noise

        skip = self.no_skip
        if self.any_skip:
            skip = self.skips & ~(watched <= self.skip_factor * levels)
        return PassResult(flat, loss, raw_norms, watched, levels, share, skip, detail_stats)

    def takes_norms(self, detail: bool) -> bool:
        """Whether a pass takes per-example norms: for per-example methods, on logged steps and
        for an engine that traces them; between logged steps batch-mean methods never look."""
        return self.any_per_example or detail or self.want_norms

    def input_factor(self, x: torch.Tensor, batch: int) -> torch.Tensor:
        """The first layer's factor of the per-example squared norms, for each example of x
        (N, in) in batches of `batch`: it depends on the data alone, so an engine takes it once."""
        reduce = 1.0 / batch if self.reduction == "mean" else 1.0
        return clipping.input_factor(x, 1.0 / reduce**2)

    def _workspace(self, K: int, B: int) -> Workspace:
        """The blocks a pass writes its hidden tensors into: made once under `reuse_buffer`."""
        space = self._space
        if space is None or space.shape != (K, B) or not self.reuse_buffer:
            space = self._space = Workspace(self.arch, K, B, self.dtype)
        return space

    def _flat_buffer(self, K: int) -> tuple[torch.Tensor, list[torch.Tensor]]:
        """The step's flat gradient buffer (K, P) and its views, made once (`reuse_buffer`)."""
        buffer = self._buffer
        if buffer is None or buffer[0].shape[0] != K:
            flat = torch.empty(K, self.layout.total, dtype=self.dtype)
            buffer = self._buffer = (flat, self.layout.views(flat))
        return buffer

    def blank(self, K: int, fill: float) -> torch.Tensor:
        """A per-member buffer; empty when one group spans the stack and will replace it."""
        if len(self.groups) == 1 and self.groups[0].whole:
            return self._empty
        return torch.full((K,), fill, dtype=self.dtype)

    def _example_weights(
        self,
        g: _Group,
        inputs: list[torch.Tensor],
        dz: list[torch.Tensor],
        norms: torch.Tensor,
        params: list[torch.Tensor],
        unreduce: float,
        detail: bool,
        dropped: torch.Tensor | None = None,
    ) -> tuple[clipping.ExampleWeights, torch.Tensor, torch.Tensor]:
        context = clipping.ExampleContext(
            inputs=inputs,
            dz=dz,
            norms=norms,
            member_params=lambda: [g.take(p) for p in params],
            unreduce=unreduce,
            layers=self.arch.layers,
            clipped_layers=self.clipped_layers,
            eps=g.eps,
            microbatch=g.microbatch,
            share=detail,
        )
        compared: clipping.Compared = g.spec.function()(context)
        # Adaptive rules follow every compared value; spike skipping watches the largest.
        # Neither is computed when nothing needs it.
        seen, level = g.unwatched, g.thresholds
        if g.adaptive or self.any_skip:
            values = compared.watch()
            seen = values.amax(dim=1)
            if g.adaptive:
                if dropped is not None:  # a dropped example's zeroed value is no measurement
                    k, n = values.shape
                    gone = dropped.reshape(k, n, -1).any(dim=2)
                    values = torch.where(gone, math.nan, values)
                level = g.example_levels(values)
        return compared.weigh(level), seen, level

    def _batch_coefs(
        self, g: _Group, flat: torch.Tensor, params: list[torch.Tensor], level: torch.Tensor
    ) -> clipping.BatchResult:
        context = clipping.BatchContext(
            flat,
            views=lambda: self.layout.views(flat),
            params=lambda: [g.take(p) for p in params],
            eps=g.eps,
            clipped_layers=self.clipped_layers,
        )
        result: clipping.BatchResult = g.spec.function()(context, level)
        return result

    def _parts(
        self,
        inputs: list[torch.Tensor],
        dz: list[torch.Tensor],
        rows_w: list[torch.Tensor] | None,
        bias_w: list[torch.Tensor] | None,
        outlier: torch.Tensor,
        weighted_sum: torch.Tensor,
        plain: bool,
        has_outlier: bool,
    ) -> list[torch.Tensor | None]:
        """(clean weighted, outlier weighted, clean plain, outlier plain, whole plain) flat
        (K, P) parts of the batch gradient before batch-mean clipping; the plain sums only when
        `plain`. The whole plain sum is the very tensor batch-mean clipping compares, so the
        logged pre-clip norm is the norm the clipping decision saw.

        The outliers are few, so their parts are sums over the gathered outlier examples and
        the clean parts are the whole sums less them. Non-finite outlier parts would make that
        difference NaN; then the masked split below is used.
        """
        weighted = rows_w is not None and bias_w is not None
        whole_plain = None
        if plain:
            whole_plain = self._gradient_sum(inputs, dz, None, None) if weighted else weighted_sum
        if not has_outlier:
            zeros = torch.zeros_like(weighted_sum)
            return [weighted_sum, zeros, whole_plain, zeros, whole_plain]
        out_w, out_u = self._outlier_sums(inputs, dz, rows_w, bias_w, outlier)
        # Finite data cannot make a finite model's outlier parts non-finite.
        if self.data_nonfinite and not (
            bool(torch.isfinite(out_w).all()) and bool(torch.isfinite(out_u).all())
        ):
            return [*self._split_sums(inputs, dz, rows_w, bias_w, outlier), whole_plain]
        clean_plain = None if whole_plain is None else whole_plain - out_u
        return [weighted_sum - out_w, out_w, clean_plain, out_u, whole_plain]

    def _outlier_sums(
        self,
        inputs: list[torch.Tensor],
        dz: list[torch.Tensor],
        rows_w: list[torch.Tensor] | None,
        bias_w: list[torch.Tensor] | None,
        outlier: torch.Tensor,
    ) -> tuple[torch.Tensor, torch.Tensor]:
        """Weighted and plain flat sums (K, P) over each member's outlier examples alone."""
        K = outlier.shape[0]
        member, position = torch.nonzero(outlier, as_tuple=True)  # (n,) each: the outliers

        def pick(t: torch.Tensor) -> torch.Tensor:
            picked = t.expand(K, *t.shape[1:])[member, position]
            return picked.unsqueeze(-1) if picked.dim() == 1 else picked  # (n, width)

        def per_member(values: torch.Tensor) -> torch.Tensor:
            """Sum the outliers' rows (n, ...) into their members' (K, ...)."""
            return values.new_zeros(K, *values.shape[1:]).index_add_(0, member, values)

        weighted = rows_w is not None and bias_w is not None
        parts: list[list[torch.Tensor]] = [[], []]
        for layer, (a, d) in enumerate(zip(inputs, dz, strict=True)):
            a_o, d_o = pick(a), pick(d)
            kinds = [(d_o, d_o)]
            if weighted:  # without per-example weights the weighted part is the plain one
                assert rows_w is not None and bias_w is not None
                d_w_rows = d_o * pick(rows_w[layer])
                d_w_bias = d_w_rows if self.scalar_weights else d_o * pick(bias_w[layer])
                kinds.insert(0, (d_w_rows, d_w_bias))
            for kind, (d_rows, d_bias) in enumerate(kinds):
                outer = d_rows.unsqueeze(2) * a_o.unsqueeze(1)  # (n, out, in)
                parts[kind].append(per_member(outer).flatten(1))
                parts[kind].append(per_member(d_bias))
        plain = torch.cat(parts[0], dim=1)
        return (plain, plain) if not weighted else (plain, torch.cat(parts[1], dim=1))

    def _split_sums(
        self,
        inputs: list[torch.Tensor],
        dz: list[torch.Tensor],
        rows_w: list[torch.Tensor] | None,
        bias_w: list[torch.Tensor] | None,
        outlier: torch.Tensor,
    ) -> list[torch.Tensor]:
        """Four flat (K, P) parts of the weighted batch gradient, masked example by example.

        The parts are (clean weighted, outlier weighted, clean plain, outlier plain). They are
        split with torch.where, not by multiplying with a 0/1 mask, so that an outlier with an
        infinite input cannot turn the clean part into NaN.
        """
        weighted = rows_w is not None and bias_w is not None
        split = bool(outlier.any())
        sides = ((~outlier).unsqueeze(-1), outlier.unsqueeze(-1)) if split else (None,)
        # pieces[side][kind]: kind 0 weighted, 1 plain (only when weights exist)
        pieces: list[list[list[torch.Tensor]]] = [[[], []] for _ in sides]
        for layer, (a, d) in enumerate(zip(inputs, dz, strict=True)):
            rows, bias = [d], [d]
            if weighted:
                assert rows_w is not None and bias_w is not None
                weighted_d = d * rows_w[layer]
                rows.insert(0, weighted_d)
                # One weight per example (example-norm, microbatch-norm): rows and bias share it.
                shared = self.scalar_weights
                bias.insert(0, weighted_d if shared else d * bias_w[layer].unsqueeze(-1))
            out = d.shape[-1]
            for side, mask in enumerate(sides):
                d_rows = torch.cat(rows, dim=-1) if len(rows) > 1 else rows[0]  # (K, B, n out)
                d_bias = torch.cat(bias, dim=-1) if len(bias) > 1 else bias[0]
                a_side = a
                if mask is not None:
                    a_side = torch.where(mask, a, 0.0)
                    d_rows, d_bias = torch.where(mask, d_rows, 0.0), torch.where(mask, d_bias, 0.0)
                weight_sum = bmm(d_rows.transpose(1, 2), a_side)  # (K, n out, in)
                bias_sum = d_bias.sum(dim=1)
                for kind in range(len(rows)):
                    pieces[side][kind].append(
                        weight_sum[:, kind * out : (kind + 1) * out].flatten(1)
                    )
                    pieces[side][kind].append(bias_sum[:, kind * out : (kind + 1) * out])
        flats = [[torch.cat(k, dim=1) for k in side if k] for side in pieces]
        # Without weights the weighted and plain parts are one and the same.
        clean_w, clean_u = flats[0][0], flats[0][-1]
        if split:
            out_w, out_u = flats[1][0], flats[1][-1]
        else:
            out_w = out_u = torch.zeros_like(clean_w)
        return [clean_w, out_w, clean_u, out_u]

    def _gradient_sum(
        self,
        inputs: list[torch.Tensor],
        dz: list[torch.Tensor],
        rows_w: list[torch.Tensor] | None,
        bias_w: list[torch.Tensor] | None,
        into: tuple[torch.Tensor, list[torch.Tensor]] | None = None,
    ) -> torch.Tensor:
        """sum_i (dz_i * w_i) a_i^T per layer, written once into a flat (K, P) gradient (into
        `into`, a buffer and its per-parameter views, when given)."""
        if into is None:
            flat = torch.empty(dz[0].shape[0], self.layout.total, dtype=self.dtype)
            views = self.layout.views(flat)
        else:
            flat, views = into
        for layer, (a, d) in enumerate(zip(inputs, dz, strict=True)):
            d_rows = d_bias = d
            if rows_w is not None and bias_w is not None:
                d_rows = d * rows_w[layer]
                d_bias = d_rows if self.scalar_weights else d * bias_w[layer].unsqueeze(-1)
            views[2 * layer].copy_(bmm(d_rows.transpose(1, 2), a))
            torch.sum(d_bias, dim=1, out=views[2 * layer + 1])
        return flat

    def _without_outliers(
        self,
        inputs: list[torch.Tensor],
        dz: list[torch.Tensor],
        norms: torch.Tensor,
        params: list[torch.Tensor],
        outlier: torch.Tensor,
        clean_sum: torch.Tensor,
        applied: list[tuple[_Group, torch.Tensor]],
        reduce: float,
    ) -> torch.Tensor:
        """The clipped gradient (K, P) of the same step with the outliers taken out of the batch,
        each member clipped at the level it applied on this step (logged steps only).

        Taken out, not zeroed: under the mean reduction the batch mean is over the clean examples
        left, and a compared unit (an example, or a group of m) keeps its clean examples and
        averages over them; units left empty drop out of the average over units.
        """
        B = outlier.shape[1]
        clean = ~outlier
        n_clean = clean.sum(dim=1).to(self.dtype)
        mean = self.reduction == "mean"
        base = clean_sum * (B / n_clean.clamp(min=1.0))[:, None] if mean else clean_sum.clone()
        without = base.clone()
        for g, level in applied:
            if not g.spec.per_example:
                sub = g.take(base)
                coef = self._batch_coefs(g, sub, params, level)[0]
                without = g.put(without, sub * coef)
                continue
            sub_clean = g.take(clean)
            k = sub_clean.shape[0]
            m = g.microbatch or 1  # examples per compared unit
            per_unit = sub_clean.reshape(k, B // m, m).to(self.dtype).sum(dim=2)  # (k, units)
            units_left = (per_unit > 0).sum(dim=1).to(self.dtype).clamp(min=1.0)
            # Scaling each clean example by m / (its unit's clean count) makes the kernel see
            # each unit's mean over the examples it keeps.
            spread = (m / per_unit.clamp(min=1.0)).repeat_interleave(m, dim=1)
            scale = torch.where(sub_clean, spread, 0.0)
            sub_inputs = [torch.where(sub_clean[..., None], g.take(a), 0.0) for a in inputs]
            sub_dz = [torch.where(sub_clean[..., None], g.take(d), 0.0) for d in dz]
            context = clipping.ExampleContext(
                inputs=sub_inputs,
                dz=[d * scale[..., None] for d in sub_dz],
                norms=torch.where(sub_clean, g.take(norms) * scale, 0.0),
                member_params=functools.partial(_member_rows, g, params),
                unreduce=1.0 / reduce,
                layers=self.arch.layers,
                clipped_layers=self.clipped_layers,
                eps=g.eps,
                microbatch=g.microbatch,
                share=False,
            )
            weights = g.spec.function()(context).weigh(level)
            # The weights apply to the plain clean gradients: under the mean reduction the
            # average over the units left (each unit's mean, times units / units left), under
            # the sum reduction their sum.
            factor = scale * ((B // m) / units_left)[:, None] if mean else sub_clean.to(self.dtype)
            rows = [d * factor[..., None] for d in sub_dz]
            without = g.put(without, self._flat_sum(sub_inputs, rows, weights))
        return without

    def _flat_sum(
        self, inputs: list[torch.Tensor], dz: list[torch.Tensor], weights: clipping.ExampleWeights
    ) -> torch.Tensor:
        """sum_i (dz_i * w_i) a_i^T per layer into a flat (k, P) gradient, weights per layer."""
        flat = torch.empty(dz[0].shape[0], self.layout.total, dtype=self.dtype)
        views = self.layout.views(flat)
        for layer, (a, d) in enumerate(zip(inputs, dz, strict=True)):
            views[2 * layer].copy_(bmm((d * weights.rows[layer]).transpose(1, 2), a))
            torch.sum(d * weights.bias[layer].unsqueeze(-1), dim=1, out=views[2 * layer + 1])
        return flat

    def _outlier_detail(
        self, parts: list[torch.Tensor | None], coef: torch.Tensor, outlier: torch.Tensor
    ) -> dict[str, torch.Tensor]:
        """The outlier share and pass-through alone (see `_detail`), in few operations: this
        runs on every outlier step of a map."""
        clean_w, out_w, _, out_u, _ = parts
        assert clean_w is not None and out_w is not None and out_u is not None
        sizes = torch.linalg.vector_norm(torch.stack((coef * out_w, coef * clean_w, out_u)), dim=2)
        n_out = outlier.sum(dim=1).to(self.dtype)
        return {
            # share: |o| / (|o| + |c|); NaN where nothing passed at all, counted nowhere
            OUTLIER_MEANS[0]: sizes[0] / (sizes[0] + sizes[1]),
            OUTLIER_MEANS[1]: sizes[0] / sizes[2],
            "batch_outliers": n_out,
        }

    def _detail(
        self,
        clipped: torch.Tensor,
        parts: list[torch.Tensor | None],
        coef: torch.Tensor,
        sq: torch.Tensor,
        outlier: torch.Tensor,
        without: torch.Tensor,
    ) -> dict[str, torch.Tensor]:
        clean_w, out_w, clean_u, out_u, whole = parts
        assert clean_w is not None and out_w is not None
        assert clean_u is not None and out_u is not None and whole is not None
        norm = functools.partial(torch.linalg.vector_norm, dim=1)
        pre = norm(whole)
        post = norm(clipped)
        out_after = norm(coef * out_w)
        clean_after = norm(coef * clean_w)
        n_out = outlier.sum(dim=1).to(self.dtype)
        n_clean = outlier.shape[1] - n_out
        both = out_after + clean_after
        shift = norm(clipped - without) / norm(without)
        clean_norm = norm(clean_u)
        return {
            "grad_norm_pre": pre,
            "grad_norm_post": post,
            "clip_coef": post / pre,
            # |o| / (|o| + |c|) of the clipped outlier and clean parts: in [0, 1] by the
            # triangle inequality, and the clean share is 1 minus it.
            "outlier_share": torch.where((n_out > 0) & (both > 0), out_after / both, 0.0),
            "outlier_pass": torch.where(n_out > 0, out_after / norm(out_u), math.nan),
            "outlier_shift": torch.where(n_out > 0, torch.where(n_clean > 0, shift, math.nan), 0.0),
            "clean_cosine": (clipped * clean_u).sum(dim=1) / (post * clean_norm),
            "clean_sum": clean_u,
            "clean_sq_norms": torch.where(outlier, 0.0, sq),
            "n_clean": n_clean,
            "batch_outliers": n_out,
        }


class Engine:
    """Trains a stack of members of one batch size; iterate `records()` to run it."""

    def __init__(
        self,
        scenario: Scenario,
        members: list[Member],
        batch_size: int | None = None,
        *,
        dataset: Dataset | None = None,
        dtype: torch.dtype = torch.float32,
        trace: bool = False,
        keep_norms: bool = False,
        outlier_steps: bool = False,
    ) -> None:
        if not members:
            raise ValueError("an engine needs at least one member")
        self.scenario = scenario
        self.members = members = [
            dataclasses.replace(m, clip=resolve_clip(m.clip)) for m in members
        ]
        self.batch_size = batch_size or scenario.train.batch_size
        self.dataset = dataset if dataset is not None else build_dataset(scenario)
        self.dtype = dtype
        self.arch = architecture(scenario, self.dataset.dim)
        self.layout = param_layout(self.arch)
        train = scenario.train
        self.steps = train.steps
        self.lr = train.lr * _lr_factor(train.lr_scaling, self.batch_size, train.reference_batch)
        self.reduce = 1.0 / self.batch_size if train.loss_reduction == "mean" else 1.0

        seeds = sorted({m.seed for m in members})
        slot = {s: i for i, s in enumerate(seeds)}
        self.member_slot = torch.tensor([slot[m.seed] for m in members])
        self.single_seed = len(seeds) == 1
        plans = [
            plan_batches(self.dataset, scenario.outliers, self.batch_size, self.steps, s)
            for s in seeds
        ]
        self.batches = torch.from_numpy(np.stack([p.indices for p in plans]))  # (seeds, steps, B)
        ds = self.dataset
        self.x_train = torch.as_tensor(ds.x_train, dtype=dtype)
        y_dtype = torch.long if ds.classification else dtype
        self.y_train = torch.as_tensor(ds.y_train, dtype=y_dtype)
        self.outlier_train = torch.as_tensor(ds.outlier_train)
        self.n_clean_train = float((~self.outlier_train[: ds.n_train]).sum())
        self.x_val = torch.as_tensor(ds.x_val, dtype=dtype)
        self.y_val = torch.as_tensor(ds.y_val, dtype=y_dtype)
        self.evaluator = Evaluator(self.arch, self.x_val, self.y_val, len(members))

        start = init_params(self.arch, [init_seed(scenario, m.seed) for m in members], dtype)
        # All of a member's parameters live in one row of theta (K, P); the model reads views.
        # No autograd anywhere: the backward is written out and the optimizer reads theta.grad.
        self.theta = ParamLayout.flatten(start)
        self.params = self.layout.views(self.theta)
        self.initial = [p.clone() for p in start]
        # torch.optim steps blocks of consecutive rows of theta (views). A member that may skip a
        # step has a block of its own: on a skipped step its block gets no gradient, and torch.optim
        # leaves a parameter without one untouched, its moments and its step count (Adam's bias
        # correction) included. The other members share blocks, so their update stays batched.
        skips = [m.clip.on_spike == "skip" for m in members]
        self.blocks = _blocks(skips)
        self.block_params = [self.theta[a:b] for a, b in self.blocks]
        self.optimizer = _make_optimizer(scenario, self.block_params, self.lr)
        self.grad_pass = StackPass(
            self.arch, members, train.loss_reduction, scenario.model.exclude_head, dtype
        )
        self.keep_norms = keep_norms  # logged records carry the step's per-example norms
        self.grad_pass.want_norms = trace
        self.grad_pass.reuse_buffer = True
        self.input_factor = self.grad_pass.input_factor(self.x_train, self.batch_size)  # (N,)
        # Whether each step's batch holds an outlier, known from the plan: no per-step check.
        self.step_has_outlier: list[bool] = (
            self.outlier_train[self.batches].any(dim=2).any(dim=0).tolist()
        )
        # Plain SGD (no momentum, no weight decay) is theta -= lr * grad: torch.optim's
        # single-tensor step does exactly this add_, so stepping it here is the same to the bit
        # without the optimizer's per-call overhead.
        self.plain_sgd = (
            train.optimizer == "sgd" and train.momentum == 0 and train.weight_decay == 0
        )
        self.grad_pass.data_nonfinite = not (
            bool(torch.isfinite(self.x_train).all()) and bool(torch.isfinite(self.y_train).all())
        )
        K = len(members)
        self.example_norms = np.zeros((K, self.steps, self.batch_size)) if trace else None
        self.alive = torch.ones(K, dtype=torch.bool)
        self.clipping = torch.tensor([m.method != "none" for m in members])
        self.nobody = torch.zeros(K, dtype=torch.bool)
        self.any_dead = False
        self.diverged_at: list[int | None] = [None] * K
        self._noise_tr = torch.zeros(K, dtype=torch.float64)
        self._noise_g2 = torch.zeros(K, dtype=torch.float64)
        # With outlier_steps, every step whose batch holds an outlier is measured (not only the
        # logged ones) and its outlier share and pass-through are summed per member: a map's
        # means over the outlier steps then count every such step. It costs two small sums over
        # the gathered outlier examples on those steps.
        self.outlier_steps = outlier_steps
        self._outlier_sums = torch.zeros(len(OUTLIER_MEANS), K, dtype=torch.float64)
        self._outlier_counts = torch.zeros(len(OUTLIER_MEANS), K, dtype=torch.float64)

    def batch_indices(self, member: int) -> np.ndarray:
        """(steps, B) rows of x_train that a member trained on."""
        return self.batches[int(self.member_slot[member])].numpy()

    def records(self) -> Iterator[StepRecord]:
        """Train step by step; yield a record at every multiple of eval_every and at the end."""
        with torch.no_grad():
            start_loss, _ = self.evaluator(self.params)
            explode = EXPLODE_FACTOR * torch.clamp(start_loss, min=1.0)
            every = self.scenario.train.eval_every
            for step in range(1, self.steps + 1):
                logged = step % every == 0 or step == self.steps
                record = self._step(step, logged, explode)
                if record is not None:
                    yield record

    def _step(self, step: int, logged: bool, explode: torch.Tensor) -> StepRecord | None:
        rows = self.batches[:, step - 1]  # (seeds, B)
        x, y, outlier = self.x_train[rows], self.y_train[rows], self.outlier_train[rows]
        if self.single_seed:  # every member trains on the one batch: broadcast, do not copy
            K = len(self.members)
            x, y, outlier = x.expand(K, -1, -1), y.expand(K, -1), outlier.expand(K, -1)
        else:
            x, y, outlier = x[self.member_slot], y[self.member_slot], outlier[self.member_slot]
        has_outlier = self.step_has_outlier[step - 1]
        first = None
        if self.grad_pass.takes_norms(logged):
            first = self.input_factor[rows]
            first = (
                first.expand(len(self.members), -1) if self.single_seed else first[self.member_slot]
            )
        result = self.grad_pass.run(
            self.params, x, y, outlier, logged, self.outlier_steps, has_outlier, first
        )
        self._last_outlier = outlier
        if self.example_norms is not None and result.norms is not None:
            self.example_norms[:, step - 1] = result.norms.double().numpy()

        if has_outlier:
            n_clean = (~outlier).sum(dim=1).clamp(min=1).to(self.dtype)
            clean_loss = torch.where(outlier, 0.0, result.loss).sum(dim=1) / n_clean
        else:
            clean_loss = result.loss.mean(dim=1)
        # A skipped spike may carry a non-finite gradient; a bad clean loss is never excused.
        grad_sum = result.grads.sum(dim=1)  # finite exactly when every entry is
        if self.grad_pass.any_skip:
            ok = (clean_loss <= explode) & (torch.isfinite(grad_sum) | result.skip)
        else:
            # loss + 0 * sum is the loss itself for a finite sum and NaN otherwise, which fails
            # the comparison: both checks in two operations.
            ok = torch.add(clean_loss, grad_sum, alpha=0.0) <= explode
        newly = self.nobody
        if not bool(ok.all()):
            newly = self.alive & ~ok
            for i in torch.nonzero(newly).flatten().tolist():
                self.diverged_at[i] = step
            self.alive &= ~newly
            self.any_dead = True
        frozen = (~self.alive | result.skip) if (self.any_dead or self.grad_pass.any_skip) else None

        before = self.theta.detach().clone() if logged else None
        self._apply(result.grads, frozen)
        if self.outlier_steps and result.detail is not None:
            self._add_outlier_step(result.detail)

        if not logged:
            return None
        return self._record(step, result, before, newly)

    def _apply(self, grads: torch.Tensor, frozen: torch.Tensor | None) -> None:
        """One optimizer step; frozen members (diverged or skipping) keep parameters and state."""
        if frozen is None or not bool(frozen.any()):
            if self.plain_sgd:
                for (a, b), param in zip(self.blocks, self.block_params, strict=True):
                    param.add_(grads[a:b], alpha=-self.lr)
                return
            for (a, b), param in zip(self.blocks, self.block_params, strict=True):
                param.grad = grads[a:b]
            self.optimizer.step()
            return
        rows = frozen.tolist()
        partial = []
        for (a, b), param in zip(self.blocks, self.block_params, strict=True):
            mine = rows[a:b]
            if all(mine):  # a whole block frozen: torch.optim skips it, state and all
                param.grad = None
            elif any(mine):  # diverged members among live ones: step, then put their rows back
                keep = frozen[a:b].unsqueeze(1)
                param.grad = torch.where(keep, 0.0, grads[a:b])
                state = self.optimizer.state[param]
                saved = {k: v.clone() for k, v in state.items() if _stacked(v, param)}
                partial.append((param, keep, param.detach().clone(), saved))
            else:
                param.grad = grads[a:b]
        self.optimizer.step()
        for param, keep, saved_rows, saved_state in partial:
            param.copy_(torch.where(keep, saved_rows, param))  # in place: the views stay valid
            for key, value in self.optimizer.state[param].items():
                if _stacked(value, param):
                    old = saved_state.get(key, torch.zeros_like(value))
                    value.copy_(torch.where(keep, old, value))

    def _add_outlier_step(self, detail: dict[str, torch.Tensor]) -> None:
        values = torch.stack([detail[name] for name in OUTLIER_MEANS]).double()  # (2, K)
        counted = (detail["batch_outliers"] > 0) & self.alive & torch.isfinite(values)
        self._outlier_sums += torch.where(counted, values, 0.0)
        self._outlier_counts += counted

    def outlier_step_means(self) -> dict[str, np.ndarray]:
        """Per member (K,), the mean of each split statistic over every step whose batch held
        an outlier while the member was alive (NaN: no such step); needs outlier_steps=True."""
        if not self.outlier_steps:
            raise RuntimeError("outlier_step_means needs an engine made with outlier_steps=True")
        means = (self._outlier_sums / self._outlier_counts).numpy()
        return {name: means[i] for i, name in enumerate(OUTLIER_MEANS)}

    def optimizer_state(self, member: int) -> dict[str, torch.Tensor]:
        """One member's optimizer state: its rows of the moments, and its block's step count."""
        for (a, b), param in zip(self.blocks, self.block_params, strict=True):
            if a <= member < b:
                state = self.optimizer.state[param]
                return {
                    k: v[member - a] if _stacked(v, param) else v
                    for k, v in state.items()
                    if isinstance(v, torch.Tensor)
                }
        raise IndexError(f"no member {member} in a stack of {len(self.members)}")

    def _record(
        self,
        step: int,
        result: PassResult,
        before: torch.Tensor | None,
        newly: torch.Tensor,
    ) -> StepRecord:
        detail = result.detail
        if detail is None or before is None:
            raise RuntimeError("a logged step must carry its detail statistics")
        val_loss, val_metric = self.evaluator(self.params)
        delta = self.theta.detach() - before
        update_norm = torch.linalg.vector_norm(delta, dim=1)
        if result.norms is None:
            raise RuntimeError("a logged step must carry per-example norms")
        norms = result.norms.double()
        quantiles = torch.nanquantile(
            norms, torch.tensor([0.5, 0.9, 0.99], dtype=torch.float64), dim=1
        )
        values: dict[str, torch.Tensor] = {
            "batch_loss": result.loss.mean(dim=1),
            "val_loss": val_loss,
            "val_accuracy" if self.arch.classification else "val_r2": val_metric,
            "grad_norm_pre": detail["grad_norm_pre"],
            "grad_norm_post": detail["grad_norm_post"],
            "clip_level": torch.where(self.clipping, result.levels, math.nan),
            "clip_coef": detail["clip_coef"],
            "clipped_share": result.clipped_share,
            "outlier_share": detail["outlier_share"],
            "outlier_pass": detail["outlier_pass"],
            "outlier_shift": detail["outlier_shift"],
            "clean_cosine": detail["clean_cosine"],
            "update_norm": update_norm,
            "example_norm_p50": quantiles[0],
            "example_norm_p90": quantiles[1],
            "example_norm_p99": quantiles[2],
            "example_norm_max": torch.amax(torch.nan_to_num(norms, nan=math.inf), dim=1),
            "noise_scale": self._noise_scale(detail),
            "lr": torch.full_like(val_loss, self.lr),
            "batch_outliers": detail["batch_outliers"],
            "skipped": result.skip.to(self.dtype),
        }
        dead = (~self.alive).numpy()
        out = {}
        for name, tensor in values.items():
            array = tensor.detach().double().numpy().copy()
            if name not in KEPT_AFTER_DIVERGING:
                array[dead] = math.nan
            out[name] = array
        out["diverged"] = dead.astype(np.float64)
        ordered = {name: out[name] for name in metric_names(self.arch.classification)}
        newly_list = tuple(torch.nonzero(newly).flatten().tolist())
        if not self.keep_norms:
            return StepRecord(step, ordered, newly_list)
        return StepRecord(
            step, ordered, newly_list, norms.numpy().copy(), self._last_outlier.numpy().copy()
        )

    def _noise_scale(self, detail: dict[str, torch.Tensor]) -> torch.Tensor:
        """B_simple = tr(Sigma) / |G|^2 from the clean examples of logged batches.

        Per batch of b clean examples from N clean training rows (without replacement),
        S = mean |g_i|^2 and |g_b|^2 give unbiased tr(Sigma) = (S - |g_b|^2) b (N-1) / (N (b-1))
        and |G|^2 = |g_b|^2 - tr(Sigma) (N - b) / (b (N - 1)); numerator and denominator are
        averaged over logged steps (exponentially) before dividing.
        """
        b = detail["n_clean"].double()
        N = self.n_clean_train
        sum_norm = torch.linalg.vector_norm(detail["clean_sum"], dim=1).double()
        g2 = (sum_norm / (self.reduce * b.clamp(min=1.0))) ** 2
        s = detail["clean_sq_norms"].double().sum(dim=1) / b.clamp(min=1.0)
        tr = (s - g2) * b * (N - 1) / (N * (b - 1).clamp(min=1.0))
        big_g2 = g2 - tr * (N - b) / (b * (N - 1))
        usable = torch.isfinite(tr) & torch.isfinite(big_g2) & (b > 1)
        a = NOISE_SCALE_ALPHA
        self._noise_tr = torch.where(usable, a * self._noise_tr + (1 - a) * tr, self._noise_tr)
        self._noise_g2 = torch.where(usable, a * self._noise_g2 + (1 - a) * big_g2, self._noise_g2)
        return self._noise_tr / self._noise_g2


def init_seed(scenario: Scenario, seed: int) -> int:
    """The seed of a member's initial weights: model.init_seed combined with its training seed."""
    return int(np.random.SeedSequence([scenario.model.init_seed, seed]).generate_state(1)[0])


def _member_rows(g: _Group, params: list[torch.Tensor]) -> list[torch.Tensor]:
    return [g.take(p) for p in params]


def _rows(mask: torch.Tensor, like: torch.Tensor) -> torch.Tensor:
    return mask.reshape(-1, *([1] * (like.dim() - 1)))


def _stacked(value: object, param: torch.Tensor) -> bool:
    return isinstance(value, torch.Tensor) and value.shape == param.shape


def _lr_factor(scaling: str, batch: int, reference: int) -> float:
    if scaling == "linear":
        return batch / reference
    if scaling == "sqrt":
        return math.sqrt(batch / reference)
    return 1.0


def _blocks(skips: list[bool]) -> list[tuple[int, int]]:
    """Row ranges [a, b) of theta that step together: each skipping member alone, the runs of
    members in between as one block each."""
    blocks: list[tuple[int, int]] = []
    start = 0
    for i, skip in enumerate(skips):
        if skip:
            if start < i:
                blocks.append((start, i))
            blocks.append((i, i + 1))
            start = i + 1
    if start < len(skips):
        blocks.append((start, len(skips)))
    return blocks


def _make_optimizer(
    scenario: Scenario, params: list[torch.Tensor], lr: float
) -> torch.optim.Optimizer:
    t = scenario.train
    # All of these are element-wise, so stepping stacked rows is exact per member. The
    # single-tensor code path (foreach=False) computes each element the same way whatever the
    # block, so a member's numbers do not depend on how the stack is cut into blocks.
    if t.optimizer == "sgd":
        return torch.optim.SGD(
            params,
            lr=lr,
            momentum=t.momentum,
            nesterov=t.nesterov,
            weight_decay=t.weight_decay,
            foreach=False,
        )
    if t.optimizer == "adam":
        return torch.optim.Adam(params, lr=lr, weight_decay=t.weight_decay, foreach=False)
    return torch.optim.AdamW(params, lr=lr, weight_decay=t.weight_decay, foreach=False)
