"""A map's output folder: one scenario per folder, one writer at a time, nothing lost.

`map-state.json` names the scenario (its hash, its content and the Gradfence version) and
`map.csv` holds the finished members, appended as chunks finish. While a process writes the
folder it holds an exclusive lock on `.map.lock` (the system drops it if the process dies), so a
second writer is refused in one sentence. A folder that already holds a map is never emptied
without `fresh`; `resume` continues it only when the scenario, the version and the rows match.
Files read back are checked: a state file that does not read is set aside (renamed `.bad`) with
a warning, and so is the table it can no longer vouch for; a row that does not read is trained
again.
"""

from __future__ import annotations

import contextlib
import csv
import hashlib
import io
import json
import math
import os
from collections.abc import Callable
from pathlib import Path
from typing import IO, Any

from core import __version__
from core.errors import GradfenceInputError
from core.fileio import aside_path, check_out_folder, json_kind, write_text_atomic
from core.formats import single

TABLE_FILE = "map.csv"
STATE_FILE = "map-state.json"
LOCK_FILE = ".map.lock"

Warn = Callable[[str], None]


class MapFolder:
    """Open with `open_folder`, then `rewrite` the table (which writes the state file too);
    `append` finished rows; `close` releases the lock.

    After every write the state file vouches for the table: its length in bytes and their
    SHA-256. A kill between a table's append and the state's update leaves the state vouching
    for a prefix of the table, which still checks (`vouches_for`).
    """

    def __init__(self, out: Path, lock: IO[str], state: dict[str, Any]) -> None:
        self.out = out
        self._lock = lock
        self._state = state
        self.table = out / TABLE_FILE
        self._digest = hashlib.sha256()
        self._length = 0

    def append(self, text: str) -> None:
        data = text.encode("utf-8")
        with self.table.open("ab") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
        self._digest.update(data)
        self._length += len(data)
        self._vouch()

    def rewrite(self, text: str) -> None:
        write_text_atomic(self.table, text)
        data = text.encode("utf-8")
        self._digest, self._length = hashlib.sha256(data), len(data)
        self._vouch()

    def _vouch(self) -> None:
        table = {"bytes": self._length, "sha256": self._digest.hexdigest()}
        write_text_atomic(
            self.out / STATE_FILE, json.dumps({**self._state, "table": table}, indent=1) + "\n"
        )

    def close(self) -> None:
        with contextlib.suppress(OSError):
            _unlock(self._lock)
            self._lock.close()

    def __enter__(self) -> MapFolder:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def _lock_folder(out: Path) -> IO[str]:
    lock = (out / LOCK_FILE).open("a+", encoding="utf-8")
    try:
        import fcntl

        fcntl.flock(lock.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
    except ImportError:  # no advisory locks on this system: one writer is on trust
        return lock
    except OSError:
        lock.seek(0)
        holder = lock.read().strip() or "another process"
        lock.close()
        raise GradfenceInputError(
            f"{out}: another `gradfence map` ({holder}) is writing this folder now; wait for "
            "it to end, or name another --out."
        ) from None
    lock.seek(0)
    lock.truncate()
    lock.write(f"process {os.getpid()}")
    lock.flush()
    return lock


def _unlock(lock: IO[str]) -> None:
    try:
        import fcntl
    except ImportError:
        return
    fcntl.flock(lock.fileno(), fcntl.LOCK_UN)


def state_of(scenario_hash: str, content: dict[str, Any], total: int) -> dict[str, Any]:
    return {
        "version": __version__,
        "scenario_hash": scenario_hash,
        "members": total,
        "scenario": content,
    }


def read_state(path: Path) -> dict[str, Any] | str:
    """The state file's contents, or why it cannot be used."""
    try:
        state = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, ValueError) as exc:
        return f"does not read ({type(exc).__name__})"
    if not isinstance(state, dict):
        return f"holds {json_kind(state)}, not a table"
    for key in ("version", "scenario_hash", "scenario"):
        if key not in state:
            return f'has no "{key}"'
    return state


def vouches_for(state: dict[str, Any], table: Path) -> bool:
    """Whether the state's record of the table (length and SHA-256) matches the table's first
    bytes; a state file without one (written before it was kept) vouches for any table."""
    record = state.get("table")
    if record is None:
        return True
    try:
        length, digest = int(record["bytes"]), str(record["sha256"])
        with table.open("rb") as f:
            head = f.read(length)
    except (OSError, KeyError, TypeError, ValueError):
        return False
    return len(head) == length and hashlib.sha256(head).hexdigest() == digest


