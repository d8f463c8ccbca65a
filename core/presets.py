"""Where presets live: the shipped ones beside the code, the user's in a per-user folder."""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

from core.errors import GradfenceInputError
from core.scenario import Scenario, load_scenario

HOME_VARIABLE = "GRADFENCE_HOME"  # overrides the per-user folder (tests, portable setups)


def shipped_dir() -> Path:
    """The scenarios/ folder of this checkout."""
    return Path(__file__).resolve().parent.parent / "scenarios"


def user_dir() -> Path:
    """The folder of the user's own presets."""
    home = os.environ.get(HOME_VARIABLE)
    if home:
        return Path(home) / "presets"
    import platformdirs

    return Path(platformdirs.user_data_dir("gradfence", appauthor=False)) / "presets"


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
            if path.name.endswith(".notebook.toml"):
                continue
            try:
                found.append(PresetInfo(path, shipped, load_scenario(path)))
            except GradfenceInputError as exc:
                found.append(PresetInfo(path, shipped, None, str(exc)))
    return found
