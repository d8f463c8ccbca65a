"""The scenario preset: frozen, validated tables from TOML, with overrides, saving and a hash."""

from __future__ import annotations

import dataclasses
import hashlib
import json
import math
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from core.errors import GradfenceInputError
from core.fields import Reader, describe, option
from core.fileio import write_text_atomic

SCHEMA = 1

CLASSIFICATION_TASKS = ("blobs", "moons", "spirals", "xor")
REGRESSION_TASKS = ("linear", "teacher")
TASKS = CLASSIFICATION_TASKS + REGRESSION_TASKS
PLANAR_TASKS = ("moons", "spirals", "xor")

OUTLIER_KINDS = (
    "none",
    "label-flip",
    "feature-scale",
    "feature-shift",
    "target-shift",
    "nonfinite",
)
METHODS = (
    "none",
    "value",
    "global-norm",
    "tensor-norm",
    "unit-agc",
    "example-norm",
    "example-agc",
    "microbatch-norm",
)
BATCH_MEAN_METHODS = ("value", "global-norm", "tensor-norm", "unit-agc")
PER_EXAMPLE_METHODS = ("example-norm", "example-agc", "microbatch-norm")
AGC_METHODS = ("unit-agc", "example-agc")
RULES = ("fixed", "percentile", "ema", "zscore")

# The threshold a [[clip]] table gets when it names none, and the grid a sweep uses when neither
# [sweep] nor the table lists thresholds. AGC's lambda = 0.01 is the published default.
DEFAULT_THRESHOLD = {
    "none": None,
    "value": 0.1,
    "global-norm": 1.0,
    "tensor-norm": 1.0,
    "unit-agc": 0.01,
    "example-norm": 1.0,
    "example-agc": 0.01,
    "microbatch-norm": 1.0,
}
DEFAULT_GRID = {
    "value": (1e-3, 10.0, 9),
    "global-norm": (1e-2, 100.0, 9),
    "tensor-norm": (1e-2, 100.0, 9),
    "unit-agc": (1e-3, 1.0, 7),
    "example-norm": (1e-2, 100.0, 9),
    "example-agc": (1e-3, 1.0, 7),
    "microbatch-norm": (1e-2, 100.0, 9),
}

METHOD_HELP = {
    "none": "No clipping: the batch-mean gradient g is applied as it is.",
    "value": "Clamps each coordinate of the batch-mean gradient: g_k <- clamp(g_k, -t, t).",
    "global-norm": "Rescales the whole batch-mean gradient: g <- g * min(1, t / |g|).",
    "tensor-norm": "Rescales each parameter tensor of the batch-mean gradient by its own norm.",
    "unit-agc": (
        "Adaptive gradient clipping of the batch-mean gradient, unit by unit: if "
        "|G_i| / max(|W_i|, eps) > lambda then G_i <- lambda * max(|W_i|, eps) / |G_i| * G_i."
    ),
    "example-norm": (
        "Clips each example's whole gradient, then averages: "
        "g <- mean_i g_i * min(1, t / |g_i|); optional Gaussian noise as in DP-SGD (a "
        "simulation for studying clipping: not an audited privacy implementation, no privacy "
        "guarantee for real data)."
    ),
    "example-agc": "Applies the AGC rule unit by unit to each example's gradient, then averages.",
    "microbatch-norm": (
        "Clips the mean gradient of each group of m consecutive examples, then averages; "
        "m = 1 is example-norm, m = B is global-norm."
    ),
}


@dataclass(frozen=True)
class DataConfig:
    task: str = option("blobs", "Synthetic task that generates the data.", choices=TASKS)
    n_train: int = option(2000, "Number of training examples.", unit="examples", lo=16, hi=200_000)
    n_val: int = option(
        1000, "Number of clean validation examples.", unit="examples", lo=16, hi=200_000
    )
    dim: int = option(
        2, "Input dimension (blobs, linear, teacher; the others are planar).", lo=1, hi=512
    )
    classes: int = option(2, "Number of classes (blobs, spirals).", lo=2, hi=32)
    noise: float = option(
        0.2,
        "Noise level: spread of the clusters, or the std of the regression target noise.",
        lo=0.0,
        hi=100.0,
    )
    seed: int = option(0, "Seed of the data and of the outliers.", lo=0, hi=2**31 - 1)


