"""LazyEnsemble: an ensemble on disk (chunked store) whose arrays are Dask arrays.

``ensemblelab.load(path, lazy=True)`` returns one. It holds only the manifest
and the (small) trajectory table in memory; per-snapshot arrays are Dask arrays
with one block per chunk and the snapshot table is a Dask DataFrame with one
partition per chunk. Dask is imported on first use of those attributes, never
by ``import ensemblelab``.

Use :meth:`LazyEnsemble.select` (trajectory ids) or :meth:`LazyEnsemble.compute`
for an in-memory :class:`~ensemblelab.Ensemble`, and
:meth:`LazyEnsemble.iter_chunks` to walk the chunks as in-memory ensembles of
whole trajectories. A LazyEnsemble is a block source of the reduction engine
(:mod:`ensemblelab.compute.engine`: :meth:`LazyEnsemble.spans`,
:meth:`LazyEnsemble.block_loaders`), so ``compute_trpes``, ``contributions``,
``populations`` and ``flag_trajectories`` accept one and reduce chunk by chunk.
"""

from __future__ import annotations

import copy as _copy
import functools
import html
from collections.abc import Iterable, Iterator
from pathlib import Path
from typing import Any

import numpy as np
import numpy.typing as npt
import pandas as pd

from .._optional import import_optional
from ..data.blocks import BlockSpan
from ..data.ensemble import SNAPSHOT_ARRAYS, TRAJECTORY_ARRAYS, Ensemble
from ..errors import SchemaError, StoreError
from ._common import decode_metadata
from .chunked import (
    concat_ensembles,
    iter_chunk_indices,
    load_chunk,
    load_chunk_array,
    read_chunk_fields,
    read_chunk_table,
    read_chunk_times,
    read_chunked_manifest,
)

__all__ = ["LazyEnsemble", "ChunkBlock", "open_lazy", "is_lazy", "read_block"]

#: snapshot columns every block carries
BLOCK_COLUMNS = ("traj", "time", "active")


def is_lazy(obj: object) -> bool:
    """True when `obj` is a :class:`LazyEnsemble`."""
    return isinstance(obj, LazyEnsemble)


def open_lazy(path: str | Path) -> LazyEnsemble:
    """Open a chunked store lazily (see :class:`LazyEnsemble`)."""
    return LazyEnsemble(path)


def _dask() -> Any:
    return import_optional("dask", extra="dask", purpose="lazy (chunked) ensembles")


