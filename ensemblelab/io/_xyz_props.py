r"""The extended-XYZ ``Properties=`` column layout, ``Lattice=``/``pbc=``, and atomic masses.

The common extended-XYZ convention declares the columns of the atom lines in the
comment line, e.g. ``Properties=species:S:1:pos:R:3:momenta:R:3``: triples of
name, type (``S`` text, ``R`` real, ``I`` integer, ``L`` logical) and column
count. A file without ``Properties=`` is read as ``El x y z`` or
``El x y z vx vy vz`` (our original layout).

Understood columns
------------------

================  ======================================================  ========================
name              meaning                                                 unit
================  ======================================================  ========================
``species:S:1``   element symbol (or ``Z:I:1``, the atomic number)        -
``pos:R:3``       Cartesian coordinates                                   ``length_unit``
``vel:R:3``,      velocities                                              ``length_unit`` /
``velocities``                                                            ``time_unit``
``momenta:R:3``   momenta in the common convention, converted to          amu * Angstrom / t0,
                  velocities with the masses                              t0 = Angstrom *
                                                                          sqrt(amu/eV)
``masses:R:1``    atomic masses                                           amu
================  ======================================================  ========================

The momentum unit amu*L/(L*sqrt(amu/eV)) = sqrt(amu*eV) does not depend on the
length unit, so ``momenta`` are read the same whatever ``length_unit`` says.
Any other column (``forces:R:3``, charges, magnetic moments, ...) is refused with
a ParseError naming it, unless it is listed in ``skip_atom_columns=``: the
Ensemble has no place for it, and a silently dropped column would hide a
mistake. The skipped names are recorded in ``metadata["skipped_atom_columns"]``.

``pbc=`` with any ``T`` is refused (the analyses use plain Cartesian distances of
a molecule; unwrap it first); ``Lattice=`` without ``pbc=`` means periodic in the
convention and is refused too. ``Lattice=`` with ``pbc="F F F"`` is kept as
``metadata["lattice"]`` (3 x 3, Angstrom, rows are the cell vectors).
"""

from __future__ import annotations

import io
import math
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import numpy.typing as npt
import pandas as pd
from scipy import constants as _sc

from ..data.elements import ATOMIC_NUMBERS, resolve_masses
from ..errors import ParseError, SchemaError
from ._common import parse_floats
from ._extxyz_comment import where_in_file
from ._safety import excerpt

__all__ = ["ASE_TIME_FS", "AtomColumns", "parse_properties", "atom_columns", "read_cell",
           "momenta_to_velocities", "velocities_to_momenta", "masses_of_file",
           "WRITE_PROPERTIES", "velocities_from", "read_atoms"]

#: the time unit of the momentum convention, Angstrom * sqrt(amu / eV), in fs (CODATA via
#: scipy.constants: 1e-10 m * sqrt(m_u / e) in s, times 1e15)
ASE_TIME_FS: float = 1e-10 * math.sqrt(_sc.physical_constants["atomic mass constant"][0]
                                       / _sc.e) * 1e15

#: the ``Properties=`` our writer puts on files with velocities: ``vel`` reads back exactly
#: here, ``momenta`` with ``masses`` is what other readers turn into velocities
WRITE_PROPERTIES = "species:S:1:pos:R:3:vel:R:3:momenta:R:3:masses:R:1"

_VELOCITY_NAMES = ("vel", "velocities")
_KNOWN = {"species": ("S", 1), "Z": ("I", 1), "pos": ("R", 3), "vel": ("R", 3),
          "velocities": ("R", 3), "momenta": ("R", 3), "masses": ("R", 1)}
_NAN_TOKENS = ["nan", "NaN", "NAN", "-nan", "+nan", "-NaN", "+NaN"]


