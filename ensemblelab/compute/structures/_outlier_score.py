"""Multivariate outlier score of trajectories (isolation forest), assembled from blocks."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
import pandas as pd

from ..engine import BlockSpan, reduce

__all__ = ["multivariate_score"]


def _gather_partial(block: Any, span: BlockSpan, positions: Mapping[int, np.ndarray]
                    ) -> np.ndarray:
    """Geometries (float64) of the finite rows number ``positions[span.index]`` of a block."""
    finite = np.isfinite(block.geometries).all(axis=(1, 2))
    rows = np.flatnonzero(finite)[positions[span.index]]
    return np.asarray(block.geometries[rows], dtype=np.float64)


def _rmsd_partial(block: Any, span: BlockSpan, ref: np.ndarray) -> dict[str, np.ndarray]:
    """Mean and largest RMSD to `ref` of each trajectory of a block (finite rows only)."""
    from .geometry import rmsd

    finite = np.isfinite(block.geometries).all(axis=(1, 2))
    fin_rows = np.flatnonzero(finite)
    rm = np.full(block.n_snapshots, np.nan)
    if fin_rows.size:
        rm[fin_rows] = rmsd(block.geometries[fin_rows], ref)
    g = pd.DataFrame({"t": block.traj_index, "r": rm}).groupby("t")["r"]
    rng = range(block.n_trajectories)
    return {"mean": g.mean().reindex(rng).to_numpy(), "max": g.max().reindex(rng).to_numpy()}


def multivariate_score(source: Any, parts: Sequence[Mapping[str, Any]], table: pd.DataFrame,
                       contamination: float, random_state: int, *, client: Any = None,
                       scheduler: Any = None) -> tuple[np.ndarray, np.ndarray]:
    """Isolation-forest score on per-trajectory features gathered from every block.

    Features: largest drift and jump, number of hops, largest hop gap, end time, mean
    and largest RMSD to the mean structure, mean active-state energy (robustly scaled;
    constant or all-NaN features dropped). The mean structure is that of a random
    subsample of at most 5000 finite snapshots (the same subsample whatever the blocks:
    positions among all finite rows).

    Parameters
    ----------
    source : BlockSource
        The blocks (re-read for geometries).
    parts : sequence of mapping
        The results of ``outliers.flags_partial`` per block (``n_finite``, ``n_hops``,
        ``e_mean``), in block order.
    table : DataFrame
        The rule-based table of all trajectories (``max_drift``, ``max_jump``,
        ``max_hop_gap``, ``t_end``).
    contamination : float
        Expected fraction of unusual trajectories.
    random_state : int
        Seed of the subsample and the forest.
    client, scheduler
        As for :func:`ensemblelab.compute.engine.reduce`.

    Returns
    -------
    score : ndarray, shape (n_trajectories,)
        Higher = more unusual (NaN when no feature varies).
    unusual : ndarray of bool, shape (n_trajectories,)
    """
    from sklearn.ensemble import IsolationForest
    from sklearn.preprocessing import RobustScaler

    from .geometry import mean_structure

    n_fin = np.array([p["n_finite"] for p in parts], dtype=np.int64)
    total_fin = int(n_fin.sum())
    rng = np.random.default_rng(random_state)
    if total_fin <= 5000:
        pos: np.ndarray = np.arange(total_fin)
    else:  # rng.choice(fin_rows, k) == fin_rows[rng.choice(len(fin_rows), k)]
        pos = np.sort(rng.choice(total_fin, 5000, False))
    feats = [table[c].to_numpy(np.float64) for c in ("max_drift", "max_jump")]
    feats.append(np.concatenate([p["n_hops"] for p in parts]))
    feats += [table[c].to_numpy(np.float64) for c in ("max_hop_gap", "t_end")]
    if pos.size:
        offsets = np.r_[0, np.cumsum(n_fin)]
        positions = {i: pos[(pos >= offsets[i]) & (pos < offsets[i + 1])] - offsets[i]
                     for i in range(len(parts))}
        used = [i for i, p in positions.items() if p.size]
        geoms = reduce(source, _gather_partial, None, args=(positions,),
                       fields=["geometries"], indices=used, client=client,
                       scheduler=scheduler, desc="subsample")
        ref, _ = mean_structure(np.concatenate(geoms), max_iter=10, tol=1e-6)
        rms = reduce(source, _rmsd_partial, None, args=(ref,), fields=["geometries"],
                     client=client, scheduler=scheduler, desc="rmsd")
        feats += [np.concatenate([r["mean"] for r in rms]),
                  np.concatenate([r["max"] for r in rms])]
    feats.append(np.concatenate([p["e_mean"] for p in parts]))
    F = np.column_stack(feats).astype(np.float64)
    n = F.shape[0]
    keep = np.isfinite(F).any(axis=0) & (np.nanstd(F, axis=0) > 0)
    F = F[:, keep]
    if F.shape[1] == 0:
        return np.full(n, np.nan), np.zeros(n, bool)
    med = np.nanmedian(F, axis=0)
    F = np.where(np.isfinite(F), F, med)
    F = RobustScaler().fit_transform(F)
    forest = IsolationForest(n_estimators=200, contamination=contamination,
                             random_state=random_state).fit(F)
    return -forest.score_samples(F), forest.predict(F) == -1