class LazyEnsemble:
    """A chunked store opened without reading its snapshots.

    Parameters
    ----------
    path : str or Path
        A chunked native store (``layout = "chunked"``).

    Attributes
    ----------
    path : Path
    trajectories : pandas.DataFrame
        One row per trajectory, as :attr:`Ensemble.trajectories` (in memory).
    symbols, masses, state_labels, cation_labels, metadata
        As for :class:`~ensemblelab.Ensemble`.
    geometries, energies, cation_energies, dyson, amplitudes, adt, adt_cation, overlaps,
    velocities, excitation_energies, oscillator_strengths, transition_dipoles,
    transition_strengths : dask.array or None
        One block per chunk, in the stored dtype (float64 for the eager Ensemble).
    snapshots : dask.dataframe.DataFrame
        The snapshot table, one partition per chunk.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> from ensemblelab.testing import make_toy_ensemble
    >>> from ensemblelab.io.chunked import save_chunked
    >>> ens = make_toy_ensemble(6, t_max=10.0)
    >>> path = save_chunked(ens, pathlib.Path(tempfile.mkdtemp()) / "s.ens", chunk_size=4)
    >>> lazy = LazyEnsemble(path)
    >>> lazy.n_trajectories, lazy.n_chunks, lazy.n_snapshots == ens.n_snapshots
    (6, 2, True)
    >>> lazy.select([0, 5]).n_trajectories
    2
    """

    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)
        self._manifest = read_chunked_manifest(self.path)
        m = self._manifest
        file = self.path / m["tables"].get("trajectories", "trajectories.parquet")
        try:
            self.trajectories = pd.read_parquet(file)
        except Exception as exc:  # pyarrow raises its own error types
            raise StoreError(f"{file}: cannot read the trajectory table ({exc}). Hint: the "
                             "store is incomplete; convert the original files again.") from exc
        if len(self.trajectories) != m["n_trajectories"]:
            raise StoreError(f"{file}: {len(self.trajectories)} rows, expected "
                             f"{m['n_trajectories']}. Hint: the store is inconsistent.")
        self.symbols = tuple(m["symbols"])
        self.masses = np.asarray(m["masses"], dtype=np.float64)
        self.masses.setflags(write=False)
        self.state_labels = tuple(m.get("state_labels", ()))
        self.cation_labels = tuple(m.get("cation_labels", ()))
        meta = decode_metadata(m.get("metadata", {}))
        meta["sources"] = [*meta.get("sources", []), {"path": str(self.path),
                                                      "format": "ensemblelab-store",
                                                      "layout": "chunked"}]
        self.metadata = meta
        self._entries = {e["name"]: e for e in m["arrays"]}
        self._cache: dict[str, Any] = {}

    # ------------------------------------------------------------------ sizes
    @property
    def chunks(self) -> list[dict[str, Any]]:
        """The manifest's chunk records (dir, n_snapshots, n_trajectories, traj_first, ...)."""
        return list(self._manifest["chunks"])

    @property
    def n_chunks(self) -> int:
        """Number of chunks."""
        return len(self._manifest["chunks"])

    @property
    def n_snapshots(self) -> int:
        """Number of snapshots."""
        return int(self._manifest["n_snapshots"])

    @property
    def n_trajectories(self) -> int:
        """Number of trajectories."""
        return int(self._manifest["n_trajectories"])

    @property
    def n_atoms(self) -> int:
        """Number of atoms."""
        return len(self.symbols)

    @property
    def n_states(self) -> int:
        """Number of neutral states."""
        return int(self._entries["energies"]["tail"][0])

    @property
    def n_cation(self) -> int:
        """Number of cation states (0 without cation energies)."""
        e = self._entries.get("cation_energies")
        return 0 if e is None else int(e["tail"][0])

    @property
    def dyson_per_state(self) -> bool:
        """True when the Dyson norms are stored for every neutral state."""
        e = self._entries.get("dyson")
        return e is not None and len(e["tail"]) == 2

    @property
    def columns(self) -> list[str]:
        """Columns of the snapshot table."""
        return list(self._manifest["columns"])

    def has(self, name: str) -> bool:
        """Whether the store holds array `name` (e.g. ``"dyson"``)."""
        return name in self._entries

    # ------------------------------------------------------------------ block source
    def spans(self) -> list[BlockSpan]:
        """One :class:`~ensemblelab.data.blocks.BlockSpan` per chunk (from the manifest).

        A span's ``summary`` holds the chunk's stored summaries (time range, time-step
        counts, IP range) so that computations need no pass to find them.
        """
        keys = ("t_min", "t_max", "dt_values", "dt_counts", "ip_min", "ip_max")
        return [BlockSpan(index=i, traj_start=int(c["traj_row_start"]),
                          n_trajectories=int(c["n_trajectories"]),
                          n_snapshots=int(c["n_snapshots"]),
                          summary={k: c[k] for k in keys if k in c})
                for i, c in enumerate(self._manifest["chunks"])]

    def block_loaders(self, fields: Iterable[str] | None = None,
                      columns: Iterable[str] | None = None) -> list[Any]:
        """One picklable loader per chunk (see :func:`read_block`); each reads its chunk."""
        m = self._manifest
        flds = None if fields is None else tuple(fields)
        cols = tuple(dict.fromkeys([*BLOCK_COLUMNS, *(columns or ())]))
        return [functools.partial(read_block, str(self.path),
                                  {"arrays": m["arrays"], "chunks": [m["chunks"][i]]}, i,
                                  flds, cols)
                for i in range(self.n_chunks)]

    def __len__(self) -> int:
        return self.n_snapshots

    # ------------------------------------------------------------------ dask views
    def _array(self, name: str) -> Any:
        if name not in self._entries:
            return None
        if name in self._cache:
            return self._cache[name]
        dask = _dask()
        import dask.array as da

        entry = self._entries[name]
        per_traj = entry["per"] == "trajectory"
        blocks = []
        for i, chunk in enumerate(self._manifest["chunks"]):
            rows = chunk["n_trajectories"] if per_traj else chunk["n_snapshots"]
            part = dask.delayed(load_chunk_array, pure=True)(str(self.path), i, name)
            blocks.append(da.from_delayed(part, shape=(rows, *entry["tail"]),
                                          dtype=np.dtype(entry["dtype"])))
        arr = da.concatenate(blocks, axis=0) if blocks else None
        self._cache[name] = arr
        return arr

    def __getattr__(self, name: str) -> Any:
        if name in ("geometries", "energies", *SNAPSHOT_ARRAYS, *TRAJECTORY_ARRAYS):
            return self._array(name)
        raise AttributeError(f"'LazyEnsemble' object has no attribute {name!r}")

    @property
    def snapshots(self) -> Any:
        """The snapshot table as a Dask DataFrame (one partition per chunk)."""
        if "snapshots" not in self._cache:
            _dask()
            import dask.dataframe as dd

            files = [str(self.path / c["dir"] / "snapshots.parquet")
                     for c in self._manifest["chunks"]]
            self._cache["snapshots"] = dd.read_parquet(files)
        return self._cache["snapshots"]

    def snapshot_column(self, name: str) -> Any:
        """One snapshot column as a Dask array (one block per chunk)."""
        dask = _dask()
        import dask.array as da

        if name not in self._manifest["columns"]:
            raise KeyError(f"no snapshot column {name!r}; found {self.columns}.")
        dtype = _column(str(self.path), 0, name).dtype if self.n_chunks else np.float64
        blocks = []
        for i, chunk in enumerate(self._manifest["chunks"]):
            part = dask.delayed(_column, pure=True)(str(self.path), i, name)
            blocks.append(da.from_delayed(part, shape=(chunk["n_snapshots"],), dtype=dtype))
        return da.concatenate(blocks)

    @property
    def times(self) -> np.ndarray:
        """Sorted unique snapshot times in fs (from each chunk's small ``times.npy``)."""
        if "times" not in self._cache:
            parts = [read_chunk_times(self.path, self._manifest, i)
                     for i in range(self.n_chunks)]
            self._cache["times"] = np.unique(np.concatenate(parts)) if parts else np.zeros(0)
        return self._cache["times"]

    # ------------------------------------------------------------------ in memory
    def chunk(self, index: int, *, fields: Iterable[str] | None = None) -> Ensemble:
        """Chunk `index` as an in-memory Ensemble (whole trajectories).

        `fields` limits the arrays read (see :func:`ensemblelab.io.chunked.load_chunk`).
        """
        return load_chunk(self.path, index, fields=fields)

    def iter_chunks(self, *, fields: Iterable[str] | None = None,
                    progress: bool = False) -> Iterator[Ensemble]:
        """Yield every chunk as an in-memory Ensemble of whole trajectories, in order.

        Parameters
        ----------
        fields : iterable of str, optional
            Arrays to read (default all); see :func:`~ensemblelab.io.chunked.load_chunk`.
        progress : bool
            Progress bar over the chunks.
        """
        from tqdm.auto import tqdm

        for i in tqdm(range(self.n_chunks), desc="chunks", unit="chunk", disable=not progress):
            yield self.chunk(i, fields=fields)

    def select(self, mask: npt.ArrayLike | Iterable[int]) -> Ensemble:
        """Whole trajectories by id as an in-memory Ensemble (reads only their chunks).

        Parameters
        ----------
        mask : iterable of int
            Trajectory ids. (Boolean snapshot masks are not supported lazily:
            select trajectories, then mask the in-memory result.)

        Returns
        -------
        Ensemble
            A new, in-memory Ensemble.
        """
        if isinstance(mask, str):
            raise TypeError("select() takes trajectory ids, never a string.")
        arr = np.asarray(mask if isinstance(mask, np.ndarray) else list(mask))  # type: ignore[arg-type]
        if arr.dtype == bool:
            raise SchemaError("a LazyEnsemble selects whole trajectories by id; a boolean "
                              "snapshot mask needs the in-memory ensemble (select ids first, "
                              "then mask the result).")
        ids = np.unique(arr.astype(np.int64).ravel())
        unknown = np.setdiff1d(ids, self.trajectories["traj"].to_numpy())
        if unknown.size:
            raise KeyError(f"unknown trajectory id(s) {unknown[:10].tolist()}.")
        if ids.size == 0:
            raise SchemaError("select() needs at least one trajectory id.")
        parts = []
        for i in iter_chunk_indices(self._manifest, ids):
            part = self.chunk(i)
            keep = np.intersect1d(part.trajectories["traj"].to_numpy(), ids)
            parts.append(part if keep.size == part.n_trajectories else part.select(keep))
        out = concat_ensembles(parts)
        return out.replace(metadata=_copy.deepcopy(self.metadata))

    def trajectory(self, traj: int) -> Ensemble:
        """Trajectory `traj` as an in-memory Ensemble."""
        return self.select([int(traj)])

    def compute(self) -> Ensemble:
        """Read everything into an in-memory Ensemble (must fit in memory)."""
        parts = [self.chunk(i) for i in range(self.n_chunks)]
        return concat_ensembles(parts).replace(metadata=_copy.deepcopy(self.metadata))

    # ------------------------------------------------------------------ display
    def _summary_rows(self) -> list[tuple[str, str]]:
        lengths = self.trajectories.get("n_steps", pd.Series([], dtype=np.int64))
        return [
            ("trajectories", f"{self.n_trajectories}"),
            ("snapshots", f"{self.n_snapshots} ({lengths.min() if len(lengths) else 0}-"
                          f"{lengths.max() if len(lengths) else 0} per trajectory)"),
            ("chunks", f"{self.n_chunks} (lazy, on disk at {self.path})"),
            ("atoms", f"{self.n_atoms}"),
            ("neutral states", ", ".join(self.state_labels)),
            ("cation states", ", ".join(self.cation_labels) or "-"),
            ("arrays", ", ".join(n for n in self._entries
                                 if n not in ("geometries", "energies")) or "-"),
        ]

    def __repr__(self) -> str:
        rows = self._summary_rows()
        width = max(len(k) for k, _ in rows)
        body = "\n".join(f"  {k:<{width}} : {v}" for k, v in rows)
        return f"<ensemblelab.LazyEnsemble>\n{body}"

    def _repr_html_(self) -> str:
        cells = "".join(
            f"<tr><th style='text-align:left'>{html.escape(k)}</th>"
            f"<td style='text-align:left'>{html.escape(v)}</td></tr>"
            for k, v in self._summary_rows()
        )
        return f"<div><strong>ensemblelab.LazyEnsemble</strong><table>{cells}</table></div>"


