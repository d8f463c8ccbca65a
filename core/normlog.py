"""A training log of gradient norms: CSV with a header or JSON Lines, one row per step.

A row holds the step and the pre-clip gradient norm of that step (both required), and may hold
the batch size, the loss, the learning rate, and a second norm measured on a smaller batch
(one device's local gradient before averaging, or a sub-batch) with that batch's size. The
default column names are those `LogColumns` lists; the tool's own metrics.csv is read as a log
of one member. Non-finite norms (inf, nan, NaN, Infinity, JSON null, an empty CSV cell) are kept
and counted, never dropped. Every fault of a log is a GradfenceInputError of one sentence that
names the file, the line or the column.
"""

from __future__ import annotations

import csv
import json
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from core.errors import GradfenceInputError

# The first columns of metrics.csv (core.results.MEMBER_COLUMNS; a test keeps them equal) and
# the ones a log takes from it. Kept here so that reading a log does not import torch.
METRICS_MEMBER_COLUMNS = ("member", "method", "threshold", "batch_size", "seed", "step")
METRICS_NORM_COLUMN = "grad_norm_pre"
JSON_SUFFIXES = (".jsonl", ".ndjson", ".json")


def _check_batch_size(value: float | None, what: str) -> None:
    if value is None:
        return
    if isinstance(value, bool) or not (math.isfinite(value) and value >= 1 and value == int(value)):
        raise GradfenceInputError(
            f"The {what} {value!r} is not a positive whole number of examples; give one like 32."
        )


@dataclass(frozen=True)
class LogColumns:
    """Which column holds what. A column left None is read under its default name if the log
    has it; a name given here must exist. A constant batch size replaces a batch column.

    Defaults: step, grad_norm (required), batch_size, small_grad_norm, small_batch_size, loss,
    lr; a metrics.csv log reads step, grad_norm_pre, batch_size, batch_loss and lr instead.
    """

    step_column: str = "step"
    norm_column: str = "grad_norm"
    batch_column: str | None = None
    batch_size: float | None = None
    small_norm_column: str | None = None
    small_batch_column: str | None = None
    small_batch_size: float | None = None
    loss_column: str | None = None
    lr_column: str | None = None

    def __post_init__(self) -> None:
        _check_batch_size(self.batch_size, "batch size")
        _check_batch_size(self.small_batch_size, "small batch size")
        for column, constant, what in (
            (self.batch_column, self.batch_size, "batch size"),
            (self.small_batch_column, self.small_batch_size, "small batch size"),
        ):
            if column is not None and constant is not None:
                raise GradfenceInputError(
                    f"Give the {what} as a column ({column!r}) or as a constant "
                    f"({constant:g}), not both."
                )


# Optional fields: (attribute of LogColumns, default name, what it is, name in metrics.csv).
_OPTIONAL = (
    ("batch_column", "batch_size", "the batch size", "batch_size"),
    ("small_norm_column", "small_grad_norm", "the second (small-batch) norm", None),
    ("small_batch_column", "small_batch_size", "the small batch size", None),
    ("loss_column", "loss", "the loss", "batch_loss"),
    ("lr_column", "lr", "the learning rate", "lr"),
)
_FLAGS = {
    "step_column": "--step-column",
    "norm_column": "--norm-column",
    "batch_column": "--batch-column",
    "small_norm_column": "--small-norm-column",
    "small_batch_column": "--small-batch-column",
    "loss_column": "--loss-column",
    "lr_column": "--lr-column",
}


