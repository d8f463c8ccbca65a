"""The scenario preset: frozen, validated tables from TOML, with overrides, saving and a hash."""

from __future__ import annotations

import dataclasses
import functools
import hashlib
import json
import math
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from core import methods
from core.errors import GradfenceInputError
from core.fields import Reader, describe, option
from core.fileio import write_text_atomic

SCHEMA = 2  # schema 1 called the map table [sweep]; it still loads, with a notice
OLD_SCHEMAS = (1,)

CLASSIFICATION_TASKS = ("blobs", "moons", "spirals", "xor")
REGRESSION_TASKS = ("linear", "teacher")
TASKS = CLASSIFICATION_TASKS + REGRESSION_TASKS
PLANAR_TASKS = ("moons", "spirals", "xor")
FIXED_CLASS_TASKS = ("moons", "xor")  # two classes, always

OUTLIER_KINDS = (
    "none",
    "label-flip",
    "feature-scale",
    "feature-shift",
    "target-shift",
    "nonfinite",
)
RULES = ("fixed", "percentile", "ema", "zscore")
# [[clip]] keys each rule reads; the others do not apply to it.
RULE_OPTIONS = {
    "fixed": (),
    "percentile": ("percentile", "warmup"),
    "ema": ("k", "alpha", "warmup"),
    "zscore": ("z", "alpha", "warmup"),
}
# A threshold (or grid threshold) outside this range is a typo, not an experiment.
THRESHOLD_RANGE = (1e-9, 1e9)
# Deeper than this is no longer a small synthetic problem: the stack's memory and a step's time
# grow with every layer, and a list written by mistake (a width per example) would run for ever.
MAX_HIDDEN_LAYERS = 8


def method_ids() -> tuple[str, ...]:
    return methods.method_ids()


@dataclass(frozen=True)
class DataConfig:
    task: str = option(
        "blobs", "Synthetic task that generates the data.", label="Task", choices=TASKS
    )
    n_train: int = option(
        2000,
        "Number of training examples.",
        label="Training examples",
        unit="examples",
        lo=16,
        hi=200_000,
    )
    n_val: int = option(
        1000,
        "Number of clean validation examples.",
        label="Validation examples",
        unit="examples",
        lo=16,
        hi=200_000,
    )
    dim: int = option(
        2,
        "Input dimension (blobs, linear, teacher; the others are planar).",
        label="Input dimension",
        lo=1,
        hi=512,
    )
    classes: int = option(2, "Number of classes (blobs, spirals).", label="Classes", lo=2, hi=32)
    noise: float = option(
        0.2,
        "Noise level: spread of the clusters, or the std of the regression target noise.",
        label="Noise",
        lo=0.0,
        hi=100.0,
    )
    seed: int = option(
        0, "Seed of the data and of the outliers.", label="Data seed", lo=0, hi=2**31 - 1
    )


@dataclass(frozen=True)
class OutlierConfig:
    kind: str = option(
        "none", "What is wrong with an outlier sample.", label="Outlier kind", choices=OUTLIER_KINDS
    )
    placement: str = option(
        "batch",
        "dataset: a fraction of the training set is corrupted; batch: on a share of steps, "
        "exactly `count` outliers replace ordinary examples in the batch.",
        label="Placement",
        choices=("dataset", "batch"),
    )
    fraction: float = option(
        0.01,
        "Share of the training set that is corrupted (dataset placement).",
        label="Corrupted share of the training set",
        lo=0.0,
        hi=0.5,
    )
    rate: float = option(
        0.1,
        "Probability that a step's batch carries outliers (batch placement).",
        label="Share of batches with outliers",
        lo=0.0,
        hi=1.0,
    )
    count: int = option(
        1,
        "Outliers per affected batch (batch placement).",
        label="Outliers per affected batch",
        lo=1,
        hi=4096,
    )
    scale: float = option(
        10.0,
        "Size of the corruption: input factor (feature-scale), shift length (feature-shift, "
        "target-shift).",
        label="Size of the corruption",
        lo=0.0,
        hi=1e6,
    )
    when: str = option(
        "always",
        "always, or only during a burst of steps.",
        label="When",
        choices=("always", "burst"),
    )
    start: int = option(
        0, "First step of the burst (counted from 0).", label="Burst start", unit="steps", lo=0
    )
    length: int = option(50, "Length of the burst.", label="Burst length", unit="steps", lo=1)


