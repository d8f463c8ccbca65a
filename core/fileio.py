"""Writes that never leave a half-written file where a user's file was."""

from __future__ import annotations

import contextlib
import os
import tempfile
import typing
from collections.abc import Iterator
from pathlib import Path
from typing import IO


@contextlib.contextmanager
def atomic_writer(path: Path, mode: str = "w") -> Iterator[IO[str] | IO[bytes]]:
    """Yield a temporary file beside `path`; on success it replaces `path` in one rename."""
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        os.chmod(tmp, _mode_for(path))  # mkstemp makes 0600; keep the file's or the umask's
        encoding = None if "b" in mode else "utf-8"
        with os.fdopen(fd, mode, encoding=encoding, newline=None if "b" in mode else "") as f:
            yield f
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise


def write_text_atomic(path: Path, text: str) -> None:
    """Replace `path` with `text` atomically."""
    with atomic_writer(path, "w") as f:
        typing.cast(typing.TextIO, f).write(text)


def _mode_for(path: Path) -> int:
    """The permissions `path` has now, or those a new file gets under the current umask."""
    try:
        return path.stat().st_mode & 0o777
    except FileNotFoundError:
        umask = os.umask(0)
        os.umask(umask)
        return 0o666 & ~umask


def check_out_folder(path: Path, option: str = "--out") -> None:
    """Fail now, in one sentence, if results cannot be written into the folder `path`."""
    from core.errors import GradfenceInputError

    if path.exists() and not path.is_dir():
        raise GradfenceInputError(f"{option} {path}: is a file, not a folder; name a folder.")
    try:
        path.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise GradfenceInputError(
            f"{option} {path}: the folder cannot be made ({exc.strerror})."
        ) from None
    if not os.access(path, os.W_OK | os.X_OK):
        raise GradfenceInputError(f"{option} {path}: the folder is not writable.")


def check_out_file(path: Path, suffixes: tuple[str, ...], what: str, option: str = "--out") -> None:
    """Fail now, in one sentence, if `path` cannot be written as a file of `what`."""
    from core.errors import GradfenceInputError

    if path.is_dir():
        raise GradfenceInputError(f"{option} {path}: is a folder; name the {what} file to write.")
    if path.suffix.lower() not in suffixes:
        raise GradfenceInputError(
            f"{option} {path}: a {what} file ends in {' or '.join(suffixes)}."
        )
    # The folder is made when the file is written; the first part of it that exists already
    # must be a folder we may write in, or the write would fail after all the work.
    folder = path.parent if str(path.parent) else Path(".")
    while not folder.exists() and folder != folder.parent:
        folder = folder.parent
    if not folder.is_dir():
        raise GradfenceInputError(f"{option} {path}: {folder} is a file, not a folder.")
    if not os.access(folder, os.W_OK | os.X_OK):
        raise GradfenceInputError(f"{option} {path}: the folder {folder} is not writable.")
    if path.exists() and not os.access(path, os.W_OK):
        raise GradfenceInputError(f"{option} {path}: the file is not writable.")


def aside_path(path: Path) -> Path:
    """Where to set a bad file aside: `NAME.bad`, or `NAME.bad.2`, `.bad.3`, ... when an
    earlier one is there (a file set aside before is never overwritten)."""
    target = path.with_name(path.name + ".bad")
    n = 2
    while target.exists():
        target = path.with_name(f"{path.name}.bad.{n}")
        n += 1
    return target


def json_kind(value: object) -> str:
    """What a JSON value is, in JSON's words (for messages about a file that holds the wrong
    thing): "a table", "a list", "null", "text", "a number", "true or false"."""
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "true or false"
    kinds = {dict: "a table", list: "a list", str: "text", int: "a number", float: "a number"}
    return kinds.get(type(value), type(value).__name__)