@dataclass(frozen=True)
class NormLog:
    """One training run's logged norms, a row per logged step, in step order.

    Per-row arrays are float64 with NaN where a row does not say (a batch size, a loss, a small
    norm not measured on that step); a constant batch size is spread over every row.
    """

    name: str  # the file, as messages name it
    source: str  # "csv", "jsonl" or "metrics"
    steps: np.ndarray  # (rows,) int64, strictly increasing
    norm: np.ndarray  # (rows,) float64, non-finite values kept
    batch: np.ndarray | None = None
    small_norm: np.ndarray | None = None
    small_batch: np.ndarray | None = None
    loss: np.ndarray | None = None
    lr: np.ndarray | None = None
    member: int | None = None  # the member of a metrics.csv log
    # "float32" for a metrics.csv whose norms are all float32 values: the engine compared them
    # with its thresholds in float32, and an exact replay does the same.
    precision: str = "float64"
    read_from: dict[str, str] = field(default_factory=dict)  # field -> column it came from

    @property
    def rows(self) -> int:
        return len(self.steps)

    @property
    def nonfinite_steps(self) -> int:
        return int((~np.isfinite(self.norm)).sum())

    @property
    def every_step(self) -> bool:
        """True when no step between the first and the last is missing."""
        return bool(self.rows < 2 or int(self.steps[-1] - self.steps[0]) == self.rows - 1)


def load_log(
    path: str | Path, columns: LogColumns | None = None, member: int | None = None
) -> NormLog:
    """Read a log file (CSV with a header, or JSON Lines)."""
    path = Path(path)
    name = str(path)
    try:
        with path.open("rb") as f:
            head = f.read(4096)
    except FileNotFoundError:
        raise GradfenceInputError(f"{name} does not exist; give the path of a log.") from None
    except IsADirectoryError:
        raise GradfenceInputError(f"{name} is a folder; give the path of a log file.") from None
    except OSError as exc:
        raise GradfenceInputError(f"{name} cannot be read ({exc.strerror}).") from None
    if _is_json_lines(path, head):
        return parse_json_lines(_read_text(path), name, columns, member)
    return _parse_csv(_CsvSource(name, path=path), columns, member)


def parse_log_text(
    text: str, name: str, columns: LogColumns | None = None, member: int | None = None
) -> NormLog:
    """Read a log held in a string; `name` is what messages call it."""
    if text.lstrip("\ufeff \t\r\n").startswith("{"):
        return parse_json_lines(text, name, columns, member)
    return _parse_csv(_CsvSource(name, lines=text.splitlines()), columns, member)


def _is_json_lines(path: Path, head: bytes) -> bool:
    if path.suffix.lower() in JSON_SUFFIXES:
        return True
    return head.lstrip(b"\xef\xbb\xbf \t\r\n").startswith(b"{")


def _read_text(path: Path) -> str:
    try:
        return path.read_text(encoding="utf-8-sig")
    except UnicodeDecodeError as exc:
        raise GradfenceInputError(
            f"{path} is not UTF-8 text (byte {exc.start}); save the log as UTF-8."
        ) from None


# ---------------------------------------------------------------------------------------------
# Column mapping


@dataclass(frozen=True)
class _Wanted:
    """The columns to read: field -> column name, and the constants."""

    columns: dict[str, str]
    batch_size: float | None
    small_batch_size: float | None


def _resolve(name: str, header: Sequence[str], columns: LogColumns, metrics: bool) -> _Wanted:
    present = set(header)
    listing = ", ".join(header)
    chosen: dict[str, str] = {}
    required = [("step", "step_column", "the step"), ("norm", "norm_column", "the gradient norm")]
    for key, attribute, what in required:
        column = getattr(columns, attribute)
        if metrics and attribute == "norm_column" and column == LogColumns.norm_column:
            column = METRICS_NORM_COLUMN
        if column not in present:
            raise GradfenceInputError(
                f"{name} has no column {column!r} for {what} (its columns are {listing}); "
                f"name the right one with {_FLAGS[attribute]}."
            )
        chosen[key] = column
    for attribute, default, what, in_metrics in _OPTIONAL:
        given = getattr(columns, attribute)
        if given is not None:
            if given not in present:
                raise GradfenceInputError(
                    f"{name} has no column {given!r}, named as {what} (its columns are "
                    f"{listing}); fix {_FLAGS[attribute]} or leave it out."
                )
            chosen[attribute.removesuffix("_column")] = given
            continue
        default_name = in_metrics if metrics else default
        if default_name is not None and default_name in present:
            if attribute == "batch_column" and columns.batch_size is not None:
                continue  # the constant wins over a default-named column
            if attribute == "small_batch_column" and columns.small_batch_size is not None:
                continue
            chosen[attribute.removesuffix("_column")] = default_name
    return _Wanted(chosen, columns.batch_size, columns.small_batch_size)


