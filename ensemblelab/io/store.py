"""The native store: a folder that holds one Ensemble exactly.

Layout (``layout: "single"``, schema version 1)
-----------------------------------------------
::

    my_ensemble.ens/
        manifest.json          what is in the folder (below)
        snapshots.parquet      Ensemble.snapshots (snapshot, traj, step, time, active, ...)
        trajectories.parquet   Ensemble.trajectories without the derived n_steps / t_end
        geometries.npy         (n_snapshots, n_atoms, 3) float64, Angstrom
        energies.npy           (n_snapshots, n_states) float64, eV
        <name>.npy             every optional array present: cation_energies, dyson,
                               amplitudes, adt, adt_cation, overlaps, velocities,
                               excitation_energies, oscillator_strengths, transition_dipoles,
                               transition_strengths

``manifest.json`` keys:

=================  ===========================================================================
key                meaning
=================  ===========================================================================
``format``         always ``"ensemblelab-store"``
``schema_version`` integer; a store newer than this ensemblelab is refused with a hint
``layout``         ``"single"`` (one .npy per array); other layouts (chunked) may be added
``created_by``     ``"ensemblelab <version>"``
``units``          ``{"time": "fs", "energy": "eV", "length": "Angstrom", "mass": "amu"}``
``n_snapshots``    rows of snapshots.parquet and of every per-snapshot array
``n_trajectories`` rows of trajectories.parquet and of every per-trajectory array
``symbols``        element symbols, ``masses`` in amu, ``state_labels``, ``cation_labels``
``tables``         ``{"snapshots": "snapshots.parquet", "trajectories": ...}``
``arrays``         list of ``{"name", "file", "dtype", "shape"}``
``metadata``       the Ensemble metadata as JSON (with ``sources``: provenance of the inputs)
=================  ===========================================================================

Metadata is stored as JSON: numpy scalars become numbers, arrays and tuples
become lists, and a dict whose keys are all integers (for example
``injected_faults = {traj_id: kind}``) is stored as
``{"__int_keys__": {"3": ...}}`` and read back with integer keys.

Arrays are written with :func:`numpy.save` and read with
``allow_pickle=False``; ``mmap_mode="r"`` maps them instead of reading them.
The data files of one save live in a version folder ``v-<hex>/`` that the
manifest names (``"file": "v-1a2b3c4d5e6f/energies.npy"``); a store written
before this layout (files at the top level) loads the same way. Saving takes
a writer lock, writes the new version and switches ``manifest.json``
atomically, so the path holds the old or the new store at every instant, and an
interrupted save leaves the previous store intact (see
:mod:`ensemblelab.io._versioned`). Every manifest field is validated and every
file it names must lie inside the store (:mod:`ensemblelab.io._manifest`).
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from ..data.ensemble import SCHEMA_VERSION, SNAPSHOT_ARRAYS, TRAJECTORY_ARRAYS, Ensemble
from ..errors import SchemaError, StoreError
from ._common import decode_metadata, dumps_json, encode_metadata
from ._manifest import STORE_FORMAT, check_common, check_single, load_manifest_json
from ._safety import confined
from ._versioned import read_consistent, store_transaction

__all__ = ["save_store", "load_store", "is_store", "read_manifest", "STORE_FORMAT", "LAYOUTS"]

#: value of the manifest's ``format`` key
#: layouts this version can read
LAYOUTS = ("single",)
_MANIFEST = "manifest.json"


def is_store(path: str | Path) -> bool:
    """True when `path` is a folder with a manifest naming our store format."""
    manifest = Path(path) / _MANIFEST
    if not manifest.is_file():
        return False
    try:
        return json.loads(manifest.read_text()).get("format") == STORE_FORMAT
    except (ValueError, AttributeError, RecursionError, OSError):
        return False


def save_store(ens: Ensemble, path: str | Path, *, overwrite: bool = False) -> Path:
    """Write `ens` as a native store folder, atomically.

    Parameters
    ----------
    ens : Ensemble
        The ensemble to write.
    path : str or Path
        Target folder. It must not exist, or must be a store and `overwrite` True.
    overwrite : bool
        Replace an existing store (never any other folder).

    Returns
    -------
    Path
        The store folder.

    Raises
    ------
    StoreError
        When the target exists and is not a store, exists without `overwrite`,
        or the metadata cannot be stored as JSON.
    """
    from .. import __version__

    path = Path(path)
    meta = encode_metadata(ens.metadata)  # fail before touching the disk
    arrays = []
    names = ["geometries", "energies", *SNAPSHOT_ARRAYS, *TRAJECTORY_ARRAYS]
    with store_transaction(path, overwrite=overwrite, kind="native store") as txn:
        tmp = txn.folder
        for name in names:
            arr = getattr(ens, name)
            if arr is None:
                continue
            arr = np.ascontiguousarray(arr)
            np.save(tmp / f"{name}.npy", arr, allow_pickle=False)
            arrays.append({"name": name, "file": txn.rel(f"{name}.npy"),
                           "dtype": arr.dtype.str, "shape": list(arr.shape)})
        try:
            ens.snapshots.to_parquet(tmp / "snapshots.parquet", index=False)
            ens.trajectories.drop(columns=["n_steps", "t_end"]).to_parquet(
                tmp / "trajectories.parquet", index=False)
        except (TypeError, ValueError, ImportError) as exc:
            raise StoreError(
                f"{path}: cannot write the tables as Parquet ({exc}). Hint: user columns must "
                "hold numbers, booleans or text of one type."
            ) from exc
        manifest = {
            "format": STORE_FORMAT,
            "schema_version": SCHEMA_VERSION,
            "layout": "single",
            "created_by": f"ensemblelab {__version__}",
            "units": ens.metadata.get("units", {}),
            "n_snapshots": ens.n_snapshots,
            "n_trajectories": ens.n_trajectories,
            "symbols": list(ens.symbols),
            "masses": [float(m) for m in ens.masses],
            "state_labels": list(ens.state_labels),
            "cation_labels": list(ens.cation_labels),
            "tables": {"snapshots": txn.rel("snapshots.parquet"),
                       "trajectories": txn.rel("trajectories.parquet")},
            "arrays": arrays,
            "metadata": meta,
        }
        txn.commit(manifest, dumps_json)
    return path


def read_manifest(path: str | Path) -> dict[str, Any]:
    """Read and check the manifest of a store.

    Raises
    ------
    StoreError
        Missing or invalid manifest, wrong format name, future schema or unknown layout.
    """
    path = Path(path)
    mpath = path / _MANIFEST
    if not mpath.is_file():
        raise StoreError(f"{path}: not a native store (no {_MANIFEST}). Hint: save one with "
                         "ensemblelab.save(ens, path), or load the original files.")
    manifest = check_common(load_manifest_json(mpath), mpath, layouts=LAYOUTS)
    return check_single(manifest, path, mpath)


def _load_array(path: Path, entry: dict[str, Any], mmap_mode: str | None) -> np.ndarray:
    file = confined(path, entry.get("file"), what=f"array {entry.get('name')!r}")
    if not file.is_file():
        raise StoreError(f"{path}: array file {file.name!r} ({entry.get('name')}) is missing. "
                         "Hint: the store is incomplete; convert the original files again.")
    want_shape = tuple(entry.get("shape", ()))
    want_dtype = np.dtype(entry.get("dtype", "<f8"))
    need = int(np.prod(want_shape, dtype=np.int64)) * want_dtype.itemsize
    if file.stat().st_size < need:
        raise StoreError(f"{file}: the file holds {file.stat().st_size} bytes, too few for "
                         f"{entry.get('name')} of shape {want_shape} and dtype {want_dtype} "
                         f"({need} bytes). Hint: the file is truncated; convert the original "
                         "files again.")
    try:
        arr = np.load(file, mmap_mode=mmap_mode, allow_pickle=False)  # type: ignore[arg-type]
    except (ValueError, OSError, EOFError, MemoryError) as exc:
        raise StoreError(f"{file}: cannot read the array ({exc}). Hint: the file is corrupt; "
                         "convert the original files again.") from exc
    if arr.shape != want_shape or arr.dtype != want_dtype:
        raise StoreError(
            f"{file}: expected {entry.get('name')} of shape {want_shape} and dtype {want_dtype}, "
            f"found shape {arr.shape} and dtype {arr.dtype}. Hint: the store is inconsistent; "
            "convert the original files again."
        )
    if mmap_mode is None:
        arr.setflags(write=False)
    return arr


def load_store(path: str | Path, *, mmap_mode: str | None = None,
               progress: bool = False) -> Ensemble:
    """Load a native store written by :func:`save_store`.

    Parameters
    ----------
    path : str or Path
        The store folder.
    mmap_mode : {None, "r"}
        ``"r"`` memory-maps the arrays read-only instead of reading them.
    progress : bool
        Accepted for symmetry with the other loaders (loading a store is fast).

    Returns
    -------
    Ensemble
        Exactly the ensemble that was saved.

    Raises
    ------
    StoreError
        Corrupt (missing file, bad JSON, shape mismatch) or future-schema store.
    """
    if mmap_mode not in (None, "r"):
        raise ValueError(f"The 'mmap_mode' parameter must be None or 'r'; got {mmap_mode!r}.")
    path = Path(path)
    return read_consistent(path, lambda: _load_store_once(path, mmap_mode))


def _load_store_once(path: Path, mmap_mode: str | None) -> Ensemble:
    manifest = read_manifest(path)
    n, n_traj = manifest["n_snapshots"], manifest["n_trajectories"]
    arrays: dict[str, np.ndarray] = {}
    known = {"geometries", "energies", *SNAPSHOT_ARRAYS, *TRAJECTORY_ARRAYS}
    for entry in manifest["arrays"]:
        name = entry.get("name")
        if name not in known:
            raise StoreError(f"{path}: unknown array {name!r} in the manifest. Hint: written by "
                             "a newer ensemblelab? Upgrade to read it.")
        arr = _load_array(path, entry, mmap_mode)
        rows = n_traj if name in TRAJECTORY_ARRAYS else n
        if arr.shape[0] != rows:
            raise StoreError(f"{path}: {name} has {arr.shape[0]} rows, expected {rows}. Hint: "
                             "the store is inconsistent; convert the original files again.")
        arrays[name] = arr
    for name in ("geometries", "energies"):
        if name not in arrays:
            raise StoreError(f"{path}: the manifest lists no {name!r} array. Hint: the store is "
                             "corrupt; convert the original files again.")
    tables = {}
    for key in ("snapshots", "trajectories"):
        file = confined(path, manifest["tables"].get(key, f"{key}.parquet"),
                        what=f"table {key!r}")
        if not file.is_file():
            raise StoreError(f"{path}: table {file.name!r} is missing. Hint: the store is "
                             "incomplete; convert the original files again.")
        try:
            tables[key] = pd.read_parquet(file)
        except Exception as exc:  # pyarrow raises its own error types
            raise StoreError(f"{file}: cannot read the Parquet table ({exc}). Hint: the file is "
                             "corrupt; convert the original files again.") from exc
    if len(tables["snapshots"]) != n:
        raise StoreError(f"{path}: snapshots.parquet has {len(tables['snapshots'])} rows, "
                         f"expected {n}. Hint: the store is inconsistent.")
    try:
        metadata = decode_metadata(manifest.get("metadata", {}))
    except (TypeError, ValueError, AttributeError, RecursionError) as exc:
        raise StoreError(f"{path}: the manifest's metadata cannot be decoded ({exc}). Hint: the "
                         "store is corrupt; convert the original files again.") from exc
    sources = list(metadata.get("sources", []))
    record = {"path": str(path), "format": STORE_FORMAT}
    if not sources or sources[-1] != record:
        sources.append(record)
    metadata["sources"] = sources
    try:
        return Ensemble(
            snapshots=tables["snapshots"],
            trajectories=tables["trajectories"],
            symbols=tuple(manifest["symbols"]),
            masses=np.asarray(manifest["masses"], dtype=np.float64),
            state_labels=tuple(manifest.get("state_labels", ())),
            cation_labels=tuple(manifest.get("cation_labels", ())),
            metadata=metadata,
            **arrays,
        )
    except SchemaError as exc:
        raise StoreError(f"{path}: the stored data are inconsistent ({exc}). Hint: convert the "
                         "original files again.") from exc
