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
from ._construct import fields_from_arrays
from ._schema import (
    REQUIRED_COLUMNS,
    SCHEMA_VERSION,
    SNAPSHOT_ARRAYS,
    TRAJECTORY_ARRAYS,
    validate_fields,
)
from ._subset import take_rows

__all__ = ["Ensemble", "SCHEMA_VERSION", "SNAPSHOT_ARRAYS", "TRAJECTORY_ARRAYS", "REQUIRED_COLUMNS",
           "absorbing_state_of"]

class _ReadOnlyFrame:
    """A data descriptor for the frame fields of :class:`Ensemble`.

    The validated frame is stored once; every attribute access hands out a shallow
    copy. Under pandas copy-on-write a shallow copy shares the column buffers (so
    access costs microseconds, not a copy of the data), writing into it copies the
    touched column first, and its ``to_numpy()`` arrays are read-only views: nothing
    done to what ``ens.snapshots`` returns can change the ensemble.
    """

    def __init__(self, name: str) -> None:
        self._name = name
        self._slot = f"_{name}_frame"

    def __get__(self, obj: object, owner: type | None = None) -> Any:
        if obj is None:
            return self
        return obj.__dict__[self._slot].copy(deep=False)

    def __set__(self, obj: object, value: Any) -> None:
        # reached only through object.__setattr__ (the dataclass is frozen)
        obj.__dict__[self._slot] = value


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
        user columns. Every access returns a shallow copy-on-write copy (cheap: the
        column buffers are shared and read-only), so writing into it never changes
        the ensemble; the same holds for :attr:`trajectories`.
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
    transition_strengths : ndarray or None
        Optional (n_snapshots, n_states, n_states) oscillator strengths between neutral
        states at each snapshot (for transient absorption), see :data:`SNAPSHOT_ARRAYS`.
    excitation_energies, oscillator_strengths, transition_dipoles : ndarray or None
        Optional initial-condition arrays, see :data:`TRAJECTORY_ARRAYS`.
    state_labels, cation_labels : tuple of str
        Names of the neutral and cation states.
    metadata : dict
        ``units``, ``schema_version``, ``sources`` (provenance of each file),
        ``absorbing_state`` (see :attr:`absorbing_state`) and anything else the
        producer recorded.
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
    transition_strengths: np.ndarray | None = None
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
        masses: npt.ArrayLike | Mapping[str, float] | None = None,
        trajectories: pd.DataFrame | None = None,
        cation_energies: npt.ArrayLike | None = None,
        dyson: npt.ArrayLike | None = None,
        amplitudes: npt.ArrayLike | None = None,
        adt: npt.ArrayLike | None = None,
        adt_cation: npt.ArrayLike | None = None,
        overlaps: npt.ArrayLike | None = None,
        velocities: npt.ArrayLike | None = None,
        transition_strengths: npt.ArrayLike | None = None,
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
        masses : array_like, shape (n_atoms,), or mapping, optional
            Masses in amu; default from the element symbols. A mapping
            element -> amu names unusual elements or isotopes (the rest from the
            standard table).
        trajectories : DataFrame, optional
            Per-trajectory table with a ``traj`` column; missing rows get
            ``weight`` 1 and ``initial_state`` from the first snapshot.
        cation_energies, dyson, amplitudes, adt, adt_cation, overlaps, velocities : array_like
            Optional per-snapshot arrays, see :data:`SNAPSHOT_ARRAYS`.
        transition_strengths : array_like, shape (n_snapshots, n_states, n_states), optional
            Oscillator strengths between neutral states at each snapshot.
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
        return cls(**fields_from_arrays(
            traj=traj, time=time, active=active, geometries=geometries, symbols=symbols,
            energies=energies, step=step, masses=masses, trajectories=trajectories,
            cation_energies=cation_energies, dyson=dyson, amplitudes=amplitudes, adt=adt,
            adt_cation=adt_cation, overlaps=overlaps, velocities=velocities,
            transition_strengths=transition_strengths,
            excitation_energies=excitation_energies,
            oscillator_strengths=oscillator_strengths,
            transition_dipoles=transition_dipoles, state_labels=state_labels,
            cation_labels=cation_labels, metadata=metadata, columns=columns, copy=copy,
        ))

    # ------------------------------------------------------------------ validation
    def _validate(self) -> None:
        raw = {name: getattr(self, name) for name in self.__dataclass_fields__}
        for name, value in validate_fields(raw).items():
            object.__setattr__(self, name, value)

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
    def absorbing_state(self) -> int | None:
        """The absorbing neutral state (0-based), or None when there is none.

        A trajectory whose last snapshot is on this state has been stopped there on
        purpose (common practice: dynamics codes stop once the ground state is reached):
        populations and kinetics count it in that state until the end of the ensemble,
        and :func:`~ensemblelab.compute.structures.outliers.flag_trajectories` does not
        flag its early end. Set by ``metadata["absorbing_state"]`` (an int, or None to
        switch the behaviour off); without that key it is the lowest neutral state, 0.
        """
        return absorbing_state_of(self.metadata, self.n_states)

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
        return take_rows(self, rows, trusted=type(self) is Ensemble)

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
        arr = np.asarray(mask if isinstance(mask, np.ndarray) else list(mask))  # type: ignore[arg-type]
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



def absorbing_state_of(metadata: Mapping[str, Any], n_states: int) -> int | None:
    """The absorbing state recorded in `metadata` (key ``absorbing_state``; default 0).

    Parameters
    ----------
    metadata : mapping
        Ensemble metadata; ``absorbing_state`` may be missing (default: the lowest
        neutral state 0), None (no absorbing state) or an int in [0, n_states).
    n_states : int
        Number of neutral states.

    Returns
    -------
    int or None

    Raises
    ------
    SchemaError
        For a value that is not None or an int in range.
    """
    if "absorbing_state" not in metadata:
        return 0 if n_states > 0 else None
    value = metadata["absorbing_state"]
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, int | np.integer) or not (
            0 <= int(value) < n_states):
        raise SchemaError(
            f"metadata['absorbing_state'] must be None or a neutral state index in "
            f"[0, {n_states - 1}]; got {value!r}. Hint: ens.replace(metadata={{..., "
            "'absorbing_state': 0}) for the ground state, None to switch it off.")
    return int(value)


_FRAME_FIELDS = ("snapshots", "trajectories")
# the frame fields hand out shallow copy-on-write copies (set after the dataclass is built,
# so that the dataclass machinery sees plain required fields)
for _name in _FRAME_FIELDS:
    setattr(Ensemble, _name, _ReadOnlyFrame(_name))
del _name
