"""Diabatisation: Loewdin, local diabatisation, Boys / GMH (method notes section 4.6)."""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
from scipy.linalg import sqrtm
from scipy.stats import special_ortho_group

from ensemblelab.compute.diabatic import (
    boys_objective,
    boys_rotation,
    diabatic_hamiltonian,
    ensemble_adt,
    gmh_two_state,
    loewdin,
    propagate_adt,
)
from ensemblelab.data.ensemble import Ensemble
from ensemblelab.errors import NumericalWarning


def test_loewdin_table_value():
    # method notes 4.6, computed independently (not published): A = [[0.965363, 0.260909],
    # [-0.260909, 0.965363]] (1e-6),
    # a rotation by -15.1240 deg, equal to S (S^T S)^(-1/2)
    s = np.array([[0.9, 0.3], [-0.2, 0.95]])
    a = loewdin(s)
    np.testing.assert_allclose(a, [[0.965363, 0.260909], [-0.260909, 0.965363]], atol=1e-6)
    np.testing.assert_allclose(a, s @ np.linalg.inv(sqrtm(s.T @ s)), atol=1e-12)
    assert math.degrees(math.atan2(a[1, 0], a[0, 0])) == pytest.approx(-15.1240, abs=1e-4)


def test_loewdin_near_swap():
    # method notes 4.6, computed independently (not published): S = [[0.05, 0.99], [0.98, -0.06]] ->
    # T (1e-6)
    t = loewdin(np.array([[0.05, 0.99], [0.98, -0.06]]))
    np.testing.assert_allclose(t, [[0.055751, 0.998445], [0.998445, -0.055751]], atol=1e-6)


def test_loewdin_warns_on_small_singular_value():
    s = np.array([[0.3, 0.0], [0.0, 1.0]])  # reference state 0 mostly outside the subspace
    with pytest.warns(NumericalWarning, match="smallest singular value"):
        loewdin(s)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        loewdin(np.eye(2))


def test_local_diabatisation_rotating_states_with_random_signs():
    # method notes 4.6, computed independently (not published): theta 0 -> 60 deg in 100 steps,
    # random signs per state and step
    # -> |A|^2 = [[0.25, 0.75], [0.75, 0.25]] at the end (1e-10)
    rng = np.random.default_rng(0)
    thetas = np.radians(np.linspace(0.0, 60.0, 101))
    vecs = []
    for k, th in enumerate(thetas):
        v = np.array([[math.cos(th), math.sin(th)], [-math.sin(th), math.cos(th)]])
        signs = rng.choice([-1.0, 1.0], size=2) if k else np.ones(2)
        vecs.append(signs[:, None] * v)  # row i = state i in the fixed basis
    o = np.stack([np.eye(2)] + [vecs[k - 1] @ vecs[k].T for k in range(1, 101)])
    a = propagate_adt(o)
    np.testing.assert_allclose(a[-1] ** 2, [[0.25, 0.75], [0.75, 0.25]], atol=1e-10)


def test_local_diabatisation_survives_state_swap():
    # synthetic: two diabats with a known ADT rotation; at step 50 the adiabatic labels swap
    # (trivial crossing); the propagated ADT must still match the exact one up to row order
    n_steps = 100
    thetas = np.radians(np.linspace(0.0, 40.0, n_steps))
    exact = []
    for k, th in enumerate(thetas):
        rot = np.array([[math.cos(th), math.sin(th)], [-math.sin(th), math.cos(th)]])
        if k >= 50:
            rot = rot[::-1]
        exact.append(rot)
    o = np.stack([np.eye(2)] + [exact[k - 1] @ exact[k].T for k in range(1, n_steps)])
    a = propagate_adt(o)
    np.testing.assert_allclose(a ** 2, np.stack(exact) ** 2, atol=1e-10)


def test_gmh_table_values():
    # method notes 4.6 row 1, computed independently (not published) (1e-7): theta 22.5 deg, |H_ab|
    # 0.1767767 eV,
    # d_mu_ab 2.8284271, |E_a - E_1| 0.0732233 eV, H^d
    r = gmh_two_state(e1=0.5, e2=0.0, dmu=2.0, mu12=1.0)
    assert math.degrees(r.theta) == pytest.approx(22.5, abs=1e-7)
    assert r.coupling == pytest.approx(0.1767767, abs=1e-7)
    assert r.dipole_difference == pytest.approx(2.8284271, abs=1e-7)
    assert abs(r.hamiltonian[0, 0] - 0.5) == pytest.approx(0.0732233, abs=1e-7)
    np.testing.assert_allclose(np.abs(r.hamiltonian), [[0.4267767, 0.1767767],
                                                      [0.1767767, 0.0732233]], atol=1e-7)
    # diagonalising the dipole matrix in the diabatic basis: Boys on a collinear case
    mu = np.zeros((2, 2, 3))
    mu[0, 0, 0], mu[1, 1, 0], mu[0, 1, 0] = 1.0, -1.0, 1.0
    mu[1, 0, 0] = 1.0
    rot, _ = boys_rotation(mu)
    assert abs(math.degrees(math.atan2(rot[1, 0], rot[0, 0]))) % 90 == pytest.approx(
        22.5, abs=1e-7)


