"""ensemblelab: from a surface-hopping trajectory ensemble to populations, lifetimes,
assigned time-resolved photoelectron spectra and representative structures.

Internal units: fs, eV, Angstrom, amu (see :mod:`ensemblelab.units`).

The data model is imported eagerly; loaders and compute functions are imported
on first use, so ``import ensemblelab`` stays fast and never imports the widget
stack (use ``import ensemblelab.widgets`` explicitly).
"""

from __future__ import annotations

import importlib
from typing import Any

from .data import Ensemble
from .errors import (
    EnsembleWarning,
    MissingDependencyError,
    ParseError,
    SchemaError,
    StoreError,
    UnitWarning,
    UnknownFormatError,
)

__version__ = "0.1.0"

#: public name -> module that defines it (imported on first access)
_LAZY: dict[str, str] = {
    # io
    "load": "ensemblelab.io",
    "save": "ensemblelab.io",
    # spectroscopy
    "GaussianPulse": "ensemblelab.compute.pulses",
    "TRPESMap": "ensemblelab.data.spectrum",
    "StickSpectrum": "ensemblelab.data.spectrum",
    "compute_trpes": "ensemblelab.compute.spectra",
    "contributions": "ensemblelab.compute.spectra",
    "prepare_sticks": "ensemblelab.compute.spectra",
    "region_intensity": "ensemblelab.compute.spectra",
    "ground_state_ionisation_fraction": "ensemblelab.compute.spectra",
    "doorway_weights": "ensemblelab.compute.spectra",
    "compare_maps": "ensemblelab.compute.compare",
    "load_measured_map": "ensemblelab.io.maps",
    # populations and kinetics
    "populations": "ensemblelab.compute.populations",
    "population_consistency": "ensemblelab.compute.populations",
    "fit_kinetics": "ensemblelab.compute.kinetics",
    "fit_global": "ensemblelab.compute.global_fit",
    # structures
    "cluster_snapshots": "ensemblelab.compute.clustering",
    "cluster_hops": "ensemblelab.compute.clustering",
    "flag_trajectories": "ensemblelab.compute.outliers",
    "OutlierThresholds": "ensemblelab.compute.outliers",
    "kabsch_align": "ensemblelab.compute.geometry",
    "rmsd": "ensemblelab.compute.geometry",
    "align_ensemble": "ensemblelab.compute.geometry",
    "cluster_representatives": "ensemblelab.compute.representatives",
    "band_representatives": "ensemblelab.compute.representatives",
    "time_window_representatives": "ensemblelab.compute.representatives",
}

__all__ = [
    "__version__",
    "Ensemble",
    "EnsembleWarning",
    "MissingDependencyError",
    "ParseError",
    "SchemaError",
    "StoreError",
    "UnitWarning",
    "UnknownFormatError",
    # io
    "load",
    "save",
    "load_measured_map",
    # spectroscopy
    "GaussianPulse",
    "TRPESMap",
    "StickSpectrum",
    "compute_trpes",
    "contributions",
    "prepare_sticks",
    "region_intensity",
    "ground_state_ionisation_fraction",
    "doorway_weights",
    "compare_maps",
    # populations and kinetics
    "populations",
    "population_consistency",
    "fit_kinetics",
    "fit_global",
    # structures
    "cluster_snapshots",
    "cluster_hops",
    "flag_trajectories",
    "OutlierThresholds",
    "kabsch_align",
    "rmsd",
    "align_ensemble",
    "cluster_representatives",
    "band_representatives",
    "time_window_representatives",
]


def __getattr__(name: str) -> Any:
    if name in _LAZY:
        value = getattr(importlib.import_module(_LAZY[name]), name)
        globals()[name] = value
        return value
    if name in ("demo", "io", "compute", "data", "units", "testing", "plotting"):
        return importlib.import_module(f"ensemblelab.{name}")
    raise AttributeError(f"module 'ensemblelab' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))
