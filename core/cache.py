"""Results cached beside a notebook, keyed by the hash of the entry's resolved scenario.

`demo.notebook.toml` keeps its results in `demo.results/`: `run-<hash>.npz` holds a run entry's
fan (steps and every metric per batch size), `sweep-<hash>.json` a sweep entry's table and norm
profile. A file is used only when its hash, its stored scenario and the Gradfence version all
match the entry's, so a changed scenario finds nothing and never shows another scenario's results.
Cache files are written atomically; one that cannot be read counts as absent.
"""

from __future__ import annotations

import io
import json
import zipfile
from pathlib import Path
from typing import Any

import numpy as np

from core import __version__
from core.fan import fan_members
from core.fileio import atomic_writer, write_text_atomic
from core.notebook import NOTEBOOK_SUFFIX
from core.profile import NormProfile
from core.run_model import DONE, RunEntryModel, StackData
from core.scenario import Scenario
from core.sweep_model import SweepEntryModel


def cache_dir(notebook_path: Path) -> Path:
    name = notebook_path.name
    stem = name[: -len(NOTEBOOK_SUFFIX)] if name.endswith(NOTEBOOK_SUFFIX) else notebook_path.stem
    return notebook_path.parent / f"{stem}.results"


def _identity(scenario: Scenario) -> str:
    return json.dumps({"version": __version__, "scenario": scenario.content()}, sort_keys=True)


def run_path(folder: Path, scenario: Scenario) -> Path:
    return folder / f"run-{scenario.hash()}.npz"


def sweep_path(folder: Path, scenario: Scenario) -> Path:
    return folder / f"sweep-{scenario.hash()}.json"


# -- run entries ------------------------------------------------------------------------------


def store_run(folder: Path, model: RunEntryModel) -> Path:
    """Write a finished run entry's arrays."""
    arrays: dict[str, np.ndarray] = {"identity": np.array(_identity(model.scenario))}
    for batch, stack in model.stacks.items():
        arrays[f"b{batch}/steps"] = stack.steps
        for name, values in stack.values.items():
            arrays[f"b{batch}/{name}"] = values
        if stack.example_norms is not None and stack.outlier is not None:
            arrays[f"b{batch}/example_norms"] = stack.example_norms
            arrays[f"b{batch}/outlier"] = stack.outlier
    path = run_path(folder, model.scenario)
    buffer = io.BytesIO()
    np.savez_compressed(buffer, allow_pickle=False, **arrays)
    with atomic_writer(path, "wb") as f:
        f.write(buffer.getvalue())  # type: ignore[arg-type]
    return path


def load_run(folder: Path, model: RunEntryModel) -> bool:
    """Fill `model` from the cache when it holds this scenario's results; False otherwise."""
    path = run_path(folder, model.scenario)
    try:
        with np.load(path, allow_pickle=False) as data:
            if str(data["identity"]) != _identity(model.scenario):
                return False
            members = fan_members(model.scenario)
            stacks = {}
            for batch in model.batch_sizes:
                stack = StackData.empty(model.scenario, batch, members)
                stack.steps = np.array(data[f"b{batch}/steps"])
                for name in stack.names:
                    values = np.array(data[f"b{batch}/{name}"])
                    if values.shape != stack.values[name].shape:
                        return False
                    stack.values[name] = values
                stack.filled, stack.done = len(stack.steps), True
                if f"b{batch}/example_norms" in data:
                    stack.example_norms = np.array(data[f"b{batch}/example_norms"])
                    stack.outlier = np.array(data[f"b{batch}/outlier"])
                stacks[batch] = stack
    except (OSError, KeyError, ValueError, zipfile.BadZipFile):
        return False
    model.restore(stacks)
    return True


# -- sweep entries ----------------------------------------------------------------------------


def store_sweep(folder: Path, model: SweepEntryModel) -> Path:
    profile = model.profile.as_json() if model.profile is not None else None
    document = {"identity": _identity(model.scenario), "rows": model.rows, "profile": profile}
    path = sweep_path(folder, model.scenario)
    write_text_atomic(path, json.dumps(document))
    return path


def load_sweep(folder: Path, model: SweepEntryModel) -> bool:
    path = sweep_path(folder, model.scenario)
    try:
        document = json.loads(path.read_text(encoding="utf-8"))
        if document.get("identity") != _identity(model.scenario):
            return False
        rows: list[dict[str, Any]] = document["rows"]
        raw = document.get("profile")
        profile = NormProfile.from_json(raw) if raw is not None else None
    except (OSError, KeyError, TypeError, ValueError):
        return False
    model.restore(rows, profile)
    return True


def path_for(folder: Path, model: RunEntryModel | SweepEntryModel) -> Path:
    if isinstance(model, RunEntryModel):
        return run_path(folder, model.scenario)
    return sweep_path(folder, model.scenario)


def store(folder: Path, model: RunEntryModel | SweepEntryModel) -> Path | None:
    """Cache a finished entry unless it is cached already (the same hash, the same results);
    None when it has nothing finished to keep."""
    if model.status != DONE or model.stale:
        return None
    if path_for(folder, model).exists():
        return path_for(folder, model)
    if isinstance(model, RunEntryModel):
        return store_run(folder, model)
    return store_sweep(folder, model)


def load(folder: Path, model: RunEntryModel | SweepEntryModel) -> bool:
    if isinstance(model, RunEntryModel):
        return load_run(folder, model)
    return load_sweep(folder, model)
