"""TRPES maps: worked values of the classical doorway-window picture (J. Chem. Theory
Comput. 17, 2394 (2021)), sum rules and invariances."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy.special import erfcx
from test_trpes_fixtures import random_ensemble, stratified_decay

from ensemblelab.compute.spectroscopy import compute_trpes, doorway_factor, prepare_sticks
from ensemblelab.compute.spectroscopy.pulses import GaussianPulse, cross_correlation_fwhm, gaussian
from ensemblelab.data.ensemble import Ensemble
from ensemblelab.errors import SchemaError

PROBE = GaussianPulse(photon_energy=5.0, fwhm=30.0)
PUMP = GaussianPulse(photon_energy=4.0, fwhm=30.0)


def _one_snapshot(ip: float = 4.0, dyson: float = 1.0) -> Ensemble:
    return Ensemble.from_arrays(traj=[0], time=[0.0], active=[1],
                                geometries=np.zeros((1, 1, 3)), symbols=["H"],
                                energies=[[0.0, 0.0]], cation_energies=[[ip]], dyson=[[dyson]])


def test_trpes_single_stick_window_values():
    # doorway-window worked value, computed independently (not published): peak at 1.000 eV, Gamma
    # 0.060832 eV, height 15.4432 eV^-1,
    # W(1.03 eV) = 7.86834 eV^-1 (1e-6 rel, analytic)
    e = np.array([1.0, 1.03])
    m = compute_trpes(_one_snapshot(), probe=PROBE, kinetic_energies=e, delays=[0.0],
                      convolve=False, progress=False)
    assert m.params["fwhm_energy"] == pytest.approx(0.060832, abs=1e-6)
    assert m.intensity[0, 0] == pytest.approx(15.4432, rel=1e-5)
    assert m.intensity[0, 1] == pytest.approx(7.86834, rel=1e-6)
    # integral = 1 on a 1 meV grid (tolerance 1e-3, doorway-window worked value)
    grid = np.arange(0.0, 2.0, 0.001)
    m2 = compute_trpes(_one_snapshot(), probe=PROBE, kinetic_energies=grid, delays=[0.0],
                       convolve=False, progress=False)
    assert np.trapezoid(m2.intensity[0], grid) == pytest.approx(1.0, abs=1e-3)
    assert grid[np.argmax(m2.intensity[0])] == pytest.approx(1.0, abs=1e-12)


def test_trpes_closed_channel_and_truncation_below_zero():
    # IP 0.5 eV (19 probe standard deviations) above the photon energy: closed channel, no
    # signal at all (Gaussian tail below 1e-15 of the area; computed independently)
    e = np.linspace(-0.5, 2.0, 251)
    closed = compute_trpes(_one_snapshot(ip=5.5), probe=PROBE, kinetic_energies=e, delays=[0.0],
                           convolve=False, progress=False)
    assert np.all(closed.intensity == 0.0)
    # open just above threshold: no tail below 0 eV, the part of the area below 0 is lost
    near = compute_trpes(_one_snapshot(ip=4.99), probe=PROBE, kinetic_energies=e, delays=[0.0],
                         convolve=False, progress=False)
    assert np.all(near.intensity[0, e < 0] == 0.0)
    assert near.intensity[0, e >= 0].max() > 0
    expected = gaussian(e, 0.01, PROBE.spectral_fwhm) * (e >= 0)
    np.testing.assert_allclose(near.intensity[0], expected, rtol=1e-7, atol=1e-9)


def test_trpes_doorway_factor_table():
    # doorway-window worked value, computed independently (not published): w = (0.0357934,
    # 8.20699e-7);
    # fraction 0.999977 (1e-5 rel)
    pump = GaussianPulse(photon_energy=4.1, fwhm=20.0)
    assert pump.spectral_fwhm == pytest.approx(0.091248, rel=1e-5)
    w = doorway_factor([4.0, 4.3], pump=pump, transition_dipole=[1.0, 0.5])
    np.testing.assert_allclose(w, [0.0357934, 8.20699e-7], rtol=1e-5)
    assert w[0] / w.sum() == pytest.approx(0.999977, rel=1e-5)


def test_trpes_doorway_oscillator_form_includes_inverse_gap():
    # doorway-window worked value, derived and computed independently (not published):
    # |mu|^2 = 3 f / (2 dE); f without 1/dE is wrong by 4.3/4.0
    pump = GaussianPulse(photon_energy=4.1, fwhm=20.0)
    de = np.array([4.0, 4.3])
    f = np.array([0.2, 0.2])
    w = doorway_factor(de, pump=pump, oscillator_strength=f)
    spec = pump.spectral_intensity(de)
    assert (w[0] / spec[0]) / (w[1] / spec[1]) == pytest.approx(4.3 / 4.0, rel=1e-12)


def test_trpes_doorway_weights_from_ensemble():
    ens = random_ensemble(4, ragged=False)
    mu = np.zeros((4, 3, 3))
    mu[:, :, 0] = [[0, 1.0, 0.5]] * 4
    exc = np.array([[0.0, 4.0, 4.3]] * 4)
    ens = ens.replace(excitation_energies=exc, transition_dipoles=mu,
                      trajectories=ens.trajectories.assign(initial_state=[1, 2, 1, 2]))
    pump = GaussianPulse(photon_energy=4.1, fwhm=20.0)
    model = prepare_sticks(ens, probe=PROBE, pump=pump, weights="doorway", progress=False)
    w_expect = doorway_factor([4.0, 4.3, 4.0, 4.3], pump=pump,
                              transition_dipole=[1.0, 0.25, 1.0, 0.25])
    assert model.total_weight == pytest.approx(w_expect.sum(), rel=1e-12)
    assert model.info["weights"] == "doorway"


def _analytic_17(e, tau_d):
    """Infinite-N signal of an exponential decay, closed form (computed independently)."""
    sigma = math.hypot(30.0, 30.0) / (2 * math.sqrt(2 * math.log(2)))
    tau = 100.0
    u = tau_d
    y1 = 0.5 * np.exp(-u**2 / (2 * sigma**2)) * erfcx((sigma**2 / tau - u) / (math.sqrt(2) *
                                                                             sigma))
    yinf = 0.5 * math.erfc(-u / (math.sqrt(2) * sigma))
    g = PROBE.spectral_fwhm
    g15, g05 = gaussian(e, 1.5, g), gaussian(e, 0.5, g)
    return (0.9 * g15 - 0.8 * g05) * y1 + 0.8 * g05 * yinf


# doorway-window worked value, computed independently (not published): tau -> (S(1.5 eV), S(0.5
# eV)) in eV^-1
TABLE_17 = {
    -30.0: (0.6197, 0.0415), 0.0: (6.0533, 0.7966), 100.0: (5.1968, 7.7352),
    300.0: (0.7033, 11.7294),
}


def test_trpes_end_to_end_analytic_formula_matches_table():
    # our closed-form evaluation against the notes' table (tolerance 1e-4 abs, as tabulated)
    for tau, (s15, s05) in TABLE_17.items():
        assert float(_analytic_17(1.5, tau)) == pytest.approx(s15, abs=1e-4)
        assert float(_analytic_17(0.5, tau)) == pytest.approx(s05, abs=1e-4)


def test_trpes_end_to_end_stratified_ensemble():
    # doorway-window worked value: N = 4000 trajectories with hop times on exponential quantiles,
    # dt = 1 fs; deviation from the infinite-N values ~1/N + O(dt^2) -> 3e-3 relative
    ens = stratified_decay(4000)
    delays = np.array(sorted(TABLE_17))
    m = compute_trpes(ens, probe=PROBE, pump=PUMP, kinetic_energies=[0.5, 1.5], delays=delays,
                      weights="uniform", progress=False)
    for i, tau in enumerate(delays):
        exp_05, exp_15 = _analytic_17(np.array([0.5, 1.5]), tau)
        assert m.intensity[i, 1] == pytest.approx(exp_15, rel=3e-3)
        assert m.intensity[i, 0] == pytest.approx(exp_05, rel=3e-3)
    # T_cc and sigma_cc: doorway-window worked value, computed independently (not published)
    assert cross_correlation_fwhm(GaussianPulse(**m.params["pump"]),
                                  GaussianPulse(**m.params["probe"])) == pytest.approx(
        42.42641, abs=1e-5)
    assert m.params["sigma_cc"] == pytest.approx(18.01684, abs=1e-5)
    np.testing.assert_array_equal(m.alive, 4000.0)


@pytest.mark.slow
def test_trpes_end_to_end_random_toy_ensemble():
    # sampled ensemble (ensemblelab.testing.make_toy_ensemble): agreement ~3/sqrt(N) relative
    # (doorway-window worked value); compared where the signal is large
    from ensemblelab.testing import make_toy_ensemble

    n = 1500
    ens = make_toy_ensemble(n, seed=11, t_max=500.0)
    delays = np.array([0.0, 100.0, 300.0])
    m = compute_trpes(ens, probe=PROBE, pump=PUMP, kinetic_energies=[0.5, 1.5], delays=delays,
                      weights="uniform", progress=False)
    tol = 3 / math.sqrt(n)
    for i, tau in enumerate(delays):
        exp = _analytic_17(np.array([0.5, 1.5]), tau)
        big = exp > 1.0
        np.testing.assert_allclose(m.intensity[i][big], exp[big], rtol=tol)


def test_trpes_area_sum_rule_without_truncation():
    # doorway-window worked value, derived and computed independently (not published):
    # int S dE = sum_n w m sum_k sigma / sum_n w m (1e-12)
    ens = random_ensemble(5, seed=3)
    probe = GaussianPulse(photon_energy=9.0, fwhm=30.0)  # all channels open, far above 0 eV
    model = prepare_sticks(ens, probe=probe, weights="uniform", progress=False)
    e = np.linspace(-1.0, 12.0, 13001)
    m = model.broaden(kinetic_energies=e, delays=model.times, convolve=False)
    area = np.trapezoid(m.intensity, e, axis=1)
    # expected straight from the ensemble: at each time, the mean over the trajectories
    # alive then of the summed squared Dyson norms of the active state (unit weights)
    snaps = ens.snapshots
    rows = np.arange(ens.n_snapshots)
    dy = ens.dyson[rows, snaps["active"].to_numpy(), :].sum(axis=1)
    mean = pd.Series(dy).groupby(snaps["time"].to_numpy()).mean()
    expected = mean.reindex(np.round(model.times, 9), fill_value=0.0).to_numpy()
    assert np.count_nonzero(expected) > 10
    np.testing.assert_allclose(area, expected, rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("by", ["neutral", "cation", "pair", "diabatic"])
@pytest.mark.parametrize("convolve", [True, False])
def test_trpes_decompositions_sum_to_total(by, convolve):
    # doorway-window worked value and 4.1, derived and computed independently (not published):
    # exact additive
    # decompositions (1e-12)
    ens = random_ensemble(6, seed=1)
    kw = dict(probe=PROBE, pump=PUMP, kinetic_energies=np.linspace(0, 4, 161),
              delays=np.arange(-40, 90, 5.0), convolve=convolve, progress=False)
    total = compute_trpes(ens, **kw)
    dec = compute_trpes(ens, decompose=by, **kw)
    np.testing.assert_allclose(dec.intensity, total.intensity, rtol=0, atol=1e-13)
    scale = np.abs(total.intensity).max()
    assert scale > 0
    assert np.abs(dec.component_sum() - total.intensity).max() <= 1e-12 * scale
    n_expected = {"neutral": 3, "cation": 2, "pair": 6, "diabatic": 6}[by]
    assert len(dec.components) == n_expected


def test_trpes_neutral_components_select_states():
    ens = random_ensemble(6, seed=2)
    kw = dict(probe=PROBE, kinetic_energies=np.linspace(0, 4, 81), delays=np.arange(0, 60, 4.0),
              convolve=False, progress=False)
    dec = compute_trpes(ens, decompose="neutral", **kw)
    # S0 component = full map of an ensemble whose S1/S2 Dyson norms are zero
    dy = np.array(ens.dyson)
    dy[:, 1:, :] = 0.0
    only0 = compute_trpes(ens.replace(dyson=dy), **kw)
    np.testing.assert_allclose(dec.components["S0"], only0.intensity, rtol=1e-12, atol=1e-14)


def test_trpes_doubling_dyson_doubles_map():
    # hydrogenic plane-wave cross section, derived and computed independently (not published): 2x
    # Dyson norms -> 2x map
    # at every point (1e-12)
    ens = random_ensemble(5, seed=4)
    kw = dict(probe=PROBE, pump=PUMP, kinetic_energies=np.linspace(0, 4, 121),
              delays=np.arange(-30, 80, 5.0), progress=False)
    a = compute_trpes(ens, **kw)
    b = compute_trpes(ens.replace(dyson=2 * ens.dyson), **kw)
    np.testing.assert_allclose(b.intensity, 2 * a.intensity, rtol=1e-12, atol=1e-300)


def test_trpes_permuting_trajectories_changes_nothing():
    ens = random_ensemble(7, seed=5)
    perm = np.random.default_rng(0).permutation(7)
    frame = ens.snapshots
    traj_new = perm[frame["traj"].to_numpy()]
    shuffled = Ensemble.from_arrays(
        traj=traj_new[::-1], time=frame["time"].to_numpy()[::-1],
        active=frame["active"].to_numpy()[::-1], geometries=ens.geometries[::-1],
        symbols=ens.symbols, energies=ens.energies[::-1],
        cation_energies=ens.cation_energies[::-1], dyson=ens.dyson[::-1])
    kw = dict(probe=PROBE, pump=PUMP, kinetic_energies=np.linspace(0, 4, 121),
              delays=np.arange(-30, 80, 5.0), progress=False)
    a = compute_trpes(ens, **kw)
    b = compute_trpes(shuffled, **kw)
    np.testing.assert_allclose(b.intensity, a.intensity, rtol=1e-12, atol=1e-14)


def test_trpes_alive_normalisation_and_initial():
    ens = random_ensemble(6, seed=6, ragged=True)
    kw = dict(probe=PROBE, kinetic_energies=np.linspace(0, 4, 81), delays=np.arange(0, 80, 2.0),
              convolve=False, progress=False, weights="uniform", absorbing="end")
    alive = compute_trpes(ens, normalise="alive", **kw)
    initial = compute_trpes(ens, normalise="initial", **kw)
    # alive count per delay = number of trajectories with a snapshot there
    t_end = ens.trajectories["t_end"].to_numpy()
    expected_alive = (t_end[None, :] >= alive.delays[:, None] - 1e-9).sum(axis=1)
    np.testing.assert_array_equal(alive.alive, expected_alive)
    ratio = expected_alive / 6.0
    np.testing.assert_allclose(initial.intensity, alive.intensity * ratio[:, None],
                               rtol=1e-12, atol=1e-14)


def test_trpes_negative_delays_only_with_convolution():
    ens = random_ensemble(4, seed=7)
    kw = dict(probe=PROBE, pump=PUMP, kinetic_energies=np.linspace(0, 4, 41),
              delays=np.array([-60.0, -20.0, 0.0, 20.0]), progress=False)
    conv = compute_trpes(ens, **kw)
    pure = compute_trpes(ens, convolve=False, **kw)
    assert np.all(pure.intensity[:2] == 0)
    assert conv.intensity[1].sum() > 0
    assert conv.intensity[0].sum() < conv.intensity[1].sum()


def test_trpes_resolution_adds_in_quadrature():
    m = compute_trpes(_one_snapshot(), probe=PROBE, kinetic_energies=[1.0], delays=[0.0],
                      convolve=False, resolution=0.08, progress=False)
    g = math.hypot(PROBE.spectral_fwhm, 0.08)
    assert m.params["fwhm_energy"] == pytest.approx(g, rel=1e-14)
    assert m.intensity[0, 0] == pytest.approx(2 * math.sqrt(math.log(2) / math.pi) / g,
                                              rel=1e-9)


def test_trpes_two_photon_probe_width_and_position():
    probe2 = GaussianPulse(photon_energy=2.5, fwhm=30.0, n_photons=2)
    m = compute_trpes(_one_snapshot(), probe=probe2, kinetic_energies=[1.0], delays=[0.0],
                      convolve=False, progress=False)
    # Gamma^(2) = 0.086029 eV: Gaussian convolution algebra derived and computed independently
    # (not published);
    # peak at 2 * 2.5 - 4.0 = 1.0 eV
    assert m.params["fwhm_energy"] == pytest.approx(0.086029, abs=1e-6)
    assert m.intensity[0, 0] == pytest.approx(float(gaussian(1.0, 1.0, 0.0860290)), rel=1e-5)


def test_trpes_rejects_bad_arguments():
    ens = random_ensemble(2)
    with pytest.raises(SchemaError, match="'decompose' parameter"):
        compute_trpes(ens, probe=PROBE, kinetic_energies=[1.0], delays=[0.0], decompose="spin")
    with pytest.raises(SchemaError, match="'normalise' parameter"):
        compute_trpes(ens, probe=PROBE, kinetic_energies=[1.0], delays=[0.0], normalise="max",
                      progress=False)
    with pytest.raises(SchemaError, match="'weights' parameter"):
        compute_trpes(ens, probe=PROBE, kinetic_energies=[1.0], delays=[0.0], weights="nope")
    with pytest.raises(SchemaError, match="'delays' parameter must increase"):
        compute_trpes(ens, probe=PROBE, kinetic_energies=[1.0], delays=[1.0, 0.0], progress=False)
    with pytest.raises(SchemaError, match="'resolution' parameter"):
        compute_trpes(ens, probe=PROBE, kinetic_energies=[1.0], delays=[0.0], resolution=-1.0,
                      progress=False)
    bare = ens.replace(dyson=None)
    with pytest.raises(SchemaError, match="cation_energies and ens.dyson"):
        compute_trpes(bare, probe=PROBE, kinetic_energies=[1.0], delays=[0.0])


def test_trpes_input_not_modified():
    ens = random_ensemble(3, seed=8)
    before = ens.dyson.copy(), ens.energies.copy(), ens.snapshots.copy()
    compute_trpes(ens, probe=PROBE, kinetic_energies=[1.0, 2.0], delays=[0.0, 5.0],
                  decompose="pair", progress=False)
    np.testing.assert_array_equal(ens.dyson, before[0])
    np.testing.assert_array_equal(ens.energies, before[1])
    assert ens.snapshots.equals(before[2])


def test_trpes_warns_when_probe_ionises_ground_state():
    # doorway-window worked value derived and computed independently (not published): a ground-
    # state depletion
    # term exists only where n h-nu > IP_00;
    # the toy ensemble has IP(S0 -> D0) = 8.0 eV at every geometry (ensemblelab.testing)
    import warnings

    from ensemblelab.compute.spectroscopy import ground_state_ionisation_fraction
    from ensemblelab.errors import EnsembleWarning
    from ensemblelab.testing import TOY_TRUTH, make_toy_ensemble

    ens = make_toy_ensemble(8, seed=2, t_max=20.0)
    assert TOY_TRUTH["ip"][0] == 8.0
    below = GaussianPulse(photon_energy=7.9, fwhm=30.0)
    above = GaussianPulse(photon_energy=4.1, fwhm=30.0, n_photons=2)  # 8.2 eV in total
    assert ground_state_ionisation_fraction(ens, probe=below) == 0.0
    assert ground_state_ionisation_fraction(ens, probe=above) == 1.0
    grid = dict(kinetic_energies=np.linspace(0.0, 5.0, 11), delays=[0.0, 10.0], progress=False)
    with warnings.catch_warnings():
        warnings.simplefilter("error", EnsembleWarning)
        compute_trpes(ens, probe=below, **grid)
    with pytest.warns(EnsembleWarning, match=r"ionise the ground state at 100.0 %"):
        compute_trpes(ens, probe=above, **grid)
