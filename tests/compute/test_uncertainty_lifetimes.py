"""Lifetimes with trajectory-bootstrap intervals, checked against covariances.

Sources: the nominal 95 % coverage of a percentile bootstrap and the agreement of a
bootstrap standard error with the linearised (delta-method, clustered by the resampled
unit) one are common practice; the factors allowed are our choice (common practice).
Map replicates are checked against a naive twin computed independently (not published):
the map of an ensemble rebuilt with the drawn trajectories repeated.
"""

from __future__ import annotations

import numpy as np
import pytest

from ensemblelab.compute.kinetics import fit_kinetics
from ensemblelab.compute.spectroscopy import GaussianPulse, compute_trpes
from ensemblelab.compute.uncertainty import global_fit_bootstrap, kinetic_lifetime_uncertainty
from ensemblelab.compute.uncertainty.shares import bootstrap_counts_for
from ensemblelab.data.ensemble import Ensemble
from ensemblelab.testing import make_toy_ensemble

PROBE = GaussianPulse(photon_energy=5.0, fwhm=30.0)


@pytest.mark.parametrize("seed", [1, 7])
def test_bootstrap_se_agrees_with_the_clustered_covariance(seed):
    ens = make_toy_ensemble(100, seed=seed, t_max=300.0, dt=5.0)
    u = kinetic_lifetime_uncertainty(ens, n_boot=1000)
    row = u.summary.set_index("parameter").loc["tau"]
    assert 0.75 < row["se_bootstrap"] / row["se_clustered"] < 1.33
    # the Wald covariance treats the 61 times as independent: far too narrow
    assert row["se_covariance"] < row["se_bootstrap"] / 3
    assert row["lower"] < row["value"] < row["upper"]
    assert u.n_failed == 0


def _repeat_trajectories(ens: Ensemble, counts: np.ndarray) -> Ensemble:
    """The naive resample: each trajectory copied `counts[j]` times under new ids."""
    snap = ens.snapshots
    ids = ens.trajectories["traj"].to_numpy()
    rows, new_traj = [], []
    k = 0
    for j, c in enumerate(counts.astype(int)):
        r = np.flatnonzero(snap["traj"].to_numpy() == ids[j])
        for _ in range(c):
            rows.append(r)
            new_traj.append(np.full(r.size, k))
            k += 1
    rows_a = np.concatenate(rows)
    return Ensemble.from_arrays(
        traj=np.concatenate(new_traj), time=snap["time"].to_numpy()[rows_a],
        active=snap["active"].to_numpy()[rows_a], geometries=ens.geometries[rows_a],
        symbols=ens.symbols, energies=ens.energies[rows_a],
        cation_energies=ens.cation_energies[rows_a], dyson=ens.dyson[rows_a])


def test_reweighted_map_equals_the_map_of_repeated_trajectories():
    ens = make_toy_ensemble(12, seed=2, t_max=120.0, dt=4.0)
    counts = np.asarray(bootstrap_counts_for(12, 3, 5))[1]
    kw = {"probe": PROBE, "kinetic_energies": np.linspace(0, 2, 41),
          "delays": np.arange(-20.0, 121.0, 10.0), "progress": False, "time_step": 4.0}
    trajs = ens.trajectories.drop(columns=["n_steps", "t_end"]).copy()
    trajs["bootstrap_weight"] = counts
    reweighted = compute_trpes(ens.replace(trajectories=trajs), weights="bootstrap_weight",
                               **kw)
    naive = compute_trpes(_repeat_trajectories(ens, counts), weights="uniform", **kw)
    np.testing.assert_allclose(reweighted.intensity, naive.intensity, rtol=1e-9, atol=1e-12)


