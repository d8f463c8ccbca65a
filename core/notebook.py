"""Notebook files (`*.notebook.toml`): a title and ordered entries (notes, runs, sweeps).

A run or sweep entry names a preset (relative to the notebook) and/or carries an inline
[entry.scenario] table, plus [entry.set] dotted overrides. Entries are validated as strictly as
presets; an error names the entry by position and title.

Saving writes an unedited entry back as it was written (its preset reference, inline table and
overrides, the preset path made relative to the new folder); an entry whose scenario was edited is
written as a full inline scenario, so the file always reopens to the scenario on screen.
"""

from __future__ import annotations

import copy
import os
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from core.errors import GradfenceInputError
from core.fields import describe
from core.fileio import write_text_atomic
from core.scenario import SCHEMA, Scenario, parse_scenario, parse_toml, read_text

NOTEBOOK_SUFFIX = ".notebook.toml"
ENTRY_KINDS = ("note", "run", "sweep")
ENTRY_KEYS = {
    "note": ("kind", "title", "text"),
    "run": ("kind", "title", "preset", "scenario", "set"),
    "sweep": ("kind", "title", "preset", "scenario", "set"),
}


@dataclass(frozen=True)
class Entry:
    """One entry. Equality is what a reader sees: kind, title, note text and scenario."""

    kind: str
    title: str
    text: str = ""  # notes: Markdown
    scenario: Scenario | None = None  # runs and sweeps: resolved
    preset: str | None = field(default=None, compare=False)  # as written in the notebook
    # How the entry was written, to write it back the same way while its scenario is unedited:
    raw: Mapping[str, Any] | None = field(default=None, compare=False, repr=False)
    origin: Scenario | None = field(default=None, compare=False, repr=False)
    preset_path: Path | None = field(default=None, compare=False, repr=False)  # absolute


@dataclass(frozen=True)
class Notebook:
    title: str
    entries: tuple[Entry, ...]
    path: Path | None = None


def load_notebook(path: str | Path) -> Notebook:
    path = Path(path)
    return parse_notebook(parse_toml(read_text(path), str(path)), path)


def loads_notebook(text: str, path: Path, source: str | None = None) -> Notebook:
    """Notebook text that belongs at `path` (presets resolve beside it), e.g. a recovery copy."""
    return parse_notebook(parse_toml(text, source or str(path)), path, source)


def parse_notebook(raw: Mapping[str, Any], path: Path, source: str | None = None) -> Notebook:
    source = source or str(path)
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
    entries = tuple(_parse_entry(item, i, path, source) for i, item in enumerate(items))
    return Notebook(title, entries, path)


def _parse_entry(item: Any, index: int, path: Path, source: str) -> Entry:
    where = f"{source}: entry {index + 1}"
    if not isinstance(item, Mapping):
        raise GradfenceInputError(f"{where} must be a table, not {describe(item)}.")
    title = item.get("title", f"Entry {index + 1}")
    if not isinstance(title, str):
        raise GradfenceInputError(f"{where}: title must be a string, not {describe(title)}.")
    where = f'{source}: entry {index + 1} ("{title}")'
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
    preset_path = None
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
    return Entry(
        kind,
        title,
        scenario=scenario,
        preset=preset,
        raw=copy.deepcopy(dict(item)),
        origin=scenario,
        preset_path=preset_path,
    )


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
    return path.name.endswith(NOTEBOOK_SUFFIX)


def entry_table(entry: Entry, folder: Path) -> dict[str, Any]:
    """The [[entry]] table of `entry` in a notebook saved in `folder`."""
    if entry.kind == "note":
        return {"kind": "note", "title": entry.title, "text": entry.text}
    if entry.scenario is None:
        raise ValueError(f"a {entry.kind} entry needs a scenario")
    if entry.raw is not None and entry.scenario == entry.origin:
        table = copy.deepcopy(dict(entry.raw))
        table["kind"], table["title"] = entry.kind, entry.title
        if entry.preset_path is not None:
            table["preset"] = Path(os.path.relpath(entry.preset_path, folder)).as_posix()
        return table
    return {"kind": entry.kind, "title": entry.title, "scenario": entry.scenario.to_dict()}


def dumps_notebook(notebook: Notebook, folder: Path) -> str:
    import tomli_w

    tables = [entry_table(e, folder) for e in notebook.entries]
    document = {"schema": SCHEMA, "title": notebook.title, "entry": tables}
    return tomli_w.dumps(document, multiline_strings=True)


def save_notebook(notebook: Notebook, path: Path) -> None:
    """Write atomically: the previous file stays whole until the new one is complete."""
    write_text_atomic(path, dumps_notebook(notebook, path.resolve().parent))
