"""A log entry of a study: a user's own log of gradient norms, and how to read and advise it.

In a study file:

    [[entry]]
    kind = "log"
    title = "My run"
    log = "logs/my-run.csv"          # relative to the study
    member = 2                        # a metrics.csv of `gradfence train`: which member
    [entry.columns]                   # names that differ from the defaults (core.normlog)
    norm_column = "total_norm"
    batch_size = 256
    [entry.advice]                    # what `gradfence advise` takes as options
    threshold = 1.0
    to_batch = 512
    max_clip_share = 0.01
"""

from __future__ import annotations

import dataclasses
import math
import os
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from core.errors import GradfenceInputError
from core.fields import describe
from core.normlog import LogColumns

COLUMN_KEYS = tuple(f.name for f in dataclasses.fields(LogColumns))
ADVICE_KEYS = ("threshold", "to_batch", "max_clip_share")


@dataclass(frozen=True)
class LogSource:
    """Which log, read how, advised with what."""

    path: Path  # absolute
    columns: LogColumns = field(default_factory=LogColumns)
    member: int | None = None
    threshold: float | None = None
    to_batch: int | None = None
    max_clip_share: float = 0.01


def parse_log_entry(item: Mapping[str, Any], folder: Path, where: str) -> LogSource:
    """The LogSource of a [[entry]] table of kind log; errors name the entry and the key."""
    log = item.get("log")
    if not isinstance(log, str) or not log:
        raise GradfenceInputError(
            f"{where}: log must be the path of a log file, not {describe(log)}."
        )
    columns = item.get("columns", {})
    if not isinstance(columns, Mapping):
        raise GradfenceInputError(f"{where}: columns must be a table, not {describe(columns)}.")
    for key, value in columns.items():
        if key not in COLUMN_KEYS:
            raise GradfenceInputError(
                f'{where}: unknown key "columns.{key}"; allowed: {", ".join(COLUMN_KEYS)}.'
            )
        wants_number = key in ("batch_size", "small_batch_size")
        ok = (
            isinstance(value, int | float) and not isinstance(value, bool)
            if wants_number
            else isinstance(value, str)
        )
        if not ok:
            kind = "a number" if wants_number else "a column name"
            raise GradfenceInputError(
                f"{where}: columns.{key} must be {kind}, not {describe(value)}."
            )
    member = item.get("member")
    if member is not None and (isinstance(member, bool) or not isinstance(member, int)):
        raise GradfenceInputError(
            f"{where}: member must be a whole number, not {describe(member)}."
        )
    advice = item.get("advice", {})
    if not isinstance(advice, Mapping):
        raise GradfenceInputError(f"{where}: advice must be a table, not {describe(advice)}.")
    for key in advice:
        if key not in ADVICE_KEYS:
            raise GradfenceInputError(
                f'{where}: unknown key "advice.{key}"; allowed: {", ".join(ADVICE_KEYS)}.'
            )
    threshold = advice.get("threshold")
    if threshold is not None and not _positive(threshold):
        raise GradfenceInputError(f"{where}: advice.threshold must be a number above 0.")
    to_batch = advice.get("to_batch")
    if to_batch is not None and (
        isinstance(to_batch, bool) or not isinstance(to_batch, int) or to_batch < 1
    ):
        raise GradfenceInputError(f"{where}: advice.to_batch must be a whole number of at least 1.")
    share = advice.get("max_clip_share", 0.01)
    if not _positive(share) or share > 1:
        raise GradfenceInputError(f"{where}: advice.max_clip_share must be above 0 and at most 1.")
    try:
        built = LogColumns(**dict(columns))
    except GradfenceInputError as exc:
        raise GradfenceInputError(f"{where}: {exc}") from None
    return LogSource(
        path=(folder / log).resolve(),
        columns=built,
        member=member,
        threshold=None if threshold is None else float(threshold),
        to_batch=to_batch,
        max_clip_share=float(share),
    )


def _positive(value: Any) -> bool:
    return (
        isinstance(value, int | float)
        and not isinstance(value, bool)
        and math.isfinite(value)
        and value > 0
    )


def log_entry_table(source: LogSource, folder: Path) -> dict[str, Any]:
    """The keys of a log entry's [[entry]] table in a study saved in `folder`."""
    table: dict[str, Any] = {"log": Path(os.path.relpath(source.path, folder)).as_posix()}
    if source.member is not None:
        table["member"] = source.member
    default = LogColumns()
    columns = {
        k: getattr(source.columns, k)
        for k in COLUMN_KEYS
        if getattr(source.columns, k) != getattr(default, k)
    }
    if columns:
        table["columns"] = columns
    advice: dict[str, Any] = {}
    if source.threshold is not None:
        advice["threshold"] = source.threshold
    if source.to_batch is not None:
        advice["to_batch"] = source.to_batch
    if source.max_clip_share != 0.01:
        advice["max_clip_share"] = source.max_clip_share
    if advice:
        table["advice"] = advice
    return table
