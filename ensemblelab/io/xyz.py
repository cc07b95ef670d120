r"""The open extended-XYZ folder layout: one file per trajectory.

Layout
------
::

    my_ensemble/
        traj_0.xyz            one trajectory per file (``*.xyz`` or ``*.xyz.gz``)
        traj_1.xyz.gz
        ...
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

An atom line is ``El x y z`` or ``El x y z vx vy vz`` (velocities). The
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
``overlaps``         state overlaps with the previous step,          n_states*n_states
                     row-major
``step``             step index (default 0, 1, ...)                  1 int
``snapshot``         stable snapshot id (written after a selection)  1 int
``e_kin, e_tot``     kinetic and total energy                        1, ``energy_unit``
any other key        a user column of the snapshot table             1 (int, float, bool, text)
===================  ==============================================  ==========================

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

A user column whose values all look like integers is read as int64, numbers as
float64, ``True``/``False`` as bool, anything else as text (quote text with
spaces). The reader parses a whole file at a time with pandas' C tokenizer (no
per-atom Python loop), checks every frame, and converts units at the boundary
with :mod:`ensemblelab.units` (CODATA via scipy.constants).
"""

from __future__ import annotations

import gzip
import io
import json
import re
import warnings
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .. import units
from ..data.elements import masses_for
from ..data.ensemble import Ensemble
from ..errors import ParseError, SchemaError, UnitWarning
from ._common import (
    atomic_folder,
    check_nonfinite_option,
    decode_metadata,
    dumps_json,
    encode_metadata,
    file_source,
    parse_floats,
    report_nonfinite,
    resolve_unit,
)

__all__ = ["load_extxyz", "write_extxyz", "find_trajectory_files", "ARRAY_KEYS", "HEADER_KEYS"]

#: per-frame keys holding a block of numbers -> (Ensemble field, energy-like)
ARRAY_KEYS: dict[str, bool] = {
    "energies": True,
    "cation_energies": True,
    "dyson": False,
    "amplitudes": False,
    "adt": False,
    "adt_cation": False,
    "overlaps": False,
}
#: keys read from the first frame of a file only
HEADER_KEYS = ("energy_unit", "time_unit", "length_unit", "state_labels", "cation_labels",
               "dyson_shape", "masses", "state_base")
#: scalar keys with a meaning of their own
_SCALAR_ENERGY_KEYS = ("e_kin", "e_tot")
_RESERVED = {"time", "active", "step", "snapshot", *ARRAY_KEYS, *HEADER_KEYS}

_PAIR_RE = re.compile(r'([A-Za-z_][\w.\-]*)=(?:"([^"]*)"|(\S*))')
_FIRST_TOKEN_RE = re.compile(r"^[ \t]*(\S+)", re.MULTILINE)
_NOT_INT_RE = re.compile(r"[^0-9+\- \t]")
_TRAJ_ID_RE = re.compile(r"(\d+)$")
_SUFFIXES = (".xyz.gz", ".xyz")


# ---------------------------------------------------------------------------------- files
def _stem(path: Path) -> str:
    name = path.name
    for suf in _SUFFIXES:
        if name.endswith(suf):
            return name[: -len(suf)]
    return path.stem


def find_trajectory_files(folder: Path) -> list[tuple[int, Path]]:
    """Return ``(traj_id, path)`` of every ``*.xyz`` / ``*.xyz.gz`` file in `folder`, by id.

    Parameters
    ----------
    folder : Path
        The ensemble folder.

    Returns
    -------
    list of (int, Path)
        Sorted by trajectory id.
    """
    folder = Path(folder)
    files = sorted(p for p in folder.iterdir()
                   if p.is_file() and p.name.endswith(_SUFFIXES) and not p.name.startswith("."))
    matches = [_TRAJ_ID_RE.search(_stem(p)) for p in files]
    if files and all(matches):
        ids = [int(m.group(1)) for m in matches]  # type: ignore[union-attr]
        seen: dict[int, Path] = {}
        for i, p in zip(ids, files, strict=True):
            if i in seen:
                raise ParseError(
                    f"two files hold trajectory {i}: {seen[i].name} and {p.name}.",
                    path=folder, field="file name",
                    hint="keep one file per trajectory (plain or gzip, not both).",
                )
            seen[i] = p
        return sorted(seen.items())
    return list(enumerate(files))


def _read_text(path: Path) -> str:
    try:
        if path.name.endswith(".gz"):
            with gzip.open(path, "rb") as fh:
                raw = fh.read()
        else:
            raw = path.read_bytes()
    except (OSError, EOFError) as exc:  # gzip.BadGzipFile is an OSError
        raise ParseError(f"cannot read the file ({exc}).", path=path,
                         hint="check that the file is complete; re-copy a truncated .gz.") from exc
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ParseError(f"the file is not UTF-8 text ({exc}).", path=path,
                         hint="extended-XYZ files are plain text; is this a binary file?") from exc
    return text.replace("\r\n", "\n") if "\r" in text else text


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
    extra: dict[str, Any] = field(default_factory=dict)


def _loc(n_atoms: int, frame: int, offset: int = 1) -> int:
    """1-based line number of line `offset` (0 = count, 1 = comment, 2.. atoms) of a frame."""
    return frame * (n_atoms + 2) + offset + 1


def _parse_header_int(value: str, *, path: Path, key: str) -> int:
    try:
        return int(value)
    except ValueError:
        raise ParseError(f"expected an integer, found {value!r}.", path=path, frame=0, line=2,
                         field=key, hint="see the header keys in ensemblelab.io.xyz.") from None


