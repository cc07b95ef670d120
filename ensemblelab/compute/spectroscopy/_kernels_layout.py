"""Compiled passes over a block's snapshot table for the fused TRPES pass (private).

* :func:`block_layout`: one pass over the trajectory-id and time columns giving the
  first row of every trajectory (rows of ``block.trajectories``), whether the
  snapshots are grouped by trajectory and sorted by time within each, and the time
  statistics of :func:`ensemblelab.compute.engine.time_statistics` (range and, when
  every step within the trajectories is the same, the median step) without the
  ``n_snapshots``-long temporaries of the numpy version;
* :func:`fused_energy_range`: :func:`.sticks.energy_range` in one pass;
* :func:`trajectory_rows`, :func:`last_rows`: each snapshot's trajectory row and each
  trajectory's last row.

The numpy versions stay the reference (tests compare both).
"""

from __future__ import annotations

import math
import threading
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from typing import Any, NamedTuple

import numpy as np

__all__ = ["Layout", "block_layout", "layout_available", "fused_energy_range",
           "trajectory_rows", "last_rows", "block_arrays", "MIN_SNAPSHOTS_PER_THREAD"]

#: fewest snapshots per thread before a second thread is worth it
MIN_SNAPSHOTS_PER_THREAD = 1 << 17

_LOCK = threading.Lock()
_COMPILED: dict[str, Any] = {}


def _layout(ids, traj, time, starts, stats):  # pragma: no cover - compiled by numba
    """Trajectory starts and time statistics in one pass (see :func:`block_layout`).

    Returns 0 when the snapshots are grouped by trajectory in the order of ``ids``
    and sorted by time within each (``starts`` filled), 1 when they are not grouped
    that way (or hold an unknown id), 2 when grouped but not sorted by time, 3 when a
    time is not finite. ``stats``: t_min, t_max, smallest and largest step within the
    trajectories, number of steps.
    """
    n = traj.shape[0]
    m = ids.shape[0]
    r = 0
    t_min = math.inf
    t_max = -math.inf
    d_min = math.inf
    d_max = -math.inf
    n_dt = 0
    flag = 0
    for i in range(n):
        t = time[i]
        if not math.isfinite(t):
            return 3
        t_min = min(t_min, t)
        t_max = max(t_max, t)
        v = traj[i]
        if i > 0 and v == traj[i - 1]:
            d = t - time[i - 1]
            if d < 0.0:
                flag = 2
            d_min = min(d_min, d)
            d_max = max(d_max, d)
            n_dt += 1
            continue
        while r < m and ids[r] < v:  # trajectories without snapshots
            starts[r] = i
            r += 1
        if r == m or ids[r] != v:
            return 1
        starts[r] = i
        r += 1
    while r <= m:
        starts[r] = n
        r += 1
    stats[0] = t_min
    stats[1] = t_max
    stats[2] = d_min
    stats[3] = d_max
    stats[4] = n_dt
    return flag


def _rows_of(ids, col, out):  # pragma: no cover - compiled by numba
    """Row of ``ids`` (sorted, unique) holding each ``col`` value, for ``col`` sorted;
    False (stop) at the first value out of order or not found."""
    j = 0
    for i in range(col.shape[0]):
        v = col[i]
        while j < ids.shape[0] and ids[j] < v:
            j += 1
        if j == ids.shape[0] or ids[j] != v:
            return False
        out[i] = j
    return True


def _range(active, energies, cat, dyson, by_state, shifts, total, tail, lo, hi,
           out):  # pragma: no cover - compiled by numba
    """Smallest and largest stick energy of snapshots ``lo:hi`` (excess above ``-tail``,
    data present)."""
    lo_e = math.inf
    hi_e = -math.inf
    for i in range(lo, hi):
        a = active[i]
        en = energies[i, a]
        s = a if by_state else 0
        for k in range(cat.shape[1]):
            ip = cat[i, k] - en + shifts[k]
            if not (math.isfinite(ip) and math.isfinite(dyson[i, s, k])):
                continue
            e = total - ip
            if e > -tail:
                lo_e = min(lo_e, e)
                hi_e = max(hi_e, e)
    out[0] = lo_e
    out[1] = hi_e


def _last(tix, time, out):  # pragma: no cover - compiled by numba
    """Row of the latest snapshot of each trajectory (ties: the later row)."""
    for i in range(tix.shape[0]):
        t = tix[i]
        r = out[t]
        if r < 0 or time[i] >= time[r]:
            out[t] = i


def _kernels() -> dict[str, Callable[..., Any]] | None:
    """The compiled functions, or None when numba is not installed."""
    if "layout" not in _COMPILED:
        with _LOCK:
            if "layout" not in _COMPILED:
                try:
                    import numba
                except ImportError:
                    _COMPILED["layout"] = None
                else:
                    jit = numba.njit(cache=True, nogil=True, boundscheck=False)
                    _COMPILED.update({"range": jit(_range), "last": jit(_last),
                                      "rows_of": jit(_rows_of)})
                    _COMPILED["layout"] = jit(_layout)
    return None if _COMPILED["layout"] is None else _COMPILED


def layout_available() -> bool:
    """True when the compiled passes can run (numba installed)."""
    return _kernels() is not None


