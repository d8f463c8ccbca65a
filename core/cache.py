"""Results cached beside a study, keyed by the hash of the entry's resolved scenario.

`demo.study.toml` keeps its results in `demo.results/`: `fan-<hash>.npz` holds a fan entry's
arrays (every metric per batch size), `map-<hash>.json` a map entry's table and norm profile. A
file is used only when its hash, its stored scenario and the Gradfence version all match the
entry's, so a changed scenario finds nothing and never shows another scenario's results.

Every file read back is checked. One that does not hold what it should (cut short, hand-edited,
another shape) is set aside under a `.bad` name with a one-line notice, and the entry trains
again; it is never fatal and never silently kept. Files are written atomically.
"""

from __future__ import annotations

import io
import json
import math
import zipfile
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from core import __version__
from core.fan import fan_members
from core.fan_model import FanModel, StackData
from core.fileio import aside_path, atomic_writer, json_kind, write_text_atomic
from core.map_model import MapModel
from core.maps import COLUMNS
from core.profile import NormProfile
from core.scenario import Scenario
from core.study_file import study_stem

CachedModel = FanModel | MapModel


@dataclass(frozen=True)
class Lookup:
    """What a cache look-up found: `found` results, or nothing, with a notice when a file was
    set aside."""

    found: bool
    notice: str = ""


class BadCacheFileError(Exception):
    """A cache file that does not hold what it should; the message says what is wrong."""


def cache_dir(study_path: Path) -> Path:
    return study_path.parent / f"{study_stem(study_path)}.results"


def _identity(scenario: Scenario) -> str:
    return json.dumps({"version": __version__, "scenario": scenario.content()}, sort_keys=True)


def path_for(folder: Path, model: CachedModel) -> Path:
    kind = "fan" if isinstance(model, FanModel) else "map"
    suffix = "npz" if isinstance(model, FanModel) else "json"
    return folder / f"{kind}-{model.scenario.hash()}.{suffix}"


def set_aside(path: Path, why: str) -> str:
    """Rename a bad file out of the way (never delete what a person might want to look at)."""
    target = aside_path(path)
    try:
        path.replace(target)
    except OSError as exc:
        return f"{path}: {why}; it could not be set aside ({exc.strerror}), so it is ignored."
    return f"{path}: {why}; set aside as {target.name}, the entry trains again."


# -- fans -------------------------------------------------------------------------------------


def _fan_arrays(model: FanModel) -> dict[str, np.ndarray]:
    arrays: dict[str, np.ndarray] = {"identity": np.array(_identity(model.scenario))}
    for batch, stack in model.stacks.items():
        arrays[f"b{batch}/steps"] = stack.steps
        for name, values in stack.values.items():
            arrays[f"b{batch}/{name}"] = values
        if stack.example_norms is not None and stack.outlier is not None:
            arrays[f"b{batch}/example_norms"] = stack.example_norms
            arrays[f"b{batch}/outlier"] = stack.outlier
    return arrays


def _read_fan(path: Path, model: FanModel) -> dict[int, StackData] | None:
    """The stacks in `path`, None when it holds another scenario's; raises BadCacheFileError."""
    try:
        # Opened here, not by np.load, which leaves its file open when the zip does not read.
        with path.open("rb") as f, np.load(f, allow_pickle=False) as data:
            if "identity" not in data:
                raise BadCacheFileError("has no identity record")
            if str(data["identity"]) != _identity(model.scenario):
                return None
            members = fan_members(model.scenario)
            stacks = {}
            for batch in model.batch_sizes:
                stack = StackData.empty(model.scenario, batch, members)
                steps = np.array(data[f"b{batch}/steps"])
                if steps.shape != stack.steps.shape or not np.array_equal(steps, stack.steps):
                    raise BadCacheFileError(f"has other logged steps for batch size {batch}")
                for name in stack.names:
                    values = np.array(data[f"b{batch}/{name}"], dtype=np.float64)
                    if values.shape != stack.values[name].shape:
                        raise BadCacheFileError(
                            f"has {name} of another shape for batch size {batch}"
                        )
                    stack.values[name] = values
                if f"b{batch}/example_norms" in data:
                    norms = np.array(data[f"b{batch}/example_norms"], dtype=np.float64)
                    flags = np.array(data[f"b{batch}/outlier"], dtype=bool)
                    if norms.shape != (len(members), batch) or flags.shape != norms.shape:
                        raise BadCacheFileError(f"has example norms of another shape at {batch}")
                    stack.example_norms, stack.outlier = norms, flags
                stack.mark_finished()
                stacks[batch] = stack
    except (KeyError, ValueError, OSError, EOFError, zipfile.BadZipFile) as exc:
        if isinstance(exc, FileNotFoundError):
            raise
        raise BadCacheFileError(f"cannot be read ({type(exc).__name__}: {exc})") from None
    return stacks