def _split_frames(text: str, path: Path) -> tuple[int, int, list[str]]:
    lines = text.split("\n")
    while lines and not lines[-1].strip():
        lines.pop()
    if not lines:
        raise ParseError("the file is empty; expected XYZ frames (atom count, comment, atoms).",
                         path=path, hint="remove the empty file or re-export the trajectory.")
    first = lines[0].strip()
    try:
        n_atoms = int(first)
        if n_atoms < 1:
            raise ValueError
    except ValueError:
        raise ParseError(
            f"expected the number of atoms (a positive integer) on the first line, found "
            f"{first[:40]!r}.", path=path, line=1, frame=0, field="atom count",
            hint="an XYZ frame starts with the atom count, then a comment line, then atoms.",
        ) from None
    size = n_atoms + 2
    counts = lines[0::size]
    if any(c.strip() != first for c in counts):
        f = next(i for i, c in enumerate(counts) if c.strip() != first)
        found = counts[f].strip()
        try:
            other = int(found)
        except ValueError:
            other = None
        if other is not None:
            raise ParseError(
                f"the number of atoms changes: frame 0 has {n_atoms}, this frame declares "
                f"{other}.", path=path, frame=f, line=f * size + 1, field="atom count",
                hint="every frame of every trajectory must hold the same atoms in the same order.",
            )
        raise ParseError(
            f"expected the atom-count line {n_atoms} here, found {found[:40]!r}: frame {f - 1} "
            f"holds more or fewer atom lines than its atom-count line ({n_atoms}) says.",
            path=path, frame=f, line=f * size + 1, field="atom count",
            hint="fix the atom lines of the previous frame or its atom-count line.",
        )
    n_frames, rest = divmod(len(lines), size)
    if rest:
        raise ParseError(
            f"the file ends inside frame {n_frames}: expected {size} lines ({n_atoms} atoms "
            f"+ 2), found {rest}.", path=path, frame=n_frames, line=n_frames * size + 1,
            field="atom lines",
            hint="the run probably stopped while writing; delete the incomplete last frame.",
        )
    return n_atoms, n_frames, lines


_NAN_TOKENS = ["nan", "NaN", "NAN", "-nan", "+nan", "-NaN", "+NaN"]


def _read_table(text: str, ncol: int, *, symbols: bool = False) -> pd.DataFrame | None:
    """Parse whitespace-separated columns with pandas' C tokenizer; None when anything is odd."""
    dtype: dict[int, Any] = {j: np.float64 for j in range(int(symbols), ncol)}
    if symbols:
        dtype[0] = object
    try:
        return pd.read_csv(io.StringIO(text), sep=r"\s+", header=None, engine="c",
                           names=list(range(ncol)), dtype=dtype, keep_default_na=False,
                           na_values={j: _NAN_TOKENS for j in range(int(symbols), ncol)},
                           skip_blank_lines=False)
    except (ValueError, pd.errors.ParserError, pd.errors.EmptyDataError):
        return None


def _atom_block(lines: list[str], n_atoms: int, n_frames: int, path: Path
                ) -> tuple[list[str], np.ndarray, np.ndarray | None]:
    size = n_atoms + 2
    table = np.array(lines, dtype=object).reshape(n_frames, size)
    atoms = table[:, 2:].ravel()
    ncol = len(atoms[0].split())
    if ncol not in (4, 7):
        raise ParseError(
            f"expected an atom line 'El x y z' (4 columns) or 'El x y z vx vy vz' (7 columns), "
            f"found {ncol} column(s): {atoms[0][:60]!r}.",
            path=path, frame=0, line=3, field="atom line",
            hint="one atom per line: element symbol, then Cartesian coordinates.",
        )
    df = _read_table("\n".join(atoms), ncol, symbols=True)
    numeric = None
    if df is not None and len(df) == atoms.size:
        numeric = df.iloc[:, 1:].to_numpy(np.float64)
        if np.isnan(numeric).any() and parse_floats(
                " ".join(" ".join(a.split()[1:]) for a in atoms), atoms.size * (ncol - 1)) is None:
            numeric = None  # a NaN that is not a literal nan: a missing or odd field
    if numeric is None:
        _locate_atom_error(atoms, n_atoms, ncol, path)
        raise ParseError("could not parse the atom lines.", path=path, field="atom line")
    sym = df.iloc[:, 0].to_numpy(dtype=object).reshape(n_frames, n_atoms)
    ref = [str(x) for x in sym[0]]
    same = sym == sym[0]
    if not same.all():
        f, a = (int(i) for i in np.argwhere(~same)[0])
        raise ParseError(
            f"the elements change: atom {a} is {ref[a]} in frame 0 but {sym[f, a]} here.",
            path=path, frame=f, line=_loc(n_atoms, f, 2 + a), field="element",
            hint="every frame of every trajectory must hold the same atoms in the same order.",
        )
    numeric = numeric.reshape(n_frames, n_atoms, ncol - 1)
    if ncol == 7:
        return ref, numeric[:, :, :3].copy(), numeric[:, :, 3:].copy()
    return ref, numeric, None


