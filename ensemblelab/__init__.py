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
    "compute_trpes": "ensemblelab.compute.spectra",
    "contributions": "ensemblelab.compute.spectra",
    # populations and kinetics
    "populations": "ensemblelab.compute.populations",
    "fit_kinetics": "ensemblelab.compute.kinetics",
    "fit_global": "ensemblelab.compute.global_fit",
    # structures
    "cluster_snapshots": "ensemblelab.compute.clustering",
    "flag_trajectories": "ensemblelab.compute.outliers",
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
    "load",
    "save",
    "GaussianPulse",
    "TRPESMap",
    "compute_trpes",
    "contributions",
    "populations",
    "fit_kinetics",
    "fit_global",
    "cluster_snapshots",
    "flag_trajectories",
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
