"""core/ must stay free of Qt: it is the importable computation layer (STYLE.md point 1)."""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

CORE = Path(__file__).resolve().parents[2] / "core"
FORBIDDEN = ("PySide6", "pyqtgraph", "PyQt5", "PyQt6", "shiboken6")


def test_no_module_under_core_imports_qt_or_pyqtgraph() -> None:
    offenders = []
    for path in sorted(CORE.rglob("*.py")):
        for node in ast.walk(ast.parse(path.read_text(), filename=str(path))):
            if isinstance(node, ast.Import):
                names = [alias.name for alias in node.names]
            elif isinstance(node, ast.ImportFrom):
                names = [node.module or ""]
            else:
                continue
            offenders += [f"{path.name}: {n}" for n in names if n.split(".")[0] in FORBIDDEN]
    assert offenders == []


def test_importing_all_of_core_loads_no_qt_module() -> None:
    modules = sorted(p.stem for p in CORE.glob("*.py") if p.stem != "__init__")
    code = (
        "import sys\n"
        + "".join(f"import core.{m}\n" for m in modules)
        + f"print(sorted(m for m in sys.modules if m.split('.')[0] in {FORBIDDEN!r}))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"