@dataclass(frozen=True)
class OutlierConfig:
    kind: str = option("none", "What is wrong with an outlier sample.", choices=OUTLIER_KINDS)
    placement: str = option(
        "batch",
        "dataset: a fraction of the training set is corrupted; batch: on a share of steps, "
        "exactly `count` outliers replace ordinary examples in the batch.",
        choices=("dataset", "batch"),
    )
    fraction: float = option(
        0.01, "Share of the training set that is corrupted (dataset placement).", lo=0.0, hi=0.5
    )
    rate: float = option(
        0.1, "Probability that a step's batch carries outliers (batch placement).", lo=0.0, hi=1.0
    )
    count: int = option(1, "Outliers per affected batch (batch placement).", lo=1, hi=4096)
    scale: float = option(
        10.0,
        "Size of the corruption: input factor (feature-scale), shift length (feature-shift, "
        "target-shift).",
        lo=0.0,
        hi=1e6,
    )
    when: str = option(
        "always", "always, or only during a burst of steps.", choices=("always", "burst")
    )
    start: int = option(0, "First step of the burst (counted from 0).", unit="steps", lo=0)
    length: int = option(50, "Length of the burst.", unit="steps", lo=1)


@dataclass(frozen=True)
class ModelConfig:
    kind: str = option("mlp", "linear: one layer; mlp: hidden layers.", choices=("linear", "mlp"))
    hidden: tuple[int, ...] = option((64, 64), "Widths of the hidden layers (mlp).", lo=1, hi=4096)
    activation: str = option("tanh", "Hidden activation.", choices=("tanh", "relu", "gelu"))
    init_seed: int = option(0, "Seed of the initial weights.", lo=0, hi=2**31 - 1)
    exclude_head: bool = option(
        True, "Leave the final layer unclipped under unit-agc and example-agc, as published."
    )


@dataclass(frozen=True)
class TrainConfig:
    steps: int = option(300, "Number of optimizer steps.", unit="steps", lo=1, hi=1_000_000)
    batch_size: int = option(32, "Examples per step.", unit="examples", lo=1, hi=65536)
    optimizer: str = option("sgd", "torch.optim optimizer.", choices=("sgd", "adam", "adamw"))
    lr: float = option(
        0.1, "Learning rate at the reference batch size.", lo=0.0, hi=1e4, lo_open=True
    )
    momentum: float = option(0.0, "SGD momentum.", lo=0.0, hi=0.9999)
    nesterov: bool = option(False, "Nesterov momentum (SGD, needs momentum > 0).")
    weight_decay: float = option(0.0, "Weight decay.", lo=0.0, hi=10.0)
    lr_scaling: str = option(
        "none",
        "Scale the learning rate with batch size: lr * (B / reference_batch) or its square root.",
        choices=("none", "linear", "sqrt"),
    )
    reference_batch: int = option(
        32, "Batch size at which lr applies as given.", unit="examples", lo=1, hi=65536
    )
    loss_reduction: str = option(
        "mean",
        "mean: the gradient is the average over the batch; sum: the sum.",
        choices=("mean", "sum"),
    )
    eval_every: int = option(10, "Log a row every this many steps.", unit="steps", lo=1)
    seed: int = option(
        0, "Seed of the batch order (and, with init_seed, of the weights).", lo=0, hi=2**31 - 1
    )


