"""Where shipped presets are found: in this checkout, and in a wheel built from it."""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import zipfile
from pathlib import Path

from core.presets import list_presets, shipped_dir
from tests.conftest import REPO, SCENARIOS

SHIPPED = sorted(p.name for p in SCENARIOS.glob("*.toml"))


def test_a_checkout_finds_the_scenarios_folder_at_its_top() -> None:
    assert shipped_dir() == SCENARIOS
    assert sorted(i.path.name for i in list_presets() if i.shipped) == [
        n for n in SHIPPED if not n.endswith(".study.toml")
    ]


def test_an_installed_wheel_carries_the_shipped_scenarios(tmp_path: Path) -> None:
    # The previous version's wheel held no scenarios: an installed `gradfence` found no preset
    # and no demo study. The wheel is built by setuptools, as pip would, from a copy of the
    # checkout, and unpacked as an installer does; the reference is the scenarios/ folder.
    source = tmp_path / "source"
    source.mkdir()
    ignore = shutil.ignore_patterns("__pycache__", "*.pyc", "*.results")
    for name in ("core", "app", "scenarios"):
        shutil.copytree(REPO / name, source / name, ignore=ignore)
    for name in ("pyproject.toml", "README.md"):
        shutil.copy(REPO / name, source / name)
    dist = tmp_path / "dist"
    build = (
        "import sys; from setuptools import build_meta; print(build_meta.build_wheel(sys.argv[1]))"
    )
    built = subprocess.run(
        [sys.executable, "-c", build, str(dist)],
        cwd=source,
        capture_output=True,
        text=True,
        timeout=300,
        check=True,
    )
    wheel = dist / built.stdout.split()[-1]
    site = tmp_path / "site"
    with zipfile.ZipFile(wheel) as archive:
        archive.extractall(site)
    for path in SCENARIOS.rglob("*"):
        # A study's results cache beside it is the user's, not shipped (it is git-ignored).
        if path.is_file() and not any(part.endswith(".results") for part in path.parts):
            packed = site / "core" / "scenarios" / path.relative_to(SCENARIOS)
            assert packed.read_bytes() == path.read_bytes(), path.name

    env = {**os.environ, "PYTHONPATH": str(site), "QT_QPA_PLATFORM": "offscreen"}
    probe = (
        "import json, core, app.desktop; from core.presets import list_presets, shipped_dir; "
        "print(json.dumps([core.__file__, str(shipped_dir()), str(app.desktop.demo_path()), "
        "[i.path.name for i in list_presets() if i.shipped]]))"
    )
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    found = subprocess.run(
        [sys.executable, "-c", probe],
        cwd=elsewhere,
        env=env,
        capture_output=True,
        text=True,
        timeout=300,
        check=True,
    )
    module, folder, demo, names = json.loads(found.stdout)
    assert Path(module).is_relative_to(site)  # the installed copy, not this checkout
    assert Path(folder) == site / "core" / "scenarios"
    assert Path(demo).is_file()
    assert names == [n for n in SHIPPED if not n.endswith(".study.toml")]
    # The installed command checks the demo study (its presets and its log included).
    checked = subprocess.run(
        [sys.executable, "-m", "app.cli", "check", demo],
        cwd=elsewhere,
        env=env,
        capture_output=True,
        text=True,
        timeout=300,
    )
    assert checked.returncode == 0, checked.stderr
    assert checked.stdout.startswith(f"ok: {demo}")
