from __future__ import annotations

import numpy as np

from ensemblelab.widgets import TrajectoryView


def test_trajectoryview_marks_the_known_hop(model, toy):
    # the toy ensemble hops S2 -> S1 once, at the first step at or after hop_time
    # (ensemblelab.testing ground truth, computed independently (not published))
    view = TrajectoryView(model, trajectory=4)
    hop_time = float(toy.trajectories.set_index("traj").loc[4, "hop_time"])
    t = toy.snapshots.loc[toy.snapshots["traj"] == 4, "time"].to_numpy()
    after = t[t >= hop_time]
    expected = [after[0]] if after.size else []
    np.testing.assert_allclose(view.hop_times, expected)
    assert np.asarray(view.lines.y).shape == (toy.n_states, t.size)
    # the active line follows the active state's energy
    rows = np.flatnonzero(toy.snapshots["traj"].to_numpy() == 4)
    act = toy.snapshots["active"].to_numpy()[rows]
    np.testing.assert_allclose(view.active_line.y, toy.energies[rows, act])


def test_trajectoryview_player_writes_frame_and_follows_it(model, toy):
    view = TrajectoryView(model, trajectory=2)
    view.slider.value = 7
    rows = np.flatnonzero(toy.snapshots["traj"].to_numpy() == 2)
    assert model.frame == int(toy.snapshots["snapshot"].iat[rows[7]])
    assert model.time == float(toy.snapshots["time"].iat[rows[7]])
    other = np.flatnonzero(toy.snapshots["traj"].to_numpy() == 9)[3]
    model.frame = int(toy.snapshots["snapshot"].iat[other])
    assert view.shown == 9 and view.slider.value == 3
    model.trajectory = 11
    assert view.shown == 11 and view.choose.value == 11
