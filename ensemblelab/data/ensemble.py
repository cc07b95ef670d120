"""The Ensemble: an immutable, tidy container for a surface-hopping trajectory ensemble.

Units everywhere inside: fs, eV (neutral and cation energies on one common zero),
Angstrom, amu. See :mod:`ensemblelab.units`.
"""

from __future__ import annotations

import copy as _copy
import html
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import numpy.typing as npt
import pandas as pd

from ..errors import SchemaError
from .elements import masses_for

__all__ = ["Ensemble", "SCHEMA_VERSION", "SNAPSHOT_ARRAYS", "TRAJECTORY_ARRAYS", "REQUIRED_COLUMNS"]

#: version of the data model (and of the native store written from it)
SCHEMA_VERSION = 1

#: columns every snapshot frame has, in this order
REQUIRED_COLUMNS = ("snapshot", "traj", "step", "time", "active")

#: optional per-snapshot arrays: name -> (description, unit)
SNAPSHOT_ARRAYS: dict[str, tuple[str, str]] = {
    "cation_energies": ("(n_snapshots, n_cation) cation state energies, common zero", "eV"),
    "dyson": (
        "(n_snapshots, n_cation) squared Dyson norms of the active state, or "
        "(n_snapshots, n_states, n_cation) for every neutral state",
        "1",
    ),
    "amplitudes": ("(n_snapshots, n_states) electronic populations |c_i|^2", "1"),
    "adt": ("(n_snapshots, n_states, n_states) adiabatic-to-diabatic matrices U, "
            "adiabatic i = sum_d U[i, d] diabatic d", "1"),
    "adt_cation": ("(n_snapshots, n_cation, n_cation) cation adiabatic-to-diabatic matrices", "1"),
    "overlaps": ("(n_snapshots, n_states, n_states) overlaps <i(t-dt)|j(t)> with the previous "
                 "step (row 0 of a trajectory: identity), or with reference states", "1"),
    "velocities": ("(n_snapshots, n_atoms, 3) nuclear velocities", "Angstrom/fs"),
}

#: optional per-trajectory arrays (aligned to the rows of ``trajectories``)
TRAJECTORY_ARRAYS: dict[str, tuple[str, str]] = {
    "excitation_energies": ("(n_trajectories, n_states) E_i - E_0 at t = 0 (column 0 is 0)", "eV"),
    "oscillator_strengths": ("(n_trajectories, n_states) f_0i at t = 0 (column 0 is 0)", "1"),
    "transition_dipoles": ("(n_trajectories, n_states, 3) mu_0i at t = 0", "e*bohr"),
}


def _freeze(a: Any, name: str, *, dtype: Any = np.float64, copy_: bool = True) -> np.ndarray:
    """Return a read-only float array; writable input is copied so the caller keeps theirs."""
    arr = np.asarray(a, dtype=dtype)
    if arr.flags.writeable:
        arr = arr.copy()
        arr.setflags(write=False)
    return arr


def _check_ndim(arr: np.ndarray, name: str, ndim: int | tuple[int, ...], shape_doc: str) -> None:
    ndims = (ndim,) if isinstance(ndim, int) else ndim
    if arr.ndim not in ndims:
        raise SchemaError(
            f"{name} must have shape {shape_doc}; got an array of shape {arr.shape}."
        )