# ---------------------------------------------------------------------------------------------
# CSV


@dataclass
class _CsvSource:
    """A CSV log from a file (read by numpy's C parser) or from lines already in memory."""

    name: str
    path: Path | None = None
    lines: list[str] | None = None

    def all_lines(self) -> list[str]:
        if self.lines is None:
            assert self.path is not None
            self.lines = _read_text(self.path).splitlines()
        return self.lines

    def header(self) -> tuple[int, list[str]] | None:
        """The index of the header line and its cells; None when the log has no lines."""
        if self.lines is None:
            assert self.path is not None
            with self.path.open(encoding="utf-8-sig", newline="") as f:
                for index, line in enumerate(f):
                    if line.strip():
                        return index, _cells(line)
            return None
        for index, line in enumerate(self.lines):
            if line.strip():
                return index, _cells(line.lstrip("\ufeff"))
        return None

    def has_rows_after(self, header_index: int) -> bool:
        if self.lines is None:
            assert self.path is not None
            with self.path.open(encoding="utf-8-sig", newline="") as f:
                return any(i > header_index and line.strip() for i, line in enumerate(f))
        return any(line.strip() for line in self.lines[header_index + 1 :])


def _cells(line: str) -> list[str]:
    return [cell.strip() for cell in next(csv.reader([line]))]


def _parse_csv(source: _CsvSource, columns: LogColumns | None, member: int | None) -> NormLog:
    name = source.name
    try:
        found = source.header()
    except UnicodeDecodeError as exc:
        raise GradfenceInputError(
            f"{name} is not UTF-8 text (byte {exc.start}); save the log as UTF-8."
        ) from None
    if found is None:
        raise GradfenceInputError(
            f"{name} is empty; a log needs a header line and then one row per step."
        )
    header_index, header = found
    if len(header) == 1 and any(sep in header[0] for sep in (";", "\t")):
        raise GradfenceInputError(
            f"{name}, line {header_index + 1}: the header has one column; a CSV log is "
            "separated by commas."
        )
    if len(set(header)) != len(header):
        twice = sorted({c for c in header if header.count(c) > 1})
        raise GradfenceInputError(
            f"{name}, line {header_index + 1}: the header names {', '.join(twice)} more than "
            "once; give every column its own name."
        )
    metrics = tuple(header[: len(METRICS_MEMBER_COLUMNS)]) == METRICS_MEMBER_COLUMNS and (
        METRICS_NORM_COLUMN in header
    )
    if member is not None and not metrics:
        raise GradfenceInputError(
            f"{name} is not a metrics.csv of `gradfence train`; the member option applies to "
            "those only."
        )
    if not source.has_rows_after(header_index):
        raise GradfenceInputError(f"{name} has a header but no rows; a log needs one row per step.")
    wanted = _resolve(name, header, columns or LogColumns(), metrics)
    fields = dict(wanted.columns)
    if metrics:
        fields["member"] = "member"
    values = _read_columns(source, header_index, header, fields)
    lines: np.ndarray | None = None

    def line_of(row: int) -> int:
        nonlocal lines
        if lines is None:
            lines = _row_lines(source, header_index)
        return int(lines[row])

    chosen: int | None = None
    if metrics:
        members = values.pop("member")
        chosen = _choose_member(source, header_index, header, members, member)
        keep = members == chosen
        values = {key: column[keep] for key, column in values.items()}
        rows = np.flatnonzero(keep)

        def line_of_member(row: int) -> int:
            return line_of(int(rows[row]))

        return _build(name, "metrics", values, wanted, line_of_member, chosen)
    return _build(name, "csv", values, wanted, line_of, chosen)


