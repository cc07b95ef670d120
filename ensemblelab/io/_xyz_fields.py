"""Extended-XYZ reading internals: the file text (bounded), frames, atom lines, numbers.

Split from :mod:`ensemblelab.io.xyz` (which documents the format). Error messages
quote at most a short, sanitised excerpt of the file (:func:`~ensemblelab.io._safety.excerpt`).
"""

from __future__ import annotations

import gzip
import io
import re
import zlib
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from .. import units
from .._csv import restore_frame
from ..errors import ParseError
from ._common import parse_floats, resolve_unit
from ._extxyz_comment import SUFFIXES, TRAJ_ID_RE, where_in_file
from ._safety import check_no_symlink_escape, excerpt, find_forbidden_char, read_bounded

if TYPE_CHECKING:
    from .xyz import _FileData

NOT_INT_RE = re.compile(r"[^0-9+\- \t]")


def read_text(path: Path) -> str:
    try:
        if path.name.endswith(".gz"):
            with gzip.open(path, "rb") as fh:
                raw = read_bounded(fh, path=path, compressed_size=path.stat().st_size)
        else:
            with open(path, "rb") as fh:
                raw = read_bounded(fh, path=path, compressed_size=None)
    except ParseError:
        raise
    except (OSError, EOFError, gzip.BadGzipFile, zlib.error) as exc:
        raise ParseError(f"cannot read the file ({exc}).", path=path,
                         hint="check that the file is complete; re-copy a truncated .gz.") from exc
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ParseError(f"the file is not UTF-8 text ({exc.reason} at byte {exc.start}).",
                         path=path,
                         hint="extended-XYZ files are plain text; is this a binary file?") from exc
    bad = find_forbidden_char(text)
    if bad is not None:
        pos, name = bad
        line = text.count("\n", 0, pos) + 1
        start = text.rfind("\n", 0, pos) + 1
        raise ParseError(
            f"the file holds the invisible or line-splitting character {name} (in "
            f"{excerpt(text[start:pos + 1][-40:])}); refused, not dropped.", path=path,
            line=line, frame=_frame_of_line(text, line),
            hint="remove bidirectional controls and line or paragraph separators; they can "
                 "make a key or value read differently from how it looks.")
    return text.replace("\r\n", "\n") if "\r" in text else text


def _frame_of_line(text: str, line: int) -> int | None:
    """0-based frame of 1-based `line`, from the atom count on the first line (None if odd)."""
    try:
        n_atoms = int(text[:text.find("\n")].strip())
    except ValueError:
        return None
    return (line - 1) // (n_atoms + 2) if n_atoms > 0 else None


def split_frames(text: str, path: Path) -> tuple[int, int, list[str]]:
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
            f"{excerpt(first)}.", path=path, line=1, frame=0, field="atom count",
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
            f"expected the atom-count line {n_atoms} here, found {excerpt(found)}: frame {f - 1} "
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


# ---------------------------------------------------------------------------------- files
def file_stem(path: Path) -> str:
    name = path.name
    for suf in SUFFIXES:
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
                   if p.is_file() and p.name.endswith(SUFFIXES) and not p.name.startswith("."))
    for p in files:  # a link to a file outside the folder is refused, not followed
        check_no_symlink_escape(folder, p, what="trajectory file")
    matches = [TRAJ_ID_RE.search(file_stem(p)) for p in files]
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



_NAN_TOKENS = ["nan", "NaN", "NAN", "-nan", "+nan", "-NaN", "+NaN"]


