"""Notebook files (`*.notebook.toml`): a title and ordered entries (notes, runs, sweeps).

A run or sweep entry names a preset (relative to the notebook) and/or carries an inline
[entry.scenario] table, plus [entry.set] dotted overrides. Entries are validated as strictly as
presets; an error names the entry by position and title.
"""

from __future__ import annotations

import copy
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from core.errors import GradfenceInputError
from core.fields import describe
from core.scenario import SCHEMA, Scenario, parse_scenario, parse_toml, read_text

ENTRY_KINDS = ("note", "run", "sweep")
ENTRY_KEYS = {
    "note": ("kind", "title", "text"),
    "run": ("kind", "title", "preset", "scenario", "set"),
    "sweep": ("kind", "title", "preset", "scenario", "set"),
}


@dataclass(frozen=True)
class Entry:
    kind: str
    title: str
    text: str = ""  # notes: Markdown
    scenario: Scenario | None = None  # runs and sweeps: resolved
    preset: str | None = None  # as written in the notebook


@dataclass(frozen=True)
class Notebook:
    title: str
    entries: tuple[Entry, ...]
    path: Path | None = None


def load_notebook(path: str | Path) -> Notebook:
    path = Path(path)
    return parse_notebook(parse_toml(read_text(path), str(path)), path)


def parse_notebook(raw: Mapping[str, Any], path: Path) -> Notebook:
    source = str(path)
    allowed = ("schema", "title", "entry")
    for key in raw:
        if key not in allowed:
            raise GradfenceInputError(
                f'{source}: unknown key "{key}"; a notebook has {", ".join(allowed)}.'
            )
    if raw.get("schema", SCHEMA) != SCHEMA:
        raise GradfenceInputError(
            f"{source}: schema = {raw.get('schema')!r} is not supported; "
            f"this version reads schema = {SCHEMA}."
        )
    title = raw.get("title", path.stem)
    if not isinstance(title, str):
        raise GradfenceInputError(f"{source}: title must be a string, not {describe(title)}.")
    items = raw.get("entry", [])
    if not isinstance(items, list):
        raise GradfenceInputError(f"{source}: entry must be [[entry]] tables.")
    entries = tuple(_parse_entry(item, i, path) for i, item in enumerate(items))
    return Notebook(title, entries, path)


def _parse_entry(item: Any, index: int, path: Path) -> Entry:
    where = f"{path}: entry {index + 1}"
    if not isinstance(item, Mapping):
        raise GradfenceInputError(f"{where} must be a table, not {describe(item)}.")
    title = item.get("title", f"Entry {index + 1}")
    if not isinstance(title, str):
        raise GradfenceInputError(f"{where}: title must be a string, not {describe(title)}.")
    where = f'{path}: entry {index + 1} ("{title}")'
    kind = item.get("kind")
    if kind not in ENTRY_KINDS:
        raise GradfenceInputError(
            f"{where}: kind = {kind!r} is not allowed; choose one of {', '.join(ENTRY_KINDS)}."
        )
    for key in item:
        if key not in ENTRY_KEYS[kind]:
            raise GradfenceInputError(
                f'{where}: unknown key "{key}" for a {kind} entry; '
                f"allowed: {', '.join(ENTRY_KEYS[kind])}."
            )
    if kind == "note":
        text = item.get("text", "")
        if not isinstance(text, str):
            raise GradfenceInputError(f"{where}: text must be a string, not {describe(text)}.")
        return Entry(kind, title, text=text)
    raw: dict[str, Any] = {}
    preset = item.get("preset")
    if preset is not None:
        if not isinstance(preset, str):
            raise GradfenceInputError(
                f"{where}: preset must be a path string, not {describe(preset)}."
            )
        preset_path = (path.parent / preset).resolve()
        try:
            raw = parse_toml(read_text(preset_path), str(preset_path))
        except GradfenceInputError as exc:
            raise GradfenceInputError(f"{where}: preset {preset}: {exc}") from None
    inline = item.get("scenario", {})
    if not isinstance(inline, Mapping):
        raise GradfenceInputError(f"{where}: scenario must be a table, not {describe(inline)}.")
    raw = _merge(raw, inline)
    if preset is None and not inline:
        raise GradfenceInputError(f"{where} needs a preset or a [entry.scenario] table.")
    scenario = parse_scenario(raw, where)
    overrides = item.get("set", {})
    if not isinstance(overrides, Mapping):
        raise GradfenceInputError(f"{where}: set must be a table of dotted keys.")
    if overrides:
        scenario = scenario.with_overrides(overrides, f"{where} [entry.set]")
    return Entry(kind, title, scenario=scenario, preset=preset)


def _merge(base: Mapping[str, Any], top: Mapping[str, Any]) -> dict[str, Any]:
    """`top` over `base`, table by table ([[clip]] lists are replaced whole)."""
    out = copy.deepcopy(dict(base))
    for key, value in top.items():
        if isinstance(value, Mapping) and isinstance(out.get(key), Mapping):
            out[key] = _merge(out[key], value)
        else:
            out[key] = copy.deepcopy(value)
    return out


def is_notebook(path: Path) -> bool:
    return path.name.endswith(".notebook.toml")
