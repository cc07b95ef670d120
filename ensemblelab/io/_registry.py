"""Format registry: format name -> loader/writer ("module:function"), imported lazily.

Detection order for a path (see :func:`detect_format`):

1. a folder with ``manifest.json`` -> ``store`` (the native store);
2. a folder with ``*.xyz`` / ``*.xyz.gz`` files -> ``extxyz``;
3. a file, by extension (:data:`EXTENSIONS`).
"""

from __future__ import annotations

import importlib
from collections.abc import Callable
from pathlib import Path
from typing import Any

from ..errors import UnknownFormatError

__all__ = ["LOADERS", "WRITERS", "EXTENSIONS", "detect_format", "get_loader", "get_writer"]

#: format name -> "module:function" of its loader
LOADERS: dict[str, str] = {
    "store": "ensemblelab.io.store:load_store",
    "extxyz": "ensemblelab.io.xyz:load_extxyz",
    "table": "ensemblelab.io.table:load_table",
}
#: format name -> "module:function" of its writer
WRITERS: dict[str, str] = {
    "store": "ensemblelab.io.store:save_store",
    "extxyz": "ensemblelab.io.xyz:write_extxyz",
}
#: file-name ending -> format name (longest ending wins)
EXTENSIONS: dict[str, str] = {
    ".xyz": "extxyz",
    ".xyz.gz": "extxyz",
    ".csv": "table",
    ".csv.gz": "table",
    ".parquet": "table",
    ".pq": "table",
}


def _resolve(spec: str) -> Callable[..., Any]:
    module, func = spec.split(":")
    return getattr(importlib.import_module(module), func)


def detect_format(path: str | Path) -> str:
    """Return the format name of `path`.

    Raises
    ------
    FileNotFoundError
        When `path` does not exist.
    UnknownFormatError
        When nothing matches; the message lists what is supported.
    """
    path = Path(path)
    if not path.exists():
        raise FileNotFoundError(f"{path}: no such file or folder.")
    supported = ("a native store folder (manifest.json), a folder of *.xyz / *.xyz.gz files "
                 f"(one per trajectory), or a file ending in {sorted(EXTENSIONS)}")
    if path.is_dir():
        if (path / "manifest.json").is_file():
            return "store"
        if any(p.name.endswith((".xyz", ".xyz.gz")) for p in path.iterdir()):
            return "extxyz"
        raise UnknownFormatError(f"{path}: cannot tell the format of this folder; expected "
                                 f"{supported}.")
    name = path.name.lower()
    for ending in sorted(EXTENSIONS, key=len, reverse=True):
        if name.endswith(ending):
            return EXTENSIONS[ending]
    raise UnknownFormatError(f"{path}: unknown file type; expected {supported}. Hint: name the "
                             f"format, one of {sorted(LOADERS)}: load(path, format=...) in "
                             "Python, --input-format on the command line.")


def get_loader(name: str) -> Callable[..., Any]:
    """The loader function of format `name` (imported now)."""
    if name not in LOADERS:
        raise UnknownFormatError(f"unknown format {name!r}; expected one of {sorted(LOADERS)}.")
    return _resolve(LOADERS[name])


def get_writer(name: str) -> Callable[..., Any]:
    """The writer function of format `name` (imported now)."""
    if name not in WRITERS:
        raise UnknownFormatError(f"no writer for format {name!r}; expected one of "
                                 f"{sorted(WRITERS)}.")
    return _resolve(WRITERS[name])
