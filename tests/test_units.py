"""Unit constants and conversion factors of ensemblelab.units.

Reference: CODATA 2022 via scipy.constants (compared at rel 1e-12), and literal
values (CODATA 2022 via scipy 1.17.1, computed independently (not published); valid for
CODATA 2018 too at rel 1e-8).
"""

from __future__ import annotations

import math

import pytest
from scipy import constants as sc

from ensemblelab import units

PC = sc.physical_constants


@pytest.mark.parametrize(
    ("value", "reference"),
    [
        # CODATA 2022 via scipy.constants
        (units.HBAR_EV_FS, PC["reduced Planck constant in eV s"][0] * 1e15),
        (units.HARTREE_EV, PC["Hartree energy in eV"][0]),
        (units.BOHR_ANGSTROM, sc.value("Bohr radius") / sc.angstrom),
        (units.AU_TIME_FS, PC["atomic unit of time"][0] / sc.femto),
        (units.KB_EV, sc.k / sc.e),
        (units.HARTREE_CM1, PC["hartree-inverse meter relationship"][0] / 100),
        (units.FOUR_LN2, 4 * math.log(2)),
    ],
)
def test_units_constants_match_scipy_codata(value, reference):
    assert value == pytest.approx(reference, rel=1e-12)


@pytest.mark.parametrize(
    ("value", "literal"),
    [
        # literals, CODATA 2022 via scipy.constants (computed independently, not published)
        (units.HBAR_EV_FS, 0.6582119569509),
        (units.HARTREE_EV, 27.211386245981),
        (units.BOHR_ANGSTROM, 0.529177210544),
        (units.AU_TIME_FS, 0.024188843265864),
        (1.0 / units.AU_TIME_FS, 41.341373335),
        (units.AMU_ME, 1822.888486283),
        (units.HARTREE_CM1, 219474.63136314),
        (units.KB_EV / units.HARTREE_EV, 3.166811563e-6),
        (units.DEBYE_EA0, 0.39343027),
        (units.BOHR_ANGSTROM / units.AU_TIME_FS, 21.876912622),
        (units.FOUR_LN2 * units.HBAR_EV_FS, 1.8249510),
    ],
)
def test_units_constants_match_codata_2022_literals(value, literal):
    assert value == pytest.approx(literal, rel=1e-8 if literal != 1.8249510 else 1e-7)


def test_units_amu_in_electron_masses():
    # CODATA 2022 via scipy.constants: m_u/m_e and 1/(m_e in u) differ by ~2.5e-12 relative
    # because of rounding in the tabulated values, so rel 1e-11
    assert units.AMU_ME == pytest.approx(1.0 / PC["electron mass in u"][0], rel=1e-11)
    assert units.AMU_ME == pytest.approx(PC["proton-electron mass ratio"][0]
                                         / PC["proton mass in u"][0], rel=1e-11)


def test_units_energy_factors():
    # CODATA 2022 via scipy.constants: kcal/mol and kJ/mol through N_A and e
    assert units.energy_factor("eV") == 1.0
    assert units.energy_factor("hartree") == units.energy_factor("Eh") == units.HARTREE_EV
    assert units.energy_factor("kJ/mol") == pytest.approx(1e3 / (sc.N_A * sc.e), rel=1e-12)
    assert units.energy_factor("kcal/mol") == pytest.approx(4.184e3 / (sc.N_A * sc.e),
                                                            rel=1e-12)
    # 1 eV = 96.485... kJ/mol (Faraday constant / 1000, CODATA 2022 via scipy.constants)
    assert 1 / units.energy_factor("kJ/mol") == pytest.approx(sc.physical_constants[
        "Faraday constant"][0] / 1e3, rel=1e-12)
    # 1 hartree = 219474.63136314 cm-1 (CODATA 2022 via scipy.constants)
    assert units.HARTREE_EV / units.energy_factor("cm-1") == pytest.approx(219474.63136314,
                                                                           rel=1e-8)


def test_units_time_and_length_factors():
    assert units.time_factor("ps") == 1000.0 and units.time_factor("as") == 1e-3
    assert units.time_factor("au") == pytest.approx(0.024188843265864, rel=1e-8)  # CODATA 2022
    assert units.length_factor("nm") == 10.0 and units.length_factor("pm") == 0.01
    assert units.length_factor("bohr") == pytest.approx(0.529177210544, rel=1e-8)  # CODATA 2022


@pytest.mark.parametrize("func", [units.energy_factor, units.time_factor, units.length_factor])
def test_units_unknown_unit_lists_choices(func):
    with pytest.raises(ValueError, match=r"Unknown \w+ unit 'parsec'; expected one of \["):
        func("parsec")