def momenta_to_velocities(momenta: np.ndarray, masses: np.ndarray) -> np.ndarray:
    """Velocities in Angstrom/fs from momenta in amu*Angstrom/t0 (t0 = Angstrom*sqrt(amu/eV)).

    Parameters
    ----------
    momenta : ndarray, shape (..., n_atoms, 3)
    masses : ndarray, shape (n_atoms,)
        In amu.

    Returns
    -------
    ndarray, shape (..., n_atoms, 3)
    """
    return momenta / masses[:, None] / ASE_TIME_FS


def velocities_to_momenta(velocities: np.ndarray, masses: np.ndarray) -> np.ndarray:
    """Inverse of :func:`momenta_to_velocities` (velocities in Angstrom/fs)."""
    return velocities * masses[:, None] * ASE_TIME_FS


def parse_properties(spec: str, path: Path) -> list[tuple[str, str, int]]:
    """Split ``name:type:count:...`` into triples, validating types and counts."""
    parts = spec.split(":")
    where: dict[str, Any] = {"path": path, "frame": 0, "line": 2, "field": "Properties"}
    if len(parts) % 3 or not spec:
        raise ParseError(f"expected name:type:count triples, found {excerpt(spec)}.",
                         hint="e.g. Properties=species:S:1:pos:R:3.", **where)
    out: list[tuple[str, str, int]] = []
    for k in range(0, len(parts), 3):
        name, kind, count = parts[k], parts[k + 1], parts[k + 2]
        if kind not in ("S", "R", "I", "L") or not count.isdigit() or len(count) > 4 \
                or int(count) < 1:
            raise ParseError(
                f"column {excerpt(name)}: expected type S, R, I or L and a positive count, "
                f"found {excerpt(kind)}:{excerpt(count)}.",
                hint="each column is name:type:count.", **where)
        want = _KNOWN.get(name)
        if want is not None and (want[0] != kind and not (want[0] == "R" and kind == "I")
                                 or want[1] != int(count)):
            raise ParseError(f"column {name} must be {name}:{want[0]}:{want[1]}, found "
                             f"{name}:{kind}:{count}.", hint="see ensemblelab.io.xyz.", **where)
        if any(n == name for n, _, _ in out):
            raise ParseError(f"column {name} appears twice.", hint="name each column once.",
                             **where)
        out.append((name, kind, int(count)))
    names = [n for n, _, _ in out]
    if "pos" not in names or not ({"species", "Z"} & set(names)):
        raise ParseError(f"expected the columns species (or Z) and pos, found {names}.",
                         hint="Properties=species:S:1:pos:R:3 is the minimum.", **where)
    if sum(n in _VELOCITY_NAMES for n in names) > 1:
        raise ParseError("both vel and velocities are declared.",
                         hint="give the velocities once.", **where)
    return out


@dataclass
class AtomColumns:
    """The atom lines of one file, split by ``Properties=`` (arrays in file units)."""

    symbols: list[str]
    positions: np.ndarray
    velocities: np.ndarray | None = None
    momenta: np.ndarray | None = None
    masses: np.ndarray | None = None
    skipped: list[str] = field(default_factory=list)


def _locate(atoms: np.ndarray, n_atoms: int, cols: list[tuple[str, str, int]],
            path: Path) -> None:
    ncol = sum(c for _, _, c in cols)
    names = [(n, kind) for n, kind, c in cols for _ in range(c)]
    for k, line in enumerate(atoms):
        tokens = line.split()
        f, a = divmod(k, n_atoms)
        where: dict[str, Any] = {"path": path, "frame": f,
                                 "line": where_in_file(n_atoms, f, 2 + a)}
        if len(tokens) != ncol:
            raise ParseError(
                f"expected {ncol} columns as Properties= declares, found {len(tokens)}: "
                f"{excerpt(line, 60)}.", field="atom line",
                hint="every atom line holds the columns that Properties= lists.", **where)
        for tok, (name, kind) in zip(tokens, names, strict=True):
            if kind in ("R", "I"):
                try:
                    float(tok)
                except ValueError:
                    raise ParseError(f"expected a number in column {name} of atom {a}, found "
                                     f"{excerpt(tok)}.", field=name,
                                     hint="write plain decimal numbers.", **where) from None


