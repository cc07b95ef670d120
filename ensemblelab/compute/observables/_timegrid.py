"""Shared time handling of the observable maps (private module with public helpers).

Per-snapshot values are put on the uniform internal time grid of
:func:`ensemblelab.compute.spectroscopy.maps.time_grid` (a snapshot between two grid
points is split linearly between them, numerator and alive weight alike), divided by
the alive weight per grid point and taken to the delays by the cross-correlation
matrix of the photoelectron map (:func:`time_matrix`, pure signal zero before launch).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from scipy import sparse

from ..spectroscopy._checks import EDGE_SIGMAS, TIME_CUTOFF, time_bins
from ..spectroscopy._kernels_broadening import time_matrix
from ..spectroscopy.pulses import GaussianPulse, cross_correlation_sigma

__all__ = ["deposit_matrix", "delay_matrix", "cc_sigma", "first_rows", "alive_on_delays",
           "unknown_delays", "EDGE_SIGMAS", "replicate_deposit", "poisson_counts",
           "percentile_band", "check_boot"]


def deposit_matrix(time: np.ndarray, group: np.ndarray, weight: np.ndarray, grid: dict[str, Any],
                   n_groups: int) -> sparse.csr_matrix:
    """Sparse (n_groups * n_time, n_rows) matrix putting rows on the (group, time) grid.

    Parameters
    ----------
    time : ndarray, shape (n_rows,)
        Snapshot times (fs).
    group : ndarray of int, shape (n_rows,)
        Group (0 .. n_groups - 1) of each row.
    weight : ndarray, shape (n_rows,)
        Weight of each row (0 drops it).
    grid : dict
        ``start``, ``dt``, ``n_time`` of the time grid.
    n_groups : int
    """
    n_time = int(grid["n_time"])
    j, frac = time_bins(np.asarray(time, dtype=float), grid["start"], grid["dt"])
    f = np.zeros(j.size) if frac is None else frac
    cols = np.arange(j.size)
    base = np.asarray(group, dtype=np.int64) * n_time + j
    rows = np.concatenate([base, base + 1])
    vals = np.concatenate([weight * (1.0 - f), weight * f])
    cols2 = np.concatenate([cols, cols])
    keep = vals != 0
    return sparse.csr_matrix((vals[keep], (rows[keep], cols2[keep])),
                             shape=(n_groups * n_time, j.size))


def cc_sigma(pump: GaussianPulse | None, probe: GaussianPulse | None, convolve: bool
             ) -> float | None:
    """Cross-correlation standard deviation (fs), or None for the pure signal."""
    if not convolve:
        return None
    if pump is not None and probe is not None:
        return cross_correlation_sigma(pump, probe)
    pulse = probe or pump
    if pulse is None:
        return None
    return pulse.effective_sigma


def delay_matrix(delays: np.ndarray, grid: dict[str, Any], sigma: float | None) -> np.ndarray:
    """Matrix (n_delays, n_time) from the internal grid to the delays (cf. TRPES maps)."""
    dt, start, n_time = grid["dt"], grid["start"], int(grid["n_time"])
    times = start + dt * np.arange(n_time)
    if sigma is None:
        return time_matrix(delays, times, sigma=None, t_known=grid["t_known"])
    lo = min(float(delays.min()), start) - TIME_CUTOFF * sigma
    j_lo = int(math.floor((lo - start) / dt)) - 1
    ext = start + dt * np.arange(j_lo, n_time)
    c = time_matrix(delays, ext, sigma=sigma, t_known=grid["t_known"], cutoff=TIME_CUTOFF,
                    t_launch=0.0 if start == 0.0 else None)
    return np.ascontiguousarray(c[:, -j_lo:])


def first_rows(traj: np.ndarray) -> np.ndarray:
    """Row of the first snapshot of each trajectory (rows sorted by trajectory)."""
    if traj.size == 0:
        return np.zeros(0, dtype=np.int64)
    return np.r_[0, np.flatnonzero(traj[1:] != traj[:-1]) + 1].astype(np.int64)


def alive_on_delays(delays: np.ndarray, grid: dict[str, Any], alive: np.ndarray) -> np.ndarray:
    """Alive weight on the internal grid interpolated to the delays (0 after the end)."""
    times = grid["start"] + grid["dt"] * np.arange(int(grid["n_time"]))
    return np.interp(np.clip(delays, grid["start"], None), times, alive, right=0.0)


def unknown_delays(delays: np.ndarray, grid: dict[str, Any], cmat: np.ndarray) -> np.ndarray:
    """Delays after the last trajectory's end that no known signal reaches (NaN there).

    The difference signal is unknown after every trajectory has ended (not zero): such
    delays are reported as NaN rather than as "no change".
    """
    return (cmat.sum(axis=1) == 0) & (delays > grid["t_known"])


def check_boot(n_boot: int, ci: float) -> tuple[int, float]:
    """Validated number of bootstrap replicates (>= 0) and interval level (0 < ci < 1)."""
    from ...errors import SchemaError

    if isinstance(n_boot, bool) or not isinstance(n_boot, int | np.integer) or n_boot < 0:
        raise SchemaError(f"The 'n_boot' parameter must be an int >= 0. Got {n_boot!r} instead.")
    if not (isinstance(ci, float | int) and 0.0 < float(ci) < 1.0):
        raise SchemaError(f"The 'ci' parameter must be a float in (0, 1). Got {ci!r} instead.")
    return int(n_boot), float(ci)


def poisson_counts(n_boot: int, n_trajectories: int, random_state: Any) -> np.ndarray:
    """Poisson(1) counts per (replicate, trajectory), shape (n_boot, n_trajectories).

    The Poisson bootstrap (asymptotically the multinomial bootstrap over trajectories,
    common practice for large ensembles): drawn once for the whole ensemble, so a
    chunked store and the in-memory ensemble get the same replicates.
    """
    rng = np.random.default_rng(random_state)
    return rng.poisson(1.0, size=(n_boot, n_trajectories)).astype(float)


def replicate_deposit(time: np.ndarray, weights: np.ndarray, grid: dict[str, Any]
                      ) -> sparse.csr_matrix:
    """Sparse (n_boot * n_time, n_rows) deposit of rows with per-replicate weights.

    Parameters
    ----------
    time : ndarray, shape (n_rows,)
    weights : ndarray, shape (n_boot, n_rows)
    grid : dict
    """
    n_boot, n = weights.shape
    n_time = int(grid["n_time"])
    j, frac = time_bins(np.asarray(time, dtype=float), grid["start"], grid["dt"])
    f = np.zeros(j.size) if frac is None else frac
    base = (np.arange(n_boot)[:, None] * n_time + j[None, :]).ravel()
    cols = np.tile(np.arange(n), n_boot)
    lo = (weights * (1.0 - f)[None, :]).ravel()
    hi = (weights * f[None, :]).ravel()
    rows = np.concatenate([base, base + 1])
    vals = np.concatenate([lo, hi])
    keep = vals != 0
    return sparse.csr_matrix((vals[keep], (rows[keep], np.concatenate([cols, cols])[keep])),
                             shape=(n_boot * n_time, n))


def percentile_band(replicates: np.ndarray, ci: float) -> tuple[np.ndarray, np.ndarray]:
    """Percentile interval over the first axis (NaN where every replicate is NaN)."""
    import warnings

    tail = 50.0 * (1.0 - ci)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN cells stay NaN
        lo, hi = np.nanpercentile(replicates, [tail, 100.0 - tail], axis=0)
    return lo, hi