@dataclass(frozen=True, eq=False, repr=False)
class Ensemble:
    """An immutable ensemble of surface-hopping trajectories.

    Row ``i`` of :attr:`snapshots` is index ``i`` of every per-snapshot array.
    Snapshots are sorted by trajectory, then time. Trajectories of different
    lengths are normal. Every transformation returns a new Ensemble.

    Build one with :meth:`from_arrays` or :func:`ensemblelab.load`.

    Attributes
    ----------
    snapshots : pandas.DataFrame
        One row per (trajectory, step): ``snapshot`` (stable id, survives
        slicing), ``traj``, ``step``, ``time`` (fs), ``active`` (0-based neutral
        state), plus optional scalars such as ``e_kin``, ``e_tot`` (eV) and any
        user columns.
    geometries : ndarray, shape (n_snapshots, n_atoms, 3)
        Cartesian coordinates in Angstrom.
    energies : ndarray, shape (n_snapshots, n_states)
        Neutral adiabatic energies in eV.
    symbols : tuple of str, length n_atoms
        Element symbols.
    masses : ndarray, shape (n_atoms,)
        Atomic masses in amu.
    trajectories : pandas.DataFrame
        One row per trajectory: ``traj``, ``weight`` (default 1),
        ``initial_state``, ``n_steps``, ``t_end`` (fs), plus user columns.
    cation_energies, dyson, amplitudes, adt, adt_cation, overlaps, velocities : ndarray or None
        Optional per-snapshot arrays, see :data:`SNAPSHOT_ARRAYS`.
    excitation_energies, oscillator_strengths, transition_dipoles : ndarray or None
        Optional initial-condition arrays, see :data:`TRAJECTORY_ARRAYS`.
    state_labels, cation_labels : tuple of str
        Names of the neutral and cation states.
    metadata : dict
        ``units``, ``schema_version``, ``sources`` (provenance of each file) and
        anything else the producer recorded.
    """

    snapshots: pd.DataFrame
    geometries: np.ndarray
    energies: np.ndarray
    symbols: tuple[str, ...]
    masses: np.ndarray
    trajectories: pd.DataFrame
    cation_energies: np.ndarray | None = None
    dyson: np.ndarray | None = None
    amplitudes: np.ndarray | None = None
    adt: np.ndarray | None = None
    adt_cation: np.ndarray | None = None
    overlaps: np.ndarray | None = None
    velocities: np.ndarray | None = None
    excitation_energies: np.ndarray | None = None
    oscillator_strengths: np.ndarray | None = None
    transition_dipoles: np.ndarray | None = None
    state_labels: tuple[str, ...] = ()
    cation_labels: tuple[str, ...] = ()
    metadata: dict[str, Any] = field(default_factory=dict)

    # ------------------------------------------------------------------ construction
    def __post_init__(self) -> None:
        self._validate()

    @classmethod
    def from_arrays(
        cls,
        *,
        traj: npt.ArrayLike,
        time: npt.ArrayLike,
        active: npt.ArrayLike,
        geometries: npt.ArrayLike,
        symbols: Sequence[str],
        energies: npt.ArrayLike,
        step: npt.ArrayLike | None = None,
        masses: npt.ArrayLike | None = None,
        trajectories: pd.DataFrame | None = None,
        cation_energies: npt.ArrayLike | None = None,
        dyson: npt.ArrayLike | None = None,
        amplitudes: npt.ArrayLike | None = None,
        adt: npt.ArrayLike | None = None,
        adt_cation: npt.ArrayLike | None = None,
        overlaps: npt.ArrayLike | None = None,
        velocities: npt.ArrayLike | None = None,
        excitation_energies: npt.ArrayLike | None = None,
        oscillator_strengths: npt.ArrayLike | None = None,
        transition_dipoles: npt.ArrayLike | None = None,
        state_labels: Sequence[str] | None = None,
        cation_labels: Sequence[str] | None = None,
        metadata: Mapping[str, Any] | None = None,
        columns: Mapping[str, npt.ArrayLike] | None = None,
        copy: bool = True,
    ) -> Ensemble:
        """Build an Ensemble from flat per-snapshot arrays (internal units).

        Rows may come in any order; they are sorted stably by (traj, time).

        Parameters
        ----------
        traj : array_like of int, shape (n_snapshots,)
            Trajectory id of each snapshot.
        time : array_like of float, shape (n_snapshots,)
            Time in fs.
        active : array_like of int, shape (n_snapshots,)
            0-based active neutral state.
        geometries : array_like, shape (n_snapshots, n_atoms, 3)
            Coordinates in Angstrom.
        symbols : sequence of str, length n_atoms
            Element symbols.
        energies : array_like, shape (n_snapshots, n_states)
            Neutral adiabatic energies in eV.
        step : array_like of int, optional
            Step index; default 0, 1, ... within each trajectory in time order.
        masses : array_like, shape (n_atoms,), optional
            Masses in amu; default from the element symbols.
        trajectories : DataFrame, optional
            Per-trajectory table with a ``traj`` column; missing rows get
            ``weight`` 1 and ``initial_state`` from the first snapshot.
        cation_energies, dyson, amplitudes, adt, adt_cation, overlaps, velocities : array_like
            Optional per-snapshot arrays, see :data:`SNAPSHOT_ARRAYS`.
        excitation_energies, oscillator_strengths, transition_dipoles : array_like
            Optional per-trajectory arrays aligned to the sorted unique trajectory ids.
        state_labels, cation_labels : sequence of str, optional
            Defaults ``S0, S1, ...`` and ``D0, D1, ...``.
        metadata : mapping, optional
            Provenance and anything else; ``units`` and ``schema_version`` are set.
        columns : mapping of str to array_like, optional
            Extra per-snapshot scalar columns (``e_kin``, ``e_tot``, user data).
        copy : bool, default True
            Copy the input arrays (False lets loaders hand over arrays they own).

        Returns
        -------
        Ensemble
            A new Ensemble.

        Examples
        --------
        >>> import numpy as np
        >>> ens = Ensemble.from_arrays(traj=[0, 0, 1], time=[0.0, 0.5, 0.0], active=[1, 1, 1],
        ...     geometries=np.zeros((3, 2, 3)), symbols=["H", "H"], energies=np.zeros((3, 2)))
        >>> ens.n_trajectories, ens.n_snapshots, ens.n_states
        (2, 3, 2)
        """
        traj_a = np.asarray(traj)
        time_a = np.asarray(time, dtype=np.float64)
        active_a = np.asarray(active)
        n = traj_a.shape[0] if traj_a.ndim == 1 else -1
        for name, a in (("traj", traj_a), ("time", time_a), ("active", active_a)):
            if a.ndim != 1 or a.shape[0] != n:
                raise SchemaError(
                    f"{name} must be a 1-D array of length n_snapshots={n}; got shape {a.shape}."
                )
        for name, a in (("traj", traj_a), ("active", active_a)):
            if a.size and not np.issubdtype(a.dtype, np.integer):
                if not np.all(np.isfinite(a.astype(float))) or np.any(a != np.round(a)):
                    raise SchemaError(f"{name} must hold integers; got values like {a[:3]!r}.")
        traj_a = traj_a.astype(np.int64)
        active_a = active_a.astype(np.int64)
        order = np.lexsort((time_a, traj_a))
        identity = bool(np.all(order == np.arange(n)))

        def take(a: Any, name: str, dtype: Any = np.float64) -> np.ndarray | None:
            if a is None:
                return None
            arr = np.asarray(a, dtype=dtype)
            if arr.ndim == 0 or arr.shape[0] != n:
                raise SchemaError(
                    f"{name} must have n_snapshots={n} rows (one per snapshot); got shape "
                    f"{arr.shape}."
                )
            if identity:
                # a view: marking it read-only leaves the caller's own array as it was
                return np.array(arr, copy=True) if copy else arr.view()
            return arr[order]

        frame = pd.DataFrame(
            {
                "snapshot": np.arange(n, dtype=np.int64),
                "traj": traj_a[order],
                "step": np.zeros(n, dtype=np.int64),
                "time": time_a[order],
                "active": active_a[order],
            }
        )
        if step is None:
            frame["step"] = frame.groupby("traj", sort=False).cumcount().to_numpy(np.int64)
        else:
            frame["step"] = take(step, "step", np.int64)
        for name, values in (columns or {}).items():
            if name in REQUIRED_COLUMNS:
                raise SchemaError(f"column {name!r} is reserved; pass it as its own argument.")
            col = take(values, f"column {name!r}", None)
            frame[name] = col
        symbols_t = tuple(str(s) for s in symbols)
        masses_a = masses_for(symbols_t) if masses is None else np.asarray(masses, float)

        traj_ids = np.unique(traj_a)
        if trajectories is None:
            trajectories = pd.DataFrame({"traj": traj_ids})
        ens_kwargs: dict[str, Any] = {
            name: take(value, name)
            for name, value in (
                ("cation_energies", cation_energies),
                ("dyson", dyson),
                ("amplitudes", amplitudes),
                ("adt", adt),
                ("adt_cation", adt_cation),
                ("overlaps", overlaps),
                ("velocities", velocities),
            )
        }
        for name, value in (
            ("excitation_energies", excitation_energies),
            ("oscillator_strengths", oscillator_strengths),
            ("transition_dipoles", transition_dipoles),
        ):
            ens_kwargs[name] = None if value is None else np.asarray(value, float)
        geoms = take(geometries, "geometries")
        ens_e = take(energies, "energies")
        meta = _copy.deepcopy(dict(metadata or {}))
        for arr in (geoms, ens_e, *ens_kwargs.values()):
            if arr is not None:
                arr.setflags(write=False)  # freshly made here: hand over without a second copy
        return cls._build(
            frame, geoms, ens_e, symbols_t, masses_a, trajectories,
            state_labels, cation_labels, meta, ens_kwargs,
        )

    @classmethod
    def _build(
        cls,
        frame: pd.DataFrame,
        geometries: np.ndarray,
        energies: np.ndarray,
        symbols: tuple[str, ...],
        masses: np.ndarray,
        trajectories: pd.DataFrame,
        state_labels: Sequence[str] | None,
        cation_labels: Sequence[str] | None,
        metadata: dict[str, Any],
        arrays: Mapping[str, np.ndarray | None],
    ) -> Ensemble:
        return cls(
            snapshots=frame,
            geometries=geometries,
            energies=energies,
            symbols=symbols,
            masses=masses,
            trajectories=trajectories,
            state_labels=tuple(state_labels) if state_labels else (),
            cation_labels=tuple(cation_labels) if cation_labels else (),
            metadata=metadata,
            **arrays,
        )

    # ------------------------------------------------------------------ validation
    def _validate(self) -> None:
        set_ = object.__setattr__
        frame = self.snapshots
        if not isinstance(frame, pd.DataFrame):
            raise SchemaError(f"snapshots must be a pandas DataFrame; got {type(frame).__name__}.")
        frame = frame.reset_index(drop=True).copy()
        missing = [c for c in REQUIRED_COLUMNS if c not in frame.columns]
        if "snapshot" in missing:
            frame.insert(0, "snapshot", np.arange(len(frame), dtype=np.int64))
            missing.remove("snapshot")
        if missing:
            raise SchemaError(
                f"snapshots is missing required column(s) {missing}; found {list(frame.columns)}."
            )
        for col in ("snapshot", "traj", "step", "active"):
            frame[col] = frame[col].to_numpy().astype(np.int64, copy=False)
        frame["time"] = frame["time"].to_numpy().astype(np.float64, copy=False)
        rest = [c for c in frame.columns if c not in REQUIRED_COLUMNS]
        frame = frame[list(REQUIRED_COLUMNS) + rest]
        n = len(frame)

        traj = frame["traj"].to_numpy()
        time = frame["time"].to_numpy()
        if n:
            if np.any(np.diff(traj) < 0):
                raise SchemaError(
                    "snapshots must be sorted by traj; use Ensemble.from_arrays, which sorts."
                )
            if not np.all(np.isfinite(time)):
                bad = int(np.flatnonzero(~np.isfinite(time))[0])
                raise SchemaError(
                    f"time must be finite; snapshot row {bad} (traj {traj[bad]}) has {time[bad]}."
                )
            same = traj[1:] == traj[:-1]
            dt = np.diff(time)
            bad_t = np.flatnonzero(same & (dt <= 0))
            if bad_t.size:
                i = int(bad_t[0])
                raise SchemaError(
                    f"times must increase strictly within a trajectory; traj {traj[i]} has "
                    f"time {time[i]} followed by {time[i + 1]} (rows {i}, {i + 1}). Hint: remove "
                    "duplicated frames or fix restarted segments before building the ensemble."
                )
        geoms = _freeze(self.geometries, "geometries", copy_=False)
        _check_ndim(geoms, "geometries", 3, "(n_snapshots, n_atoms, 3)")
        if geoms.shape[0] != n or geoms.shape[2] != 3:
            raise SchemaError(
                f"geometries must have shape (n_snapshots={n}, n_atoms, 3); got {geoms.shape}."
            )
        n_atoms = geoms.shape[1]
        symbols = tuple(str(s) for s in self.symbols)
        if len(symbols) != n_atoms:
            raise SchemaError(
                f"symbols must have n_atoms={n_atoms} entries; got {len(symbols)}."
            )
        masses = _freeze(self.masses, "masses", copy_=False)
        if masses.shape != (n_atoms,):
            raise SchemaError(f"masses must have shape (n_atoms={n_atoms},); got {masses.shape}.")
        energies = _freeze(self.energies, "energies", copy_=False)
        _check_ndim(energies, "energies", 2, "(n_snapshots, n_states)")
        if energies.shape[0] != n or energies.shape[1] < 1:
            raise SchemaError(
                f"energies must have shape (n_snapshots={n}, n_states); got {energies.shape}."
            )
        n_states = energies.shape[1]
        active = frame["active"].to_numpy()
        if n and (active.min() < 0 or active.max() >= n_states):
            i = int(np.flatnonzero((active < 0) | (active >= n_states))[0])
            raise SchemaError(
                f"active state must be in [0, {n_states - 1}] (0-based, n_states={n_states}); "
                f"snapshot row {i} (traj {traj[i]}, time {time[i]} fs) has {active[i]}. Hint: "
                "if your code counts states from 1, subtract 1."
            )

        n_cat = None
        if self.cation_energies is not None:
            ce = _freeze(self.cation_energies, "cation_energies", copy_=False)
            _check_ndim(ce, "cation_energies", 2, "(n_snapshots, n_cation)")
            if ce.shape[0] != n:
                raise SchemaError(
                    f"cation_energies must have n_snapshots={n} rows; got shape {ce.shape}."
                )
            n_cat = ce.shape[1]
            set_(self, "cation_energies", ce)
        expected = {
            "amplitudes": ((n, n_states), "(n_snapshots, n_states)"),
            "adt": ((n, n_states, n_states), "(n_snapshots, n_states, n_states)"),
            "overlaps": ((n, n_states, n_states), "(n_snapshots, n_states, n_states)"),
            "velocities": ((n, n_atoms, 3), "(n_snapshots, n_atoms, 3)"),
        }
        if n_cat is not None:
            expected["adt_cation"] = ((n, n_cat, n_cat), "(n_snapshots, n_cation, n_cation)")
        for name, (shape, doc) in expected.items():
            value = getattr(self, name)
            if value is None:
                continue
            arr = _freeze(value, name, copy_=False)
            if arr.shape != shape:
                raise SchemaError(f"{name} must have shape {doc} = {shape}; got {arr.shape}.")
            set_(self, name, arr)
        if self.adt_cation is not None and n_cat is None:
            raise SchemaError("adt_cation needs cation_energies (to know n_cation).")
        if self.dyson is not None:
            dy = _freeze(self.dyson, "dyson", copy_=False)
            if n_cat is None:
                raise SchemaError(
                    "dyson (squared Dyson norms) needs cation_energies; pass both."
                )
            if dy.shape not in ((n, n_cat), (n, n_states, n_cat)):
                raise SchemaError(
                    f"dyson must have shape (n_snapshots, n_cation) = {(n, n_cat)} or "
                    f"(n_snapshots, n_states, n_cation) = {(n, n_states, n_cat)}; got {dy.shape}."
                )
            set_(self, "dyson", dy)

        trajs = self.trajectories
        if not isinstance(trajs, pd.DataFrame) or "traj" not in trajs.columns:
            raise SchemaError("trajectories must be a DataFrame with a 'traj' column.")
        ids = np.unique(traj)
        trajs = trajs.copy()
        trajs["traj"] = trajs["traj"].to_numpy().astype(np.int64)
        if trajs["traj"].duplicated().any():
            dup = trajs.loc[trajs["traj"].duplicated(), "traj"].iloc[0]
            raise SchemaError(f"trajectories has duplicated traj id {dup}.")
        extra_ids = np.setdiff1d(trajs["traj"].to_numpy(), ids)
        keep_rows = ~trajs["traj"].isin(extra_ids)
        # per-trajectory arrays follow the rows of the given table
        traj_arrays: dict[str, np.ndarray | None] = {}
        for name in TRAJECTORY_ARRAYS:
            value = getattr(self, name)
            if value is None:
                traj_arrays[name] = None
                continue
            arr = np.asarray(value, dtype=np.float64)
            if arr.shape[0] == len(trajs):
                arr = arr[keep_rows.to_numpy()]
            traj_arrays[name] = arr
        trajs = trajs[keep_rows]
        given = pd.DataFrame({"traj": ids})
        trajs = given.merge(trajs, on="traj", how="left", sort=True)
        missing_rows = ~np.isin(ids, self.trajectories["traj"].to_numpy())
        if n:
            first = np.r_[0, np.flatnonzero(traj[1:] != traj[:-1]) + 1]
            last = np.r_[first[1:] - 1, n - 1]
        else:
            first = last = np.zeros(0, dtype=np.int64)
        if "weight" not in trajs.columns:
            trajs["weight"] = 1.0
        trajs["weight"] = trajs["weight"].astype(np.float64).fillna(1.0)
        if np.any(trajs["weight"].to_numpy() < 0) or not np.all(np.isfinite(trajs["weight"])):
            raise SchemaError("trajectory weights must be finite and >= 0.")
        init = active[first] if n else np.zeros(0, dtype=np.int64)
        if "initial_state" not in trajs.columns:
            trajs["initial_state"] = init
        else:
            trajs["initial_state"] = (
                trajs["initial_state"].astype("Float64").fillna(pd.Series(init)).astype(np.int64)
            )
        trajs["n_steps"] = (last - first + 1).astype(np.int64)
        trajs["t_end"] = time[last] if n else np.zeros(0)
        cols = ["traj", "weight", "initial_state", "n_steps", "t_end"]
        trajs = trajs[cols + [c for c in trajs.columns if c not in cols]]
        for name, arr in traj_arrays.items():
            if arr is None:
                continue
            if arr.shape[0] != len(ids):
                if missing_rows.any():
                    raise SchemaError(
                        f"{name} has {arr.shape[0]} rows but the trajectories table does not "
                        f"cover all {len(ids)} trajectories."
                    )
                raise SchemaError(
                    f"{name} must have n_trajectories={len(ids)} rows; got shape {arr.shape}."
                )
            want = (len(ids), n_states) if name != "transition_dipoles" else (len(ids), n_states, 3)
            if arr.shape != want:
                raise SchemaError(f"{name} must have shape {want}; got {arr.shape}.")
            arr.setflags(write=False)
            set_(self, name, arr)

        state_labels = tuple(self.state_labels) or tuple(f"S{i}" for i in range(n_states))
        if len(state_labels) != n_states:
            raise SchemaError(
                f"state_labels must have n_states={n_states} entries; got {len(state_labels)}."
            )
        n_cat_labels = n_cat or 0
        cation_labels = tuple(self.cation_labels) or tuple(f"D{k}" for k in range(n_cat_labels))
        if len(cation_labels) != n_cat_labels:
            raise SchemaError(
                f"cation_labels must have n_cation={n_cat_labels} entries; got "
                f"{len(cation_labels)}."
            )
        meta = dict(self.metadata)
        meta.setdefault("units", {"time": "fs", "energy": "eV", "length": "Angstrom",
                                  "mass": "amu"})
        meta.setdefault("schema_version", SCHEMA_VERSION)
        meta.setdefault("sources", [])

        frame.flags.allows_duplicate_labels = True
        set_(self, "snapshots", frame)
        set_(self, "trajectories", trajs.reset_index(drop=True))
        set_(self, "geometries", geoms)
        set_(self, "energies", energies)
        set_(self, "symbols", symbols)
        set_(self, "masses", masses)
        set_(self, "state_labels", state_labels)
        set_(self, "cation_labels", cation_labels)
        set_(self, "metadata", meta)

    # ------------------------------------------------------------------ sizes
    @property
    def n_snapshots(self) -> int:
        """Number of snapshots (rows of :attr:`snapshots`)."""
        return len(self.snapshots)

    @property
    def n_trajectories(self) -> int:
        """Number of trajectories."""
        return len(self.trajectories)

    @property
    def n_atoms(self) -> int:
        """Number of atoms."""
        return self.geometries.shape[1]

    @property
    def n_states(self) -> int:
        """Number of neutral electronic states."""
        return self.energies.shape[1]

    @property
    def n_cation(self) -> int:
        """Number of cation states (0 when there are no cation energies)."""
        return 0 if self.cation_energies is None else self.cation_energies.shape[1]

    @property
    def dyson_per_state(self) -> bool:
        """True when :attr:`dyson` holds norms for every neutral state (3-D)."""
        return self.dyson is not None and self.dyson.ndim == 3

    @property
    def times(self) -> np.ndarray:
        """Sorted unique snapshot times in fs, shape (n_times,)."""
        return np.unique(self.snapshots["time"].to_numpy())

    @property
    def traj_index(self) -> np.ndarray:
        """Row of :attr:`trajectories` for each snapshot, shape (n_snapshots,), int64."""
        ids = self.trajectories["traj"].to_numpy()
        return np.searchsorted(ids, self.snapshots["traj"].to_numpy())

    def snapshot_weights(self) -> np.ndarray:
        """Trajectory weight of each snapshot, shape (n_snapshots,)."""
        return self.trajectories["weight"].to_numpy()[self.traj_index]

    def active_dyson(self) -> np.ndarray | None:
        """Squared Dyson norms of the active state, shape (n_snapshots, n_cation), or None."""
        if self.dyson is None:
            return None
        if self.dyson.ndim == 2:
            return self.dyson
        active = self.snapshots["active"].to_numpy()
        return self.dyson[np.arange(self.n_snapshots), active]

    # ------------------------------------------------------------------ views
    def _take(self, rows: np.ndarray) -> Ensemble:
        """Return a new Ensemble with the given snapshot rows (sorted positions)."""
        rows = np.asarray(rows, dtype=np.int64)
        frame = self.snapshots.iloc[rows].reset_index(drop=True)
        ids = np.unique(frame["traj"].to_numpy())
        keep = self.trajectories["traj"].isin(ids).to_numpy()
        trajs = self.trajectories.loc[keep, [c for c in self.trajectories.columns
                                             if c not in ("n_steps", "t_end")]]
        arrays = {
            name: None if getattr(self, name) is None else getattr(self, name)[rows]
            for name in SNAPSHOT_ARRAYS
        }
        for name in TRAJECTORY_ARRAYS:
            value = getattr(self, name)
            arrays[name] = None if value is None else value[keep]
        return type(self)(
            snapshots=frame,
            geometries=self.geometries[rows],
            energies=self.energies[rows],
            symbols=self.symbols,
            masses=self.masses,
            trajectories=trajs,
            state_labels=self.state_labels,
            cation_labels=self.cation_labels,
            metadata=_copy.deepcopy(self.metadata),
            **arrays,
        )

    def select(self, mask: npt.ArrayLike | Iterable[int]) -> Ensemble:
        """Select snapshots by a boolean mask, or whole trajectories by id.

        Never evaluates strings: build a mask with pandas, e.g.
        ``ens.select(ens.snapshots["time"] < 200)``.

        Parameters
        ----------
        mask : array_like of bool, shape (n_snapshots,), or iterable of int
            Boolean mask over snapshots, or trajectory ids to keep.

        Returns
        -------
        Ensemble
            A new Ensemble.
        """
        if isinstance(mask, str):
            raise TypeError("select() takes a boolean mask or trajectory ids, never a string.")
        if isinstance(mask, pd.Series):
            mask = mask.to_numpy()
        arr = np.asarray(list(mask) if not isinstance(mask, np.ndarray) else mask)
        if arr.dtype == bool:
            if arr.shape != (self.n_snapshots,):
                raise SchemaError(
                    f"a boolean mask must have shape (n_snapshots={self.n_snapshots},); got "
                    f"{arr.shape}."
                )
            return self._take(np.flatnonzero(arr))
        ids = arr.astype(np.int64).ravel()
        unknown = np.setdiff1d(ids, self.trajectories["traj"].to_numpy())
        if unknown.size:
            raise KeyError(f"unknown trajectory id(s) {unknown[:10].tolist()}.")
        return self._take(np.flatnonzero(self.snapshots["traj"].isin(ids).to_numpy()))

    def without(self, trajs: Iterable[int] | pd.DataFrame) -> Ensemble:
        """Return a new Ensemble without the given trajectories.

        Parameters
        ----------
        trajs : iterable of int, or DataFrame with a ``traj`` column
            Trajectory ids to drop (for example the rows of a flags table).

        Returns
        -------
        Ensemble
            A new Ensemble; the source is untouched.
        """
        if isinstance(trajs, pd.DataFrame):
            trajs = trajs["traj"].to_numpy()
        ids = np.asarray(list(trajs), dtype=np.int64)
        return self._take(np.flatnonzero(~self.snapshots["traj"].isin(ids).to_numpy()))

    def trajectory(self, traj: int) -> Ensemble:
        """Return a new Ensemble holding only trajectory `traj`."""
        return self.select([int(traj)])

    def at_time(self, t: float, *, tol: float | None = None) -> Ensemble:
        """Return the snapshot nearest to time `t` (fs) of every trajectory alive then.

        Parameters
        ----------
        t : float
            Time in fs.
        tol : float, optional
            Largest accepted distance in fs; default half the median time step.

        Returns
        -------
        Ensemble
            A new Ensemble with at most one snapshot per trajectory.
        """
        time = self.snapshots["time"].to_numpy()
        if tol is None:
            dt = np.diff(time)[np.diff(self.snapshots["traj"].to_numpy()) == 0]
            tol = 0.5 * float(np.median(dt)) if dt.size else np.inf
        dist = np.abs(time - t)
        frame = pd.DataFrame({"traj": self.snapshots["traj"].to_numpy(), "d": dist})
        best = frame.groupby("traj", sort=True)["d"].idxmin().to_numpy()
        best = best[dist[best] <= tol + 1e-12]
        return self._take(np.sort(best))

    def assign(self, **columns: npt.ArrayLike) -> Ensemble:
        """Return a new Ensemble with extra (or replaced) per-snapshot scalar columns.

        Parameters
        ----------
        **columns : array_like, shape (n_snapshots,)
            Column values aligned to :attr:`snapshots`.

        Returns
        -------
        Ensemble
            A new Ensemble.
        """
        frame = self.snapshots.copy()
        for name, values in columns.items():
            if name in REQUIRED_COLUMNS:
                raise SchemaError(f"column {name!r} is part of the data model; cannot assign it.")
            values = np.asarray(values)
            if values.shape != (self.n_snapshots,):
                raise SchemaError(
                    f"column {name!r} must have shape (n_snapshots={self.n_snapshots},); got "
                    f"{values.shape}."
                )
            frame[name] = values
        return self.replace(snapshots=frame)

    def replace(self, **changes: Any) -> Ensemble:
        """Return a new Ensemble with some fields replaced (validated again)."""
        fields = {name: getattr(self, name) for name in self.__dataclass_fields__}
        unknown = set(changes) - set(fields)
        if unknown:
            raise TypeError(f"unknown Ensemble field(s) {sorted(unknown)}.")
        fields.update(changes)
        fields["trajectories"] = fields["trajectories"].drop(
            columns=["n_steps", "t_end"], errors="ignore"
        )
        fields["metadata"] = _copy.deepcopy(fields["metadata"])
        return type(self)(**fields)

    # ------------------------------------------------------------------ derived tables
    def hops(self) -> pd.DataFrame:
        """Surface hops, derived from changes of the active state.

        Returns
        -------
        DataFrame
            Columns ``traj``, ``snapshot`` (row of the first step on the new
            state), ``step``, ``time`` (fs), ``from``, ``to``, ``gap`` (eV,
            ``|E_to - E_from|`` at the last step before the hop).
        """
        frame = self.snapshots
        active = frame["active"].to_numpy()
        traj = frame["traj"].to_numpy()
        idx = np.flatnonzero((active[1:] != active[:-1]) & (traj[1:] == traj[:-1])) + 1
        before = idx - 1
        gap = np.abs(
            self.energies[before, active[idx]] - self.energies[before, active[before]]
        )
        return pd.DataFrame(
            {
                "traj": traj[idx],
                "snapshot": frame["snapshot"].to_numpy()[idx],
                "step": frame["step"].to_numpy()[idx],
                "time": frame["time"].to_numpy()[idx],
                "from": active[before],
                "to": active[idx],
                "gap": gap,
            }
        )

    def long_frame(self, quantity: str = "energies") -> pd.DataFrame:
        """A per-state quantity in tidy long format (one row per snapshot and state).

        Parameters
        ----------
        quantity : {"energies", "amplitudes", "cation_energies", "dyson"}
            Which array to unfold.

        Returns
        -------
        DataFrame
            ``snapshot, traj, step, time, active`` plus ``state`` (neutral index)
            and/or ``cation`` (cation index) and ``value``.
        """
        arr = getattr(self, quantity, None) if quantity in (
            "energies", "amplitudes", "cation_energies", "dyson") else None
        if quantity not in ("energies", "amplitudes", "cation_energies", "dyson"):
            raise ValueError(
                f"quantity must be one of 'energies', 'amplitudes', 'cation_energies', 'dyson'; "
                f"got {quantity!r}."
            )
        if arr is None:
            raise ValueError(f"this ensemble has no {quantity!r}.")
        base = self.snapshots[list(REQUIRED_COLUMNS)]
        n = self.n_snapshots
        if arr.ndim == 2:
            k = arr.shape[1]
            name = "cation" if quantity in ("cation_energies", "dyson") else "state"
            out = base.loc[np.repeat(np.arange(n), k)].reset_index(drop=True)
            out[name] = np.tile(np.arange(k), n)
            out["value"] = arr.reshape(-1)
            return out
        s, k = arr.shape[1:]
        out = base.loc[np.repeat(np.arange(n), s * k)].reset_index(drop=True)
        out["state"] = np.tile(np.repeat(np.arange(s), k), n)
        out["cation"] = np.tile(np.arange(k), n * s)
        out["value"] = arr.reshape(-1)
        return out

    # ------------------------------------------------------------------ display
    def _summary_rows(self) -> list[tuple[str, str]]:
        t = self.snapshots["time"]
        optional = [name for name in (*SNAPSHOT_ARRAYS, *TRAJECTORY_ARRAYS)
                    if getattr(self, name) is not None]
        extra = [c for c in self.snapshots.columns if c not in REQUIRED_COLUMNS]
        lengths = self.trajectories["n_steps"]
        rows = [
            ("trajectories", f"{self.n_trajectories}"),
            ("snapshots", f"{self.n_snapshots} ({lengths.min() if len(lengths) else 0}-"
                          f"{lengths.max() if len(lengths) else 0} per trajectory)"),
            ("time", f"{t.min():.6g} .. {t.max():.6g} fs" if len(t) else "-"),
            ("atoms", f"{self.n_atoms} ({''.join(self.symbols) if self.n_atoms <= 24 else '...'})"),
            ("neutral states", ", ".join(self.state_labels)),
            ("cation states", ", ".join(self.cation_labels) or "-"),
            ("arrays", ", ".join(optional) or "-"),
            ("columns", ", ".join(extra) or "-"),
        ]
        return rows

    def __repr__(self) -> str:
        rows = self._summary_rows()
        width = max(len(k) for k, _ in rows)
        body = "\n".join(f"  {k:<{width}} : {v}" for k, v in rows)
        return f"<ensemblelab.Ensemble>\n{body}"

    def _repr_html_(self) -> str:
        cells = "".join(
            f"<tr><th style='text-align:left'>{html.escape(k)}</th>"
            f"<td style='text-align:left'>{html.escape(v)}</td></tr>"
            for k, v in self._summary_rows()
        )
        return f"<div><strong>ensemblelab.Ensemble</strong><table>{cells}</table></div>"

    def __len__(self) -> int:
        return self.n_snapshots

