"""Spectroscopy: pulses, cross sections, doorway weights, sticks, photoelectron maps,
contributions of snapshots to a region, diabatic decomposition and map comparison.

The time-resolved photoelectron spectrum is simulated in the classical doorway-window
picture (J. Chem. Phys. 2004, "Classical doorway-window approximation for time-resolved
pump-probe spectra"); see :func:`compute_trpes`.

Modules: :mod:`.weights` (doorway and trajectory weights), :mod:`.sampling` (the
``sampling`` and ``absorbing_state`` metadata, Kish effective size), :mod:`.resolution`
(constant or energy-proportional instrument resolution), :mod:`.sticks` (the sticks of
a block of trajectories), :mod:`.model` (moment histograms and broadening),
:mod:`.maps` (:func:`compute_trpes`), :mod:`.contributions` (region shares); the array
kernels are ``_kernels_deposit`` and ``_kernels_broadening`` with their naive twins in
``_reference_trpes``; :mod:`.fused` (``_kernels_fused``) forms and deposits the sticks
in one compiled pass where it applies (the numpy stick path is its twin);
:mod:`.cache` (:class:`StickCache`) redraws maps for new widths and photon energies.
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING, Any

from .cache import StickCache, prepare_map_cache
from .contributions import contributions, model_for_map, region_intensity
from .cross_sections import (
    AnionThresholdLaw,
    CrossSection,
    DysonNorm,
    DysonTimes,
    HydrogenicCoulomb,
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
from .maps import compute_trpes
from .model import TRPESModel
from .pulses import GaussianPulse, cross_correlation, cross_correlation_fwhm
from .resolution import ProportionalResolution
from .sampling import ensemble_absorbing_state, kish_effective_size, sampling_of
from .sticks import prepare_sticks
from .weights import (
    doorway_factor,
    doorway_weights,
    ground_state_ionisation_fraction,
    trajectory_weights,
)

if TYPE_CHECKING:
    from .compare import MapComparison, compare_maps, resample_map
    from .fit_measured import MeasuredFitResult, fit_measured_map

#: names imported on first use: their modules pull in scipy.stats and scipy.interpolate,
#: which the map itself never needs (keeps ``import ensemblelab.report`` light)
_LAZY = {"MapComparison": "compare", "compare_maps": "compare", "resample_map": "compare",
         "MeasuredFitResult": "fit_measured", "fit_measured_map": "fit_measured"}

__all__ = [
    "GaussianPulse",
    "cross_correlation",
    "cross_correlation_fwhm",
    "compute_trpes",
    "contributions",
    "region_intensity",
    "model_for_map",
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
    "HydrogenicCoulomb",
    "AnionThresholdLaw",
    "ProportionalResolution",
    "sampling_of",
    "ensemble_absorbing_state",
    "kish_effective_size",
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
    "fit_measured_map",
    "MeasuredFitResult",
    "StickCache",
    "prepare_map_cache",
]


def __getattr__(name: str) -> Any:
    if name in _LAZY:
        value = getattr(importlib.import_module(f"{__name__}.{_LAZY[name]}"), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
