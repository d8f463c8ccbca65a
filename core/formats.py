"""Numbers as text in the files the tool writes: shortest round-trip digits, inf and nan spelt
out, and float32 results at float32's precision (0.2, not 0.20000000298023224)."""

from __future__ import annotations

import math
from typing import Any

import numpy as np


def format_value(value: float, single: bool = False) -> str:
    """Shortest text that reads back to the same number (the same float32 with `single`), so
    reruns give identical files; whole numbers without a point; `inf`, `-inf`, `nan`."""
    if math.isnan(value):
        return "nan"
    if math.isinf(value):
        return "inf" if value > 0 else "-inf"
    if value == int(value) and abs(value) < 1e15:
        return str(int(value))
    if single and abs(value) <= FLOAT32_MAX:
        return str(np.float32(value))
    return repr(float(value))  # beyond float32's range it was not a float32 result: all digits


FLOAT32_MAX = float(np.finfo(np.float32).max)


def single(value: float) -> float:
    """`value` rounded to float32, as a Python float: what a float32 result really knows
    (infinite beyond float32's range, as float32 arithmetic would have made it)."""
    with np.errstate(over="ignore"):
        return float(np.float32(value))


def parse_value(text: str) -> float:
    """A number written by `format_value` (or an empty cell, read as NaN)."""
    return float(text) if text != "" else math.nan


def json_number(value: float) -> float | str | None:
    """A number for a JSON file: finite as it is, NaN as null, infinities as "inf" / "-inf"
    (JSON has no infinity; a reader that wants numbers gets an unmistakable string)."""
    if math.isnan(value):
        return None
    if math.isinf(value):
        return "inf" if value > 0 else "-inf"
    return value


def json_ready(value: Any) -> Any:
    """`value` with every float made JSON-safe by `json_number`, through dicts and lists."""
    if isinstance(value, float):
        return json_number(value)
    if isinstance(value, dict):
        return {k: json_ready(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [json_ready(v) for v in value]
    return value


def number_from_json(value: Any) -> float:
    """The inverse of `json_number`: null is NaN, "inf" and "-inf" are infinities."""
    if value is None:
        return math.nan
    if isinstance(value, str) and value in ("inf", "-inf", "nan"):
        return float(value)
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise ValueError(f"{value!r} is not a number")
    return float(value)
