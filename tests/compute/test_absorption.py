"""Transient absorption in the doorway-window picture: units, signs, components.

Sources of the check values are written beside each one.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import constants

from ensemblelab import Ensemble, GaussianPulse, compute_transient_absorption, load
from ensemblelab.compute.observables import absorption_spectrum
from ensemblelab.compute.observables.absorption import CROSS_SECTION_CONSTANT
from ensemblelab.errors import EnsembleWarning, SchemaError

PROBE = GaussianPulse(photon_energy=3.0, fwhm=20.0)
E = np.linspace(0.5, 6.0, 5501)  # 1 meV grid


def _gauss(x, x0, fwhm):
    """Area-normalised Gaussian written out here (from memory)."""
    return (2 * math.sqrt(math.log(2) / math.pi) / fwhm) * np.exp(
        -4 * math.log(2) * (x - x0) ** 2 / fwhm**2)


def _frozen(levels, strengths, active, n_traj=3, t_max=100.0, **arrays):
    t = np.arange(0.0, t_max, 1.0)
    n = t.size * n_traj
    energies = np.tile(np.asarray(levels, dtype=float), (n, 1))
    ts = np.tile(np.asarray(strengths, dtype=float), (n, 1, 1))
    return Ensemble.from_arrays(traj=np.repeat(np.arange(n_traj), t.size),
                                time=np.tile(t, n_traj), active=np.full(n, active),
                                geometries=np.zeros((n, 1, 3)), symbols=["H"],
                                energies=energies, transition_strengths=ts, **arrays)


def test_cross_section_constant_from_codata():
    # pi e^2 hbar / (2 eps0 m_e c) (from memory) in Angstrom^2 eV; 1.0976099 computed
    # independently (not published) from scipy.constants
    k = (math.pi * constants.e**2 * constants.hbar
         / (2 * constants.epsilon_0 * constants.m_e * constants.c)) / constants.e * 1e20
    assert CROSS_SECTION_CONSTANT == pytest.approx(k, rel=1e-12)
    assert CROSS_SECTION_CONSTANT == pytest.approx(1.0976099, rel=1e-7)


def test_two_level_frozen_in_s1_gives_emission_at_the_gap_with_the_analytic_amplitude():
    f10 = 0.2
    ens = _frozen([0.0, 3.0], [[0.0, f10], [f10, 0.0]], active=1)
    m = compute_transient_absorption(ens, probe=PROBE, photon_energies=E,
                                     delays=np.array([50.0]), convolve=False)
    gamma = 4 * math.log(2) * constants.hbar / constants.e * 1e15 / 20.0  # 4 ln2 hbar / T
    k = 1.0976099  # Angstrom^2 eV, see test_cross_section_constant_from_codata
    se = m.components["SE"][0]
    # analytic: SE = -K f G(E; gap, Gamma) (derived), peak at the gap, area -K f
    assert np.allclose(se, -k * f10 * _gauss(E, 3.0, gamma), rtol=1e-6, atol=1e-12)
    assert np.trapezoid(se, E) == pytest.approx(-k * f10, rel=1e-6)
    assert E[np.argmin(se)] == pytest.approx(3.0, abs=1e-3)
    assert not np.any(m.components["ESA"])
    # the bleach of the same pair of states is as strong (absorption = emission)
    assert np.allclose(m.components["GSB"], m.components["SE"], rtol=1e-12)
    assert np.allclose(m.component_sum(), m.intensity, atol=1e-15)


def test_three_levels_esa_above_and_se_below():
    f = np.array([[0.0, 0.1, 0.05], [0.1, 0.0, 0.3], [0.05, 0.3, 0.0]])
    ens = _frozen([0.0, 3.0, 5.0], f, active=1)
    m = compute_transient_absorption(ens, probe=PROBE, photon_energies=E,
                                     delays=np.array([50.0]), convolve=False,
                                     resolution=0.05, by="state")
    gamma = math.hypot(PROBE.spectral_fwhm, 0.05)
    k = CROSS_SECTION_CONSTANT
    assert np.allclose(m.components["ESA"][0], k * 0.3 * _gauss(E, 2.0, gamma), atol=1e-12)
    assert np.allclose(m.components["SE"][0], -k * 0.1 * _gauss(E, 3.0, gamma), atol=1e-12)
    # bleach: both S0 -> S1 and S0 -> S2 of the initial conditions (derived)
    want = -k * (0.1 * _gauss(E, 3.0, gamma) + 0.05 * _gauss(E, 5.0, gamma))
    assert np.allclose(m.components["GSB"][0], want, atol=1e-12)
    assert np.allclose(m.components["ESA:S1"], m.components["ESA"])
    assert np.all(m.components["GSB"] <= 0) and np.all(m.components["SE"] <= 0)
    assert np.all(m.components["ESA"] >= 0)


def test_bleach_equals_minus_the_steady_state_spectrum_times_the_fraction():
    rng = np.random.default_rng(4)
    n_traj, t = 20, np.arange(0.0, 300.0, 2.0)
    n = n_traj * t.size
    energies = np.zeros((n, 3))
    energies[:, 1] = rng.normal(3.2, 0.1, n)
    energies[:, 2] = rng.normal(4.6, 0.1, n)
    ts = rng.uniform(0.0, 0.3, (n, 3, 3))
    ts = 0.5 * (ts + ts.transpose(0, 2, 1))
    active = np.where(np.tile(t, n_traj) < 50, 2, 1)
    ens = Ensemble.from_arrays(traj=np.repeat(np.arange(n_traj), t.size),
                               time=np.tile(t, n_traj), active=active,
                               geometries=np.zeros((n, 1, 3)), symbols=["H"],
                               energies=energies, transition_strengths=ts)
    pump = GaussianPulse(photon_energy=4.0, fwhm=30.0)
    m = compute_transient_absorption(ens, probe=PROBE, pump=pump, photon_energies=E,
                                     delays=np.array([-100.0, 0.0, 200.0]),
                                     excitation_fraction=0.1, weights="uniform")
    first = np.arange(n_traj) * t.size
    steady = absorption_spectrum(energies[first, 1:].ravel(), ts[first, 0, 1:].ravel(), E,
                                 PROBE.spectral_fwhm) / n_traj
    assert np.allclose(m.steady_state, steady, rtol=1e-12)
    # long after the pump the bleach is the full -fraction * steady state (derived)
    assert np.allclose(m.components["GSB"][2], -0.1 * steady, rtol=1e-9, atol=1e-15)
    # at delay 0 half of it (a step convolved with a normalised Gaussian; derived)
    assert np.allclose(m.components["GSB"][1], -0.05 * steady, rtol=2e-3, atol=1e-12)
    assert np.allclose(m.component_sum(), m.intensity, atol=1e-14)
    full = compute_transient_absorption(ens, probe=PROBE, pump=pump, photon_energies=E,
                                        delays=np.array([-100.0, 0.0, 200.0]),
                                        weights="uniform")
    assert np.allclose(m.intensity, 0.1 * full.intensity, rtol=1e-12, atol=1e-16)


def test_bleach_reads_the_initial_excitation_data_when_present():
    f = [[0.0, 0.2], [0.2, 0.0]]
    exc = np.array([[0.0, 3.5]] * 3)
    osc = np.array([[0.0, 0.4]] * 3)
    ens = _frozen([0.0, 3.0], f, active=1, excitation_energies=exc, oscillator_strengths=osc)
    m = compute_transient_absorption(ens, probe=PROBE, photon_energies=E,
                                     delays=np.array([50.0]), convolve=False,
                                     weights="uniform")
    want = -CROSS_SECTION_CONSTANT * 0.4 * _gauss(E, 3.5, PROBE.spectral_fwhm)
    assert np.allclose(m.components["GSB"][0], want, atol=1e-12)


def test_missing_strengths_are_left_out_and_absent_strengths_refused():
    f = np.array([[0.0, 0.2], [0.2, 0.0]])
    ens = _frozen([0.0, 3.0], f, active=1, n_traj=2)
    ts = np.array(ens.transition_strengths)
    ts[150, :, :] = np.nan  # trajectory 1 at 50 fs: not computed
    bad = Ensemble.from_arrays(traj=ens.snapshots["traj"], time=ens.snapshots["time"],
                               active=ens.snapshots["active"], geometries=ens.geometries,
                               symbols=ens.symbols, energies=ens.energies,
                               transition_strengths=ts)
    with pytest.warns(EnsembleWarning, match="transition strengths"):
        m = compute_transient_absorption(bad, probe=PROBE, photon_energies=E,
                                         delays=np.array([50.0]), convolve=False)
    ref = compute_transient_absorption(ens, probe=PROBE, photon_energies=E,
                                       delays=np.array([50.0]), convolve=False)
    assert m.alive[0] == 1
    assert np.allclose(m.components["SE"], ref.components["SE"], rtol=1e-12)
    plain = Ensemble.from_arrays(traj=[0], time=[0.0], active=[1],
                                 geometries=np.zeros((1, 1, 3)), symbols=["H"],
                                 energies=[[0.0, 3.0]])
    with pytest.raises(SchemaError, match="transition_strengths"):
        compute_transient_absorption(plain, probe=PROBE, photon_energies=E, delays=[0.0])
    with pytest.raises(SchemaError, match="by"):
        compute_transient_absorption(ens, probe=PROBE, photon_energies=E, delays=[0.0],
                                     by="cluster")


def test_chunked_store_gives_the_in_memory_map(tmp_path):
    pytest.importorskip("dask")
    from ensemblelab.io.chunked import save_chunked

    rng = np.random.default_rng(9)
    f = np.array([[0.0, 0.1, 0.05], [0.1, 0.0, 0.3], [0.05, 0.3, 0.0]])
    ens = _frozen([0.0, 3.0, 5.0], f, active=2, n_traj=7, t_max=30.0)
    e = np.array(ens.energies) + rng.normal(0, 0.05, ens.energies.shape)
    ens = Ensemble.from_arrays(traj=ens.snapshots["traj"], time=ens.snapshots["time"],
                               active=ens.snapshots["active"], geometries=ens.geometries,
                               symbols=ens.symbols, energies=e,
                               transition_strengths=ens.transition_strengths)
    lazy = load(save_chunked(ens, tmp_path / "s.ens", chunk_size=2), lazy=True)
    kw = {"probe": PROBE, "pump": GaussianPulse(photon_energy=5.0, fwhm=20.0),
          "photon_energies": np.linspace(1.0, 6.0, 101), "delays": np.arange(-10.0, 31.0, 10.0),
          "scheduler": "synchronous"}
    a = compute_transient_absorption(ens, n_boot=15, **kw)
    b = compute_transient_absorption(lazy, n_boot=15, **kw)
    assert np.allclose(a.intensity, b.intensity, rtol=1e-12, atol=1e-15)
    # the same replicates in memory and chunked
    assert np.allclose(a.lower, b.lower, rtol=1e-10, atol=1e-15)
    assert np.allclose(a.upper, b.upper, rtol=1e-10, atol=1e-15)


def test_bootstrap_band_of_the_total():
    # each trajectory frozen on S1 with its own gap: the stimulated emission at a photon
    # energy is a plain mean over independent trajectories, and so is the bleach (same
    # trajectories); the 95 % band is about +-1.96 sd / sqrt(N) of the per-trajectory
    # totals (normal approximation; common practice)
    rng = np.random.default_rng(3)
    n_traj, t = 300, np.array([0.0, 10.0, 20.0])
    gaps = rng.normal(3.0, 0.1, n_traj)
    energies = np.zeros((n_traj * t.size, 2))
    energies[:, 1] = np.repeat(gaps, t.size)
    ts = np.zeros((energies.shape[0], 2, 2))
    ts[:, 0, 1] = ts[:, 1, 0] = 0.2
    ens = Ensemble.from_arrays(traj=np.repeat(np.arange(n_traj), t.size),
                               time=np.tile(t, n_traj), active=np.ones(energies.shape[0], int),
                               geometries=np.zeros((energies.shape[0], 1, 3)), symbols=["H"],
                               energies=energies, transition_strengths=ts)
    e = np.array([2.9, 3.0, 3.1])
    m = compute_transient_absorption(ens, probe=PROBE, photon_energies=e,
                                     delays=np.array([20.0]), convolve=False, n_boot=400,
                                     random_state=2)
    per = -2 * CROSS_SECTION_CONSTANT * 0.2 * _gauss(e[None, :], gaps[:, None],
                                                     PROBE.spectral_fwhm)
    assert np.allclose(m.intensity[0], per.mean(axis=0), rtol=1e-10)
    half = 1.96 * per.std(axis=0, ddof=1) / math.sqrt(n_traj)
    assert np.allclose((m.upper - m.lower)[0] / 2, half, rtol=0.2)
    assert m.params["interval"]["n_boot"] == 400
