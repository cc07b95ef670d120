"""The band of a SelectionModel keeps only the strongest snapshots, its groups stay exact.

Every check value is computed independently (not published): the full per-snapshot
table of ``contributions(group_by="snapshot")``, grouped with pandas, and
``contributions(group_by=<column>)`` (its own bincount grouping) on the same ensemble.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from ensemblelab.compute.spectroscopy import compute_trpes, contributions
from ensemblelab.compute.spectroscopy.pulses import GaussianPulse
from ensemblelab.widgets import SelectionModel, SelectionTable
from ensemblelab.widgets.export import export_tables

BAND = {"energy_range": (0.2, 1.8), "delay_range": (0.0, 150.0)}


@pytest.fixture(scope="module")
def trpes(toy):
    return compute_trpes(toy, probe=GaussianPulse(photon_energy=5.0, fwhm=30.0),
                         pump=GaussianPulse(photon_energy=4.0, fwhm=30.0),
                         kinetic_energies=np.linspace(0.0, 2.5, 126),
                         delays=np.arange(-60.0, 201.0, 5.0), progress=False)


@pytest.fixture
def small_band(toy, trpes):
    # clusters: an invented labelling with noise (-1), 4 clusters
    labels = (np.arange(toy.n_snapshots) * 7919 % 5) - 1
    model = SelectionModel(toy, band_rows=12, max_selected=6)
    model.clusters = labels
    model.trpes_map = trpes
    model.select_band(**BAND)
    return model, labels


def _full(ens, trpes, labels=None):
    full = contributions(ens, trpes, group_by="snapshot", **BAND)
    if labels is not None:
        rows = pd.Index(ens.snapshots["snapshot"]).get_indexer(full["snapshot"])
        full["cluster"] = labels[rows]
    return full


def test_band_keeps_the_strongest_rows_and_counts_all(small_band, toy, trpes):
    model, labels = small_band
    full = _full(toy, trpes, labels)
    band = model.band
    assert len(full) > 100 and len(band) == 12 and not band.attrs["complete"]
    # the strongest intensities, in order, with shares of the whole band
    np.testing.assert_allclose(band["intensity"], full["intensity"].iloc[:12], rtol=1e-12)
    np.testing.assert_allclose(band["share"], full["share"].iloc[:12], rtol=1e-12)
    assert band.attrs["total"] == pytest.approx(full.attrs["total"], rel=1e-12)
    assert band.attrs["n_snapshots"] == len(full)
    assert model.selected == tuple(band["snapshot"].iloc[:6])
    info = model.band_summary()
    assert info["n_snapshots"] == len(full)
    assert info["n_trajectories"] == full["traj"].nunique()
    # cluster and weight columns of the kept rows
    rows = model.rows(band["snapshot"].to_numpy())
    np.testing.assert_array_equal(band["cluster"], labels[rows])
    np.testing.assert_array_equal(band["time"], toy.snapshots["time"].to_numpy()[rows])


@pytest.mark.parametrize(("by", "column"), [("cluster", "cluster"), ("state", "active"),
                                            ("traj", "traj")])
def test_group_table_is_exact_over_all_contributing_snapshots(small_band, toy, trpes, by,
                                                              column):
    model, labels = small_band
    full = _full(toy, trpes, labels)
    got = model.group_table(by).set_index("key").sort_index()
    # reference 1: pandas groupby of the whole per-snapshot table
    g = full.groupby(column)
    np.testing.assert_allclose(got["share"], g["share"].sum().sort_index(), rtol=1e-12)
    np.testing.assert_array_equal(got["n_snapshots"], g.size().sort_index())
    np.testing.assert_array_equal(got["n_trajectories"], g["traj"].nunique().sort_index())
    # reference 2: contributions' own grouping (the cluster column put on the ensemble)
    ens = toy.assign(cluster=labels) if by == "cluster" else toy
    ref = contributions(ens, trpes, group_by=column, **BAND).set_index(column).sort_index()
    np.testing.assert_allclose(got["intensity"], ref["intensity"], rtol=1e-12)
    np.testing.assert_array_equal(got["n_snapshots"], ref["n_snapshots"])
    assert model.group_table(by)["share"].is_monotonic_decreasing
    assert got["share"].sum() == pytest.approx(1.0, abs=1e-12)


def test_select_group_finds_the_groups_strongest_snapshots(small_band, toy, trpes):
    model, labels = small_band
    full = _full(toy, trpes, labels)
    weakest = model.group_table("traj")["key"].iloc[-1]  # likely absent from the kept rows
    ids = model.select_group("traj", weakest)
    expect = full.loc[full["traj"] == weakest]
    assert len(ids) == min(6, len(expect)) and model.trajectory == int(weakest)
    got = full.set_index("snapshot").loc[list(ids), "intensity"].to_numpy()
    np.testing.assert_allclose(got, expect["intensity"].iloc[: len(ids)], rtol=1e-12)
    ids = model.select_group("cluster", 2)
    expect = full.loc[full["cluster"] == 2, "intensity"].iloc[:6]
    got = full.set_index("snapshot").loc[list(ids), "intensity"].to_numpy()
    np.testing.assert_allclose(got, expect, rtol=1e-12)
    assert model.cluster == 2
    assert model.select_group("cluster", 99) == ()  # no such group: nothing selected
    with pytest.raises(ValueError, match="key must be one of"):
        model.select_group("colour", 1)


def test_share_of_a_snapshot_beyond_the_kept_rows(small_band, toy, trpes):
    model, _ = small_band
    full = _full(toy, trpes)
    row = full.iloc[len(full) // 2]  # far below the 12 kept rows
    info = model.snapshot_info(int(row["snapshot"]))
    assert info["share"] == pytest.approx(float(row["share"]), rel=1e-12)


def test_full_band_and_export_hold_every_contributing_snapshot(small_band, toy, trpes,
                                                              tmp_path):
    model, labels = small_band
    full = _full(toy, trpes, labels)
    table = model.full_band()
    assert len(table) == len(full)
    np.testing.assert_allclose(table["intensity"], full["intensity"], rtol=1e-12)
    np.testing.assert_array_equal(np.sort(table["snapshot"]), np.sort(full["snapshot"]))
    assert {"cluster", "weight"} <= set(table.columns)
    export_tables(model, tmp_path)
    written = pd.read_csv(tmp_path / "band_snapshots.csv")
    assert len(written) == len(full)
    by_traj = pd.read_csv(tmp_path / "band_by_traj.csv")
    assert len(by_traj) == full["traj"].nunique()
    assert by_traj["share"].sum() == pytest.approx(1.0, abs=1e-9)


def test_selection_table_shows_exact_groups_and_totals(small_band, toy, trpes):
    model, labels = small_band
    full = _full(toy, trpes, labels)
    view = SelectionTable(model)
    model.group_by = "state"
    assert len(view.table) == full["active"].nunique()
    assert f"{len(full)} contributing snapshots" in view.summary.value
    assert f"from {full['traj'].nunique()} trajectories" in view.summary.value


def test_band_follows_exclusions_and_new_clusters(small_band, toy, trpes):
    model, labels = small_band
    model.exclude([0, 1, 2])
    model.trpes_map = compute_trpes(model.current, probe=GaussianPulse(photon_energy=5.0,
                                                                       fwhm=30.0),
                                    pump=GaussianPulse(photon_energy=4.0, fwhm=30.0),
                                    kinetic_energies=trpes.kinetic_energies, delays=trpes.delays,
                                    progress=False)
    cur = model.current
    full = contributions(cur, model.trpes_map, group_by="traj", **BAND)
    got = model.group_table("traj").set_index("key").sort_index()
    assert not set(got.index) & {0, 1, 2}
    np.testing.assert_allclose(got["intensity"], full.set_index("traj").sort_index()
                               ["intensity"], rtol=1e-12)
    # new cluster labels after the band: the grouping follows them
    model.clusters = np.zeros(toy.n_snapshots, dtype=int)
    table = model.group_table("cluster")
    assert list(table["key"]) == [0] and table["share"].iloc[0] == pytest.approx(1.0)


def test_share_beyond_the_kept_rows_with_exclusions(small_band, toy, trpes):
    model, _ = small_band
    model.exclude([4])
    model.trpes_map = compute_trpes(model.current, probe=GaussianPulse(photon_energy=5.0,
                                                                       fwhm=30.0),
                                    kinetic_energies=trpes.kinetic_energies, delays=trpes.delays,
                                    progress=False)
    full = contributions(model.current, model.trpes_map, group_by="snapshot", **BAND)
    row = full.iloc[len(full) // 2]
    assert model.snapshot_info(int(row["snapshot"]))["share"] == pytest.approx(
        float(row["share"]), rel=1e-12)
    gone = int(toy.snapshots.loc[toy.snapshots["traj"] == 4, "snapshot"].iloc[0])
    assert model.snapshot_info(gone)["share"] == 0.0  # an excluded trajectory's snapshot