def _read_table(text: str, ncol: int, *, symbols: bool = False) -> pd.DataFrame | None:
    """Parse whitespace-separated columns with pandas' C tokenizer; None when anything is odd."""
    dtype: Any = np.float64  # all columns numeric: one dtype and one NaN list for all
    na: Any = _NAN_TOKENS  # (per-column dicts cost pandas work per column and call)
    if symbols:
        dtype = {j: np.float64 for j in range(1, ncol)} | {0: object}
        na = {j: _NAN_TOKENS for j in range(1, ncol)}
    try:
        # na_values keyed by column position is valid with header=None
        return pd.read_csv(
            io.StringIO(text), sep=r"\s+", header=None, engine="c",
            names=list(range(ncol)), dtype=dtype, keep_default_na=False,
            na_values=na, skip_blank_lines=False)
    except (ValueError, pd.errors.ParserError, pd.errors.EmptyDataError):
        return None


def atom_block(lines: list[str], n_atoms: int, n_frames: int, path: Path
                ) -> tuple[list[str], np.ndarray, np.ndarray | None]:
    size = n_atoms + 2
    table = np.array(lines, dtype=object).reshape(n_frames, size)
    atoms = table[:, 2:].ravel()
    ncol = len(atoms[0].split())
    if ncol not in (4, 7):
        raise ParseError(
            f"expected an atom line 'El x y z' (4 columns) or 'El x y z vx vy vz' (7 columns), "
            f"found {ncol} column(s): {excerpt(atoms[0], 60)}.",
            path=path, frame=0, line=3, field="atom line",
            hint="one atom per line: element symbol, then Cartesian coordinates.",
        )
    df = _read_table("\n".join(atoms), ncol, symbols=True)
    numeric: np.ndarray | None = None
    if df is not None and len(df) == atoms.size:
        numeric = df.iloc[:, 1:].to_numpy(np.float64)
        if np.isnan(numeric).any() and parse_floats(
                " ".join(" ".join(a.split()[1:]) for a in atoms), atoms.size * (ncol - 1)) is None:
            numeric = None  # a NaN that is not a literal nan: a missing or odd field
    if numeric is None:
        _locate_atom_error(atoms, n_atoms, ncol, path)
        raise ParseError("could not parse the atom lines.", path=path, field="atom line")
    assert df is not None  # numeric came from it
    sym = df.iloc[:, 0].to_numpy(dtype=object).reshape(n_frames, n_atoms)
    ref = [str(x) for x in sym[0]]
    same = sym == sym[0]
    if not same.all():
        f, a = (int(i) for i in np.argwhere(~same)[0])
        raise ParseError(
            f"the elements change: atom {a} is {ref[a]} in frame 0 but {sym[f, a]} here.",
            path=path, frame=f, line=where_in_file(n_atoms, f, 2 + a), field="element",
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
        where: dict[str, Any] = {"path": path, "frame": f, "line": where_in_file(n_atoms, f, 2 + a)}
        if len(tokens) != ncol:
            raise ParseError(
                f"expected {ncol} columns like the first atom line, found {len(tokens)}: "
                f"{excerpt(line, 60)}.", field="atom line",
                hint="every atom line needs the element and 3 (or 6 with velocities) numbers.",
                **where,
            )
        for j, tok in enumerate(tokens[1:]):
            try:
                float(tok)
            except ValueError:
                name = ("x", "y", "z", "vx", "vy", "vz")[j]
                raise ParseError(
                    f"expected a number for coordinate {name}, found {excerpt(tok)}.",
                    field=f"atom {a} {name}", hint="coordinates must be plain decimal numbers.",
                    **where,
                ) from None


def all_numbers(values: dict[str, list[str]], keys: list[str]) -> dict[str, np.ndarray]:
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


def parse_numbers(vals: list[str], key: str, n_atoms: int, path: Path,
             pre: dict[str, np.ndarray] | None = None) -> np.ndarray:
    """Parse the values of one key of every frame to a (n_frames, m) float array."""
    if pre and key in pre:
        return pre[key].copy()
    m = len(vals[0].split())
    if m == 0:
        raise ParseError(f"expected at least one number, found {excerpt(vals[0])}.", path=path,
                         frame=0,
                         line=2, field=key, hint='write e.g. energies="0.0 3.1 4.2".')
    if len(vals) * m > 4000:
        df = _read_table("\n".join(vals), m)
        if df is not None and len(df) == len(vals):
            full = df.to_numpy(np.float64)
            if not np.isnan(full).any():
                return full
    arr = parse_floats(" ".join(vals), len(vals) * m)
    if arr is not None:
        return arr.reshape(len(vals), m)
    for f, v in enumerate(vals):
        tokens = v.split()
        where: dict[str, Any] = {"path": path, "frame": f, "line": where_in_file(n_atoms, f, 1),
                                 "field": key}
        if len(tokens) != m:
            raise ParseError(
                f"inconsistent shape: frame 0 has {m} value(s), this frame has {len(tokens)}.",
                hint="the number of states must not change along a trajectory.", **where,
            )
        for tok in tokens:
            try:
                float(tok)
            except ValueError:
                raise ParseError(f"expected a number, found {excerpt(tok)}.",
                                 hint="write plain decimal numbers (nan and inf are read as "
                                      "non-finite).", **where) from None
    raise ParseError(f"could not parse the values of {key!r}.", path=path, field=key)


def parse_integers(vals: list[str], key: str, n_atoms: int, path: Path,
              pre: dict[str, np.ndarray] | None = None) -> np.ndarray:
    arr = parse_numbers(vals, key, n_atoms, path, pre)
    if arr.shape[1] != 1:
        raise ParseError(f"expected one integer, found {arr.shape[1]} values "
                         f"{excerpt(vals[0])}.",
                         path=path, frame=0, line=2, field=key, hint=f"write {key}=<integer>.")
    arr = arr[:, 0]
    bad = ~np.isfinite(arr) | (arr != np.round(arr))
    if bad.any():
        f = int(np.flatnonzero(bad)[0])
        raise ParseError(f"expected an integer, found {excerpt(vals[f])}.", path=path, frame=f,
                         line=where_in_file(n_atoms, f, 1), field=key,
                         hint=f"write {key}=<integer>.")
    return arr.astype(np.int64)


def user_column(vals: list[str], key: str, pre: dict[str, np.ndarray] | None = None) -> Any:
    joined = " ".join(vals)
    if pre and key in pre and pre[key].shape[1] == 1:
        col = pre[key][:, 0].copy()
        return col.astype(np.int64) if not NOT_INT_RE.search(joined) else col
    if any(not v or len(v.split()) != 1 for v in vals):
        return np.array(vals, dtype=object)
    arr = parse_floats(joined, len(vals))
    if arr is None:
        if set(vals) <= {"True", "False"}:
            return np.array([v == "True" for v in vals])
        return np.array(vals, dtype=object)
    if not NOT_INT_RE.search(joined):
        return arr.astype(np.int64)
    return arr


def looks_like_hartree(energies: np.ndarray, cation: np.ndarray | None) -> str | None:
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


# ---------------------------------------------------------------------------------- stacking
class Stack:
    """Concatenate per-file arrays into one preallocated buffer (bounded peak memory)."""

    def __init__(self, estimate: float) -> None:
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


def check_same(first: _FileData, other: _FileData) -> None:
    if other.symbols != first.symbols:
        at = next((i for i, (x, y) in enumerate(zip(first.symbols, other.symbols, strict=False))
                   if x != y), min(len(first.symbols), len(other.symbols)))
        raise ParseError(
            f"the atoms differ from {first.path.name}: expected {len(first.symbols)} atoms "
            f"starting {' '.join(first.symbols[:8])}, found {len(other.symbols)} starting "
            f"{' '.join(other.symbols[:8])} (first difference at atom {at}).",
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


def read_trajectories_csv(path: Path, ids: np.ndarray, *, energy_unit: str | None,
                           state_base: int) -> tuple[pd.DataFrame, dict[str, np.ndarray]]:
    try:
        table = restore_frame(pd.read_csv(path))
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
