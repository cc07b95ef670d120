r"""The open extended-XYZ folder layout: one file per trajectory.

Layout
------
::

    my_ensemble/
        traj_0.xyz, traj_1.xyz.gz, ...   one trajectory per file (``.xyz``/``.xyz.gz``)
        trajectories.csv      optional: one row per trajectory
        metadata.json         optional: free-form metadata (written by write_extxyz)

The trajectory id is the integer at the end of the file name (``traj_12.xyz``
-> 12); when some names carry no number, the files are numbered 0, 1, ... in
sorted name order. Each file is a sequence of standard XYZ frames::

    3
    time=0.0 active=2 energies="0.0 3.1 4.0" cation_energies="7.5" e_kin=0.21
    O   0.000000  0.000000  0.117300
    H   0.000000  0.757200 -0.469200
    H   0.000000 -0.757200 -0.469200

An atom line is ``El x y z`` or ``El x y z vx vy vz`` (velocities), unless the
comment line declares its columns with the common ``Properties=`` convention
(``species``, ``pos``, ``vel``/``velocities``, ``momenta``, ``masses``; see
:mod:`ensemblelab.io._xyz_props`, which also covers ``Lattice=`` and ``pbc=``). The
comment line holds ``key=value`` pairs; a value with several numbers is
quoted and space separated. Frames must be in increasing time.

Per-frame keys (names of our own)
---------------------------------

===================  ==============================================  ==========================
key                  meaning                                         values / unit
===================  ==============================================  ==========================
``time``             time (required)                                 1, ``time_unit``
``active``           active neutral state (required), 0-based        1 int
                     unless ``state_base=1``
``energies``         neutral adiabatic energies (required)           n_states, ``energy_unit``
``cation_energies``  cation state energies, same zero as energies    n_cation, ``energy_unit``
``dyson``            squared Dyson norms of the active state, or     n_cation, or
                     of every state (see ``dyson_shape``)            n_states*n_cation
``amplitudes``       electronic populations abs(c_i)^2               n_states
``adt``              adiabatic-to-diabatic matrix U, row-major       n_states*n_states
``adt_cation``       cation ADT matrix, row-major                    n_cation*n_cation
``overlaps``         state overlaps with the previous step, by row   n_states*n_states
``step``             step index (default 0, 1, ...)                  1 int
``snapshot``         stable snapshot id (written after a selection)  1 int
``e_kin, e_pot,``    kinetic, potential and total energy             1, ``energy_unit``
``e_tot``
any other key        a user column of the snapshot table             1 (int, float, bool, text)
===================  ==============================================  ==========================

Optional ``transition_strengths``: oscillator strengths f_ij between neutral states,
n_states*n_states, row-major, symmetric, dimensionless (for transient absorption).

File header keys (read from the first frame of a file; may be repeated)
-----------------------------------------------------------------------

===================  ===================================================================
key                  meaning
===================  ===================================================================
``energy_unit``      unit of all energies: eV (default), hartree, kcal/mol, kJ/mol, cm-1
``time_unit``        fs (default), ps, au, as
``length_unit``      Angstrom (default), bohr, nm, pm; velocities are length_unit/time_unit
``state_labels``     quoted names of the neutral states, e.g. ``"S0 S1 S2"``
``cation_labels``    quoted names of the cation states
``dyson_shape``      ``"n_states n_cation"`` when ``dyson`` holds every state
``masses``           quoted atomic masses in amu (default: standard atomic weights)
``state_base``       0 (default) or 1: how ``active`` counts states
===================  ===================================================================

``trajectories.csv`` columns: ``traj`` (required), ``weight``, ``initial_state``
(counted like ``active``), ``exc_<i>`` excitation energies E_i - E_0 at t = 0
(in the ``energy_unit`` passed to :func:`load_extxyz`, default eV), ``f_<i>``
oscillator strengths, ``tdm_<i>_<x|y|z>`` transition dipoles (e*bohr), and any
user columns. ``metadata.json`` holds the Ensemble metadata, encoded as in the
native store (see :mod:`ensemblelab.io.store`); its ``sources`` are kept as the
history and the files read now are appended.
Keys the analyses read: ``sampling`` (``"doorway-selected"``, ``"weighted"`` or
``"uniform"``: how the initial conditions relate to the pump) and ``absorbing_state``
(the neutral state trajectories were stopped in; default 0, ``null`` for none); see
:mod:`ensemblelab.compute.spectroscopy.sampling`.

A user column whose values all look like integers is read as int64, numbers as
float64, ``True``/``False`` as bool, anything else as text (quote text with
spaces). The reader parses a whole file at a time with pandas' C tokenizer (no
per-atom Python loop), checks every frame, and converts units at the boundary
with :mod:`ensemblelab.units` (CODATA via scipy.constants).
"""