def atom_columns(lines: Sequence[str], n_atoms: int, n_frames: int, path: Path,
                 spec: str, comments: Sequence[str], *,
                 skip: Sequence[str] = ()) -> AtomColumns:
    """Parse the atom lines of every frame by the ``Properties=`` of the first comment line."""
    cols = parse_properties(spec, path)
    same = re.compile(r'(?<!\S)Properties=("?)' + re.escape(spec) + r'\1(?!\S)')
    bad = next((f for f, c in enumerate(comments) if not same.search(c)), None)
    if bad is not None:
        raise ParseError(f"this frame's Properties= differs from frame 0 ({excerpt(spec)}).",
                         path=path, frame=bad, line=where_in_file(n_atoms, bad, 1),
                         field="Properties", hint="every frame of a file needs the same columns.")
    unknown = [n for n, _, _ in cols if n not in _KNOWN and n not in skip]
    if unknown:
        example = ", ".join(repr(u) for u in unknown)
        raise ParseError(
            f"the atom column(s) {unknown} have no place in an Ensemble (it keeps positions, "
            "velocities and masses per atom).", path=path, frame=0, line=2, field=unknown[0],
            hint=f"pass skip_atom_columns=[{example}] to load without them (recorded in "
                 "metadata['skipped_atom_columns']; on the command line --skip-atom-columns "
                 f"{' '.join(unknown)}).")
    size = n_atoms + 2
    table = np.asarray(lines, dtype=object).reshape(n_frames, size)
    atoms = table[:, 2:].ravel()
    ncol = sum(c for _, _, c in cols)
    if len(atoms[0].split()) != ncol:  # before any allocation sized by the declaration
        _locate(atoms[:1], n_atoms, cols, path)
    text_idx: list[int] = []
    j = 0
    spans: dict[str, tuple[int, int]] = {}
    for name, kind, count in cols:
        spans[name] = (j, j + count)
        if kind in ("S", "L"):
            text_idx.extend(range(j, j + count))
        j += count
    num_idx = [i for i in range(ncol) if i not in text_idx]
    df: pd.DataFrame | None
    try:
        df = pd.read_csv(  # type: ignore[call-overload]
            io.StringIO("\n".join(atoms)), sep=r"\s+", header=None, engine="c",
            names=list(range(ncol)), keep_default_na=False,
            dtype={i: (object if i in text_idx else np.float64) for i in range(ncol)},
            na_values={i: _NAN_TOKENS for i in num_idx}, skip_blank_lines=False)
    except (ValueError, pd.errors.ParserError, pd.errors.EmptyDataError):
        df = None
    if df is None or len(df) != atoms.size or df[text_idx].isna().to_numpy().any():
        _locate(atoms, n_atoms, cols, path)
        raise ParseError("could not parse the atom lines.", path=path, field="atom line")
    numeric = df.iloc[:, num_idx].to_numpy(np.float64)
    if np.isnan(numeric).any() and parse_floats(
            " ".join(" ".join(np.asarray(a.split())[num_idx]) for a in atoms),
            atoms.size * len(num_idx)) is None:
        _locate(atoms, n_atoms, cols, path)
        raise ParseError("could not parse the atom lines.", path=path, field="atom line")
    pos_of = {i: k for k, i in enumerate(num_idx)}

    def block(name: str) -> np.ndarray:
        a, b = spans[name]
        return numeric[:, [pos_of[i] for i in range(a, b)]].reshape(n_frames, n_atoms, b - a)

    if "species" in spans:
        sym = df.iloc[:, spans["species"][0]].to_numpy(dtype=object).reshape(n_frames, n_atoms)
        what = "species"
    else:
        z = block("Z")[:, :, 0]
        by_z = {v: k for k, v in reversed(ATOMIC_NUMBERS.items()) if k != "D"}
        if not np.all(np.isin(z, list(by_z))):
            f, a = (int(i) for i in np.argwhere(~np.isin(z, list(by_z)))[0])
            raise ParseError(f"unknown atomic number {z[f, a]:g} of atom {a}.", path=path,
                             frame=f, line=where_in_file(n_atoms, f, 2 + a), field="Z",
                             hint="write a species:S:1 column with element symbols instead.")
        sym = np.vectorize(lambda v: by_z[int(v)], otypes=[object])(z)
        what = "Z"
    ref = [str(x) for x in sym[0]]
    same = sym == sym[0]
    if not same.all():
        f, a = (int(i) for i in np.argwhere(~same)[0])
        raise ParseError(
            f"the elements change: atom {a} is {ref[a]} in frame 0 but {sym[f, a]} here.",
            path=path, frame=f, line=where_in_file(n_atoms, f, 2 + a), field=what,
            hint="every frame of every trajectory must hold the same atoms in the same order.")
    out = AtomColumns(symbols=ref, positions=block("pos").copy(),
                      skipped=[n for n, _, _ in cols if n in skip and n not in _KNOWN])
    vname = next((n for n in _VELOCITY_NAMES if n in spans), None)
    if vname is not None:
        out.velocities = block(vname).copy()
    if "momenta" in spans:
        out.momenta = block("momenta").copy()
    if "masses" in spans:
        m = block("masses")[:, :, 0]
        if not np.all(m == m[0]):
            f, a = (int(i) for i in np.argwhere(m != m[0])[0])
            raise ParseError(f"the mass of atom {a} changes: {m[0, a]:g} in frame 0, "
                             f"{m[f, a]:g} here.", path=path, frame=f,
                             line=where_in_file(n_atoms, f, 2 + a), field="masses",
                             hint="masses are constant along a trajectory.")
        out.masses = m[0].copy()
    return out


