"""Tests of Wigner sampling and doorway selection."""

from __future__ import annotations

import gzip

import numpy as np
import pandas as pd
import pytest

from ensemblelab.compute.dynamics.initial import (
    doorway_table,
    select_initial_conditions,
    write_initial_conditions,
)
from ensemblelab.compute.dynamics.wigner import (
    normal_modes_from_hessian,
    sample_normal_modes,
    sample_wigner,
    sample_wigner_from_hessian,
    thermal_factor,
)
from ensemblelab.errors import NumericalWarning, SchemaError
from ensemblelab.units import AMU_ME, HARTREE_CM1, HARTREE_EV


# ------------------------------------------------------------------ Wigner: exact values
def test_thermal_factor_values():
    # computed independently (not published): alpha(300 K) for 100, 500,
    # 1000, 3000 cm^-1
    alpha = thermal_factor([100.0, 500.0, 1000.0, 3000.0], 300.0)
    np.testing.assert_allclose(alpha, [4.249836, 1.199985, 1.016664, 1.0000011], rtol=1e-6)
    np.testing.assert_array_equal(thermal_factor([100.0], 0.0), [1.0])
    with pytest.raises(SchemaError, match="temperature"):
        thermal_factor([100.0], -1.0)


def test_wigner_widths_are_exact():
    # computed independently (not published): omega = 1000 cm^-1 -> sigma_Q =
    # 10.475558, sigma_P = 4.7730154e-2;
    # at 300 K sigma_Q = 10.562482 (rel 1e-6). The same seed gives the same normal deviates.
    omega = 1000.0 / HARTREE_CM1
    assert omega == pytest.approx(4.5563353e-3, rel=1e-7)
    q, p = sample_normal_modes([omega], n_samples=5, random_state=3)
    rng = np.random.default_rng(3)
    xi, eta = rng.standard_normal((5, 1)), rng.standard_normal((5, 1))
    np.testing.assert_allclose(q / xi, 10.475558, rtol=1e-7)
    np.testing.assert_allclose(p / eta, 4.7730154e-2, rtol=1e-7)
    q_t, _ = sample_normal_modes([omega], n_samples=5, temperature=300.0, random_state=3)
    np.testing.assert_allclose(q_t / xi, 10.562482, rtol=1e-6)


def test_wigner_cartesian_widths_one_dimension():
    # computed independently (not published): m = 1 amu, 1000 cm^-1: sigma_x
    # = 0.1298369 Angstrom,
    # sigma_v = 1.1179253e-3 a0/t_au = 1.1179253e-3 * 21.876912622 Angstrom/fs (CODATA 2022)
    s = sample_wigner(frequencies=[1000.0], normal_modes=[[[1.0, 0, 0]]],
                      equilibrium=[[0.0, 0, 0]], masses=[1.0], n_samples=4, random_state=0)
    rng = np.random.default_rng(0)
    xi, eta = rng.standard_normal((4, 1)), rng.standard_normal((4, 1))
    np.testing.assert_allclose(s.positions[:, 0, 0] / xi[:, 0], 0.1298369, rtol=1e-6)
    np.testing.assert_allclose(s.velocities[:, 0, 0] / eta[:, 0],
                               1.1179253e-3 * 21.876912622, rtol=1e-6)
    np.testing.assert_array_equal(s.positions[:, 0, 1:], 0.0)


def test_wigner_moments_ground_and_thermal():
    # analytic HO moments from memory; statistical tolerances (3 sigma, std of mean 1/sqrt(N)):
    # <E>/(hbar omega/2) = 1 +- 0.0067 and var(Q) 2 omega / hbar = 1 +- 0.0095 for N = 2e5
    n = 200_000
    omega = 1000.0 / HARTREE_CM1
    for temperature, alpha in ((0.0, 1.0), (300.0, 1.016664)):
        q, p = sample_normal_modes([omega], n_samples=n, temperature=temperature,
                                   random_state=17)
        e = 0.5 * (p**2 + omega**2 * q**2)
        assert np.mean(e) / (0.5 * omega * alpha) == pytest.approx(1.0, abs=0.0067)
        assert np.var(q) * 2 * omega / alpha == pytest.approx(1.0, abs=0.0095)
        assert np.var(p) * 2 / (omega * alpha) == pytest.approx(1.0, abs=0.0095)
        assert abs(np.mean(q)) < 5 * np.sqrt(alpha / (2 * omega) / n)
    # mean thermal energy of a 1000 cm^-1 mode at 300 K: 0.0630252 eV; ZPE 0.0619921 eV computed
    # independently (not published)
    assert 0.5 * omega * HARTREE_EV == pytest.approx(0.0619921, rel=1e-6)
    alpha_300 = thermal_factor([1000.0], 300.0)[0]
    assert 0.5 * omega * alpha_300 * HARTREE_EV == pytest.approx(0.0630252, rel=1e-6)


