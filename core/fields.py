"""Typed, documented dataclass fields and the strict validator that reads TOML tables into them.

Each field carries its help text, unit, range and choices as metadata, so the same declaration
drives validation messages, the CLI and the app's generated form.
"""

from __future__ import annotations

import dataclasses
import difflib
import math
import types
import typing
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, TypeVar

from core.errors import GradfenceInputError

T = TypeVar("T")


@dataclass(frozen=True)
class FieldInfo:
    """What a person may put in one key, and how the form names it."""

    help: str
    unit: str = ""
    lo: float | None = None
    hi: float | None = None
    lo_open: bool = False
    fixed_choices: tuple[str, ...] = ()
    choices_from: Callable[[], tuple[str, ...]] | None = None  # a registry read when asked
    label: str = ""  # the plain name shown to people; the key itself goes in the tooltip

    @property
    def choices(self) -> tuple[str, ...]:
        return self.choices_from() if self.choices_from is not None else self.fixed_choices


def option(
    default: Any,
    help: str,
    *,
    label: str = "",
    unit: str = "",
    lo: float | None = None,
    hi: float | None = None,
    lo_open: bool = False,
    choices: Sequence[str] | Callable[[], tuple[str, ...]] = (),
) -> Any:
    """Declare a dataclass field with its documentation and allowed values."""
    fixed, dynamic = ((), choices) if callable(choices) else (tuple(choices), None)
    info = FieldInfo(help, unit, lo, hi, lo_open, fixed, dynamic, label)
    return dataclasses.field(default=default, metadata={"info": info})


def field_info(cls: type, name: str) -> FieldInfo:
    """The documentation and limits of one field."""
    for f in dataclasses.fields(cls):
        if f.name == name:
            info = f.metadata.get("info")
            if isinstance(info, FieldInfo):
                return info
    raise KeyError(name)


class Reader:
    """Reads raw TOML values into typed dataclasses, failing with one sentence per problem."""

    def __init__(self, source: str) -> None:
        self.source = source

    def fail(self, key_path: str, message: str) -> typing.NoReturn:
        where = f"{key_path} " if key_path else ""
        raise GradfenceInputError(f"{self.source}: {where}{message}")

    def table(self, cls: type[T], raw: Any, path: str) -> T:
        if not isinstance(raw, Mapping):
            self.fail(path, f"must be a table, not {describe(raw)}.")
        hints = typing.get_type_hints(cls)
        names = [f.name for f in dataclasses.fields(cls)]  # type: ignore[arg-type]
        for key in raw:
            if key not in names:
                self.fail_unknown(path, str(key), names)
        values: dict[str, Any] = {}
        for name in names:
            if name in raw:
                values[name] = self.value(cls, name, hints[name], raw[name], join(path, name))
        return cls(**values)

    def fail_unknown(self, path: str, key: str, allowed: Sequence[str]) -> typing.NoReturn:
        close = difflib.get_close_matches(key, allowed, n=1, cutoff=0.6)
        hint = f'; did you mean "{join(path, close[0])}"?' if close else "."
        where = f"[{path}]" if path else "the top level"
        self.fail(
            "",
            f'unknown key "{join(path, key)}"{hint} Keys allowed in {where}: {", ".join(allowed)}.',
        )

    def value(self, cls: type, name: str, hint: Any, raw: Any, path: str) -> Any:
        info = field_info(cls, name)
        if dataclasses.is_dataclass(hint):
            return self.table(hint, raw, path)  # type: ignore[arg-type]
        return self.scalar_or_list(hint, raw, path, info)

    def scalar_or_list(self, hint: Any, raw: Any, path: str, info: FieldInfo) -> Any:
        args = typing.get_args(hint)
        origin = typing.get_origin(hint)
        if origin in (types.UnionType, typing.Union) and type(None) in args:
            inner = next(a for a in args if a is not type(None))
            return self.scalar_or_list(inner, raw, path, info)
        if origin is tuple:
            item = args[0]
            if not isinstance(raw, list):
                self.fail(path, f"must be a list of {noun(item)}s, not {describe(raw)}.")
            if not raw:
                self.fail(path, f"must list at least one {noun(item)}.")
            return tuple(self.scalar(item, v, f"{path}[{i}]", info) for i, v in enumerate(raw))
        return self.scalar(hint, raw, path, info)

    def scalar(self, kind: Any, raw: Any, path: str, info: FieldInfo) -> Any:
        if kind is bool:
            if not isinstance(raw, bool):
                self.fail(path, f"must be true or false, not {describe(raw)}.")
            return raw
        if kind is int:
            if isinstance(raw, bool) or not isinstance(raw, int):
                self.fail(path, f"must be a whole number, not {describe(raw)}.")
            self.check_range(raw, path, info, "whole number")
            return raw
        if kind is float:
            if isinstance(raw, bool) or not isinstance(raw, int | float):
                self.fail(path, f"must be a number, not {describe(raw)}.")
            value = float(raw)
            if not math.isfinite(value):
                self.fail(path, f"must be a finite number, not {raw!r}.")
            self.check_range(value, path, info, "number")
            return value
        if kind is str:
            if not isinstance(raw, str):
                self.fail(path, f"must be a string, not {describe(raw)}.")
            if info.choices and raw not in info.choices:
                close = difflib.get_close_matches(raw, info.choices, n=1, cutoff=0.5)
                hint = f' (did you mean "{close[0]}"?)' if close else ""
                self.fail(
                    path,
                    f'= "{raw}" is not allowed; choose one of {", ".join(info.choices)}{hint}.',
                )
            return raw
        raise TypeError(f"unsupported field type {kind!r}")  # a programming error, not input

    def check_range(self, value: float, path: str, info: FieldInfo, what: str) -> None:
        low_ok = info.lo is None or (value > info.lo if info.lo_open else value >= info.lo)
        high_ok = info.hi is None or value <= info.hi
        if not (low_ok and high_ok):
            self.fail(
                path, f"= {value:g} is out of range; it must be {describe_range(info, what)}."
            )


def describe_range(info: FieldInfo, what: str) -> str:
    """'a number greater than 0 and at most 10', for messages and tooltips."""
    parts = []
    if info.lo is not None:
        parts.append(f"{'greater than' if info.lo_open else 'at least'} {info.lo:g}")
    if info.hi is not None:
        parts.append(f"at most {info.hi:g}")
    return f"a {what} " + " and ".join(parts) if parts else f"a {what}"


def join(path: str, key: str) -> str:
    return f"{path}.{key}" if path else key


def noun(kind: Any) -> str:
    return {int: "whole number", float: "number", str: "string", bool: "boolean"}.get(kind, "value")


def describe(raw: Any) -> str:
    """A short description of a wrong value for error messages."""
    if isinstance(raw, bool):
        return f"the boolean {str(raw).lower()}"
    if isinstance(raw, str):
        return f'the string "{raw}"'
    if isinstance(raw, int | float):
        return f"the number {raw}"
    if isinstance(raw, list):
        return "a list"
    if isinstance(raw, Mapping):
        return "a table"
    return f"a {type(raw).__name__}"
