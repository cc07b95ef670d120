"""Clustering snapshots and hops: planted clusters recovered (adjusted Rand index)."""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest
from sklearn.cluster import AgglomerativeClustering, KMeans
from sklearn.metrics import adjusted_rand_score

from ensemblelab.compute.structures.clustering import (
    cluster_hops,
    cluster_snapshots,
    wilson_interval,
)
from ensemblelab.compute.structures.descriptors import InternalCoordinates
from ensemblelab.errors import SchemaError

sys.path.insert(0, str(Path(__file__).parent))
from _structures_synth import build, make_clean  # noqa: E402

N_GROUPS = 3


@pytest.fixture(scope="module")
def planted():
    groups = np.arange(24) % N_GROUPS
    d = make_clean(24, seed=3, groups=groups)
    ens = build(d)
    truth = groups[ens.traj_index]
    return ens, truth


def test_wilson_interval_matches_scipy_values():
    # computed independently (not published) (= scipy binomtest): 7/50 ->
    # [0.069508, 0.261862]; 0/20 -> [0, 0.161125]
    lo, hi = wilson_interval(np.array([7 / 50, 0.0]), np.array([50, 20]))
    np.testing.assert_allclose(lo, [0.069508, 0.0], atol=1e-6)
    np.testing.assert_allclose(hi, [0.261862, 0.161125], atol=1e-6)


@pytest.mark.parametrize("method", ["kmeans", "agglomerative", "density"])
def test_planted_clusters_recovered(planted, method):
    ens, truth = planted
    res = cluster_snapshots(ens, by_state=False, n_clusters=N_GROUPS, method=method,
                            max_fit_samples=800)
    # reference metric: sklearn.metrics.adjusted_rand_score (1 = identical partitions)
    assert adjusted_rand_score(truth, res.labels) > 0.95
    assert len(res.labels) == ens.n_snapshots


def test_by_state_labels_and_summary(planted):
    ens, truth = planted
    res = cluster_snapshots(ens, n_clusters=N_GROUPS)
    active = ens.snapshots["active"].to_numpy()
    for s in (1, 2):
        on = active == s
        assert all(lab.startswith(f"S{s}:") for lab in res.labels[on])
        assert adjusted_rand_score(truth[on], res.labels[on]) > 0.95
    summ = res.summary
    assert summ["size"].sum() == ens.n_snapshots
    assert summ["fraction"].sum() == pytest.approx(1.0)
    assert (summ["lower"] <= summ["fraction"]).all() and (summ["fraction"] <= summ["upper"]).all()
    assert summ["silhouette"].between(-1, 1).all()
    assert res.mean_features.shape[0] == len(summ)
    prof = res.time_profile(bins=5)
    np.testing.assert_allclose(prof.sum(axis=1), 1.0)
    new = res.assign_to(ens)
    assert list(new.snapshots["cluster"]) == list(res.labels)
    assert "cluster" not in ens.snapshots.columns  # source untouched


def test_any_sklearn_estimator_and_features(planted):
    ens, truth = planted
    for est in (KMeans(n_clusters=3, n_init=3, random_state=0),
                AgglomerativeClustering(n_clusters=3)):
        res = cluster_snapshots(ens, estimator=est, by_state=False, max_fit_samples=500)
        assert adjusted_rand_score(truth, res.labels) > 0.95
    ic = InternalCoordinates(bonds=[(2, 3), (1, 3), (0, 3)])
    for feats in (ic, "aligned", "coulomb", "sorted_inverse_distances"):
        res = cluster_snapshots(ens, features=feats, by_state=False, n_clusters=3)
        assert adjusted_rand_score(truth, res.labels) > 0.9, feats
    # precomputed features and columns
    res = cluster_snapshots(ens, features=truth[:, None].astype(float), by_state=False,
                            n_clusters=3)
    assert adjusted_rand_score(truth, res.labels) == 1.0
    with pytest.raises(SchemaError, match="features"):
        cluster_snapshots(ens, features="bogus")


def test_labels_invariant_to_rigid_motion_of_frames(planted):
    # inverse distances are rotation invariant: rotating every frame changes nothing
    ens, _ = planted
    from scipy.spatial.transform import Rotation

    rot = ens.replace(geometries=ens.geometries @ Rotation.random(random_state=1).as_matrix().T)
    a = cluster_snapshots(ens, n_clusters=3).labels
    b = cluster_snapshots(rot, n_clusters=3).labels
    assert adjusted_rand_score(a, b) == 1.0


def test_cluster_hops_counts(planted):
    ens, truth = planted
    hc = cluster_hops(ens, n_clusters=N_GROUPS, references={"g0": ens.geometries[0]})
    hops = ens.hops()
    assert len(hc.hops) == len(hops) == ens.n_trajectories  # one hop per trajectory
    assert hc.counts["count"].sum() == len(hops)
    hop_truth = truth[hc.hops["row"].to_numpy()]
    assert adjusted_rand_score(hop_truth, hc.hops["cluster"]) > 0.9
    assert (hc.hops["gap"] < 0.5).all()
    assert {"nearest_reference", "reference_rmsd", "de_kin"} <= set(hc.hops.columns)
    np.testing.assert_allclose(hc.geometries, ens.geometries[hc.hops["row"].to_numpy()])
    assert hc.counts["fraction"].sum() == pytest.approx(1.0)


def test_subsample_assignment_path(planted):
    # fewer fitted samples than snapshots exercises predict / nearest-centroid assignment
    ens, truth = planted
    for method in ("kmeans", "agglomerative"):
        res = cluster_snapshots(ens, by_state=False, n_clusters=3, method=method,
                                max_fit_samples=200, chunk_size=300)
        assert adjusted_rand_score(truth, res.labels) > 0.95


def test_plotting_smoke(planted, tmp_path):
    import matplotlib

    matplotlib.use("Agg")
    from ensemblelab.compute.structures.outliers import flag_trajectories
    from ensemblelab.plotting.structures import (
        plot_cluster_summary,
        plot_cluster_time_profile,
        plot_flags,
    )

    ens, _ = planted
    res = cluster_snapshots(ens, n_clusters=2)
    ax = plot_cluster_summary(res)
    assert len(ax.patches) == len(res.summary)
    ax = plot_cluster_time_profile(res, bins=5)
    assert len(ax.collections) >= 1
    ax = plot_flags(flag_trajectories(ens, multivariate=False))
    ax.figure.savefig(tmp_path / "f.png")
    assert (tmp_path / "f.png").stat().st_size > 0
