"""Study files (`*.study.toml`): a title and ordered entries (notes, fans, maps and logs).

A fan or map entry names a preset (relative to the study) and/or carries an inline
[entry.scenario] table, plus [entry.set] dotted overrides. Entries are validated as strictly as
presets; an error names the entry by position and title.

Older files still load: a schema-1 `*.notebook.toml` called fans "run" and maps "sweep", and its
scenarios had a [sweep] table; each is read as today's form, with one notice per file.

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
from core.log_entry import LogSource, log_entry_table, parse_log_entry
from core.scenario import (
    OLD_SCHEMAS,
    SCHEMA,
    Scenario,
    parse_scenario,
    parse_toml,
    read_text,
    upgrade_schema,
)

STUDY_SUFFIX = ".study.toml"
OLD_SUFFIX = ".notebook.toml"  # schema 1
ENTRY_KINDS = ("note", "fan", "map", "log")
SCENARIO_KINDS = ("fan", "map")
OLD_KINDS = {"run": "fan", "sweep": "map"}  # schema 1
ENTRY_KEYS = {
    "note": ("kind", "title", "text"),
    "fan": ("kind", "title", "preset", "scenario", "set"),
    "map": ("kind", "title", "preset", "scenario", "set"),
    "log": ("kind", "title", "log", "member", "columns", "advice"),
}


@dataclass(frozen=True)
class EntryRecord:
    """One entry as a file holds it. Equality is what a reader sees: kind, title, note text,
    scenario, and a log's source."""

    kind: str
    title: str
    text: str = ""  # notes: Markdown
    scenario: Scenario | None = None  # fans and maps: resolved
    log: LogSource | None = None  # logs: which file, read and advised how
    preset: str | None = field(default=None, compare=False)  # as written in the file
    # How the entry was written, to write it back the same way while its scenario is unedited:
    raw: Mapping[str, Any] | None = field(default=None, compare=False, repr=False)
    origin: Scenario | None = field(default=None, compare=False, repr=False)
    preset_path: Path | None = field(default=None, compare=False, repr=False)  # absolute


@dataclass(frozen=True)
class StudyFile:
    title: str
    entries: tuple[EntryRecord, ...]
    path: Path | None = None
    notices: tuple[str, ...] = ()  # e.g. "schema 1, read as schema 2"


def is_study(path: Path) -> bool:
    return path.name.endswith((STUDY_SUFFIX, OLD_SUFFIX))


def study_stem(path: Path) -> str:
    """`demo` for demo.study.toml (and for an older demo.notebook.toml)."""
    for suffix in (STUDY_SUFFIX, OLD_SUFFIX):
        if path.name.endswith(suffix):
            return path.name[: -len(suffix)]
    return path.stem


def load_study(path: str | Path) -> StudyFile:
    path = Path(path)
    return loads_study(read_text(path), path)


def loads_study(text: str, path: Path, source: str | None = None) -> StudyFile:
    """Study text that belongs at `path` (presets resolve beside it), e.g. a recovery copy."""
    source = source or str(path)
    raw = parse_toml(text, source) if text.strip() else {}
    if not raw:  # nothing at all, or comments only
        raise GradfenceInputError(
            f"{source}: is empty; a study has a title and [[entry]] tables (File > New study "
            "in the app makes one)."
        )
    return parse_study(raw, path, source)


def parse_study(raw: Mapping[str, Any], path: Path, source: str | None = None) -> StudyFile:
    source = source or str(path)
    allowed = ("schema", "title", "entry")
    for key in raw:
        if key not in allowed:
            raise GradfenceInputError(
                f'{source}: unknown key "{key}"; a study has {", ".join(allowed)}.'
            )
    schema = raw.get("schema", SCHEMA)
    if isinstance(schema, bool) or (schema != SCHEMA and schema not in OLD_SCHEMAS):
        raise GradfenceInputError(
            f"{source}: schema = {schema!r} is not supported; this version reads schema = "
            f"{SCHEMA} (and the older {', '.join(map(str, OLD_SCHEMAS))})."
        )
    title = raw.get("title", study_stem(path))
    if not isinstance(title, str):
        raise GradfenceInputError(f"{source}: title must be a string, not {describe(title)}.")
    items = raw.get("entry", [])
    if not isinstance(items, list):
        raise GradfenceInputError(f"{source}: entry must be [[entry]] tables.")
    notices: list[str] = []
    old = schema in OLD_SCHEMAS
    if old:
        where = " to a .study.toml file" if path.name.endswith(OLD_SUFFIX) else ""
        notices.append(
            f'{source}: schema 1, read as schema 2 (entries "run" are fans, "sweep" are maps); '
            f"saving writes schema 2{where}."
        )
    entries = tuple(
        _parse_entry(_upgrade_entry(item) if old else item, i, path, source, notices)
        for i, item in enumerate(items)
    )
    return StudyFile(title, entries, path, tuple(dict.fromkeys(notices)))


