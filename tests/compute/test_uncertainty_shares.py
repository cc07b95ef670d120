"""Trajectory-bootstrap shares (ensemblelab.compute.uncertainty.shares).

Check values: the resampling kernel against its naive loop twin and group sums against
pandas ``groupby`` are computed independently (not published); the 95 % coverage target
of a percentile bootstrap is common practice (nominal coverage of a 95 % interval).
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from ensemblelab.compute.bands import BandAnalysis, SnapshotGroups
from ensemblelab.compute.uncertainty import band_share_table, format_share, grouped_shares
from ensemblelab.compute.uncertainty._kernels_resample import (
    percentile_interval,
    ratio_replicates,
    resample_counts,
)
from ensemblelab.compute.uncertainty._reference_resample import ratio_replicates_loop
from ensemblelab.errors import SchemaError
from ensemblelab.testing import make_toy_ensemble

sys.path.insert(0, str(Path(__file__).parent))
from _uncertainty_synth import parent_band, replicate_rows  # noqa: E402


@pytest.mark.parametrize("method", ["multinomial", "poisson"])
def test_ratio_replicates_equal_the_naive_loop(method):
    rng = np.random.default_rng(4)
    numer = rng.uniform(0, 1, size=(30, 4))
    denom = numer.sum(axis=1) + rng.uniform(0, 0.5, size=30)
    counts = resample_counts(30, 300, np.random.default_rng(9), method=method)
    fast = ratio_replicates(numer, denom, counts)
    slow = ratio_replicates_loop(numer, denom, counts)
    np.testing.assert_allclose(fast, slow, rtol=1e-12)  # computed independently (not published)


def test_resample_counts_draw_n_units():
    c = resample_counts(50, 400, np.random.default_rng(0))
    assert np.all(c.sum(axis=1) == 50)  # multinomial: n draws per resample (common practice)
    p = resample_counts(50, 400, np.random.default_rng(0), method="poisson")
    assert abs(p.mean() - 1.0) < 0.02  # Poisson(1) mean 1 (from memory), SE 0.007 here


def test_percentile_interval_matches_numpy_quantile():
    x = np.random.default_rng(1).standard_normal((1000, 3))
    lo, hi = percentile_interval(x, 0.9)
    np.testing.assert_allclose(lo, np.quantile(x, 0.05, axis=0))  # numpy reference
    np.testing.assert_allclose(hi, np.quantile(x, 0.95, axis=0))


def test_grouped_shares_values_match_pandas_groupby():
    rng = np.random.default_rng(2)
    v = rng.uniform(0, 1, 500)
    g = rng.integers(0, 4, 500)
    u = rng.integers(0, 40, 500)
    t = grouped_shares(v, g, u, n_boot=200)
    ref = pd.Series(v).groupby(g).sum() / v.sum()  # pandas twin, computed independently
    np.testing.assert_allclose(t.set_index("key")["share"].sort_index(), ref.sort_index())
    assert (t["lower"] <= t["share"]).all() and (t["share"] <= t["upper"]).all()
    assert t["share"].is_monotonic_decreasing
    assert t.attrs["n_units"] == 40 and t.attrs["interval"] == "bootstrap"


def test_grouped_shares_resamples_trajectories_not_rows():
    # one trajectory holds all of group "b" in 100 snapshots: a row bootstrap would give a
    # narrow interval; resampling trajectories must reach 0 (the trajectory left out)
    v = np.ones(200)
    g = np.array(["a"] * 100 + ["b"] * 100)
    u = np.r_[np.arange(100) % 10, np.full(100, 10)]
    t = grouped_shares(v, g, u, n_boot=2000, random_state=1).set_index("key")
    assert t.loc["b", "includes_zero"]  # P(traj 10 not drawn) = (10/11)^11 = 0.35 (from memory)
    assert not t.loc["a", "includes_zero"]


def test_grouped_shares_interval_none_and_bad_arguments():
    t = grouped_shares([1.0, 2.0], [0, 1], [0, 1], interval=None)
    assert t["lower"].isna().all()
    with pytest.raises(SchemaError, match="'interval' parameter of grouped_shares"):
        grouped_shares([1.0], [0], [0], interval="wilson")
    with pytest.raises(SchemaError, match="'n_boot'"):
        grouped_shares([1.0], [0], [0], n_boot=1)
    with pytest.raises(SchemaError, match="'ci'"):
        grouped_shares([1.0], [0], [0], ci=95)


def test_band_share_table_adds_intervals_in_group_table_order():
    ens = make_toy_ensemble(30, seed=5, t_max=120.0, dt=4.0)
    x = np.random.default_rng(0).uniform(0, 1, ens.n_snapshots)  # invented intensities
    band = BandAnalysis.from_intensity(SnapshotGroups.from_ensemble(ens), x,
                                       energy_range=(0, 1), delay_range=(0, 100))
    for group_by in ("state", "traj"):
        plain = band.group_table(group_by)
        t = band_share_table(band, group_by, n_boot=300)
        pd.testing.assert_frame_equal(t[plain.columns], plain)
        assert (t["lower"] <= t["share"] + 1e-15).all()
        assert (t["share"] <= t["upper"] + 1e-15).all()
    # one trajectory out of 30 is drawn zero times in ~37 % of resamples (from memory)
    assert band_share_table(band, "traj", n_boot=300)["includes_zero"].all()


def test_format_share_text():
    assert format_share("S1", 0.867, 0.81, 0.92) == "S1 86.7% [81, 92]"  # the example
    assert format_share("x", 0.05, 0.041, 0.052) == "x 5.0% [4.1, 5.2]"  # common practice
    assert format_share("x", 0.05) == "x 5.0% [no interval]"


def test_band_share_intervals_fit_the_brush_budget():
    # 80 trajectories x 250 snapshots, like the demo: <= 150 ms per brush is the budget
    # (common practice for interactive response); the share intervals must take a fraction
    ens = make_toy_ensemble(80, seed=1, t_max=500.0, dt=2.0)
    x = np.random.default_rng(0).uniform(0, 1, ens.n_snapshots)
    band = BandAnalysis.from_intensity(SnapshotGroups.from_ensemble(ens), x,
                                       energy_range=(0, 1), delay_range=(0, 100))
    band_share_table(band, "traj")
    t0 = time.perf_counter()
    band_share_table(band, "traj")
    band_share_table(band, "state")
    assert time.perf_counter() - t0 < 0.1


def test_share_interval_coverage_on_replicate_ensembles():
    # 200 replicate ensembles of 60 trajectories from an invented parent of 4000; the
    # parent's share is the truth. Nominal 95 % coverage, +- 3 % (common practice).
    parent = parent_band(4000, seed=3)
    truth = (pd.Series(parent["value"]).groupby(parent["state"]).sum()
             / parent["value"].sum())
    rng = np.random.default_rng(11)
    hits, row_hits = [], []
    for r in range(200):
        rep = replicate_rows(parent, 60, rng)
        t = grouped_shares(rep["value"], rep["state"], rep["traj"], n_boot=1000,
                           random_state=r).set_index("key")
        # the same, wrongly treating every snapshot as independent (the failure it guards)
        for k in (1, 2):
            hits.append(t.loc[k, "lower"] <= truth[k] <= t.loc[k, "upper"])
        if r < 40:
            rows = grouped_shares(rep["value"], rep["state"], np.arange(rep["traj"].size),
                                  n_boot=300, random_state=r).set_index("key")
            row_hits += [rows.loc[k, "lower"] <= truth[k] <= rows.loc[k, "upper"]
                         for k in (1, 2)]
    coverage = float(np.mean(hits))  # 0.955 in this run (400 intervals)
    assert 0.92 <= coverage <= 0.98, coverage
    assert float(np.mean(row_hits)) < 0.9  # snapshot resampling under-covers (0.44 here)


def test_band_share_table_equals_grouped_shares_and_top_limits_the_work():
    # two code paths over the same per-trajectory sums and the same resamples: equal
    # (computed independently, not published)
    ens = make_toy_ensemble(40, seed=8, t_max=120.0, dt=4.0)
    x = np.random.default_rng(1).uniform(0, 1, ens.n_snapshots)
    band = BandAnalysis.from_intensity(SnapshotGroups.from_ensemble(ens), x,
                                       energy_range=(0, 1), delay_range=(0, 100))
    snap = ens.snapshots
    for group_by, column in (("state", "active"), ("traj", "traj")):
        t = band_share_table(band, group_by, n_boot=400, random_state=4).set_index("key")
        g = grouped_shares(x, snap[column].to_numpy(), snap["traj"].to_numpy(), n_boot=400,
                           random_state=4).set_index("key")
        np.testing.assert_allclose(t[["share", "lower", "upper"]].to_numpy(float),
                                   g.loc[t.index, ["share", "lower", "upper"]].to_numpy(float),
                                   rtol=1e-10)
    top = band_share_table(band, "traj", n_boot=400, random_state=4, top=5)
    assert top["lower"].iloc[:5].notna().all() and top["lower"].iloc[5:].isna().all()
    assert not top["includes_zero"].iloc[5:].any()  # no interval: not flagged
    full = band_share_table(band, "traj", n_boot=400, random_state=4)
    np.testing.assert_allclose(top["upper"].iloc[:5], full["upper"].iloc[:5])


def test_band_share_coverage_on_a_simulated_map():
    # the explorer's path (band_share_table) on band intensities of a simulated map: an
    # invented parent of 2000 toy trajectories, 200 replicate ensembles of 60; the truth is
    # the parent's share. Every toy trajectory lives to the end, so the map's normaliser is
    # a constant and a replicate's band intensities are the parent's rows. Nominal 95 % +- 3 %
    # (common practice).
    from ensemblelab.compute.bands import analyse_band
    from ensemblelab.compute.spectroscopy import GaussianPulse, compute_trpes

    parent = make_toy_ensemble(2000, seed=31, t_max=200.0, dt=5.0)
    m = compute_trpes(parent, probe=GaussianPulse(photon_energy=5.0, fwhm=30.0),
                      kinetic_energies=np.linspace(0.0, 2.0, 41),
                      delays=np.arange(0.0, 201.0, 10.0), progress=False)
    band = analyse_band(parent, m, energy_range=(0.2, 1.8), delay_range=(20.0, 120.0))
    g = band.groups
    truth = band.group_table("state").set_index("key")["share"]
    rng = np.random.default_rng(3)
    hits = []
    for r in range(200):
        chosen = rng.choice(parent.n_trajectories, size=60, replace=False)
        rows = np.isin(g.traj, chosen)
        sub = SnapshotGroups(snapshot=g.snapshot[rows], traj=g.traj[rows], time=g.time[rows],
                             active=g.active[rows], cluster=g.cluster[rows],
                             state_labels=g.state_labels)
        b = BandAnalysis.from_intensity(sub, band.intensity[rows], energy_range=(0.2, 1.8),
                                        delay_range=(20.0, 120.0))
        t = band_share_table(b, "state", n_boot=1000, random_state=r).set_index("key")
        hits += [t.loc[k, "lower"] <= truth[k] <= t.loc[k, "upper"] for k in truth.index]
    coverage = float(np.mean(hits))  # 0.950 in this run (two states: 200 independent)
    assert len(hits) == 400
    assert 0.92 <= coverage <= 0.98, coverage
