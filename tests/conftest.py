"""Test configuration: headless Qt, a private user folder, and no leaked threads or processes."""

from __future__ import annotations

import multiprocessing
import os
import threading
import time
from collections.abc import Iterator
from pathlib import Path

import pytest

# Set before anything imports Qt; tests never need a display.
os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

REPO = Path(__file__).resolve().parent.parent
SCENARIOS = REPO / "scenarios"


@pytest.fixture(autouse=True)
def private_home(tmp_path_factory: pytest.TempPathFactory, monkeypatch: pytest.MonkeyPatch) -> Path:
    """Point the per-user folder at a temporary one: tests never touch the user's presets."""
    home = tmp_path_factory.mktemp("gradfence-home")
    monkeypatch.setenv("GRADFENCE_HOME", str(home))
    return home


@pytest.fixture(autouse=True)
def no_leaked_workers() -> Iterator[None]:
    """Fail a test that leaves a thread or a child process running."""
    before = set(threading.enumerate())
    yield
    deadline = time.monotonic() + 5.0
    while time.monotonic() < deadline:
        threads = [t for t in threading.enumerate() if t not in before and t.is_alive()]
        children = multiprocessing.active_children()
        if not threads and not children:
            return
        time.sleep(0.05)
    names = [t.name for t in threads] + [f"process {p.pid}" for p in children]
    pytest.fail(f"test left running: {', '.join(names)}")


@pytest.fixture
def mark() -> Iterator[str]:
    """A mark for the environment of the processes a test starts (tests/os_processes.py); any
    still running at the end are killed, so a failing test leaves nothing behind either."""
    from tests.os_processes import kill_all, new_mark

    value = new_mark()
    yield value
    kill_all(value)


@pytest.fixture
def shared_tmp() -> Iterator[Path]:
    """A temporary folder another user may enter (pytest's own is private to this one), for
    tests that act without privileges (tests/os_processes.py without_privileges)."""
    import shutil
    import tempfile

    folder = Path(tempfile.mkdtemp(prefix="gradfence-test-"))
    folder.chmod(0o755)
    try:
        yield folder
    finally:
        for path in [folder, *folder.rglob("*")]:
            if path.is_dir() and not path.is_symlink():
                path.chmod(0o755)
        shutil.rmtree(folder)
