"""Plain multi-frame XYZ geometries + a time step + a table of states -> an Ensemble.

Many programs write only geometries (``El x y z`` lines; the comment lines are
ignored here) and keep the electronic state data elsewhere. :func:`load_plain_xyz`
takes

* one multi-frame XYZ file per trajectory (a folder of ``*.xyz[.gz]`` named like
  ``traj_<id>.xyz``, or one file), where frame ``k`` is step ``k * stride``;
* the time step (time = step * time_step);
* a state table (CSV/Parquet file or DataFrame) with one row per step:
  ``traj``, ``step``, ``active`` (0-based unless ``state_base=1``) and the
  neutral energies ``e_<i>``, plus optionally ``time`` (checked against
  step * time_step) and any column that :func:`ensemblelab.join_snapshot_table`
  accepts (``cation_e_<k>``, ``dyson_*``, ``amp_<i>``, ``e_kin``, user columns).

Every frame needs its state row (active state and energies are not optional);
state rows without a frame raise unless ``unmatched="ignore"``.
"""

from __future__ import annotations

import re
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any, Literal

import numpy as np
import pandas as pd

from .. import units
from ..data.ensemble import Ensemble
from ..errors import ParseError
from ._common import check_nonfinite_option, file_source, report_nonfinite, resolve_unit
from ._extxyz_comment import TRAJ_ID_RE, where_in_file
from ._xyz_fields import file_stem, find_trajectory_files, read_text, split_frames
from ._xyz_props import masses_of_file, read_atoms, velocities_from
from .join import integer_column, join_snapshot_table, read_source
from .table import column_block, indexed_columns, numeric_column

__all__ = ["load_plain_xyz"]