def _read_columns(
    source: _CsvSource, header_index: int, header: list[str], fields: dict[str, str]
) -> dict[str, np.ndarray]:
    """The wanted columns as float64, by numpy's C parser, or by a careful pass on a fault."""
    keys = list(fields)
    positions = [header.index(fields[k]) for k in keys]
    whole = {"step", "batch", "small_batch", "member"}
    target: Any = source.path if source.lines is None else source.lines[header_index + 1 :]
    skip = header_index + 1 if source.lines is None else 0
    # Whole-number columns parse as integers first (twice as fast), then as floats ("32.0").
    for dtypes in (
        [(k, "i8" if k in whole else "f8") for k in keys],
        [(k, "f8") for k in keys],
    ):
        try:
            table = np.loadtxt(
                target,
                delimiter=",",
                skiprows=skip,
                usecols=positions,
                dtype=dtypes,
                comments=None,
                quotechar='"',
                ndmin=1,
                encoding="utf-8-sig",
            )
        except ValueError:
            continue
        return {k: table[k].astype(np.float64) for k in keys}
    return _scan_columns(source, header_index, header, fields)


def _scan_columns(
    source: _CsvSource, header_index: int, header: list[str], fields: dict[str, str]
) -> dict[str, np.ndarray]:
    """A row-by-row read that names the first bad cell; empty cells read as NaN."""
    name = source.name
    positions = {k: header.index(c) for k, c in fields.items()}
    out: dict[str, list[float]] = {k: [] for k in fields}
    reader = csv.reader(source.all_lines()[header_index + 1 :])
    for row in reader:
        line = header_index + 1 + reader.line_num
        if not any(cell.strip() for cell in row):
            continue
        if len(row) != len(header):
            raise GradfenceInputError(
                f"{name}, line {line}: the row has {len(row)} cells where the header has "
                f"{len(header)}; give every row the header's columns."
            )
        for key, position in positions.items():
            cell = row[position].strip()
            if not cell:
                if key == "step":
                    raise GradfenceInputError(
                        f"{name}, line {line}: the step (column {fields[key]!r}) is empty; "
                        "every row needs its step."
                    )
                out[key].append(math.nan)
                continue
            try:
                out[key].append(float(cell))
            except ValueError:
                raise GradfenceInputError(
                    f"{name}, line {line}: column {fields[key]!r} holds {cell!r}, which is not "
                    "a number; write a number (or inf or nan)."
                ) from None
    return {k: np.asarray(v, dtype=np.float64) for k, v in out.items()}


def _row_lines(source: _CsvSource, header_index: int) -> np.ndarray:
    """The line number (from 1) of every data row, for messages."""
    numbers = []
    reader = csv.reader(source.all_lines()[header_index + 1 :])
    for row in reader:
        if any(cell.strip() for cell in row):
            numbers.append(header_index + 1 + reader.line_num)
    return np.asarray(numbers, dtype=np.int64)


def _choose_member(
    source: _CsvSource,
    header_index: int,
    header: list[str],
    members: np.ndarray,
    member: int | None,
) -> int:
    present = np.unique(members)
    if member is not None and member in present:
        return member
    if member is None and len(present) == 1:
        return int(present[0])
    described = _describe_members(source, header_index, header)
    listing = ", ".join(described.get(int(m), str(int(m))) for m in present)
    if member is None:
        raise GradfenceInputError(
            f"{source.name} holds {len(present)} members ({listing}); choose one with --member."
        )
    raise GradfenceInputError(f"{source.name} has no member {member}; its members are {listing}.")


