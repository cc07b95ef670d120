"""The chunked native store: an ensemble split into blocks of whole trajectories.

For ensembles larger than memory. Written incrementally (one chunk at a time)
by :class:`ChunkedStoreWriter`, read chunk by chunk by :func:`load_chunk` and
lazily by :class:`ensemblelab.io.lazy.LazyEnsemble` (``load(path, lazy=True)``).

Layout (``layout: "chunked"``, schema version 1)
------------------------------------------------
::

    big.ens/
        manifest.json              what is in the folder (below)
        trajectories.parquet       every trajectory (traj, weight, initial_state, n_steps,
                                   t_end, user columns); small, read eagerly
        chunks/
            c000000/
                snapshots.parquet  the chunk's rows of the snapshot table
                trajectories.parquet  the chunk's rows of the trajectory table
                times.npy          the chunk's sorted distinct snapshot times (fs)
                geometries.npy     (n_chunk_snapshots, n_atoms, 3) in the stored dtype
                energies.npy       (n_chunk_snapshots, n_states)
                <name>.npy         every other per-snapshot array, and the per-trajectory
                                   arrays (excitation_energies, ...) of the chunk's
                                   trajectories
            c000001/
            ...

A trajectory never straddles two chunks, and trajectory ids increase strictly
from chunk to chunk, so the concatenation of the chunks in order is the
in-memory :class:`~ensemblelab.Ensemble` (sorted by trajectory, then time).

``manifest.json`` has the keys of the single-file store (``format``,
``schema_version``, ``created_by``, ``units``, ``n_snapshots``,
``n_trajectories``, ``symbols``, ``masses``, ``state_labels``,
``cation_labels``, ``metadata``) with ``layout = "chunked"``, plus

==============  ===================================================================
key             meaning
==============  ===================================================================
``arrays``      list of ``{"name", "dtype", "tail", "per"}``: stored dtype, shape after
                the first axis, ``per`` = ``"snapshot"`` or ``"trajectory"``
``columns``     the snapshot table's columns, in order
``tables``      ``{"trajectories": "trajectories.parquet"}``
``chunks``      list of ``{"dir", "n_snapshots", "n_trajectories", "row_start",
                "traj_row_start", "traj_first", "traj_last", "t_min", "t_max",
                "n_times", "dt_values", "dt_counts", "ip_min", "ip_max"}``
==============  ===================================================================

The chunk records carry the summaries a computation would otherwise need a
pass over the data for, written when the chunk is written: the time range
(``t_min``, ``t_max``, fs), the number of distinct times (``n_times``; the
times themselves are in the chunk's ``times.npy``), the distinct time steps
within trajectories with their counts (``dt_values``, ``dt_counts``; left out
when a chunk has more than 256 distinct steps) and the range of the finite
ionisation energies ``cation_energies - energies[active]`` in eV (``ip_min``,
``ip_max``; None without cation energies or finite values). Readers treat every
one of these keys as optional (a store without them is read with a pass over
the chunks).

Arrays keep the dtype they were written with (for example float32 geometries)
and are read with ``allow_pickle=False``. The chunk folders and the trajectory
table of one save live in a version folder ``v-<hex>/`` that the manifest names
(``"dir": "v-1a2b3c4d5e6f/chunks/c000000"``; stores written before keep them at
the top level). :meth:`ChunkedStoreWriter.close` switches ``manifest.json``
atomically under a writer lock (see :mod:`ensemblelab.io._versioned`); an
interrupted write leaves the previous store (or nothing) at the target. Reading
is in :mod:`ensemblelab.io._chunked_read` (re-exported here), which validates the
manifest and confines every file to the store.
"""

from __future__ import annotations

import contextlib
import copy as _copy
import json
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from ..data.ensemble import (
    SCHEMA_VERSION,
    SNAPSHOT_ARRAYS,
    TRAJECTORY_ARRAYS,
    Ensemble,
)
from ..errors import SchemaError, StoreError
from ._chunked_read import (  # noqa: F401  (re-exported: public import paths)
    fake_geometries,
    is_chunked_store,
    iter_chunk_indices,
    load_chunk,
    load_chunk_array,
    load_npy,
    read_chunk_fields,
    read_chunk_table,
    read_chunk_times,
    read_chunked_manifest,
    read_parquet_columns,
)
from ._common import decode_metadata, dumps_json, encode_metadata
from ._versioned import StoreTransaction, store_transaction

