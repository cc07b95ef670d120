"""The house rules of the package layout, checked by parsing the sources (no imports run).

- no import circle between the package's modules (imports inside functions count; imports
  under ``if TYPE_CHECKING:`` do not, they never run);
- no private name (``_x``) imported from another module: what a module shares is public
  (a private *module* such as ``_kernels_trpes`` may export public names);
- the compute layer never imports io (readers hand data in) nor the widgets or plotting;
- no module longer than 600 lines.

Each scanner is also run on a small synthetic package in a temporary folder, so a vacuous
pass (a scanner that sees nothing) fails.
"""

from __future__ import annotations

import ast
from collections.abc import Iterator
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "ensemblelab"
MAX_LINES = 600  # the house limit (common practice for reviewable modules; our choice)


def _module_name(path: Path, root: Path) -> str:
    parts = list(path.relative_to(root.parent).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(parts)


def _runtime_nodes(tree: ast.AST) -> Iterator[ast.AST]:
    """Every node except those under ``if TYPE_CHECKING:`` (typing-only imports)."""
    stack = [tree]
    while stack:
        node = stack.pop()
        if isinstance(node, ast.If):
            test = node.test
            name = test.id if isinstance(test, ast.Name) else (
                test.attr if isinstance(test, ast.Attribute) else None)
            if name == "TYPE_CHECKING":
                stack.extend(node.orelse)
                continue
        yield node
        stack.extend(ast.iter_child_nodes(node))


def import_graph(root: Path) -> tuple[dict[str, set[str]], list[tuple[str, str, str]]]:
    """Module -> modules it imports at run time, and (module, source, name) private imports."""
    files = {_module_name(p, root): p for p in root.rglob("*.py")}
    edges: dict[str, set[str]] = {}
    private: list[tuple[str, str, str]] = []
    for mod, path in files.items():
        tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
        here = mod.split(".") if path.name == "__init__.py" else mod.split(".")[:-1]
        deps: set[str] = set()
        for node in _runtime_nodes(tree):
            if isinstance(node, ast.ImportFrom):
                if node.level:
                    base = here[: len(here) - node.level + 1]
                    source = ".".join(base + ([node.module] if node.module else []))
                else:
                    source = node.module or ""
                for alias in node.names:
                    sub = f"{source}.{alias.name}"
                    if sub in files:  # "from package import module"
                        deps.add(sub)
                        continue
                    if source in files:
                        deps.add(source)
                    if alias.name.startswith("_") and not alias.name.startswith("__") \
                            and source in files and source != mod:
                        private.append((mod, source, alias.name))
            elif isinstance(node, ast.Import):
                for alias in node.names:
                    if alias.name in files:
                        deps.add(alias.name)
        # a package's __init__ importing its own submodules is not a circle partner
        edges[mod] = deps - {mod}
    return edges, private


def import_cycles(edges: dict[str, set[str]]) -> list[list[str]]:
    """Strongly connected components with more than one module (Tarjan, iterative)."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    on_stack: set[str] = set()
    stack: list[str] = []
    cycles: list[list[str]] = []
    counter = 0
    for start in edges:
        if start in index:
            continue
        work = [(start, iter(sorted(edges.get(start, ()))))]
        index[start] = low[start] = counter
        counter += 1
        stack.append(start)
        on_stack.add(start)
        while work:
            node, children = work[-1]
            advanced = False
            for child in children:
                if child not in index:
                    index[child] = low[child] = counter
                    counter += 1
                    stack.append(child)
                    on_stack.add(child)
                    work.append((child, iter(sorted(edges.get(child, ())))))
                    advanced = True
                    break
                if child in on_stack:
                    low[node] = min(low[node], index[child])
            if advanced:
                continue
            work.pop()
            if work:
                parent = work[-1][0]
                low[parent] = min(low[parent], low[node])
            if low[node] == index[node]:
                component = []
                while True:
                    member = stack.pop()
                    on_stack.discard(member)
                    component.append(member)
                    if member == node:
                        break
                if len(component) > 1:
                    cycles.append(sorted(component))
    return cycles


def _package_init_edges(edges: dict[str, set[str]]) -> dict[str, set[str]]:
    """Drop edges from a package to its own submodules (re-exports), which are not circles.

    ``pkg/__init__.py`` importing ``pkg.mod`` while ``pkg.mod`` imports ``pkg.other`` through
    the package path is the normal shape of a package; a circle between two submodules, or
    between two packages, still shows.
    """
    return {m: {d for d in deps if not d.startswith(m + ".")} for m, deps in edges.items()}


def _write(root: Path, files: dict[str, str]) -> Path:
    for rel, text in files.items():
        path = root / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(text)
    return root / "pkg"


def test_scanners_see_a_planted_circle_and_private_import(tmp_path):
    # computed independently (not published): a synthetic package with one circle a -> b -> a
    # (b's import inside a function), one typing-only import that must not count, and one
    # private name imported across modules
    root = _write(tmp_path, {
        "pkg/__init__.py": "",
        "pkg/a.py": "from .b import thing\n",
        "pkg/b.py": "def f():\n    from .a import _secret\n    return _secret\nthing = 1\n",
        "pkg/c.py": "from typing import TYPE_CHECKING\nif TYPE_CHECKING:\n    from .d import x\n",
        "pkg/d.py": "from .c import y\n",
    })
    edges, private = import_graph(root)
    cycles = import_cycles(_package_init_edges(edges))
    assert cycles == [["pkg.a", "pkg.b"]]
    assert private == [("pkg.b", "pkg.a", "_secret")]


def test_no_import_circles():
    edges, _ = import_graph(PACKAGE)
    cycles = import_cycles(_package_init_edges(edges))
    assert not cycles, "import circles:\n" + "\n".join(" <-> ".join(c) for c in cycles)


def test_no_private_names_imported_across_modules():
    _, private = import_graph(PACKAGE)
    lines = [f"{mod} imports {name} from {source}" for mod, source, name in private]
    assert not lines, "\n".join(lines)


def test_compute_never_imports_io_widgets_or_plotting():
    edges, _ = import_graph(PACKAGE)
    bad = [f"{mod} imports {dep}" for mod, deps in edges.items()
           if mod.startswith("ensemblelab.compute") for dep in sorted(deps)
           if dep.split(".")[1] in ("io", "widgets", "plotting", "cli", "report")]
    assert not bad, "\n".join(bad)


@pytest.mark.parametrize("path", sorted(PACKAGE.rglob("*.py")),
                         ids=lambda p: str(p.relative_to(PACKAGE)))
def test_module_size(path):
    n = len(path.read_text(encoding="utf-8").splitlines())
    assert n <= MAX_LINES, f"{path.relative_to(PACKAGE)} has {n} lines (limit {MAX_LINES})"