def _locate_atom_error(atoms: np.ndarray, n_atoms: int, ncol: int, path: Path) -> None:
    for k, line in enumerate(atoms):
        tokens = line.split()
        f, a = divmod(k, n_atoms)
        where = {"path": path, "frame": f, "line": _loc(n_atoms, f, 2 + a)}
        if len(tokens) != ncol:
            raise ParseError(
                f"expected {ncol} columns like the first atom line, found {len(tokens)}: "
                f"{line[:60]!r}.", field="atom line",
                hint="every atom line needs the element and 3 (or 6 with velocities) numbers.",
                **where,
            )
        for j, tok in enumerate(tokens[1:]):
            try:
                float(tok)
            except ValueError:
                name = ("x", "y", "z", "vx", "vy", "vz")[j]
                raise ParseError(
                    f"expected a number for coordinate {name}, found {tok!r}.",
                    field=f"atom {a} {name}", hint="coordinates must be plain decimal numbers.",
                    **where,
                ) from None


def _fast_values(comments: Sequence[str]) -> list[tuple[str, ...]] | None:
    """Values of frames 1.. when they all share the key sequence of frame 1, else None.

    One anchored regex built from frame 1 is applied to all comment lines at
    once, so a frame with a missing, extra or re-ordered key does not match and
    the caller falls back to the frame-by-frame path (which names the frame).
    """
    if len(comments) < 2:
        return []
    parts = []
    for m in _PAIR_RE.finditer(comments[1]):
        quoted = m.group(2) is not None
        parts.append(re.escape(m.group(1)) + "=" + ('"([^"\n]*)"' if quoted else r'([^\s"]*)'))
    if len(parts) < 2:
        return None
    pattern = re.compile(r"^[ \t]*" + r"[ \t]+".join(parts) + r"[ \t]*$", re.MULTILINE)
    rows = pattern.findall("\n".join(comments[1:]))
    if len(rows) != len(comments) - 1:
        return None
    return rows


def _parse_comments(comments: Sequence[str], n_atoms: int, path: Path
                    ) -> tuple[dict[str, str], list[str], dict[str, list[str]]]:
    """Return (header, per-frame keys in order, key -> values of every frame)."""
    pairs0 = _PAIR_RE.findall(comments[0])
    header = {k: (q or p) for k, q, p in pairs0 if k in HEADER_KEYS}
    keys = [k for k, _, _ in pairs0 if k not in HEADER_KEYS]
    if len(set(keys)) != len(keys):
        dup = next(k for k in keys if keys.count(k) > 1)
        raise ParseError(f"the key {dup!r} appears twice in the comment line.", path=path,
                         frame=0, line=2, field=dup, hint="give each key once per frame.")
    for req in ("time", "active", "energies"):
        if req not in keys:
            raise ParseError(
                f"missing required key {req}=...; found keys {keys}.",
                path=path, frame=0, line=2, field=req,
                hint="every frame's comment line needs time=, active= and energies=\"...\" "
                     "(see the key table in ensemblelab.io.xyz).",
            )
    values: dict[str, list[str]] = {k: [(q or p) for kk, q, p in pairs0 if kk == k][:1]
                                    for k in keys}
    keyset = set(keys)
    rows = _fast_values(comments)
    if rows is not None and len(comments) > 1:
        keys1 = [m.group(1) for m in _PAIR_RE.finditer(comments[1])]
        if set(keys1) - set(HEADER_KEYS) == keyset and len(keys1) == len(set(keys1)):
            columns = list(zip(*rows, strict=True))
            for k, col in zip(keys1, columns, strict=True):
                if k in keyset:
                    values[k].extend(col)
            return header, keys, values
    for f, line in enumerate(comments[1:], start=1):
        d = {k: (q or p) for k, q, p in _PAIR_RE.findall(line) if k not in HEADER_KEYS}
        if d.keys() != keyset:
            missing = sorted(keyset - d.keys())
            extra = sorted(d.keys() - keyset)
            what = f"missing key(s) {missing}" if missing else f"unexpected key(s) {extra}"
            raise ParseError(
                f"{what} compared with frame 0 (keys {keys}).", path=path, frame=f,
                line=_loc(n_atoms, f, 1), field=(missing or extra)[0],
                hint="every frame of a file must carry the same keys.",
            )
        for k in keys:
            values[k].append(d[k])
    return header, keys, values


def _all_numbers(values: dict[str, list[str]], keys: list[str]) -> dict[str, np.ndarray]:
    """Parse every numeric key of every frame with one C-tokenizer call (empty dict on trouble)."""
    keys = [k for k in keys if parse_floats(values[k][0]) is not None and values[k][0].strip()]
    if not keys or len(values[keys[0]]) < 50:
        return {}
    widths = [len(values[k][0].split()) for k in keys]
    text = "\n".join(map(" ".join, zip(*(values[k] for k in keys), strict=True)))
    df = _read_table(text, sum(widths))
    if df is None or len(df) != len(values[keys[0]]):
        return {}
    arr = df.to_numpy(np.float64)
    if np.isnan(arr).any():
        return {}
    out, j = {}, 0
    for k, w in zip(keys, widths, strict=True):
        out[k] = arr[:, j:j + w]
        j += w
    return out