def set_aside(path: Path, why: str, warn: Warn) -> None:
    target = aside_path(path)
    path.replace(target)
    warn(f"{path}: {why}; set aside as {target.name}.")


def open_folder(
    out: Path,
    scenario_hash: str,
    content: dict[str, Any],
    total: int,
    resume: bool,
    fresh: bool,
    warn: Warn,
    summary: Callable[[Path], str],
) -> MapFolder:
    """Take the folder for this scenario's map; raises GradfenceInputError when it holds
    something else. `summary(table)` says how much of a map a table holds, for messages."""
    check_out_folder(out)
    lock = _lock_folder(out)
    try:
        _prepare(out, scenario_hash, resume, fresh, warn, summary)
    except BaseException:
        with contextlib.suppress(OSError):
            _unlock(lock)
            lock.close()
        raise
    return MapFolder(out, lock, state_of(scenario_hash, content, total))


def _prepare(
    out: Path,
    scenario_hash: str,
    resume: bool,
    fresh: bool,
    warn: Warn,
    summary: Callable[[Path], str],
) -> None:
    table, state_path = out / TABLE_FILE, out / STATE_FILE
    if fresh:
        for path in (table, state_path):
            with contextlib.suppress(FileNotFoundError):
                path.unlink()
    state: dict[str, Any] | str | None = read_state(state_path) if state_path.exists() else None
    if isinstance(state, str):
        set_aside(state_path, state, warn)
        if table.exists():
            set_aside(table, "its state file did not read, so it matches no scenario", warn)
        state = None
    if state is None and table.exists():
        set_aside(table, f"has no {STATE_FILE} to say which scenario it belongs to", warn)
    other = isinstance(state, dict) and state.get("scenario_hash") != scenario_hash
    if table.exists() and not resume and other:
        raise GradfenceInputError(
            f"{out}: holds a map of another scenario ({summary(table)}); start this one there "
            "with --fresh (which replaces it), or name another --out."
        )
    if table.exists() and not resume:
        raise GradfenceInputError(
            f"{out}: holds a map already ({summary(table)}); continue it with --resume, start "
            "over with --fresh, or name another --out."
        )
    if resume and isinstance(state, dict) and table.exists():
        if other:
            raise GradfenceInputError(
                f"{out}: holds a map of another scenario (hash {state.get('scenario_hash')}, "
                f"this one {scenario_hash}); resume it with the preset it was made from, start "
                "this one there with --fresh, or name another --out."
            )
        if state.get("version") != __version__:
            raise GradfenceInputError(
                f"{out}: holds a map made by Gradfence {state.get('version')}, and this is "
                f"{__version__}, whose numbers may differ; start over with --fresh, or name "
                "another --out."
            )
        if not vouches_for(state, table):
            set_aside(table, f"is not the table {STATE_FILE} vouches for (it was changed)", warn)


def parse_rows(
    text: str, columns: tuple[str, ...], source: str, warn: Warn
) -> list[dict[str, Any]]:
    """map.csv text as typed rows. A last line cut short by a kill is dropped; a row that does
    not read is dropped with a warning (its chunk trains again)."""
    if text and not text.endswith("\n"):
        text = text[: text.rfind("\n") + 1]  # the torn tail of an interrupted append
    rows = []
    with io.StringIO(text) as f:
        reader = csv.DictReader(f)
        if reader.fieldnames is not None and tuple(reader.fieldnames) != columns:
            warn(f"{source}: its header is not map.csv's; every row trains again.")
            return []
        for number, raw in enumerate(reader, start=2):
            if None in raw.values() or len(raw) != len(columns):
                continue  # an incomplete row: its chunk is trained again
            try:
                rows.append(_typed(raw, columns))
            except ValueError as exc:
                warn(f"{source} line {number}: {exc}; that member trains again.")
    return rows


def _typed(raw: dict[str, str], columns: tuple[str, ...]) -> dict[str, Any]:
    row: dict[str, Any] = {}
    for column in columns:
        value = raw[column]
        if column in ("method", "label"):
            if not value:
                raise ValueError(f"the {column} is empty")
            row[column] = value
        elif column in ("batch_size", "seed"):
            if not value.isdigit():
                raise ValueError(f"{column} {value!r} is not a whole number")
            row[column] = int(value)
        elif column == "diverged":
            if value not in ("0", "1"):
                raise ValueError(f"diverged {value!r} is not 0 or 1")
            row[column] = value == "1"
        else:
            try:
                number = float(value) if value != "" else math.nan
            except ValueError:
                raise ValueError(f"{column} {value!r} is not a number") from None
            # Measurements were float32 (see core.maps.run_chunk); the threshold names a point.
            row[column] = number if column == "threshold" else single(number)
    return row
