"""Validation of store manifests: every field typed and bounded before anything is read.

A manifest is data from disk, so nothing in it is trusted: a wrong type, a
duplicate array name, a bool or negative schema version, a shape whose size
cannot fit in memory, a mass that is not a positive, plausible number, or a
file name that leaves the store gives a :class:`~ensemblelab.errors.StoreError`
naming the manifest and the entry (never ``KeyError``/``AttributeError``).
"""

from __future__ import annotations

import json
import math
import os
from collections.abc import Mapping
from pathlib import Path
from typing import Any, TypeGuard

import numpy as np

from ..data.ensemble import SCHEMA_VERSION, SNAPSHOT_ARRAYS, TRAJECTORY_ARRAYS
from ..errors import StoreError
from . import _safety
from ._safety import confined, excerpt

__all__ = ["load_manifest_json", "check_common", "check_single", "check_chunked",
           "MAX_MASS_AMU"]

#: heaviest plausible atomic mass (amu); the heaviest known element is about 300 amu
MAX_MASS_AMU = 1000.0
_HINT = "Hint: the store is corrupt or was tampered with; convert the original files again."
_KNOWN = {"geometries", "energies", *SNAPSHOT_ARRAYS, *TRAJECTORY_ARRAYS}


def _fail(mpath: Path, what: str) -> StoreError:
    return StoreError(f"{mpath}: {what} {_HINT}")


def load_manifest_json(mpath: Path) -> Any:
    """Parse a manifest file (bounded in size) or raise StoreError."""
    try:
        size = mpath.stat().st_size
        if size > _safety.MAX_MANIFEST_BYTES:
            raise _fail(mpath, f"the manifest is {size} bytes, more than the limit "
                               f"MAX_MANIFEST_BYTES = {_safety.MAX_MANIFEST_BYTES}.")
        return json.loads(mpath.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError, RecursionError) as exc:
        raise StoreError(f"{mpath}: the manifest is not valid JSON ({excerpt(exc, 80)}). "
                         f"{_HINT}") from exc
    except OSError as exc:
        raise StoreError(f"{mpath}: cannot read the manifest ({exc}). {_HINT}") from exc


def _is_int(v: Any) -> TypeGuard[int]:
    return isinstance(v, int) and not isinstance(v, bool)


def _count(m: Mapping[str, Any], key: str, mpath: Path, where: str = "") -> int:
    v = m.get(key)
    if not _is_int(v) or v < 0 or v > _safety.MAX_STORE_ELEMENTS:
        raise _fail(mpath, f"{where}{key!r} must be an integer >= 0 (at most "
                           f"{_safety.MAX_STORE_ELEMENTS}); found {excerpt(v)}.")
    return int(v)


def _str_list(m: Mapping[str, Any], key: str, mpath: Path, *, required: bool) -> list[str]:
    v = m.get(key, None if required else [])
    if not isinstance(v, list) or not all(isinstance(s, str) for s in v):
        raise _fail(mpath, f"{key!r} must be a list of strings; found {excerpt(v)}.")
    return v


def _dtype(value: Any, mpath: Path, where: str) -> np.dtype:
    try:
        dt = np.dtype(value) if isinstance(value, str) else None
    except (TypeError, ValueError):
        dt = None
    if dt is None or dt.kind not in "biufc" or dt.hasobject:
        raise _fail(mpath, f"{where}: dtype must name a numeric dtype such as '<f8'; found "
                           f"{excerpt(value)}.")
    return dt


def _shape(value: Any, mpath: Path, where: str) -> tuple[int, ...]:
    if not isinstance(value, list) or len(value) > 8 or not all(
            _is_int(x) and x >= 0 for x in value):
        raise _fail(mpath, f"{where}: the shape must be a list of at most 8 integers >= 0; "
                           f"found {excerpt(value)}.")
    return tuple(int(x) for x in value)


def _check_size(shape: tuple[int, ...], dt: np.dtype, mpath: Path, where: str) -> None:
    n = math.prod(shape)
    if n > _safety.MAX_STORE_ELEMENTS:
        raise _fail(mpath, f"{where}: the declared shape {shape} holds {n} elements "
                           f"({n * dt.itemsize} bytes), more than the limit MAX_STORE_ELEMENTS "
                           f"= {_safety.MAX_STORE_ELEMENTS}; it cannot fit in memory.")


#: the ``format`` value of a native store's manifest
STORE_FORMAT = "ensemblelab-store"


