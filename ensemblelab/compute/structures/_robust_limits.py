"""Ensemble-relative limits of the outlier rules (robust statistics of the ensemble itself).

A fixed threshold tuned on one ensemble misfires on another: an ensemble whose ordinary
hops happen at 0.5-1 eV gaps is not broken, and a 0.3 eV drift stands out in an ensemble
that conserves energy to a few meV. So the limits of the hop-gap, drift and jump rules
come from the ensemble: a value is unusual when its robust z-score,

    z = (log x - median(log x)) / (1.4826 MAD(log x)),

exceeds ``robust_z`` (median and median absolute deviation, scaled by 1.4826 to match the
standard deviation of a normal distribution; common practice). The logarithm is used
because gaps, drifts and jumps are positive and skewed. The robust limit is then kept
between an absolute floor (below it nothing is physically worrying) and an absolute
ceiling (above it a trajectory is broken whatever the ensemble looks like); floors and
ceilings are common-practice values in
:class:`~ensemblelab.compute.structures.outliers.OutlierThresholds`.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

__all__ = ["robust_upper_limit", "measure_partial", "ensemble_limits", "MIN_SAMPLES"]

#: fewer positive finite values than this: no robust estimate, the floor is the limit
MIN_SAMPLES = 8
_MAD_SCALE = 1.4826  # MAD -> standard deviation of a normal distribution (common practice)


def robust_upper_limit(values: np.ndarray, *, floor: float, ceiling: float, z: float,
                       fallback: float | None = None) -> dict[str, float]:
    """Ensemble-relative upper limit of a positive quantity, clipped to [floor, ceiling].

    Parameters
    ----------
    values : ndarray, shape (n,)
        The measured values (e.g. hop gaps in eV); non-finite and non-positive ones are
        left out of the statistics.
    floor, ceiling : float
        Absolute bounds of the limit (same unit as `values`).
    z : float
        Robust z-score above which a value is unusual.
    fallback : float, optional
        The limit when there are too few values for statistics (default `floor`).

    Returns
    -------
    dict
        ``limit`` (the limit used), ``robust`` (median-based limit before clipping; NaN
        with fewer than :data:`MIN_SAMPLES` values), ``median``, ``n`` (values used).
    """
    raw = np.asarray(values, dtype=np.float64).ravel()
    v = raw[np.isfinite(raw) & (raw > 0)]
    out = {"limit": float(floor if fallback is None else fallback), "robust": float("nan"),
           "median": float(np.median(v)) if v.size else float("nan"), "n": float(v.size)}
    if v.size >= MIN_SAMPLES:
        lv = np.log(v)
        med = float(np.median(lv))
        mad = _MAD_SCALE * float(np.median(np.abs(lv - med)))
        out["robust"] = float(np.exp(med + z * mad))
        out["limit"] = float(min(ceiling, max(floor, out["robust"])))
    out["limit"] = float(min(ceiling, out["limit"]))
    return out


def measure_partial(block: Any, span: Any, opts: Mapping[str, Any]) -> dict[str, np.ndarray]:
    """Per-trajectory largest drift and jump and every hop gap of a block (a partial).

    ``opts["total_energy"]`` is the function giving (e_tot or None, source) of a block.
    """
    e_tot, _ = opts["total_energy"](block)
    n, n_traj = block.n_snapshots, block.n_trajectories
    drift = np.full(n_traj, np.nan)
    jump = np.full(n_traj, np.nan)
    if e_tot is not None and n:
        tix = block.traj_index
        active = block.snapshots["active"].to_numpy()
        starts = np.flatnonzero(np.r_[True, tix[1:] != tix[:-1]])
        finite = np.isfinite(e_tot)
        first = np.full(n_traj, -1)
        idx = np.flatnonzero(finite)
        rows, pos = np.unique(tix[idx], return_index=True)
        first[rows] = idx[pos]
        e0 = np.where(first[tix] >= 0, e_tot[np.maximum(first[tix], 0)], np.nan)
        d = np.abs(e_tot - e0)
        drift = np.maximum.reduceat(np.where(np.isfinite(d), d, -np.inf), starts)
        drift[~np.isfinite(drift)] = np.nan
        j = np.zeros(n)
        j[1:] = np.abs(np.diff(e_tot))
        same = np.r_[False, (tix[1:] == tix[:-1]) & (active[1:] == active[:-1])]
        jump = np.maximum.reduceat(np.where(same & np.isfinite(j), j, 0.0), starts)
    gaps = block.hops()["gap"].to_numpy(np.float64)
    return {"drift": drift, "jump": jump, "gaps": gaps}


def ensemble_limits(parts: Sequence[Mapping[str, np.ndarray]], th: Any) -> dict[str, Any]:
    """The hop-gap, drift and jump limits of an ensemble from its measured partials.

    Parameters
    ----------
    parts : sequence of mapping
        :func:`measure_partial` results of all blocks.
    th : OutlierThresholds
        Floors (``hop_gap``, ``drift_warn``, ``jump``), ceilings (``hop_gap_ceiling``,
        ``drift_reject``, ``jump_ceiling``), ``robust_z`` and ``relative``.

    Returns
    -------
    dict
        ``hop_gap``, ``drift``, ``jump``: each the dict of :func:`robust_upper_limit`
        (with ``relative=False``: the fixed limits ``hop_gap``, ``drift_reject``,
        ``jump``).
    """
    def cat(key: str) -> np.ndarray:
        arrs = [np.asarray(p[key], dtype=np.float64) for p in parts]
        return np.concatenate(arrs) if arrs else np.zeros(0)

    if not th.relative:
        fixed = {"hop_gap": th.hop_gap, "drift": th.drift_reject, "jump": th.jump}
        return {k: {"limit": float(v), "robust": float("nan"), "median": float("nan"),
                    "n": 0.0} for k, v in fixed.items()}
    return {
        "hop_gap": robust_upper_limit(cat("gaps"), floor=th.hop_gap,
                                      ceiling=th.hop_gap_ceiling, z=th.robust_z),
        "drift": robust_upper_limit(cat("drift"), floor=th.drift_warn,
                                    ceiling=th.drift_reject, z=th.robust_z,
                                    fallback=th.drift_reject),
        "jump": robust_upper_limit(cat("jump"), floor=th.jump, ceiling=th.jump_ceiling,
                                   z=th.robust_z),
    }
