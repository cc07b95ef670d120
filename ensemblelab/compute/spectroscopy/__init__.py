"""Spectroscopy: pulses, cross sections, doorway weights, sticks, photoelectron maps,
contributions of snapshots to a region, diabatic decomposition and map comparison.

The time-resolved photoelectron spectrum is simulated in the classical doorway-window
picture (J. Chem. Phys. 2004, "Classical doorway-window approximation for time-resolved
pump-probe spectra"); see :func:`compute_trpes`.
"""

from __future__ import annotations

from .compare import MapComparison, compare_maps, resample_map
from .cross_sections import (
    AnionThresholdLaw,
    CrossSection,
    DysonNorm,
    DysonTimes,
    HydrogenicPWA,
    cross_section_from_description,
    resolve_cross_section,
)
from .diabatic import (
    GMHResult,
    boys_rotation,
    diabatic_hamiltonian,
    ensemble_adt,
    gmh_two_state,
    loewdin,
    propagate_adt,
)
from .extent import signal_extent
from .pulses import GaussianPulse, cross_correlation, cross_correlation_fwhm
from .spectra import (
    TRPESModel,
    compute_trpes,
    contributions,
    doorway_factor,
    doorway_weights,
    ground_state_ionisation_fraction,
    prepare_sticks,
    region_intensity,
    trajectory_weights,
)

__all__ = [
    "GaussianPulse",
    "cross_correlation",
    "cross_correlation_fwhm",
    "compute_trpes",
    "contributions",
    "region_intensity",
    "prepare_sticks",
    "TRPESModel",
    "ground_state_ionisation_fraction",
    "doorway_weights",
    "doorway_factor",
    "trajectory_weights",
    "CrossSection",
    "DysonNorm",
    "DysonTimes",
    "HydrogenicPWA",
    "AnionThresholdLaw",
    "resolve_cross_section",
    "cross_section_from_description",
    "ensemble_adt",
    "loewdin",
    "propagate_adt",
    "boys_rotation",
    "gmh_two_state",
    "GMHResult",
    "diabatic_hamiltonian",
    "compare_maps",
    "MapComparison",
    "resample_map",
    "signal_extent",
]