def _numbers(vals: list[str], key: str, n_atoms: int, path: Path,
             pre: dict[str, np.ndarray] | None = None) -> np.ndarray:
    """Parse the values of one key of every frame to a (n_frames, m) float array."""
    if pre and key in pre:
        return pre[key].copy()
    m = len(vals[0].split())
    if m == 0:
        raise ParseError(f"expected at least one number, found {vals[0]!r}.", path=path, frame=0,
                         line=2, field=key, hint='write e.g. energies="0.0 3.1 4.2".')
    if len(vals) * m > 4000:
        df = _read_table("\n".join(vals), m)
        if df is not None and len(df) == len(vals):
            arr = df.to_numpy(np.float64)
            if not np.isnan(arr).any():
                return arr
    arr = parse_floats(" ".join(vals), len(vals) * m)
    if arr is not None:
        return arr.reshape(len(vals), m)
    for f, v in enumerate(vals):
        tokens = v.split()
        where = {"path": path, "frame": f, "line": _loc(n_atoms, f, 1), "field": key}
        if len(tokens) != m:
            raise ParseError(
                f"inconsistent shape: frame 0 has {m} value(s), this frame has {len(tokens)}.",
                hint="the number of states must not change along a trajectory.", **where,
            )
        for tok in tokens:
            try:
                float(tok)
            except ValueError:
                raise ParseError(f"expected a number, found {tok!r}.",
                                 hint="write plain decimal numbers (nan and inf are read as "
                                      "non-finite).", **where) from None
    raise ParseError(f"could not parse the values of {key!r}.", **{"path": path, "field": key})


def _integers(vals: list[str], key: str, n_atoms: int, path: Path,
              pre: dict[str, np.ndarray] | None = None) -> np.ndarray:
    arr = _numbers(vals, key, n_atoms, path, pre)
    if arr.shape[1] != 1:
        raise ParseError(f"expected one integer, found {arr.shape[1]} values {vals[0]!r}.",
                         path=path, frame=0, line=2, field=key, hint=f"write {key}=<integer>.")
    arr = arr[:, 0]
    bad = ~np.isfinite(arr) | (arr != np.round(arr))
    if bad.any():
        f = int(np.flatnonzero(bad)[0])
        raise ParseError(f"expected an integer, found {vals[f]!r}.", path=path, frame=f,
                         line=_loc(n_atoms, f, 1), field=key, hint=f"write {key}=<integer>.")
    return arr.astype(np.int64)


def _user_column(vals: list[str], key: str, pre: dict[str, np.ndarray] | None = None) -> Any:
    joined = " ".join(vals)
    if pre and key in pre and pre[key].shape[1] == 1:
        arr = pre[key][:, 0].copy()
        return arr.astype(np.int64) if not _NOT_INT_RE.search(joined) else arr
    if any(not v or len(v.split()) != 1 for v in vals):
        return np.array(vals, dtype=object)
    arr = parse_floats(joined, len(vals))
    if arr is None:
        if set(vals) <= {"True", "False"}:
            return np.array([v == "True" for v in vals])
        return np.array(vals, dtype=object)
    if not _NOT_INT_RE.search(joined):
        return arr.astype(np.int64)
    return arr


def _looks_like_hartree(energies: np.ndarray, cation: np.ndarray | None) -> str | None:
    """Why energies declared in eV look like hartree, or None.

    Excited-state manifolds probed in photochemistry span at least about 1 eV
    (a UV-visible photon is 1.5-10 eV), and vertical ionisation energies of
    molecules are about 5-15 eV. In hartree the same numbers are 0.05-0.4 and
    0.2-0.55. So with two or more states we flag a median spread of the neutral
    energies (max - min over states, per frame) between 0.02 and 0.75, or a
    median vertical ionisation energy (lowest cation minus lowest neutral)
    between 0.1 and 0.75. Common practice thresholds, not a law.
    """
    if energies.shape[1] >= 2 and energies.size:
        spread = float(np.nanmedian(np.ptp(energies, axis=1)))
        if 0.02 < spread < 0.75:
            return f"the median spread of the neutral state energies is {spread:.3g} eV"
    if cation is not None and cation.size:
        ip = float(np.nanmedian(cation.min(axis=1) - energies.min(axis=1)))
        if 0.1 < ip < 0.75:
            return f"the median vertical ionisation energy is {ip:.3g} eV"
    return None


