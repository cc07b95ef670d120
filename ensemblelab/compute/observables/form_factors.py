"""Atomic scattering factors for X-rays and electrons (independent-atom model).

Conventions (stated once, used everywhere in :mod:`ensemblelab.compute.observables`):

* ``q = 4 pi sin(theta) / lambda`` is the momentum transfer in inverse Angstrom, with
  ``2 theta`` the scattering angle. In electron diffraction the same quantity is often
  called ``s``; the modified scattering ``sM(s)`` of the scattering maps uses this
  ``s = q``.
* Tabulated X-ray factors are functions of ``x = sin(theta) / lambda = q / (4 pi)``
  (inverse Angstrom); xraydb's ``f0(element, x)`` takes this ``x``. This module converts.

X-ray factors ``f_X`` (electron units, ``f_X(0) ~ Z`` for a neutral atom) come from the
analytic fits carried by the xraydb package (the optional ``xray`` extra), never from
numbers typed in here. Electron factors ``f_e`` (Angstrom) follow from them by the
Mott-Bethe formula

    f_e(q) = 2 (Z - f_X(q)) / (a0 q^2) = (Z - f_X) / (8 pi^2 a0 x^2),

with ``a0`` the Bohr radius in Angstrom (scipy.constants). The formula is 0/0 at
``q = 0`` and the fitted ``f_X(0)`` differs from ``Z`` by up to ~1e-3, so below
``x = MOTT_BETHE_X_MIN`` the part ``Z - f_X(0)`` is frozen at its value at that ``x``
(continuous there, finite at 0); the smooth part ``(f_X(0) - f_X(q)) / q^2`` is used
as it is (evaluated at ``x >= 1e-3``, where its relative change is below 1e-6).
"""

from __future__ import annotations

import math
import sqlite3
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
import numpy.typing as npt
from scipy import constants

from ..._optional import import_optional
from ...data.elements import atomic_numbers_for, normalise_symbol
from ...errors import SchemaError

__all__ = ["xray_form_factor", "electron_form_factor", "form_factor_table", "BOHR_ANGSTROM",
           "MOTT_BETHE_X_MIN", "q_to_x"]

#: Bohr radius in Angstrom (CODATA via scipy.constants)
BOHR_ANGSTROM = constants.physical_constants["Bohr radius"][0] * 1e10

#: below this sin(theta)/lambda (1/Angstrom) the Mott-Bethe mismatch term is frozen
#: (common practice: the formula is numerically unstable near 0; our choice of value)
MOTT_BETHE_X_MIN = 0.02

_X_SMOOTH_MIN = 1e-3


def q_to_x(q: npt.ArrayLike) -> np.ndarray:
    """``sin(theta) / lambda = q / (4 pi)`` (inverse Angstrom) from `q` (inverse Angstrom)."""
    return np.asarray(q, dtype=float) / (4.0 * math.pi)


def _xraydb() -> Any:
    return import_optional("xraydb", extra="xray", purpose="atomic form factors (scattering)")


def _check_q(q: npt.ArrayLike) -> np.ndarray:
    arr = np.atleast_1d(np.asarray(q, dtype=float))
    if arr.ndim != 1 or not np.all(np.isfinite(arr)) or np.any(arr < 0):
        raise SchemaError(
            "The 'q' parameter must be a 1-D array of finite values >= 0 (inverse Angstrom, "
            f"q = 4 pi sin(theta)/lambda). Got shape {arr.shape} with min "
            f"{np.nanmin(arr) if arr.size else 'n/a'}."
        )
    return arr


#: (offset, scales, exponents) per ion, read once from xraydb's own database file
_FIT_ROWS: dict[str, tuple[float, list[float], list[float]] | None] = {}


def _fit_row(ion: str) -> tuple[float, list[float], list[float]] | None:
    """The analytic-fit coefficients xraydb's ``f0`` uses for `ion`, read from the
    database file shipped with xraydb through the standard library's sqlite3 (read
    only), without importing xraydb and its database layer (about 0.4-0.6 s); None when
    the file or row cannot be read that way (callers then ask xraydb itself)."""
    if ion in _FIT_ROWS:
        return _FIT_ROWS[ion]
    row = None
    try:
        import importlib.util
        import json

        spec = importlib.util.find_spec("xraydb")
        where = list(spec.submodule_search_locations or []) if spec else []
        path = Path(where[0]) / "xraydb.sqlite" if where else None
        if path is not None and path.is_file():
            con = sqlite3.connect(f"{path.as_uri()}?mode=ro", uri=True)
            try:
                # xraydb's f0 takes the first row (table order) whose ion matches
                found = con.execute("SELECT offset, scale, exponents FROM Waasmaier WHERE "
                                    "ion = ? ORDER BY rowid LIMIT 1", (ion,)).fetchone()
            finally:
                con.close()
            if found is not None:
                scales, exps = json.loads(found[1]), json.loads(found[2])
                if (len(scales) == len(exps)
                        and all(isinstance(v, (int, float)) for v in [found[0], *scales, *exps])):
                    row = (found[0], scales, exps)
    except (ImportError, ValueError, OSError, sqlite3.Error):
        row = None
    _FIT_ROWS[ion] = row
    return row


