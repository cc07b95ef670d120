"""Import optional dependencies with a helpful message."""

from __future__ import annotations

import importlib
from types import ModuleType

from .errors import MissingDependencyError

__all__ = ["import_optional"]


def import_optional(name: str, *, extra: str, purpose: str | None = None) -> ModuleType:
    """Import `name` or raise :class:`MissingDependencyError` naming the extra to install.

    Parameters
    ----------
    name : str
        Module to import, e.g. ``"nglview"``.
    extra : str
        The ensemblelab extra that provides it, e.g. ``"widgets"``.
    purpose : str, optional
        What it is needed for, used in the message (default: the extra).

    Returns
    -------
    module
    """
    try:
        return importlib.import_module(name)
    except ImportError as exc:
        what = purpose or f"ensemblelab.{extra}"
        raise MissingDependencyError(
            f"{name} is required for {what}; install with pip install 'ensemblelab[{extra}]'."
        ) from exc
