"""Descriptor transformers: worked values, invariances, reference twins, sklearn's checks."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial.transform import Rotation
from sklearn.pipeline import make_pipeline
from sklearn.utils.estimator_checks import parametrize_with_checks

from ensemblelab.compute.structures import _kernels_geometry as K
from ensemblelab.compute.structures import _reference_geometry as REF
from ensemblelab.compute.structures.descriptors import (
    AlignedCartesian,
    CoulombEigenvalues,
    InternalCoordinates,
    InverseDistances,
    flatten,
)
from ensemblelab.units import BOHR_ANGSTROM

# method notes section 8 computed independently (not published): water geometry (Angstrom)
WATER = np.array([[0, 0, 0.1173], [0, 0.7572, -0.4692], [0, -0.7572, -0.4692]])
H2 = np.array([[0.0, 0, 0], [0.74, 0, 0]])

# sklearn's generic checks feed 2-D arrays of arbitrary width (2, 4, 5, 10 features);
# our transformers take flattened geometries and must reject widths that are not
# 3 * n_atoms (a documented ValueError), so exactly these checks are expected to fail:
WIDTH_CHECKS = {
    name: "feeds n_features not divisible by 3; flattened geometries need 3 * n_atoms"
    for name in (
        "check_dtype_object", "check_estimators_dtypes", "check_estimators_fit_returns_self",
        "check_estimators_overwrite_params", "check_fit2d_1sample", "check_fit_check_is_fitted",
        "check_fit_idempotent", "check_n_features_in", "check_n_features_in_after_fitting",
        "check_positive_only_tag_during_fit", "check_readonly_memmap_input",
    )
}


@parametrize_with_checks(
    [InternalCoordinates(), InverseDistances(), InverseDistances(sort="global", standardise=True),
     CoulombEigenvalues(), AlignedCartesian()],
    expected_failed_checks=lambda est: WIDTH_CHECKS,
)
def test_sklearn_compatible(estimator, check):
    check(estimator)


def test_width_error_is_clear():
    with pytest.raises(ValueError, match="not a multiple of 3"):
        InverseDistances().fit(np.zeros((3, 5)))


def test_coulomb_h2_bohr_and_angstrom():
    # method notes section 8 computed independently (not published): H2 r = 0.74 A -> (1.2151043,
    # -0.2151043) in bohr,
    # (1.8513514, -0.8513514) with r in Angstrom; tol 1e-7
    X = flatten(H2[None])
    np.testing.assert_allclose(CoulombEigenvalues(atomic_numbers=[1, 1]).fit_transform(X)[0],
                               [1.2151043, -0.2151043], atol=1e-7)
    np.testing.assert_allclose(
        CoulombEigenvalues(atomic_numbers=[1, 1], length_unit="angstrom").fit_transform(X)[0],
        [1.8513514, -0.8513514], atol=1e-7)


def test_coulomb_water():
    # method notes section 8 computed independently (not published): eigenvalues 74.050481,
    # 0.315644, 0.150570 (bohr);
    # C_OO = 0.5 * 8^2.4 = 73.516695; tol 1e-6
    F = CoulombEigenvalues(atomic_numbers=[8, 1, 1]).fit_transform(flatten(WATER[None]))
    np.testing.assert_allclose(F[0], [74.050481, 0.315644, 0.150570], atol=1e-6)
    assert 0.5 * 8**2.4 == pytest.approx(73.516695, abs=1e-6)


def test_sorted_inverse_distances_water():
    # method notes section 8 computed independently (not published): sorted 1/r = (1.044086,
    # 1.044086, 0.660328) 1/A; tol 1e-6
    F = InverseDistances(sort="global").fit_transform(flatten(WATER[None]))
    np.testing.assert_allclose(F[0], [1.044086, 1.044086, 0.660328], atol=1e-6)


def test_sorted_descriptors_permutation_invariant():
    # method notes section 8: any permutation of identical atoms leaves sorted vectors
    # unchanged (exact)
    rng = np.random.default_rng(0)
    sym = ["C", "C", "O", "H", "H", "H"]
    X = rng.normal(scale=1.3, size=(8, 6, 3))
    perm = [1, 0, 2, 5, 3, 4]
    z = [6, 6, 8, 1, 1, 1]
    for tr in (InverseDistances(sort="element_pair", symbols=sym), InverseDistances(sort="global"),
               CoulombEigenvalues(atomic_numbers=z)):
        a = tr.fit_transform(flatten(X))
        b = tr.fit_transform(flatten(X[:, perm]))
        if isinstance(tr, CoulombEigenvalues):
            np.testing.assert_allclose(a, b, atol=1e-10)  # eigen solver round-off
        else:
            np.testing.assert_array_equal(a, b)


def test_rigid_motion_invariance():
    rng = np.random.default_rng(2)
    X = rng.normal(scale=1.3, size=(6, 5, 3))
    M = X @ Rotation.random(random_state=5).as_matrix().T + np.array([1.0, -2, 0.5])
    ic = InternalCoordinates(bonds=[(0, 1)], angles=[(0, 1, 2)], dihedrals=[(0, 1, 2, 3)],
                             pyramidalisations=[(4, 0, 1, 2)])
    for tr in (ic, InverseDistances(), CoulombEigenvalues(atomic_numbers=[6, 6, 8, 1, 1]),
               AlignedCartesian()):
        a = tr.fit(flatten(X)).transform(flatten(X))
        b = tr.transform(flatten(M))
        np.testing.assert_allclose(a, b, atol=1e-9)


def test_kernels_match_reference_loops():
    rng = np.random.default_rng(4)
    X = rng.normal(scale=1.5, size=(7, 6, 3))
    np.testing.assert_allclose(K.inverse_distances(X), REF.inverse_distances_loop(X), rtol=1e-13)
    z = np.array([6, 6, 8, 1, 1, 7])
    np.testing.assert_allclose(K.coulomb_eigenvalues(X, z, length_factor=1 / BOHR_ANGSTROM),
                               REF.coulomb_eigenvalues_loop(X, z, 1 / BOHR_ANGSTROM), atol=1e-9)
    tri = np.array([[0, 1, 2], [3, 4, 5], [5, 0, 2]])
    np.testing.assert_allclose(K.bond_angles(X, tri), REF.bond_angles_loop(X, tri), atol=1e-12)
    quads = np.array([[0, 1, 2, 3], [5, 4, 3, 2]])
    c, s = K.dihedral_cos_sin(X, quads)
    ref = REF.dihedral_loop(X, quads)
    np.testing.assert_allclose(c, np.cos(ref), atol=1e-12)
    np.testing.assert_allclose(s, np.sin(ref), atol=1e-12)
    np.testing.assert_allclose(K.pyramidalisation(X, quads), REF.pyramidalisation_loop(X, quads),
                               atol=1e-12)


def test_internal_coordinates_known_values():
    # analytic: a planar trans zig-zag has dihedral 180 deg (cos -1, sin 0); a square
    # pyramid apex 0.5 A above its base plane has height 0.5
    X = np.array([[[0.0, 1, 0], [0, 0, 0], [1, 0, 0], [1, -1, 0], [0.3, 0.3, 0.5]]])
    ic = InternalCoordinates(bonds=[(0, 1)], angles=[(0, 1, 2)], dihedrals=[(0, 1, 2, 3)],
                             pyramidalisations=[(4, 1, 2, 0)])
    F = ic.fit_transform(flatten(X))[0]
    np.testing.assert_allclose(F, [1.0, np.pi / 2, -1.0, 0.0, 0.5], atol=1e-12)
    assert list(ic.get_feature_names_out()) == [
        "r_0_1", "angle_0_1_2", "cos_dihedral_0_1_2_3", "sin_dihedral_0_1_2_3", "pyr_4_1_2_0"]
    # sign convention (from memory: IUPAC, phi = atan2(|b2| b1.(b2 x b3), (b1 x b2).(b2 x b3)));
    # worked by hand for this frame: b1.(b2 x b3) = +1 -> phi = +90 deg
    Y = np.array([[[0.0, 1, 0], [0, 0, 0], [1, 0, 0], [1, 0, 1]]])
    c, s = K.dihedral_cos_sin(Y, np.array([[0, 1, 2, 3]]))
    assert (c[0, 0], s[0, 0]) == pytest.approx((0.0, 1.0), abs=1e-12)
    with pytest.raises(ValueError, match="outside"):
        InternalCoordinates(bonds=[(0, 9)]).fit(flatten(X))


def test_standardise_and_pipeline():
    rng = np.random.default_rng(0)
    X = flatten(rng.normal(size=(50, 4, 3)))
    F = InverseDistances(standardise=True).fit_transform(X)
    np.testing.assert_allclose(F.mean(0), 0, atol=1e-12)
    np.testing.assert_allclose(F.std(0), 1, atol=1e-12)
    from sklearn.cluster import KMeans

    labels = make_pipeline(InverseDistances(standardise=True),
                           KMeans(2, n_init=2, random_state=0)).fit_predict(X)
    assert labels.shape == (50,)
