"""The clipping methods, one row each: what a method clips, its threshold's unit, its help and
formula, its colour, its defaults, and the name of its function in core/clipping.py.

Everything that needs to know about a method (validation, the engine, the form, the plots, the
analysis) reads this table; adding a method is one row here and one function in core/clipping.py.
No torch here: the preset reader and the window import this module without loading torch.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

# What a method compares its threshold with, so that plots draw a threshold where it belongs.
BATCH_NORM = "batch-norm"  # the L2 norm of the batch-mean gradient
EXAMPLE_NORM = "example-norm"  # the L2 norm of one example's gradient
GROUP_NORM = "group-norm"  # the L2 norm of a group's mean gradient
UNIT_RATIO = "unit-ratio"  # a unit's gradient norm over its weight norm (AGC)
VALUE = "value"  # one coordinate's size
TENSOR_NORM = "tensor-norm"  # one parameter tensor's norm


@dataclass(frozen=True)
class MethodSpec:
    """One clipping method. `kernel` names its function in core.clipping (or is the function).

    Batch-mean kernels take (BatchContext, level) and return (coefficient, watched, share);
    per-example kernels take an ExampleContext and return a Compared (see core.clipping).
    """

    id: str
    clips: str  # what it clips, in a phrase
    per_example: bool  # clips each example (or group) before averaging
    unit: str  # what the threshold is, for labels: "L2 norm of one example's gradient"
    help: str  # help text with the formula
    color: str  # one hue per method, the same in every view
    counts: str = "steps"  # what its clipped share counts: steps, examples, units, ...
    compares: str = ""  # one of the constants above; "" for method none
    threshold: float | None = None  # the default threshold
    grid: tuple[float, float, int] | None = None  # default map grid: min, max, count (log)
    kernel: str | Callable[..., Any] | None = None
    options: tuple[str, ...] = ()  # [[clip]] keys only this method reads
    skips_head: bool = False  # the final layer stays unclipped when model.exclude_head
    one_weight: bool = False  # per-example: one weight per example for every layer

    def function(self) -> Callable[..., Any]:
        """The kernel itself (imports core.clipping, hence torch, on first use)."""
        if callable(self.kernel):
            return self.kernel
        if self.kernel is None:
            raise ValueError(f"method {self.id} clips nothing")
        from core import clipping

        found: Callable[..., Any] = getattr(clipping, self.kernel)
        return found


# The hues are the Okabe-Ito set, chosen to stay apart for the common forms of colour blindness.
_TABLE = (
    MethodSpec(
        id="none",
        clips="nothing",
        per_example=False,
        unit="",
        help="No clipping: the batch-mean gradient g is applied as it is.",
        color="#000000",
    ),
    MethodSpec(
        id="value",
        clips="each coordinate of the batch-mean gradient",
        per_example=False,
        unit="bound on each coordinate of the batch-mean gradient",
        help="Clamps each coordinate of the batch-mean gradient: g_k <- clamp(g_k, -t, t).",
        color="#7F7F7F",
        counts="coordinates",
        compares=VALUE,
        threshold=0.1,
        grid=(1e-3, 10.0, 9),
        kernel="value_kernel",
    ),
    MethodSpec(
        id="global-norm",
        clips="the whole batch-mean gradient, by its L2 norm",
        per_example=False,
        unit="L2 norm of the batch-mean gradient",
        help="Rescales the whole batch-mean gradient: g <- g * min(1, t / |g|).",
        color="#0072B2",
        counts="steps",
        compares=BATCH_NORM,
        threshold=1.0,
        grid=(1e-2, 100.0, 9),
        kernel="global_norm_kernel",
    ),
    MethodSpec(
        id="tensor-norm",
        clips="each parameter tensor of the batch-mean gradient, by its own norm",
        per_example=False,
        unit="L2 norm of one parameter tensor of the batch-mean gradient",
        help="Rescales each parameter tensor of the batch-mean gradient by its own norm: "
        "g_T <- g_T * min(1, t / |g_T|).",
        color="#56B4E9",
        counts="tensors",
        compares=TENSOR_NORM,
        threshold=1.0,
        grid=(1e-2, 100.0, 9),
        kernel="tensor_norm_kernel",
    ),
    MethodSpec(
        id="unit-agc",
        clips="each unit of the batch-mean gradient, relative to that unit's weight norm",
        per_example=False,
        unit="AGC ratio lambda: a unit's gradient norm over its weight norm",
        help="Adaptive gradient clipping of the batch-mean gradient, unit by unit: if "
        "|G_i| / max(|W_i|, eps) > lambda then G_i <- lambda * max(|W_i|, eps) / |G_i| * G_i.",
        color="#009E73",
        counts="units",
        compares=UNIT_RATIO,
        threshold=0.01,  # the published default
        grid=(1e-3, 1.0, 7),
        kernel="unit_agc_kernel",
        options=("eps",),
        skips_head=True,
    ),
    MethodSpec(
        id="example-norm",
        clips="each example's whole gradient, before averaging",
        per_example=True,
        unit="L2 norm of one example's gradient",
        help="Clips each example's whole gradient, then averages: "
        "g <- mean_i g_i * min(1, t / |g_i|); optional Gaussian noise as in DP-SGD (a "
        "simulation for studying clipping: not an audited privacy implementation, no privacy "
        "guarantee for real data).",
        color="#D55E00",
        counts="examples",
        compares=EXAMPLE_NORM,
        threshold=1.0,
        grid=(1e-2, 100.0, 9),
        kernel="example_norm_kernel",
        options=("noise_multiplier",),
        one_weight=True,
    ),
    MethodSpec(
        id="example-agc",
        clips="each example's gradient unit by unit, relative to the unit's weight norm",
        per_example=True,
        unit="AGC ratio lambda for each example's units",
        help="Applies the AGC rule unit by unit to each example's gradient, then averages: "
        "g_i,u <- g_i,u * min(1, lambda * max(|W_u|, eps) / |g_i,u|).",
        color="#CC79A7",
        counts="example units",
        compares=UNIT_RATIO,
        threshold=0.01,
        grid=(1e-3, 1.0, 7),
        kernel="example_agc_kernel",
        options=("eps",),
        skips_head=True,
    ),
    MethodSpec(
        id="microbatch-norm",
        clips="each group of m examples' mean gradient, before averaging",
        per_example=True,
        unit="L2 norm of one group's mean gradient",
        help="Clips the mean gradient of each group of m consecutive examples, then averages; "
        "m = 1 is example-norm, m = B is global-norm (per-worker clipping in data-parallel "
        "training).",
        color="#E69F00",
        counts="groups",
        compares=GROUP_NORM,
        threshold=1.0,
        grid=(1e-2, 100.0, 9),
        kernel="microbatch_norm_kernel",
        options=("microbatch",),
        one_weight=True,
    ),
)

METHODS: dict[str, MethodSpec] = {spec.id: spec for spec in _TABLE}


def register(spec: MethodSpec) -> None:
    """Add a method (a plug-in or a test's variant); its id must be new."""
    if spec.id in METHODS:
        raise ValueError(f"a method {spec.id!r} exists already")
    METHODS[spec.id] = spec


def unregister(method_id: str) -> None:
    """Remove a method added with `register` (the shipped ones stay)."""
    if method_id in {s.id for s in _TABLE}:
        raise ValueError(f"{method_id!r} is a shipped method")
    METHODS.pop(method_id, None)


def method_ids() -> tuple[str, ...]:
    return tuple(METHODS)


def spec(method_id: str) -> MethodSpec:
    return METHODS[method_id]


def color(method_id: str) -> str:
    found = METHODS.get(method_id)
    return found.color if found is not None else "#000000"
