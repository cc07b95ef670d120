"""Reading the chunked native store (see :mod:`ensemblelab.io.chunked` for the layout).

The manifest is validated once per version (:func:`read_chunked_manifest`): every
field typed, every chunk ``dir`` inside the store, the chunk records cross-checked
against the declared totals and against the chunk folders present. Every file read
is confined to the store (a symbolic link out of it is refused).
"""

from __future__ import annotations

import functools
import json
from collections.abc import Iterable, Iterator, Mapping
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from ..data.ensemble import REQUIRED_COLUMNS, Ensemble
from ..errors import SchemaError, StoreError
from ._common import decode_metadata
from ._manifest import check_chunked, check_common, load_manifest_json
from ._safety import confined

__all__ = ["is_chunked_store", "read_chunked_manifest", "load_chunk", "load_chunk_array",
           "read_chunk_fields", "read_chunk_times", "read_chunk_table", "iter_chunk_indices"]

_MANIFEST = "manifest.json"
_FORMAT = "ensemblelab-store"
_TIMES = "times.npy"  # per chunk: its sorted distinct snapshot times (fs)


def is_chunked_store(path: str | Path) -> bool:
    """True when `path` is a native store folder with ``layout = "chunked"``."""
    manifest = Path(path) / _MANIFEST
    if not manifest.is_file():
        return False
    try:
        data = json.loads(manifest.read_text())
    except (ValueError, OSError, RecursionError):
        return False
    return isinstance(data, dict) and data.get("format") == _FORMAT and \
        data.get("layout") == "chunked"


def fake_geometries(n: int, n_atoms: int) -> np.ndarray:
    """A read-only zero array of shape (n, n_atoms, 3) that takes no memory."""
    return np.broadcast_to(np.zeros((1, 1, 3)), (n, n_atoms, 3))


@functools.lru_cache(maxsize=32)
def _manifest_cached(path: str, key: tuple[int, int, int]) -> str:
    """The validated manifest text of the store at `path` (one version: mtime, inode, size)."""
    root = Path(path)
    mpath = root / _MANIFEST
    manifest = load_manifest_json(mpath)
    check_chunked(check_common(manifest, mpath, layouts=("chunked",)), root, mpath)
    return json.dumps(manifest)


def read_chunked_manifest(path: str | Path) -> dict[str, Any]:
    """Read and check the manifest of a chunked store.

    Raises
    ------
    StoreError
        Missing or invalid manifest, another layout, a future schema, a field of
        the wrong type, a chunk folder outside the store, chunk records that do not
        add up to the declared totals or do not match the chunk folders present.
    """
    path = Path(path)
    mpath = path / _MANIFEST
    if not mpath.is_file():
        raise StoreError(f"{path}: not a native store (no {_MANIFEST}). Hint: write one with "
                         "ensemblelab convert --chunked or ChunkedStoreWriter.")
    st = mpath.stat()
    return json.loads(_manifest_cached(str(path.resolve()), (st.st_mtime_ns, st.st_ino,
                                                              st.st_size)))


def _chunk_file(path: Path, chunk: Mapping[str, Any], name: str) -> Path:
    """A file of a chunk, refused when it (through a link) leaves the store."""
    return confined(path, f"{chunk['dir']}/{name}", what=f"file {name!r} of {chunk['dir']}")


def load_npy(file: Path, entry: Mapping[str, Any], rows: int, mmap: bool) -> np.ndarray:
    if not file.is_file():
        raise StoreError(f"{file}: array file of {entry['name']} is missing. Hint: the store is "
                         "incomplete; convert the original files again.")
    try:
        arr = np.load(file, mmap_mode="r" if mmap else None, allow_pickle=False)
    except (ValueError, OSError, EOFError, MemoryError) as exc:
        raise StoreError(f"{file}: cannot read the array ({exc}). Hint: the file is corrupt; "
                         "convert the original files again.") from exc
    want = (rows, *entry["tail"])
    if arr.shape != want or arr.dtype != np.dtype(entry["dtype"]):
        raise StoreError(f"{file}: expected {entry['name']} of shape {want} and dtype "
                         f"{np.dtype(entry['dtype'])}, found {arr.shape} {arr.dtype}. Hint: the "
                         "store is inconsistent; convert the original files again.")
    if not mmap:
        arr.setflags(write=False)
    return arr


