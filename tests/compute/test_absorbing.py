"""Trajectories stopped in an absorbing state (the ground state, as dynamics codes commonly do).

A trajectory that ends on the absorbing state counts in it until the ensemble's end for
populations and kinetics and is not flagged ``early_end``; one that ends elsewhere keeps
the alive handling and is reported.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from ensemblelab.compute.kinetics import _kernels_populations as K
from ensemblelab.compute.kinetics import _reference_populations as R
from ensemblelab.compute.kinetics.populations import populations
from ensemblelab.compute.kinetics.rates import fit_kinetics
from ensemblelab.compute.structures.outliers import flag_trajectories
from ensemblelab.data.ensemble import Ensemble
from ensemblelab.demo import make_ensemble
from ensemblelab.errors import SchemaError

DEMO = Path(__file__).resolve().parents[2] / "demo_data" / "ensemble"
N_BOOT = 300


def stop_after_ground_state(ens: Ensemble, after: float = 10.0) -> Ensemble:
    """Cut every trajectory `after` fs after it first reaches S0 (common practice of codes)."""
    s = ens.snapshots
    keep = np.ones(len(s), dtype=bool)
    for _, g in s.groupby("traj"):
        on0 = g.loc[g["active"] == 0, "time"]
        if len(on0):
            keep[g.index[g["time"] > on0.iloc[0] + after]] = False
    return ens.select(keep)


@pytest.fixture(scope="module")
def demo():
    from ensemblelab.io import load

    ens = load(DEMO, nonfinite="keep", progress=False)
    faults = [int(k) for k in ens.metadata["injected_faults"]]
    return ens.without(faults)


def _check_agreement(full: Ensemble, cut: Ensemble) -> None:
    # reference: the same analysis of the full-length ensemble, computed here (computed
    # independently, not published); agreement = overlapping 95 % intervals everywhere
    pf = populations(full)
    pc = populations(cut)
    assert len(pc.attrs["absorbed"]) > 0.5 * cut.n_trajectories
    merged = pf.merge(pc, on=["time", "state"], suffixes=("_full", "_cut"))
    overlap = (merged["lower_cut"] <= merged["upper_full"] + 1e-12) & \
              (merged["lower_full"] <= merged["upper_cut"] + 1e-12)
    assert overlap.all(), merged.loc[~overlap, ["time", "state", "population_full",
                                                "population_cut"]].head()
    rf = fit_kinetics(full, scheme="sequential", states=[2, 1, 0], n_boot=N_BOOT)
    rc = fit_kinetics(cut, scheme="sequential", states=[2, 1, 0], n_boot=N_BOOT)
    for name in ("tau1", "tau2"):
        lo_f, hi_f = rf.interval(name)
        lo_c, hi_c = rc.interval(name)
        assert lo_f <= rc.params[name] <= hi_f, (name, rc.params[name], (lo_f, hi_f))
        assert lo_c <= rf.params[name] <= hi_c, (name, rf.params[name], (lo_c, hi_c))


def test_demo_stopped_in_ground_state_gives_the_full_populations_and_lifetimes(demo):
    # on the code before the absorbing state the cut demo's S1 lifetime came out about
    # 1000 fs instead of about 180 fs (computed independently, not published)
    cut = stop_after_ground_state(demo)
    assert cut.n_snapshots < 0.7 * demo.n_snapshots  # the cut is substantial
    _check_agreement(demo, cut)
    # without the absorbing state the ended trajectories leave the average: S1 lives long
    off = fit_kinetics(cut, scheme="sequential", states=[2, 1, 0], interval=None,
                       absorbing_state=None)
    full = fit_kinetics(demo, scheme="sequential", states=[2, 1, 0], interval=None)
    assert off.params["tau2"] > 2 * full.params["tau2"]


def test_another_seed_stopped_in_ground_state_agrees():
    full = make_ensemble(60, seed=3, faults=False, velocities=False, t_max=400.0)
    _check_agreement(full, stop_after_ground_state(full, after=4.0))


def test_absorbed_and_ended_elsewhere_are_reported_and_flagged_apart(demo):
    cut = stop_after_ground_state(demo)
    pop = populations(cut)
    s = cut.snapshots
    last = s.groupby("traj").tail(1).set_index("traj")
    early = last.index[last["time"] < s["time"].max() - 1e-9]
    on0 = set(early[last.loc[early, "active"] == 0])
    assert set(pop.attrs["absorbed"]) == on0
    assert set(pop.attrs["ended_early"]) == set(early) - on0
    assert pop.attrs["absorbing_state"] == 0
    # absorbed trajectories stay in the count to the end; the others leave it
    n_end = int(pop.loc[pop["time"] == pop["time"].max(), "n_alive"].iloc[0])
    assert n_end == cut.n_trajectories - len(pop.attrs["ended_early"])
    table = flag_trajectories(cut, multivariate=False).set_index("traj")
    ended = table["flags"].str.contains("early_end")
    assert set(table.index[ended]) == set(early) - on0
    assert not table.loc[sorted(on0), "flagged"].any()


def test_absorbing_state_from_metadata_and_argument():
    ens = make_ensemble(12, seed=5, faults=False, velocities=False, t_max=300.0)
    cut = stop_after_ground_state(ens, after=2.0)
    assert cut.absorbing_state == 0
    assert cut.replace(metadata={**cut.metadata, "absorbing_state": None}).absorbing_state \
        is None
    none = cut.replace(metadata={**cut.metadata, "absorbing_state": None})
    a = populations(none)
    b = populations(cut, absorbing_state=None)
    pd.testing.assert_frame_equal(a, b)
    assert a.attrs["absorbed"] == []
    # a state other than the ground state: nothing ends there, so nothing is held
    c = populations(cut, absorbing_state=2)
    assert c.attrs["absorbed"] == [] and c.attrs["absorbing_state"] == 2
    with pytest.raises(SchemaError, match="absorbing_state"):
        _ = cut.replace(metadata={**cut.metadata, "absorbing_state": 7}).absorbing_state
    with pytest.raises(SchemaError, match="absorbing_state"):
        populations(cut, absorbing_state="ground")


def test_hold_sampling_kernel_equals_naive_loop():
    rng = np.random.default_rng(3)
    lens = rng.integers(1, 9, size=12)
    traj = np.repeat(np.arange(12), lens)
    time = np.concatenate([np.sort(rng.choice(np.arange(0.0, 12.0, 0.5), n, replace=False))
                           for n in lens])
    grid = np.linspace(-1, 13, 57)
    hold = rng.random(12) < 0.5
    got = K.sample_on_grid(traj, time, 12, grid, hold=hold, hold_until=11.5)
    ref = R.sample_on_grid_loop(traj, time, 12, grid, hold=hold, hold_until=11.5)
    np.testing.assert_array_equal(got, ref)
    # held rows stay at their last snapshot up to 11.5 fs and not beyond
    last = np.r_[np.flatnonzero(np.diff(traj)), traj.size - 1]
    for r in np.flatnonzero(hold):
        after = (grid > time[last[r]]) & (grid <= 11.5)
        assert np.all(got[r, after] == last[r])
        assert np.all(got[r, grid > 11.5 + 1e-9] == -1)


def test_lazy_chunks_hold_absorbed_trajectories_like_in_memory(tmp_path):
    pytest.importorskip("dask")
    from ensemblelab import load
    from ensemblelab.io.chunked import save_chunked

    ens = stop_after_ground_state(
        make_ensemble(14, seed=4, faults=False, velocities=False, t_max=300.0), after=2.0)
    lazy = load(save_chunked(ens, tmp_path / "s.ens", chunk_size=3), lazy=True)
    # reference: the in-memory result on the same ensemble (computed independently, not
    # published)
    ref, got = populations(ens), populations(lazy)
    assert ref.attrs["absorbed"] and got.attrs["absorbed"] == ref.attrs["absorbed"]
    assert got.attrs["ended_early"] == ref.attrs["ended_early"]
    np.testing.assert_allclose(got["population"], ref["population"], rtol=1e-12, atol=1e-15)
    f_ref = flag_trajectories(ens, multivariate=False)
    f_got = flag_trajectories(lazy, multivariate=False)
    assert f_got["flags"].tolist() == f_ref["flags"].tolist()
    assert f_got.attrs["limits"] == f_ref.attrs["limits"]


def test_flags_follow_the_absorbing_state_argument():
    ens = stop_after_ground_state(
        make_ensemble(12, seed=6, faults=False, velocities=False, t_max=300.0), after=2.0)
    s = ens.snapshots
    last = s.groupby("traj").tail(1)
    early_on0 = set(last.loc[(last["time"] < s["time"].max() - 1e-9) & (last["active"] == 0),
                             "traj"])
    assert early_on0
    on = flag_trajectories(ens, multivariate=False).set_index("traj")
    off = flag_trajectories(ens, multivariate=False, absorbing_state=None).set_index("traj")
    assert not on.loc[sorted(early_on0), "flags"].str.contains("early_end").any()
    assert off.loc[sorted(early_on0), "flags"].str.contains("early_end").all()
    assert on.attrs["absorbing_state"] == 0 and off.attrs["absorbing_state"] is None
