"""Tidy snapshot tables (CSV or Parquet) with geometries in a multi-frame XYZ file.

Convention
----------
One row per snapshot, in any order; these columns (names of our own):

===================  ====================================================  ===============
column               meaning                                               unit
===================  ====================================================  ===============
``traj``             trajectory id (required)                              int
``time``             time (required)                                       ``time_unit``
``active``           active neutral state (required), 0-based unless       int
                     ``state_base=1``
``e_<i>``            neutral adiabatic energies, i = 0..n_states-1          ``energy_unit``
                     (required)
``cation_e_<k>``     cation energies, k = 0..n_cation-1                    ``energy_unit``
``dyson_<k>``        squared Dyson norms of the active state               1
``dyson_<i>_<k>``    squared Dyson norms of every state i to cation k      1
``amp_<i>``          electronic populations abs(c_i)^2                     1
``step``             step index (default 0, 1, ... in time order)          int
``e_kin, e_pot,``    kinetic, potential and total energy                   ``energy_unit``
``e_tot``
anything else        a user column of the snapshot table
===================  ====================================================  ===============

Geometries: a multi-frame XYZ file with **one frame per table row, in table
order** (comment lines are ignored). By default it is the sibling file named
like the table with ``.xyz`` or ``.xyz.gz`` (``run.csv`` -> ``run.xyz``); pass
``geometries=path`` to name it, or ``geometries=False`` for an ensemble
without structures. Per-trajectory data: ``trajectories=path`` (CSV as in
:mod:`ensemblelab.io.xyz`), by default the sibling ``<stem>.trajectories.csv``
when it exists.

Units are converted at the boundary when the user says so
(``energy_unit="hartree"``, ``time_unit="au"``, ``length_unit="bohr"``), with
:mod:`ensemblelab.units` (CODATA via scipy.constants).
"""

from __future__ import annotations

import re
import warnings
from pathlib import Path
from typing import Any, cast

import numpy as np
import pandas as pd

from .. import units
from .._csv import restore_frame, to_csv_text
from ..data.checks import CHECKED_COLUMNS, nonfinite_by_traj
from ..data.ensemble import Ensemble
from ..errors import ParseError, SchemaError, UnitWarning
from ._common import atomic_file, check_nonfinite_option, file_source, report_nonfinite
from ._common import resolve_unit as _resolve_unit

__all__ = ["load_table", "write_table"]

_TABLE_SUFFIXES = (".csv.gz", ".csv", ".parquet", ".pq")


def _stem(path: Path) -> Path:
    name = path.name
    for suf in _TABLE_SUFFIXES:
        if name.lower().endswith(suf):
            return path.with_name(name[: -len(suf)])
    return path.with_suffix("")


def _read(path: Path) -> pd.DataFrame:
    try:
        if path.name.lower().endswith((".parquet", ".pq")):
            return pd.read_parquet(path)
        return restore_frame(pd.read_csv(path))  # text cells neutralised by write_table
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        raise ParseError(f"cannot parse the table ({exc}).", path=path,
                         hint="a CSV with a header row, or a Parquet file, is expected.") from exc
    except Exception as exc:  # pyarrow raises its own error types
        raise ParseError(f"cannot read the table ({exc}).", path=path,
                         hint="is the file complete?") from exc


def _numeric(table: pd.DataFrame, col: str, path: Path, *, csv: bool) -> np.ndarray:
    values = pd.to_numeric(table[col], errors="coerce").to_numpy(np.float64)
    bad = np.isnan(values) & table[col].notna().to_numpy() & \
        ~table[col].astype(str).str.strip().str.lower().isin(["nan", "-nan", "+nan"]).to_numpy()
    if bad.any():
        row = int(np.flatnonzero(bad)[0])
        raise ParseError(
            f"expected a number, found {table[col].iloc[row]!r} (row {row}).", path=path,
            line=row + 2 if csv else None, field=col,
            hint="numeric columns must hold plain decimal numbers.",
        )
    return values


def _indexed(columns: list[str], pattern: str) -> list[tuple[tuple[int, ...], str]]:
    found = []
    for c in columns:
        m = re.fullmatch(pattern, c)
        if m:
            found.append((tuple(int(g) for g in m.groups()), c))
    return sorted(found)


def _block(table: pd.DataFrame, found: list[tuple[tuple[int, ...], str]], shape: tuple[int, ...],
           path: Path, csv: bool, what: str) -> np.ndarray:
    want = [tuple(ix) for ix in np.ndindex(*shape)]
    got = [ix for ix, _ in found]
    if got != want:
        raise ParseError(
            f"inconsistent shape: expected columns for indices {want[:6]}"
            f"{'...' if len(want) > 6 else ''} ({' x '.join(map(str, shape))}), found {got[:6]}"
            f"{'...' if len(got) > 6 else ''}.", path=path, line=1 if csv else None, field=what,
            hint="number the columns from 0 without gaps.",
        )
    arr = np.column_stack([_numeric(table, c, path, csv=csv) for _, c in found])
    return arr.reshape((len(table), *shape))


