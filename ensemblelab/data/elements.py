"""Element symbols, atomic numbers and standard atomic masses (amu).

Masses are the IUPAC abridged standard atomic weights (conventional values),
from memory; isotope-specific masses can always be passed explicitly.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
import numpy.typing as npt

from ..errors import SchemaError

__all__ = ["ATOMIC_NUMBERS", "MASSES", "masses_for", "atomic_numbers_for", "normalise_symbol",
           "resolve_masses"]

_TABLE = """
H 1 1.008; He 2 4.0026; Li 3 6.94; Be 4 9.0122; B 5 10.81; C 6 12.011; N 7 14.007;
O 8 15.999; F 9 18.998; Ne 10 20.180; Na 11 22.990; Mg 12 24.305; Al 13 26.982;
Si 14 28.085; P 15 30.974; S 16 32.06; Cl 17 35.45; Ar 18 39.95; K 19 39.098;
Ca 20 40.078; Sc 21 44.956; Ti 22 47.867; V 23 50.942; Cr 24 51.996; Mn 25 54.938;
Fe 26 55.845; Co 27 58.933; Ni 28 58.693; Cu 29 63.546; Zn 30 65.38; Ga 31 69.723;
Ge 32 72.630; As 33 74.922; Se 34 78.971; Br 35 79.904; Kr 36 83.798; Rb 37 85.468;
Sr 38 87.62; Y 39 88.906; Zr 40 91.224; Nb 41 92.906; Mo 42 95.95; Ru 44 101.07;
Rh 45 102.91; Pd 46 106.42; Ag 47 107.87; Cd 48 112.41; In 49 114.82; Sn 50 118.71;
Sb 51 121.76; Te 52 127.60; I 53 126.90; Xe 54 131.29; Cs 55 132.91; Ba 56 137.33;
Pt 78 195.08; Au 79 196.97; Hg 80 200.59; Pb 82 207.2
"""

ATOMIC_NUMBERS: dict[str, int] = {}
MASSES: dict[str, float] = {}
for _entry in _TABLE.replace("\n", " ").split(";"):
    _sym, _z, _m = _entry.split()
    ATOMIC_NUMBERS[_sym] = int(_z)
    MASSES[_sym] = float(_m)
MASSES["D"] = 2.0141  # deuterium, commonly written as its own symbol
ATOMIC_NUMBERS["D"] = 1


def normalise_symbol(symbol: str) -> str:
    """Return the canonical capitalisation of an element symbol ("CL" -> "Cl")."""
    s = symbol.strip()
    return s[:1].upper() + s[1:].lower()


def _lookup(symbols: Sequence[str], table: Mapping[str, Any], what: str) -> list:
    out = []
    for i, sym in enumerate(symbols):
        key = normalise_symbol(sym)
        if key not in table and sym not in table:
            exc = SchemaError(
                f"unknown element symbol {sym!r} at atom {i}; cannot look up its {what}. "
                "Hint: pass masses= explicitly for unusual elements or labels."
            )
            exc.atom = i  # type: ignore[attr-defined]  # read by the loaders' messages
            raise exc
        out.append(table[sym] if sym in table else table[key])
    return out


def resolve_masses(symbols: Sequence[str],
                   masses: Mapping[str, float] | npt.ArrayLike | None = None) -> np.ndarray:
    """Atomic masses (amu), shape (n_atoms,): explicit ones first, then the standard table.

    Parameters
    ----------
    symbols : sequence of str
        Element symbols (or labels).
    masses : mapping or array_like, optional
        A mapping symbol -> amu (symbols it does not name come from the standard
        table; a label such as ``"X1"`` may be named as written), or one positive
        mass per atom.

    Returns
    -------
    ndarray, shape (n_atoms,)

    Raises
    ------
    SchemaError
        Unknown symbol without an explicit mass (``exc.atom`` is its index), or a
        mass that is not a positive finite number.
    """
    if masses is None:
        return masses_for(symbols)
    if isinstance(masses, Mapping):
        table: dict[str, Any] = {**MASSES, **{str(k): float(v) for k, v in masses.items()}}
        out = np.asarray(_lookup(symbols, table, "mass"), dtype=np.float64)
    else:
        out = np.asarray(masses, dtype=np.float64)
        if out.shape != (len(symbols),):
            raise SchemaError(f"masses= must hold one mass per atom ({len(symbols)}); got "
                              f"shape {out.shape}.")
    if not np.all(np.isfinite(out) & (out > 0)):
        raise SchemaError(f"masses must be positive finite numbers (amu); got {out.tolist()}.")
    return out


def masses_for(symbols: Sequence[str]) -> np.ndarray:
    """Standard atomic masses in amu for `symbols`, shape (n_atoms,)."""
    return np.asarray(_lookup(symbols, MASSES, "mass"), dtype=np.float64)


def atomic_numbers_for(symbols: Sequence[str]) -> np.ndarray:
    """Atomic numbers for `symbols`, shape (n_atoms,), int64."""
    return np.asarray(_lookup(symbols, ATOMIC_NUMBERS, "atomic number"), dtype=np.int64)