__all__ = [
    "ChunkedStoreWriter",
    "save_chunked",
    "load_chunk",
    "read_chunked_manifest",
    "is_chunked_store",
    "convert_extxyz_chunked",
    "DEFAULT_CHUNK_TRAJECTORIES",
]

#: default number of trajectories per chunk
DEFAULT_CHUNK_TRAJECTORIES = 1000
_MANIFEST = "manifest.json"
_FORMAT = "ensemblelab-store"
_SNAP_NAMES = ("geometries", "energies", *SNAPSHOT_ARRAYS)
_TIMES = "times.npy"  # per chunk: its sorted distinct snapshot times (fs)
_MAX_DT_VALUES = 256  # most distinct time steps a chunk record lists


def _chunk_stats(ens: Ensemble, arrays: Mapping[str, np.ndarray]) -> dict[str, Any]:
    """Summaries of one chunk kept in the manifest so that readers need no pre-pass.

    ``dt_values`` / ``dt_counts``: the distinct time steps within trajectories and
    how often each occurs (omitted when there are more than ``_MAX_DT_VALUES``);
    ``ip_min`` / ``ip_max``: the smallest and largest finite ionisation energy
    ``cation_energies - energies[active]`` (eV; None when there is none), computed
    in float64 from the arrays as stored.
    """
    out: dict[str, Any] = {}
    time = ens.snapshots["time"].to_numpy()
    traj = ens.snapshots["traj"].to_numpy()
    dt = np.diff(time)[traj[1:] == traj[:-1]]
    u, c = np.unique(dt, return_counts=True)
    if u.size <= _MAX_DT_VALUES:
        out["dt_values"] = [float(v) for v in u]
        out["dt_counts"] = [int(v) for v in c]
    cation = arrays.get("cation_energies", ens.cation_energies)
    if cation is not None:
        energies = np.asarray(arrays.get("energies", ens.energies), dtype=np.float64)
        active = ens.snapshots["active"].to_numpy()
        e_neutral = energies[np.arange(ens.n_snapshots), active]
        ip = np.asarray(cation, dtype=np.float64) - e_neutral[:, None]
        ip = ip[np.isfinite(ip)]
        out["ip_min"] = float(ip.min()) if ip.size else None
        out["ip_max"] = float(ip.max()) if ip.size else None
    return out


