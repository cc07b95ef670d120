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

from ._exports import lazy_exports
from .compute import DOMAINS
from .data import Ensemble
from .errors import (
    DegenerateFitWarning,
    EnsembleWarning,
    MissingDependencyError,
    ParseError,
    SchemaError,
    StoreError,
    UnitWarning,
    UnknownFormatError,
)

__version__ = "0.1.0"

#: names of the layers below the compute domains, imported on first use
_IO_AND_DATA: dict[str, str] = {
    "load": "ensemblelab.io",
    "save": "ensemblelab.io",
    "load_measured_map": "ensemblelab.io.maps",
    "write_representatives": "ensemblelab.io.structures",
    "save_map": "ensemblelab.io.maps",
    "load_map": "ensemblelab.io.maps",
    "TRPESMap": "ensemblelab.data.spectrum",
    "nonfinite_report": "ensemblelab.data.checks",
    "snapshot_coverage": "ensemblelab.data.checks",
    "join_snapshot_table": "ensemblelab.io.join",
    "load_plain_xyz": "ensemblelab.io.plain",
    "StickSpectrum": "ensemblelab.data.spectrum",
    "ScatteringMap": "ensemblelab.data.observables",
    "AbsorptionMap": "ensemblelab.data.observables",
    "save_observable_map": "ensemblelab.io.observable_maps",
    "load_observable_map": "ensemblelab.io.observable_maps",
}

_COMPUTE, _compute_getattr, _ = lazy_exports("ensemblelab", DOMAINS, globals())

__all__ = [
    "__version__",
    "Ensemble",
    "DegenerateFitWarning",
    "EnsembleWarning",
    "MissingDependencyError",
    "ParseError",
    "SchemaError",
    "StoreError",
    "UnitWarning",
    "UnknownFormatError",
    *_IO_AND_DATA,
    *_COMPUTE,
]


def __getattr__(name: str) -> Any:
    if name in _IO_AND_DATA:
        value = getattr(importlib.import_module(_IO_AND_DATA[name]), name)
        globals()[name] = value
        return value
    if name in ("demo", "io", "compute", "data", "units", "testing", "plotting"):
        return importlib.import_module(f"ensemblelab.{name}")
    return _compute_getattr(name)


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))