def load_chunk_array(path: str | Path, index: int, name: str, *, mmap: bool = False
                     ) -> np.ndarray:
    """One stored array of chunk `index`, in its stored dtype."""
    path = Path(path)
    manifest = read_chunked_manifest(path)
    chunk = manifest["chunks"][index]
    entry = next((e for e in manifest["arrays"] if e["name"] == name), None)
    if entry is None:
        raise KeyError(f"the store has no array {name!r}.")
    rows = chunk["n_trajectories"] if entry["per"] == "trajectory" else chunk["n_snapshots"]
    return load_npy(_chunk_file(path, chunk, f"{name}.npy"), entry, rows, mmap)


def read_chunk_fields(path: str | Path, manifest: Mapping[str, Any], index: int,
                      names: Iterable[str], *, columns: Iterable[str] = ("traj", "time",
                                                                        "active"),
                      mmap: bool = True) -> tuple[pd.DataFrame, pd.DataFrame, dict[str, Any]]:
    """Only some arrays and snapshot columns of chunk `index`, without building an Ensemble.

    For computations that touch a few fields of every chunk: nothing else is read
    (no geometries) and the arrays are memory-mapped. Shapes and dtypes are checked
    against `manifest`; the deeper checks of :class:`~ensemblelab.Ensemble` are not
    made (use :func:`load_chunk` for a validated chunk).

    Parameters
    ----------
    path : str or Path
        The store folder.
    manifest : mapping
        Its manifest (:func:`read_chunked_manifest`), passed in so that a task
        does not parse it again.
    index : int
        Chunk number (0-based).
    names : iterable of str
        Arrays to read; names the store does not hold are returned as None.
    columns : iterable of str
        Snapshot columns to read.
    mmap : bool
        Memory-map the arrays (read-only) instead of reading them.

    Returns
    -------
    snapshots : pandas.DataFrame
        The requested columns, one row per snapshot of the chunk.
    trajectories : pandas.DataFrame
        The chunk's rows of the trajectory table.
    arrays : dict of str to ndarray or None
        In their stored dtype.
    """
    path = Path(path)
    chunks = manifest["chunks"]
    if not 0 <= int(index) < len(chunks):
        raise IndexError(f"chunk index {index} out of range [0, {len(chunks)}).")
    chunk = chunks[int(index)]
    entries = {e["name"]: e for e in manifest["arrays"]}
    folder = path / chunk["dir"]
    frame = read_parquet_columns(_chunk_file(path, chunk, "snapshots.parquet"), list(columns))
    trajs = read_parquet_columns(_chunk_file(path, chunk, "trajectories.parquet"), None)
    if len(frame) != chunk["n_snapshots"] or len(trajs) != chunk["n_trajectories"]:
        raise StoreError(f"{folder}: {len(frame)} snapshot and {len(trajs)} trajectory rows, "
                         f"the manifest says {chunk['n_snapshots']} and "
                         f"{chunk['n_trajectories']}. Hint: the store is inconsistent; "
                         "convert the original files again.")
    arrays: dict[str, Any] = {}
    for name in names:
        entry = entries.get(name)
        if entry is None:
            arrays[name] = None
            continue
        rows = chunk["n_trajectories"] if entry["per"] == "trajectory" else chunk["n_snapshots"]
        arrays[name] = load_npy(_chunk_file(path, chunk, f"{name}.npy"), entry, rows, mmap)
    return frame, trajs, arrays


def read_chunk_times(path: str | Path, manifest: Mapping[str, Any], index: int) -> np.ndarray:
    """Sorted distinct snapshot times (fs) of chunk `index` (``times.npy`` when present)."""
    path = Path(path)
    chunk = manifest["chunks"][int(index)]
    file = _chunk_file(path, chunk, _TIMES)
    if "n_times" in chunk and file.is_file():
        entry = {"name": "times", "dtype": "<f8", "tail": []}
        return load_npy(file, entry, chunk["n_times"], False)
    frame = read_parquet_columns(_chunk_file(path, chunk, "snapshots.parquet"), ["time"])
    return np.unique(frame["time"].to_numpy(dtype=np.float64))


def read_parquet_columns(file: Path, columns: list[str] | None) -> pd.DataFrame:
    try:
        return pd.read_parquet(file, columns=columns)
    except Exception as exc:  # pyarrow raises its own error types
        raise StoreError(f"{file}: cannot read the Parquet table ({exc}). Hint: the store is "
                         "incomplete or corrupt; convert the original files again.") from exc


