"""Where presets live: the shipped ones beside the code, the user's in a per-user folder."""

from __future__ import annotations

import re
from dataclasses import dataclass, replace
from pathlib import Path

from core.errors import GradfenceInputError
from core.scenario import Scenario, load_scenario, save_scenario
from core.study_file import is_study
from core.userdata import data_home


def shipped_dir() -> Path:
    """The shipped presets: core/scenarios in an installed wheel (pyproject.toml puts them
    there), else the scenarios/ folder at the top of this checkout."""
    here = Path(__file__).resolve().parent
    installed = here / "scenarios"
    return installed if installed.is_dir() else here.parent / "scenarios"


def user_dir() -> Path:
    """The folder of the user's own presets."""
    return data_home() / "presets"


@dataclass(frozen=True)
class PresetInfo:
    path: Path
    shipped: bool
    scenario: Scenario | None
    error: str = ""

    @property
    def name(self) -> str:
        return self.scenario.name if self.scenario else self.path.stem


def list_presets() -> list[PresetInfo]:
    """Shipped presets first, then the user's; a broken file is listed with its error."""
    found = []
    for folder, shipped in ((shipped_dir(), True), (user_dir(), False)):
        if not folder.is_dir():
            continue
        for path in sorted(folder.glob("*.toml")):
            if is_study(path):
                continue
            try:
                found.append(PresetInfo(path, shipped, load_scenario(path)))
            except GradfenceInputError as exc:
                found.append(PresetInfo(path, shipped, None, str(exc)))
    return found


def preset_file_name(name: str) -> str:
    """A file name for a preset called `name`: lower case, words joined by hyphens."""
    slug = re.sub(r"[^a-z0-9]+", "-", name.lower()).strip("-")
    if not slug:
        raise GradfenceInputError("a preset needs a name with at least one letter or digit.")
    return f"{slug}.toml"


def save_user_preset(scenario: Scenario, name: str, overwrite: bool = False) -> Path:
    """Save `scenario` as the user preset `name`; shipped presets are never written."""
    path = user_dir() / preset_file_name(name)
    if path.resolve().is_relative_to(shipped_dir().resolve()):
        raise GradfenceInputError(f"{path}: shipped presets are read-only.")
    if path.exists() and not overwrite:
        raise FileExistsError(path)
    save_scenario(replace(scenario, name=name), path)
    return path
