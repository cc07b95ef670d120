"""Kinetics: state populations with intervals, kinetic-scheme fits of populations, and
global fits of simulated or measured maps."""

from __future__ import annotations

from .global_fit import GlobalFitResult, decay_profiles, fit_global
from .populations import (
    POPULATION_KINDS,
    PopulationArrays,
    population_arrays,
    population_consistency,
    populations,
)
from .rates import KineticsResult, fit_kinetics
from .schemes import KINETIC_SCHEMES

__all__ = [
    "populations",
    "population_arrays",
    "population_consistency",
    "PopulationArrays",
    "POPULATION_KINDS",
    "fit_kinetics",
    "KineticsResult",
    "KINETIC_SCHEMES",
    "fit_global",
    "GlobalFitResult",
    "decay_profiles",
]