def _parse_file(path: Path, *, energy_unit: str | None, time_unit: str | None,
                length_unit: str | None, state_base: int | None, nonfinite: str) -> _FileData:
    text = _read_text(path)
    n_atoms, n_frames, lines = _split_frames(text, path)
    del text
    size = n_atoms + 2
    symbols, geoms, vel = _atom_block(lines, n_atoms, n_frames, path)
    comments = lines[1::size][:n_frames]
    del lines
    header, keys, values = _parse_comments(comments, n_atoms, path)
    pre = _all_numbers(values, keys)

    e_unit = resolve_unit("energy", header.get("energy_unit"), energy_unit, path=path)
    t_unit = resolve_unit("time", header.get("time_unit"), time_unit, path=path)
    l_unit = resolve_unit("length", header.get("length_unit"), length_unit, path=path)
    e_fac, t_fac, l_fac = (units.energy_factor(e_unit), units.time_factor(t_unit),
                           units.length_factor(l_unit))
    base = state_base if state_base is not None else (
        _parse_header_int(header["state_base"], path=path, key="state_base")
        if "state_base" in header else 0)
    if base not in (0, 1):
        raise ParseError(f"state_base must be 0 or 1, found {base}.", path=path, field="state_base",
                         hint="0 when the ground state is 0, 1 when it is 1.")

    def frame_line(row: int) -> tuple[int, int]:
        return row, _loc(n_atoms, row, 1)

    time = _numbers(values["time"], "time", n_atoms, path, pre)
    if time.shape[1] != 1:
        raise ParseError(f"expected one number, found {values['time'][0]!r}.", path=path,
                         frame=0, line=2, field="time", hint="write time=<number>.")
    time = time[:, 0]
    if not np.all(np.isfinite(time)):
        f = int(np.flatnonzero(~np.isfinite(time))[0])
        raise ParseError(f"expected a finite time, found {time[f]}.", path=path, frame=f,
                         line=_loc(n_atoms, f, 1), field="time",
                         hint="every frame needs a finite time stamp.")
    dt = np.diff(time)
    if np.any(dt <= 0):
        f = int(np.flatnonzero(dt <= 0)[0]) + 1
        kind = "duplicated" if dt[f - 1] == 0 else "decreasing"
        raise ParseError(
            f"{kind} time: expected a time greater than {time[f - 1]:g} (frame {f - 1}), "
            f"found {time[f]:g}.", path=path, frame=f, line=_loc(n_atoms, f, 1), field="time",
            hint="times must increase strictly within a trajectory; remove repeated frames "
                 "or stitch restarted segments first.",
        )
    time = time * t_fac

    arrays: dict[str, np.ndarray] = {}
    for key in ARRAY_KEYS:
        if key in values:
            arrays[key] = _numbers(values[key], key, n_atoms, path, pre)
    energies = arrays.pop("energies")
    n_states = energies.shape[1]
    active = _integers(values["active"], "active", n_atoms, path, pre) - base
    bad = (active < 0) | (active >= n_states)
    if bad.any():
        f = int(np.flatnonzero(bad)[0])
        raise ParseError(
            f"active state out of range: expected {base}..{n_states - 1 + base} "
            f"({n_states} states, counted from {base}), found {active[f] + base}.",
            path=path, frame=f, line=_loc(n_atoms, f, 1), field="active",
            hint="if the file counts states from 1, pass state_base=1 (or write state_base=1 "
                 "in the first comment line); otherwise check the number of energies.",
        )
    cation = arrays.get("cation_energies")
    suspicious = None
    if units.energy_factor(e_unit) == 1.0:
        suspicious = _looks_like_hartree(energies, cation)
    n_cat = None if cation is None else cation.shape[1]

    out_arrays: dict[str, np.ndarray] = {}
    expected = {"amplitudes": (n_states,), "adt": (n_states, n_states),
                "overlaps": (n_states, n_states)}
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

    report_nonfinite(energies, name="energies", nonfinite=nonfinite, path=path,
                     frame_of_row=frame_line, stacklevel=5)
    for key, arr in out_arrays.items():
        report_nonfinite(arr, name=key, nonfinite=nonfinite, path=path,
                         frame_of_row=frame_line, stacklevel=5)
    report_nonfinite(geoms, name="coordinates", nonfinite=nonfinite, path=path,
                     frame_of_row=lambda r: (r, _loc(n_atoms, r, 2)), stacklevel=5)
    if vel is not None:
        report_nonfinite(vel, name="velocities", nonfinite=nonfinite, path=path,
                         frame_of_row=lambda r: (r, _loc(n_atoms, r, 2)), stacklevel=5)

    if e_fac != 1.0:
        energies *= e_fac
        for key in ("cation_energies",):
            if key in out_arrays:
                out_arrays[key] = out_arrays[key] * e_fac
    if l_fac != 1.0:
        geoms = geoms * l_fac
    if vel is not None and (l_fac != 1.0 or t_fac != 1.0):
        vel = vel * (l_fac / t_fac)
    out_arrays["energies"] = energies

    columns: dict[str, Any] = {}
    step = snapshot = None
    for key in keys:
        if key == "step":
            step = _integers(values[key], key, n_atoms, path, pre)
        elif key == "snapshot":
            snapshot = _integers(values[key], key, n_atoms, path, pre)
        elif key in _RESERVED:
            continue
        elif key in _SCALAR_ENERGY_KEYS:
            col = _numbers(values[key], key, n_atoms, path, pre)
            if col.shape[1] != 1:
                raise ParseError(f"expected one number, found {values[key][0]!r}.", path=path,
                                 frame=0, line=2, field=key, hint=f"write {key}=<number>.")
            columns[key] = col[:, 0] * e_fac
        else:
            columns[key] = _user_column(values[key], key, pre)
    return _FileData(path=path, n_frames=n_frames, symbols=symbols, geometries=geoms,
                     velocities=vel, time=time, active=active, step=step, snapshot=snapshot,
                     arrays=out_arrays, columns=columns, header=header, energy_unit=e_unit,
                     suspicious=suspicious)


# ---------------------------------------------------------------------------------- stacking
class _Stack:
    """Concatenate per-file arrays into one preallocated buffer (bounded peak memory)."""

    def __init__(self, estimate: int) -> None:
        self.estimate = max(int(estimate), 1)
        self.buf: np.ndarray | None = None
        self.n = 0

    def add(self, a: np.ndarray) -> None:
        if self.buf is None:
            self.buf = np.empty((max(self.estimate, len(a)), *a.shape[1:]), dtype=a.dtype)
        elif self.n + len(a) > len(self.buf):
            grown = np.empty((max(self.n + len(a), int(len(self.buf) * 1.5)), *a.shape[1:]),
                             dtype=self.buf.dtype)
            grown[: self.n] = self.buf[: self.n]
            self.buf = grown
        self.buf[self.n:self.n + len(a)] = a
        self.n += len(a)

    def result(self) -> np.ndarray | None:
        if self.buf is None:
            return None
        if self.n < 0.75 * len(self.buf):
            return self.buf[: self.n].copy()
        return self.buf[: self.n]


