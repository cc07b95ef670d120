from __future__ import annotations

import numpy as np
import pytest

from ensemblelab.widgets import SelectionModel


def test_selectionmodel_validates_its_traits(model):
    with pytest.raises(Exception, match="group_by must be one of"):
        model.group_by = "colour"
    with pytest.raises(Exception, match="unknown trajectory id"):
        model.excluded = (999,)
    with pytest.raises(Exception, match="clusters must have shape"):
        model.clusters = np.zeros(3)
    with pytest.raises(TypeError, match="must be an ensemblelab.Ensemble"):
        SelectionModel("not an ensemble")
    model.energy_range = (2.0, 1.0)  # stored sorted
    assert model.energy_range == (1.0, 2.0)


def test_selectionmodel_exclusions_make_new_ensembles(model, toy):
    model.exclude([3, 1, 3])
    assert model.excluded == (1, 3)
    cur = model.current
    assert cur.n_trajectories == toy.n_trajectories - 2
    assert not set(cur.snapshots["traj"]) & {1, 3}
    assert toy.n_trajectories == 24  # the source is untouched
    model.restore([1])
    assert model.excluded == (3,)
    assert model.current.n_trajectories == toy.n_trajectories - 1


def test_selectionmodel_snapshot_info_reads_the_ensemble(model, toy):
    row = 150
    sid = int(toy.snapshots["snapshot"].iat[row])
    info = model.snapshot_info(sid)
    assert info["traj"] == int(toy.snapshots["traj"].iat[row])
    assert info["time"] == float(toy.snapshots["time"].iat[row])
    assert info["state"] == toy.state_labels[int(toy.snapshots["active"].iat[row])]
    assert info["cluster"] == -1 and info["weight"] == 1.0
    with pytest.raises(KeyError, match="unknown snapshot id"):
        model.rows([10**9])
