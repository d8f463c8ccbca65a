"""The operating system's view of processes, for tests that must leave none behind.

multiprocessing only knows the children of the process asking, and forgets a worker whose parent
was killed; /proc knows every process. A test starts a command with a mark in its environment
(children inherit it, the resource tracker included) and later asks /proc who still carries it.
"""

from __future__ import annotations

import contextlib
import os
import signal
import subprocess
import sys
import time
import uuid
from collections.abc import Iterator, Sequence
from pathlib import Path

from tests.conftest import REPO

MARK = "GRADFENCE_TEST_MARK"
PROC = Path("/proc")


def new_mark() -> str:
    return uuid.uuid4().hex


DISPLAY_VARIABLES = ("DISPLAY", "WAYLAND_DISPLAY", "QT_QPA_PLATFORM")


def marked_env(mark: str, display: bool = True, **extra: str) -> dict[str, str]:
    """The environment of a command whose processes carry `mark`; with `display` false, as on
    a machine without one (over SSH, in CI), else with Qt's offscreen platform."""
    env = {**os.environ, "PYTHONPATH": str(REPO), MARK: mark, **extra}
    if display:
        env.setdefault("QT_QPA_PLATFORM", "offscreen")
    else:
        for name in DISPLAY_VARIABLES:
            env.pop(name, None)
    return env


def gradfence(args: Sequence[str]) -> list[str]:
    """The command line of `gradfence ARGS` run from this checkout."""
    return [sys.executable, "-m", "app.cli", *args]


def start(
    args: Sequence[str], mark: str, cwd: Path | None = None, display: bool = True, **extra: str
) -> subprocess.Popen[str]:
    return subprocess.Popen(
        gradfence(args),
        cwd=cwd,
        env=marked_env(mark, display, **extra),
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )


def _state(pid: int) -> str:
    """The process state letter (R, S, Z...), or "" when there is no such process."""
    try:
        text = (PROC / str(pid) / "stat").read_text()
    except OSError:
        return ""
    return text[text.rindex(")") + 2 :].split()[0]


def alive(pid: int) -> bool:
    """The process exists and is not a zombie (a zombie runs nothing and holds no memory)."""
    return _state(pid) not in ("", "Z", "X")


def carrying(mark: str) -> list[int]:
    """Every live process whose environment holds `mark`."""
    needle = f"{MARK}={mark}".encode()
    found = []
    for entry in PROC.iterdir():
        if not entry.name.isdigit():
            continue
        try:
            environ = (entry / "environ").read_bytes()
        except OSError:
            continue
        if needle in environ.split(b"\0") and alive(int(entry.name)):
            found.append(int(entry.name))
    return sorted(found)


def children(pid: int) -> list[int]:
    """The live processes whose parent is `pid`."""
    found = []
    for entry in PROC.iterdir():
        if not entry.name.isdigit():
            continue
        try:
            text = (entry / "stat").read_text()
        except OSError:
            continue
        fields = text[text.rindex(")") + 2 :].split()
        if int(fields[1]) == pid and fields[0] not in ("Z", "X"):
            found.append(int(entry.name))
    return sorted(found)


def command_line(pid: int) -> str:
    try:
        return (PROC / str(pid) / "cmdline").read_bytes().replace(b"\0", b" ").decode()
    except OSError:
        return ""


def workers_of(pid: int) -> list[int]:
    """The worker processes `pid` spawned (not its resource tracker)."""
    return [
        c
        for c in children(pid)
        if "spawn_main" in command_line(c) and "resource_tracker" not in command_line(c)
    ]


def wait_for(condition: object, bound: float, step: float = 0.02) -> bool:
    """Poll `condition()` until it is true or `bound` seconds pass; returns its last value."""
    assert callable(condition)
    deadline = time.monotonic() + bound
    while True:
        if condition():
            return True
        if time.monotonic() > deadline:
            return bool(condition())
        time.sleep(step)


def gone(mark: str, bound: float) -> list[int]:
    """Wait up to `bound` seconds for every process carrying `mark` to end; returns those left."""
    wait_for(lambda: not carrying(mark), bound)
    return carrying(mark)


def kill_all(mark: str) -> None:
    """Leave nothing behind even when a test fails half-way."""
    for pid in carrying(mark):
        with contextlib.suppress(OSError):
            os.kill(pid, signal.SIGKILL)


@contextlib.contextmanager
def without_privileges() -> Iterator[None]:
    """Act as a user without privileges for a while. Under root (a container, CI) a folder
    without write permission is still writable; as nobody it is read-only, as for a person.
    Only what is imported already may be used meanwhile: root's own files are closed to nobody.
    """
    if os.geteuid() != 0:
        yield
        return
    os.setresgid(65534, 65534, 0)
    os.setresuid(65534, 65534, 0)
    try:
        yield
    finally:
        os.setresuid(0, 0, 0)
        os.setresgid(0, 0, 0)
