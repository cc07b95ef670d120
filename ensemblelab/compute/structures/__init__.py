"""Structures: alignment and RMSD, descriptors, clustering, representative structures and
trajectory quality flags."""

from __future__ import annotations

from .clustering import ClusterResult, HopClusterResult, cluster_hops, cluster_snapshots
from .descriptors import AlignedCartesian, CoulombEigenvalues, InternalCoordinates, InverseDistances
from .geometry import (
    AlignmentResult,
    align_ensemble,
    connectivity,
    kabsch_align,
    mean_structure,
    permutation_rmsd,
    rmsd,
)
from .outliers import BROKEN_KINDS, WARNING_KINDS, OutlierThresholds, flag_trajectories
from .representatives import (
    Representatives,
    band_representatives,
    cluster_representatives,
    time_window_representatives,
)

__all__ = [
    "kabsch_align",
    "rmsd",
    "permutation_rmsd",
    "mean_structure",
    "align_ensemble",
    "AlignmentResult",
    "connectivity",
    "InternalCoordinates",
    "InverseDistances",
    "CoulombEigenvalues",
    "AlignedCartesian",
    "cluster_snapshots",
    "cluster_hops",
    "ClusterResult",
    "HopClusterResult",
    "flag_trajectories",
    "OutlierThresholds",
    "BROKEN_KINDS",
    "WARNING_KINDS",
    "cluster_representatives",
    "band_representatives",
    "time_window_representatives",
    "Representatives",
]
