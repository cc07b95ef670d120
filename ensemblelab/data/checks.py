"""Which trajectories hold non-finite values (NaN/Inf), and in which fields.

The loaders check the same fields (see :data:`CHECKED_FIELDS`): with
``nonfinite="raise"`` (the default) the first NaN/Inf in one of them is a
ParseError; with ``nonfinite="keep"`` they warn, load, and record
``metadata["nonfinite"]`` = {traj: [fields]}. :func:`nonfinite_report` answers
the same question for any Ensemble, however it was made. User columns are not
checked: NaN there means "missing" (for example data computed at a stride).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np
import pandas as pd

from ._schema import REQUIRED_COLUMNS, SNAPSHOT_ARRAYS
from .ensemble import Ensemble

__all__ = ["CHECKED_COLUMNS", "CHECKED_FIELDS", "nonfinite_report", "nonfinite_by_traj",
           "snapshot_coverage"]

#: snapshot columns checked for NaN/Inf (energies of the bookkeeping, eV)
CHECKED_COLUMNS = ("e_kin", "e_pot", "e_tot")
#: every field checked: arrays of the Ensemble, then the checked columns
CHECKED_FIELDS = ("geometries", "energies", *SNAPSHOT_ARRAYS, *CHECKED_COLUMNS)


def _bad_rows(arr: np.ndarray) -> np.ndarray:
    a = np.asarray(arr, dtype=np.float64)
    finite = np.isfinite(a.reshape(a.shape[0], -1)).all(axis=1)
    return np.logical_not(finite)


def nonfinite_by_traj(traj: np.ndarray, fields: Mapping[str, np.ndarray | None]
                      ) -> dict[int, list[str]]:
    """{traj id: [fields with a NaN/Inf]} for per-snapshot arrays aligned to `traj`.

    Parameters
    ----------
    traj : ndarray, shape (n_snapshots,)
    fields : mapping of str to ndarray (n_snapshots, ...) or None

    Returns
    -------
    dict
        Only trajectories with at least one non-finite value, in id order.
    """
    out: dict[int, list[str]] = {}
    for name, arr in fields.items():
        if arr is None or np.asarray(arr).size == 0:
            continue
        bad = _bad_rows(arr)
        for t in np.unique(np.asarray(traj)[bad]):
            out.setdefault(int(t), []).append(name)
    return dict(sorted(out.items()))


def nonfinite_report(ens: Ensemble, fields: Sequence[str] | None = None) -> pd.DataFrame:
    """One row per trajectory: does it hold NaN/Inf, in which fields, how many snapshots.

    Parameters
    ----------
    ens : Ensemble
    fields : sequence of str, optional
        Ensemble arrays or snapshot columns to check; default :data:`CHECKED_FIELDS`
        (those present).

    Returns
    -------
    pandas.DataFrame
        Columns ``traj``, ``nonfinite`` (bool flag), ``fields`` (comma-separated
        names, "" when none), ``n_snapshots`` (snapshots with a non-finite value in
        any checked field) and ``first_time`` (fs, NaN when none); one row per
        trajectory in ``ens.trajectories`` order.
    """
    frame = ens.snapshots
    names = list(CHECKED_FIELDS if fields is None else fields)
    traj = frame["traj"].to_numpy()
    any_bad = np.zeros(len(frame), dtype=bool)
    per_field: dict[str, np.ndarray] = {}
    for name in names:
        if name in frame.columns:
            values = frame[name].to_numpy()
            if not np.issubdtype(values.dtype, np.number):
                continue
            arr: np.ndarray | None = values
        elif name in ("geometries", "energies", *SNAPSHOT_ARRAYS):
            arr = getattr(ens, name)
        elif fields is not None:
            raise KeyError(f"{name!r} is neither an Ensemble array nor a snapshot column.")
        else:
            continue
        if arr is None or arr.size == 0:
            continue
        bad = _bad_rows(arr)
        if bad.any():
            per_field[name] = bad
            any_bad |= bad
    ids = ens.trajectories["traj"].to_numpy()
    rows = []
    time = frame["time"].to_numpy()
    for t in ids:
        sel = traj == t
        which = [n for n, b in per_field.items() if b[sel].any()]
        hit = any_bad & sel
        rows.append({"traj": int(t), "nonfinite": bool(which), "fields": ", ".join(which),
                     "n_snapshots": int(hit.sum()),
                     "first_time": float(time[hit].min()) if hit.any() else np.nan})
    return pd.DataFrame(rows, columns=["traj", "nonfinite", "fields", "n_snapshots",
                                       "first_time"])


def snapshot_coverage(ens: Ensemble, fields: Sequence[str] | None = None) -> pd.DataFrame:
    """Per trajectory, the fraction of snapshots that hold each field.

    A snapshot holds an array field when all its values there are finite, and a
    column when its value is not missing (NaN/None). Typical use: data computed
    at a stride and joined with :func:`ensemblelab.join_snapshot_table`.

    Parameters
    ----------
    ens : Ensemble
    fields : sequence of str, optional
        Ensemble arrays or snapshot columns; default every optional array present
        and every non-required snapshot column.

    Returns
    -------
    pandas.DataFrame
        ``traj``, ``n_snapshots``, then one column per field with the fraction
        (0..1) of that trajectory's snapshots holding it; one row per trajectory
        in ``ens.trajectories`` order.
    """
    frame = ens.snapshots
    if fields is None:
        fields = [n for n in SNAPSHOT_ARRAYS if getattr(ens, n) is not None]
        fields += [c for c in frame.columns if c not in REQUIRED_COLUMNS]
    traj = frame["traj"].to_numpy()
    has: dict[str, np.ndarray] = {}
    for name in fields:
        if name in frame.columns:
            has[name] = frame[name].notna().to_numpy()
        elif name in ("geometries", "energies", *SNAPSHOT_ARRAYS):
            arr = getattr(ens, name)
            has[name] = (np.zeros(len(frame), dtype=bool) if arr is None
                         else np.logical_not(_bad_rows(arr)))
        else:
            raise KeyError(f"{name!r} is neither an Ensemble array nor a snapshot column.")
    ids = ens.trajectories["traj"].to_numpy()
    codes = pd.Index(ids).get_indexer(traj)
    counts = np.bincount(codes, minlength=ids.size)
    out = pd.DataFrame({"traj": ids, "n_snapshots": counts})
    for name, mask in has.items():
        hits = np.bincount(codes, weights=mask.astype(float), minlength=ids.size)
        out[name] = hits / np.maximum(counts, 1)
    return out