def check_common(m: Any, mpath: Path, *, layouts: tuple[str, ...]) -> dict[str, Any]:
    """Checks shared by both layouts; returns the manifest."""
    if not isinstance(m, dict):
        raise StoreError(f"{mpath}: expected format {STORE_FORMAT!r}, found a JSON "
                         f"{type(m).__name__}. Hint: this folder was not written by "
                         "ensemblelab.save.")
    if m.get("format") != STORE_FORMAT:
        raise StoreError(f"{mpath}: expected format {STORE_FORMAT!r}, found "
                         f"{excerpt(m.get('format'))}. Hint: this folder was not written by "
                         "ensemblelab.save.")
    version = m.get("schema_version")
    if not _is_int(version) or version < 1:
        raise _fail(mpath, f"schema_version must be an integer >= 1; found {excerpt(version)}.")
    if version > SCHEMA_VERSION:
        raise StoreError(f"{mpath}: the store has schema_version {version}, newer than this "
                         f"ensemblelab understands ({SCHEMA_VERSION}). Hint: upgrade "
                         "ensemblelab to read it.")
    layout = m.get("layout", "single")
    if layout not in layouts:
        raise StoreError(f"{mpath}: store layout {excerpt(layout)} is not one of "
                         f"{list(layouts)} read here. Hint: open it with ensemblelab.load(path)"
                         ", or upgrade ensemblelab.")
    required = ["n_snapshots", "n_trajectories", "symbols", "masses", "arrays", "tables"]
    if layout == "chunked":
        required += ["columns", "chunks"]
    missing = [k for k in required if k not in m]
    if missing:
        raise StoreError(f"{mpath}: the manifest lacks key(s) {missing}. Hint: the store is "
                         "corrupt; convert the original files again.")
    _count(m, "n_snapshots", mpath)
    _count(m, "n_trajectories", mpath)
    symbols = _str_list(m, "symbols", mpath, required=True)
    if any(not 0 < len(s) <= 3 for s in symbols):
        raise _fail(mpath, "'symbols' must be element symbols of 1 to 3 characters.")
    masses = m.get("masses")
    if not isinstance(masses, list) or len(masses) != len(symbols) or not all(
            isinstance(x, (int, float)) and not isinstance(x, bool) for x in masses):
        raise _fail(mpath, f"'masses' must be a list of {len(symbols)} numbers (one per atom); "
                           f"found {excerpt(masses)}.")
    bad = [x for x in masses if not (math.isfinite(x) and 0.0 < x <= MAX_MASS_AMU)]
    if bad:
        raise _fail(mpath, f"'masses' must be finite, > 0 and <= {MAX_MASS_AMU} amu; found "
                           f"{excerpt(bad[0])}.")
    _str_list(m, "state_labels", mpath, required=False)
    _str_list(m, "cation_labels", mpath, required=False)
    tables = m.get("tables")
    if not isinstance(tables, dict) or not all(isinstance(v, str) for v in tables.values()):
        raise _fail(mpath, f"'tables' must map table names to file names; found "
                           f"{excerpt(tables)}.")
    for key in ("metadata", "units"):
        if key in m and not isinstance(m[key], dict):
            raise _fail(mpath, f"{key!r} must be a JSON object; found {excerpt(m[key])}.")
    arrays = m.get("arrays")
    if not isinstance(arrays, list) or not all(isinstance(e, dict) for e in arrays):
        raise _fail(mpath, "'arrays' must be a list of objects.")
    names = [e.get("name") for e in arrays]
    for name in names:
        if not isinstance(name, str):
            raise _fail(mpath, f"an 'arrays' entry has the name {excerpt(name)}; expected one "
                               f"of {sorted(_KNOWN)}.")
        if name not in _KNOWN:
            raise StoreError(f"{mpath}: unknown array {excerpt(name)} in the manifest. Hint: "
                             "written by a newer ensemblelab? Upgrade to read it.")
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        raise _fail(mpath, f"the array(s) {dup} are listed more than once.")
    return m


def _check_file(root: Path, mpath: Path, entry: Any, what: str, *, need_file: bool) -> Path:
    path = confined(root, entry, what=what, manifest=mpath)
    if need_file and path.exists() and not path.is_file():
        raise _fail(mpath, f"{what} ({excerpt(entry)}) is not a file.")
    return path


