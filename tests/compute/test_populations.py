"""Tests of populations, their intervals, the alive mask and the vectorised bootstrap."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy.stats import binomtest

from ensemblelab.compute.kinetics import _kernels_populations as K
from ensemblelab.compute.kinetics import _reference_populations as R
from ensemblelab.compute.kinetics.populations import (
    population_arrays,
    population_consistency,
    populations,
)
from ensemblelab.data.ensemble import Ensemble
from ensemblelab.errors import EnsembleWarning, SchemaError
from ensemblelab.testing import make_toy_ensemble

Z95 = 1.959963984540054  # norm.ppf(0.975), common practice


def _tiny(active_rows, times, *, amplitudes=None, adt=None, weights=None):
    """Ensemble from a list of per-trajectory active-state sequences (ragged allowed)."""
    traj = np.concatenate([np.full(len(a), i) for i, a in enumerate(active_rows)])
    time = np.concatenate([np.asarray(times[i], float) for i in range(len(active_rows))])
    active = np.concatenate([np.asarray(a) for a in active_rows])
    n = traj.size
    trajs = None
    if weights is not None:
        trajs = pd.DataFrame({"traj": np.arange(len(active_rows)), "weight": weights})
    return Ensemble.from_arrays(traj=traj, time=time, active=active,
                                geometries=np.zeros((n, 1, 3)), symbols=["H"],
                                energies=np.zeros((n, 3)), amplitudes=amplitudes, adt=adt,
                                trajectories=trajs)


# ------------------------------------------------------------------ Wilson interval
@pytest.mark.parametrize(
    ("k", "n", "expected"),
    [
        # common practice check values, computed independently (not published) (equal to scipy)
        (7, 50, (0.069508, 0.261862)),
        (0, 20, (0.0, 0.161125)),
        (30, 100, (0.218949, 0.395849)),
        (99, 100, (0.945514, 0.998233)),
    ],
)
def test_wilson_interval_matches_scipy_and_worked_values(k, n, expected):
    lo, hi = K.wilson_interval(np.array(k / n), np.array(float(n)), Z95)
    ref = binomtest(k, n).proportion_ci(method="wilson")  # scipy reference
    assert lo == pytest.approx(ref.low, abs=1e-12)
    assert hi == pytest.approx(ref.high, abs=1e-12)
    assert (float(lo), float(hi)) == pytest.approx(expected, abs=1e-6)
    assert (float(lo), float(hi)) == pytest.approx(R.wilson_interval_loop(k, n, Z95), abs=1e-14)


def test_populations_wilson_interval_equals_scipy_on_toy_ensemble():
    ens = make_toy_ensemble(60, seed=4)
    pop = populations(ens, time_grid=[50.0, 120.0])
    for row in pop[pop["state"] == 2].itertuples():
        k = int(round(row.population * row.n_alive))
        ci = binomtest(k, int(row.n_alive)).proportion_ci(method="wilson")  # scipy reference
        assert (row.lower, row.upper) == pytest.approx((ci.low, ci.high), abs=1e-12)


def test_populations_weighted_use_kish_effective_size():
    # 4 trajectories, weights 1,1,2,4; at t=1 trajectories 0 and 3 are on state 1
    ens = _tiny([[2, 1], [2, 2], [2, 2], [2, 1]], [[0, 1]] * 4, weights=[1.0, 1.0, 2.0, 4.0])
    pop = populations(ens)
    row = pop[(pop.time == 1.0) & (pop.state == 1)].iloc[0]
    w = np.array([1.0, 1.0, 2.0, 4.0])
    p = (1 + 4) / w.sum()  # weighted fraction, by hand
    n_eff = w.sum() ** 2 / (w**2).sum()  # Kish, common practice common practice
    assert row.population == pytest.approx(p, abs=1e-15)
    assert row.n_eff == pytest.approx(n_eff, abs=1e-12)
    assert row.n_alive == 4
    lo, hi = R.wilson_interval_loop(p * n_eff, n_eff, Z95)
    assert (row.lower, row.upper) == pytest.approx((lo, hi), abs=1e-12)


def test_populations_weights_equal_repeated_trajectories():
    # invariance (common practice): weight 2 == the trajectory listed twice
    a = _tiny([[2, 1, 1], [2, 2, 1]], [[0, 1, 2]] * 2, weights=[2.0, 1.0])
    b = _tiny([[2, 1, 1], [2, 1, 1], [2, 2, 1]], [[0, 1, 2]] * 3)
    pa, pb = populations(a), populations(b)
    np.testing.assert_allclose(pa["population"], pb["population"], atol=1e-15)


def test_populations_sum_to_one_and_match_hand_count():
    ens = make_toy_ensemble(50, seed=2, ragged=True)
    pop = populations(ens)
    sums = pop.groupby("time")["population"].sum()
    np.testing.assert_allclose(sums.to_numpy(), 1.0, atol=1e-12)  # sum rule
    t = 80.0
    snap = ens.snapshots[ens.snapshots["time"] == t]
    frac = float((snap["active"] == 2).mean())  # hand count
    row = pop[(pop.time == t) & (pop.state == 2)].iloc[0]
    assert row.population == pytest.approx(frac, abs=1e-15)
    assert row.n_alive == len(snap)


def test_populations_alive_mask_and_report_for_ragged_ensemble():
    # traj 1 ends at t = 1; at t = 2 only traj 0 is alive
    ens = _tiny([[2, 2, 1], [2, 1]], [[0, 1, 2], [0, 1]])
    pop = populations(ens)
    at2 = pop[pop.time == 2.0]
    assert (at2["n_alive"] == 1).all()
    assert at2.loc[at2.state == 1, "population"].item() == 1.0
    assert pop.attrs["ended_early"] == [1]
    with pytest.warns(EnsembleWarning, match="no trajectory is alive"):
        p2 = populations(ens, exclude=[0])
    assert p2.attrs["excluded"] == [0]
    assert np.isnan(p2.loc[p2.time == 2.0, "population"]).all()
    assert (p2.loc[p2.time == 1.0, "n_alive"] == 1).all()


def test_populations_nearest_previous_step_sampling():
    # traj 0 steps every 2 fs, hops at t=4; grid t=5 must take the t=4 snapshot (state 1)
    ens = _tiny([[2, 2, 1, 1]], [[0, 2, 4, 6]])
    with pytest.warns(EnsembleWarning, match="1 of 6 grid times"):
        pop = populations(ens, time_grid=[0.0, 3.9, 4.0, 5.0, 6.0, 6.5])
    s1 = pop[pop.state == 1].set_index("time")["population"]
    assert s1.loc[3.9] == 0.0 and s1.loc[4.0] == 1.0 and s1.loc[5.0] == 1.0
    assert np.isnan(s1.loc[6.5])  # after t_end: not alive


def test_sample_on_grid_kernel_equals_loop():
    rng = np.random.default_rng(0)
    lens = rng.integers(1, 9, size=12)
    traj = np.repeat(np.arange(12), lens)
    time = np.concatenate([np.sort(rng.choice(20, size=n, replace=False)) * 0.5 + r % 3
                           for r, n in enumerate(lens)])
    grid = np.linspace(-1, 13, 57)
    got = K.sample_on_grid(traj, time, 12, grid)
    ref = R.sample_on_grid_loop(traj, time, 12, grid)
    np.testing.assert_array_equal(got, ref)


def test_bootstrap_vectorised_equals_naive_loop_for_same_indices():
    rng = np.random.default_rng(5)
    arrays = population_arrays(make_toy_ensemble(30, seed=9, ragged=True),
                               weights=rng.uniform(0.5, 2.0, 30))
    indices = rng.integers(0, 30, size=(40, 30))
    counts = np.stack([np.bincount(i, minlength=30) for i in indices]).astype(float)
    fast = K.bootstrap_populations(arrays.values, arrays.alive, arrays.weights, counts, chunk=7)
    slow = R.bootstrap_populations_loop(arrays.values, arrays.alive, arrays.weights, indices)
    np.testing.assert_allclose(fast, slow, rtol=1e-12, atol=1e-14, equal_nan=True)


def test_bootstrap_counts_are_multinomial_with_n_draws():
    c = K.bootstrap_counts(17, 500, np.random.default_rng(1))
    assert c.shape == (500, 17)
    assert np.all(c.sum(axis=1) == 17)
    # each trajectory is drawn on average once per resample (sampling with replacement)
    assert abs(c.mean() - 1.0) < 0.05


def test_populations_bootstrap_reproducible_and_close_to_wilson():
    ens = make_toy_ensemble(200, seed=11)
    grid = [0.0, 50.0, 100.0, 200.0]
    b1 = populations(ens, interval="bootstrap", n_boot=2000, random_state=3, time_grid=grid)
    b2 = populations(ens, interval="bootstrap", n_boot=2000, random_state=3, time_grid=grid)
    pd.testing.assert_frame_equal(b1, b2)
    w = populations(ens, time_grid=grid)
    mid = (b1.time == 100.0) & (b1.state == 2)
    # for p ~ 0.4 and n = 200 both intervals are close to the normal one (common practice)
    assert b1.loc[mid, "lower"].item() == pytest.approx(w.loc[mid, "lower"].item(), abs=0.015)
    assert b1.loc[mid, "upper"].item() == pytest.approx(w.loc[mid, "upper"].item(), abs=0.015)
    assert b1.attrs["n_boot"] == 2000


def test_populations_amplitudes_and_diabatic_kinds():
    amps = np.array([[0.0, 0.2, 0.8], [0.0, 0.6, 0.4], [0.0, 0.5, 0.5], [0.0, 0.3, 0.7]])
    c, s = np.cos(0.3), np.sin(0.3)
    u = np.array([[1, 0, 0], [0, c, s], [0, -s, c]], float)
    adt = np.broadcast_to(u, (4, 3, 3))
    ens = _tiny([[2, 1], [2, 2]], [[0, 1], [0, 1]], amplitudes=amps, adt=adt)
    pa = populations(ens, kind="amplitudes")
    got = pa[pa.time == 1.0].set_index("state")["population"]
    assert got.loc[1] == pytest.approx((0.6 + 0.3) / 2, abs=1e-15)
    pdia = populations(ens, kind="diabatic")
    at1 = pdia[pdia.time == 1.0].set_index("state")["population"]
    # t=1: traj 0 on adiabatic 1, traj 1 on adiabatic 2; diabatic d weight U[a, d]^2
    assert at1.loc[1] == pytest.approx((c**2 + s**2) / 2, abs=1e-15)
    assert at1.loc[2] == pytest.approx((s**2 + c**2) / 2, abs=1e-15)
    at0 = pdia[pdia.time == 0.0].set_index("state")["population"]
    assert at0.loc[2] == pytest.approx(c**2, abs=1e-15) and at0.loc[1] == pytest.approx(s**2)


def test_populations_errors_name_the_argument():
    ens = make_toy_ensemble(5)
    with pytest.raises(SchemaError, match="'kind' parameter"):
        populations(ens, kind="quantum")
    with pytest.raises(SchemaError, match="'weights' parameter.*shape"):
        populations(ens, weights=np.ones(3))
    with pytest.raises(SchemaError, match="column 'nope'"):
        populations(ens, weights="nope")
    with pytest.raises(SchemaError, match="'time_grid'"):
        populations(ens, time_grid=[2.0, 1.0])
    bare = _tiny([[1, 1]], [[0, 1]])
    with pytest.raises(SchemaError, match="needs ens.adt"):
        populations(bare, kind="diabatic")


def test_populations_input_not_modified():
    ens = make_toy_ensemble(10, seed=1)
    before = ens.snapshots.copy()
    populations(ens, interval="bootstrap", n_boot=20)
    pd.testing.assert_frame_equal(ens.snapshots, before)


def test_population_consistency_gap():
    amps = np.array([[0.0, 0.0, 1.0], [0.0, 0.7, 0.3], [0.0, 0.0, 1.0], [0.0, 0.1, 0.9]])
    ens = _tiny([[2, 2], [2, 2]], [[0, 1], [0, 1]], amplitudes=amps)
    g = population_consistency(ens).set_index("traj")
    # total-variation distance between one-hot(active=2) and amplitudes, by hand
    assert g.loc[0, "max_gap"] == pytest.approx(0.7)
    assert g.loc[0, "mean_gap"] == pytest.approx(0.35)
    assert g.loc[0, "time_of_max"] == 1.0
    assert g.loc[1, "max_gap"] == pytest.approx(0.1)


def test_wilson_interval_coverage_on_repeated_toy_ensembles():
    """200 repeated toy ensembles (40 trajectories): ~95% of 95% Wilson intervals cover
    the true S2 population exp(-t/100 fs) at t = 60 fs (analytic truth of the toy model)."""
    hits = 0
    n_rep = 200
    for r in range(n_rep):
        ens = make_toy_ensemble(40, seed=500 + r, n_atoms=1, t_max=100.0, dt=20.0)
        pop = populations(ens, time_grid=[60.0], states=[2])
        hits += pop["lower"].item() <= np.exp(-0.6) <= pop["upper"].item()
    # binomial sd at 95 % over 200 repeats is 1.5 %; accept +-3 sd
    assert 0.905 <= hits / n_rep <= 0.995