@dataclass(frozen=True)
class ModelConfig:
    kind: str = option(
        "mlp", "linear: one layer; mlp: hidden layers.", label="Model", choices=("linear", "mlp")
    )
    hidden: tuple[int, ...] = option(
        (64, 64),
        "Widths of the hidden layers (mlp), at most 8 layers.",
        label="Hidden layer widths",
        lo=1,
        hi=4096,
    )
    activation: str = option(
        "tanh", "Hidden activation.", label="Activation", choices=("tanh", "relu", "gelu")
    )
    init_seed: int = option(
        0, "Seed of the initial weights.", label="Weight seed", lo=0, hi=2**31 - 1
    )
    exclude_head: bool = option(
        True,
        "Leave the final layer unclipped under the AGC methods, as published.",
        label="Leave the output layer unclipped",
    )


@dataclass(frozen=True)
class TrainConfig:
    steps: int = option(
        300, "Number of optimizer steps.", label="Steps", unit="steps", lo=1, hi=1_000_000
    )
    batch_size: int = option(
        32, "Examples per step.", label="Batch size", unit="examples", lo=1, hi=65536
    )
    optimizer: str = option(
        "sgd", "torch.optim optimizer.", label="Optimizer", choices=("sgd", "adam", "adamw")
    )
    lr: float = option(
        0.1,
        "Learning rate at the reference batch size.",
        label="Learning rate",
        lo=0.0,
        hi=1e4,
        lo_open=True,
    )
    momentum: float = option(0.0, "SGD momentum.", label="Momentum", lo=0.0, hi=0.9999)
    nesterov: bool = option(
        False, "Nesterov momentum (SGD, needs momentum > 0).", label="Nesterov momentum"
    )
    weight_decay: float = option(0.0, "Weight decay.", label="Weight decay", lo=0.0, hi=10.0)
    lr_scaling: str = option(
        "none",
        "Scale the learning rate with batch size: lr * (B / reference_batch) or its square root.",
        label="Scale the learning rate with the batch size",
        choices=("none", "linear", "sqrt"),
    )
    reference_batch: int = option(
        32,
        "Batch size at which lr applies as given.",
        label="Reference batch size",
        unit="examples",
        lo=1,
        hi=65536,
    )
    loss_reduction: str = option(
        "mean",
        "mean: the gradient is the average over the batch; sum: the sum.",
        label="Loss over the batch",
        choices=("mean", "sum"),
    )
    eval_every: int = option(
        10, "Log a row every this many steps.", label="Log every", unit="steps", lo=1
    )
    seed: int = option(
        0,
        "Seed of the batch order (and, with init_seed, of the weights).",
        label="Training seed",
        lo=0,
        hi=2**31 - 1,
    )


