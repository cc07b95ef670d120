"""Tests of the Ensemble data model (ensemblelab.data.ensemble)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from ensemblelab import Ensemble, SchemaError
from ensemblelab.testing import assert_ensemble_equal, make_toy_ensemble


def _tiny(**kw):
    args = dict(
        traj=[1, 1, 0, 0, 0],
        time=[0.5, 0.0, 0.0, 0.5, 1.0],
        active=[1, 1, 1, 1, 0],
        geometries=np.arange(30, dtype=float).reshape(5, 2, 3),
        symbols=["H", "O"],
        energies=np.array([[0.0, 3.0], [0.0, 3.1], [0.0, 3.2], [0.0, 3.3], [0.1, 2.0]]),
    )
    args.update(kw)
    return Ensemble.from_arrays(**args)


def test_from_arrays_sorts_rows_and_keeps_alignment():
    ens = _tiny()
    assert ens.snapshots["traj"].tolist() == [0, 0, 0, 1, 1]
    assert ens.snapshots["time"].tolist() == [0.0, 0.5, 1.0, 0.0, 0.5]
    # input row 1 (traj 1, t=0) had energies [0, 3.1] and geometry 6..11
    np.testing.assert_array_equal(ens.energies[3], [0.0, 3.1])
    np.testing.assert_array_equal(ens.geometries[3].ravel(), np.arange(6, 12))
    assert ens.snapshots["step"].tolist() == [0, 1, 2, 0, 1]


def test_arrays_are_read_only_and_inputs_untouched():
    geoms = np.zeros((5, 2, 3))
    ens = _tiny(geometries=geoms)
    assert not ens.geometries.flags.writeable
    assert geoms.flags.writeable
    with pytest.raises(ValueError):
        ens.energies[0, 0] = 1.0
    geoms[:] = 7.0
    assert np.all(ens.geometries == 0.0)


def test_select_by_mask_and_by_traj_returns_new_ensemble():
    ens = make_toy_ensemble(6, seed=1)
    sub = ens.select(ens.snapshots["time"] < 10)
    assert sub is not ens and sub.snapshots["time"].max() < 10
    assert sub.n_trajectories == 6
    one = ens.select([2, 4])
    assert sorted(one.trajectories["traj"]) == [2, 4]
    np.testing.assert_array_equal(
        one.geometries, ens.geometries[ens.snapshots["traj"].isin([2, 4]).to_numpy()]
    )
    # stable snapshot ids survive slicing
    assert set(one.snapshots["snapshot"]) <= set(ens.snapshots["snapshot"])
    with pytest.raises(TypeError, match="never a string"):
        ens.select("time < 10")


def test_without_drops_trajectories_and_keeps_source():
    ens = make_toy_ensemble(5, seed=2)
    n = ens.n_snapshots
    clean = ens.without(pd.DataFrame({"traj": [0, 3]}))
    assert sorted(clean.trajectories["traj"]) == [1, 2, 4]
    assert ens.n_snapshots == n


def test_hops_match_planted_hop_times():
    ens = make_toy_ensemble(20, seed=3, dt=1.0)
    hops = ens.hops()
    truth = ens.trajectories.set_index("traj")["hop_time"]
    # a hop at continuous time h shows up at the first step >= h (dt = 1 fs)
    late = truth[truth <= 300.0]
    expected = np.ceil(late.to_numpy())
    got = hops.set_index("traj").loc[late.index, "time"].to_numpy()
    np.testing.assert_allclose(got, expected)
    assert (hops["from"] == 2).all() and (hops["to"] == 1).all()
    np.testing.assert_allclose(hops["gap"], 1.0, atol=1e-12)  # IP difference 4.5 - 3.5


def test_at_time_picks_nearest_step_per_trajectory():
    ens = make_toy_ensemble(4, seed=0, dt=2.0, ragged=False)
    snap = ens.at_time(3.1)
    assert snap.n_snapshots == 4
    assert np.all(snap.snapshots["time"] == 4.0)


def test_ragged_trajectories_are_normal():
    ens = make_toy_ensemble(9, seed=5, ragged=True)
    assert ens.trajectories["n_steps"].nunique() > 1
    assert ens.trajectories["t_end"].min() < 300


def test_long_frame_is_tidy():
    ens = _tiny()
    lf = ens.long_frame("energies")
    assert len(lf) == ens.n_snapshots * ens.n_states
    wide = lf.pivot(index="snapshot", columns="state", values="value").to_numpy()
    np.testing.assert_array_equal(wide, ens.energies)


@pytest.mark.parametrize(
    "kwargs, match",
    [
        (dict(active=[1, 1, 1, 5, 0]), r"active state must be in \[0, 1\]"),
        (dict(energies=np.zeros((4, 2))), "energies must have n_snapshots=5 rows"),
        (dict(geometries=np.zeros((5, 3, 3))), "symbols must have n_atoms=3"),
        (dict(time=[0.5, 0.0, 0.0, 0.0, 1.0]), "times must increase strictly"),
        (dict(cation_energies=np.zeros((5, 2)), dyson=np.zeros((5, 3))), "dyson must have shape"),
        (dict(amplitudes=np.zeros((5, 3))), "amplitudes must have shape"),
    ],
)
def test_schema_errors_name_field_and_values(kwargs, match):
    with pytest.raises(SchemaError, match=match):
        _tiny(**kwargs)


def test_trajectory_weights_and_initial_state_defaults():
    ens = _tiny(trajectories=pd.DataFrame({"traj": [1], "weight": [2.5]}))
    tr = ens.trajectories.set_index("traj")
    assert tr.loc[1, "weight"] == 2.5 and tr.loc[0, "weight"] == 1.0
    assert tr.loc[0, "initial_state"] == 1
    np.testing.assert_array_equal(ens.snapshot_weights(), [1, 1, 1, 2.5, 2.5])


def test_active_dyson_picks_active_state_row():
    ens = make_toy_ensemble(3, seed=0)
    ad = ens.active_dyson()
    active = ens.snapshots["active"].to_numpy()
    np.testing.assert_array_equal(ad[:, 0], np.where(active == 2, 0.9, 0.8))


def test_assign_and_replace_validate_again():
    ens = _tiny()
    e2 = ens.assign(cluster=np.arange(5))
    assert "cluster" in e2.snapshots and "cluster" not in ens.snapshots
    with pytest.raises(SchemaError):
        ens.assign(cluster=np.arange(4))
    assert_ensemble_equal(ens, ens.replace())


def test_repr_and_html_summary():
    ens = make_toy_ensemble(3)
    assert "trajectories" in repr(ens) and "3" in repr(ens)
    assert "<table>" in ens._repr_html_()


def _writes_through_frame(get_frame):
    """Every way of writing into a frame handed out by the ensemble (common practice)."""
    def loc(f):
        f.loc[0, f.columns[1]] = 99
    def iloc(f):
        f.iloc[0, 1] = 99
    def new_column(f):
        f["user"] = 1.0
    def replace_column(f):
        f[f.columns[1]] = 99
    def del_column(f):
        del f[f.columns[-1]]
    def series_setitem(f):
        s = f[f.columns[1]]
        s.iloc[0] = 99
    def numpy_view(f):
        f[f.columns[1]].to_numpy()[0] = 99
    def values_view(f):
        f[f.columns[1]].values[0] = 99
    def asarray_view(f):
        np.asarray(f[f.columns[1]])[0] = 99
    def block_view(f):
        f[[f.columns[0], f.columns[1]]].to_numpy()[0, 1] = 99
    return [loc, iloc, new_column, replace_column, del_column, series_setitem, numpy_view,
            values_view, asarray_view, block_view]


@pytest.mark.parametrize("attr", ["snapshots", "trajectories"])
def test_frames_cannot_be_changed_through_the_ensemble(attr):
    ens = make_toy_ensemble(n_trajectories=4, seed=3)
    before = getattr(ens, attr).copy(deep=True)
    for write in _writes_through_frame(lambda: getattr(ens, attr)):
        frame = getattr(ens, attr)
        try:
            write(frame)
        except ValueError:  # a read-only buffer refusing the write is fine too
            pass
        pd.testing.assert_frame_equal(getattr(ens, attr), before, check_exact=True,
                                      obj=f"{attr} after {write.__name__}")


def test_frame_fields_cannot_be_rebound_and_arrays_refuse_writes():
    import dataclasses

    ens = make_toy_ensemble(n_trajectories=3, seed=1)
    with pytest.raises(dataclasses.FrozenInstanceError):
        ens.snapshots = ens.snapshots.iloc[:1]  # type: ignore[misc]
    with pytest.raises(dataclasses.FrozenInstanceError):
        ens.trajectories = ens.trajectories.iloc[:1]  # type: ignore[misc]
    for name in ("geometries", "energies", "masses", "amplitudes"):
        arr = getattr(ens, name)
        if arr is None:
            continue
        with pytest.raises(ValueError, match="read-only"):
            arr.reshape(-1)[0] = 1.0


def test_snapshots_access_shares_buffers_instead_of_copying():
    # cheap access: two accesses see one buffer (no copy of n_snapshots rows per access)
    ens = make_toy_ensemble(n_trajectories=5, seed=2)
    a = ens.snapshots["time"].to_numpy()
    b = ens.snapshots["time"].to_numpy()
    assert np.shares_memory(a, b)
    assert ens.snapshots is not ens.snapshots  # but never the stored object itself


def test_constructor_copies_frames_it_is_given():
    ens = _tiny()
    frame = ens.snapshots.copy(deep=True)
    trajs = ens.trajectories.drop(columns=["n_steps", "t_end"])
    built = Ensemble(snapshots=frame, geometries=ens.geometries, energies=ens.energies,
                     symbols=ens.symbols, masses=ens.masses, trajectories=trajs)
    frame.loc[0, "time"] = 42.0
    trajs.loc[0, "weight"] = 5.0
    assert built.snapshots.loc[0, "time"] == 0.0
    assert built.trajectories.loc[0, "weight"] == 1.0