def _upgrade_entry(item: Any) -> Any:
    """A schema-1 [[entry]] table in today's words."""
    if not isinstance(item, Mapping):
        return item
    out = dict(item)
    kind = out.get("kind")
    if isinstance(kind, str) and kind in OLD_KINDS:
        out["kind"] = OLD_KINDS[kind]
    inline = out.get("scenario")
    if isinstance(inline, Mapping):
        upgraded = upgrade_schema({**inline, "schema": 1})
        upgraded.pop("schema")
        if "schema" in inline:
            upgraded["schema"] = SCHEMA
        out["scenario"] = upgraded
    overrides = out.get("set")
    if isinstance(overrides, Mapping):
        out["set"] = {_upgrade_key(str(k)): v for k, v in overrides.items()}
    return out


def _upgrade_key(key: str) -> str:
    parts = key.split(".")
    if parts[0] == "sweep":
        parts[0] = "map"
    if len(parts) == 3 and parts[0] == "clip" and parts[2] == "sweep":
        parts[2] = "map_thresholds"
    return ".".join(parts)


def _parse_entry(item: Any, index: int, path: Path, source: str, notices: list[str]) -> EntryRecord:
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
        return EntryRecord(kind, title, text=text)
    if kind == "log":
        return EntryRecord(kind, title, log=parse_log_entry(item, path.parent, where))
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
        if raw.get("schema", SCHEMA) in OLD_SCHEMAS:
            raw = upgrade_schema(raw)
            notices.append(
                f"{preset_path}: schema 1, read as schema 2 ([sweep] is now [map]); the file "
                "itself is left as it is."
            )
    inline = item.get("scenario", {})
    if not isinstance(inline, Mapping):
        raise GradfenceInputError(f"{where}: scenario must be a table, not {describe(inline)}.")
    raw = _merge(raw, inline)
    if preset is None and not inline:
        raise GradfenceInputError(f"{where} needs a preset or a [entry.scenario] table.")
    raw["schema"] = SCHEMA
    scenario = parse_scenario(raw, where)
    overrides = item.get("set", {})
    if not isinstance(overrides, Mapping):
        raise GradfenceInputError(f"{where}: set must be a table of dotted keys.")
    if overrides:
        scenario = scenario.with_overrides(overrides, f"{where} [entry.set]")
    return EntryRecord(
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


def entry_table(entry: EntryRecord, folder: Path) -> dict[str, Any]:
    """The [[entry]] table of `entry` in a study saved in `folder`."""
    if entry.kind == "note":
        return {"kind": "note", "title": entry.title, "text": entry.text}
    if entry.kind == "log":
        if entry.log is None:
            raise ValueError("a log entry needs its log")
        return {"kind": "log", "title": entry.title, **log_entry_table(entry.log, folder)}
    if entry.scenario is None:
        raise ValueError(f"a {entry.kind} entry needs a scenario")
    if entry.raw is not None and entry.scenario == entry.origin:
        table = copy.deepcopy(dict(entry.raw))
        table["kind"], table["title"] = entry.kind, entry.title
        if entry.preset_path is not None:
            table["preset"] = Path(os.path.relpath(entry.preset_path, folder)).as_posix()
        return table
    return {"kind": entry.kind, "title": entry.title, "scenario": entry.scenario.to_dict()}


def dumps_study(study: StudyFile, folder: Path) -> str:
    import tomli_w

    tables = [entry_table(e, folder) for e in study.entries]
    document = {"schema": SCHEMA, "title": study.title, "entry": tables}
    return tomli_w.dumps(document, multiline_strings=True)


def save_study(study: StudyFile, path: Path) -> None:
    """Write atomically: the previous file stays whole until the new one is complete."""
    write_text_atomic(path, dumps_study(study, path.resolve().parent))
