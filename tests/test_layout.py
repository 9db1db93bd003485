"""The package's layout: no import cycles, every exported name resolves, files stay small.

Imports are read from the source with :mod:`ast` (every ``import`` statement, also those inside
functions), so a cycle hidden behind a lazy import is found too. Source: the rules of the house in
DEVELOPERS.md (one direction of flow: model -> samplers -> result; io imports nothing of the package).
"""

from __future__ import annotations

import ast
import importlib
import pathlib
import pkgutil

import pytest

import stein_torch

PACKAGE = pathlib.Path(stein_torch.__file__).parent
MODULES = sorted(
    name for _, name, _ in pkgutil.walk_packages([str(PACKAGE)], prefix="stein_torch.")
    if not name.endswith("__main__")  # runs the command line when imported
)


def _module_file(name: str) -> pathlib.Path:
    parts = name.split(".")[1:]
    path = PACKAGE.joinpath(*parts)
    return path / "__init__.py" if path.is_dir() else path.with_suffix(".py")


def _is_module(name: str) -> bool:
    return name == "stein_torch" or name in MODULES


def _imports(name: str) -> set[str]:
    """Modules of the package that ``name`` imports anywhere in its source."""
    path = _module_file(name)
    tree = ast.parse(path.read_text())
    package = name if path.name == "__init__.py" else name.rsplit(".", 1)[0]
    found = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            found.update(a.name for a in node.names if a.name.startswith("stein_torch"))
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[: len(base) - node.level + 1]
                source = ".".join(base + ([node.module] if node.module else []))
            else:
                source = node.module or ""
            if not source.startswith("stein_torch"):
                continue
            for alias in node.names:
                candidate = f"{source}.{alias.name}"
                found.add(candidate if _is_module(candidate) else source)
    return {m for m in found if m != name and _is_module(m)}


def _graph() -> dict[str, set[str]]:
    return {name: _imports(name) for name in ["stein_torch", *MODULES]}


def test_no_import_cycles():
    graph = _graph()
    state: dict[str, int] = {}  # 1 visiting, 2 done
    stack: list[str] = []
    cycles = []

    def visit(node):
        state[node] = 1
        stack.append(node)
        for nxt in sorted(graph.get(node, ())):
            if state.get(nxt) == 1:
                cycles.append(stack[stack.index(nxt):] + [nxt])
            elif nxt not in state:
                visit(nxt)
        stack.pop()
        state[node] = 2

    for node in sorted(graph):
        if node not in state:
            visit(node)
    assert not cycles, "import cycles: " + "; ".join(" -> ".join(c) for c in cycles)


def test_the_flow_runs_one_way():
    graph = _graph()
    # io imports nothing of the package; model/ imports no sampler and no result
    assert graph["stein_torch.io"] == set()
    for name, imported in graph.items():
        if name.startswith("stein_torch.model"):
            bad = {m for m in imported if m.startswith(("stein_torch.samplers", "stein_torch.result"))}
            assert not bad, f"{name} imports {bad}"
        if name.startswith(("stein_torch.kernels", "stein_torch.stein")):
            bad = {m for m in imported if m.startswith(("stein_torch.samplers", "stein_torch.model", "stein_torch.result"))}
            assert not bad, f"{name} imports {bad}"


@pytest.mark.parametrize("name", ["stein_torch", *MODULES])
def test_every_exported_name_resolves(name):
    module = importlib.import_module(name)
    exported = getattr(module, "__all__", None)
    assert exported is not None, f"{name} has no __all__"
    missing = [n for n in exported if not hasattr(module, n)]
    assert not missing, f"{name}.__all__ names {missing}, which do not exist"


def test_files_stay_small():
    # the house rule: one concern per module, under about 400 lines
    sizes = {p.relative_to(PACKAGE): len(p.read_text().splitlines()) for p in PACKAGE.rglob("*.py")}
    large = {str(p): n for p, n in sizes.items() if n > 450}
    assert not large, f"modules over 450 lines: {large}"
