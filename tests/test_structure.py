"""The house stays as DEVELOPERS.md draws it: no import loop in app/ or core/ (imports inside
functions and under TYPE_CHECKING count too), and no module in app/ over 500 lines."""

from __future__ import annotations

import ast
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
PACKAGES = ("core", "app")
MAX_APP_LINES = 500


def module_name(path: Path) -> str:
    return ".".join(path.relative_to(REPO).with_suffix("").parts)


def imports_of(path: Path) -> set[str]:
    """The modules of this project that `path` imports, wherever the import statement is."""
    found: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"), filename=str(path))):
        if isinstance(node, ast.Import):
            names = [alias.name for alias in node.names]
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            names = [node.module] + [f"{node.module}.{alias.name}" for alias in node.names]
        else:
            continue
        found.update(n for n in names if n.split(".")[0] in PACKAGES)
    return found


def graph() -> dict[str, set[str]]:
    modules = {module_name(p): p for package in PACKAGES for p in (REPO / package).glob("*.py")}
    edges = {}
    for name, path in modules.items():
        targets = {t for t in imports_of(path) if t in modules and t != name}
        edges[name] = {t for t in targets if not t.endswith("__init__")}
    return edges


def find_cycle(edges: dict[str, set[str]]) -> list[str] | None:
    """One import loop, as the modules around it, or None (depth-first search)."""
    state: dict[str, int] = {}  # 1 on the current path, 2 done
    path: list[str] = []

    def visit(node: str) -> list[str] | None:
        state[node] = 1
        path.append(node)
        for target in sorted(edges.get(node, ())):
            if state.get(target) == 1:
                return [*path[path.index(target) :], target]
            if target not in state:
                found = visit(target)
                if found:
                    return found
        path.pop()
        state[node] = 2
        return None

    for node in sorted(edges):
        if node not in state:
            found = visit(node)
            if found:
                return found
    return None


def test_the_graph_is_read_from_the_real_imports() -> None:
    edges = graph()
    assert "core.study" in edges["app.main_window"]
    assert "core.engine" in edges["core.maps"]  # an import inside a function counts
    assert find_cycle({"a": {"b"}, "b": {"c"}, "c": {"a"}}) == ["a", "b", "c", "a"]


def test_no_module_of_app_or_core_imports_itself_round_a_loop() -> None:
    assert find_cycle(graph()) is None


def test_no_module_of_app_is_over_500_lines() -> None:
    sizes = {
        p.name: len(p.read_text(encoding="utf-8").splitlines()) for p in (REPO / "app").glob("*.py")
    }
    assert {name: n for name, n in sizes.items() if n > MAX_APP_LINES} == {}


def test_importing_the_window_loads_no_torch() -> None:
    # The window shows before torch is imported: workers import it, the window never needs to.
    import subprocess
    import sys

    code = "import sys, app.main_window, app.desktop; print('torch' in sys.modules)"
    out = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True, cwd=REPO
    )
    assert out.stdout.strip() == "False"