class Layout(NamedTuple):
    """Where each trajectory's snapshots are and the block's time statistics.

    ``starts`` (n_trajectories + 1,): the snapshots of trajectory row ``r`` are rows
    ``starts[r]:starts[r + 1]``, or None when the block is not grouped by trajectory
    in the order of ``block.trajectories``. ``sorted``: grouped and sorted by time
    within each trajectory. ``stats``: ``t_min``, ``t_max``, ``dt`` and
    ``median_step`` as :func:`~ensemblelab.compute.engine.time_statistics` returns them,
    or None when the steps differ (the caller computes them with numpy).
    """

    starts: np.ndarray | None
    sorted: bool
    stats: dict[str, Any] | None


def block_layout(block: Any) -> Layout | None:
    """The :class:`Layout` of a block by one compiled pass, or None without numba (or
    with trajectory ids that are not integers)."""
    k = _kernels()
    if k is None:
        return None
    ids = block.trajectories["traj"].to_numpy()
    snap = block.snapshots
    traj = snap["traj"].to_numpy()
    if ids.dtype.kind not in "iu" or traj.dtype.kind not in "iu":
        return None
    time = np.ascontiguousarray(snap["time"].to_numpy(), dtype=np.float64)
    starts = np.empty(ids.shape[0] + 1, dtype=np.int64)
    st = np.zeros(5)
    flag = int(k["layout"](np.ascontiguousarray(ids, dtype=np.int64),
                           np.ascontiguousarray(traj, dtype=np.int64), time, starts, st))
    if flag in (1, 3):
        return Layout(None, False, None)
    stats = None
    if time.size == 0:
        stats = {"t_min": math.inf, "t_max": -math.inf,
                 "dt": (np.zeros(0), np.zeros(0, dtype=np.int64)), "median_step": math.nan}
    elif st[4] == 0 or st[2] == st[3]:  # no step, or one step everywhere
        n_dt = int(st[4])
        values = np.array([st[2]]) if n_dt else np.zeros(0)
        stats = {"t_min": float(st[0]), "t_max": float(st[1]),
                 "dt": (values, np.array([n_dt] if n_dt else [], dtype=np.int64)),
                 "median_step": float(st[2]) if n_dt else math.nan}
    return Layout(starts, flag == 0, stats)


def block_arrays(block: Any, shifts: np.ndarray | None) -> dict[str, Any]:
    """The block's arrays as the compiled passes read them (no copies of the big ones)."""
    n_cat = block.cation_energies.shape[1]
    dyson = block.dyson
    by_state = dyson.ndim == 3
    return {"active": np.ascontiguousarray(block.snapshots["active"].to_numpy(),
                                           dtype=np.int64),
            "energies": np.asarray(block.energies, dtype=np.float64),
            "cat": np.asarray(block.cation_energies, dtype=np.float64),
            "dyson": np.asarray(dyson if by_state else dyson[:, None, :], dtype=np.float64),
            "by_state": by_state,
            "shifts": np.zeros(n_cat) if shifts is None else np.asarray(shifts, float)}


def fused_energy_range(block: Any, total_energy: float, tail: float,
                       shifts: np.ndarray | None) -> dict[str, float]:
    """:func:`.sticks.energy_range` in one compiled pass (no ``n x n_cation`` arrays)."""
    k = _kernels()
    assert k is not None  # callers check numba first
    from ._kernels_deposit import usable_cores

    a = block_arrays(block, shifts)
    n = a["cat"].shape[0]
    n_threads = max(1, min(usable_cores(), n // MIN_SNAPSHOTS_PER_THREAD))
    n_jobs = 2 * n_threads if n_threads > 1 else 1  # taken in turn (shared machines)
    bounds = [t * n // n_jobs for t in range(n_jobs + 1)]
    out = np.empty((n_jobs, 2))

    def run(t: int) -> None:
        k["range"](a["active"], a["energies"], a["cat"], a["dyson"], a["by_state"],
                   a["shifts"], float(total_energy), float(tail), bounds[t], bounds[t + 1],
                   out[t])

    if n_jobs == 1:
        run(0)
    else:
        with ThreadPoolExecutor(n_threads) as pool:
            list(pool.map(run, range(n_jobs)))
    return {"e_min": float(out[:, 0].min()), "e_max": float(out[:, 1].max())}


def trajectory_rows(block: Any) -> np.ndarray:
    """``block.traj_index`` (trajectory row of each snapshot) by one compiled merge when
    the snapshots are sorted by trajectory (as ensembles store them), else numpy's."""
    k = _kernels()
    ids = block.trajectories["traj"].to_numpy()
    col = block.snapshots["traj"].to_numpy()
    if k is not None and ids.dtype.kind in "iu" and col.dtype.kind in "iu":
        out = np.empty(col.shape[0], dtype=np.int64)
        if k["rows_of"](np.ascontiguousarray(ids, dtype=np.int64),
                        np.ascontiguousarray(col, dtype=np.int64), out):
            return out
    return np.asarray(block.traj_index, dtype=np.int64)


def last_rows(tix: np.ndarray, time: np.ndarray, n_trajectories: int) -> np.ndarray:
    """Row of the last snapshot of each trajectory (-1: none), compiled.

    ``tix`` (n_snapshots,) is each snapshot's trajectory row, ``time`` its time (fs).
    """
    k = _kernels()
    assert k is not None
    out = np.full(n_trajectories, -1, dtype=np.int64)
    k["last"](np.ascontiguousarray(tix, dtype=np.int64),
              np.ascontiguousarray(time, dtype=np.float64), out)
    return out
