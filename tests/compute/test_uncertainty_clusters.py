"""Cluster-fraction intervals resample trajectories, not snapshots.

Reference values: the Wilson score interval of scipy.stats.binomtest (J. Amer. Stat.
Assoc. 1927, "Probable inference, the law of succession, and statistical inference") for
a fraction of whole trajectories; the width comparison factors are common practice.
"""

from __future__ import annotations

import numpy as np
from scipy.stats import binomtest

from ensemblelab.compute.structures import cluster_snapshots
from ensemblelab.compute.uncertainty import cluster_fraction_intervals
from ensemblelab.testing import make_toy_ensemble


def test_cluster_fraction_interval_is_trajectory_level():
    ens = make_toy_ensemble(60, seed=4, t_max=100.0, dt=1.0)
    rng = np.random.default_rng(0)
    member = rng.random(ens.n_trajectories) < 0.3  # invented: whole trajectories per cluster
    traj = ens.snapshots["traj"].to_numpy()
    feats = np.where(member[traj], 5.0, 0.0)[:, None] + 0.01 * rng.standard_normal(
        (ens.n_snapshots, 1))
    res = cluster_snapshots(ens, features=feats, by_state=False, n_clusters=2)
    summ = res.summary.set_index("code")
    small = summ["fraction"].idxmin()
    k = int(member.sum()) if summ.loc[small, "fraction"] < 0.5 else int((~member).sum())
    assert summ.loc[small, "fraction"] == k / ens.n_trajectories
    ref = binomtest(k, ens.n_trajectories).proportion_ci(method="wilson")
    width = summ.loc[small, "upper"] - summ.loc[small, "lower"]
    ref_width = ref.high - ref.low
    assert 0.7 * ref_width < width < 1.3 * ref_width
    # an interval counting the 6060 snapshots as independent would be ~10x narrower
    snap = binomtest(int(round(summ.loc[small, "fraction"] * ens.n_snapshots)),
                     ens.n_snapshots).proportion_ci(method="wilson")
    assert width > 5 * (snap.high - snap.low)


def test_cluster_fraction_intervals_order_and_missing_names():
    lo, hi = cluster_fraction_intervals(["a", "b", "b", "a"], ["b", "a", "zz"], [0, 1, 2, 3],
                                        [1.0, 1.0, 1.0, 1.0], n_boot=300)
    assert np.isnan(lo[2]) and np.isnan(hi[2])
    assert lo[0] <= 0.5 <= hi[0] and lo[1] <= 0.5 <= hi[1]  # computed independently
