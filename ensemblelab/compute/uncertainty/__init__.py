"""Uncertainty and convergence: trajectory-bootstrap intervals on shares, decomposition
fractions, cluster fractions and lifetimes, and how the error shrinks with the number of
trajectories (:func:`convergence`).

Trajectories are the independent units: every interval here resamples whole trajectories
(weights kept) with the package's one spelling ``interval="bootstrap"``, ``ci``,
``n_boot``, ``random_state``.
"""

from __future__ import annotations

from .clusters import cluster_fraction_intervals
from .convergence import CONVERGENCE_QUANTITIES, ConvergenceResult, convergence
from .decomposition import DECOMPOSITIONS, decomposition_fractions
from .lifetimes import LifetimeUncertainty, global_fit_bootstrap, kinetic_lifetime_uncertainty
from .shares import band_share_table, format_share, grouped_shares

__all__ = [
    "grouped_shares",
    "band_share_table",
    "format_share",
    "decomposition_fractions",
    "DECOMPOSITIONS",
    "cluster_fraction_intervals",
    "LifetimeUncertainty",
    "kinetic_lifetime_uncertainty",
    "global_fit_bootstrap",
    "convergence",
    "ConvergenceResult",
    "CONVERGENCE_QUANTITIES",
]