def read_cell(header: Mapping[str, str], path: Path, length_factor: float
              ) -> np.ndarray | None:
    """The 3 x 3 lattice (Angstrom) of a non-periodic file, None without one; refuse pbc."""
    where: dict[str, Any] = {"path": path, "frame": 0, "line": 2}
    pbc = header.get("pbc")
    if pbc is not None:
        flags = pbc.split()
        truth = {"T": True, "True": True, "t": True, "true": True, "1": True,
                 "F": False, "False": False, "f": False, "false": False, "0": False}
        if len(flags) != 3 or any(v not in truth for v in flags):
            raise ParseError(f"expected three T/F flags, found {excerpt(pbc)}.", field="pbc",
                             hint='write pbc="F F F".', **where)
        if any(truth[v] for v in flags):
            raise ParseError(
                f"periodic boundary conditions (pbc=\"{pbc}\") are not supported: distances "
                "and geometries are analysed as plain Cartesian coordinates.", field="pbc",
                hint="unwrap the molecule across the cell boundaries (e.g. with ASE) and "
                     "write pbc=\"F F F\".", **where)
    lattice = header.get("Lattice")
    if lattice is None:
        return None
    if pbc is None:
        raise ParseError("Lattice= without pbc= means a periodic cell in the common "
                         "convention, which is not supported.", field="Lattice",
                         hint='add pbc="F F F" if the cell is only a box around a molecule.',
                         **where)
    values = parse_floats(lattice, 9)
    if values is None:
        raise ParseError(f"expected 9 numbers, found {excerpt(lattice)}.", field="Lattice",
                         hint='write Lattice="ax ay az bx by bz cx cy cz".', **where)
    return values.reshape(3, 3) * length_factor