# ------------------------------------------------------------------ Hessian route
def _triatomic(linear: bool):
    if linear:
        x = np.array([[0.0, 0, -1.16], [0.0, 0, 0.0], [0.0, 0, 1.16]])
        symbols = ["O", "C", "O"]
    else:
        x = np.array([[0.0, 0, 0.117], [0.0, 0.757, -0.469], [0.0, -0.757, -0.469]])
        symbols = ["O", "H", "H"]
    return x, symbols


@pytest.mark.parametrize("linear", [False, True])
def test_normal_modes_from_hessian_recovers_frequencies(linear):
    """Build a Hessian from chosen frequencies in the vibrational subspace and recover them."""
    from ensemblelab.compute.dynamics.wigner import _rigid_basis
    from ensemblelab.data.elements import masses_for
    from ensemblelab.units import BOHR_ANGSTROM

    x, symbols = _triatomic(linear)
    m3 = np.repeat(masses_for(symbols) * AMU_ME, 3)
    rigid = _rigid_basis(x / BOHR_ANGSTROM, m3)
    assert rigid.shape[1] == (5 if linear else 6)  # rigid-body count from memory
    full, _, _ = np.linalg.svd(np.eye(9) - rigid @ rigid.T)
    comp = full[:, : 9 - rigid.shape[1]]
    wanted = np.linspace(600.0, 3800.0, comp.shape[1])
    hmw = comp @ np.diag((wanted / HARTREE_CM1) ** 2) @ comp.T
    hess = np.sqrt(np.outer(m3, m3)) * hmw
    freq, modes, n_rigid = normal_modes_from_hessian(hess, equilibrium=x, symbols=symbols)
    assert n_rigid == (5 if linear else 6)
    np.testing.assert_allclose(freq, wanted, rtol=1e-9)
    lm = modes.reshape(len(freq), -1)
    np.testing.assert_allclose(lm @ lm.T, np.eye(len(freq)), atol=1e-10)


def test_sample_from_hessian_reports_imaginary_modes_and_kinetic_energy():
    from ensemblelab.compute.dynamics.wigner import _rigid_basis
    from ensemblelab.data.elements import masses_for
    from ensemblelab.units import BOHR_ANGSTROM

    x, symbols = _triatomic(False)
    m3 = np.repeat(masses_for(symbols) * AMU_ME, 3)
    rigid = _rigid_basis(x / BOHR_ANGSTROM, m3)
    full, _, _ = np.linalg.svd(np.eye(9) - rigid @ rigid.T)
    comp = full[:, :3]
    lam = np.array([-(300.0 / HARTREE_CM1) ** 2, (1600.0 / HARTREE_CM1) ** 2,
                    (3700.0 / HARTREE_CM1) ** 2])
    hess = np.sqrt(np.outer(m3, m3)) * (comp @ np.diag(lam) @ comp.T)
    with pytest.warns(NumericalWarning, match="not sampled"):
        s = sample_wigner_from_hessian(hess, equilibrium=x, symbols=symbols, n_samples=50,
                                       random_state=1)
    assert s.soft_modes["reason"].tolist() == ["imaginary"]
    assert s.soft_modes["frequency"].iloc[0] == pytest.approx(-300.0, rel=1e-9)
    np.testing.assert_allclose(s.frequencies, [1600.0, 3700.0], rtol=1e-9)
    # Cartesian kinetic energy 1/2 v^T M v equals 1/2 P^T P from memory
    from ensemblelab.units import AU_TIME_FS

    v_au = s.velocities.reshape(50, -1) / (BOHR_ANGSTROM / AU_TIME_FS)
    e_cart = 0.5 * np.sum(m3 * v_au**2, axis=1)
    np.testing.assert_allclose(e_cart, 0.5 * np.sum(s.P**2, axis=1), rtol=1e-10)
    # centre of mass stays put: the sampled modes carry no translation
    com = np.einsum("a,nak->nk", masses_for(symbols), s.positions - x) / masses_for(symbols).sum()
    np.testing.assert_allclose(com, 0.0, atol=1e-12)


def test_sample_wigner_rejects_non_orthonormal_modes():
    with pytest.raises(SchemaError, match="orthonormal"):
        sample_wigner(frequencies=[1000.0, 1200.0], normal_modes=np.ones((2, 1, 3)),
                      equilibrium=[[0.0, 0, 0]], masses=[1.0], n_samples=2)


# ------------------------------------------------------------------ doorway
def _worked_table():
    return pd.DataFrame({"sample": [0, 0], "state": [1, 2], "excitation_energy": [4.0, 4.3],
                         "mu2": [1.0, 0.5]})


def test_doorway_worked_example():
    # computed independently (not published): Gamma_pu = 0.091248 eV, w =
    # (0.0357934, 8.20699e-7),
    # fraction on state 1 = 0.999977 (rel 1e-5)
    w = doorway_table(_worked_table(), photon_energy=4.1, fwhm=20.0)
    np.testing.assert_allclose(w["weight"], [0.0357934, 8.20699e-7], rtol=1e-5)
    frac = w["weight"].iloc[0] / w["weight"].sum()
    assert frac == pytest.approx(0.999977, rel=1e-5)
    from ensemblelab.units import FOUR_LN2, HBAR_EV_FS

    assert FOUR_LN2 * HBAR_EV_FS / 20.0 == pytest.approx(0.091248, rel=1e-5)