from __future__ import annotations

import json
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, cast

import numpy as np
import pandas as pd

from .. import units
from ..data.ensemble import Ensemble
from ..errors import EnsembleWarning, ParseError, SchemaError, UnitWarning
from ._common import (
    check_nonfinite_option,
    decode_metadata,
    file_source,
    parse_floats,
    report_nonfinite,
    resolve_unit,
)

__all__ = ["load_extxyz", "write_extxyz", "find_trajectory_files", "ARRAY_KEYS", "HEADER_KEYS"]

from ._extxyz_comment import (  # noqa: E402,F401  (the key vocabulary lives with the parser)
    ARRAY_KEYS,
    HEADER_KEYS,
    PAIR_RE,
    RESERVED,
    SCALAR_ENERGY_KEYS,
    SUFFIXES,
    TRAJ_ID_RE,
    check_comment_lengths,
    check_values,
    parse_comments,
    where_in_file,
)
from ._safety import MAX_MANIFEST_BYTES, check_no_symlink_escape, excerpt  # noqa: E402
from ._xyz_fields import (  # noqa: E402,F401
    NOT_INT_RE,
    Stack,
    all_numbers,
    atom_block,
    check_same,
    file_stem,
    find_trajectory_files,
    looks_like_hartree,
    parse_integers,
    parse_numbers,
    read_text,
    read_trajectories_csv,
    split_frames,
    user_column,
)
from ._xyz_props import atom_columns, masses_of_file, read_cell, velocities_from  # noqa: E402
from ._xyz_write import write_extxyz, write_trajectories_csv  # noqa: E402,F401


# ---------------------------------------------------------------------------------- parsing
@dataclass
class _FileData:
    path: Path
    n_frames: int
    symbols: list[str]
    geometries: np.ndarray
    velocities: np.ndarray | None
    time: np.ndarray
    active: np.ndarray
    step: np.ndarray | None
    snapshot: np.ndarray | None
    arrays: dict[str, np.ndarray]
    columns: dict[str, Any]
    header: dict[str, str]
    energy_unit: str
    suspicious: str | None = None
    masses: np.ndarray | None = None
    extra: dict[str, Any] = field(default_factory=dict)


def _parse_header_int(value: str, *, path: Path, key: str) -> int:
    try:
        return int(value)
    except ValueError:
        raise ParseError(f"expected an integer, found {value!r}.", path=path, frame=0, line=2,
                         field=key, hint="see the header keys in ensemblelab.io.xyz.") from None