@dataclass(frozen=True)
class ClipConfig:
    method: str = option("global-norm", "What is clipped.", choices=METHODS)
    threshold: float | None = option(
        None,
        "Threshold: an absolute norm, a value bound, or the AGC ratio lambda (default per method).",
        lo=0.0,
        lo_open=True,
        hi=1e9,
    )
    rule: str = option(
        "fixed",
        "fixed; percentile (of norms seen so far); ema (k times a moving average); "
        "zscore (clip spikes z standard deviations above the running mean).",
        choices=RULES,
    )
    percentile: float = option(
        90.0, "Percentile of the percentile rule.", unit="%", lo=0.0, hi=100.0, lo_open=True
    )
    k: float = option(2.0, "Multiplier of the ema rule.", lo=0.0, lo_open=True, hi=1e6)
    alpha: float = option(0.97, "Smoothing of the ema and zscore rules.", lo=0.0, hi=0.9999)
    z: float = option(
        2.5, "Spike level of the zscore rule.", unit="std", lo=0.0, lo_open=True, hi=100.0
    )
    warmup: int = option(
        25, "Steps an adaptive rule only watches before it clips.", unit="steps", lo=0
    )
    on_spike: str = option(
        "clip",
        "clip; or skip: drop the step when the norm exceeds skip_factor * threshold.",
        choices=("clip", "skip"),
    )
    skip_factor: float = option(4.0, "Skip level as a multiple of the threshold.", lo=1.0, hi=1e6)
    eps: float = option(1e-3, "AGC floor of the weight norm.", lo=0.0, lo_open=True, hi=1.0)
    microbatch: int = option(
        4, "Examples per group (microbatch-norm).", unit="examples", lo=1, hi=65536
    )
    noise_multiplier: float = option(
        0.0,
        "DP-SGD noise: std sigma * threshold on the clipped sum (example-norm).",
        lo=0.0,
        hi=100.0,
    )
    label: str = option("", "Name shown in plots and tables (default: the method).")
    sweep: tuple[float, ...] | None = option(
        None, "Thresholds this method sweeps, overriding [sweep] thresholds.", lo=0.0, lo_open=True
    )

    @property
    def display_name(self) -> str:
        return self.label or self.method


@dataclass(frozen=True)
class SweepConfig:
    batch_sizes: tuple[int, ...] = option(
        (8, 32, 128, 512), "Batch sizes of the sweep.", unit="examples", lo=1, hi=65536
    )
    seeds: tuple[int, ...] = option((0,), "Training seeds of the sweep.", lo=0, hi=2**31 - 1)
    thresholds: tuple[float, ...] | None = option(
        None,
        "Thresholds every method sweeps (default: a log grid per method).",
        lo=0.0,
        lo_open=True,
    )
    tolerance: float = option(
        1.0,
        "A threshold is in a batch size's window when its final loss is within a factor "
        "(1 + tolerance) of the best there.",
        lo=0.0,
        lo_open=True,
        hi=100.0,
    )


def _default_clips() -> tuple[ClipConfig, ...]:
    return (
        ClipConfig(method="none"),
        ClipConfig(method="global-norm", threshold=1.0),
        ClipConfig(method="example-norm", threshold=1.0),
    )


@dataclass(frozen=True)
class Scenario:
    schema: int = option(SCHEMA, "Preset format version.", lo=1, hi=1)
    name: str = option("Untitled scenario", "Short name.")
    notes: str = option("", "Why this preset exists.")
    data: DataConfig = option(DataConfig(), "The synthetic task.")
    outliers: OutlierConfig = option(OutlierConfig(), "Injected outlier samples.")
    model: ModelConfig = option(ModelConfig(), "The model trained.")
    train: TrainConfig = option(TrainConfig(), "The training loop.")
    clip: tuple[ClipConfig, ...] = field(default_factory=_default_clips)
    sweep: SweepConfig = option(SweepConfig(), "The batch size x threshold sweep.")

    @property
    def is_classification(self) -> bool:
        return self.data.task in CLASSIFICATION_TASKS

    def to_dict(self) -> dict[str, Any]:
        """The fully resolved scenario as TOML-ready data (absent optional values left out)."""
        resolved: dict[str, Any] = _drop_none(dataclasses.asdict(self))
        return resolved

    def content(self) -> dict[str, Any]:
        """Everything that changes results: the resolved scenario without name and notes."""
        content = self.to_dict()
        content.pop("name", None)
        content.pop("notes", None)
        return content

    def hash(self) -> str:
        """A stable hash of `content()`."""
        text = json.dumps(self.content(), sort_keys=True, separators=(",", ":"))
        return hashlib.sha256(text.encode()).hexdigest()[:16]

    def with_overrides(self, overrides: Mapping[str, Any], source: str = "--set") -> Scenario:
        """A new scenario with dotted keys replaced (`train.batch_size`, `clip.1.threshold`)."""
        raw = self.to_dict()
        for key, value in overrides.items():
            _set_dotted(raw, key, value, source)
        return parse_scenario(raw, source)

    def thresholds_for(self, clip: ClipConfig) -> tuple[float, ...]:
        """The thresholds a sweep tries for one [[clip]] table."""
        if clip.method == "none":
            return (math.nan,)
        if clip.sweep is not None:
            return clip.sweep
        if self.sweep.thresholds is not None:
            return self.sweep.thresholds
        lo, hi, count = DEFAULT_GRID[clip.method]
        return log_grid(lo, hi, count)