# ----------------------------------------------------------------------------- writing
class ChunkedStoreWriter:
    """Write a chunked native store incrementally, one block of trajectories at a time.

    Use as a context manager; nothing appears at `path` until :meth:`close`
    (called on a clean exit) renames the finished folder into place. An
    exception inside the ``with`` block removes the partial folder.

    Parameters
    ----------
    path : str or Path
        Target store folder.
    chunk_size : int
        Trajectories per chunk for :meth:`append` (buffered until this many).
    overwrite : bool
        Replace an existing store (never a folder that is not a store).
    metadata : mapping, optional
        Ensemble metadata; default the metadata of the first appended ensemble.
    renumber : bool
        Give snapshots the ids 0, 1, ... in store order (default). False keeps
        the ``snapshot`` column of the appended ensembles (must stay unique).

    Examples
    --------
    >>> import tempfile, pathlib
    >>> from ensemblelab.testing import make_toy_ensemble
    >>> ens = make_toy_ensemble(6, t_max=10.0)
    >>> tmp = pathlib.Path(tempfile.mkdtemp())
    >>> with ChunkedStoreWriter(tmp / "big.ens", chunk_size=4) as w:
    ...     for i in ens.trajectories["traj"]:
    ...         w.append(ens.trajectory(i))
    >>> read_chunked_manifest(tmp / "big.ens")["n_trajectories"]
    6
    """

    def __init__(self, path: str | Path, *, chunk_size: int = DEFAULT_CHUNK_TRAJECTORIES,
                 overwrite: bool = False, metadata: Mapping[str, Any] | None = None,
                 renumber: bool = True) -> None:
        if not isinstance(chunk_size, int | np.integer) or chunk_size < 1:
            raise SchemaError(f"The 'chunk_size' parameter must be an int >= 1 (trajectories "
                              f"per chunk). Got {chunk_size!r} instead.")
        self.path = Path(path)
        self.chunk_size = int(chunk_size)
        self.renumber = bool(renumber)
        self._meta = None if metadata is None else encode_metadata(metadata)
        self._stack = contextlib.ExitStack()
        self._txn: StoreTransaction = self._stack.enter_context(
            store_transaction(self.path, overwrite=overwrite, kind="native store"))
        self._tmp: Path | None = self._txn.folder
        (self._tmp / "chunks").mkdir()
        self._buffer: list[Ensemble] = []
        self._buffered = 0
        self._schema: dict[str, Any] | None = None
        self._chunks: list[dict[str, Any]] = []
        self._traj_tables: list[pd.DataFrame] = []
        self._rows = 0
        self._traj_rows = 0
        self._last_traj: int | None = None
        self._closed = False

    # -- context manager
    def __enter__(self) -> ChunkedStoreWriter:
        return self

    def __exit__(self, exc_type: Any, exc: Any, tb: Any) -> None:
        if exc_type is None:
            self.close()
        else:
            self.abort()

    @property
    def n_chunks(self) -> int:
        """Chunks written so far."""
        return len(self._chunks)

    @property
    def n_snapshots(self) -> int:
        """Snapshots written so far (not counting the buffer)."""
        return self._rows

    def append(self, ens: Ensemble) -> None:
        """Buffer whole trajectories; a chunk is written when `chunk_size` are buffered.

        Parameters
        ----------
        ens : Ensemble
            One or more whole trajectories whose ids are all larger than every
            id appended before.
        """
        self._check_open()
        if not isinstance(ens, Ensemble):
            raise SchemaError(f"append() takes an Ensemble; got {type(ens).__name__}.")
        if ens.n_trajectories == 0:
            return
        self._buffer.append(ens)
        self._buffered += ens.n_trajectories
        while self._buffered >= self.chunk_size:
            self._flush(self.chunk_size)

    def write_chunk(self, ens: Ensemble, *, arrays: Mapping[str, np.ndarray] | None = None
                    ) -> None:
        """Write `ens` as one chunk now (after flushing the buffer).

        Parameters
        ----------
        ens : Ensemble
            Whole trajectories, ids larger than every id written before.
        arrays : mapping of str to ndarray, optional
            Per-snapshot arrays to store instead of the ensemble's own, in their
            own dtype (for example float32 geometries; same shape). Lets a
            generator build the chunk's Ensemble with placeholder geometries.
        """
        self._check_open()
        self.flush()
        self._write(ens, arrays or {})

    def flush(self) -> None:
        """Write whatever is buffered as (possibly smaller) chunks."""
        while self._buffered:
            self._flush(min(self._buffered, self.chunk_size))

    def close(self) -> Path:
        """Flush, write the manifest and move the store into place. Returns the path."""
        if self._closed:
            return self.path
        try:
            self.flush()
            if self._schema is None:
                raise StoreError(f"{self.path}: nothing was written (no trajectories). Hint: "
                                 "append at least one trajectory before closing.")
            self._finish()
        except BaseException:
            self.abort()
            raise
        self._closed = True
        self._stack.close()  # releases the writer lock
        return self.path

    def abort(self) -> None:
        """Discard everything written (the previous store, if any, stays)."""
        if self._closed:
            return
        self._closed = True
        self._buffer.clear()
        with contextlib.suppress(_Abort):
            self._stack.__exit__(_Abort, _Abort(), None)

    # -- internals
    def _check_open(self) -> None:
        if self._closed:
            raise StoreError(f"{self.path}: the writer is closed.")

    def _flush(self, n_traj: int) -> None:
        take: list[Ensemble] = []
        count = 0
        while self._buffer and count < n_traj:
            ens = self._buffer[0]
            need = n_traj - count
            if ens.n_trajectories <= need:
                take.append(self._buffer.pop(0))
                count += ens.n_trajectories
            else:
                ids = ens.trajectories["traj"].to_numpy()
                take.append(ens.select(ids[:need]))
                self._buffer[0] = ens.select(ids[need:])
                count += need
        self._buffered -= count
        self._write(concat_ensembles(take), {})

    def _schema_of(self, ens: Ensemble, arrays: Mapping[str, np.ndarray]) -> dict[str, Any]:
        entries = []
        for name in _SNAP_NAMES:
            arr = arrays.get(name, getattr(ens, name))
            if arr is not None:
                entries.append({"name": name, "dtype": np.dtype(arr.dtype).str,
                                "tail": list(arr.shape[1:]), "per": "snapshot"})
        for name in TRAJECTORY_ARRAYS:
            arr = getattr(ens, name)
            if arr is not None:
                entries.append({"name": name, "dtype": np.dtype(arr.dtype).str,
                                "tail": list(arr.shape[1:]), "per": "trajectory"})
        return {
            "symbols": list(ens.symbols),
            "masses": [float(m) for m in ens.masses],
            "state_labels": list(ens.state_labels),
            "cation_labels": list(ens.cation_labels),
            "arrays": entries,
            "columns": list(ens.snapshots.columns),
            "traj_columns": [c for c in ens.trajectories.columns],
        }

    def _write(self, ens: Ensemble, arrays: Mapping[str, np.ndarray]) -> None:
        unknown = set(arrays) - set(_SNAP_NAMES)
        if unknown:
            raise SchemaError(f"write_chunk(arrays=...) takes per-snapshot arrays "
                              f"{list(_SNAP_NAMES)}; got {sorted(unknown)}.")
        for name, arr in arrays.items():
            own = getattr(ens, name)
            if own is None or arr.shape != own.shape:
                raise SchemaError(f"write_chunk(arrays=...): {name} must have the shape of the "
                                  f"chunk's own array {None if own is None else own.shape}; "
                                  f"got {arr.shape}.")
        schema = self._schema_of(ens, arrays)
        if self._schema is None:
            self._schema = schema
            if self._meta is None:
                self._meta = encode_metadata(ens.metadata)
        elif schema != self._schema:
            diff = [k for k in schema if schema[k] != self._schema[k]]
            raise SchemaError(
                f"chunk {len(self._chunks)} does not match the first chunk in {diff} "
                f"(first: {[self._schema[k] for k in diff]}, this: {[schema[k] for k in diff]}). "
                "Hint: every trajectory of a store needs the same atoms, states, arrays and "
                "columns."
            )
        ids = ens.trajectories["traj"].to_numpy()
        if self._last_traj is not None and ids[0] <= self._last_traj:
            raise SchemaError(
                f"trajectory ids must increase from chunk to chunk; got id {int(ids[0])} after "
                f"{self._last_traj}. Hint: append trajectories in increasing id order."
            )
        assert self._tmp is not None
        name = f"c{len(self._chunks):06d}"
        folder = self._tmp / "chunks" / name
        folder.mkdir()
        n = ens.n_snapshots
        frame = ens.snapshots
        if self.renumber:
            frame = frame.copy()
            frame["snapshot"] = np.arange(self._rows, self._rows + n, dtype=np.int64)
        for entry in schema["arrays"]:
            arr = arrays.get(entry["name"], getattr(ens, entry["name"]))
            np.save(folder / f"{entry['name']}.npy", np.ascontiguousarray(arr),
                    allow_pickle=False)
        trajs = ens.trajectories
        try:
            frame.to_parquet(folder / "snapshots.parquet", index=False)
            trajs.to_parquet(folder / "trajectories.parquet", index=False)
        except (TypeError, ValueError, ImportError) as exc:
            raise StoreError(
                f"{self.path}: cannot write the tables as Parquet ({exc}). Hint: user columns "
                "must hold numbers, booleans or text of one type."
            ) from exc
        time = frame["time"].to_numpy()
        times = np.unique(time)
        np.save(folder / _TIMES, times, allow_pickle=False)
        record = {
            "dir": self._txn.rel(f"chunks/{name}"),
            "n_snapshots": int(n),
            "n_trajectories": int(len(ids)),
            "row_start": int(self._rows),
            "traj_row_start": int(self._traj_rows),
            "traj_first": int(ids[0]),
            "traj_last": int(ids[-1]),
            "t_min": float(time.min()) if n else 0.0,
            "t_max": float(time.max()) if n else 0.0,
            "n_times": int(times.size),
        }
        record.update(_chunk_stats(ens, arrays))
        self._chunks.append(record)
        self._traj_tables.append(trajs)
        self._rows += n
        self._traj_rows += len(ids)
        self._last_traj = int(ids[-1])

    def _finish(self) -> None:
        from .. import __version__

        assert self._tmp is not None and self._schema is not None
        trajs = pd.concat(self._traj_tables, ignore_index=True)
        trajs.to_parquet(self._tmp / "trajectories.parquet", index=False)
        meta = dict(self._meta or {})
        manifest = {
            "format": _FORMAT,
            "schema_version": SCHEMA_VERSION,
            "layout": "chunked",
            "created_by": f"ensemblelab {__version__}",
            "units": decode_metadata(meta).get("units", {}),
            "n_snapshots": int(self._rows),
            "n_trajectories": int(self._traj_rows),
            "symbols": self._schema["symbols"],
            "masses": self._schema["masses"],
            "state_labels": self._schema["state_labels"],
            "cation_labels": self._schema["cation_labels"],
            "tables": {"trajectories": self._txn.rel("trajectories.parquet")},
            "arrays": self._schema["arrays"],
            "columns": self._schema["columns"],
            "chunks": self._chunks,
            "metadata": meta,
        }
        self._txn.commit(manifest, dumps_json)