def test_doorway_oscillator_strength_form_has_one_over_de():
    # f = (2/3) dE |mu|^2 (a.u.) from memory; the f form must give the same weights as the mu2 form,
    # and differ from a naive f * I by the energy ratio 4.3/4.0 = 1.075 derived and computed
    # independently (not published)
    t = _worked_table()
    f = 2.0 / 3.0 * (t["excitation_energy"] / HARTREE_EV) * t["mu2"]
    tf = t.drop(columns="mu2").assign(oscillator_strength=f)
    w_mu = doorway_table(t, photon_energy=4.1, fwhm=20.0)["weight"].to_numpy()
    w_f = doorway_table(tf, photon_energy=4.1, fwhm=20.0)
    np.testing.assert_allclose(w_f["weight"], w_mu, rtol=1e-12)
    naive = f.to_numpy() * w_f["spectral"].to_numpy()
    ratio = (naive[1] / naive[0]) / (w_mu[1] / w_mu[0])
    assert ratio == pytest.approx(4.3 / 4.0, rel=1e-12)


def test_doorway_accepts_pulse_objects_and_validates():
    from ensemblelab.compute.spectroscopy.pulses import GaussianPulse

    w1 = doorway_table(_worked_table(), pump=GaussianPulse(photon_energy=4.1, fwhm=20.0))
    w2 = doorway_table(_worked_table(), photon_energy=4.1, fwhm=20.0)
    np.testing.assert_array_equal(w1["weight"], w2["weight"])
    with pytest.raises(SchemaError, match="mu2"):
        doorway_table(_worked_table().drop(columns="mu2"), photon_energy=4.1, fwhm=20.0)
    with pytest.raises(SchemaError, match="photon_energy"):
        doorway_table(_worked_table(), fwhm=20.0)
    t = _worked_table()
    before = t.copy()
    doorway_table(t, photon_energy=4.1, fwhm=20.0)
    pd.testing.assert_frame_equal(t, before)  # input not modified


def test_rejection_sampling_follows_the_weights():
    # accepted fraction of a pair = w / w_max (derived independently); binomial 5 sigma
    n = 20000
    rng = np.random.default_rng(0)
    de = rng.uniform(3.8, 4.4, size=n)
    t = pd.DataFrame({"sample": np.arange(n), "state": 1, "excitation_energy": de, "mu2": 1.0})
    sel = select_initial_conditions(t, photon_energy=4.1, fwhm=20.0, random_state=4)
    w = doorway_table(t, photon_energy=4.1, fwhm=20.0)["weight"].to_numpy()
    p = w / w.max()
    expected = p.sum()
    assert abs(len(sel) - expected) < 5 * np.sqrt(np.sum(p * (1 - p)))
    assert (sel["weight"] == 1.0).all()
    # accepted pairs are concentrated at resonance
    assert abs(sel["excitation_energy"].mean() - 4.1) < 0.01


def test_weights_method_threshold():
    t = _worked_table()
    sel = select_initial_conditions(t, photon_energy=4.1, fwhm=20.0, method="weights",
                                    epsilon=1e-3)
    assert sel["state"].tolist() == [1]  # the second pair is below 1e-3 w_max (common practice)
    assert sel["weight"].iloc[0] == 1.0
    sel_all = select_initial_conditions(t, photon_energy=4.1, fwhm=20.0, method="weights",
                                        epsilon=0.0)
    np.testing.assert_allclose(sel_all["weight"], [1.0, 8.20699e-7 / 0.0357934], rtol=1e-5)


def test_write_initial_conditions_round_trip(tmp_path):
    ase_io = pytest.importorskip("ase.io")
    s = sample_wigner(frequencies=[1000.0, 1500.0],
                      normal_modes=np.array([[[1.0, 0, 0], [0, 0, 0]], [[0, 0, 0], [1.0, 0, 0]]]),
                      equilibrium=[[0.0, 0, 0], [1.0, 0, 0]], symbols=["H", "H"],
                      n_samples=3, random_state=0)
    sel = pd.DataFrame({"sample": [2, 0], "state": [1, 2], "weight": [1.0, 1.0],
                        "excitation_energy": [4.0, 4.2]})
    path = write_initial_conditions(tmp_path / "ic.xyz", s, sel)
    frames = ase_io.read(path, index=":", format="extxyz")  # independent reader (ASE)
    assert len(frames) == 2
    np.testing.assert_allclose(frames[0].positions, s.positions[2], atol=1e-8)
    assert frames[1].info["state"] == 2
    with pytest.raises(FileExistsError):
        write_initial_conditions(tmp_path / "ic.xyz", s, sel)
    gz1 = write_initial_conditions(tmp_path / "a.xyz.gz", s, sel)
    gz2 = write_initial_conditions(tmp_path / "b.xyz.gz", s, sel)
    assert gz1.read_bytes() == gz2.read_bytes()  # mtime 0: reproducible bytes
    assert gzip.decompress(gz1.read_bytes()) == path.read_bytes()