def log_grid(lo: float, hi: float, count: int) -> tuple[float, ...]:
    """count log-spaced values from lo to hi, both included."""
    if count == 1:
        return (float(lo),)
    return tuple(float(v) for v in np.geomspace(lo, hi, count))


def _drop_none(value: Any) -> Any:
    if isinstance(value, dict):
        return {k: _drop_none(v) for k, v in value.items() if v is not None}
    if isinstance(value, list | tuple):
        return [_drop_none(v) for v in value]
    return value


# ---------------------------------------------------------------------------------------------
# Reading


def load_scenario(path: str | Path) -> Scenario:
    """Read and validate a preset file."""
    path = Path(path)
    return loads_scenario(read_text(path), str(path))


def read_text(path: Path) -> str:
    """A file's text, or one sentence saying why it cannot be read."""
    try:
        return path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise GradfenceInputError(f"{path}: no such file.") from None
    except IsADirectoryError:
        raise GradfenceInputError(f"{path}: is a folder, not a preset file.") from None
    except UnicodeDecodeError:
        raise GradfenceInputError(f"{path}: is not UTF-8 text.") from None
    except OSError as exc:
        raise GradfenceInputError(f"{path}: cannot be read ({exc.strerror}).") from None


def parse_toml(text: str, source: str) -> dict[str, Any]:
    """TOML text as a dict; a syntax error names the line and column."""
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise GradfenceInputError(f"{source}: is not valid TOML: {exc}.") from None


def loads_scenario(text: str, source: str = "<text>") -> Scenario:
    """Validate preset TOML text."""
    return parse_scenario(parse_toml(text, source), source)


def parse_scenario(raw: Mapping[str, Any], source: str = "<scenario>", path: str = "") -> Scenario:
    """Validate a preset already parsed from TOML; `path` prefixes key paths in messages."""
    reader = Reader(source)
    if not isinstance(raw, Mapping):
        reader.fail(path, f"must be a table, not {describe(raw)}.")
    schema = raw.get("schema", SCHEMA)
    if schema != SCHEMA or isinstance(schema, bool):
        reader.fail(
            _join(path, "schema"),
            f"= {schema!r} is not supported; this version of Gradfence reads schema = {SCHEMA}.",
        )
    raw = dict(raw)
    clips_raw = raw.pop("clip", None)
    raw = _grids_to_lists(raw, reader, _join(path, "sweep"), "thresholds")
    scenario = reader.table(Scenario, raw, path)
    clips = scenario.clip
    if clips_raw is not None:
        if not isinstance(clips_raw, list) or not clips_raw:
            reader.fail(_join(path, "clip"), "must be one or more [[clip]] tables.")
        parsed = []
        for i, item in enumerate(clips_raw):
            item_path = f"{_join(path, 'clip')}[{i}]"
            item = _grids_to_lists(item, reader, item_path, "sweep", nested=False)
            parsed.append(resolve_clip(reader.table(ClipConfig, item, item_path)))
        clips = tuple(parsed)
    else:
        clips = tuple(resolve_clip(c) for c in clips)
    scenario = dataclasses.replace(scenario, clip=clips)
    sweep_raw = raw.get("sweep")
    if not (isinstance(sweep_raw, Mapping) and "batch_sizes" in sweep_raw):
        scenario = _fit_default_batch_sizes(scenario)
    _check_consistency(scenario, reader, path)
    return scenario


