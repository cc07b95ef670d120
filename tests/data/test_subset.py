"""Subsets built without a second validation equal those built through the constructor.

Reference: the validating constructor of Ensemble (the path every subset took before),
field by field (computed independently (not published)).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from ensemblelab.data import _subset
from ensemblelab.data.ensemble import SNAPSHOT_ARRAYS, TRAJECTORY_ARRAYS, Ensemble
from ensemblelab.errors import SchemaError
from ensemblelab.testing import make_toy_ensemble


def _assert_same(a: Ensemble, b: Ensemble) -> None:
    pd.testing.assert_frame_equal(a.snapshots, b.snapshots, check_exact=True)
    pd.testing.assert_frame_equal(a.trajectories, b.trajectories, check_exact=True)
    for name in ("geometries", "energies", "masses", *SNAPSHOT_ARRAYS, *TRAJECTORY_ARRAYS):
        x, y = getattr(a, name), getattr(b, name)
        assert (x is None) == (y is None), name
        if x is not None:
            assert x.dtype == y.dtype and x.shape == y.shape, name
            np.testing.assert_array_equal(x, y, err_msg=name)
            assert not x.flags.writeable, name
    assert a.symbols == b.symbols and a.state_labels == b.state_labels
    assert a.cation_labels == b.cation_labels
    assert a.metadata == b.metadata


def _rich(seed: int) -> Ensemble:
    ens = make_toy_ensemble(9, seed=seed, t_max=40.0, dt=2.0, ragged=True)
    n = ens.n_trajectories
    rng = np.random.default_rng(seed)
    trajs = ens.trajectories.drop(columns=["n_steps", "t_end"])
    trajs["weight"] = rng.uniform(0.1, 2.0, n)
    trajs["label"] = [f"t{i}" for i in range(n)]
    trajs["flag"] = rng.random(n) > 0.5
    trajs["count"] = rng.integers(0, 9, n)
    trajs["x"] = np.where(rng.random(n) > 0.7, np.nan, rng.normal(size=n))
    exc = np.c_[np.zeros(n), rng.uniform(3, 5, (n, ens.n_states - 1))]
    return ens.replace(trajectories=trajs, excitation_energies=exc,
                       metadata={**ens.metadata, "nested": {"a": [1, 2, {"b": 3}]}})


@pytest.mark.parametrize("seed", [0, 3])
def test_trusted_subset_equals_validated(seed):
    ens = _rich(seed)
    ids = ens.trajectories["traj"].to_numpy()
    traj = ens.snapshots["traj"].to_numpy()
    time = ens.snapshots["time"].to_numpy()
    rng = np.random.default_rng(seed)
    masks = [np.isin(traj, ids[::2]), np.isin(traj, ids[[-1]]), time < 13.0,
             (time > 5.0) & np.isin(traj, ids[1:]), rng.random(traj.size) > 0.4,
             np.ones(traj.size, bool)]
    for mask in masks:
        rows = np.flatnonzero(mask)
        fast = _subset.trusted_subset(ens, rows)
        _assert_same(fast, _subset.validated_subset(ens, rows))
        _assert_same(ens.select(mask), fast)
    # the subset's data are its own: changing the metadata copy leaves the source alone
    sub = ens.select(masks[0])
    sub.metadata["nested"]["a"].append(9)
    assert ens.metadata["nested"]["a"] == [1, 2, {"b": 3}]


def test_take_rows_falls_back_when_it_cannot_vouch():
    ens = make_toy_ensemble(5, seed=1, t_max=20.0, dt=2.0)
    called = []
    real = _subset.validated_subset

    def spy(e, rows):
        called.append(rows.size)
        return real(e, rows)

    mp = pytest.MonkeyPatch()
    mp.setattr(_subset, "validated_subset", spy)
    try:
        _subset.take_rows(ens, [0, 1, 2], trusted=True)
        assert called == []
        for bad in ([2, 1], [0, 0, 1]):  # not increasing, repeated: the constructor refuses
            with pytest.raises(SchemaError):
                _subset.take_rows(ens, bad, trusted=True)
        _subset.take_rows(ens, [], trusted=True)          # empty
        _subset.take_rows(ens, [0, 1], trusted=False)     # a subclass, say
        assert called == [2, 3, 0, 2]
    finally:
        mp.undo()