def _describe_members(source: _CsvSource, header_index: int, header: list[str]) -> dict[int, str]:
    """'1 (global-norm at 1.0)' for each member, from its first row."""
    at = {c: header.index(c) for c in ("member", "method", "threshold")}
    described: dict[int, str] = {}
    for row in csv.reader(source.all_lines()[header_index + 1 :]):
        if len(row) != len(header):
            continue
        try:
            index = int(float(row[at["member"]]))
        except ValueError:
            continue
        if index not in described:
            threshold = row[at["threshold"]].strip()
            method = row[at["method"]].strip()
            described[index] = f"{index} ({method}{' at ' + threshold if threshold else ''})"
    return described


# ---------------------------------------------------------------------------------------------
# JSON Lines


def parse_json_lines(
    text: str, name: str, columns: LogColumns | None = None, member: int | None = None
) -> NormLog:
    """Read a JSON Lines log: one object per line, keys as CSV column names."""
    if member is not None:
        raise GradfenceInputError(
            f"{name} is not a metrics.csv of `gradfence train`; the member option applies to "
            "those only."
        )
    numbered = [(i + 1, line) for i, line in enumerate(text.lstrip("\ufeff").splitlines())]
    numbered = [(i, line) for i, line in numbered if line.strip()]
    if not numbered:
        raise GradfenceInputError(f"{name} is empty; a log needs one JSON object per step.")
    try:
        rows = json.loads("[" + ",".join(line for _, line in numbered) + "]")
    except json.JSONDecodeError:
        for number, line in numbered:
            try:
                json.loads(line)
            except json.JSONDecodeError as exc:
                raise GradfenceInputError(
                    f"{name}, line {number}: not a JSON object ({exc.msg}); write one object "
                    "per line."
                ) from None
        raise GradfenceInputError(f"{name} is not JSON Lines; write one object per line.") from None
    line_numbers = np.asarray([i for i, _ in numbered], dtype=np.int64)
    if len(rows) != len(numbered):
        raise GradfenceInputError(f"{name}: write exactly one JSON object on each line.")
    for row, number in zip(rows, line_numbers.tolist(), strict=True):
        if type(row) is not dict:
            raise GradfenceInputError(
                f"{name}, line {number}: the line holds a JSON {type(row).__name__}, not an "
                "object; write one object per step."
            )
    keys: list[str] = []
    seen: set[str] = set()
    for row in rows:
        for key in row:
            if key not in seen:
                seen.add(key)
                keys.append(key)
    wanted = _resolve(name, keys, columns or LogColumns(), metrics=False)
    values: dict[str, np.ndarray] = {}
    for key, column in wanted.columns.items():
        cells = [row.get(column) for row in rows]
        values[key] = _json_column(name, column, key, cells, rows, line_numbers)

    def line_of(row: int) -> int:
        return int(line_numbers[row])

    return _build(name, "jsonl", values, wanted, line_of, None)


def _json_column(
    name: str,
    column: str,
    key: str,
    cells: list[Any],
    rows: list[dict[str, Any]],
    line_numbers: np.ndarray,
) -> np.ndarray:
    kinds = set(map(type, cells))
    if key == "step" and type(None) in kinds:
        at = cells.index(None)
        missing = "has no" if column not in rows[at] else "has a null"
        raise GradfenceInputError(
            f"{name}, line {line_numbers[at]}: the object {missing} {column!r}; every row "
            "needs its step."
        )
    bad = kinds - {int, float, str, type(None)}
    if bad:
        at = next(i for i, c in enumerate(cells) if type(c) in bad)
        raise GradfenceInputError(
            f"{name}, line {line_numbers[at]}: {column!r} holds {json.dumps(cells[at])}, which "
            'is not a number; write a number (or null, "inf" or "nan").'
        )
    try:
        return np.asarray(cells, dtype=np.float64)
    except (ValueError, OverflowError):
        for i, cell in enumerate(cells):
            try:
                float(cell if cell is not None else math.nan)
            except (ValueError, OverflowError):
                raise GradfenceInputError(
                    f"{name}, line {line_numbers[i]}: {column!r} holds {json.dumps(cell)[:40]}, "
                    'which does not read as a number; write a number (or null, "inf" or '
                    '"nan").'
                ) from None
        raise GradfenceInputError(
            f"{name}: the column {column!r} does not read as numbers; write numbers, null, "
            '"inf" or "nan".'
        ) from None


