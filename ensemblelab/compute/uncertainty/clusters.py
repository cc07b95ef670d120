"""Cluster fractions with intervals at the trajectory level.

Snapshots of one trajectory are correlated (a trajectory that sits in a cluster sits
there for many steps), so an interval that counts snapshots as independent draws is too
narrow. :func:`cluster_fraction_intervals` resamples whole trajectories instead (their
weights kept), through :func:`~.shares.grouped_shares`.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import numpy.typing as npt

from .shares import grouped_shares

__all__ = ["cluster_fraction_intervals"]


def cluster_fraction_intervals(
    labels: npt.ArrayLike,
    names: npt.ArrayLike,
    traj: npt.ArrayLike,
    weights: npt.ArrayLike,
    *,
    ci: float = 0.95,
    n_boot: int = 1000,
    random_state: int | np.random.Generator | None = 0,
) -> tuple[np.ndarray, np.ndarray]:
    """Bootstrap interval of the weighted fraction of each named cluster.

    Parameters
    ----------
    labels : array_like, shape (n_rows,)
        Cluster name of every row (snapshot or hop).
    names : array_like, shape (n_clusters,)
        The clusters to report, in the order wanted.
    traj : array_like, shape (n_rows,)
        Trajectory id of every row: the resampled unit.
    weights : array_like, shape (n_rows,)
        Weight of every row (its trajectory's weight).
    ci, n_boot, random_state
        Level, resamples and seed of the percentile bootstrap over trajectories.

    Returns
    -------
    lower, upper : ndarray, shape (n_clusters,)
        NaN for a name without rows; 0 bounds for a cluster of zero weight.

    Examples
    --------
    >>> lo, hi = cluster_fraction_intervals(["a", "a", "b", "b"], ["a", "b"], [0, 0, 1, 2],
    ...                                     [1.0, 1.0, 1.0, 1.0], n_boot=200)
    >>> bool(lo[0] <= 0.5 <= hi[0])
    True
    """
    lab = np.asarray(labels).astype(str)
    w = np.asarray(weights, dtype=np.float64)
    table = grouped_shares(w, lab, np.asarray(traj), ci=ci, n_boot=n_boot,
                           random_state=random_state).set_index("key")
    wanted: Any = np.asarray(names).astype(str)
    lower = table["lower"].reindex(wanted).to_numpy(np.float64, copy=True)
    upper = table["upper"].reindex(wanted).to_numpy(np.float64, copy=True)
    present = np.isin(wanted, lab)
    zero = present & np.isnan(lower)  # rows of zero weight
    lower[zero] = 0.0
    upper[zero] = 0.0
    return lower, upper
