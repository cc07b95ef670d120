"""Subsets of an Ensemble by snapshot rows (used by ``Ensemble.select`` / ``without``).

A subset of a validated ensemble, taken in row order, is valid by construction: the
snapshots stay sorted by trajectory and time, the times finite, the active states in
range, the arrays the right shape. :func:`take_rows` therefore builds it directly
(:func:`trusted_subset`: no second validation, which costs milliseconds of pandas work
per call and dominates loops over many subsets, such as the convergence section of
the report), and recomputes only what depends on the rows kept: ``n_steps`` and
``t_end`` of each trajectory. Anything it cannot vouch for (rows not strictly
increasing, a subclass, extension dtypes in the trajectories table) goes through the
validating constructor, as before. Tests compare both paths field by field.
"""

from __future__ import annotations

import copy
from typing import Any

import numpy as np

from ._schema import SNAPSHOT_ARRAYS, TRAJECTORY_ARRAYS

__all__ = ["take_rows", "trusted_subset", "validated_subset"]


def _read_only(arr: np.ndarray) -> np.ndarray:
    arr.setflags(write=False)
    return arr


def validated_subset(ens: Any, rows: np.ndarray) -> Any:
    """The subset built through the validating constructor (the reference path)."""
    frame = ens.snapshots.iloc[rows].reset_index(drop=True)
    ids = np.unique(frame["traj"].to_numpy())
    keep = ens.trajectories["traj"].isin(ids).to_numpy()
    trajs = ens.trajectories.loc[keep, [c for c in ens.trajectories.columns
                                        if c not in ("n_steps", "t_end")]]
    arrays = {name: None if getattr(ens, name) is None else getattr(ens, name)[rows]
              for name in SNAPSHOT_ARRAYS}
    for name in TRAJECTORY_ARRAYS:
        value = getattr(ens, name)
        arrays[name] = None if value is None else value[keep]
    return type(ens)(
        snapshots=frame, geometries=ens.geometries[rows], energies=ens.energies[rows],
        symbols=ens.symbols, masses=ens.masses, trajectories=trajs,
        state_labels=ens.state_labels, cation_labels=ens.cation_labels,
        metadata=copy.deepcopy(ens.metadata), **arrays)


def _trusted_ok(ens: Any, rows: np.ndarray) -> bool:
    if rows.size == 0:
        return False
    if rows[0] < 0 or rows[-1] >= ens.n_snapshots or np.any(np.diff(rows) <= 0):
        return False
    trajs = ens.trajectories
    return (list(trajs.columns[:5]) == ["traj", "weight", "initial_state", "n_steps", "t_end"]
            and all(isinstance(dt, np.dtype) for dt in trajs.dtypes))


def trusted_subset(ens: Any, rows: np.ndarray) -> Any:
    """The subset of the validated Ensemble `ens` at the strictly increasing snapshot
    `rows`, built without a second validation (equal to :func:`validated_subset`)."""
    frame = ens.snapshots.iloc[rows].reset_index(drop=True)
    frame.flags.allows_duplicate_labels = True
    traj = frame["traj"].to_numpy()
    first = np.r_[0, np.flatnonzero(traj[1:] != traj[:-1]) + 1]
    last = np.r_[first[1:] - 1, traj.size - 1]
    all_trajs = ens.trajectories
    keep = np.isin(all_trajs["traj"].to_numpy(), traj[first])
    trajs = all_trajs.loc[keep].reset_index(drop=True)
    trajs["n_steps"] = (last - first + 1).astype(np.int64)
    trajs["t_end"] = frame["time"].to_numpy()[last]
    fields: dict[str, Any] = {
        "snapshots": frame, "trajectories": trajs,
        "geometries": _read_only(ens.geometries[rows]),
        "energies": _read_only(ens.energies[rows]), "symbols": ens.symbols,
        "masses": ens.masses, "state_labels": ens.state_labels,
        "cation_labels": ens.cation_labels, "metadata": copy.deepcopy(ens.metadata)}
    for name in SNAPSHOT_ARRAYS:
        value = getattr(ens, name)
        fields[name] = None if value is None else _read_only(value[rows])
    for name in TRAJECTORY_ARRAYS:
        value = getattr(ens, name)
        fields[name] = None if value is None else _read_only(value[keep])
    out = object.__new__(type(ens))
    for name in type(ens).__dataclass_fields__:
        object.__setattr__(out, name, fields[name])
    return out


def take_rows(ens: Any, rows: Any, *, trusted: bool = False) -> Any:
    """A new Ensemble with the snapshot `rows` (positions) of `ens`.

    Parameters
    ----------
    ens : Ensemble
    rows : array_like of int, shape (n_rows,)
        Snapshot positions.
    trusted : bool
        The caller vouches that ``type(ens)`` validates nothing beyond
        :class:`~ensemblelab.data.ensemble.Ensemble` (no subclass hooks); the direct path
        is then used when the rows allow it.

    Returns
    -------
    Ensemble
    """
    rows = np.asarray(rows, dtype=np.int64)
    if trusted and _trusted_ok(ens, rows):
        return trusted_subset(ens, rows)
    return validated_subset(ens, rows)

