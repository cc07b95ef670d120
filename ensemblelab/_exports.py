"""Lazy re-export of the domain packages' public names (PEP 562).

Each domain package (``compute/spectroscopy``, ``compute/kinetics``, ...) declares its
public names once, in the ``__all__`` list of its ``__init__.py``. A parent package
re-exports them without importing the domain packages up front: the ``__all__``
literals are read from the source (no code runs), and a name is imported from its
package on first access. This keeps ``import ensemblelab`` fast (the domain packages
pull in scipy and scikit-learn) without a second, hand-kept list of names.
"""

from __future__ import annotations

import ast
import importlib
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

__all__ = ["declared_names", "lazy_exports"]


def declared_names(package: str) -> list[str]:
    """The ``__all__`` literal of `package`'s ``__init__.py``, read without importing it.

    Parameters
    ----------
    package : str
        Dotted name of a package inside ``ensemblelab`` (e.g.
        ``"ensemblelab.compute.kinetics"``).

    Returns
    -------
    list of str
        The names in declaration order.
    """
    root = Path(__file__).resolve().parent
    parts = package.split(".")[1:]
    init = root.joinpath(*parts, "__init__.py")
    tree = ast.parse(init.read_text(encoding="utf-8"), filename=str(init))
    for node in tree.body:
        targets = node.targets if isinstance(node, ast.Assign) else (
            [node.target] if isinstance(node, ast.AnnAssign) else [])
        if any(isinstance(t, ast.Name) and t.id == "__all__" for t in targets):
            assert isinstance(node, ast.Assign | ast.AnnAssign) and node.value is not None
            value = ast.literal_eval(node.value)  # a literal list by convention
            return [str(v) for v in value]
    raise ImportError(f"{init} declares no literal __all__")


def lazy_exports(
    parent: str, packages: Sequence[str], namespace: dict[str, Any]
) -> tuple[list[str], Callable[[str], Any], Callable[[], list[str]]]:
    """Build ``__all__``, ``__getattr__`` and ``__dir__`` for a re-exporting package.

    Parameters
    ----------
    parent : str
        Dotted name of the re-exporting module (used in error messages).
    packages : sequence of str
        Dotted names of the packages whose ``__all__`` is re-exported, in order; a
        name declared twice is an error (one name, one meaning).
    namespace : dict
        The re-exporting module's ``globals()`` (imported values are cached there).

    Returns
    -------
    names : list of str
        The re-exported names (the parent's ``__all__`` is this plus its own names).
    getattr, dir : callables
        The module-level ``__getattr__`` and ``__dir__``.
    """
    owner: dict[str, str] = {}
    for package in packages:
        for name in declared_names(package):
            if name in owner:
                raise ImportError(f"{name!r} is exported by both {owner[name]} and {package}")
            owner[name] = package

    def __getattr__(name: str) -> Any:
        if name in owner:
            value = getattr(importlib.import_module(owner[name]), name)
            namespace[name] = value
            return value
        raise AttributeError(f"module {parent!r} has no attribute {name!r}")

    def __dir__() -> list[str]:
        return sorted(set(namespace) | set(owner))

    return list(owner), __getattr__, __dir__