def _fit_default_batch_sizes(s: Scenario) -> Scenario:
    """Keep the default sweep batch sizes that the rest of the preset can use."""

    def fits(b: int) -> bool:
        if b > s.data.n_train:
            return False
        if s.outliers.kind != "none" and s.outliers.placement == "batch" and s.outliers.count > b:
            return False
        return all(b % c.microbatch == 0 for c in s.clip if c.method == "microbatch-norm")

    sizes = tuple(b for b in SweepConfig().batch_sizes if fits(b)) or (s.train.batch_size,)
    return dataclasses.replace(s, sweep=dataclasses.replace(s.sweep, batch_sizes=sizes))


def _join(path: str, key: str) -> str:
    return f"{path}.{key}" if path else key


def resolve_clip(clip: ClipConfig) -> ClipConfig:
    """The clip table with its method's default threshold filled in."""
    if clip.threshold is None and clip.method != "none":
        return dataclasses.replace(clip, threshold=DEFAULT_THRESHOLD[clip.method])
    if clip.method == "none":
        return dataclasses.replace(clip, threshold=None)
    return clip


def _grids_to_lists(raw: Any, reader: Reader, path: str, key: str, nested: bool = True) -> Any:
    """Turn a `{min, max, count}` threshold grid into its explicit log-spaced list."""
    if not isinstance(raw, Mapping):
        return raw
    table = raw.get("sweep") if nested else raw
    if not isinstance(table, Mapping) or not isinstance(table.get(key), Mapping):
        return raw
    grid = table[key]
    grid_path = f"{path}.{key}"
    allowed = ("min", "max", "count")
    for name in grid:
        if name not in allowed:
            reader.fail_unknown(grid_path, str(name), allowed)
    for name in allowed:
        if name not in grid:
            reader.fail(grid_path, f"needs min, max and count; {name} is missing.")
    lo, hi, count = grid["min"], grid["max"], grid["count"]
    for name, value in (("min", lo), ("max", hi)):
        if isinstance(value, bool) or not isinstance(value, int | float) or not value > 0:
            reader.fail(
                f"{grid_path}.{name}", f"must be a number greater than 0, not {describe(value)}."
            )
    if isinstance(count, bool) or not isinstance(count, int) or not 1 <= count <= 64:
        reader.fail(
            f"{grid_path}.count", f"must be a whole number from 1 to 64, not {describe(count)}."
        )
    if hi < lo:
        reader.fail(grid_path, f"has max = {hi:g} below min = {lo:g}.")
    new_table = dict(table)
    new_table[key] = list(log_grid(float(lo), float(hi), count))
    if nested:
        out = dict(raw)
        out["sweep"] = new_table
        return out
    return new_table


