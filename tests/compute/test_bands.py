"""Band analysis (ensemblelab.compute.bands) against a naive pandas twin.

Every check value is computed independently (not published): the twin builds the
whole per-snapshot table and groups it with ``pandas.DataFrame.groupby``, sorts it
with a stable ``np.argsort`` and counts distinct trajectories with ``nunique``.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pandas as pd
import pytest

from ensemblelab.compute.bands import (
    BAND_GROUPS,
    BandAnalysis,
    SnapshotGroups,
    analyse_band,
    group_band,
    label_groups,
)
from ensemblelab.compute.bands._kernels_bands import integer_codes, pair_counts, top_k_indices
from ensemblelab.errors import SchemaError
from ensemblelab.testing import make_toy_ensemble

RANGES = {"energy_range": (0.2, 1.8), "delay_range": (0.0, 150.0)}


@pytest.fixture(scope="module")
def ens():
    return make_toy_ensemble(18, seed=11, t_max=160.0, dt=4.0)


@pytest.fixture(scope="module")
def labels(ens):
    # invented cluster labels with noise (-1) and an unused code (7)
    return (np.arange(ens.n_snapshots) * 7919 % 5) - 1


@pytest.fixture(scope="module")
def intensity(ens):
    # invented band intensities: many exact zeros and many ties
    rng = np.random.default_rng(5)
    x = np.round(rng.exponential(size=ens.n_snapshots), 1)
    x[rng.random(ens.n_snapshots) < 0.4] = 0.0
    return x


@pytest.fixture(scope="module")
def band(ens, labels, intensity):
    groups = SnapshotGroups.from_ensemble(ens, clusters=labels)
    return BandAnalysis.from_intensity(groups, intensity, **RANGES)


def _twin(ens, labels, intensity):
    """The naive per-snapshot table: every snapshot, its keys and intensity."""
    snap = ens.snapshots
    return pd.DataFrame({"snapshot": snap["snapshot"].to_numpy(),
                         "traj": snap["traj"].to_numpy(), "time": snap["time"].to_numpy(),
                         "active": snap["active"].to_numpy(), "cluster": labels,
                         "intensity": intensity})


@pytest.mark.parametrize("group_by", list(BAND_GROUPS))
def test_group_table_matches_a_pandas_groupby(band, ens, labels, intensity, group_by):
    full = _twin(ens, labels, intensity)
    full = full.loc[full["intensity"] > 0]
    g = full.groupby(BAND_GROUPS[group_by])
    ref = pd.DataFrame({"intensity": g["intensity"].sum(), "n_snapshots": g.size(),
                        "n_trajectories": g["traj"].nunique()})
    got = band.group_table(group_by).set_index("key").sort_index()
    np.testing.assert_array_equal(got.index.to_numpy(), ref.index.to_numpy())
    np.testing.assert_allclose(got["intensity"], ref["intensity"], rtol=1e-12)
    np.testing.assert_allclose(got["share"], ref["intensity"] / intensity.sum(), rtol=1e-12)
    np.testing.assert_array_equal(got["n_snapshots"], ref["n_snapshots"])
    np.testing.assert_array_equal(got["n_trajectories"], ref["n_trajectories"])
    table = band.group_table(group_by)
    assert table["share"].is_monotonic_decreasing
    assert table["share"].sum() == pytest.approx(1.0, abs=1e-12)  # a sum rule


def test_table_and_strongest_match_a_stable_sort(band, ens, labels, intensity):
    full = _twin(ens, labels, intensity)
    order = np.argsort(-intensity, kind="stable")
    n_pos = int(np.count_nonzero(intensity > 0))
    assert band.n_snapshots == n_pos and band.total == pytest.approx(intensity.sum())
    top = band.table(9)
    np.testing.assert_array_equal(top["snapshot"], full["snapshot"].to_numpy()[order[:9]])
    np.testing.assert_array_equal(top["cluster"], labels[order[:9]])
    assert not top.attrs["complete"] and top.attrs["n_snapshots"] == n_pos
    whole = band.table()
    assert whole.attrs["complete"] and len(whole) == n_pos
    np.testing.assert_array_equal(whole["snapshot"], full["snapshot"].to_numpy()[order[:n_pos]])
    np.testing.assert_allclose(whole["share"], intensity[order[:n_pos]] / intensity.sum())
    # the strongest of one group: filter, then sort (the twin)
    for group_by, key in (("traj", 3), ("cluster", 2), ("state", 1)):
        part = full.loc[(full[BAND_GROUPS[group_by]] == key) & (full["intensity"] > 0)]
        ref = part["snapshot"].to_numpy()[np.argsort(-part["intensity"].to_numpy(),
                                                     kind="stable")][:5]
        np.testing.assert_array_equal(band.strongest(5, group_by=group_by, key=key), ref)
    assert band.strongest(5, group_by="cluster", key=99).size == 0  # no such group


def test_n_trajectories_and_share_of(band, ens, labels, intensity):
    full = _twin(ens, labels, intensity)
    assert band.n_trajectories == full.loc[full["intensity"] > 0, "traj"].nunique()
    ids = full["snapshot"].to_numpy()[[0, 5, 17]]
    np.testing.assert_allclose(band.share_of(ids), intensity[[0, 5, 17]] / intensity.sum())
    assert band.share_of([10**9]).tolist() == [0.0]  # not in the ensemble


def test_cluster_groups_without_labels_are_one_unclustered_group(ens, intensity):
    groups = SnapshotGroups.from_ensemble(ens)
    band = BandAnalysis.from_intensity(groups, intensity, **RANGES)
    table = band.group_table("cluster")
    assert table["label"].tolist() == ["unclustered"] and table["share"].iloc[0] == 1.0


def test_analyse_band_matches_contributions(ens, labels):
    from ensemblelab.compute.spectroscopy import GaussianPulse, compute_trpes, contributions

    m = compute_trpes(ens, probe=GaussianPulse(photon_energy=5.0, fwhm=30.0),
                      pump=GaussianPulse(photon_energy=4.0, fwhm=30.0),
                      kinetic_energies=np.linspace(0.0, 2.5, 101),
                      delays=np.arange(-40.0, 161.0, 5.0), progress=False)
    band = analyse_band(ens, m, clusters=labels, **RANGES)
    ref = contributions(ens, m, **RANGES)  # per snapshot, strongest first, zeros dropped
    table = band.table()
    assert band.total == pytest.approx(ref.attrs["total"], rel=1e-12)
    np.testing.assert_array_equal(table["snapshot"], ref["snapshot"])
    np.testing.assert_allclose(table["share"], ref["share"], rtol=1e-12)
    # a second band of the same ensemble reuses the group keys
    other = analyse_band(ens, m, groups=band.groups, energy_range=(0.3, 0.7),
                         delay_range=(100.0, 150.0))
    assert other.groups is band.groups
    by_state = other.group_table("state")
    assert by_state["label"].iloc[0] == "S1"  # late, low energy: the S1 band (toy truth)


def test_pair_counts_both_paths_match_nunique():
    rng = np.random.default_rng(2)
    g = rng.integers(0, 6, 500)
    t = rng.integers(0, 40, 500)
    ref = pd.DataFrame({"g": g, "t": t}).groupby("g")["t"].nunique()
    small = pair_counts(g, t, 6, 40)  # dense (group, trajectory) table
    large = pair_counts(g, t, 6, 10**8)  # too many cells: unique pair codes
    np.testing.assert_array_equal(small, ref.reindex(range(6), fill_value=0))
    np.testing.assert_array_equal(large, small)
    assert pair_counts(g[:0], t[:0], 3, 4).tolist() == [0, 0, 0]


def test_integer_codes_round_trip():
    for keys in (np.array([5, -1, 5, 3]), np.array([10**12, 2, 10**12]),
                 np.array(["b", "a", "b"])):
        codes, values = integer_codes(keys)
        np.testing.assert_array_equal(values[codes], keys)
        assert list(values) == sorted(set(values.tolist()))  # sorted, each key once


@pytest.mark.parametrize("n", [50, 300_000])
def test_top_k_indices_matches_a_stable_sort(n):
    rng = np.random.default_rng(3)
    x = np.round(rng.exponential(size=n), 2)  # many ties
    x[rng.integers(0, n, n // 3)] = 0.0
    for k in (1, 7, 40):
        got = top_k_indices(x, k)
        ref = np.argsort(-x, kind="stable")[:k]
        np.testing.assert_array_equal(got, ref)
    assert top_k_indices(x, 0).size == 0
    np.testing.assert_array_equal(top_k_indices(x, n + 5), np.argsort(-x, kind="stable"))


def test_group_band_sums_a_given_table(band, ens):
    table = band.table(30)
    got = group_band(table, "state", state_labels=ens.state_labels).set_index("key")
    ref = table.groupby("active")["share"].sum()
    np.testing.assert_allclose(got["share"].sort_index(), ref.sort_index(), rtol=1e-12)
    assert set(got["label"]) <= set(ens.state_labels)


def test_results_are_frozen_and_inputs_untouched(ens, labels, intensity):
    before = intensity.copy()
    groups = SnapshotGroups.from_ensemble(ens, clusters=labels)
    band = BandAnalysis.from_intensity(groups, intensity, **RANGES)
    band.group_table("cluster")
    np.testing.assert_array_equal(intensity, before)
    with pytest.raises(dataclasses.FrozenInstanceError):
        band.total = 0.0  # type: ignore[misc]
    with pytest.raises(ValueError, match="read-only"):
        band.intensity[0] = 1.0


def test_bad_arguments_say_what_was_expected(ens, labels, band):
    with pytest.raises(ValueError, match="'group_by' parameter of BandAnalysis.group_sums"):
        band.group_table("colour")
    with pytest.raises(SchemaError, match=r"shape \(n_snapshots="):
        BandAnalysis.from_intensity(band.groups, np.zeros(3), **RANGES)
    with pytest.raises(SchemaError, match="one label per row"):
        SnapshotGroups.from_ensemble(ens, clusters=labels[:-1])
    with pytest.raises(ValueError, match="two finite numbers"):
        BandAnalysis.from_intensity(band.groups, band.intensity, energy_range=(0, np.nan),
                                    delay_range=(0, 1))
    with pytest.raises(ValueError, match="'group_by' parameter of label_groups"):
        label_groups(pd.DataFrame({"key": [1]}), "atom")