class _Abort(Exception):
    """Raised into the atomic-folder context to discard a partial store."""


def concat_ensembles(parts: list[Ensemble]) -> Ensemble:
    """Concatenate ensembles of disjoint, increasing trajectories (internal helper).

    Returns
    -------
    Ensemble
        A new Ensemble (metadata of the first part).
    """
    if len(parts) == 1:
        return parts[0]
    first = parts[0]
    arrays: dict[str, Any] = {}
    for name in (*SNAPSHOT_ARRAYS, *TRAJECTORY_ARRAYS):
        vals = [getattr(p, name) for p in parts]
        if all(v is None for v in vals):
            arrays[name] = None
        elif any(v is None for v in vals):
            raise SchemaError(f"cannot concatenate: {name} is present in some parts only.")
        else:
            arrays[name] = np.concatenate(vals)
    frame = pd.concat([p.snapshots for p in parts], ignore_index=True)
    trajs = pd.concat([p.trajectories.drop(columns=["n_steps", "t_end"]) for p in parts],
                      ignore_index=True)
    return Ensemble(
        snapshots=frame,
        geometries=np.concatenate([p.geometries for p in parts]),
        energies=np.concatenate([p.energies for p in parts]),
        symbols=first.symbols, masses=first.masses, trajectories=trajs,
        state_labels=first.state_labels, cation_labels=first.cation_labels,
        metadata=_copy.deepcopy(first.metadata), **arrays,
    )