def _check_same(first: _FileData, other: _FileData) -> None:
    if other.symbols != first.symbols:
        a = next((i for i, (x, y) in enumerate(zip(first.symbols, other.symbols, strict=False))
                  if x != y), min(len(first.symbols), len(other.symbols)))
        raise ParseError(
            f"the atoms differ from {first.path.name}: expected {len(first.symbols)} atoms "
            f"starting {' '.join(first.symbols[:8])}, found {len(other.symbols)} starting "
            f"{' '.join(other.symbols[:8])} (first difference at atom {a}).",
            path=other.path, frame=0, field="element",
            hint="all trajectories of an ensemble must hold the same atoms in the same order.",
        )
    for name in set(first.arrays) | set(other.arrays):
        a, b = first.arrays.get(name), other.arrays.get(name)
        if a is None or b is None:
            where = first.path.name if b is None else other.path.name
            raise ParseError(
                f"{name} is present in {where} but missing here." if b is None else
                f"{name} is present here but missing in {first.path.name}.",
                path=other.path, frame=0, line=2, field=name,
                hint="every trajectory must carry the same per-frame arrays.",
            )
        if a.shape[1:] != b.shape[1:]:
            raise ParseError(
                f"inconsistent shape: {first.path.name} has {name} of shape {a.shape[1:]} per "
                f"frame, this file {b.shape[1:]}.", path=other.path, frame=0, line=2, field=name,
                hint="the number of states must be the same in every trajectory.",
            )
    if (first.velocities is None) != (other.velocities is None):
        raise ParseError(
            "velocities (atom lines with 7 columns) are present in some files only; "
            f"{first.path.name} {'has' if first.velocities is not None else 'has no'} velocities.",
            path=other.path, frame=0, line=3, field="velocities",
            hint="write velocities for every trajectory or for none.",
        )
    for key in ("state_labels", "cation_labels", "masses"):
        if first.header.get(key) != other.header.get(key):
            raise ParseError(
                f"header key {key} differs from {first.path.name}: expected "
                f"{first.header.get(key)!r}, found {other.header.get(key)!r}.",
                path=other.path, frame=0, line=2, field=key,
                hint="labels and masses must agree between trajectories.",
            )


def _read_trajectories_csv(path: Path, ids: np.ndarray, *, energy_unit: str | None,
                           state_base: int) -> tuple[pd.DataFrame, dict[str, np.ndarray]]:
    try:
        table = pd.read_csv(path)
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        raise ParseError(f"cannot parse the CSV table ({exc}).", path=path,
                         hint="a comma-separated table with a header row is expected.") from exc
    if "traj" not in table.columns:
        raise ParseError(f"missing required column 'traj'; found {list(table.columns)}.",
                         path=path, line=1, field="traj",
                         hint="the first row must name the columns, one of them 'traj'.")
    if table["traj"].duplicated().any():
        dup = int(table.loc[table["traj"].duplicated(), "traj"].iloc[0])
        raise ParseError(f"trajectory {dup} appears twice.", path=path, field="traj",
                         hint="one row per trajectory.")
    table = table[table["traj"].isin(ids)].sort_values("traj", kind="stable")
    table = table.reset_index(drop=True)
    arrays: dict[str, np.ndarray] = {}
    e_fac = units.energy_factor(resolve_unit("energy", None, energy_unit, path=path))
    for prefix, name, fac in (("exc", "excitation_energies", e_fac),
                              ("f", "oscillator_strengths", 1.0)):
        cols = sorted((int(m.group(1)), c) for c in table.columns
                      if (m := re.fullmatch(rf"{prefix}_(\d+)", str(c))))
        if cols:
            idx = [i for i, _ in cols]
            if idx != list(range(len(idx))):
                raise ParseError(f"columns {prefix}_<i> must be numbered 0..n_states-1; found "
                                 f"{[c for _, c in cols]}.", path=path, line=1,
                                 field=f"{prefix}_*", hint="include column 0 (it is 0).")
            arrays[name] = table[[c for _, c in cols]].to_numpy(np.float64) * fac
            table = table.drop(columns=[c for _, c in cols])
    tdm = sorted((int(m.group(1)), "xyz".index(m.group(2)), c) for c in table.columns
                 if (m := re.fullmatch(r"tdm_(\d+)_([xyz])", str(c))))
    if tdm:
        n = max(i for i, _, _ in tdm) + 1
        if len(tdm) != 3 * n:
            raise ParseError("transition dipole columns tdm_<i>_<x|y|z> are incomplete.",
                             path=path, line=1, field="tdm_*",
                             hint="give x, y and z for every state 0..n_states-1.")
        arr = np.zeros((len(table), n, 3))
        for i, j, c in tdm:
            arr[:, i, j] = table[c].to_numpy(np.float64)
        arrays["transition_dipoles"] = arr
        table = table.drop(columns=[c for _, _, c in tdm])
    if state_base and "initial_state" in table.columns:
        table["initial_state"] = table["initial_state"] - state_base
    return table, arrays


