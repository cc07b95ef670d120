"""Naive reference twin of the map bootstrap (private; tests only).

Builds every resampled ensemble explicitly (trajectory ``n`` copied ``c_bn`` times under
new ids) and runs :func:`~.maps.compute_trpes` on it: slow, obviously right.
"""

from __future__ import annotations

import copy
import warnings
from typing import Any

import numpy as np
import pandas as pd

from ...data.ensemble import SNAPSHOT_ARRAYS, TRAJECTORY_ARRAYS, Ensemble
from .maps import compute_trpes

__all__ = ["resample_ensemble", "naive_bootstrap_maps"]


def resample_ensemble(ens: Ensemble, counts: np.ndarray) -> Ensemble:
    """The ensemble with trajectory row ``n`` repeated ``counts[n]`` times (new ids 0, 1, ...).

    Parameters
    ----------
    ens : Ensemble
    counts : ndarray of int, shape (n_trajectories,)

    Returns
    -------
    Ensemble
    """
    tix = ens.traj_index
    rows_of = [np.flatnonzero(tix == n) for n in range(ens.n_trajectories)]
    rows, new_ids, traj_rows = [], [], []
    nid = 0
    for n, c in enumerate(np.asarray(counts, dtype=np.int64)):
        for _ in range(int(c)):
            rows.append(rows_of[n])
            new_ids.append(np.full(rows_of[n].size, nid))
            traj_rows.append(n)
            nid += 1
    r = np.concatenate(rows)
    frame = ens.snapshots.iloc[r].reset_index(drop=True)
    frame["traj"] = np.concatenate(new_ids)
    frame["snapshot"] = np.arange(r.size)
    trajs = ens.trajectories.iloc[traj_rows].reset_index(drop=True)
    trajs = trajs[[c for c in trajs.columns if c not in ("n_steps", "t_end")]]
    trajs["traj"] = np.arange(nid)
    arrays: dict[str, Any] = {}
    for name in SNAPSHOT_ARRAYS:
        v = getattr(ens, name)
        arrays[name] = None if v is None else v[r]
    for name in TRAJECTORY_ARRAYS:
        v = getattr(ens, name)
        arrays[name] = None if v is None else v[np.array(traj_rows)]
    return Ensemble(snapshots=frame, geometries=ens.geometries[r], energies=ens.energies[r],
                    symbols=ens.symbols, masses=ens.masses, trajectories=pd.DataFrame(trajs),
                    state_labels=ens.state_labels, cation_labels=ens.cation_labels,
                    metadata=copy.deepcopy(ens.metadata), **arrays)


def naive_bootstrap_maps(ens: Ensemble, counts: np.ndarray, **kwargs: Any
                         ) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """Maps of every resample by :func:`compute_trpes` on the resampled ensemble.

    Parameters
    ----------
    ens : Ensemble
    counts : ndarray, shape (n_boot, n_trajectories)
        Multiplicities (:func:`._kernels_bootstrap.bootstrap_counts`).
    **kwargs
        Arguments of :func:`compute_trpes`.

    Returns
    -------
    total : ndarray, shape (n_boot, n_delays, n_energies)
    components : dict of str to ndarray, shape (n_boot, n_delays, n_energies)
    """
    totals, comps = [], []
    for row in counts:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            m = compute_trpes(resample_ensemble(ens, row), progress=False, **kwargs)
        totals.append(m.intensity)
        comps.append(m.components)
    labels = list(comps[0]) if comps else []
    return np.stack(totals), {lab: np.stack([c[lab] for c in comps]) for lab in labels}
