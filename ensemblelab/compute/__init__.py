"""Layer 3: computations on Ensembles (numpy, scipy, pandas, scikit-learn; never widgets).

Submodules are imported on first use of a name listed here.
"""

from __future__ import annotations

import importlib
from typing import Any

_LAZY: dict[str, str] = {
    "GaussianPulse": "ensemblelab.compute.pulses",
    "compute_trpes": "ensemblelab.compute.spectra",
    "contributions": "ensemblelab.compute.spectra",
    "populations": "ensemblelab.compute.populations",
    "fit_kinetics": "ensemblelab.compute.kinetics",
    "fit_global": "ensemblelab.compute.global_fit",
    "cluster_snapshots": "ensemblelab.compute.clustering",
    "flag_trajectories": "ensemblelab.compute.outliers",
}

__all__ = sorted(_LAZY)


def __getattr__(name: str) -> Any:
    if name in _LAZY:
        value = getattr(importlib.import_module(_LAZY[name]), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'ensemblelab.compute' has no attribute {name!r}")