def load_extxyz(
    path: str | Path,
    *,
    energy_unit: str | None = None,
    time_unit: str | None = None,
    length_unit: str | None = None,
    state_base: int | None = None,
    nonfinite: str = "raise",
    progress: bool = True,
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
        What to do with NaN/Inf in energies, coordinates and arrays: raise a
        ParseError, or keep them with an EnsembleWarning naming where.
    progress : bool
        Show a progress bar over files.

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
        m = _TRAJ_ID_RE.search(_stem(path))
        files = [(int(m.group(1)) if m else 0, path)]
        folder = None
    sizes = [p.stat().st_size for _, p in files]
    kw = {"energy_unit": energy_unit, "time_unit": time_unit, "length_unit": length_unit,
          "state_base": state_base, "nonfinite": nonfinite}

    first: _FileData | None = None
    stacks: dict[str, _Stack] = {}
    lists: dict[str, list[Any]] = {}
    traj_ids: list[np.ndarray] = []
    steps: list[np.ndarray] = []
    snaps: list[np.ndarray] | None = []
    sources = []
    suspicious: list[tuple[Path, str]] = []
    column_order: list[str] = []
    for tid, fpath in tqdm(files, desc="loading", unit="file", disable=not progress,
                           leave=False):
        data = _parse_file(fpath, **kw)
        if first is None:
            first = data
            est = data.n_frames * sum(sizes) / max(sizes[0], 1) * 1.02 + 16
        else:
            _check_same(first, data)
        blocks = {"geometries": data.geometries, "time": data.time, "active": data.active,
                  **data.arrays}
        if data.velocities is not None:
            blocks["velocities"] = data.velocities
        for name, arr in blocks.items():
            stacks.setdefault(name, _Stack(est)).add(arr)
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
    out = {name: s.result() for name, s in stacks.items()}
    header = first.header
    masses = None
    if "masses" in header:
        masses = parse_floats(header["masses"], len(first.symbols))
        if masses is None:
            raise ParseError(f"expected {len(first.symbols)} masses (amu), found "
                             f"{header['masses']!r}.", path=first.path, frame=0, line=2,
                             field="masses", hint="one mass per atom, quoted.")
    state_labels = header["state_labels"].split() if "state_labels" in header else None
    cation_labels = header["cation_labels"].split() if "cation_labels" in header else None

    metadata: dict[str, Any] = {}
    trajectories = None
    traj_arrays: dict[str, np.ndarray] = {}
    ids_all = np.array([t for t, _ in files], dtype=np.int64)
    if folder is not None:
        meta_path = folder / "metadata.json"
        if meta_path.is_file():
            try:
                metadata = decode_metadata(json.loads(meta_path.read_text()))
            except (json.JSONDecodeError, UnicodeDecodeError) as exc:
                raise ParseError(f"invalid JSON ({exc}).", path=meta_path,
                                 hint="fix or delete metadata.json (it is optional).") from exc
            sources = [*metadata.pop("sources", []), *sources]
        csv_path = folder / "trajectories.csv"
        if csv_path.is_file():
            base = state_base if state_base is not None else int(header.get("state_base", 0))
            trajectories, traj_arrays = _read_trajectories_csv(
                csv_path, ids_all, energy_unit=energy_unit, state_base=base)
            sources.append(file_source(csv_path, fmt="csv"))
    metadata["sources"] = sources

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
            masses=masses if masses is not None else masses_for(first.symbols),
            trajectories=trajectories,
            state_labels=tuple(state_labels or ()),
            cation_labels=tuple(cation_labels or ()),
            metadata=metadata,
            **out,
            **traj_arrays,
        )
    except SchemaError as exc:
        raise SchemaError(f"{path}: {exc}") from exc


# ---------------------------------------------------------------------------------- writing
def _is_extxyz_folder(path: Path) -> bool:
    names = [p.name for p in path.iterdir()]
    return bool(names) and all(
        n.endswith(_SUFFIXES) or n in ("trajectories.csv", "metadata.json") for n in names
    ) and any(n.endswith(_SUFFIXES) for n in names)


def _quote(value: str, key: str) -> str:
    if '"' in value or "\n" in value:
        raise SchemaError(f"column {key!r} holds text with a quote or newline: {value[:40]!r}; "
                          "it cannot be written to an XYZ comment line.")
    return f'"{value}"' if (not value or any(c.isspace() for c in value) or "=" in value) \
        else value


