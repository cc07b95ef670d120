"""Helpers shared by the loaders and writers: units, JSON-safe metadata, atomic writes.

Nothing here is public API; the public functions live in :mod:`ensemblelab.io`.
"""

from __future__ import annotations

import contextlib
import json
import math
import os
import shutil
import uuid
import warnings
from collections.abc import Iterator, Mapping
from pathlib import Path
from typing import Any

import numpy as np

from .. import units
from .._atomic import (
    atomic_file,  # noqa: F401  (used by the io modules)
    replace_folder,
)
from ..errors import EnsembleWarning, ParseError, StoreError

__all__ = [
    "NONFINITE_OPTIONS",
    "check_nonfinite_option",
    "resolve_unit",
    "encode_metadata",
    "decode_metadata",
    "atomic_folder",
    "atomic_file",
    "file_source",
    "parse_floats",
    "report_nonfinite",
]

#: accepted values of the ``nonfinite`` argument of the loaders
NONFINITE_OPTIONS = ("raise", "keep")

#: JSON tag that marks a dict whose keys were integers (see :func:`encode_metadata`)
INT_KEYS_TAG = "__int_keys__"


def check_nonfinite_option(nonfinite: str) -> None:
    """Validate the ``nonfinite`` argument of a loader."""
    if nonfinite not in NONFINITE_OPTIONS:
        raise ValueError(
            f"The 'nonfinite' parameter must be one of {NONFINITE_OPTIONS}; got {nonfinite!r}."
        )


def resolve_unit(kind: str, declared: str | None, given: str | None, *, path: object) -> str:
    """Pick the unit of one file: what the file declares, else what the caller gave, else default.

    A file that declares a unit different from the one the caller passed is an
    error: silently preferring either would hide a mistake.
    """
    default = {"energy": "eV", "time": "fs", "length": "Angstrom"}[kind]
    table = {"energy": units.ENERGY_UNITS, "time": units.TIME_UNITS,
             "length": units.LENGTH_UNITS}[kind]
    for value, origin in ((declared, f"{kind}_unit in the file"), (given, f"{kind}_unit=")):
        if value is not None and value not in table:
            raise ParseError(
                f"unknown {kind} unit {value!r} ({origin}); expected one of {sorted(table)}.",
                path=path, field=f"{kind}_unit",
                hint="use one of the listed spellings.",
            )
    if declared is not None and given is not None and \
            getattr(units, f"{kind}_factor")(declared) != getattr(units, f"{kind}_factor")(given):
        raise ParseError(
            f"the file declares {kind}_unit={declared} but load() was called with "
            f"{kind}_unit={given!r}.",
            path=path, field=f"{kind}_unit",
            hint=f"drop the {kind}_unit argument (the file's declaration is used) or fix the file.",
        )
    return declared or given or default


def _encode(value: Any, where: str) -> Any:
    if isinstance(value, Mapping):
        keys = list(value)
        if keys and all(isinstance(k, (int, np.integer)) and not isinstance(k, bool)
                        for k in keys):
            return {INT_KEYS_TAG: {str(int(k)): _encode(v, f"{where}[{k}]")
                                   for k, v in value.items()}}
        out = {}
        for k, v in value.items():
            if not isinstance(k, str):
                raise StoreError(
                    f"metadata{where} has a key {k!r} of type {type(k).__name__}; keys must be "
                    "all str or all int. Hint: convert the keys to str before saving."
                )
            out[k] = _encode(v, f"{where}[{k!r}]")
        return out
    if isinstance(value, (list, tuple)):
        return [_encode(v, f"{where}[{i}]") for i, v in enumerate(value)]
    if isinstance(value, np.ndarray):
        return _encode(value.tolist(), where)
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        f = float(value)
        if not math.isfinite(f):
            return {"__float__": repr(f)}
        return f
    if value is None or isinstance(value, str):
        return value
    if isinstance(value, os.PathLike):
        return os.fspath(value)
    raise StoreError(
        f"metadata{where} holds a {type(value).__name__}, which cannot be stored as JSON. "
        "Hint: store numbers, strings, lists and dicts only (arrays become lists)."
    )


def encode_metadata(meta: Mapping[str, Any]) -> dict[str, Any]:
    """Return a JSON-serialisable copy of `meta`.

    numpy scalars become Python numbers, arrays and tuples become lists,
    non-finite floats become ``{"__float__": "nan"}``, and a dict whose keys
    are all integers (such as ``injected_faults = {traj_id: kind}``) is stored
    as ``{"__int_keys__": {"3": ...}}`` so that :func:`decode_metadata` gives
    the integer keys back.
    """
    return _encode(dict(meta), "")


def decode_metadata(obj: Any) -> Any:
    """Invert :func:`encode_metadata` (lists stay lists)."""
    if isinstance(obj, dict):
        if set(obj) == {INT_KEYS_TAG}:
            return {int(k): decode_metadata(v) for k, v in obj[INT_KEYS_TAG].items()}
        if set(obj) == {"__float__"}:
            return float(obj["__float__"])
        return {k: decode_metadata(v) for k, v in obj.items()}
    if isinstance(obj, list):
        return [decode_metadata(v) for v in obj]
    return obj


