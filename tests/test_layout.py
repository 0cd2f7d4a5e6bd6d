"""The package layout: every package installed, no import cycle, no reach into private names.

The import graph is read from the source with ``ast`` (every ``import`` statement, at any depth,
``TYPE_CHECKING`` blocks included), so that what a type checker or an import-graph tool sees is
what is checked.
"""

from __future__ import annotations

import ast
import re
from collections.abc import Iterator
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
HOMES = {
    "drawledger": ROOT / "sdk" / "drawledger",
    "drawledger.replay": ROOT / "replay" / "drawledger" / "replay",
}
# The analysis capabilities; the engines below them must not import any of them.
ANALYSES = ("integrity", "verify", "audit", "estimate", "propensity", "demo", "_report")
MAX_LINES = 600


def _modules() -> dict[str, Path]:
    """Every module of the distribution by its dotted name."""
    found: dict[str, Path] = {}
    for package, home in HOMES.items():
        for path in home.rglob("*.py"):
            parts = path.relative_to(home).with_suffix("").parts
            if parts[:1] == ("replay",) and package == "drawledger":
                continue  # another home's files never lie under this one, but be sure
            name = ".".join((package, *parts))
            found[name.removesuffix(".__init__")] = path
    return found


MODULES = _modules()


def _imports(name: str, path: Path) -> Iterator[tuple[str, str | None, int]]:
    """(module, name taken from it or None, line) of every import of a drawledger module."""
    package = name if path.name == "__init__.py" else name.rpartition(".")[0]
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            for alias in node.names:
                if alias.name.split(".")[0] == "drawledger":
                    yield alias.name, None, node.lineno
        elif isinstance(node, ast.ImportFrom):
            module = node.module or ""
            if node.level:
                base = package.rsplit(".", node.level - 1)[0] if node.level > 1 else package
                module = f"{base}.{module}".rstrip(".")
            if module.split(".")[0] == "drawledger":
                for alias in node.names:
                    yield module, alias.name, node.lineno


def _edges() -> dict[str, set[str]]:
    graph: dict[str, set[str]] = {name: set() for name in MODULES}
    for name, path in MODULES.items():
        for module, taken, _ in _imports(name, path):
            target = f"{module}.{taken}" if taken and f"{module}.{taken}" in MODULES else module
            if target in MODULES and target != name:
                graph[name].add(target)
    return graph


def _cycle(graph: dict[str, set[str]]) -> list[str] | None:
    """One import cycle of ``graph`` (depth-first search), or None."""
    state: dict[str, int] = {}
    stack: list[str] = []

    def visit(node: str) -> list[str] | None:
        state[node] = 1
        stack.append(node)
        for nxt in sorted(graph[node]):
            if state.get(nxt) == 1:
                return [*stack[stack.index(nxt) :], nxt]
            if nxt not in state and (found := visit(nxt)) is not None:
                return found
        stack.pop()
        state[node] = 2
        return None

    for node in sorted(graph):
        if node not in state and (found := visit(node)) is not None:
            return found
    return None


def test_cycle_finder_reports_a_cycle() -> None:
    """The check below can fail: a three-module loop is found."""
    assert ["a", "b", "c", "a"] == _cycle({"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": set()})


def test_no_import_cycle() -> None:
    assert _cycle(_edges()) is None


def test_no_module_imports_another_modules_private_name() -> None:
    found = []
    for name, path in MODULES.items():
        for module, taken, line in _imports(name, path):
            private = taken is not None and taken.startswith("_") and not taken.startswith("__")
            if private and f"{module}.{taken}" not in MODULES:
                found.append(f"{path.relative_to(ROOT)}:{line}: {taken} from {module}")
    assert [] == found


def test_no_module_reaches_into_an_imported_modules_private_attribute() -> None:
    found = []
    for name, path in MODULES.items():
        aliases = {}
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for module, taken, _ in _imports(name, path):
            full = f"{module}.{taken}" if taken else module
            if full in MODULES:
                aliases[(taken or module).split(".")[-1]] = full
        for node in ast.walk(tree):
            if isinstance(node, ast.ImportFrom | ast.Import):
                for alias in node.names:
                    if alias.asname and alias.asname not in aliases:
                        for full in list(aliases.values()):
                            if full.endswith("." + alias.name) or full == alias.name:
                                aliases[alias.asname] = full
        for node in ast.walk(tree):
            if (
                isinstance(node, ast.Attribute)
                and isinstance(node.value, ast.Name)
                and node.value.id in aliases
                and node.attr.startswith("_")
                and not node.attr.startswith("__")
                and f"{aliases[node.value.id]}.{node.attr}" not in MODULES
            ):
                found.append(f"{path.relative_to(ROOT)}:{node.lineno}: {node.value.id}.{node.attr}")
    assert [] == found


def test_engines_and_sources_import_no_analysis() -> None:
    graph = _edges()
    low = [
        m
        for m in MODULES
        if m.startswith(("drawledger.replay.engines", "drawledger.replay.sources"))
    ]
    bad = {
        m: sorted(t for t in graph[m] if t.split(".")[2:3] and t.split(".")[2] in ANALYSES)
        for m in low
    }
    assert {} == {m: t for m, t in bad.items() if t}


def test_every_package_folder_is_installed() -> None:
    """pyproject.toml lists every package folder, so that a wheel holds all of them."""
    text = (ROOT / "pyproject.toml").read_text(encoding="utf-8")
    block = re.search(r"^packages = \[(.*?)\]", text, re.S | re.M)
    assert block is not None
    listed = set(re.findall(r'"([\w.]+)"', block.group(1)))
    folders = {name for name, path in MODULES.items() if path.name == "__init__.py"}
    assert folders == listed


@pytest.mark.parametrize("name", sorted(MODULES))
def test_module_is_small_enough_to_read_in_one_sitting(name: str) -> None:
    lines = len(MODULES[name].read_text(encoding="utf-8").splitlines())
    assert lines <= MAX_LINES, f"{name} has {lines} lines"