def write_extxyz(
    ens: Ensemble,
    folder: str | Path,
    *,
    compress: bool = False,
    precision: int | None = None,
    overwrite: bool = False,
    progress: bool = False,
) -> Path:
    """Write `ens` in the open extended-XYZ folder layout, atomically.

    Parameters
    ----------
    ens : Ensemble
        The ensemble.
    folder : str or Path
        Target folder (created; written to a temporary folder beside it first).
    compress : bool
        Write ``traj_<id>.xyz.gz`` instead of ``traj_<id>.xyz``.
    precision : int, optional
        Significant digits of floating-point numbers; default None writes the
        shortest representation that reads back exactly.
    overwrite : bool
        Replace an existing folder written in this layout.
    progress : bool
        Show a progress bar over trajectories.

    Returns
    -------
    Path
        The folder.

    Notes
    -----
    Units in the files: fs, eV, Angstrom, Angstrom/fs. Every file states them in
    its first comment line. ``trajectories.csv`` and ``metadata.json`` are
    written beside the trajectory files.
    """
    from tqdm.auto import tqdm

    folder = Path(folder)
    F = "%r" if precision is None else f"%.{int(precision)}g"
    frame = ens.snapshots
    extra_cols = [c for c in frame.columns if c not in ("snapshot", "traj", "step", "time",
                                                        "active")]
    for c in extra_cols:
        if c in _RESERVED or not re.fullmatch(r"[A-Za-z_][\w.\-]*", c):
            raise SchemaError(f"column name {c!r} cannot be written as an XYZ comment key.")
    write_snapshot = not np.array_equal(frame["snapshot"].to_numpy(), np.arange(len(frame)))
    masses_default = np.array_equal(ens.masses, masses_for(ens.symbols)) \
        if all(_known(s) for s in ens.symbols) else False

    header = [
        "energy_unit=eV", "time_unit=fs", "length_unit=Angstrom",
        f'state_labels="{" ".join(ens.state_labels)}"',
    ]
    if ens.cation_labels:
        header.append(f'cation_labels="{" ".join(ens.cation_labels)}"')
    if ens.dyson is not None and ens.dyson.ndim == 3:
        header.append(f'dyson_shape="{ens.n_states} {ens.n_cation}"')
    if not masses_default:
        header.append('masses="' + " ".join(repr(float(m)) for m in ens.masses) + '"')
    for lab in (*ens.state_labels, *ens.cation_labels):
        if not lab or any(ch.isspace() or ch == '"' for ch in lab):
            raise SchemaError(f"state label {lab!r} cannot be written (no spaces or quotes).")

    # one template and one object table per snapshot: "%" formatting does all the work
    parts: list[str] = ["time=" + F]
    blocks: list[np.ndarray] = [frame["time"].to_numpy()[:, None]]
    parts.append("step=%d")
    blocks.append(frame["step"].to_numpy()[:, None])
    if write_snapshot:
        parts.append("snapshot=%d")
        blocks.append(frame["snapshot"].to_numpy()[:, None])
    parts.append("active=%d")
    blocks.append(frame["active"].to_numpy()[:, None])
    for key in ARRAY_KEYS:
        arr = getattr(ens, key)
        if arr is None:
            continue
        flat = arr.reshape(len(frame), -1)
        parts.append(f'{key}="' + " ".join([F] * flat.shape[1]) + '"')
        blocks.append(flat)
    for c in extra_cols:
        values = frame[c].to_numpy()
        if values.dtype == bool:
            parts.append(f"{c}=%s")
            blocks.append(np.where(values, "True", "False").astype(object)[:, None])
        elif np.issubdtype(values.dtype, np.integer):
            parts.append(f"{c}=%d")
            blocks.append(values[:, None])
        elif np.issubdtype(values.dtype, np.floating):
            parts.append(f"{c}={F}")
            blocks.append(values[:, None])
        else:
            parts.append(f"{c}=%s")
            blocks.append(np.array([_quote(str(v), c) for v in values], dtype=object)[:, None])
    width = sum(b.shape[1] for b in blocks)
    table = np.empty((len(frame), width), dtype=object)
    j = 0
    for b in blocks:
        table[:, j:j + b.shape[1]] = b
        j += b.shape[1]
    comment_tpl = " ".join(parts)
    first_tpl = " ".join(header) + " " + comment_tpl
    atoms = ens.geometries
    if ens.velocities is not None:
        atoms = np.concatenate([atoms, ens.velocities], axis=2)
    per_atom = atoms.shape[2]
    atom_tpl = "".join(f"{s} " + " ".join([F] * per_atom) + "\n" for s in ens.symbols)
    coords = atoms.reshape(len(frame), -1)
    count_line = f"{ens.n_atoms}\n"

    traj = frame["traj"].to_numpy()
    bounds = np.r_[0, np.flatnonzero(np.diff(traj)) + 1, len(traj)]
    suffix = ".xyz.gz" if compress else ".xyz"
    with atomic_folder(folder, overwrite=overwrite, is_ours=_is_extxyz_folder,
                       kind="extended-XYZ ensemble folder") as tmp:
        for a, b in tqdm(list(zip(bounds[:-1], bounds[1:], strict=True)), desc="writing",
                         unit="traj", disable=not progress, leave=False):
            rows = table[a:b].tolist()
            xyz = coords[a:b].tolist()
            out = io.StringIO()
            for k, (row, pos) in enumerate(zip(rows, xyz, strict=True)):
                out.write(count_line)
                out.write((first_tpl if k == 0 else comment_tpl) % tuple(row))
                out.write("\n")
                out.write(atom_tpl % tuple(pos))
            data = out.getvalue().encode("utf-8")
            target = tmp / f"traj_{int(traj[a])}{suffix}"
            if compress:
                with open(target, "wb") as raw, gzip.GzipFile(
                        filename="", mode="wb", fileobj=raw, compresslevel=6, mtime=0) as gz:
                    gz.write(data)
            else:
                target.write_bytes(data)
        _write_trajectories_csv(ens, tmp / "trajectories.csv")
        meta = {k: v for k, v in ens.metadata.items() if k not in ("units", "schema_version")}
        (tmp / "metadata.json").write_text(dumps_json(encode_metadata(meta)))
    return folder


def _known(symbol: str) -> bool:
    try:
        masses_for([symbol])
    except SchemaError:
        return False
    return True


def _write_trajectories_csv(ens: Ensemble, path: Any) -> None:
    table = ens.trajectories.drop(columns=["n_steps", "t_end"])
    extra = {}
    if ens.excitation_energies is not None:
        for i in range(ens.excitation_energies.shape[1]):
            extra[f"exc_{i}"] = ens.excitation_energies[:, i]
    if ens.oscillator_strengths is not None:
        for i in range(ens.oscillator_strengths.shape[1]):
            extra[f"f_{i}"] = ens.oscillator_strengths[:, i]
    if ens.transition_dipoles is not None:
        for i in range(ens.transition_dipoles.shape[1]):
            for j, ax in enumerate("xyz"):
                extra[f"tdm_{i}_{ax}"] = ens.transition_dipoles[:, i, j]
    clash = set(extra) & set(table.columns)
    if clash:
        raise SchemaError(f"trajectories column(s) {sorted(clash)} clash with reserved names.")
    table = pd.concat([table, pd.DataFrame(extra, index=table.index)], axis=1)
    table.to_csv(path, index=False)
