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
