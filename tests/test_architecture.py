"""The layering rule: data -> io -> compute -> widgets, never upwards.

After the lazy-import test pattern of a well-known labelled-array library
(common practice): import in a fresh interpreter and inspect sys.modules.
"""

from __future__ import annotations

import ast
import re
import subprocess
import sys
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "ensemblelab"
WIDGET_STACK = ("ipywidgets", "bqplot", "nglview")


@pytest.mark.parametrize(
    "module", ["ensemblelab", "ensemblelab.io", "ensemblelab.compute", "ensemblelab.data"]
)
def test_import_does_not_pull_widget_stack(module):
    code = (
        "import sys, importlib\n"
        f"importlib.import_module({module!r})\n"
        "import ensemblelab\n"
        "for name in ensemblelab.__all__:\n"
        "    getattr(ensemblelab, name)\n"
        f"bad = [m for m in {WIDGET_STACK!r} if m in sys.modules]\n"
        "print(','.join(bad))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "", f"importing {module} imported {out.stdout.strip()}"


def _imports(path: Path, package: Path = PACKAGE) -> list[str]:
    """Absolute names imported by `path`, a file inside the `package` folder."""
    tree = ast.parse(path.read_text(), filename=str(path))
    names = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names += [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:  # relative: resolve against the file's package
                pkg = path.relative_to(package.parent).with_suffix("").parts[: -node.level]
                base = ".".join(pkg)
                names.append(f"{base}.{node.module}" if node.module else base)
            else:
                names.append(node.module or "")
    return names


# layer -> modules it must never import
FORBIDDEN = {
    "data": ("ensemblelab.io", "ensemblelab.compute", "ensemblelab.widgets", "ensemblelab.plotting",
             *WIDGET_STACK),
    "io": ("ensemblelab.compute", "ensemblelab.widgets", "ensemblelab.plotting", *WIDGET_STACK),
    "compute": ("ensemblelab.widgets", "ensemblelab.plotting", *WIDGET_STACK),
    "plotting": ("ensemblelab.widgets", *WIDGET_STACK),
}


def _upward_imports(package: Path, layer: str) -> list[str]:
    offenders = []
    for path in sorted((package / layer).rglob("*.py")):
        for name in _imports(path, package):
            if any(name == bad or name.startswith(bad + ".") for bad in FORBIDDEN[layer]):
                offenders.append(f"{path.relative_to(package)} imports {name}")
    return offenders


@pytest.mark.parametrize("layer", sorted(FORBIDDEN))
def test_layer_never_imports_upwards(layer):
    offenders = _upward_imports(PACKAGE, layer)
    assert not offenders, "\n".join(offenders)


def test_architecture_scan_can_fail(tmp_path):
    # the scanner itself must see forbidden imports, absolute and relative (guards against a
    # vacuous pass); the probe package lives in tmp_path, never in the package tree
    fake_pkg = tmp_path / "ensemblelab"
    (fake_pkg / "compute" / "kinetics").mkdir(parents=True)
    (fake_pkg / "compute" / "_probe.py").write_text("import bqplot\n")
    (fake_pkg / "compute" / "kinetics" / "_probe.py").write_text(
        "from ...widgets import explorer\n")
    offenders = _upward_imports(fake_pkg, "compute")
    assert offenders == ["compute/_probe.py imports bqplot",
                         "compute/kinetics/_probe.py imports ensemblelab.widgets"]


def test_no_pickle_or_eval_in_package():
    offenders = []
    for path in PACKAGE.rglob("*.py"):
        tree = ast.parse(path.read_text())
        for node in ast.walk(tree):
            if isinstance(node, ast.Call) and isinstance(node.func, ast.Name) and \
                    node.func.id in ("eval", "exec"):
                offenders.append(f"{path.name}:{node.lineno} calls {node.func.id}")
            if isinstance(node, ast.keyword) and node.arg == "allow_pickle" and \
                    isinstance(node.value, ast.Constant) and node.value.value is True:
                offenders.append(f"{path.name}:{node.lineno} allow_pickle=True")
        for name in _imports(path):
            if name in ("pickle", "cPickle", "dill", "joblib"):
                offenders.append(f"{path.name} imports {name}")
    assert not offenders, offenders


def test_public_api_resolves():
    import ensemblelab
    import ensemblelab.compute

    for mod in (ensemblelab, ensemblelab.compute):
        for name in mod.__all__:
            assert getattr(mod, name) is not None, name


_PHRASE = "method " + "notes"  # split so that this file does not match itself


def test_no_citation_of_documents_outside_the_repository():
    root = PACKAGE.parent
    offenders = []
    for folder in ("ensemblelab", "tests", "benchmarks"):
        for path in sorted((root / folder).rglob("*")):
            if path.suffix not in (".py", ".md", ".txt", ".toml", ".cfg") or not path.is_file():
                continue
            rel = path.relative_to(root).as_posix()
            text = path.read_text(encoding="utf-8", errors="replace").lower()
            text = re.sub(r"[\s#]+", " ", text)  # a phrase wrapped over comment lines too
            if any(_PHRASE.replace(" ", sep) in text for sep in " -_"):
                offenders.append(rel)
    assert not offenders, f"cite the published source instead in: {offenders}"