def parse_file(path: Path, *, energy_unit: str | None, time_unit: str | None,
               length_unit: str | None, state_base: int | None, nonfinite: str,
               masses: Any = None, skip_atom_columns: Sequence[str] = ()) -> _FileData:
    text = read_text(path)
    n_atoms, n_frames, lines = split_frames(text, path)
    del text
    size = n_atoms + 2
    comments = lines[1::size][:n_frames]
    check_comment_lengths(comments, n_atoms, path)
    header, keys, values = parse_comments(comments, n_atoms, path)
    cols = None
    if "Properties" in header:  # the column layout is declared: follow it
        cols = atom_columns(lines, n_atoms, n_frames, path, header["Properties"], comments,
                            skip=skip_atom_columns)
        symbols, geoms, vel = cols.symbols, cols.positions, cols.velocities
    else:
        symbols, geoms, vel = atom_block(lines, n_atoms, n_frames, path)
    del lines
    mass = masses_of_file(symbols, masses, None if cols is None else cols.masses,
                          header.get("masses"), path)
    check_values(keys, values, n_atoms, path)
    pre = all_numbers(values, keys)

    e_unit = resolve_unit("energy", header.get("energy_unit"), energy_unit, path=path)
    t_unit = resolve_unit("time", header.get("time_unit"), time_unit, path=path)
    l_unit = resolve_unit("length", header.get("length_unit"), length_unit, path=path)
    e_fac, t_fac, l_fac = (units.energy_factor(e_unit), units.time_factor(t_unit),
                           units.length_factor(l_unit))
    lattice = read_cell(header, path, l_fac)  # refuses periodic cells
    base = state_base if state_base is not None else (
        _parse_header_int(header["state_base"], path=path, key="state_base")
        if "state_base" in header else 0)
    if base not in (0, 1):
        raise ParseError(f"state_base must be 0 or 1, found {base}.", path=path, field="state_base",
                         hint="0 when the ground state is 0, 1 when it is 1.")

    def frame_line(row: int) -> tuple[int, int]:
        return row, where_in_file(n_atoms, row, 1)

    time = parse_numbers(values["time"], "time", n_atoms, path, pre)
    if time.shape[1] != 1:
        raise ParseError(f"expected one number, found {values['time'][0]!r}.", path=path,
                         frame=0, line=2, field="time", hint="write time=<number>.")
    time = time[:, 0]
    if not np.all(np.isfinite(time)):
        f = int(np.flatnonzero(~np.isfinite(time))[0])
        raise ParseError(f"expected a finite time, found {time[f]}.", path=path, frame=f,
                         line=where_in_file(n_atoms, f, 1), field="time",
                         hint="every frame needs a finite time stamp.")
    dt = np.diff(time)
    if np.any(dt <= 0):
        f = int(np.flatnonzero(dt <= 0)[0]) + 1
        kind = "duplicated" if dt[f - 1] == 0 else "decreasing"
        raise ParseError(
            f"{kind} time: expected a time greater than {time[f - 1]:g} (frame {f - 1}), "
            f"found {time[f]:g}.", path=path, frame=f,
            line=where_in_file(n_atoms, f, 1), field="time",
            hint="times must increase strictly within a trajectory; remove repeated frames "
                 "or stitch restarted segments first.",
        )
    time = time * t_fac

    arrays: dict[str, np.ndarray] = {}
    for key in ARRAY_KEYS:
        if key in values:
            arrays[key] = parse_numbers(values[key], key, n_atoms, path, pre)
    energies = arrays.pop("energies")
    n_states = energies.shape[1]
    active = parse_integers(values["active"], "active", n_atoms, path, pre) - base
    bad = (active < 0) | (active >= n_states)
    if bad.any():
        f = int(np.flatnonzero(bad)[0])
        raise ParseError(
            f"active state out of range: expected {base}..{n_states - 1 + base} "
            f"({n_states} states, counted from {base}), found {active[f] + base}.",
            path=path, frame=f, line=where_in_file(n_atoms, f, 1), field="active",
            hint="if the file counts states from 1, pass state_base=1 (or write state_base=1 "
                 "in the first comment line); otherwise check the number of energies.",
        )
    cation = arrays.get("cation_energies")
    suspicious = None
    if units.energy_factor(e_unit) == 1.0:
        suspicious = looks_like_hartree(energies, cation)
    n_cat = None if cation is None else cation.shape[1]

    out_arrays: dict[str, np.ndarray] = {}
    expected = {"amplitudes": (n_states,), "adt": (n_states, n_states),
                "overlaps": (n_states, n_states),
                "transition_strengths": (n_states, n_states)}
    if n_cat is not None:
        expected["adt_cation"] = (n_cat, n_cat)
        expected["cation_energies"] = (n_cat,)
    for key, arr in arrays.items():
        if key == "dyson":
            continue
        if key not in expected:
            raise ParseError(f"{key} needs cation_energies in the same frames.", path=path,
                             frame=0, line=2, field=key,
                             hint="add cation_energies=\"...\" or drop the key.")
        want = expected[key]
        if arr.shape[1] != int(np.prod(want)):
            raise ParseError(
                f"inconsistent shape: expected {int(np.prod(want))} values "
                f"({' x '.join(map(str, want))}), found {arr.shape[1]}.",
                path=path, frame=0, line=2, field=key,
                hint="matrices are written flattened row-major; check the number of states.",
            )
        out_arrays[key] = arr.reshape((n_frames, *want))
    if "dyson" in arrays:
        dy = arrays["dyson"]
        if n_cat is None:
            raise ParseError("dyson needs cation_energies in the same frames.", path=path,
                             frame=0, line=2, field="dyson",
                             hint="add cation_energies=\"...\" (Dyson norms belong to cation "
                                  "states).")
        if "dyson_shape" in header:
            shp = parse_floats(header["dyson_shape"])
            if shp is None or shp.size != 2 or tuple(shp) != (n_states, n_cat):
                raise ParseError(
                    f"expected dyson_shape=\"{n_states} {n_cat}\" (n_states n_cation), found "
                    f"{header['dyson_shape']!r}.", path=path, frame=0, line=2,
                    field="dyson_shape", hint="dyson_shape gives n_states and n_cation.",
                )
            want_d: tuple[int, ...] = (n_states, n_cat)
        else:
            want_d = (n_cat,) if dy.shape[1] == n_cat else (n_states, n_cat)
        if dy.shape[1] != int(np.prod(want_d)):
            raise ParseError(
                f"inconsistent shape: expected {n_cat} values (active state) or "
                f"{n_states * n_cat} (every state, with dyson_shape), found {dy.shape[1]}.",
                path=path, frame=0, line=2, field="dyson",
                hint="one squared norm per cation state, or n_states x n_cation flattened.",
            )
        out_arrays["dyson"] = dy.reshape((n_frames, *want_d))

    bad_fields = []
    atom_row = lambda r: (r, where_in_file(n_atoms, r, 2))  # noqa: E731
    per_atom: dict[str, np.ndarray | None] = {
        "coordinates": geoms, "velocities": vel,
        "momenta": None if cols is None else cols.momenta}
    checked: list[tuple[str, np.ndarray | None]] = [("energies", energies),
                                                    *out_arrays.items(), *per_atom.items()]
    for key, block in checked:
        if block is not None and report_nonfinite(
                block, name=key, nonfinite=nonfinite, path=path, stacklevel=5,
                frame_of_row=atom_row if key in per_atom else frame_line):
            name = {"coordinates": "geometries", "momenta": "velocities"}.get(key, key)
            bad_fields += [name] if name not in bad_fields else []

    if e_fac != 1.0:
        energies *= e_fac
        for key in ("cation_energies",):
            if key in out_arrays:
                out_arrays[key] = out_arrays[key] * e_fac
    if l_fac != 1.0:
        geoms = geoms * l_fac
    if vel is not None and (l_fac != 1.0 or t_fac != 1.0):
        vel = vel * (l_fac / t_fac)
    vel = velocities_from(vel, cols, mass, path)
    out_arrays["energies"] = energies

    columns: dict[str, Any] = {}
    step = snapshot = None
    for key in keys:
        if key == "step":
            step = parse_integers(values[key], key, n_atoms, path, pre)
        elif key == "snapshot":
            snapshot = parse_integers(values[key], key, n_atoms, path, pre)
        elif key in RESERVED:
            continue
        elif key in SCALAR_ENERGY_KEYS:
            col = parse_numbers(values[key], key, n_atoms, path, pre)
            if col.shape[1] != 1:
                raise ParseError(f"expected one number, found {values[key][0]!r}.", path=path,
                                 frame=0, line=2, field=key, hint=f"write {key}=<number>.")
            columns[key] = col[:, 0] * e_fac
            if report_nonfinite(col, name=key, nonfinite=nonfinite, path=path,
                                frame_of_row=frame_line, stacklevel=5):
                bad_fields.append(key)
        else:
            columns[key] = user_column(values[key], key, pre)
    return _FileData(path=path, n_frames=n_frames, symbols=symbols, geometries=geoms,
                     velocities=vel, time=time, active=active, step=step, snapshot=snapshot,
                     arrays=out_arrays, columns=columns, header=header, energy_unit=e_unit,
                     suspicious=suspicious, masses=mass,
                     extra={"nonfinite": bad_fields,
                            "lattice": lattice,
                            "skipped": [] if cols is None else cols.skipped})