def _f0(element: str, x: np.ndarray) -> np.ndarray:
    try:
        symbol = normalise_symbol(element)
        symbol = "H" if symbol == "D" else symbol  # isotopes scatter alike
        row = _fit_row(symbol.title())
        if row is not None:
            # xraydb's f0, term by term in its order (the same float64 operations)
            f0: Any = row[0]
            for s, e in zip(row[1], row[2], strict=True):
                f0 += s * np.exp(-e * x * x)
            return np.asarray(f0, dtype=float).reshape(x.shape)
        return np.asarray(_xraydb().f0(symbol, x),
                          dtype=float).reshape(x.shape)
    except (ValueError, KeyError, TypeError) as exc:
        raise SchemaError(
            f"No X-ray form factor for element {element!r} in xraydb. Hint: use element "
            "symbols such as 'C', 'O', 'H'."
        ) from exc


def xray_form_factor(element: str, q: npt.ArrayLike) -> np.ndarray:
    """X-ray atomic form factor ``f_X(q)`` in electron units.

    Parameters
    ----------
    element : str
        Element symbol.
    q : array_like, shape (n_q,)
        Momentum transfer ``4 pi sin(theta)/lambda`` in inverse Angstrom.

    Returns
    -------
    ndarray, shape (n_q,)
        xraydb's ``f0(element, q / (4 pi))``.

    Examples
    --------
    >>> round(float(xray_form_factor("C", [0.0])[0]), 2)
    6.0
    """
    q = _check_q(q)
    return _f0(element, q_to_x(q))


def electron_form_factor(element: str, q: npt.ArrayLike) -> np.ndarray:
    """Electron scattering factor ``f_e(q)`` in Angstrom (Mott-Bethe from ``f_X``).

    Parameters
    ----------
    element : str
        Element symbol.
    q : array_like, shape (n_q,)
        Momentum transfer in inverse Angstrom.

    Returns
    -------
    ndarray, shape (n_q,)
        ``(Z - f_X) / (8 pi^2 a0 x^2)`` with ``x = q / (4 pi)``; see the module text for
        ``x < MOTT_BETHE_X_MIN``.
    """
    q = _check_q(q)
    x = q_to_x(q)
    z = float(atomic_numbers_for([element])[0])
    pref = 1.0 / (8.0 * math.pi**2 * BOHR_ANGSTROM)
    out = np.empty_like(x)
    big = x >= MOTT_BETHE_X_MIN
    if np.any(big):
        out[big] = pref * (z - _f0(element, x[big])) / x[big] ** 2
    if np.any(~big):
        xs = np.maximum(x[~big], _X_SMOOTH_MIN)
        f_zero = float(_f0(element, np.zeros(1))[0])
        smooth = (f_zero - _f0(element, xs)) / xs**2
        mismatch = (z - f_zero) / MOTT_BETHE_X_MIN**2
        out[~big] = pref * (smooth + mismatch)
    return out


def form_factor_table(symbols: Sequence[str], q: npt.ArrayLike, *, kind: str = "xray"
                      ) -> tuple[list[str], np.ndarray, np.ndarray]:
    """Form factors of the distinct elements of a molecule on a q grid.

    Parameters
    ----------
    symbols : sequence of str, length n_atoms
        Element symbols of the atoms.
    q : array_like, shape (n_q,)
        Momentum transfer in inverse Angstrom.
    kind : {"xray", "electron"}

    Returns
    -------
    elements : list of str
        Distinct elements, in order of first appearance.
    element_of_atom : ndarray of int64, shape (n_atoms,)
        Index into `elements` for each atom.
    table : ndarray, shape (n_elements, n_q)
        ``f(q)`` per element (electron units for X-rays, Angstrom for electrons).
    """
    if kind not in ("xray", "electron"):
        raise SchemaError(f"The 'kind' parameter must be 'xray' or 'electron'. Got {kind!r} "
                          "instead.")
    elements: list[str] = []
    for s in symbols:
        if s not in elements:
            elements.append(s)
    index = np.array([elements.index(s) for s in symbols], dtype=np.int64)
    fn = xray_form_factor if kind == "xray" else electron_form_factor
    table = np.array([fn(e, q) for e in elements]).reshape(len(elements), -1)
    return elements, index, table