def test_boys_vs_gmh_non_collinear():
    # method notes 4.6 row 2, computed independently (not published) (1e-5): theta_Boys 15.85874
    # deg; theta_GMH 13.28253 deg;
    # |H_ab|/dE = 0.2236068
    mu = np.zeros((2, 2, 3))
    mu[0, 0] = [1.0, 0.0, 0.0]
    mu[1, 1] = [-1.0, 0.0, 0.0]
    mu[0, 1] = mu[1, 0] = [0.5, 0.5, 0.0]
    rot, _ = boys_rotation(mu)
    theta = abs(math.degrees(math.atan2(rot[1, 0], rot[0, 0])))
    assert theta == pytest.approx(15.85874, abs=1e-5)
    d = mu[0, 0] - mu[1, 1]
    proj = float(mu[0, 1] @ d / np.linalg.norm(d))
    g = gmh_two_state(e1=1.0, e2=0.0, dmu=float(np.linalg.norm(d)), mu12=proj)
    assert math.degrees(g.theta) == pytest.approx(13.28253, abs=1e-5)
    assert g.coupling == pytest.approx(0.2236068, abs=1e-6)


def test_boys_three_states_beats_random_rotations():
    # method notes 4.6 last row, computed independently (not published): the objective never
    # decreases per sweep and the
    # converged value is >= the best of 2e4 random rotations
    rng = np.random.default_rng(5)
    m = rng.normal(size=(3, 3, 3))
    mu = 0.5 * (m + m.transpose(1, 0, 2))
    rot, hist = boys_rotation(mu)
    assert np.all(np.diff(hist) >= -1e-12)
    np.testing.assert_allclose(rot.T @ rot, np.eye(3), atol=1e-12)
    rand = special_ortho_group.rvs(3, size=20000, random_state=1)
    best = max(boys_objective(mu, r) for r in rand)
    assert hist[-1] >= best - 1e-12
    assert boys_objective(mu, rot) == pytest.approx(hist[-1], rel=1e-12)


def test_diabatic_hamiltonian_recovers_model():
    # synthetic model with known diabatic Hamiltonian: diagonalise, then rebuild it
    hd = np.array([[1.0, 0.1, 0.0], [0.1, 1.2, 0.05], [0.0, 0.05, 2.0]])
    e, v = np.linalg.eigh(hd)  # v[:, i] = adiabatic i in the diabatic basis
    adt = v.T  # A[i, alpha] = <phi_i|chi_alpha>
    np.testing.assert_allclose(diabatic_hamiltonian(e, adt), hd, atol=1e-12)


def test_ensemble_adt_from_step_and_reference_overlaps():
    n_steps, n = 30, 2
    thetas = np.radians(np.linspace(0.0, 30.0, n_steps))
    exact = np.stack([[[math.cos(t), math.sin(t)], [-math.sin(t), math.cos(t)]]
                      for t in thetas])
    step = np.stack([np.eye(2)] + [exact[k - 1] @ exact[k].T for k in range(1, n_steps)])
    base = dict(traj=np.zeros(n_steps, int), time=np.arange(n_steps, dtype=float),
                active=np.ones(n_steps, int), geometries=np.zeros((n_steps, 1, 3)),
                symbols=["H"], energies=np.zeros((n_steps, n)))
    ens = Ensemble.from_arrays(overlaps=step, **base)
    np.testing.assert_allclose(ensemble_adt(ens), exact, atol=1e-12)
    ref = Ensemble.from_arrays(overlaps=exact * 0.9, **base)  # scaled: Loewdin removes it
    np.testing.assert_allclose(ensemble_adt(ref, kind="reference"), exact, atol=1e-12)


def test_local_diabatisation_reproduces_demo_model_adt():
    # the demo model (ensemblelab.demo) stores its exact ADT matrices and the step overlaps;
    # propagating from the exact ADT at t = 0 must reproduce |A|^2 along every trajectory
    # (analytic model, computed independently of this module)
    from ensemblelab.demo import make_ensemble

    ens = make_ensemble(3, faults=False, velocities=False, t_max=200.0)
    traj = ens.snapshots["traj"].to_numpy()
    for t in np.unique(traj):
        rows = np.flatnonzero(traj == t)
        a = propagate_adt(ens.overlaps[rows], a0=ens.adt[rows[0]])
        np.testing.assert_allclose(a**2, ens.adt[rows] ** 2, atol=1e-10)
