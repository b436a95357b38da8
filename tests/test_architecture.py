"""The layers are folders and imports run one way only (DEVELOPERS.md, "Layers").

Walks every module of ``src/threefold`` with :mod:`ast` (no import is executed)
and fails on an import that runs back up the layer order, or on a circle between
modules. Lazy imports inside functions count too: a layer may not lean on a
higher one even on demand.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "src" / "threefold"

#: Lowest first; a module may import from its own layer and the layers before it.
LAYERS = ("core", "data", "models", "ranking", "evaluation", "explain", "tracking", "pipeline", "demo", "cli")


def _module_name(path: Path, package: Path = PACKAGE) -> str:
    parts = path.relative_to(package.parent).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def _layer(module: str) -> str | None:
    parts = module.split(".")
    return parts[1] if len(parts) > 1 else None


def _imports(package: Path = PACKAGE) -> dict[str, set[str]]:
    """Module -> the threefold modules it imports (``from threefold.x import y`` counts y when y is a module)."""
    modules = {_module_name(p, package): p for p in package.rglob("*.py")}
    graph: dict[str, set[str]] = {}
    for name, path in modules.items():
        found: set[str] = set()
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.Import):
                found |= {a.name for a in node.names if a.name.startswith("threefold.")}
            elif isinstance(node, ast.ImportFrom) and node.module and node.module.startswith("threefold"):
                for alias in node.names:
                    child = f"{node.module}.{alias.name}"
                    found.add(child if child in modules else node.module)
        graph[name] = {m for m in found if m != name and m != "threefold"}
    return graph


GRAPH = _imports()


def test_every_module_lives_in_a_layer():
    loose = sorted(m for m in GRAPH if m != "threefold" and _layer(m) not in LAYERS)
    assert not loose, f"modules outside the layer folders {LAYERS}: {loose}"


def _upward(graph: dict, module: str) -> list[str]:
    here = LAYERS.index(_layer(module))
    return sorted(m for m in graph[module] if _layer(m) in LAYERS and LAYERS.index(_layer(m)) > here)


@pytest.mark.parametrize("module", sorted(m for m in GRAPH if m != "threefold"))
def test_imports_run_downward(module):
    upward = _upward(GRAPH, module)
    assert not upward, f"{module} (layer {_layer(module)!r}) imports from a higher layer: {upward}"


def _circle(graph: dict) -> list[str] | None:
    state: dict[str, int] = {}
    stack: list[str] = []

    def visit(node: str) -> list[str] | None:
        state[node] = 1
        stack.append(node)
        for nxt in sorted(graph.get(node, ())):
            if nxt not in graph or nxt == "threefold":
                continue
            if state.get(nxt) == 1:
                return stack[stack.index(nxt):] + [nxt]
            if nxt not in state and (cycle := visit(nxt)):
                return cycle
        stack.pop()
        state[node] = 2
        return None

    for module in sorted(m for m in graph if m != "threefold"):
        if module not in state and (cycle := visit(module)):
            return cycle
    return None


def test_no_import_circles():
    cycle = _circle(GRAPH)
    assert cycle is None, "import circle: " + " -> ".join(cycle or [])


def test_the_walker_catches_an_upward_import_a_lazy_one_and_a_circle(tmp_path):
    """The check itself can fail: on a made-up package, an evaluation module importing the demo
    (at the top and inside a function) and two modules importing each other are all found."""
    root = tmp_path / "threefold"
    for folder in ("evaluation", "demo", "core"):
        (root / folder).mkdir(parents=True)
        (root / folder / "__init__.py").write_text("")
    (root / "__init__.py").write_text("")
    (root / "demo" / "simulate.py").write_text("X = 1\n")
    (root / "evaluation" / "harness.py").write_text("from threefold.demo.simulate import X\n")
    (root / "evaluation" / "lazy.py").write_text("def f():\n    from threefold.demo import simulate\n")
    (root / "core" / "a.py").write_text("from threefold.core import b\n")
    (root / "core" / "b.py").write_text("import threefold.core.a\n")
    graph = _imports(root)
    assert _upward(graph, "threefold.evaluation.harness") == ["threefold.demo.simulate"]
    assert _upward(graph, "threefold.evaluation.lazy") == ["threefold.demo.simulate"]
    assert _upward(graph, "threefold.demo.simulate") == []
    assert _circle(graph) in (["threefold.core.a", "threefold.core.b", "threefold.core.a"],
                              ["threefold.core.b", "threefold.core.a", "threefold.core.b"])
