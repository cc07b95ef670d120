"""Layer 3: computations on Ensembles (numpy, scipy, pandas, scikit-learn; never widgets).

Submodules are imported on first use of a name listed here.
"""

from __future__ import annotations

import importlib
from typing import Any

_LAZY: dict[str, str] = {
    "prepare_sticks": "ensemblelab.compute.spectra",
    "region_intensity": "ensemblelab.compute.spectra",
    "ground_state_ionisation_fraction": "ensemblelab.compute.spectra",
    "doorway_weights": "ensemblelab.compute.spectra",
    "compare_maps": "ensemblelab.compute.compare",
    "population_consistency": "ensemblelab.compute.populations",
    "cluster_hops": "ensemblelab.compute.clustering",
    "OutlierThresholds": "ensemblelab.compute.outliers",
    "kabsch_align": "ensemblelab.compute.geometry",
    "rmsd": "ensemblelab.compute.geometry",
    "align_ensemble": "ensemblelab.compute.geometry",
    "cluster_representatives": "ensemblelab.compute.representatives",
    "band_representatives": "ensemblelab.compute.representatives",
    "time_window_representatives": "ensemblelab.compute.representatives",
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