def load_table(
    path: str | Path,
    *,
    geometries: str | Path | bool | None = None,
    trajectories: str | Path | pd.DataFrame | None = None,
    energy_unit: str | None = None,
    time_unit: str | None = None,
    length_unit: str | None = None,
    state_base: int = 0,
    nonfinite: str = "raise",
    progress: bool = True,
    masses: Any = None,
) -> Ensemble:
    """Load a tidy snapshot table (CSV or Parquet) with geometries from a multi-frame XYZ file.

    Parameters
    ----------
    path : str or Path
        ``.csv``, ``.csv.gz``, ``.parquet`` or ``.pq`` table, one row per snapshot.
    geometries : path, bool or None
        Multi-frame XYZ file with one frame per row in table order; None looks
        for the sibling ``<stem>.xyz`` / ``<stem>.xyz.gz``; False: no structures.
    trajectories : path or DataFrame, optional
        Per-trajectory table; default the sibling ``<stem>.trajectories.csv`` if present.
    energy_unit, time_unit, length_unit : str, optional
        Units of the table and the XYZ file (default eV, fs, Angstrom).
    state_base : {0, 1}
        How ``active`` counts states.
    nonfinite : {"raise", "keep"}
        NaN/Inf in coordinates, energies, the array columns and ``e_kin``,
        ``e_pot``, ``e_tot`` (not user columns): raise a ParseError, or keep with
        a warning and list them in ``metadata["nonfinite"]`` ({traj: [fields]}).
    progress : bool
        Unused (a table loads in one go); accepted for a uniform signature.
    masses : mapping or array_like, optional
        Atomic masses (amu): element -> amu (others from the standard table) or
        one mass per atom.

    Returns
    -------
    Ensemble
        Rows sorted by (traj, time); internal units.
    """
    from ._xyz_props import masses_of_file, read_atoms
    from .xyz import read_text, split_frames  # shared XYZ frame parser

    check_nonfinite_option(nonfinite)
    path = Path(path)
    if not path.is_file():
        raise FileNotFoundError(f"{path}: no such file.")
    if state_base not in (0, 1):
        raise ValueError(f"The 'state_base' parameter must be 0 or 1; got {state_base!r}.")
    csv = not path.name.lower().endswith((".parquet", ".pq"))
    table = _read(path)
    columns = [str(c) for c in table.columns]
    table.columns = columns
    missing = [c for c in ("traj", "time", "active") if c not in columns]
    e_cols = _indexed(columns, r"e_(\d+)")
    if missing or not e_cols:
        need = missing + ([] if e_cols else ["e_0, e_1, ..."])
        raise ParseError(f"missing required column(s) {need}; found {columns}.", path=path,
                         line=1 if csv else None, field=need[0],
                         hint="see the column table in ensemblelab.io.table.")
    if len(table) == 0:
        raise ParseError("the table has no rows.", path=path, hint="one row per snapshot.")
    e_unit = _resolve_unit("energy", None, energy_unit, path=path)
    t_unit = _resolve_unit("time", None, time_unit, path=path)
    l_unit = _resolve_unit("length", None, length_unit, path=path)
    e_fac, t_fac, l_fac = (units.energy_factor(e_unit), units.time_factor(t_unit),
                           units.length_factor(l_unit))
    n = len(table)
    used = {"traj", "time", "active", "step"}

    def line_of(row: int) -> tuple[int, int | None]:
        return row, (row + 2 if csv else None)

    energies = _block(table, e_cols, (len(e_cols),), path, csv, "e_*")
    used |= {c for _, c in e_cols}
    n_states = energies.shape[1]
    report_nonfinite(energies, name="e_*", nonfinite=nonfinite, path=path,
                     frame_of_row=line_of, stacklevel=4)
    arrays: dict[str, np.ndarray] = {}
    cat = _indexed(columns, r"cation_e_(\d+)")
    if cat:
        arrays["cation_energies"] = _block(table, cat, (len(cat),), path, csv, "cation_e_*")
        used |= {c for _, c in cat}
    dy1, dy2 = _indexed(columns, r"dyson_(\d+)"), _indexed(columns, r"dyson_(\d+)_(\d+)")
    if dy1 or dy2:
        if not cat:
            raise ParseError("dyson_* columns need cation_e_* columns.", path=path,
                             line=1 if csv else None, field="dyson_*",
                             hint="add the cation energies (Dyson norms belong to cation "
                                  "states).")
        if dy1 and dy2:
            raise ParseError("both dyson_<k> and dyson_<i>_<k> columns are present.", path=path,
                             line=1 if csv else None, field="dyson_*",
                             hint="give the active-state norms or every state's, not both.")
        arrays["dyson"] = (_block(table, dy1, (len(cat),), path, csv, "dyson_*") if dy1 else
                           _block(table, dy2, (n_states, len(cat)), path, csv, "dyson_*"))
        used |= {c for _, c in dy1 + dy2}
    amp = _indexed(columns, r"amp_(\d+)")
    if amp:
        arrays["amplitudes"] = _block(table, amp, (n_states,), path, csv, "amp_*")
        used |= {c for _, c in amp}
    for name, arr in arrays.items():
        report_nonfinite(arr, name=name, nonfinite=nonfinite, path=path, frame_of_row=line_of,
                         stacklevel=4)

    time = _numeric(table, "time", path, csv=csv)
    if not np.all(np.isfinite(time)):
        row = int(np.flatnonzero(~np.isfinite(time))[0])
        raise ParseError(f"expected a finite time, found {time[row]}.", path=path,
                         line=row + 2 if csv else None, field="time",
                         hint="every snapshot needs a finite time stamp.")
    ints = {}
    for col in ("traj", "active", "step"):
        if col not in columns:
            continue
        v = _numeric(table, col, path, csv=csv)
        bad = ~np.isfinite(v) | (v != np.round(v))
        if bad.any():
            row = int(np.flatnonzero(bad)[0])
            raise ParseError(f"expected an integer, found {table[col].iloc[row]!r}.", path=path,
                             line=row + 2 if csv else None, field=col,
                             hint=f"{col} holds whole numbers.")
        ints[col] = v.astype(np.int64)
    traj, active = ints["traj"], ints["active"] - state_base
    bad = (active < 0) | (active >= n_states)
    if bad.any():
        row = int(np.flatnonzero(bad)[0])
        raise ParseError(
            f"active state out of range: expected {state_base}..{n_states - 1 + state_base} "
            f"({n_states} states), found {active[row] + state_base} (row {row}).", path=path,
            line=row + 2 if csv else None, field="active",
            hint="pass state_base=1 if the table counts states from 1.",
        )
    order = np.lexsort((time, traj))
    ts, tt = time[order], traj[order]
    same = tt[1:] == tt[:-1]
    dup = np.flatnonzero(same & (np.diff(ts) <= 0))
    if dup.size:
        a, b = int(order[dup[0]]), int(order[dup[0] + 1])
        raise ParseError(
            f"duplicated time {ts[dup[0]]:g} in trajectory {tt[dup[0]]} (rows {a} and {b}).",
            path=path, line=b + 2 if csv else None, field="time",
            hint="each (traj, time) pair must appear once.",
        )

    if units.energy_factor(e_unit) == 1.0:
        from .xyz import looks_like_hartree

        why = looks_like_hartree(energies, arrays.get("cation_energies"))
        if why:
            warnings.warn(
                f"{path}: energies look like hartree although eV was declared or assumed: {why}."
                " Hint: pass energy_unit='hartree'.", UnitWarning, stacklevel=3)
    energies = energies * e_fac
    if "cation_energies" in arrays:
        arrays["cation_energies"] = arrays["cation_energies"] * e_fac
    cols: dict[str, Any] = {}
    for c in columns:
        if c in used:
            continue
        if c in CHECKED_COLUMNS:
            cols[c] = _numeric(table, c, path, csv=csv) * e_fac
            report_nonfinite(cols[c], name=c, nonfinite=nonfinite, path=path,
                             frame_of_row=line_of, stacklevel=4)
        else:
            cols[c] = table[c].to_numpy()

    sources = [file_source(path, fmt="table", energy_unit=e_unit, time_unit=t_unit)]
    stem = _stem(path)
    if geometries is None:
        candidates = [stem.with_name(stem.name + s) for s in (".xyz", ".xyz.gz")]
        found = [c for c in candidates if c.is_file()]
        if not found:
            raise ParseError(
                f"no geometry file found; looked for {candidates[0].name} and "
                f"{candidates[1].name}.", path=path, field="geometries",
                hint="pass geometries=<multi-frame XYZ file>, or geometries=False for an "
                     "ensemble without structures.")
        geometries = found[0]
    geoms: np.ndarray
    symbols: list[str]
    mass: np.ndarray | None = None
    if geometries is False:
        geoms, symbols = np.zeros((n, 0, 3)), []
    else:
        gpath = Path(geometries)  # type: ignore[arg-type]
        n_atoms, n_frames, lines = split_frames(read_text(gpath), gpath)
        if n_frames != n:
            raise ParseError(
                f"expected one frame per table row ({n} rows), found {n_frames} frames.",
                path=gpath, field="frames",
                hint="the XYZ file must hold the geometries in table row order.")
        symbols, geoms, _vel, _cols = read_atoms(lines, n_atoms, n_frames, gpath,
                                                 skip_all=True)  # only positions are used
        mass = masses_of_file(symbols, masses, None, None, gpath)
        report_nonfinite(geoms, name="coordinates", nonfinite=nonfinite, path=gpath,
                         stacklevel=4)
        geoms = geoms * l_fac
        sources.append(file_source(gpath, fmt="xyz"))

    traj_table: pd.DataFrame | None = None
    traj_arrays: dict[str, np.ndarray] = {}
    if trajectories is None:
        sib = stem.with_name(stem.name + ".trajectories.csv")
        trajectories = sib if sib.is_file() else None
    if isinstance(trajectories, pd.DataFrame):
        traj_table = trajectories
    elif trajectories is not None:
        from .xyz import read_trajectories_csv

        tpath = Path(trajectories)
        traj_table, traj_arrays = read_trajectories_csv(
            tpath, np.unique(traj), energy_unit=energy_unit, state_base=state_base)
        sources.append(file_source(tpath, fmt="csv"))
    bad = nonfinite_by_traj(traj, {"geometries": geoms, "energies": energies, **arrays,
                                   **{c: cols[c] for c in CHECKED_COLUMNS if c in cols}})
    nonfinite_meta = {"nonfinite": bad} if bad else {}
    try:
        return Ensemble.from_arrays(
            traj=traj, time=time * t_fac, active=active, geometries=geoms, symbols=symbols,
            energies=energies, step=ints.get("step"), trajectories=traj_table, masses=mass,
            metadata={"sources": sources, **nonfinite_meta}, columns=cols, copy=False,
            **cast(dict[str, Any], arrays), **cast(dict[str, Any], traj_arrays),
        )
    except SchemaError as exc:
        raise SchemaError(f"{path}: {exc}") from exc


