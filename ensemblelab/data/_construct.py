"""Flat per-snapshot arrays -> the constructor fields of an Ensemble (sorting, copies)."""

from __future__ import annotations

import copy as _copy
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
import numpy.typing as npt
import pandas as pd

from ..errors import SchemaError
from ._schema import REQUIRED_COLUMNS
from .elements import resolve_masses

__all__ = ["fields_from_arrays"]


def fields_from_arrays(
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
) -> dict[str, Any]:
    """Sort flat per-snapshot arrays by (traj, time) and return the Ensemble fields.

    The parameters are those of :meth:`ensemblelab.Ensemble.from_arrays`; see there.

    Returns
    -------
    dict
        Keyword arguments for the ``Ensemble`` constructor; the arrays made here are
        already read-only.
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
    masses_a = resolve_masses(symbols_t, masses)  # a mapping names unusual elements

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
            ("transition_strengths", transition_strengths),
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
    return {
        "snapshots": frame,
        "geometries": geoms,
        "energies": ens_e,
        "symbols": symbols_t,
        "masses": masses_a,
        "trajectories": trajectories,
        "state_labels": tuple(state_labels) if state_labels else (),
        "cation_labels": tuple(cation_labels) if cation_labels else (),
        "metadata": meta,
        **ens_kwargs,
    }