def dumps_json(obj: Any) -> str:
    """JSON text of an already encoded object (strict: no NaN literals)."""
    return json.dumps(obj, indent=2, allow_nan=False, sort_keys=False) + "\n"


@contextlib.contextmanager
def atomic_folder(target: Path, *, overwrite: bool, is_ours: Any, kind: str) -> Iterator[Path]:
    """Yield a fresh temporary folder beside `target`; move it into place on success.

    Parameters
    ----------
    target : Path
        Final folder.
    overwrite : bool
        Replace an existing `target` (only when ``is_ours(target)`` is true).
    is_ours : callable
        ``is_ours(path) -> bool``: whether an existing folder was written by us.
    kind : str
        Words for messages, e.g. "native store".

    Notes
    -----
    The new folder is swapped with the previous one atomically (Linux
    ``renameat2(RENAME_EXCHANGE)``; elsewhere the old one is renamed aside first), and
    only then the old one deleted, so an exception at any point leaves either the old
    or the new complete folder at `target`, never a half-written one. Native stores
    use the versioned, locked writer of :mod:`ensemblelab.io._versioned` instead.
    """
    target = Path(target)
    if target.is_dir() and not any(target.iterdir()):
        target.rmdir()  # an empty folder holds nothing to lose
    if target.exists():
        if not target.is_dir():
            raise StoreError(
                f"{target}: exists and is a file, not a {kind} folder. Hint: choose another path."
            )
        if not is_ours(target):
            raise StoreError(
                f"{target}: refusing to overwrite a folder that is not a {kind}. Hint: choose a "
                "new path or remove the folder yourself."
            )
        if not overwrite:
            raise StoreError(
                f"{target}: a {kind} already exists. Hint: pass overwrite=True to replace it."
            )
    target.parent.mkdir(parents=True, exist_ok=True)
    token = uuid.uuid4().hex[:8]
    tmp = target.with_name(f".{target.name}.tmp-{token}")
    tmp.mkdir()
    try:
        yield tmp
        if target.exists() and not is_ours(target):  # checked again just before replacing
            raise StoreError(f"{target}: changed while writing and is no longer a {kind}; "
                             "refusing to replace it. Hint: write to another path.")
        old = replace_folder(tmp, target)  # an atomic exchange where the system offers one
        if old is not None:
            shutil.rmtree(old, ignore_errors=True)
    finally:
        if tmp.exists():
            shutil.rmtree(tmp, ignore_errors=True)


def file_source(path: Path, *, fmt: str, **extra: Any) -> dict[str, Any]:
    """Provenance record of one input file (path, format, size, modification time)."""
    st = path.stat()
    rec: dict[str, Any] = {"path": str(path), "format": fmt, "size": int(st.st_size),
                           "mtime": float(st.st_mtime)}
    rec.update(extra)
    return rec


def parse_floats(text: str, expected: int | None = None) -> np.ndarray | None:
    """Parse whitespace-separated floats with numpy's C parser; None when a token is not a number.

    When `expected` is given, a different count also gives None.
    """
    with warnings.catch_warnings():
        warnings.simplefilter("error", DeprecationWarning)
        try:
            arr = np.fromstring(text, dtype=np.float64, sep=" ")
        except (DeprecationWarning, ValueError):
            return None
    if expected is not None and arr.size != expected:
        return None
    return arr


def report_nonfinite(
    arr: np.ndarray,
    *,
    name: str,
    nonfinite: str,
    path: object,
    frame_of_row: Any = None,
    stacklevel: int = 3,
) -> bool:
    """Raise ParseError (``nonfinite="raise"``) or warn (``"keep"``) when `arr` holds NaN/Inf.

    `frame_of_row(row) -> (frame, line)` maps a row of `arr` to a location. Returns
    whether `arr` held a non-finite value (kept).
    """
    if arr is None or arr.size == 0:
        return False
    flat = np.isfinite(arr.reshape(arr.shape[0], -1)).all(axis=1)
    if flat.all():
        return False
    bad_rows = np.flatnonzero(~flat)
    row = int(bad_rows[0])
    frame, line = frame_of_row(row) if frame_of_row is not None else (row, None)
    value = arr[row][~np.isfinite(arr[row])].ravel()[0]
    if nonfinite == "raise":
        raise ParseError(
            f"expected finite numbers, found {value} ({bad_rows.size} frame(s) affected).",
            path=path, frame=frame, line=line, field=name,
            hint="fix the file, or pass nonfinite='keep' to load it anyway (for example to let "
                 "the outlier detector find the broken trajectory).",
        )
    warnings.warn(
        f"{path}: field {name!r} holds non-finite values ({value}) in {bad_rows.size} frame(s), "
        f"first at frame {frame}; kept because nonfinite='keep'.",
        EnsembleWarning,
        stacklevel=stacklevel,
    )
    return True
