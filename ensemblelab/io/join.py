"""Join per-snapshot data computed separately (every k-th step, its own table) into an Ensemble.

Electronic data such as cation energies and Dyson norms are often computed in a
separate run, at a stride, and delivered as a table with one row per computed
snapshot. :func:`join_snapshot_table` aligns such a table to an Ensemble

* by ``(traj, step)`` (``on="step"``, the default), or
* by ``(traj, time)`` within a tolerance (``on="time"``),

and leaves every snapshot without a row missing (NaN), so analyses can tell
"not computed" from zero. :func:`ensemblelab.snapshot_coverage` reports, per
trajectory, the fraction of snapshots that have each field.

Table columns (the names of :mod:`ensemblelab.io.table`)
---------------------------------------------------------

==================  ===============================================  ==================
column              meaning                                          unit
==================  ===============================================  ==================
``traj``            trajectory id (required)                         int
``step``            step index (required with ``on="step"``)         int
``time``            time (required with ``on="time"``)               ``time_unit``
``cation_e_<k>``    cation energies, same zero as the neutral ones   ``energy_unit``
``dyson_<k>``       squared Dyson norms of the active state          1
``dyson_<i>_<k>``   squared Dyson norms of every state i             1
``amp_<i>``         electronic populations abs(c_i)^2                1
``e_kin, e_pot,``   kinetic, potential, total energy                 ``energy_unit``
``e_tot``
anything else       a user column of the snapshot table              as given
==================  ===============================================  ==================

A field the Ensemble already holds (an array, or a snapshot column of the same
name; ``e_<i>`` and ``active`` always) is refused rather than overwritten.
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any, Literal

import numpy as np
import pandas as pd

from .. import units
from ..data.checks import CHECKED_COLUMNS
from ..data.ensemble import Ensemble
from ..errors import ParseError
from ._common import resolve_unit
from .table import column_block, indexed_columns, numeric_column, read_frame

__all__ = ["join_snapshot_table"]

#: default time tolerance of ``on="time"``, as a fraction of the trajectory's median step
#: (our choice: far below any step, far above the rounding of written times)
TIME_TOLERANCE_FRACTION = 0.01


def read_source(table: str | Path | pd.DataFrame) -> tuple[pd.DataFrame, Path | None, bool]:
    """(frame, path or None, whether line numbers are CSV lines) of a table argument."""
    if isinstance(table, pd.DataFrame):
        return table.reset_index(drop=True), None, False
    path = Path(table)
    if not path.is_file():
        raise FileNotFoundError(f"{path}: no such file.")
    csv = not path.name.lower().endswith((".parquet", ".pq"))
    return read_frame(path), path, csv


def integer_column(table: pd.DataFrame, col: str, where: Any, csv: bool) -> np.ndarray:
    """A column of whole numbers as int64 (ParseError naming the row otherwise)."""
    v = numeric_column(table, col, where, csv=csv)
    bad = ~np.isfinite(v) | (v != np.round(v))
    if bad.any():
        row = int(np.flatnonzero(bad)[0])
        raise ParseError(f"expected an integer, found {table[col].iloc[row]!r}.", path=where,
                         line=row + 2 if csv else None, field=col,
                         hint=f"{col} holds whole numbers in every row.")
    return v.astype(np.int64)


def match_rows(ens: Ensemble, table: pd.DataFrame, *, on: str, tolerance: float | None,
               t_fac: float, where: Any, csv: bool) -> np.ndarray:
    """Snapshot row of every table row (-1: no snapshot matches); duplicates refused."""
    line = (lambda r: r + 2) if csv else (lambda r: None)  # noqa: E731
    need = ["traj", on]
    missing = [c for c in need if c not in table.columns]
    if missing:
        raise ParseError(f"missing key column(s) {missing}; found {list(table.columns)[:12]}.",
                         path=where, line=1 if csv else None, field=missing[0],
                         hint=f"a table joined on={on!r} needs the columns {need}.")
    snaps = ens.snapshots
    traj = integer_column(table, "traj", where, csv)
    if on == "step":
        step = integer_column(table, "step", where, csv)
        index = pd.MultiIndex.from_arrays([snaps["traj"].to_numpy(), snaps["step"].to_numpy()])
        loc = np.asarray(index.get_indexer(pd.MultiIndex.from_arrays([traj, step])),
                         dtype=np.int64)
    else:
        time = numeric_column(table, "time", where, csv=csv) * t_fac
        loc = np.full(len(table), -1, dtype=np.int64)
        s_traj, s_time = snaps["traj"].to_numpy(), snaps["time"].to_numpy()
        for t in np.unique(traj):
            rows = np.flatnonzero(traj == t)
            idx = np.flatnonzero(s_traj == t)
            if idx.size == 0:
                continue
            ts = s_time[idx]
            tol = tolerance
            if tol is None:
                dt = float(np.median(np.diff(ts))) if ts.size > 1 else 1.0
                tol = TIME_TOLERANCE_FRACTION * dt
            j = np.clip(np.searchsorted(ts, time[rows]), 1, max(ts.size - 1, 1))
            left = np.abs(time[rows] - ts[j - 1])
            right = np.abs(time[rows] - ts[np.minimum(j, ts.size - 1)])
            best = np.where(left <= right, j - 1, np.minimum(j, ts.size - 1))
            ok = np.minimum(left, right) <= tol
            loc[rows[ok]] = idx[best[ok]]
    hit = loc[loc >= 0]
    if hit.size != np.unique(hit).size:
        seen: dict[int, int] = {}
        for r, k in enumerate(loc):
            if k >= 0 and k in seen:
                raise ParseError(
                    f"rows {seen[int(k)]} and {r} both match trajectory {traj[r]} at step "
                    f"{int(snaps['step'].iloc[k])} (time {float(snaps['time'].iloc[k]):g} fs).",
                    path=where, line=line(r), field=on,
                    hint="one row per snapshot; with on='time' pass a smaller tolerance.")
            seen[int(k)] = r
    return loc


def _data_blocks(table: pd.DataFrame, ens: Ensemble, *, e_fac: float, where: Any,
                 csv: bool) -> tuple[dict[str, np.ndarray], dict[str, np.ndarray]]:
    """The Ensemble arrays and snapshot columns the table's data columns make (table rows)."""
    cols = [str(c) for c in table.columns]
    used = {"traj", "step", "time"}
    arrays: dict[str, np.ndarray] = {}
    header = 1 if csv else None
    clash = [c for c in cols if c == "active" or re.fullmatch(r"e_\d+", c)]
    if clash:
        raise ParseError(f"the column(s) {clash[:6]} would replace the trajectories' own "
                         "active states or energies.", path=where, line=header, field=clash[0],
                         hint="rename them (e.g. e2_0 for energies of another method) to keep "
                              "them as user columns.")
    cat = indexed_columns(cols, r"cation_e_(\d+)")
    if cat:
        arrays["cation_energies"] = column_block(table, cat, (len(cat),), where, csv,
                                                 "cation_e_*") * e_fac
        used |= {c for _, c in cat}
    n_cat = len(cat) if cat else ens.n_cation
    dy1, dy2 = indexed_columns(cols, r"dyson_(\d+)"), indexed_columns(cols, r"dyson_(\d+)_(\d+)")
    if dy1 or dy2:
        if not n_cat:
            raise ParseError("dyson_* columns need cation energies (cation_e_* columns here or "
                             "in the ensemble).", path=where, line=header, field="dyson_*",
                             hint="add the cation_e_<k> columns.")
        arrays["dyson"] = (column_block(table, dy1, (n_cat,), where, csv, "dyson_*") if dy1
                           else column_block(table, dy2, (ens.n_states, n_cat), where, csv,
                                             "dyson_*"))
        used |= {c for _, c in dy1 + dy2}
    amp = indexed_columns(cols, r"amp_(\d+)")
    if amp:
        arrays["amplitudes"] = column_block(table, amp, (ens.n_states,), where, csv, "amp_*")
        used |= {c for _, c in amp}
    present = [n for n in arrays if getattr(ens, n) is not None]
    columns: dict[str, np.ndarray] = {}
    for c in cols:
        if c in used:
            continue
        if c in CHECKED_COLUMNS:
            columns[c] = numeric_column(table, c, where, csv=csv) * e_fac
        else:
            columns[c] = table[c].to_numpy()
    present += [c for c in columns if c in ens.snapshots.columns]
    if present:
        raise ParseError(f"the ensemble already holds {present}; a join never overwrites.",
                         path=where, line=header, field=present[0],
                         hint="drop them first (ens.replace(name=None) for arrays, or select "
                              "the snapshot columns you keep), or rename the table's columns.")
    return arrays, columns