# ---------------------------------------------------------------------------------------------
# Checks shared by both formats


def _build(
    name: str,
    source: str,
    values: dict[str, np.ndarray],
    wanted: _Wanted,
    line_of: Callable[[int], int],
    member: int | None,
) -> NormLog:
    step_column = wanted.columns["step"]
    steps = values["step"]
    bad = np.flatnonzero(~np.isfinite(steps) | (steps != np.floor(steps)))
    if len(bad):
        at = int(bad[0])
        raise GradfenceInputError(
            f"{name}, line {line_of(at)}: the step (column {step_column!r}) is "
            f"{_text(steps[at])}, not a whole number."
        )
    order = np.flatnonzero(np.diff(steps) <= 0)
    if len(order):
        at = int(order[0]) + 1
        now, before = int(steps[at]), int(steps[at - 1])
        if now == before:
            raise GradfenceInputError(
                f"{name}, line {line_of(at)}: step {now} appears a second time; keep one row "
                "per step."
            )
        raise GradfenceInputError(
            f"{name}, line {line_of(at)}: step {now} comes after step {before}; the rows must "
            "be in increasing step order."
        )
    rows = len(steps)
    batch = _batches(name, values, wanted, "batch", wanted.batch_size, rows, line_of)
    small_batch = _batches(
        name, values, wanted, "small_batch", wanted.small_batch_size, rows, line_of
    )
    small_norm = values.get("small_norm")
    if small_norm is not None and batch is not None and small_batch is not None:
        measured = np.isfinite(small_norm) & np.isfinite(batch) & np.isfinite(small_batch)
        wrong = np.flatnonzero(measured & (small_batch >= batch))
        if len(wrong):
            at = int(wrong[0])
            raise GradfenceInputError(
                f"{name}, line {line_of(at)}: the small batch ({small_batch[at]:g}) is not "
                f"smaller than the batch ({batch[at]:g}); the second norm must come from a "
                "smaller batch."
            )
    norm = values["norm"]
    precision = "float64"
    if source == "metrics":
        # The tool writes float32 results at float32's precision ("0.2"): read back, each is
        # the float32 nearest its text, which is the engine's own value.
        finite = norm[np.isfinite(norm)]
        single = finite.astype(np.float32).astype(np.float64)
        if np.array_equal(single, finite) or np.allclose(single, finite, rtol=2**-23, atol=0):
            precision = "float32"
            norm = norm.astype(np.float32).astype(np.float64)
    read_from = dict(wanted.columns)
    return NormLog(
        name=name,
        source=source,
        steps=steps.astype(np.int64),
        norm=norm,
        batch=batch,
        small_norm=small_norm,
        small_batch=small_batch,
        loss=values.get("loss"),
        lr=values.get("lr"),
        member=member,
        precision=precision,
        read_from=read_from,
    )


def _batches(
    name: str,
    values: dict[str, np.ndarray],
    wanted: _Wanted,
    key: str,
    constant: float | None,
    rows: int,
    line_of: Callable[[int], int],
) -> np.ndarray | None:
    if constant is not None:
        return np.full(rows, float(constant))
    column = values.get(key)
    if column is None:
        return None
    known = np.isfinite(column)
    bad = np.flatnonzero(
        (~known & ~np.isnan(column)) | (known & ((column < 1) | (column != np.floor(column))))
    )
    if len(bad):
        at = int(bad[0])
        raise GradfenceInputError(
            f"{name}, line {line_of(at)}: column {wanted.columns[key]!r} holds "
            f"{_text(column[at])}, which is not a positive whole number of examples."
        )
    return column


def _text(value: float) -> str:
    return f"{value:g}" if math.isfinite(value) else str(value)