def _check_consistency(s: Scenario, reader: Reader, path: str) -> None:
    """Rules that involve more than one key."""

    def p(key: str) -> str:
        return _join(path, key)

    if s.data.task in PLANAR_TASKS and s.data.dim != 2:
        reader.fail(
            p("data.dim"),
            f"= {s.data.dim} does not apply: the {s.data.task} task is planar (dim = 2).",
        )
    if s.data.task in ("moons", "xor") and s.data.classes != 2:
        reader.fail(
            p("data.classes"),
            f"= {s.data.classes} does not apply: the {s.data.task} task has 2 classes.",
        )
    kind = s.outliers.kind
    if kind == "label-flip" and not s.is_classification:
        reader.fail(
            p("outliers.kind"),
            f'= "label-flip" needs a classification task, and {s.data.task} is regression; '
            'use "target-shift" instead.',
        )
    if kind == "target-shift" and s.is_classification:
        reader.fail(
            p("outliers.kind"),
            f'= "target-shift" needs a regression task (linear, teacher), and {s.data.task} is '
            'classification; use "label-flip" instead.',
        )
    if s.train.nesterov and s.train.momentum == 0.0:
        reader.fail(p("train.nesterov"), "= true needs train.momentum greater than 0.")
    if s.train.optimizer != "sgd" and (s.train.momentum != 0.0 or s.train.nesterov):
        reader.fail(p("train.momentum"), f"applies to sgd only, not to {s.train.optimizer}.")
    batch_sizes = {
        s.train.batch_size: "train.batch_size",
        **{b: "sweep.batch_sizes" for b in s.sweep.batch_sizes},
    }
    if kind != "none" and s.outliers.placement == "batch":
        for b, key in batch_sizes.items():
            if s.outliers.count > b:
                reader.fail(
                    p("outliers.count"),
                    f"= {s.outliers.count} is larger than the batch size {b} of {key}.",
                )
    dataset_outliers = kind != "none" and s.outliers.placement == "dataset"
    if dataset_outliers and round(s.outliers.fraction * s.data.n_train) < 1:
        reader.fail(
            p("outliers.fraction"),
            f"= {s.outliers.fraction:g} corrupts no example of n_train = {s.data.n_train}; "
            'raise it or set outliers.kind = "none".',
        )
    for b, key in batch_sizes.items():
        if b > s.data.n_train:
            reader.fail(p(key), f"has batch size {b}, more than data.n_train = {s.data.n_train}.")
    for i, c in enumerate(s.clip):
        cp = p(f"clip[{i}]")
        if c.method == "microbatch-norm":
            for b, key in batch_sizes.items():
                if b % c.microbatch:
                    reader.fail(
                        f"{cp}.microbatch",
                        f"= {c.microbatch} does not divide the batch size {b} of {key}.",
                    )
        if c.noise_multiplier > 0 and c.method != "example-norm":
            reader.fail(f"{cp}.noise_multiplier", "applies to example-norm only.")
        if c.method in AGC_METHODS and s.model.kind == "linear" and s.model.exclude_head:
            reader.fail(
                f"{cp}.method",
                f'= "{c.method}" has nothing to clip: a linear model is only its head, which '
                "model.exclude_head = true leaves unclipped; set it to false.",
            )
        if c.method == "none" and (c.rule != "fixed" or c.on_spike != "clip"):
            reader.fail(f"{cp}.rule", 'applies to clipping methods, not to method = "none".')
    labels = [c.display_name for c in s.clip]
    for i, name in enumerate(labels):
        if labels.index(name) != i:
            reader.fail(
                p(f"clip[{i}].label"),
                f'repeats the name "{name}" of clip[{labels.index(name)}]; give each [[clip]] '
                "table its own label.",
            )


def _set_dotted(raw: dict[str, Any], key: str, value: Any, source: str) -> None:
    parts = key.split(".")
    node: Any = raw
    for depth, part in enumerate(parts[:-1]):
        if isinstance(node, list):
            node = _list_item(node, part, parts[:depth], source)
            continue
        if part not in node:
            node[part] = {}
        node = node[part]
    last = parts[-1]
    if isinstance(node, list):
        index = _index(node, last, parts[:-1], source)
        node[index] = value
    elif isinstance(node, dict):
        node[last] = value
    else:
        raise GradfenceInputError(f"{source}: {key} goes inside a value that is not a table.")


def _index(items: list[Any], part: str, prefix: list[str], source: str) -> int:
    where = ".".join(prefix)
    if not part.isdigit() or int(part) >= len(items):
        raise GradfenceInputError(
            f"{source}: {where}.{part} needs an index from 0 to {len(items) - 1} "
            f"into the {len(items)} [[{where}]] tables."
        )
    return int(part)


def _list_item(items: list[Any], part: str, prefix: list[str], source: str) -> Any:
    return items[_index(items, part, prefix, source)]


def parse_override(text: str, source: str = "--set") -> tuple[str, Any]:
    """`key.path=value` with a TOML value; a bare word is taken as a string."""
    key, sep, value = text.partition("=")
    key = key.strip()
    if not sep or not key:
        raise GradfenceInputError(f"{source}: {text!r} must look like key.path=value.")
    value = value.strip()
    try:
        return key, tomllib.loads(f"v = {value}")["v"]
    except tomllib.TOMLDecodeError:
        return key, value


# ---------------------------------------------------------------------------------------------
# Writing


def dumps_scenario(scenario: Scenario) -> str:
    import tomli_w

    return tomli_w.dumps(scenario.to_dict())


def save_scenario(scenario: Scenario, path: str | Path) -> None:
    """Write a preset atomically: the previous file stays whole until the new one is complete."""
    write_text_atomic(Path(path), dumps_scenario(scenario))