def _spread(values: np.ndarray, loc: np.ndarray, n: int) -> np.ndarray:
    ok = loc >= 0
    if values.dtype.kind in "fc":
        out = np.full((n, *values.shape[1:]), np.nan, dtype=values.dtype)
    elif values.dtype.kind in "iub":  # whole numbers and flags become floats (NaN = missing)
        out = np.full((n, *values.shape[1:]), np.nan)
    else:
        out = np.full((n, *values.shape[1:]), None, dtype=object)
    out[loc[ok]] = values[ok]
    return out


def join_snapshot_table(
    ens: Ensemble,
    table: str | Path | pd.DataFrame,
    *,
    on: Literal["step", "time"] = "step",
    tolerance: float | None = None,
    energy_unit: str | None = None,
    time_unit: str | None = None,
    unmatched: Literal["raise", "ignore"] = "raise",
) -> Ensemble:
    """Add per-snapshot data computed separately (e.g. every k-th step) to an Ensemble.

    Parameters
    ----------
    ens : Ensemble
        The trajectories (geometries, active states, energies).
    table : str, Path or pandas.DataFrame
        A CSV (or Parquet) file or a DataFrame, one row per computed snapshot; the
        columns are listed in :mod:`ensemblelab.io.join`.
    on : {"step", "time"}
        Match rows by ``(traj, step)`` or by ``(traj, time)``.
    tolerance : float, optional
        With ``on="time"``: the largest time difference (fs) of a match; default
        1% of each trajectory's median time step.
    energy_unit, time_unit : str, optional
        Units of the table (default eV and fs), converted at the boundary.
    unmatched : {"raise", "ignore"}
        A row that matches no snapshot (unknown trajectory, step or time): raise a
        ParseError naming it, or drop it (counted in the metadata record).

    Returns
    -------
    Ensemble
        With the new arrays (``cation_energies``, ``dyson``, ``amplitudes``) and
        snapshot columns; snapshots without a row hold NaN (None for text).
        ``metadata["joins"]`` gains a record: source, ``on``, fields, rows,
        matched and dropped rows, tolerance. See
        :func:`ensemblelab.snapshot_coverage` for the coverage per trajectory.

    Raises
    ------
    ParseError
        Naming the table (file and line for CSV), the field and a hint.

    Examples
    --------
    Cation energies computed every 10th step (invented values): 31 of 301 steps hold them.

    >>> import pandas as pd
    >>> import ensemblelab as el
    >>> from ensemblelab.testing import make_toy_ensemble
    >>> ens = make_toy_ensemble(2).replace(cation_energies=None, dyson=None, cation_labels=())
    >>> s = ens.snapshots[ens.snapshots["step"] % 10 == 0]
    >>> table = pd.DataFrame({"traj": s["traj"], "step": s["step"], "cation_e_0": 8.0})
    >>> joined = el.join_snapshot_table(ens, table)
    >>> el.snapshot_coverage(joined, ["cation_energies"]).round(3)
       traj  n_snapshots  cation_energies
    0     0          301            0.103
    1     1          301            0.103
    """
    if on not in ("step", "time"):
        raise ValueError(f"The 'on' parameter must be 'step' or 'time'; got {on!r}.")
    if unmatched not in ("raise", "ignore"):
        raise ValueError(f"The 'unmatched' parameter must be 'raise' or 'ignore'; got "
                         f"{unmatched!r}.")
    if tolerance is not None and not (np.isfinite(tolerance) and tolerance >= 0):
        raise ValueError(f"The 'tolerance' parameter must be a finite time >= 0 (fs); got "
                         f"{tolerance!r}.")
    frame, path, csv = read_source(table)
    where: Any = path if path is not None else "table"
    frame.columns = [str(c) for c in frame.columns]
    e_fac = units.energy_factor(resolve_unit("energy", None, energy_unit, path=where))
    t_fac = units.time_factor(resolve_unit("time", None, time_unit, path=where))
    loc = match_rows(ens, frame, on=on, tolerance=tolerance, t_fac=t_fac, where=where, csv=csv)
    bad = np.flatnonzero(loc < 0)
    if bad.size and unmatched == "raise":
        r = int(bad[0])
        key = frame[on].iloc[r]
        raise ParseError(
            f"{bad.size} of {len(frame)} row(s) match no snapshot; the first is trajectory "
            f"{frame['traj'].iloc[r]} at {on} {key}.", path=where,
            line=r + 2 if csv else None, field=on,
            hint="check the trajectory ids and the time_unit/tolerance, or pass "
                 "unmatched='ignore' to drop such rows.")
    arrays, columns = _data_blocks(frame, ens, e_fac=e_fac, where=where, csv=csv)
    n = ens.n_snapshots
    changes: dict[str, Any] = {name: _spread(a, loc, n) for name, a in arrays.items()}
    snaps = ens.snapshots
    for name, values in columns.items():
        snaps[name] = _spread(np.asarray(values), loc, n)
    meta = dict(ens.metadata)
    record = {"source": str(path) if path is not None else "DataFrame", "on": on,
              "fields": [*arrays, *columns], "rows": int(len(frame)),
              "matched": int((loc >= 0).sum()), "dropped": int(bad.size),
              "tolerance_fs": tolerance}
    meta["joins"] = [*meta.get("joins", []), record]
    return ens.replace(snapshots=snaps, metadata=meta, **changes)
