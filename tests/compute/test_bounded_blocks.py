"""Bounded-memory blocks (issue 20): the blocked kernels give the unblocked results.

Pair distances, the bond-topology check, the standardised clustering features and the
silhouette now work a few MB at a time. Each is compared with a naive reference (or
scikit-learn without a memory limit) with the block size forced small, so that many
blocks and a ragged last block are exercised.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from ensemblelab.compute.structures import _flag_events
from ensemblelab.compute.structures import _kernels_geometry as K
from ensemblelab.compute.structures.clustering import _silhouette, cluster_snapshots
from ensemblelab.compute.structures.outliers import flag_trajectories
from ensemblelab.testing import make_toy_ensemble

sys.path.insert(0, str(Path(__file__).parent))
from _structures_synth import FAULT_KINDS, build, inject, make_clean  # noqa: E402


def test_pair_distances_blocks_match_the_naive_norm(monkeypatch):
    rng = np.random.default_rng(11)
    X = rng.normal(0.0, 1.5, (1003, 7, 3))
    i, j = K.pair_indices(7)
    # reference: |x_i - x_j| by numpy.linalg.norm (common practice)
    ref = np.linalg.norm(X[:, i] - X[:, j], axis=-1)
    one_block = K.pair_distances(X, i, j)
    monkeypatch.setattr(K, "PAIR_BLOCK_ELEMENTS", 5 * len(i) + 3)  # 5 rows, ragged end
    blocked = K.pair_distances(X, i, j)
    np.testing.assert_allclose(blocked, ref, rtol=1e-13, atol=0)
    np.testing.assert_array_equal(blocked, one_block)  # row by row: the blocks change nothing
    inv = K.inverse_distances(X)
    np.testing.assert_allclose(inv, 1.0 / ref, rtol=1e-13)


def test_inverse_distances_clip_coincident_atoms():
    X = np.zeros((2, 2, 3))
    X[1, 1, 0] = 2.0
    # 1 / max(r, 1e-8): 1e8 for coincident atoms, 0.5 at 2 Angstrom (computed independently)
    np.testing.assert_allclose(K.inverse_distances(X)[:, 0], [1e8, 0.5])


def test_topology_flags_do_not_depend_on_the_block_size(monkeypatch):
    d = make_clean(24, seed=4)
    for k, kind in enumerate(FAULT_KINDS):
        inject(d, k, kind, 30)
    ens = build(d)
    big = flag_trajectories(ens, multivariate=False)
    monkeypatch.setattr(_flag_events, "TOPOLOGY_CHUNK_ELEMENTS", 7)  # one row per block
    small = flag_trajectories(ens, multivariate=False)
    assert big["flags"].str.contains("topology_change|bond_formed").any()
    pd.testing.assert_frame_equal(big, small)


def test_in_place_standardised_features_equal_the_formula_and_leave_data_alone():
    ens = make_toy_ensemble(12, seed=5, t_max=60.0, n_atoms=6)
    before = ens.geometries.copy()
    res = cluster_snapshots(ens, n_clusters=2)
    np.testing.assert_array_equal(ens.geometries, before)  # the ensemble is not modified
    fz = res.featuriser
    rows = np.arange(0, ens.n_snapshots, 3)
    # reference: (1/r - mean) / scale with numpy, standardisation by definition (common practice)
    i, j = K.pair_indices(ens.n_atoms)
    G = ens.geometries[rows]
    raw = 1.0 / np.maximum(np.linalg.norm(G[:, i] - G[:, j], axis=-1), 1e-8)
    np.testing.assert_allclose(fz(rows), (raw - fz.mean_) / fz.scale_, rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("n", [50, 700])
def test_silhouette_with_bounded_working_memory_equals_scikit_learn(n):
    from sklearn.metrics import silhouette_samples

    rng = np.random.default_rng(n)
    F = np.r_[rng.normal(0, 1, (n // 2, 4)), rng.normal(3, 1, (n - n // 2, 4))]
    labels = np.r_[np.zeros(n // 2, int), np.ones(n - n // 2, int)]
    labels[::17] = -1  # noise points are left out
    ok = labels >= 0
    # reference: scikit-learn's silhouette_samples with its default working memory
    ref = silhouette_samples(F[ok], labels[ok])
    mean, per = _silhouette(F, labels)
    assert mean == pytest.approx(float(ref.mean()), rel=1e-12)
    assert per[1] == pytest.approx(float(ref[labels[ok] == 1].mean()), rel=1e-12)