@dataclass(frozen=True)
class ClipConfig:
    method: str = option(
        "global-norm", "What is clipped.", label="Clipping method", choices=method_ids
    )
    threshold: float | None = option(
        None,
        "Threshold: an absolute norm, a value bound, or the AGC ratio lambda (default per method).",
        label="Threshold",
        lo=THRESHOLD_RANGE[0],
        hi=THRESHOLD_RANGE[1],
    )
    rule: str = option(
        "fixed",
        "fixed; percentile (of norms seen so far); ema (k times a moving average); "
        "zscore (clip spikes z standard deviations above the running mean).",
        label="Threshold rule",
        choices=RULES,
    )
    percentile: float = option(
        90.0,
        "Percentile of the percentile rule.",
        label="Percentile",
        unit="%",
        lo=0.0,
        hi=100.0,
        lo_open=True,
    )
    k: float = option(
        2.0,
        "Multiplier of the ema rule.",
        label="Multiple of the average",
        lo=0.0,
        lo_open=True,
        hi=1e6,
    )
    alpha: float = option(
        0.97, "Smoothing of the ema and zscore rules.", label="Smoothing", lo=0.0, hi=0.9999
    )
    z: float = option(
        2.5,
        "Spike level of the zscore rule.",
        label="Spike level",
        unit="std",
        lo=0.0,
        lo_open=True,
        hi=100.0,
    )
    warmup: int = option(
        25,
        "Steps an adaptive rule only watches before it clips.",
        label="Warm-up",
        unit="steps",
        lo=0,
    )
    on_spike: str = option(
        "clip",
        "clip; or skip: drop the step when the norm exceeds skip_factor * threshold.",
        label="On a spike",
        choices=("clip", "skip"),
    )
    skip_factor: float = option(
        4.0,
        "Skip level as a multiple of the threshold.",
        label="Skip above this multiple of the threshold",
        lo=1.0,
        hi=1e6,
    )
    eps: float = option(
        1e-3,
        "AGC floor of the weight norm.",
        label="Weight-norm floor",
        lo=0.0,
        lo_open=True,
        hi=1.0,
    )
    microbatch: int = option(
        4,
        "Examples per group (microbatch-norm).",
        label="Examples per group",
        unit="examples",
        lo=1,
        hi=65536,
    )
    noise_multiplier: float = option(
        0.0,
        "DP-SGD noise: std sigma * threshold on the clipped sum (example-norm, fixed rule: an "
        "adaptive threshold has no level during its warm-up, so the noise would be unbounded).",
        label="Noise multiplier (DP-SGD)",
        lo=0.0,
        hi=100.0,
    )
    label: str = option("", "Name shown in plots and tables (default: the method).", label="Name")
    map_thresholds: tuple[float, ...] | None = option(
        None,
        "Thresholds this method tries in a map, overriding [map] thresholds.",
        label="Map thresholds",
        lo=THRESHOLD_RANGE[0],
        hi=THRESHOLD_RANGE[1],
    )

    @property
    def display_name(self) -> str:
        return self.label or self.method

    @property
    def spec(self) -> methods.MethodSpec:
        return methods.spec(self.method)


