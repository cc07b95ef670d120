"""The single internal unit system of ensemblelab, and conversions at the edges.

Inside the package every quantity is in

* time: femtoseconds (fs)
* energy: electronvolts (eV); neutral and cation energies share one common zero
* length: angstrom (Angstrom)
* mass: unified atomic mass units (amu, Da)
* velocity: Angstrom / fs

It is not configurable. Loaders and writers convert at the boundary with the
constants below, which come from :mod:`scipy.constants` (CODATA 2022 for
scipy >= 1.15) and are never typed in by hand.
"""

from __future__ import annotations

from scipy import constants as _sc

__all__ = [
    "HBAR_EV_FS",
    "HARTREE_EV",
    "BOHR_ANGSTROM",
    "AU_TIME_FS",
    "AMU_ME",
    "KB_EV",
    "HARTREE_CM1",
    "DEBYE_EA0",
    "FOUR_LN2",
    "ENERGY_UNITS",
    "TIME_UNITS",
    "LENGTH_UNITS",
    "energy_factor",
    "time_factor",
    "length_factor",
]

_pc = _sc.physical_constants

#: reduced Planck constant in eV fs
HBAR_EV_FS: float = _pc["reduced Planck constant in eV s"][0] * 1e15
#: one hartree in eV
HARTREE_EV: float = _pc["hartree-electron volt relationship"][0]
#: one bohr in Angstrom
BOHR_ANGSTROM: float = _pc["Bohr radius"][0] * 1e10
#: the atomic unit of time in fs
AU_TIME_FS: float = _pc["atomic unit of time"][0] * 1e15
#: one amu in electron masses
AMU_ME: float = _pc["atomic mass constant"][0] / _pc["electron mass"][0]
#: Boltzmann constant in eV / K
KB_EV: float = _pc["Boltzmann constant in eV/K"][0]
#: one hartree in cm^-1
HARTREE_CM1: float = _pc["hartree-inverse meter relationship"][0] / 100.0
#: one debye in e * bohr
DEBYE_EA0: float = 1e-21 / _sc.c / _pc["atomic unit of electric dipole mom."][0]
#: 4 ln 2, the factor between a Gaussian's FWHM^2 and its exponent
FOUR_LN2: float = 4.0 * 0.6931471805599453

#: factors that take a value in the named unit to eV
ENERGY_UNITS: dict[str, float] = {
    "eV": 1.0,
    "hartree": HARTREE_EV,
    "Eh": HARTREE_EV,
    "au": HARTREE_EV,
    "kcal/mol": _sc.calorie * 1e3 / _sc.N_A / _sc.e,
    "kJ/mol": 1e3 / _sc.N_A / _sc.e,
    "cm-1": 1.0 / HARTREE_CM1 * HARTREE_EV,
}
#: factors that take a value in the named unit to fs
TIME_UNITS: dict[str, float] = {"fs": 1.0, "ps": 1e3, "au": AU_TIME_FS, "as": 1e-3}
#: factors that take a value in the named unit to Angstrom
LENGTH_UNITS: dict[str, float] = {
    "Angstrom": 1.0,
    "angstrom": 1.0,
    "A": 1.0,
    "bohr": BOHR_ANGSTROM,
    "au": BOHR_ANGSTROM,
    "nm": 10.0,
    "pm": 0.01,
}


def _factor(table: dict[str, float], unit: str, kind: str) -> float:
    try:
        return table[unit]
    except KeyError:
        raise ValueError(
            f"Unknown {kind} unit {unit!r}; expected one of {sorted(table)}."
        ) from None


def energy_factor(unit: str) -> float:
    """Return the factor that converts an energy in `unit` to eV.

    Parameters
    ----------
    unit : str
        One of the keys of :data:`ENERGY_UNITS` ("eV", "hartree", "kcal/mol", ...).

    Returns
    -------
    float
        Multiply values in `unit` by this to get eV.

    Examples
    --------
    >>> round(energy_factor("hartree"), 6)
    27.211386
    """
    return _factor(ENERGY_UNITS, unit, "energy")


def time_factor(unit: str) -> float:
    """Return the factor that converts a time in `unit` ("fs", "ps", "au", "as") to fs."""
    return _factor(TIME_UNITS, unit, "time")


def length_factor(unit: str) -> float:
    """Return the factor that converts a length in `unit` ("Angstrom", "bohr", "nm") to Angstrom."""
    return _factor(LENGTH_UNITS, unit, "length")