def check_single(m: dict[str, Any], root: Path, mpath: Path) -> dict[str, Any]:
    """Checks of the single-file layout: array entries, shapes, confinement of every file."""
    n, n_traj = m["n_snapshots"], m["n_trajectories"]
    total = 0
    for e in m["arrays"]:
        name = e["name"]
        where = f"array {name!r}"
        _check_file(root, mpath, e.get("file"), where, need_file=True)
        dt = _dtype(e.get("dtype"), mpath, where)
        shape = _shape(e.get("shape"), mpath, where)
        _check_size(shape, dt, mpath, where)
        total += math.prod(shape)
        rows = n_traj if name in TRAJECTORY_ARRAYS else n
        if not shape or shape[0] != rows:
            raise StoreError(f"{mpath}: {name} is declared with shape {shape}, expected "
                             f"{rows} rows. Hint: the store is inconsistent; convert the "
                             "original files again.")
    if total > _safety.MAX_STORE_ELEMENTS:
        raise _fail(mpath, f"the arrays declare {total} elements in all, more than the limit "
                           f"MAX_STORE_ELEMENTS = {_safety.MAX_STORE_ELEMENTS}.")
    for key, file in m["tables"].items():
        _check_file(root, mpath, file, f"table {key!r}", need_file=True)
    return m


_CHUNK_INTS = ("n_snapshots", "n_trajectories")


def check_chunked(m: dict[str, Any], root: Path, mpath: Path) -> dict[str, Any]:
    """Checks of the chunked layout, with the chunk records cross-checked.

    Every chunk ``dir`` must lie inside the store; the records' snapshot and
    trajectory counts must add up to the declared totals, their row offsets and
    trajectory ids must follow each other, and the chunk folders present on disk
    beside the named ones must be exactly those the manifest lists.
    """
    for e in m["arrays"]:
        where = f"array {e['name']!r}"
        dt = _dtype(e.get("dtype"), mpath, where)
        tail = _shape(e.get("tail"), mpath, where)
        if e.get("per") not in ("snapshot", "trajectory"):
            raise _fail(mpath, f"{where}: 'per' must be 'snapshot' or 'trajectory'; found "
                               f"{excerpt(e.get('per'))}.")
        rows = m["n_trajectories"] if e["per"] == "trajectory" else m["n_snapshots"]
        _check_size((rows, *tail), dt, mpath, where)
    _str_list(m, "columns", mpath, required=True)
    for key, file in m["tables"].items():
        _check_file(root, mpath, file, f"table {key!r}", need_file=True)
    chunks = m["chunks"]
    if not isinstance(chunks, list) or not all(isinstance(c, dict) for c in chunks):
        raise _fail(mpath, "'chunks' must be a list of objects.")
    rows = trajs = 0
    last_traj: int | None = None
    parents: dict[Path, set[str]] = {}
    dirs = set()
    for i, c in enumerate(chunks):
        where = f"chunk record {i}: "
        d = _check_file(root, mpath, c.get("dir"), f"chunk {i} 'dir'", need_file=False)
        if c["dir"] in dirs:
            raise _fail(mpath, f"{where}the folder {excerpt(c['dir'])} is listed twice.")
        dirs.add(c["dir"])
        parents.setdefault(d.parent, set()).add(d.name)
        n_s = _count(c, "n_snapshots", mpath, where)
        n_t = _count(c, "n_trajectories", mpath, where)
        for key, expect in (("row_start", rows), ("traj_row_start", trajs)):
            if key in c and c[key] != expect:
                raise _fail(mpath, f"{where}{key} is {excerpt(c[key])}, but the records before "
                                   f"it hold {expect} rows: a chunk record is missing or "
                                   "out of order.")
        for key in ("traj_first", "traj_last"):
            if key in c and not _is_int(c[key]):
                raise _fail(mpath, f"{where}{key!r} must be an integer; found "
                                   f"{excerpt(c[key])}.")
        if "traj_first" in c and last_traj is not None and c["traj_first"] <= last_traj:
            raise _fail(mpath, f"{where}trajectory ids do not increase from the chunk before.")
        last_traj = c.get("traj_last", last_traj)
        rows += n_s
        trajs += n_t
    if rows != m["n_snapshots"] or trajs != m["n_trajectories"]:
        raise _fail(mpath, f"the chunk records hold {rows} snapshots and {trajs} trajectories, "
                           f"but the manifest declares {m['n_snapshots']} and "
                           f"{m['n_trajectories']}: a chunk record is missing or altered.")
    for parent, named in parents.items():
        try:
            present = {p for p in os.listdir(parent) if p.startswith("c")}
        except OSError:
            continue
        extra = sorted(present - named)
        if extra:
            raise _fail(mpath, f"the chunk folder(s) {extra[:5]} in {parent.name}/ are not "
                               "listed in the manifest: a chunk record was removed.")
    return m
