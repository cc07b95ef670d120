"""Representative structures: medoids, most-populated-bin structures, windows, bands."""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from ensemblelab.compute.structures.clustering import cluster_snapshots
from ensemblelab.compute.structures.geometry import rmsd
from ensemblelab.compute.structures.representatives import (
    _pick,
    band_representatives,
    cluster_representatives,
    time_window_representatives,
)
from ensemblelab.errors import SchemaError

sys.path.insert(0, str(Path(__file__).parent))
from _structures_synth import BASE, build, make_clean  # noqa: E402


@pytest.fixture(scope="module")
def ens_groups():
    groups = np.arange(12) % 2
    ens = build(make_clean(12, seed=4, groups=groups, n_steps=41))
    return ens, groups[ens.traj_index]


def test_medoid_and_mode_toy_values():
    # analytic: on a line {0, 1, 2, 10} the weighted-sum-of-distances minimiser is 1 or 2
    # (both give 11); with weights favouring 2 it is 2. The densest bin of {0,0.1,0.2,5} is
    # near 0.1 and its member closest to the bin mean is 0.1
    F = np.array([[0.0], [1.0], [2.0], [10.0]])
    assert _pick(F, np.array([1.0, 1.0, 2.0, 1.0]), "medoid", 4) == 2
    G = np.array([[0.0, 0.0], [0.1, 0.0], [0.2, 0.0], [5.0, 0.0]])
    assert _pick(G, np.ones(4), "mode", 5) == 1


def test_cluster_representatives_are_members_and_aligned(ens_groups):
    ens, truth = ens_groups
    res = cluster_snapshots(ens, by_state=False, n_clusters=2)
    reps = cluster_representatives(ens, res, kind="both")
    assert len(reps.table) == 4
    assert set(reps.table["kind"]) == {"medoid", "mode"}
    for _, row in reps.table.iterrows():
        members = np.flatnonzero(res.labels == row["group"])
        assert row["row"] in members
        assert row["weight"] == pytest.approx(len(members) / ens.n_snapshots)
    # aligned copies keep the shape: RMSD to the original frame is zero (rigid motion only)
    orig = ens.geometries[reps.table["row"].to_numpy()]
    for a, b in zip(reps.geometries, orig, strict=True):
        assert rmsd(a, b, method="kabsch")[0] == pytest.approx(0.0, abs=1e-10)
    # common frame: mutual RMSD without re-fitting is small for same-cluster reps
    np.testing.assert_array_less(reps.table["rmsd_to_reference"], 1.0)
    # the medoid of planted group g is a group-g geometry (close to the planted shape)
    for _, row in reps.table.iterrows():
        g = truth[row["row"]]
        shape = BASE.copy()
        shape[3, 1] += 0.8 * g
        shape[2, 2] += 0.8 * (g % 2)
        assert rmsd(ens.geometries[row["row"]], shape, method="kabsch")[0] < 0.1


def test_time_windows_and_labels_column(ens_groups):
    ens, truth = ens_groups
    reps = time_window_representatives(ens, windows=[(0.0, 10.0), (10.0, 20.0)])
    assert reps.table["group"].tolist() == ["0-10 fs", "10-20 fs"]
    assert reps.table["time"].iloc[0] < 10 <= reps.table["time"].iloc[1] < 20
    lab = np.where(truth == 0, "a", "b")
    reps2 = time_window_representatives(ens, windows=2, clusters=lab)
    assert len(reps2.table) == 4
    assert reps2.table.groupby(reps2.table["group"].str.split("|").str[0])["weight"].sum()\
        .round(12).eq(1.0).all()
    with pytest.raises(SchemaError, match="t1 > t0"):
        time_window_representatives(ens, windows=[(5.0, 1.0)])


def test_band_representatives_from_contributions(ens_groups):
    ens, truth = ens_groups
    sid = ens.snapshots["snapshot"].to_numpy()
    # a band carried only by group-1 snapshots, with one dominant snapshot
    rows = np.flatnonzero(truth == 1)[:50]
    share = np.full(len(rows), 0.5 / (len(rows) - 1))
    share[0] = 0.5
    contrib = pd.DataFrame({"snapshot": sid[rows], "share": share})
    reps = band_representatives(ens, {"low": contrib}, coverage=1.0)
    assert reps.table["group"].tolist() == ["low"]
    assert truth[reps.table["row"].iloc[0]] == 1
    assert reps.table["weight"].iloc[0] == pytest.approx(1.0)
    reps_half = band_representatives(ens, contrib, coverage=0.5)
    assert reps_half.table["row"].iloc[0] == rows[0]  # 50 % coverage keeps the top snapshot only
    with pytest.raises(SchemaError, match="lack column"):
        band_representatives(ens, pd.DataFrame({"snapshot": sid[:3]}))


def test_write_exports_structures_and_csv(ens_groups, tmp_path):
    ens, _ = ens_groups
    reps = cluster_representatives(ens, cluster_snapshots(ens, by_state=False, n_clusters=2))
    from ensemblelab.io.structures import write_representatives

    xyz, csv = write_representatives(reps, tmp_path / "reps.xyz")
    table = pd.read_csv(csv, dtype={"group": str})
    assert table["group"].tolist() == reps.table["group"].tolist()
    ase_io = pytest.importorskip("ase.io")
    frames = ase_io.read(xyz, index=":")
    assert len(frames) == len(reps.table)
    np.testing.assert_allclose(frames[0].positions, reps.geometries[0], atol=1e-7)
    assert str(frames[0].info["group"]) == reps.table["group"].iloc[0]