@dataclass(frozen=True)
class MapConfig:
    batch_sizes: tuple[int, ...] = option(
        (8, 32, 128, 512),
        "Batch sizes of the map.",
        label="Batch sizes",
        unit="examples",
        lo=1,
        hi=65536,
    )
    seeds: tuple[int, ...] = option(
        (0,), "Training seeds of the map.", label="Seeds", lo=0, hi=2**31 - 1
    )
    thresholds: tuple[float, ...] | None = option(
        None,
        "Thresholds every method tries (default: a log grid per method).",
        label="Thresholds",
        lo=THRESHOLD_RANGE[0],
        hi=THRESHOLD_RANGE[1],
    )
    tolerance: float = option(
        1.0,
        "A threshold is in a batch size's window when its final loss above the task's floor is "
        "within a factor (1 + tolerance) of the best there.",
        label="Window tolerance",
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
    schema: int = option(SCHEMA, "Preset format version.", lo=1, hi=SCHEMA)
    name: str = option("Untitled scenario", "Short name.", label="Name")
    notes: str = option("", "Why this preset exists.", label="Notes")
    data: DataConfig = option(DataConfig(), "The synthetic task.")
    outliers: OutlierConfig = option(OutlierConfig(), "Injected outlier samples.")
    model: ModelConfig = option(ModelConfig(), "The model trained.")
    train: TrainConfig = option(TrainConfig(), "The training loop.")
    clip: tuple[ClipConfig, ...] = field(default_factory=_default_clips)
    map: MapConfig = option(MapConfig(), "The batch size x threshold x seed map.")

    @property
    def is_classification(self) -> bool:
        return self.data.task in CLASSIFICATION_TASKS

    def to_dict(self) -> dict[str, Any]:
        """The fully resolved scenario as TOML-ready data (absent optional values left out)."""
        resolved: dict[str, Any] = _drop_none(dataclasses.asdict(self))
        resolved["schema"] = SCHEMA  # an upgraded schema-1 file is written back as schema 2
        return resolved

    def content(self) -> dict[str, Any]:
        """Everything that changes results: the resolved scenario without name and notes."""
        content = self.to_dict()
        content.pop("name", None)
        content.pop("notes", None)
        return content

    def hash(self) -> str:
        """A stable hash of `content()` (computed once: a scenario never changes)."""
        return self._content_hash

    @functools.cached_property
    def _content_hash(self) -> str:
        text = json.dumps(self.content(), sort_keys=True, separators=(",", ":"))
        return hashlib.sha256(text.encode()).hexdigest()[:16]

    def with_overrides(self, overrides: Mapping[str, Any], source: str = "--set") -> Scenario:
        """A new scenario with dotted keys replaced (`train.batch_size`, `clip.1.threshold`).

        A new method without a new threshold takes that method's default threshold: a global
        norm of 1 means nothing as an AGC ratio. Naming the method a table already has keeps
        its threshold.
        """
        raw = self.to_dict()
        for key, value in overrides.items():
            _set_dotted(raw, key, value, source)
        for key in overrides:
            parts = key.split(".")
            new_method = len(parts) == 3 and parts[0] == "clip" and parts[2] == "method"
            if new_method and f"clip.{parts[1]}.threshold" not in overrides:
                index = int(parts[1])
                was = self.clip[index].method if index < len(self.clip) else None
                if raw["clip"][index].get("method") != was:
                    raw["clip"][index].pop("threshold", None)
        return parse_scenario(raw, source)

    def thresholds_for(self, clip: ClipConfig) -> tuple[float, ...]:
        """The thresholds a map tries for one [[clip]] table."""
        if clip.method == "none":
            return (math.nan,)
        if clip.map_thresholds is not None:
            return clip.map_thresholds
        if self.map.thresholds is not None:
            return self.map.thresholds
        grid = clip.spec.grid
        if grid is None:
            return (math.nan,)
        lo, hi, count = grid
        return log_grid(lo, hi, count)


def applicable_fields(scenario: Scenario, kind: str = "fan") -> frozenset[str]:
    """The dotted keys that change anything for this scenario in an entry of `kind` (fan or
    map): the form shows these and hides the rest."""
    keys: set[str] = set()

    def add(table: str, *names: str) -> None:
        keys.update(f"{table}.{n}" for n in names)

    d, o, m, t = scenario.data, scenario.outliers, scenario.model, scenario.train
    add("data", "task", "n_train", "n_val", "noise", "seed")
    if d.task not in PLANAR_TASKS:
        add("data", "dim")
    if d.task in CLASSIFICATION_TASKS and d.task not in FIXED_CLASS_TASKS:
        add("data", "classes")
    add("outliers", "kind")
    if o.kind != "none":
        add("outliers", "placement", "when")
        add("outliers", "fraction" if o.placement == "dataset" else "rate")
        if o.placement == "batch":
            add("outliers", "count")
        if o.kind not in ("label-flip", "nonfinite"):
            add("outliers", "scale")
        if o.when == "burst":
            add("outliers", "start", "length")
    add("model", "kind", "init_seed")
    if m.kind == "mlp":
        add("model", "hidden", "activation")
    if any(c.spec.skips_head for c in scenario.clip):
        add("model", "exclude_head")
    add("train", "steps", "optimizer", "lr", "weight_decay", "lr_scaling")
    # A map trains its own batch sizes, but its norm profile and suggestion use this one.
    add("train", "loss_reduction", "eval_every", "seed", "batch_size")
    if t.optimizer == "sgd":
        add("train", "momentum", "nesterov")
    if t.lr_scaling != "none":
        add("train", "reference_batch")
    for i, c in enumerate(scenario.clip):
        path = f"clip.{i}"
        add(path, "method", "label")
        if c.method == "none":
            continue
        add(path, "rule", "on_spike", *RULE_OPTIONS[c.rule], *c.spec.options)
        if c.rule == "fixed":
            add(path, "threshold")
        if c.on_spike == "skip":
            add(path, "skip_factor")
        if kind == "map":
            add(path, "map_thresholds")
    if kind == "map":
        add("map", "batch_sizes", "seeds", "thresholds", "tolerance")
    return frozenset(keys)


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


def load_scenario(path: str | Path, notices: list[str] | None = None) -> Scenario:
    """Read and validate a preset file; a note on an older schema goes to `notices`."""
    path = Path(path)
    return loads_scenario(read_text(path), str(path), notices)


def read_text(path: Path) -> str:
    """A file's text (a byte-order mark dropped), or one sentence saying why it cannot be read."""
    try:
        return path.read_text(encoding="utf-8-sig")
    except FileNotFoundError:
        raise GradfenceInputError(f"{path}: no such file.") from None
    except IsADirectoryError:
        raise GradfenceInputError(f"{path}: is a folder, not a file.") from None
    except UnicodeDecodeError:
        raise GradfenceInputError(f"{path}: is not UTF-8 text.") from None
    except OSError as exc:
        raise GradfenceInputError(f"{path}: cannot be read ({exc.strerror}).") from None


def parse_toml(text: str, source: str) -> dict[str, Any]:
    """TOML text as a dict; a syntax error names the line and column."""
    try:
        return tomllib.loads(text.removeprefix("\ufeff"))
    except tomllib.TOMLDecodeError as exc:
        raise GradfenceInputError(f"{source}: is not valid TOML: {exc}.") from None


def loads_scenario(text: str, source: str = "<text>", notices: list[str] | None = None) -> Scenario:
    """Validate preset TOML text."""
    raw = parse_toml(text, source) if text.strip() else {}
    if not raw:  # nothing at all, or comments only
        raise GradfenceInputError(
            f"{source}: is empty; a preset needs at least one table, e.g. [[clip]] or [data]."
        )
    return parse_scenario(raw, source, notices=notices)


def upgrade_schema(raw: Mapping[str, Any]) -> dict[str, Any]:
    """A schema-1 preset as schema 2: [sweep] becomes [map], [[clip]] sweep becomes
    map_thresholds. Anything else is left for the validator to judge."""
    out = dict(raw)
    out["schema"] = SCHEMA
    if "sweep" in out:
        out["map"] = out.pop("sweep")
    clips = out.get("clip")
    if isinstance(clips, list):
        out["clip"] = [
            {("map_thresholds" if k == "sweep" else k): v for k, v in c.items()}
            if isinstance(c, Mapping)
            else c
            for c in clips
        ]
    return out


def parse_scenario(
    raw: Mapping[str, Any],
    source: str = "<scenario>",
    path: str = "",
    notices: list[str] | None = None,
) -> Scenario:
    """Validate a preset already parsed from TOML; `path` prefixes key paths in messages."""
    reader = Reader(source)
    if not isinstance(raw, Mapping):
        reader.fail(path, f"must be a table, not {describe(raw)}.")
    schema = raw.get("schema", SCHEMA)
    if isinstance(schema, bool) or (schema != SCHEMA and schema not in OLD_SCHEMAS):
        reader.fail(
            _join(path, "schema"),
            f"= {schema!r} is not supported; this version of Gradfence reads schema = {SCHEMA} "
            f"(and the older {', '.join(map(str, OLD_SCHEMAS))}).",
        )
    if schema in OLD_SCHEMAS:
        raw = upgrade_schema(raw)
        if notices is not None:
            notices.append(
                f"{source}: schema 1, read as schema 2 ([sweep] is now [map]); "
                "saving writes schema 2."
            )
    elif "sweep" in raw:
        reader.fail(
            "",
            f'unknown key "{_join(path, "sweep")}"; schema 2 calls this table [map] '
            "(or set schema = 1 for the old name).",
        )
    raw = dict(raw)
    clips_raw = raw.pop("clip", None)
    raw = _grids_to_lists(raw, reader, _join(path, "map"), "thresholds")
    scenario = reader.table(Scenario, raw, path)
    clips = scenario.clip
    if clips_raw is not None:
        if not isinstance(clips_raw, list) or not clips_raw:
            reader.fail(_join(path, "clip"), "must be one or more [[clip]] tables.")
        parsed = []
        for i, item in enumerate(clips_raw):
            item_path = f"{_join(path, 'clip')}[{i}]"
            item = _grids_to_lists(item, reader, item_path, "map_thresholds", nested=False)
            parsed.append(resolve_clip(reader.table(ClipConfig, item, item_path)))
        clips = tuple(parsed)
    else:
        clips = tuple(resolve_clip(c) for c in clips)
    scenario = dataclasses.replace(scenario, clip=clips, schema=SCHEMA)
    map_raw = raw.get("map")
    if not (isinstance(map_raw, Mapping) and "batch_sizes" in map_raw):
        scenario = _fit_default_batch_sizes(scenario)
    _check_consistency(scenario, reader, path)
    return scenario


def _fit_default_batch_sizes(s: Scenario) -> Scenario:
    """Keep the default map batch sizes that the rest of the preset can use."""

    def fits(b: int) -> bool:
        if b > s.data.n_train:
            return False
        if s.outliers.kind != "none" and s.outliers.placement == "batch" and s.outliers.count > b:
            return False
        return all(b % c.microbatch == 0 for c in s.clip if "microbatch" in c.spec.options)

    sizes = tuple(b for b in MapConfig().batch_sizes if fits(b)) or (s.train.batch_size,)
    return dataclasses.replace(s, map=dataclasses.replace(s.map, batch_sizes=sizes))


def _join(path: str, key: str) -> str:
    return f"{path}.{key}" if path else key


def resolve_clip(clip: ClipConfig) -> ClipConfig:
    """The clip table with its method's default threshold filled in."""
    if clip.method == "none":
        return dataclasses.replace(clip, threshold=None)
    if clip.threshold is None:
        return dataclasses.replace(clip, threshold=clip.spec.threshold)
    return clip


def _grids_to_lists(raw: Any, reader: Reader, path: str, key: str, nested: bool = True) -> Any:
    """Turn a `{min, max, count}` threshold grid into its explicit log-spaced list."""
    if not isinstance(raw, Mapping):
        return raw
    table = raw.get("map") if nested else raw
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
    low, high = THRESHOLD_RANGE
    for name, value in (("min", lo), ("max", hi)):
        if (
            isinstance(value, bool)
            or not isinstance(value, int | float)
            or not low <= value <= high
        ):
            reader.fail(
                f"{grid_path}.{name}",
                f"must be a number from {low:g} to {high:g}, not {describe(value)}.",
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
        out["map"] = new_table
        return out
    return new_table


def _check_consistency(s: Scenario, reader: Reader, path: str) -> None:
    """Rules that involve more than one key."""

    def p(key: str) -> str:
        return _join(path, key)

    if len(s.model.hidden) > MAX_HIDDEN_LAYERS:
        reader.fail(
            p("model.hidden"),
            f"lists {len(s.model.hidden)} hidden layers; at most {MAX_HIDDEN_LAYERS} are allowed.",
        )
    if s.data.task in PLANAR_TASKS and s.data.dim != 2:
        reader.fail(
            p("data.dim"),
            f"= {s.data.dim} does not apply: the {s.data.task} task is planar (dim = 2).",
        )
    if s.data.task in FIXED_CLASS_TASKS and s.data.classes != 2:
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
        **{b: "map.batch_sizes" for b in s.map.batch_sizes},
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
        spec = c.spec
        if "microbatch" in spec.options:
            for b, key in batch_sizes.items():
                if b % c.microbatch:
                    reader.fail(
                        f"{cp}.microbatch",
                        f"= {c.microbatch} does not divide the batch size {b} of {key}.",
                    )
        if c.noise_multiplier > 0:
            if "noise_multiplier" not in spec.options:
                users = [m.id for m in methods.METHODS.values() if "noise_multiplier" in m.options]
                reader.fail(f"{cp}.noise_multiplier", f"applies to {', '.join(users)} only.")
            if c.rule != "fixed":
                reader.fail(
                    f"{cp}.noise_multiplier",
                    f'> 0 needs {cp}.rule = "fixed", not "{c.rule}": noise of std '
                    "sigma * threshold has no finite level while an adaptive rule warms up.",
                )
        if spec.skips_head and s.model.kind == "linear" and s.model.exclude_head:
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
        if isinstance(node.get(last), dict | list) and not isinstance(value, dict | list):
            example = next(iter(node[last]), "key") if isinstance(node[last], dict) else "0"
            raise GradfenceInputError(
                f"{source}: {key} is a table, not a value; set one of its keys instead, "
                f"e.g. {key}.{example}=..."
            )
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