def save_chunked(ens: Ensemble, path: str | Path, *,
                 chunk_size: int = DEFAULT_CHUNK_TRAJECTORIES,
                 overwrite: bool = False) -> Path:
    """Write an in-memory ensemble as a chunked store (keeps its snapshot ids).

    Parameters
    ----------
    ens : Ensemble
    path : str or Path
        Target folder.
    chunk_size : int
        Trajectories per chunk.
    overwrite : bool
        Replace an existing store.

    Returns
    -------
    Path
    """
    ids = ens.trajectories["traj"].to_numpy()
    with ChunkedStoreWriter(path, chunk_size=chunk_size, overwrite=overwrite,
                            metadata=ens.metadata, renumber=False) as w:
        for s in range(0, len(ids), chunk_size):
            w.write_chunk(ens.select(ids[s:s + chunk_size]) if len(ids) > chunk_size else ens)
    return Path(path)


# ----------------------------------------------------------------------------- converting
def convert_extxyz_chunked(
    source: str | Path,
    target: str | Path,
    *,
    chunk_size: int = DEFAULT_CHUNK_TRAJECTORIES,
    overwrite: bool = False,
    progress: bool = True,
    **load_kw: Any,
) -> Path:
    """Stream an extended-XYZ folder into a chunked store, one file at a time.

    Memory holds one chunk of trajectories at most; the trajectory table
    (``trajectories.csv``) and ``metadata.json`` are read once (they are small).

    Parameters
    ----------
    source : str or Path
        Folder of ``*.xyz`` / ``*.xyz.gz`` files (one per trajectory).
    target : str or Path
        Store folder to create.
    chunk_size : int
        Trajectories per chunk.
    overwrite : bool
        Replace an existing store at `target`.
    progress : bool
        Progress bar over the files.
    **load_kw
        ``energy_unit``, ``time_unit``, ``length_unit``, ``state_base``,
        ``nonfinite`` as for :func:`ensemblelab.io.load_extxyz`.

    Returns
    -------
    Path
        The store. Snapshot ids are 0, 1, ... in (trajectory, time) order, as an
        eager load of the folder gives them.
    """
    from tqdm.auto import tqdm

    from . import xyz
    from ._common import file_source

    source = Path(source)
    if not source.is_dir():
        raise FileNotFoundError(f"{source}: not a folder of extended-XYZ files.")
    files = sorted(xyz.find_trajectory_files(source), key=lambda item: item[0])
    if not files:
        raise StoreError(f"{source}: no *.xyz or *.xyz.gz files. Hint: one extended-XYZ file "
                         "per trajectory is expected.")
    metadata: dict[str, Any] = {}
    meta_path = source / "metadata.json"
    if meta_path.is_file():
        metadata = decode_metadata(json.loads(meta_path.read_text()))
    sources = list(metadata.pop("sources", []))
    table: pd.DataFrame | None = None
    arrays: dict[str, np.ndarray] = {}
    csv_path = source / "trajectories.csv"
    if csv_path.is_file():
        ids_all = np.array([t for t, _ in files], dtype=np.int64)
        base = load_kw.get("state_base")
        if base is None:  # the first file's header decides, as for an eager load
            opts: dict[str, Any] = {k: load_kw.get(k) for k in (
                "energy_unit", "time_unit", "length_unit", "state_base")}
            header = xyz.parse_file(files[0][1], nonfinite="keep", **opts).header
            base = int(header.get("state_base", 0))
        table, arrays = xyz.read_trajectories_csv(
            csv_path, ids_all, energy_unit=load_kw.get("energy_unit"), state_base=base)
        sources.append(file_source(csv_path, fmt="csv"))
    nonfinite: dict[int, list[str]] = {}
    metadata.pop("nonfinite", None)
    pos_of = {} if table is None else {int(t): i for i, t in enumerate(table["traj"])}
    with ChunkedStoreWriter(target, chunk_size=chunk_size, overwrite=overwrite,
                            metadata={**metadata, "sources": []}, renumber=True) as writer:
        for tid, fpath in tqdm(files, desc="converting", unit="file", disable=not progress):
            ens = xyz.load_extxyz(fpath, progress=False, **load_kw)
            sources.extend(ens.metadata.get("sources", []))
            nonfinite.update(ens.metadata.get("nonfinite", {}))
            pos = pos_of.get(int(tid))
            if pos is not None:
                assert table is not None
                changes: dict[str, Any] = {"trajectories": table.iloc[[pos]].reset_index(
                    drop=True)}
                for name, arr in arrays.items():
                    changes[name] = arr[[pos]]
                ens = ens.replace(**changes)
            writer.append(ens)
        writer.flush()
        metadata |= {"nonfinite": dict(sorted(nonfinite.items()))} if nonfinite else {}
        writer._meta = encode_metadata({**metadata, "sources": sources})
    return Path(target)
