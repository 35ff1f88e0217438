"""The package's layering, read from the source with ``ast`` (docs/SEAMS.md, "Layers and their owners").

* every module imports on its own in a fresh interpreter (an import cycle between
  module-level imports shows up here as a partially initialised module);
* the module-level import graph has no cycle;
* the query layer (model.py) never imports the build side: build, prune, counts,
  corpus or the progress display — not even inside a function — and the build layer is
  imported by nothing the query layer loads;
* no module imports an underscored name from another nextword module (a public accessor
  is added instead).
"""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

import pytest

PKG = Path(__file__).resolve().parent.parent / "nextword"


def _module_name(path: Path) -> str:
    parts = list(path.relative_to(PKG.parent).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


MODULES = {_module_name(p): p for p in sorted(PKG.rglob("*.py"))}


def _is_type_checking(node: ast.If) -> bool:
    return "TYPE_CHECKING" in ast.unparse(node.test)


def _imports(name: str) -> list[tuple[str, str, bool, bool]]:
    """(module imported, name imported or "", inside a function, under TYPE_CHECKING) per import of a nextword module."""
    path = MODULES[name]
    package = name if path.name == "__init__.py" else name.rsplit(".", 1)[0]
    found: list[tuple[str, str, bool, bool]] = []

    def visit(node: ast.AST, in_function: bool, typing_only: bool) -> None:
        for child in ast.iter_child_nodes(node):
            fn = in_function or isinstance(child, (ast.FunctionDef, ast.AsyncFunctionDef, ast.Lambda))
            tc = typing_only or (isinstance(child, ast.If) and _is_type_checking(child))
            if isinstance(child, ast.Import):
                for alias in child.names:
                    if alias.name.split(".")[0] == "nextword":
                        found.append((alias.name, "", fn, tc))
            elif isinstance(child, ast.ImportFrom):
                if child.level:
                    base = package
                    for _ in range(child.level - 1):
                        base = base.rsplit(".", 1)[0]
                    target = base + ("." + child.module if child.module else "")
                else:
                    target = child.module or ""
                    if target.split(".")[0] != "nextword":
                        continue
                for alias in child.names:
                    sub = f"{target}.{alias.name}"
                    found.append((sub if sub in MODULES else target, alias.name, fn, tc))
            visit(child, fn, tc)

    visit(ast.parse(path.read_text(encoding="utf-8")), False, False)
    return found


def _graph(*, lazy: bool) -> dict[str, set[str]]:
    return {
        m: {t for t, _, fn, tc in _imports(m) if t in MODULES and t != m and not tc and (lazy or not fn)}
        for m in MODULES
    }


def _closure(graph: dict[str, set[str]], start: str) -> set[str]:
    seen: set[str] = set()
    todo = [start]
    while todo:
        for t in graph[todo.pop()]:
            if t not in seen:
                seen.add(t)
                todo.append(t)
    return seen


def _cycle(graph: dict[str, set[str]]) -> list[str] | None:
    """One cycle of the graph (a list of modules), or None: depth-first search, colouring."""
    state: dict[str, int] = {}
    stack: list[str] = []

    def dfs(m: str) -> list[str] | None:
        state[m] = 1
        stack.append(m)
        for t in sorted(graph[m]):
            if state.get(t) == 1:
                return stack[stack.index(t) :] + [t]
            if t not in state:
                found = dfs(t)
                if found:
                    return found
        stack.pop()
        state[m] = 2
        return None

    for m in sorted(graph):
        if m not in state:
            found = dfs(m)
            if found:
                return found
    return None


def test_the_source_tree_is_what_the_checks_walk() -> None:
    assert {"nextword", "nextword.model", "nextword.build", "nextword.candidates", "nextword.text"} <= set(MODULES)
    assert _imports("nextword.build")  # the walker sees relative imports


@pytest.mark.parametrize("module", sorted(m for m in MODULES if m != "nextword.__main__"))
def test_every_module_imports_alone_in_a_fresh_interpreter(module: str) -> None:
    # nextword.__main__ runs the command line on import; it is the one-line ``main()`` call
    proc = subprocess.run(
        [sys.executable, "-c", f"import {module}"], cwd=PKG.parent, capture_output=True, text=True, timeout=120
    )
    assert proc.returncode == 0, proc.stderr


def test_module_level_imports_have_no_cycle() -> None:
    assert _cycle(_graph(lazy=False)) is None


def test_imports_inside_functions_close_no_cycle() -> None:
    # A function's import runs late, but a cycle through it is still two layers that need
    # each other (the last one, store <-> estimators over MAX_LAMBDA, ended when the
    # estimator that owns λ took the constant).
    assert _cycle(_graph(lazy=True)) is None


def test_the_cycle_finder_finds_a_cycle() -> None:
    assert _cycle({"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": set()}) == ["a", "b", "c", "a"]
    assert _cycle({"a": {"b"}, "b": set()}) is None


BUILD_SIDE = {"nextword.build", "nextword.prune", "nextword.counts", "nextword.corpus", "nextword._progress"}


def test_the_query_module_imports_nothing_of_the_build_side() -> None:
    imported = {t for t, _, _, _ in _imports("nextword.model")}  # at any level, typing-only included
    assert not imported & BUILD_SIDE, imported & BUILD_SIDE
    assert "nextword.candidates" in imported and "nextword.store" in imported  # the seams it is glue of


def test_nothing_the_query_layer_loads_imports_build() -> None:
    # what ``import nextword.model`` loads: module-level imports (a function's import runs
    # only when that function is called, e.g. the oracles' shared sentence reader)
    graph = _graph(lazy=False)
    for start in ("nextword.model", "nextword.candidates"):
        reach = _closure(graph, start)
        assert not reach & {"nextword.build", "nextword.prune", "nextword.corpus", "nextword._progress"}, (start, reach)


def test_no_module_imports_an_underscored_name_of_another() -> None:
    bad = [
        (m, t, name)
        for m in MODULES
        for t, name, _, _ in _imports(m)
        if name.startswith("_") and not (name.startswith("__") and name.endswith("__"))
    ]
    assert bad == []
