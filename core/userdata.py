"""The per-user folder: user presets, recent studies and autosaved recovery copies.

`GRADFENCE_HOME` overrides the platform's folder (tests, portable setups). A recovery copy is the
text of a study with unsaved edits, written by the app every 30 s at most; it is removed when
the study is saved or its changes are discarded, so one that is still there after a start
means the app ended without either (a crash, a kill) and is offered for restore.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
import time
from dataclasses import dataclass
from pathlib import Path

from core.fileio import write_text_atomic

HOME_VARIABLE = "GRADFENCE_HOME"
RECENT_LIMIT = 8


def data_home() -> Path:
    home = os.environ.get(HOME_VARIABLE)
    if home:
        return Path(home)
    import platformdirs

    return Path(platformdirs.user_data_dir("gradfence", appauthor=False))


# -- recovery copies --------------------------------------------------------------------------


@dataclass(frozen=True)
class Recovery:
    text: str
    study: Path | None  # the file it belongs to; None for a study never saved
    saved_at: float  # time.time() of the autosave


def _recovery_base(study: Path | None) -> Path:
    key = str(study.resolve()) if study is not None else "untitled"
    digest = hashlib.sha256(key.encode()).hexdigest()[:16]
    return data_home() / "recovery" / digest


def write_recovery(study: Path | None, text: str) -> Path:
    base = _recovery_base(study)
    write_text_atomic(base.with_suffix(".toml"), text)
    meta = {"study": str(study.resolve()) if study else None, "saved_at": time.time()}
    write_text_atomic(base.with_suffix(".json"), json.dumps(meta))
    return base.with_suffix(".toml")


def find_recovery(study: Path | None) -> Recovery | None:
    """The recovery copy of `study`, unless it is missing, unreadable or the same as the file."""
    base = _recovery_base(study)
    try:
        text = base.with_suffix(".toml").read_text(encoding="utf-8")
        meta = json.loads(base.with_suffix(".json").read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    if study is not None:
        with contextlib.suppress(OSError):
            if study.read_text(encoding="utf-8") == text:
                clear_recovery(study)
                return None
    return Recovery(text, study, float(meta.get("saved_at", 0.0)))


def clear_recovery(study: Path | None) -> None:
    base = _recovery_base(study)
    for suffix in (".toml", ".json"):
        with contextlib.suppress(FileNotFoundError):
            base.with_suffix(suffix).unlink()


# -- recent studies -------------------------------------------------------------------------


def _recent_file() -> Path:
    return data_home() / "recent.json"


def recent_studies() -> list[Path]:
    """Most recent first; files that no longer exist are left out."""
    try:
        raw = json.loads(_recent_file().read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return []
    paths = [Path(p) for p in raw if isinstance(p, str)] if isinstance(raw, list) else []
    return [p for p in paths if p.is_file()]


def add_recent(path: Path) -> list[Path]:
    path = path.resolve()
    paths = [path, *(p for p in recent_studies() if p != path)][:RECENT_LIMIT]
    with contextlib.suppress(OSError):  # a read-only home loses the list, nothing else
        write_text_atomic(_recent_file(), json.dumps([str(p) for p in paths]))
    return paths
