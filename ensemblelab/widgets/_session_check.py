"""Reading a session file safely: bounded in size and depth, every field typed.

A session file sits beside the data and may come from anyone, so nothing in it
is trusted: a wrong type, a huge file or a deeply nested value gives a
:class:`~ensemblelab.errors.SchemaError` naming the file and the field, before
anything is applied (the explorer shows it in its message area and keeps its
defaults).
"""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

from ..errors import SchemaError

__all__ = ["read_session_file", "check_session", "MAX_SESSION_BYTES", "MAX_SESSION_DEPTH"]

#: largest session file read (16 MiB)
MAX_SESSION_BYTES = 16 * 2**20
#: deepest nesting of lists and objects accepted
MAX_SESSION_DEPTH = 16
_MAP_KEYS = ("photon_energy", "probe_fwhm", "pump_fwhm", "n_photons", "resolution", "convolve",
             "decomposition")


def _short(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 60 else text[:60] + "..."


def _depth(obj: Any) -> int:
    deepest, stack = 0, [(obj, 1)]
    while stack:
        item, d = stack.pop()
        if isinstance(item, (dict, list)):
            deepest = max(deepest, d)
            if d > MAX_SESSION_DEPTH:
                return d
            stack.extend((v, d + 1) for v in (item.values() if isinstance(item, dict)
                                               else item))
    return deepest


def _is_int(v: Any) -> bool:
    return isinstance(v, int) and not isinstance(v, bool)


def check_session(state: Any, path: Path, *, format_name: str, version: int) -> dict[str, Any]:
    """Validate a parsed session; returns it unchanged or raises SchemaError."""
    def bad(field: str, expected: str, found: Any) -> SchemaError:
        return SchemaError(f"{path}: session field {field!r} must be {expected}; found "
                           f"{_short(found)}. Hint: delete the session file to start afresh.")

    if not isinstance(state, dict) or state.get("format") != format_name:
        found = state.get("format") if isinstance(state, dict) else type(state).__name__
        raise SchemaError(f"{path}: 'format' must be {format_name!r}; got {_short(found)}.")
    if _depth(state) > MAX_SESSION_DEPTH:
        raise SchemaError(f"{path}: the session nests deeper than {MAX_SESSION_DEPTH} levels. "
                          "Hint: delete the session file to start afresh.")
    v = state.get("version", 0)
    if not _is_int(v) or v < 0:
        raise bad("version", "an integer >= 0", v)
    if v > version:
        raise SchemaError(f"{path}: session version {v} is newer than this ensemblelab "
                          f"understands ({version}); upgrade ensemblelab.")
    if state.get("data") is not None and not isinstance(state["data"], str):
        raise bad("data", "text or null", state["data"])
    excluded = state.get("excluded", [])
    if not isinstance(excluded, list) or not all(_is_int(t) for t in excluded):
        raise bad("excluded", "a list of trajectory ids (integers)", excluded)
    labels = state.get("labels", {})
    if not isinstance(labels, dict):
        raise bad("labels", "a JSON object", labels)
    sel = state.get("selection", {})
    if sel is None:
        sel = {}
    if not isinstance(sel, dict):
        raise bad("selection", "a JSON object", sel)
    for key in ("energy_range", "delay_range"):
        pair = sel.get(key)
        if pair is not None and not (
                isinstance(pair, list) and len(pair) == 2
                and all(isinstance(x, (int, float)) and not isinstance(x, bool)
                        and math.isfinite(x) for x in pair)):
            raise bad(f"selection.{key}", "two finite numbers or null", pair)
    selected = sel.get("selected", [])
    if not isinstance(selected, list) or not all(_is_int(s) for s in selected):
        raise bad("selection.selected", "a list of snapshot ids (integers)", selected)
    for key in ("frame", "trajectory", "cluster"):
        if sel.get(key) is not None and not _is_int(sel[key]):
            raise bad(f"selection.{key}", "an integer or null", sel[key])
    if sel.get("group_by") is not None and sel["group_by"] not in ("cluster", "state", "traj"):
        raise bad("selection.group_by", "'cluster', 'state' or 'traj'", sel["group_by"])
    params = state.get("map", {})
    if params is None:
        params = {}
    if not isinstance(params, dict):
        raise bad("map", "a JSON object", params)
    for key, value in params.items():
        if key not in _MAP_KEYS:
            raise bad(f"map.{key}", f"one of {list(_MAP_KEYS)}", key)
        if not isinstance(value, (int, float, bool, str)) or (
                isinstance(value, float) and not math.isfinite(value)):
            raise bad(f"map.{key}", "a finite number, a boolean or text", value)
    return state


def read_session_file(path: Path, *, format_name: str, version: int) -> dict[str, Any]:
    """Read and validate a session file (bounded size and depth)."""
    try:
        size = path.stat().st_size
    except OSError as exc:
        raise SchemaError(f"{path}: cannot read the session file ({exc}).") from exc
    if size > MAX_SESSION_BYTES:
        raise SchemaError(f"{path}: the session file has {size} bytes, more than the limit of "
                          f"{MAX_SESSION_BYTES}. Hint: delete it to start afresh.")
    try:
        state = json.loads(path.read_text(encoding="utf-8"))
    except (ValueError, RecursionError) as exc:  # JSONDecodeError, UnicodeDecodeError
        raise SchemaError(f"{path}: not a JSON session file ({_short(str(exc))}).") from exc
    return check_session(state, path, format_name=format_name, version=version)
