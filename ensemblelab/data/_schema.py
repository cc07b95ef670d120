"""Schema of the Ensemble data model: column and array tables, and the validation.

Units everywhere inside: fs, eV (neutral and cation energies on one common zero),
Angstrom, amu. See :mod:`ensemblelab.units`.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
import pandas as pd

from ..errors import SchemaError

__all__ = ["SCHEMA_VERSION", "REQUIRED_COLUMNS", "SNAPSHOT_ARRAYS", "TRAJECTORY_ARRAYS",
           "validate_fields"]

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
    "transition_strengths": (
        "(n_snapshots, n_states, n_states) oscillator strengths f_ij between neutral states "
        "i and j at the snapshot geometry (symmetric, f_ij = (2/3) |E_j - E_i| |mu_ij|^2 in "
        "atomic units; diagonal ignored; NaN = not computed); used by transient absorption",
        "1"),
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



def validate_fields(raw: Mapping[str, Any]) -> dict[str, Any]:
    """Check and normalise the constructor fields of an Ensemble.

    Parameters
    ----------
    raw : mapping of str to object
        The fields as given to the constructor (``snapshots``, ``geometries``, ...).

    Returns
    -------
    dict
        The fields to store: read-only arrays, a fresh snapshots frame in column order,
        a completed trajectories table, labels and metadata.

    Raises
    ------
    SchemaError
        Naming the field, the expected shape or value and what was found.
    """
    out: dict[str, Any] = {}
    frame = raw["snapshots"]
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
    geoms = _freeze(raw["geometries"], "geometries", copy_=False)
    _check_ndim(geoms, "geometries", 3, "(n_snapshots, n_atoms, 3)")
    if geoms.shape[0] != n or geoms.shape[2] != 3:
        raise SchemaError(
            f"geometries must have shape (n_snapshots={n}, n_atoms, 3); got {geoms.shape}."
        )
    n_atoms = geoms.shape[1]
    symbols = tuple(str(s) for s in raw["symbols"])
    if len(symbols) != n_atoms:
        raise SchemaError(
            f"symbols must have n_atoms={n_atoms} entries; got {len(symbols)}."
        )
    masses = _freeze(raw["masses"], "masses", copy_=False)
    if masses.shape != (n_atoms,):
        raise SchemaError(f"masses must have shape (n_atoms={n_atoms},); got {masses.shape}.")
    energies = _freeze(raw["energies"], "energies", copy_=False)
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
    if raw["cation_energies"] is not None:
        ce = _freeze(raw["cation_energies"], "cation_energies", copy_=False)
        _check_ndim(ce, "cation_energies", 2, "(n_snapshots, n_cation)")
        if ce.shape[0] != n:
            raise SchemaError(
                f"cation_energies must have n_snapshots={n} rows; got shape {ce.shape}."
            )
        n_cat = ce.shape[1]
        out["cation_energies"] = ce
    expected = {
        "amplitudes": ((n, n_states), "(n_snapshots, n_states)"),
        "adt": ((n, n_states, n_states), "(n_snapshots, n_states, n_states)"),
        "overlaps": ((n, n_states, n_states), "(n_snapshots, n_states, n_states)"),
        "velocities": ((n, n_atoms, 3), "(n_snapshots, n_atoms, 3)"),
        "transition_strengths": ((n, n_states, n_states), "(n_snapshots, n_states, n_states)"),
    }
    if n_cat is not None:
        expected["adt_cation"] = ((n, n_cat, n_cat), "(n_snapshots, n_cation, n_cation)")
    for name, (shape, doc) in expected.items():
        value = raw[name]
        if value is None:
            continue
        arr = _freeze(value, name, copy_=False)
        if arr.shape != shape:
            raise SchemaError(f"{name} must have shape {doc} = {shape}; got {arr.shape}.")
        out[name] = arr
    if raw["adt_cation"] is not None and n_cat is None:
        raise SchemaError("adt_cation needs cation_energies (to know n_cation).")
    if raw["dyson"] is not None:
        dy = _freeze(raw["dyson"], "dyson", copy_=False)
        if n_cat is None:
            raise SchemaError(
                "dyson (squared Dyson norms) needs cation_energies; pass both."
            )
        if dy.shape not in ((n, n_cat), (n, n_states, n_cat)):
            raise SchemaError(
                f"dyson must have shape (n_snapshots, n_cation) = {(n, n_cat)} or "
                f"(n_snapshots, n_states, n_cation) = {(n, n_states, n_cat)}; got {dy.shape}."
            )
        out["dyson"] = dy

    trajs = raw["trajectories"]
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
        value = raw[name]
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
    missing_rows = ~np.isin(ids, raw["trajectories"]["traj"].to_numpy())
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
    for name, tarr in traj_arrays.items():
        if tarr is None:
            continue
        if tarr.shape[0] != len(ids):
            if missing_rows.any():
                raise SchemaError(
                    f"{name} has {tarr.shape[0]} rows but the trajectories table does not "
                    f"cover all {len(ids)} trajectories."
                )
            raise SchemaError(
                f"{name} must have n_trajectories={len(ids)} rows; got shape {tarr.shape}."
            )
        want = (len(ids), n_states) if name != "transition_dipoles" else (len(ids), n_states, 3)
        if tarr.shape != want:
            raise SchemaError(f"{name} must have shape {want}; got {tarr.shape}.")
        tarr.setflags(write=False)
        out[name] = tarr

    state_labels = tuple(raw["state_labels"]) or tuple(f"S{i}" for i in range(n_states))
    if len(state_labels) != n_states:
        raise SchemaError(
            f"state_labels must have n_states={n_states} entries; got {len(state_labels)}."
        )
    n_cat_labels = n_cat or 0
    cation_labels = tuple(raw["cation_labels"]) or tuple(f"D{k}" for k in range(n_cat_labels))
    if len(cation_labels) != n_cat_labels:
        raise SchemaError(
            f"cation_labels must have n_cation={n_cat_labels} entries; got "
            f"{len(cation_labels)}."
        )
    meta = dict(raw["metadata"])
    meta.setdefault("units", {"time": "fs", "energy": "eV", "length": "Angstrom",
                              "mass": "amu"})
    meta.setdefault("schema_version", SCHEMA_VERSION)
    meta.setdefault("sources", [])

    frame.flags.allows_duplicate_labels = True  # type: ignore[attr-defined]
    out["snapshots"] = frame
    out["trajectories"] = trajs.reset_index(drop=True)
    out["geometries"] = geoms
    out["energies"] = energies
    out["symbols"] = symbols
    out["masses"] = masses
    out["state_labels"] = state_labels
    out["cation_labels"] = cation_labels
    out["metadata"] = meta
    return out
