"""Alignment and RMSD: Kabsch, QCP, mean structures, assignment of identical atoms."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from ensemblelab.compute.structures import _kernels_geometry as K
from ensemblelab.compute.structures import _reference_geometry as REF
from ensemblelab.compute.structures.geometry import (
    align_ensemble,
    connectivity,
    kabsch_align,
    mean_structure,
    permutation_rmsd,
    rmsd,
)
from ensemblelab.errors import SchemaError
from ensemblelab.testing import make_toy_ensemble

# a unit tetrahedron corner set (Angstrom)
P4 = np.array([[0.0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]])


def _rz(deg):
    return Rotation.from_euler("z", deg, degrees=True).as_matrix()


def test_kabsch_rotated_translated_is_zero_and_recovers_rotation():
    # computed independently (not published): Q = P rotated 30 deg about z,
    # translated (1, 2, 3) -> RMSD 0,
    # R = Rz(30 deg), tol 1e-12
    Q = P4 @ _rz(30).T + np.array([1.0, 2, 3])
    res = kabsch_align(P4, Q)
    assert res.rmsd[0] == pytest.approx(0.0, abs=1e-12)
    np.testing.assert_allclose(res.rotations[0], _rz(30), atol=1e-12)
    np.testing.assert_allclose(res.aligned[0], Q, atol=1e-12)


def test_kabsch_mirror_values():
    # computed independently (not published): x -> -x mirror; proper-rotation
    # RMSD 0.5 A, centred
    # unrotated RMSD 0.8660254 A (tol 1e-10)
    M = P4 * np.array([-1.0, 1, 1])
    assert rmsd(M, P4, method="kabsch")[0] == pytest.approx(0.5, abs=1e-10)
    assert rmsd(M, P4, method="qcp")[0] == pytest.approx(0.5, abs=1e-10)
    Pc, Mc = P4 - P4.mean(0), M - M.mean(0)
    assert np.sqrt(np.mean(np.sum((Pc - Mc) ** 2, 1))) == pytest.approx(0.8660254, abs=1e-7)
    # with reflections allowed the mirror image superimposes exactly (analytic)
    assert rmsd(M, P4, method="kabsch", allow_reflection=True)[0] == pytest.approx(0, abs=1e-12)
    assert rmsd(M, P4, method="qcp", allow_reflection=True)[0] == pytest.approx(0, abs=1e-6)


def test_rmsd_one_atom_shifted():
    # computed independently (not published): "atom 1" (1-based: the atom at
    # the origin) moved by 0.1 A
    # along x -> RMSD 0.0402486 A (tol 1e-7)
    Q = P4.copy()
    Q[0, 0] += 0.1
    for method in ("kabsch", "qcp"):
        assert rmsd(Q, P4, method=method)[0] == pytest.approx(0.0402486, abs=1e-7)


def test_kabsch_matches_scipy_align_vectors():
    # reference library: scipy.spatial.transform.Rotation.align_vectors on centred sets
    rng = np.random.default_rng(3)
    w = rng.uniform(0.5, 3.0, 7)
    for _ in range(5):
        P = rng.normal(size=(7, 3))
        Q = P @ Rotation.random(random_state=rng).as_matrix().T + 0.2 * rng.normal(size=(7, 3))
        cP = (w[:, None] * P).sum(0) / w.sum()
        cQ = (w[:, None] * Q).sum(0) / w.sum()
        rot, _ = Rotation.align_vectors(Q - cQ, P - cP, weights=w)
        res = kabsch_align(P, Q, weights=w)
        np.testing.assert_allclose(res.rotations[0], rot.as_matrix(), atol=1e-10)
        direct = np.sqrt(np.sum(w * np.sum((rot.apply(P - cP) - (Q - cQ)) ** 2, 1)) / w.sum())
        assert res.rmsd[0] == pytest.approx(direct, abs=1e-12)


def test_qcp_equals_kabsch_batch_and_reference_loop():
    # QCP must agree with Kabsch to 1e-10 (issue requirement); the naive per-frame SVD loop
    # is the reference twin. RMSDs here are ~0.1-1 A (QCP precision limit is near 0).
    rng = np.random.default_rng(0)
    P = rng.normal(size=(500, 12, 3)) + 3.0
    Q1 = rng.normal(size=(12, 3))
    Qn = P @ Rotation.random(random_state=1).as_matrix().T + 0.3 * rng.normal(size=P.shape)
    w = rng.uniform(1, 16, 12)
    for Q in (Q1, Qn):
        kab = K.kabsch_rmsd(P, Q, w)[0]
        qcp = K.qcp_rmsd(P, Q, w)
        loop, _ = REF.kabsch_rmsd_loop(P, Q, w)
        np.testing.assert_allclose(qcp, kab, atol=1e-10, rtol=0)
        np.testing.assert_allclose(kab, loop, atol=1e-12, rtol=0)


def test_rmsd_rigid_motion_invariance_and_subset():
    rng = np.random.default_rng(5)
    X = rng.normal(size=(20, 6, 3))
    ref = rng.normal(size=(6, 3))
    moved = X @ Rotation.random(random_state=2).as_matrix().T + np.array([4.0, -1, 2])
    np.testing.assert_allclose(rmsd(X, ref), rmsd(moved, ref), atol=1e-10)
    # atom subset: same as slicing (analytic)
    np.testing.assert_allclose(rmsd(X, ref, atoms=[0, 2, 3]),
                               rmsd(X[:, [0, 2, 3]], ref[[0, 2, 3]]), atol=1e-12)


def test_mass_weighted_equals_repeated_atoms():
    # integer weights = atoms repeated that many times (analytic identity)
    rng = np.random.default_rng(8)
    X = rng.normal(size=(10, 3, 3))
    ref = rng.normal(size=(3, 3))
    w = np.array([1.0, 2.0, 3.0])
    rep = [0, 1, 1, 2, 2, 2]
    np.testing.assert_allclose(rmsd(X, ref, weights=w), rmsd(X[:, rep], ref[rep]), atol=1e-12)
    np.testing.assert_allclose(rmsd(X, ref, weights="mass", symbols=["H", "H", "H"]),
                               rmsd(X, ref), atol=1e-12)


def test_mean_structure_recovers_shape_of_rotated_copies():
    rng = np.random.default_rng(1)
    shape = rng.normal(size=(5, 3))
    rots = Rotation.random(30, random_state=4).as_matrix()
    X = np.einsum("nij,aj->nai", rots, shape) + rng.normal(size=(30, 1, 3))
    ref, _ = mean_structure(X)
    assert rmsd(ref, shape, method="kabsch")[0] == pytest.approx(0.0, abs=1e-8)
    res = kabsch_align(X)  # default: iterative mean
    assert np.max(res.rmsd) < 1e-8
    assert np.isfinite(res.n_iter)


def test_permutation_rmsd_undoes_a_permutation_of_identical_atoms():
    # a random 6-atom structure (C3H3); H and C labels permuted within their element and the
    # frame rotated: the assignment recovers RMSD 0 (analytic) while plain Kabsch does not
    rng = np.random.default_rng(11)
    mol = rng.normal(scale=1.5, size=(6, 3))
    symbols = ["C", "C", "C", "H", "H", "H"]
    perm = np.array([2, 0, 1, 5, 3, 4])
    frame = mol[perm] @ Rotation.random(random_state=3).as_matrix().T + 1.0
    assert rmsd(frame, mol, method="kabsch")[0] > 0.3
    r, found = permutation_rmsd(frame, mol, symbols=symbols)
    assert r[0] == pytest.approx(0.0, abs=1e-10)
    np.testing.assert_allclose(frame[found[0]] - frame[found[0]].mean(0),
                               (mol - mol.mean(0)) @ Rotation.random(random_state=3)
                               .as_matrix().T, atol=1e-10)
    with pytest.raises(SchemaError, match="symbols must have"):
        permutation_rmsd(frame, mol, symbols=["C"])


def test_align_ensemble_returns_new_aligned_ensemble():
    ens = make_toy_ensemble(5, t_max=20.0)
    out = align_ensemble(ens, reference="first")
    assert out is not ens
    assert not np.shares_memory(out.geometries, ens.geometries)
    # after alignment onto the first frame, RMSD without further rotation equals fitted RMSD
    ref = out.geometries[0]
    direct = np.sqrt(np.mean(np.sum((out.geometries - ref) ** 2, axis=2), axis=1))
    fitted = rmsd(ens.geometries, ens.geometries[0], weights=ens.masses, method="kabsch")
    np.testing.assert_allclose(direct, fitted, atol=1e-10)


def test_connectivity_water():
    # covalent radii (from memory, Dalton Trans. 2008): O-H 0.957 A < 1.25 (0.66 + 0.31)
    water = np.array([[0, 0, 0.1173], [0, 0.7572, -0.4692], [0, -0.7572, -0.4692]])
    assert connectivity(water, ["O", "H", "H"])[0].tolist() == [True, True, False]


def test_errors_name_the_argument():
    with pytest.raises(SchemaError, match="geometries must have shape"):
        rmsd(np.zeros((3, 4)), P4)
    with pytest.raises(SchemaError, match="method must be"):
        rmsd(P4, P4, method="svd")
    with pytest.raises(SchemaError, match="weights must be"):
        rmsd(P4, P4, weights=[1.0, 2.0])
    with pytest.raises(SchemaError, match="atoms must be indices"):
        rmsd(P4, P4, atoms=[7])


def test_input_not_modified():
    X = np.random.default_rng(0).normal(size=(4, 5, 3))
    before = X.copy()
    kabsch_align(X)
    rmsd(X, X[0])
    np.testing.assert_array_equal(X, before)


def test_benchmark_smoke():
    # the benchmark's functions run at tiny size (keeps benchmarks/bench_structures.py alive)
    import importlib.util
    from pathlib import Path

    path = Path(__file__).resolve().parents[2] / "benchmarks" / "bench_structures.py"
    spec = importlib.util.spec_from_file_location("bench_structures", path)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    r = mod.bench_rmsd(300, loop_frames=50)
    assert r["max_abs_diff"] < 1e-10 and r["speedup_qcp"] > 0
    c = mod.bench_clustering(2000)
    assert c["n_snapshots"] == 2000 and c["n_clusters"] >= 2
