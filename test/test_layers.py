# SPDX-License-Identifier: Apache-2.0
"""The layer rule, read from the code's own imports (an AST walk, no extra tool).

Each layer of ``adaptive_streamer`` may import only the layers named beside it in README's
"Architecture" section; the core imports no ROS, no bag library and no demo scenario, and
its modules import each other without a circle.
"""
from __future__ import annotations

import ast
import sys
from pathlib import Path

import pytest

PKG = Path(__file__).resolve().parents[1] / "adaptive_streamer"
LEAVES = {"share", "safety"}            # stdlib-only helpers: where installed files are; cautions
APP = {"cli", "bringup", "check_policy", "preflight"}  # the command line on top of everything
ALLOWED: dict[str, set[str]] = {
    "core": {"core"},
    "sim": {"core", "sim", "share"},
    "io": {"core", "io", "share"},
    "nodes": {"core", "sim", "io", "nodes", "share", "safety"},
    "replay": {"core", "io", "replay", "share"},
    "demo": {"core", "sim", "io", "nodes", "replay", "demo", "share", "safety", "bringup"},
    "training": {"core", "sim", "io", "training", "share"},
    "share": set(), "safety": set(),
    **{app: {"core", "sim", "io", "nodes", "replay", "demo", "training", *LEAVES, *APP}
       for app in APP},
}
# third-party packages the core and the simulated cell may use (everything else: stdlib)
CORE_THIRD_PARTY = {"numpy", "scipy", "yaml", "onnxruntime"}
SIM_THIRD_PARTY = {"numpy", "scipy", "yaml"}


def _module_name(path: Path) -> str:
    rel = path.relative_to(PKG.parent).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def _imports(path: Path) -> list[tuple[int, str]]:
    """(line, absolute module) of every import in the file, relative ones resolved."""
    tree = ast.parse(path.read_text(), str(path))
    package = _module_name(path).split(".")
    if path.name != "__init__.py":
        package = package[:-1]
    out = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            out += [(node.lineno, a.name) for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package[:len(package) - node.level + 1]
                mod = ".".join(base + ([node.module] if node.module else []))
                if node.module is None:  # from . import x
                    out += [(node.lineno, f"{mod}.{a.name}") for a in node.names]
                    continue
            else:
                mod = node.module or ""
            out.append((node.lineno, mod))
    return out


def _layer(module: str) -> str | None:
    parts = module.split(".")
    return parts[1] if parts[0] == "adaptive_streamer" and len(parts) > 1 else None


SOURCES = sorted(PKG.rglob("*.py"))


def test_every_file_belongs_to_a_known_layer() -> None:
    unknown = {_layer(_module_name(p)) for p in SOURCES} - set(ALLOWED) - {None}
    assert not unknown, f"files outside the named layers: {sorted(unknown)}"


@pytest.mark.parametrize("path", SOURCES, ids=lambda p: str(p.relative_to(PKG)))
def test_imports_follow_the_layer_rule(path: Path) -> None:
    layer = _layer(_module_name(path))
    if layer is None:  # the package's own __init__
        return
    allowed = ALLOWED[layer]
    stdlib = sys.stdlib_module_names
    wrong = []
    for line, mod in _imports(path):
        target = _layer(mod)
        top = mod.split(".")[0]
        if top == "adaptive_streamer":
            if target is not None and target not in allowed:
                wrong.append(f"line {line}: imports {mod} ({layer} may import {sorted(allowed)})")
        elif layer == "core" and top not in stdlib and top not in CORE_THIRD_PARTY:
            wrong.append(f"line {line}: core imports {mod} (allowed: stdlib, "
                         f"{sorted(CORE_THIRD_PARTY)})")
        elif layer == "sim" and top not in stdlib and top not in SIM_THIRD_PARTY:
            wrong.append(f"line {line}: sim imports {mod} (allowed: stdlib, "
                         f"{sorted(SIM_THIRD_PARTY)})")
    assert not wrong, "\n".join(wrong)


def test_core_modules_import_each_other_without_a_circle() -> None:
    graph: dict[str, set[str]] = {}
    core = [p for p in SOURCES if _layer(_module_name(p)) == "core"]
    names = {_module_name(p) for p in core}
    for p in core:
        deps = set()
        for _, mod in _imports(p):
            while mod and mod not in names:  # `from .policies import x` names a package
                mod = mod.rpartition(".")[0]
            if mod and mod != _module_name(p):
                deps.add(mod)
        graph[_module_name(p)] = deps
    # a package imports its own modules (``__init__`` re-exports); that is not a circle
    for pkg in list(graph):
        graph[pkg] = {d for d in graph[pkg] if not (d.startswith(pkg + ".") and
                                                     any(p.name == "__init__.py" and
                                                         _module_name(p) == pkg for p in core))}
    state: dict[str, int] = {}
    stack: list[str] = []

    def visit(node: str) -> list[str] | None:
        state[node] = 1
        stack.append(node)
        for dep in sorted(graph.get(node, ())):
            if state.get(dep) == 1:
                return stack[stack.index(dep):] + [dep]
            if dep not in state:
                found = visit(dep)
                if found:
                    return found
        stack.pop()
        state[node] = 2
        return None

    for node in sorted(graph):
        if node not in state:
            circle = visit(node)
            assert circle is None, "import circle: " + " -> ".join(circle)