def load_plain_xyz(
    path: str | Path,
    states: str | Path | pd.DataFrame,
    *,
    time_step: float,
    stride: int = 1,
    traj: int | None = None,
    time_unit: str | None = None,
    energy_unit: str | None = None,
    length_unit: str | None = None,
    state_base: int = 0,
    masses: Mapping[str, float] | Sequence[float] | np.ndarray | None = None,
    skip_atom_columns: Sequence[str] = (),
    nonfinite: str = "raise",
    unmatched: Literal["raise", "ignore"] = "raise",
    progress: bool = True,
) -> Ensemble:
    """Load geometry-only multi-frame XYZ files with a time step and a table of states.

    Parameters
    ----------
    path : str or Path
        A multi-frame XYZ file (one trajectory) or a folder of them, one per
        trajectory, the id being the number at the end of the name.
    states : str, Path or pandas.DataFrame
        The state table (see :mod:`ensemblelab.io.plain`).
    time_step : float
        Time between consecutive steps, in `time_unit` (default fs).
    stride : int
        Steps between consecutive frames: frame k is step ``k * stride``.
    traj : int, optional
        Trajectory id of a single file (default: the only id of the table, else
        the number at the end of the file name, else 0).
    time_unit, energy_unit, length_unit : str, optional
        Units of the time step and table times, the energies, the coordinates
        (default fs, eV, Angstrom).
    state_base : {0, 1}
        How ``active`` counts states.
    masses : mapping or array_like, optional
        Atomic masses (amu) for unusual elements or isotopes.
    skip_atom_columns : sequence of str
        With ``Properties=`` in the files (e.g. written by ASE): atom columns to
        skip, such as ``["forces"]``; momenta become velocities as in
        :func:`ensemblelab.io.load_extxyz`.
    nonfinite : {"raise", "keep"}
        NaN/Inf in coordinates or energies: raise, or keep with a warning.
    unmatched : {"raise", "ignore"}
        A state row for a step without a frame: raise, or drop it.
    progress : bool
        Show a progress bar over files.

    Returns
    -------
    Ensemble
        Internal units; ``metadata["sources"]`` lists the files.

    Raises
    ------
    ParseError
        Naming the file, frame or line, the field and a hint.
    """
    from tqdm.auto import tqdm

    check_nonfinite_option(nonfinite)
    if not (np.isfinite(time_step) and time_step > 0):
        raise ValueError(f"The 'time_step' parameter must be a positive time; got {time_step!r}.")
    if int(stride) != stride or stride < 1:
        raise ValueError(f"The 'stride' parameter must be a positive integer; got {stride!r}.")
    if state_base not in (0, 1):
        raise ValueError(f"The 'state_base' parameter must be 0 or 1; got {state_base!r}.")
    table, tpath, csv = read_source(states)
    where: Any = tpath if tpath is not None else "states table"
    table.columns = [str(c) for c in table.columns]
    e_cols = indexed_columns(list(table.columns), r"e_(\d+)")
    missing = [c for c in ("traj", "step", "active") if c not in table.columns]
    if missing or not e_cols:
        need = missing + ([] if e_cols else ["e_0, e_1, ..."])
        raise ParseError(f"missing required column(s) {need}; found {list(table.columns)[:12]}.",
                         path=where, line=1 if csv else None, field=need[0],
                         hint="the state table needs traj, step, active and e_<i> columns.")
    t_fac = units.time_factor(resolve_unit("time", None, time_unit, path=where))
    e_fac = units.energy_factor(resolve_unit("energy", None, energy_unit, path=where))
    l_fac = units.length_factor(resolve_unit("length", None, length_unit, path=where))

    path = Path(path)
    if path.is_dir():
        files = find_trajectory_files(path)
        if not files:
            raise ParseError("no *.xyz or *.xyz.gz files in this folder.", path=path,
                             hint="one multi-frame XYZ file per trajectory is expected.")
    elif path.is_file():
        ids = pd.unique(table["traj"])
        m = TRAJ_ID_RE.search(file_stem(path))
        tid = traj if traj is not None else (int(ids[0]) if len(ids) == 1 else
                                              int(m.group(1)) if m else 0)
        files = [(tid, path)]
    else:
        raise FileNotFoundError(f"{path}: no such file or folder.")

    symbols: list[str] | None = None
    geoms, vels, trajs, steps, sources = [], [], [], [], []
    frame_of: list[tuple[Path, int, int]] = []  # (file, frame, n_atoms) of every snapshot
    for tid, fpath in tqdm(files, desc="loading", unit="file", disable=not progress,
                           leave=False):
        n_atoms, n_frames, lines = split_frames(read_text(fpath), fpath)
        sym, g, v, cols = read_atoms(lines, n_atoms, n_frames, fpath, skip=skip_atom_columns)
        if symbols is None:
            symbols = sym
        elif sym != symbols:
            raise ParseError(f"the atoms differ from {files[0][1].name}.", path=fpath, frame=0,
                             line=3, field="element",
                             hint="all trajectories hold the same atoms in the same order.")
        report_nonfinite(g, name="coordinates", nonfinite=nonfinite, path=fpath, stacklevel=4,
                         frame_of_row=lambda r, n=n_atoms: (r, where_in_file(n, r, 2)))
        geoms.append(g * l_fac)
        mass = masses_of_file(symbols, masses, None if cols is None else cols.masses, None,
                              fpath)
        vels.append(velocities_from(None if v is None else v * (l_fac / t_fac), cols, mass,
                                    fpath))
        trajs.append(np.full(n_frames, tid, dtype=np.int64))
        steps.append(np.arange(n_frames, dtype=np.int64) * int(stride))
        frame_of += [(fpath, k, n_atoms) for k in range(n_frames)]
        sources.append(file_source(fpath, fmt="xyz", traj=int(tid), n_frames=n_frames))
    assert symbols is not None
    if any(v is None for v in vels) and not all(v is None for v in vels):
        raise ParseError("velocities (7-column atom lines) are present in some files only.",
                         path=path, field="velocities", hint="give them for all or none.")
    traj_a, step_a = np.concatenate(trajs), np.concatenate(steps)

    s_traj = integer_column(table, "traj", where, csv)
    s_step = integer_column(table, "step", where, csv)
    index = pd.MultiIndex.from_arrays([s_traj, s_step])
    if not index.is_unique:
        r = int(np.flatnonzero(index.duplicated())[0])
        raise ParseError(f"trajectory {s_traj[r]} step {s_step[r]} appears twice.", path=where,
                         line=r + 2 if csv else None, field="step", hint="one row per step.")
    row_of = np.asarray(index.get_indexer(pd.MultiIndex.from_arrays([traj_a, step_a])))
    if (row_of < 0).any():
        k = int(np.flatnonzero(row_of < 0)[0])
        fpath, f, n_atoms = frame_of[k]
        raise ParseError(
            f"no state row for trajectory {traj_a[k]} step {step_a[k]} (frame {f} x stride "
            f"{stride}).", path=fpath, frame=f, line=where_in_file(n_atoms, f, 0), field="step",
            hint=f"the state table ({where}) needs traj, step, active and energies for every "
                 "frame; check stride= and the trajectory ids.")
    unused = np.setdiff1d(np.arange(len(table)), row_of)
    if unused.size and unmatched == "raise":
        r = int(unused[0])
        raise ParseError(
            f"{unused.size} state row(s) have no geometry frame; the first is trajectory "
            f"{s_traj[r]} step {s_step[r]}.", path=where, line=r + 2 if csv else None,
            field="step", hint="check stride= and the files, or pass unmatched='ignore'.")
    rows = table.iloc[row_of].reset_index(drop=True)
    time = step_a * float(time_step) * t_fac
    if "time" in rows.columns:
        given = numeric_column(rows, "time", where, csv=False) * t_fac
        off = np.abs(given - time) > 0.01 * float(time_step) * t_fac  # 1% of a step (ours)
        if off.any():
            k = int(np.flatnonzero(off)[0])
            raise ParseError(
                f"the time column says {given[k]:g} fs at step {step_a[k]} of trajectory "
                f"{traj_a[k]}, but step x time_step is {time[k]:g} fs.", path=where,
                line=int(row_of[k]) + 2 if csv else None, field="time",
                hint="check time_step=, time_unit= and stride=.")
    energies = column_block(rows, e_cols, (len(e_cols),), where, False, "e_*")
    report_nonfinite(energies, name="e_*", nonfinite=nonfinite, path=where, stacklevel=4,
                     frame_of_row=lambda r: (None, int(row_of[r]) + 2 if csv else None))
    active = integer_column(rows, "active", where, False) - state_base
    bad = (active < 0) | (active >= len(e_cols))
    if bad.any():
        k = int(np.flatnonzero(bad)[0])
        raise ParseError(f"active state out of range: expected {state_base}.."
                         f"{len(e_cols) - 1 + state_base}, found {active[k] + state_base}.",
                         path=where, line=int(row_of[k]) + 2 if csv else None, field="active",
                         hint="pass state_base=1 if the table counts states from 1.")
    ens = Ensemble.from_arrays(
        traj=traj_a, time=time, step=step_a, active=active, geometries=np.concatenate(geoms),
        symbols=symbols, energies=energies * e_fac,
        masses=mass,
        velocities=None if vels[0] is None else np.concatenate(
            [v for v in vels if v is not None]),
        metadata={"sources": [*sources, *([file_source(tpath, fmt="table")] if tpath else [])],
                  "time_step_fs": float(time_step) * t_fac, "stride": int(stride)},
        copy=False)
    rest = [c for c in table.columns if c not in ("active", "time")
            and not re.fullmatch(r"e_\d+", c)]
    if len(rest) > 2:  # more than the keys: join the other data by (traj, step)
        ens = join_snapshot_table(ens, table[rest], on="step", energy_unit=energy_unit,
                                  unmatched="ignore")
        meta = dict(ens.metadata)
        meta["joins"][-1]["source"] = str(where)
        ens = ens.replace(metadata=meta)
    return ens