def load_extxyz(
    path: str | Path,
    *,
    energy_unit: str | None = None,
    time_unit: str | None = None,
    length_unit: str | None = None,
    state_base: int | None = None,
    nonfinite: str = "raise",
    progress: bool = True,
    masses: Mapping[str, float] | Sequence[float] | np.ndarray | None = None,
    skip_atom_columns: Sequence[str] = (),
) -> Ensemble:
    """Load an extended-XYZ folder (one file per trajectory) or a single trajectory file.

    Parameters
    ----------
    path : str or Path
        A folder of ``*.xyz`` / ``*.xyz.gz`` files (plus optional
        ``trajectories.csv`` and ``metadata.json``), or one such file.
    energy_unit, time_unit, length_unit : str, optional
        Units of files that do not declare them in their header (default eV,
        fs, Angstrom). A file that declares a different unit is an error.
    state_base : {0, 1}, optional
        How ``active`` (and ``initial_state``) count states; default 0, or the
        file's ``state_base`` header key.
    nonfinite : {"raise", "keep"}
        What to do with NaN/Inf in coordinates, velocities, energies, the other
        per-frame arrays and ``e_kin``/``e_pot``/``e_tot`` (user columns are not
        checked: NaN there means "missing"): raise a ParseError at the first one,
        or keep them with an EnsembleWarning naming where. Kept ones are listed in
        ``metadata["nonfinite"]`` ({traj: [fields]}); see also
        :func:`ensemblelab.nonfinite_report`.
    progress : bool
        Show a progress bar over files.
    masses : mapping or array_like, optional
        Atomic masses (amu): a mapping element -> amu (other elements from the
        standard table) or one mass per atom. Overrides masses in the files.
    skip_atom_columns : sequence of str
        ``Properties=`` atom columns to skip (e.g. ``["forces"]``); any other
        column the Ensemble cannot hold is refused (see :mod:`ensemblelab.io._xyz_props`).

    Returns
    -------
    Ensemble
        In internal units (fs, eV, Angstrom); ``metadata["sources"]`` lists the files.

    Raises
    ------
    ParseError
        Naming file, frame, line and field, with a hint.

    Warns
    -----
    UnitWarning
        When energies declared (or assumed) in eV look like hartree.
    """
    from tqdm.auto import tqdm

    check_nonfinite_option(nonfinite)
    path = Path(path)
    if not path.exists():
        raise FileNotFoundError(f"{path}: no such file or folder.")
    if path.is_dir():
        files = find_trajectory_files(path)
        if not files:
            raise ParseError("no *.xyz or *.xyz.gz files in this folder.", path=path,
                             hint="one extended-XYZ file per trajectory is expected.")
        folder = path
    else:
        m = TRAJ_ID_RE.search(file_stem(path))
        files = [(int(m.group(1)) if m else 0, path)]
        folder = None
    sizes = [p.stat().st_size for _, p in files]
    kw: dict[str, Any] = {"energy_unit": energy_unit, "time_unit": time_unit,
                          "length_unit": length_unit, "state_base": state_base,
                          "nonfinite": nonfinite, "masses": masses,
                          "skip_atom_columns": tuple(skip_atom_columns)}

    first: _FileData | None = None
    stacks: dict[str, Stack] = {}
    lists: dict[str, list[Any]] = {}
    traj_ids: list[np.ndarray] = []
    steps: list[np.ndarray] = []
    snaps: list[np.ndarray] | None = []
    sources = []
    suspicious: list[tuple[Path, str]] = []
    column_order: list[str] = []
    bad: dict[int, list[str]] = {}
    kept: list[warnings.WarningMessage] = []
    for tid, fpath in tqdm(files, desc="loading", unit="file", disable=not progress,
                           leave=False):
        with warnings.catch_warnings(record=True) as caught:  # one summary for all files
            warnings.simplefilter("always", EnsembleWarning)
            data = parse_file(fpath, **kw)
        kept += [w for w in caught if issubclass(w.category, EnsembleWarning)]
        for w in caught:
            if not issubclass(w.category, EnsembleWarning):
                warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
        if first is None:
            first = data
            est = data.n_frames * sum(sizes) / max(sizes[0], 1) * 1.02 + 16
        else:
            check_same(first, data)
            if not np.array_equal(first.masses, data.masses):  # type: ignore[arg-type]
                raise ParseError(f"the masses differ from {first.path.name}.", path=fpath,
                                 frame=0, field="masses", hint="all files hold the same atoms.")
        if data.extra["nonfinite"]:
            bad[int(tid)] = data.extra["nonfinite"]
        blocks = {"geometries": data.geometries, "time": data.time, "active": data.active,
                  **data.arrays}
        if data.velocities is not None:
            blocks["velocities"] = data.velocities
        for name, arr in blocks.items():
            stacks.setdefault(name, Stack(est)).add(arr)
        offset = sum(len(t) for t in traj_ids)
        for name, col in data.columns.items():
            if name not in lists:
                column_order.append(name)
                lists[name] = [np.full(offset, np.nan)] if offset else []
            lists[name].append(col)
        for name in lists:
            if name not in data.columns:
                lists[name].append(np.full(data.n_frames, np.nan))
        traj_ids.append(np.full(data.n_frames, tid, dtype=np.int64))
        steps.append(data.step if data.step is not None else
                     np.arange(data.n_frames, dtype=np.int64))
        snaps = None if snaps is None or data.snapshot is None else [*snaps, data.snapshot]
        sources.append(file_source(fpath, fmt="extxyz", traj=int(tid), n_frames=data.n_frames,
                                   energy_unit=data.energy_unit))
        if data.suspicious:
            suspicious.append((fpath, data.suspicious))
        del data
    assert first is not None
    if kept:
        listed = "; ".join(f"traj {t}: {', '.join(f)}" for t, f in list(bad.items())[:8])
        warnings.warn(f"{kept[0].message} Non-finite values in {len(bad)} of {len(files)} "
                      f"trajectories ({listed}{'; ...' if len(bad) > 8 else ''}); see "
                      "metadata['nonfinite'].", EnsembleWarning, stacklevel=3)
    if suspicious:
        p, why = suspicious[0]
        warnings.warn(
            f"{p}: energies look like hartree although eV was declared or assumed: {why} "
            f"({len(suspicious)} of {len(files)} file(s) look like this). Hint: pass "
            "energy_unit='hartree' or write energy_unit=hartree in the first comment line; "
            "silence with warnings.simplefilter('ignore', UnitWarning) if the states really "
            "are this close.",
            UnitWarning, stacklevel=3,
        )
    # every stack received at least one array, so none of the results is None
    out = {name: cast(np.ndarray, s.result()) for name, s in stacks.items()}
    header = first.header
    state_labels = header["state_labels"].split() if "state_labels" in header else None
    cation_labels = header["cation_labels"].split() if "cation_labels" in header else None

    metadata: dict[str, Any] = {}
    trajectories = None
    traj_arrays: dict[str, np.ndarray] = {}
    ids_all = np.array([t for t, _ in files], dtype=np.int64)
    if folder is not None:
        meta_path = folder / "metadata.json"
        if meta_path.is_file():
            check_no_symlink_escape(folder, meta_path, what="metadata file")
            try:
                if meta_path.stat().st_size > MAX_MANIFEST_BYTES:
                    raise ValueError(f"larger than {MAX_MANIFEST_BYTES} bytes")
                metadata = decode_metadata(json.loads(meta_path.read_text()))
                if not isinstance(metadata, dict):
                    raise ValueError(f"a JSON {type(metadata).__name__}, not an object")
            except (ValueError, RecursionError, TypeError) as exc:
                raise ParseError(f"invalid metadata ({excerpt(exc, 80)}).", path=meta_path,
                                 hint="fix or delete metadata.json (it is optional).") from exc
            sources = [*metadata.pop("sources", []), *sources]
        csv_path = folder / "trajectories.csv"
        if csv_path.is_file():
            check_no_symlink_escape(folder, csv_path, what="trajectory table")
            base = state_base if state_base is not None else int(header.get("state_base", 0))
            trajectories, traj_arrays = read_trajectories_csv(
                csv_path, ids_all, energy_unit=energy_unit, state_base=base)
            sources.append(file_source(csv_path, fmt="csv"))
    metadata["sources"] = sources
    metadata.pop("nonfinite", None)  # what this load found, not an earlier record
    extra = {"nonfinite": bad, "lattice": first.extra["lattice"],
             "skipped_atom_columns": first.extra["skipped"]}
    metadata.update({k: v for k, v in extra.items() if v is not None and len(v)})

    # Files come in trajectory order and times increase within each (checked above), so the
    # snapshot frame is built here directly, already sorted, and handed to the constructor
    # without the copies of Ensemble.from_arrays (bounded peak memory).
    n = sum(len(t) for t in traj_ids)
    data_cols: dict[str, Any] = {
        "snapshot": np.concatenate(snaps) if snaps else np.arange(n, dtype=np.int64),
        "traj": np.concatenate(traj_ids),
        "step": np.concatenate(steps),
        "time": out.pop("time"),
        "active": out.pop("active"),
    }
    del traj_ids, steps, snaps
    for name in column_order:
        if name in data_cols:
            raise ParseError(f"the key {name!r} is reserved.", path=first.path, field=name,
                             hint="rename the user column.")
        parts = lists.pop(name)
        if any(p.dtype == object for p in parts):
            data_cols[name] = np.concatenate([p.astype(object) for p in parts])
        else:
            data_cols[name] = np.concatenate(parts)
        del parts
    frame = pd.DataFrame(data_cols)
    del data_cols
    for arr in out.values():
        arr.setflags(write=False)  # ours alone: the constructor may keep it without a copy
    if trajectories is None:
        trajectories = pd.DataFrame({"traj": ids_all})
    try:
        return Ensemble(
            snapshots=frame,
            geometries=out.pop("geometries"),
            energies=out.pop("energies"),
            symbols=tuple(first.symbols),
            masses=cast(np.ndarray, first.masses),
            trajectories=trajectories,
            state_labels=tuple(state_labels or ()),
            cation_labels=tuple(cation_labels or ()),
            metadata=metadata,
            **out,
            **traj_arrays,
        )
    except SchemaError as exc:
        raise SchemaError(f"{path}: {exc}") from exc