def read_chunk_table(path: str | Path, index: int, table: str = "snapshots",
                     columns: list[str] | None = None) -> pd.DataFrame:
    """The snapshot (or trajectory) table of chunk `index`."""
    path = Path(path)
    manifest = read_chunked_manifest(path)
    if table not in ("snapshots", "trajectories"):
        raise ValueError(f"table must be 'snapshots' or 'trajectories'; got {table!r}.")
    file = _chunk_file(path, manifest["chunks"][index], f"{table}.parquet")
    try:
        return pd.read_parquet(file, columns=columns)
    except Exception as exc:  # pyarrow raises its own error types
        raise StoreError(f"{file}: cannot read the Parquet table ({exc}). Hint: the store is "
                         "incomplete or corrupt; convert the original files again.") from exc


def load_chunk(path: str | Path, index: int, *, fields: Iterable[str] | None = None,
               columns: Iterable[str] | None = None, mmap: bool = False) -> Ensemble:
    """Chunk `index` of a chunked store as an in-memory Ensemble of whole trajectories.

    Parameters
    ----------
    path : str or Path
        The store folder.
    index : int
        Chunk number (0-based).
    fields : iterable of str, optional
        Arrays to read (default all). ``energies`` is always read; without
        ``geometries`` the chunk holds read-only zero placeholders of the right
        shape (for computations that do not need coordinates).
    columns : iterable of str, optional
        Extra snapshot columns to read besides the required ones (default all).
    mmap : bool
        Memory-map the arrays instead of reading them (float64 arrays only are
        then used without a copy).

    Returns
    -------
    Ensemble
    """
    path = Path(path)
    manifest = read_chunked_manifest(path)
    chunks = manifest["chunks"]
    if not 0 <= int(index) < len(chunks):
        raise IndexError(f"chunk index {index} out of range [0, {len(chunks)}).")
    chunk = chunks[int(index)]
    wanted = None if fields is None else {"energies", *fields}
    if wanted is not None and wanted & {"dyson", "adt_cation"}:
        wanted.add("cation_energies")  # they need it to be valid
    cols = None
    if columns is not None:
        extra = [c for c in manifest["columns"] if c in set(columns)]
        cols = [*REQUIRED_COLUMNS, *[c for c in extra if c not in REQUIRED_COLUMNS]]
    frame = read_chunk_table(path, index, "snapshots", cols)
    trajs = read_chunk_table(path, index, "trajectories")
    arrays: dict[str, Any] = {}
    for entry in manifest["arrays"]:
        name = entry["name"]
        if wanted is not None and name not in wanted:
            continue
        rows = chunk["n_trajectories"] if entry["per"] == "trajectory" else chunk["n_snapshots"]
        arrays[name] = load_npy(_chunk_file(path, chunk, f"{name}.npy"), entry, rows, mmap)
    if "geometries" not in arrays:
        arrays["geometries"] = fake_geometries(chunk["n_snapshots"], len(manifest["symbols"]))
    metadata = decode_metadata(manifest.get("metadata", {}))
    try:
        return Ensemble(
            snapshots=frame,
            trajectories=trajs.drop(columns=["n_steps", "t_end"], errors="ignore"),
            symbols=tuple(manifest["symbols"]),
            masses=np.asarray(manifest["masses"], dtype=np.float64),
            state_labels=tuple(manifest.get("state_labels", ())),
            cation_labels=tuple(manifest.get("cation_labels", ()))
            if "cation_energies" in arrays else (),
            metadata=metadata,
            **arrays,
        )
    except SchemaError as exc:
        raise StoreError(f"{path}: chunk {index} is inconsistent ({exc}). Hint: convert the "
                         "original files again.") from exc


def iter_chunk_indices(manifest: Mapping[str, Any], traj_ids: np.ndarray) -> Iterator[int]:
    """Chunks that hold any of the (sorted) trajectory ids."""
    for i, chunk in enumerate(manifest["chunks"]):
        lo = np.searchsorted(traj_ids, chunk["traj_first"], side="left")
        hi = np.searchsorted(traj_ids, chunk["traj_last"], side="right")
        if hi > lo:
            yield i
