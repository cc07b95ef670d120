"""Descriptor transformers: worked values, invariances, reference twins, sklearn's checks."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial.transform import Rotation
from sklearn.pipeline import make_pipeline
from sklearn.utils.estimator_checks import estimator_checks_generator

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

# computed independently (not published): water geometry (Angstrom)
WATER = np.array([[0, 0, 0.1173], [0, 0.7572, -0.4692], [0, -0.7572, -0.4692]])
H2 = np.array([[0.0, 0, 0], [0.74, 0, 0]])

ESTIMATORS = [InternalCoordinates(), InverseDistances(),
              InverseDistances(sort="global", standardise=True), CoulombEigenvalues(),
              AlignedCartesian()]

# sklearn's generic checks feed 2-D arrays of arbitrary width (2, 4, 5, 10 features); our
# transformers take flattened geometries and reject widths that are not 3 * n_atoms (a
# documented ValueError). The generic checks that use such widths are skipped here and their
# contracts are tested below at a valid width (test_contract_*), one test per check:
WIDTH_CHECKS = (
    "check_dtype_object", "check_estimators_dtypes", "check_estimators_fit_returns_self",
    "check_estimators_overwrite_params", "check_fit2d_1sample", "check_fit_check_is_fitted",
    "check_fit_idempotent", "check_n_features_in", "check_n_features_in_after_fitting",
    "check_positive_only_tag_during_fit", "check_readonly_memmap_input",
)


def _check_name(check):
    return getattr(check, "func", check).__name__


GENERIC_CHECKS = [(est, check) for estimator in ESTIMATORS
                  for est, check in estimator_checks_generator(estimator)
                  if _check_name(check) not in WIDTH_CHECKS]


def test_width_checks_exist_in_sklearn():
    # a renamed check in a future scikit-learn must not silently drop a contract
    names = {_check_name(c) for _, c in estimator_checks_generator(AlignedCartesian())}
    assert set(WIDTH_CHECKS) <= names, set(WIDTH_CHECKS) - names


@pytest.mark.parametrize("estimator, check", GENERIC_CHECKS,
                         ids=[f"{e!r}-{_check_name(c)}" for e, c in GENERIC_CHECKS])
def test_sklearn_compatible(estimator, check):
    check(estimator)


def _geometries(n_samples=12, n_atoms=4, seed=0):
    """Flattened random geometries (n_samples, 3 * n_atoms), atoms >= 0.5 A apart."""
    rng = np.random.default_rng(seed)
    base = np.array([[0.0, 0, 0], [1.1, 0, 0], [0, 1.2, 0], [0.3, 0.4, 1.3]])[:n_atoms]
    return flatten(base[None] + 0.05 * rng.standard_normal((n_samples, n_atoms, 3)))


def _params_snapshot(est):
    return {k: (np.array(v, copy=True) if isinstance(v, np.ndarray) else v)
            for k, v in est.get_params(deep=False).items()}


def _ids(est):
    return repr(est)


@pytest.mark.parametrize("estimator", ESTIMATORS, ids=_ids)
def test_contract_fit_returns_self_and_sets_n_features_in(estimator):
    # check_estimators_fit_returns_self, check_n_features_in (common practice: sklearn contract)
    from sklearn.base import clone

    est = clone(estimator)
    X = _geometries()
    assert not hasattr(est, "n_features_in_")
    assert est.fit(X) is est
    assert est.n_features_in_ == X.shape[1] == 12


@pytest.mark.parametrize("estimator", ESTIMATORS, ids=_ids)
def test_contract_check_is_fitted(estimator):
    # check_fit_check_is_fitted: unfitted -> NotFittedError, fitted -> passes
    from sklearn.base import clone
    from sklearn.exceptions import NotFittedError
    from sklearn.utils.validation import check_is_fitted

    est = clone(estimator)
    with pytest.raises(NotFittedError):
        check_is_fitted(est)
    with pytest.raises(NotFittedError):
        est.transform(_geometries())
    check_is_fitted(est.fit(_geometries()))


@pytest.mark.parametrize("estimator", ESTIMATORS, ids=_ids)
def test_contract_fit_is_idempotent_and_leaves_params_alone(estimator):
    # check_fit_idempotent and check_estimators_overwrite_params
    from sklearn.base import clone

    est = clone(estimator)
    before = _params_snapshot(est)
    X, X2 = _geometries(seed=1), _geometries(seed=2)
    first = est.fit(X).transform(X2)
    est.fit(_geometries(seed=3)).fit(X)
    np.testing.assert_allclose(est.transform(X2), first, rtol=1e-12, atol=1e-12)
    after = _params_snapshot(est)
    assert before.keys() == after.keys()
    for k in before:
        np.testing.assert_equal(after[k], before[k], err_msg=k)


@pytest.mark.parametrize("estimator", ESTIMATORS, ids=_ids)
def test_contract_wrong_width_after_fit_is_rejected(estimator):
    # check_n_features_in_after_fitting: transform with another width -> ValueError naming both
    from sklearn.base import clone

    est = clone(estimator).fit(_geometries())
    with pytest.raises(ValueError, match="X has 9 features, but .* is expecting 12 features"):
        est.transform(_geometries(n_atoms=3))


@pytest.mark.parametrize("estimator", ESTIMATORS, ids=_ids)
def test_contract_dtypes_and_object_arrays(estimator):
    # check_estimators_dtypes and check_dtype_object: float32 / integer / numeric object
    # input gives the float64 result; an object array of strings is refused
    from sklearn.base import clone

    X = np.round(_geometries() * 4)  # integral values so that int input is exact
    ref = clone(estimator).fit(X).transform(X)
    for dtype in (np.float32, np.int32, np.int64, object):
        got = clone(estimator).fit(X.astype(dtype)).transform(X.astype(dtype))
        assert got.dtype == np.float64
        np.testing.assert_allclose(got, ref, rtol=1e-6 if dtype == np.float32 else 1e-12,
                                   atol=1e-6 if dtype == np.float32 else 1e-12)
    bad = X.astype(object)
    bad[0, 0] = "one"
    with pytest.raises((TypeError, ValueError)):
        clone(estimator).fit(bad)


@pytest.mark.parametrize("estimator", ESTIMATORS, ids=_ids)
def test_contract_fit_on_one_sample(estimator):
    # check_fit2d_1sample: one geometry is enough to fit (the descriptors are per sample)
    from sklearn.base import clone

    X = _geometries()
    est = clone(estimator).fit(X[:1])
    out = est.transform(X)
    assert out.shape[0] == X.shape[0] and np.all(np.isfinite(out))


@pytest.mark.parametrize("estimator", ESTIMATORS, ids=_ids)
def test_contract_negative_coordinates_and_positive_only_tag(estimator):
    # check_positive_only_tag_during_fit: coordinates may be negative, and the tag says so
    from sklearn.base import clone
    from sklearn.utils import get_tags

    est = clone(estimator)
    assert get_tags(est).input_tags.positive_only is False
    X = _geometries() - 10.0
    assert np.all(est.fit(X).transform(X) == clone(estimator).fit(X + 0.0).transform(X))


@pytest.mark.parametrize("estimator", ESTIMATORS, ids=_ids)
def test_contract_read_only_memmap_input(estimator, tmp_path):
    # check_readonly_memmap_input: fit and transform on a read-only memory map
    from sklearn.base import clone

    X = _geometries()
    path = tmp_path / "x.dat"
    mm = np.memmap(path, dtype=np.float64, mode="w+", shape=X.shape)
    mm[:] = X
    mm.flush()
    del mm
    ro = np.memmap(path, dtype=np.float64, mode="r", shape=X.shape)
    assert not ro.flags.writeable
    got = clone(estimator).fit(ro).transform(ro)
    np.testing.assert_allclose(got, clone(estimator).fit(X).transform(X), rtol=1e-12,
                               atol=1e-12)


def test_width_error_is_clear():
    with pytest.raises(ValueError, match="not a multiple of 3"):
        InverseDistances().fit(np.zeros((3, 5)))


def test_coulomb_h2_bohr_and_angstrom():
    # computed independently (not published): H2 r = 0.74 A -> (1.2151043,
    # -0.2151043) in bohr,
    # (1.8513514, -0.8513514) with r in Angstrom; tol 1e-7
    X = flatten(H2[None])
    np.testing.assert_allclose(CoulombEigenvalues(atomic_numbers=[1, 1]).fit_transform(X)[0],
                               [1.2151043, -0.2151043], atol=1e-7)
    np.testing.assert_allclose(
        CoulombEigenvalues(atomic_numbers=[1, 1], length_unit="angstrom").fit_transform(X)[0],
        [1.8513514, -0.8513514], atol=1e-7)


def test_coulomb_water():
    # computed independently (not published): eigenvalues 74.050481,
    # 0.315644, 0.150570 (bohr);
    # C_OO = 0.5 * 8^2.4 = 73.516695; tol 1e-6
    F = CoulombEigenvalues(atomic_numbers=[8, 1, 1]).fit_transform(flatten(WATER[None]))
    np.testing.assert_allclose(F[0], [74.050481, 0.315644, 0.150570], atol=1e-6)
    assert 0.5 * 8**2.4 == pytest.approx(73.516695, abs=1e-6)


def test_sorted_inverse_distances_water():
    # computed independently (not published): sorted 1/r = (1.044086,
    # 1.044086, 0.660328) 1/A; tol 1e-6
    F = InverseDistances(sort="global").fit_transform(flatten(WATER[None]))
    np.testing.assert_allclose(F[0], [1.044086, 1.044086, 0.660328], atol=1e-6)


def test_sorted_descriptors_permutation_invariant():
    # any permutation of identical atoms leaves sorted vectors
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
