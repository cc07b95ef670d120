"""The widget package's own structure: no import circles, no private names across modules.

The rules are common practice (a module graph without cycles; a leading underscore
marks a name private to its module).
"""

from __future__ import annotations

import ast
from pathlib import Path

import ensemblelab

ROOT = Path(ensemblelab.__file__).resolve().parent
WIDGETS = ROOT / "widgets"


def _module_name(path: Path) -> str:
    rel = path.relative_to(ROOT.parent).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def _imports(path: Path) -> set[str]:
    """Every ensemblelab module `path` imports, at module level or inside functions."""
    package = _module_name(path) if path.name == "__init__.py" else \
        _module_name(path).rsplit(".", 1)[0]
    out = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[: len(base) - node.level + 1]
                module = ".".join(base + ([node.module] if node.module else []))
            else:
                module = node.module or ""
            out.add(module)
            for alias in node.names:  # "from . import x" imports a submodule
                out.add(f"{module}.{alias.name}")
        elif isinstance(node, ast.Import):
            out.update(alias.name for alias in node.names)
    return {m for m in out if m.startswith("ensemblelab.widgets")}


def _cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    found, state = [], {}

    def visit(node: str, stack: list[str]) -> None:
        state[node] = 1
        for nxt in sorted(graph.get(node, ())):
            if state.get(nxt) == 1:
                found.append(stack[stack.index(nxt):] + [nxt])
            elif nxt not in state:
                visit(nxt, [*stack, nxt])
        state[node] = 2

    for node in sorted(graph):
        if node not in state:
            visit(node, [node])
    return found


def test_widgets_modules_import_no_circle():
    files = sorted(WIDGETS.glob("*.py"))
    names = {_module_name(p) for p in files}
    graph = {}
    for p in files:
        if p.name == "__init__.py":
            continue  # the package re-exports its modules; they never import it
        graph[_module_name(p)] = {m for m in _imports(p) if m in names} - {"ensemblelab.widgets"}
    assert _cycles(graph) == []


def test_no_private_name_crosses_a_module():
    bad = []
    for p in sorted(WIDGETS.glob("*.py")) + sorted((ROOT / "compute" / "bands").glob("*.py")):
        for node in ast.walk(ast.parse(p.read_text(encoding="utf-8"))):
            if isinstance(node, ast.ImportFrom):
                bad += [f"{p.name}:{node.lineno} from {node.module} import {a.name}"
                        for a in node.names if a.name.startswith("_")]
            elif isinstance(node, ast.Attribute) and node.attr.startswith("_") and \
                    not node.attr.startswith("__") and node.attr != "_repr_mimebundle_":
                base = node.value
                if not (isinstance(base, ast.Name) and base.id in ("self", "cls")):
                    bad.append(f"{p.name}:{node.lineno} {ast.unparse(node)}")
    assert bad == []


def test_every_widgets_module_is_at_most_600_lines():
    long = {p.name: n for p in WIDGETS.glob("*.py")
            if (n := len(p.read_text(encoding="utf-8").splitlines())) > 600}
    assert long == {}