# -- maps -------------------------------------------------------------------------------------


def _read_map(path: Path, model: MapModel) -> tuple[list[dict[str, Any]], NormProfile] | None:
    try:
        document = json.loads(path.read_text(encoding="utf-8"))
    except UnicodeDecodeError:
        raise BadCacheFileError("is not UTF-8 text") from None
    except ValueError as exc:
        raise BadCacheFileError(f"is not JSON ({exc})") from None
    if not isinstance(document, dict):
        raise BadCacheFileError(f"holds {json_kind(document)}, not a table")
    if document.get("identity") != _identity(model.scenario):
        return None
    rows = document.get("rows")
    if not isinstance(rows, list):
        raise BadCacheFileError("has no list of rows")
    checked = [_check_row(r, i) for i, r in enumerate(rows)]
    raw = document.get("profile")
    if not isinstance(raw, dict):
        raise BadCacheFileError("has no norm profile")
    try:
        profile = NormProfile.from_json(raw)
    except (KeyError, TypeError, ValueError) as exc:
        raise BadCacheFileError(f"has a norm profile that does not read ({exc})") from None
    return checked, profile


def _check_row(row: Any, index: int) -> dict[str, Any]:
    if not isinstance(row, dict) or set(row) != set(COLUMNS):
        raise BadCacheFileError(f"row {index + 1} does not have the map table's columns")
    out = dict(row)
    for column in ("method", "label"):
        if not isinstance(out[column], str):
            raise BadCacheFileError(f"row {index + 1} has a {column} that is not text")
    for column in ("batch_size", "seed"):
        if isinstance(out[column], bool) or not isinstance(out[column], int):
            raise BadCacheFileError(f"row {index + 1} has a {column} that is not a whole number")
    if not isinstance(out["diverged"], bool):
        raise BadCacheFileError(f"row {index + 1} has a diverged flag that is not true or false")
    for column in COLUMNS:
        if column in ("method", "label", "batch_size", "seed", "diverged"):
            continue
        value = out[column]
        if value is None:
            out[column] = math.nan
        elif isinstance(value, str) and value in ("inf", "-inf"):
            out[column] = float(value)
        elif isinstance(value, bool) or not isinstance(value, int | float):
            raise BadCacheFileError(f"row {index + 1} has a {column} that is not a number")
        else:
            out[column] = float(value)
    return out


def _json_rows(rows: list[dict[str, Any]]) -> list[dict[str, Any]]:
    from core.formats import json_number

    return [
        {k: json_number(v) if isinstance(v, float) else v for k, v in row.items()} for row in rows
    ]


# -- both -------------------------------------------------------------------------------------


def load(folder: Path, model: CachedModel) -> Lookup:
    """Fill `model` from the cache when it holds this scenario's results."""
    path = path_for(folder, model)
    if not path.is_file():
        return Lookup(False)
    try:
        if isinstance(model, FanModel):
            stacks = _read_fan(path, model)
            if stacks is None:
                return Lookup(False)
            model.restore(stacks)
        else:
            found = _read_map(path, model)
            if found is None:
                return Lookup(False)
            model.restore(*found)
    except FileNotFoundError:
        return Lookup(False)
    except BadCacheFileError as exc:
        return Lookup(False, set_aside(path, str(exc)))
    return Lookup(True)


def holds(folder: Path, model: CachedModel) -> bool:
    """The cache holds readable results of the model's current scenario."""
    path = path_for(folder, model)
    if not path.is_file():
        return False
    try:
        if isinstance(model, FanModel):
            with path.open("rb") as f, np.load(f, allow_pickle=False) as data:
                return "identity" in data and str(data["identity"]) == _identity(model.scenario)
        document = json.loads(path.read_text(encoding="utf-8"))
        return isinstance(document, dict) and document.get("identity") == _identity(model.scenario)
    except (OSError, ValueError, KeyError, EOFError, zipfile.BadZipFile):
        return False


def store(folder: Path, model: CachedModel) -> Path | None:
    """Cache a finished entry (unless these very results are on file already); None when it has
    nothing finished to keep. Raises OSError when the folder cannot be written."""
    if not model.has_current_results():
        return None
    path = path_for(folder, model)
    if holds(folder, model):
        return path
    if isinstance(model, FanModel):
        buffer = io.BytesIO()
        np.savez_compressed(buffer, allow_pickle=False, **_fan_arrays(model))
        with atomic_writer(path, "wb") as f:
            f.write(buffer.getvalue())  # type: ignore[arg-type]
        return path
    document = {
        "identity": _identity(model.scenario),
        "rows": _json_rows(model.rows),
        "profile": model.profile.as_json() if model.profile is not None else None,
    }
    write_text_atomic(path, json.dumps(document, allow_nan=False))
    return path