class ChunkBlock:
    """Some fields of one chunk, read without building a validated Ensemble.

    A block of the reduction engine: it has the attributes of
    :class:`~ensemblelab.Ensemble` a partial reads (``snapshots`` with the columns
    read, ``trajectories``, ``n_snapshots``, ``n_trajectories``, ``n_states``,
    ``traj_index`` and the arrays read as float64, memory-mapped where stored as
    float64; arrays not read or not stored are None). Geometries are read only
    when asked for.
    """

    _ARRAYS = ("geometries", "energies", *SNAPSHOT_ARRAYS, *TRAJECTORY_ARRAYS)
    dyson: np.ndarray | None  # one of _ARRAYS, set with setattr in __init__

    def __init__(self, path: str, sub: dict[str, Any], names: Iterable[str],
                 columns: Iterable[str] = BLOCK_COLUMNS) -> None:
        frame, trajs, arrays = read_chunk_fields(path, sub, 0, names, columns=columns)
        self.snapshots = frame
        self.trajectories = trajs
        self.n_snapshots = len(frame)
        self.n_trajectories = len(trajs)
        entries = {e["name"]: e for e in sub["arrays"]}
        self.n_states = int(entries["energies"]["tail"][0])
        self.n_cation = int(entries["cation_energies"]["tail"][0]) \
            if "cation_energies" in entries else 0
        for name in self._ARRAYS:
            arr = arrays.get(name)
            if arr is not None and arr.dtype != np.float64:
                arr = arr.astype(np.float64)
            setattr(self, name, arr)
        self.traj_index = np.searchsorted(trajs["traj"].to_numpy(), frame["traj"].to_numpy())
        if "active" in frame.columns and self.n_snapshots:
            active = frame["active"].to_numpy()
            if active.min() < 0 or active.max() >= self.n_states:
                raise StoreError(f"{path}: chunk {sub['chunks'][0]['dir']} has active states "
                                 f"outside [0, {self.n_states - 1}]. Hint: the store is "
                                 "corrupt; convert the original files again.")

    def active_dyson(self) -> np.ndarray | None:
        """As :meth:`Ensemble.active_dyson`."""
        if self.dyson is None or self.dyson.ndim == 2:
            return self.dyson
        active = self.snapshots["active"].to_numpy()
        return self.dyson[np.arange(self.n_snapshots), active]