def masses_of_file(symbols: Sequence[str], given: Mapping[str, float] | npt.ArrayLike | None,
                   column: np.ndarray | None, header: str | None, path: Path) -> np.ndarray:
    """The atomic masses (amu) of one file: ``masses=`` > masses column > header > table.

    An unknown element symbol without a mass is a ParseError naming the file,
    frame 0, the atom's line and the field, with a hint to pass ``masses=``.
    """
    n_atoms = len(symbols)
    if given is None and column is not None:
        if header is not None:
            head = parse_floats(header, n_atoms)
            if head is None or not np.allclose(head, column, rtol=1e-9, atol=0):
                raise ParseError("the masses header key and the masses column disagree.",
                                 path=path, frame=0, line=2, field="masses",
                                 hint="give the masses once.")
        return column
    if given is None and header is not None:
        head = parse_floats(header, n_atoms)
        if head is None:
            raise ParseError(f"expected {n_atoms} masses (amu), found {excerpt(header)}.",
                             path=path, frame=0, line=2, field="masses",
                             hint="one mass per atom, quoted.")
        return head
    try:
        return resolve_masses(symbols, given)
    except SchemaError as exc:
        atom = getattr(exc, "atom", None)
        raise ParseError(
            str(exc).split(" Hint:")[0], path=path, frame=0,
            line=None if atom is None else where_in_file(n_atoms, 0, 2 + atom),
            field="element" if atom is not None else "masses",
            hint="pass masses= explicitly to load(), e.g. masses={'X': 12.0} (element -> "
                 "amu) or one mass per atom (on the command line --masses X=12.0).") from exc


def velocities_from(vel: np.ndarray | None, cols: AtomColumns | None, masses: np.ndarray,
                    path: Path) -> np.ndarray | None:
    """Velocities (Angstrom/fs) from the velocity columns, else from the momenta.

    `vel` is already in Angstrom/fs and wins when a file has both. They must
    then agree to 1% (or 1e-6 Angstrom/fs): loose enough for files written with
    few digits (``write_extxyz(precision=3)`` rounds each column to 0.05%), tight
    enough to refuse a file whose momenta were changed by another program without
    its velocities (our choice; common practice for stale-column checks).
    """
    if cols is None or cols.momenta is None:
        return vel
    from_p = momenta_to_velocities(cols.momenta, masses if cols.masses is None else cols.masses)
    if vel is None:
        return from_p
    close = np.isclose(vel, from_p, rtol=1e-2, atol=1e-6, equal_nan=True)
    if not close.all():
        f, a = (int(i) for i in np.argwhere(~close)[0][:2])
        n_atoms = vel.shape[1]
        raise ParseError(
            f"the velocities and momenta/masses of atom {a} disagree: "
            f"{vel[f, a].tolist()} vs {from_p[f, a].tolist()} Angstrom/fs.", path=path, frame=f,
            line=where_in_file(n_atoms, f, 2 + a), field="momenta",
            hint="keep one of the two columns (drop the stale one from Properties=).")
    return vel


def read_atoms(lines: Sequence[str], n_atoms: int, n_frames: int, path: Path, *,
               skip: Sequence[str] = (), skip_all: bool = False
               ) -> tuple[list[str], np.ndarray, np.ndarray | None, AtomColumns | None]:
    """Atom lines of a geometry file whose comment lines are otherwise ignored.

    Follows ``Properties=`` when the first comment line declares it (so momenta
    are never read as velocities), else ``El x y z [vx vy vz]``. Returns symbols,
    positions and velocities in file units, and the parsed columns (or None);
    pass the latter to :func:`velocities_from` after the unit conversion.
    ``skip_all`` skips every column the Ensemble cannot hold (for callers that use
    the positions only).
    """
    from ._extxyz_comment import PAIR_RE
    from ._xyz_fields import atom_block

    comments = list(lines[1::n_atoms + 2][:n_frames])
    spec = next((q or p for k, q, p in PAIR_RE.findall(comments[0]) if k == "Properties"),
                None)
    if spec is None:
        symbols, geoms, vel = atom_block(list(lines), n_atoms, n_frames, path)
        return symbols, geoms, vel, None
    if skip_all:
        skip = [n for n, _, _ in parse_properties(spec, path)]
    cols = atom_columns(lines, n_atoms, n_frames, path, spec, comments, skip=skip)
    return cols.symbols, cols.positions, cols.velocities, cols
