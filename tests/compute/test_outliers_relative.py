"""Outlier rules relative to the ensemble: they hold on other seeds, and say how far past."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import median_abs_deviation

from ensemblelab.compute.structures._robust_limits import MIN_SAMPLES, robust_upper_limit
from ensemblelab.compute.structures.outliers import OutlierThresholds, flag_trajectories
from ensemblelab.demo import FAULT_KINDS, make_ensemble

SEEDS = range(10)


@pytest.fixture(scope="module")
def seeds():
    out = {}
    for seed in SEEDS:
        ens = make_ensemble(60, seed=seed, velocities=False)
        # the isolation-forest score never sets "flagged" by default; one seed runs it
        out[seed] = (ens, flag_trajectories(ens, multivariate=seed == 7))
    return out


@pytest.mark.parametrize("seed", SEEDS)
def test_ten_seeds_recall_all_injected_faults_with_few_false_positives(seeds, seed):
    # issue requirement: recall 100 % of the injected faults (ground truth in
    # metadata["injected_faults"]), false positives <= 5 % of the clean trajectories on
    # every seed (the code before this rule set gave up to 7 of 54; computed independently,
    # not published)
    ens, table = seeds[seed]
    truth = {int(k): v for k, v in ens.metadata["injected_faults"].items()}
    assert sorted(truth.values()) == sorted(FAULT_KINDS)
    flagged = set(table.loc[table["flagged"], "traj"].astype(int))
    missed = {k: v for k, v in truth.items() if k not in flagged}
    assert not missed, missed
    clean = set(ens.trajectories["traj"].astype(int)) - set(truth)
    false_pos = flagged & clean
    assert len(false_pos) <= 0.05 * len(clean), \
        table[table["traj"].isin(false_pos)]["reason"].tolist()


def test_no_topology_flag_on_clean_trajectories(seeds):
    # physically sane starting geometries: no bond broken or formed in clean trajectories
    for ens, table in seeds.values():
        truth = {int(k) for k in ens.metadata["injected_faults"]}
        clean = table[~table["traj"].isin(truth)]
        assert not clean["flags"].str.contains("topology_change|bond_formed").any()


def test_every_flag_reports_its_excess(seeds):
    ens, table = seeds[7]
    truth = {v: int(k) for k, v in ens.metadata["injected_faults"].items()}
    lim = table.attrs["limits"]
    for row in table[table["n_flags"] > 0].itertuples():
        kinds = row.flags.split(";")
        excess = [float(x) for x in row.excess.split(";")]
        assert len(excess) == len(kinds)
        for k, x in zip(kinds, excess, strict=True):
            if k not in ("energy_drift_warning", "bond_formed", "unusual"):
                assert x > 1.0, (k, x)
    # the large-gap hop: excess = largest hop gap / hop-gap limit (computed independently)
    r = table.set_index("traj").loc[truth["large_gap_hop"]]
    kinds = r["flags"].split(";")
    got = float(r["excess"].split(";")[kinds.index("large_gap_hop")])
    hops = ens.hops()
    want = hops.loc[hops["traj"] == truth["large_gap_hop"], "gap"].max() / lim["hop_gap"]["limit"]
    assert got == pytest.approx(want, rel=2e-3)  # printed with 3 significant digits
    assert r["max_excess"] >= want * (1 - 1e-12)


def test_robust_limit_matches_median_and_scaled_mad_from_scipy():
    rng = np.random.default_rng(0)
    x = np.exp(rng.normal(np.log(0.15), 0.6, 300))
    got = robust_upper_limit(x, floor=0.0, ceiling=np.inf, z=5.0)
    # reference: scipy's MAD scaled to a normal standard deviation ("normal" scale,
    # 1/Phi^-1(3/4) = 1.4826; common practice), on log values
    lx = np.log(x)
    ref = np.exp(np.median(lx) + 5.0 * median_abs_deviation(lx, scale="normal"))
    assert got["limit"] == pytest.approx(ref, rel=1e-4)  # 1.4826 vs the exact constant
    # the floor and the ceiling clip it; too few values give the fallback
    assert robust_upper_limit(x, floor=10.0, ceiling=20.0, z=5.0)["limit"] == 10.0
    assert robust_upper_limit(x, floor=0.0, ceiling=0.2, z=5.0)["limit"] == 0.2
    few = robust_upper_limit(x[: MIN_SAMPLES - 1], floor=0.5, ceiling=1.5, z=5.0,
                             fallback=0.7)
    assert few["limit"] == 0.7 and np.isnan(few["robust"])


def test_hop_gap_limit_follows_the_ensemble():
    # an ensemble whose ordinary hops sit at 0.5-1 eV (twice the demo's gaps) is not
    # broken: the limit rises with it (up to the 1.5 eV ceiling, common practice), while
    # the fixed rule (relative=False) flags those trajectories
    ens = make_ensemble(40, seed=2, faults=False, velocities=False, t_max=300.0)
    e = ens.energies.copy()
    e[:, 1:] = e[:, :1] + 2.2 * (e[:, 1:] - e[:, :1])  # stretch every gap 2.2x
    # (a conserved total energy, so that only the hop rule is at stake)
    wide = ens.replace(energies=e).assign(e_tot=np.zeros(ens.n_snapshots))
    rel = flag_trajectories(wide, multivariate=False)
    fixed = flag_trajectories(wide, thresholds={"relative": False}, multivariate=False)
    assert rel.attrs["limits"]["hop_gap"]["limit"] > OutlierThresholds().hop_gap
    n_rel = rel["flags"].str.contains("large_gap_hop").sum()
    n_fixed = fixed["flags"].str.contains("large_gap_hop").sum()
    assert n_fixed > 0.05 * len(fixed)
    assert n_rel <= 0.05 * len(rel)