def read_block(path: str, sub: dict[str, Any], index: int, fields: Iterable[str] | None,
               columns: Iterable[str] = BLOCK_COLUMNS) -> Ensemble | ChunkBlock:
    """Chunk `index` as a block: a whole Ensemble (``fields=None``) or a :class:`ChunkBlock`.

    Parameters
    ----------
    path : str
        The store folder.
    sub : dict
        The part of the manifest the chunk needs (``arrays`` and its one ``chunks``
        record), so that a task does not parse the manifest again.
    index : int
        Chunk number (for the whole-Ensemble read).
    fields : iterable of str or None
        Arrays to read; None reads the whole chunk as a validated Ensemble.
    columns : iterable of str
        Snapshot columns to read (with ``fields``).
    """
    if fields is None:
        return load_chunk(path, index)
    return ChunkBlock(path, sub, fields, columns)


def _column(path: str, index: int, name: str) -> np.ndarray:
    return read_chunk_table(path, index, "snapshots", [name])[name].to_numpy()


def lazy_from(path: str | Path, *, format: str | None = None) -> LazyEnsemble:
    """``load(path, lazy=True)``: open a chunked store, or explain how to make one."""
    from .chunked import is_chunked_store

    if is_chunked_store(path):
        return LazyEnsemble(path)
    raise StoreError(
        f"{path}: lazy=True needs a chunked native store (layout 'chunked'); this input is "
        f"{'a single-file store' if (Path(path) / 'manifest.json').is_file() else 'not one'}. "
        "Hint: convert it with `ensemblelab convert INPUT OUTPUT --chunked` (or "
        "ensemblelab.io.chunked.convert_extxyz_chunked / save_chunked), then load the output "
        "with lazy=True."
    )