def write_table(ens: Ensemble, path: str | Path, *, geometries: bool = True) -> Path:
    """Write `ens` as a tidy table plus sibling ``<stem>.xyz`` and ``<stem>.trajectories.csv``.

    Parameters
    ----------
    ens : Ensemble
    path : str or Path
        ``.csv`` or ``.parquet`` target; each file is written atomically.
    geometries : bool
        Also write the multi-frame XYZ file (full precision).

    Returns
    -------
    Path
        The table file. Units: fs, eV, Angstrom. Snapshot ids, velocities and
        matrices (adt, overlaps) are not part of this layout.
    """
    from .xyz import write_trajectories_csv

    path = Path(path)
    frame = ens.snapshots.drop(columns=["snapshot"])
    data: dict[str, Any] = {c: frame[c].to_numpy() for c in ("traj", "step", "time", "active")}
    for i in range(ens.n_states):
        data[f"e_{i}"] = ens.energies[:, i]
    if ens.cation_energies is not None:
        for k in range(ens.n_cation):
            data[f"cation_e_{k}"] = ens.cation_energies[:, k]
    if ens.dyson is not None:
        if ens.dyson.ndim == 2:
            for k in range(ens.n_cation):
                data[f"dyson_{k}"] = ens.dyson[:, k]
        else:
            for i in range(ens.n_states):
                for k in range(ens.n_cation):
                    data[f"dyson_{i}_{k}"] = ens.dyson[:, i, k]
    if ens.amplitudes is not None:
        for i in range(ens.n_states):
            data[f"amp_{i}"] = ens.amplitudes[:, i]
    for c in frame.columns:
        if c not in data:
            data[c] = frame[c].to_numpy()
    out = pd.DataFrame(data)
    parquet = path.name.lower().endswith((".parquet", ".pq"))
    with atomic_file(path, "wb") as fh:
        if parquet:
            out.to_parquet(fh, index=False)
        else:
            fh.write(to_csv_text(out).encode())  # formula-like text cells neutralised
    stem = _stem(path)
    if geometries and ens.n_atoms:
        atom = "".join(f"{s} %r %r %r\n" for s in ens.symbols)
        with atomic_file(stem.with_name(stem.name + ".xyz")) as fh:
            for t, pos in zip(ens.snapshots["time"].tolist(),
                              ens.geometries.reshape(ens.n_snapshots, -1).tolist(), strict=True):
                fh.write(f"{ens.n_atoms}\ntime={t!r}\n")
                fh.write(atom % tuple(pos))
    with atomic_file(stem.with_name(stem.name + ".trajectories.csv")) as fh:
        write_trajectories_csv(ens, fh)
    return path


# shared with the snapshot-table join (ensemblelab.io.join): same columns, same checks
read_frame = _read
numeric_column = _numeric
indexed_columns = _indexed
column_block = _block
