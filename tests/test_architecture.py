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
LAYERS = ("core", "data", "models", "ranking", "evaluation", "tracking", "pipeline", "demo", "cli")


def _module_name(path: Path) -> str:
    parts = path.relative_to(PACKAGE.parent).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def _layer(module: str) -> str | None:
    parts = module.split(".")
    return parts[1] if len(parts) > 1 else None


def _imports() -> dict[str, set[str]]:
    """Module -> the threefold modules it imports (``from threefold.x import y`` counts y when y is a module)."""
    modules = {_module_name(p): p for p in PACKAGE.rglob("*.py")}
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


@pytest.mark.parametrize("module", sorted(m for m in GRAPH if m != "threefold"))
def test_imports_run_downward(module):
    here = LAYERS.index(_layer(module))
    upward = sorted(m for m in GRAPH[module] if _layer(m) in LAYERS and LAYERS.index(_layer(m)) > here)
    assert not upward, f"{module} (layer {LAYERS[here]!r}) imports from a higher layer: {upward}"


def test_no_import_circles():
    state: dict[str, int] = {}
    stack: list[str] = []

    def visit(node: str) -> list[str] | None:
        state[node] = 1
        stack.append(node)
        for nxt in sorted(GRAPH.get(node, ())):
            if nxt not in GRAPH or nxt == "threefold" or GRAPH is None:
                continue
            if state.get(nxt) == 1:
                return stack[stack.index(nxt):] + [nxt]
            if nxt not in state and (cycle := visit(nxt)):
                return cycle
        stack.pop()
        state[node] = 2
        return None

    for module in sorted(m for m in GRAPH if m != "threefold"):
        if module not in state and (cycle := visit(module)):
            pytest.fail("import circle: " + " -> ".join(cycle))


def test_the_walker_sees_an_upward_import(tmp_path):
    """The check itself can fail: an evaluation module importing the demo is caught (common practice: test the test)."""
    source = "from threefold.demo.simulate import simulate_site\n"
    tree = ast.parse(source)
    node = tree.body[0]
    assert isinstance(node, ast.ImportFrom) and _layer(node.module) == "demo"
    assert LAYERS.index("demo") > LAYERS.index("evaluation")