def test_global_fit_bootstrap_interval_and_covariance_ratio():
    ens = make_toy_ensemble(60, seed=3, t_max=300.0, dt=5.0)
    m = compute_trpes(ens, probe=PROBE, kinetic_energies=np.linspace(0, 2, 41),
                      delays=np.arange(-40.0, 301.0, 10.0), progress=False)
    irf = m.params["sigma_cc"] * 2.0 * np.sqrt(2.0 * np.log(2.0))
    g = global_fit_bootstrap(ens, m, n_boot=40, irf_fwhm=irf, random_state=1)
    row = g.summary.iloc[0]
    assert row["lower"] < row["value"] < row["upper"]
    assert g.n_failed == 0 and g.replicates.shape == (40, 1)
    assert np.isfinite(row["ratio"]) and row["ratio"] > 1  # Wald on a smooth map: too narrow
    assert "resamples of trajectories" in str(g)


def test_lifetime_interval_coverage_on_replicate_ensembles():
    # 200 replicate ensembles of 60 trajectories: 50 from each of 4 invented parents of
    # 3000 (coverage varies between parents: one parent alone gave 90.5 %, another 94.0 %
    # in 300 replicates; averaging over parents measures the method, not one parent).
    # Truth: each parent's own fitted lifetime. Nominal 95 % +- 3 % (common practice).
    rng = np.random.default_rng(5)
    hits = []
    for parent_seed in (21, 4, 8, 15):
        parent = make_toy_ensemble(3000, seed=parent_seed, t_max=300.0, dt=5.0)
        truth = fit_kinetics(parent, interval=None).params["tau"]
        traj = parent.snapshots["traj"].to_numpy()
        for r in range(50):
            chosen = rng.choice(parent.n_trajectories, size=60, replace=False)
            rep = parent.select(np.isin(traj, chosen))
            lo, hi = fit_kinetics(rep, n_boot=500, random_state=r).interval("tau")
            hits.append(lo <= truth <= hi)
    coverage = float(np.mean(hits))
    assert len(hits) == 200
    assert 0.92 <= coverage <= 0.98, coverage


def test_bca_interval_matches_scipy_for_a_mean():
    # reference: scipy.stats.bootstrap(method="BCa") (J. Amer. Stat. Assoc. 1987, "Better
    # bootstrap confidence intervals"); for a mean the empirical influence x - mean equals
    # scipy's jackknife influence, so both accelerations agree; Monte-Carlo tolerance
    # computed independently (not published)
    from scipy.stats import bootstrap

    from ensemblelab.compute.uncertainty._kernels_resample import resample_counts
    from ensemblelab.compute.uncertainty.lifetimes import bca_interval

    x = np.random.default_rng(3).exponential(1.0, size=40)
    counts = resample_counts(40, 20000, np.random.default_rng(1))
    reps = counts @ x / 40.0
    lo, hi = bca_interval(reps, float(x.mean()), x - x.mean(), 0.95)
    ref = bootstrap((x,), np.mean, method="BCa", n_resamples=20000,
                    random_state=0).confidence_interval
    width = ref.high - ref.low
    assert abs(lo - ref.low) < 0.03 * width and abs(hi - ref.high) < 0.03 * width
    plo, phi = np.quantile(reps, [0.025, 0.975])
    assert hi - phi > 0.02 * width  # a right-skewed statistic: BCa shifts the upper bound


def test_kinetic_lifetime_uncertainty_bca_and_errors():
    from ensemblelab.errors import SchemaError

    ens = make_toy_ensemble(80, seed=4, t_max=300.0, dt=5.0)
    u = kinetic_lifetime_uncertainty(ens, n_boot=400, method="bca")
    lo, hi = u.interval("tau")
    assert lo < u.summary["value"].iloc[0] < hi and "BCa" in u.method
    with pytest.raises(SchemaError, match="'method' parameter"):
        kinetic_lifetime_uncertainty(ens, method="studentised")
    with pytest.raises(SchemaError, match="sets 'interval' itself"):
        kinetic_lifetime_uncertainty(ens, interval="covariance")
