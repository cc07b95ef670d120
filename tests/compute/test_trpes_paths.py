"""compute_trpes options checked against independent constructions: weight columns,
oscillator-strength doorway weights, alive counts, cross-section wiring, diabatic
component values, re-broadening cached sticks."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import special_ortho_group
from test_trpes_fixtures import random_ensemble

from ensemblelab.compute.spectroscopy import compute_trpes, prepare_sticks
from ensemblelab.compute.spectroscopy.cross_sections import AnionThresholdLaw, HydrogenicPWA
from ensemblelab.compute.spectroscopy.pulses import GaussianPulse
from ensemblelab.data.ensemble import Ensemble
from ensemblelab.units import HARTREE_EV

PROBE = GaussianPulse(photon_energy=5.0, fwhm=30.0)
PUMP = GaussianPulse(photon_energy=4.0, fwhm=30.0)
GRID = dict(kinetic_energies=np.linspace(0.0, 4.0, 161), delays=np.arange(-40.0, 90.0, 2.5))

pytestmark = pytest.mark.filterwarnings("ignore:compute_trpes. the probe")


def _rebuild(ens: Ensemble, pick: np.ndarray, **extra) -> Ensemble:
    """A new ensemble holding trajectories `pick` of `ens` (repeats allowed, renumbered)."""
    traj = ens.snapshots["traj"].to_numpy()
    rows, new_id = [], []
    for k, t in enumerate(pick):
        r = np.flatnonzero(traj == t)
        rows.append(r)
        new_id.append(np.full(r.size, k))
    rows = np.concatenate(rows)
    fields = dict(traj=np.concatenate(new_id), time=ens.snapshots["time"].to_numpy()[rows],
                  active=ens.snapshots["active"].to_numpy()[rows],
                  geometries=ens.geometries[rows], symbols=list(ens.symbols),
                  energies=ens.energies[rows], cation_energies=ens.cation_energies[rows],
                  dyson=ens.dyson[rows], adt=ens.adt[rows], adt_cation=ens.adt_cation[rows])
    fields.update(extra)
    return Ensemble.from_arrays(**fields)


def test_weight_column_equals_duplicated_trajectories():
    # an integer importance weight n_i is the same as n_i copies of trajectory i
    # (common practice)
    ens = random_ensemble(5, seed=11)
    mult = np.array([1, 3, 2, 1, 4])
    tr = ens.trajectories.copy()
    tr["mult"] = mult.astype(float)
    weighted = _rebuild(ens, np.arange(5), trajectories=tr)
    copies = _rebuild(ens, np.repeat(np.arange(5), mult))
    for by in (None, "pair"):
        a = compute_trpes(weighted, probe=PROBE, pump=PUMP, weights="mult", decompose=by,
                          progress=False, **GRID)
        b = compute_trpes(copies, probe=PROBE, pump=PUMP, weights="uniform", decompose=by,
                          progress=False, **GRID)
        assert a.params["weights"] == "column:mult"
        scale = np.abs(b.intensity).max()
        assert scale > 0
        np.testing.assert_allclose(a.intensity, b.intensity, rtol=0, atol=1e-12 * scale)
        np.testing.assert_allclose(a.alive, b.alive, rtol=1e-12)
        for lab in b.components:
            np.testing.assert_allclose(a.components[lab], b.components[lab], rtol=0,
                                       atol=1e-12 * scale)
    # and it differs from equal weights (the column is really used)
    u = compute_trpes(weighted, probe=PROBE, pump=PUMP, weights="uniform", progress=False, **GRID)
    assert np.abs(u.intensity - a.intensity).max() > 1e-3 * scale


def test_alive_count_is_unweighted_and_alive_is_the_weight_sum():
    # ragged trajectories end at different times: the number alive at t is the number
    # whose last time is >= t (counted directly, computed independently (not published))
    ens = random_ensemble(7, seed=5, n_steps=40, dt=2.0)
    tr = ens.trajectories.copy()
    w = np.array([0.5, 2.0, 1.0, 3.0, 0.25, 1.5, 1.0])
    tr["w"] = w
    ens = _rebuild(ens, np.arange(7), trajectories=tr)
    delays = np.arange(0.0, 80.0, 2.0)  # the ensemble's own time grid
    m = compute_trpes(ens, probe=PROBE, weights="w", convolve=False, progress=False,
                      kinetic_energies=GRID["kinetic_energies"], delays=delays,
                      absorbing="end")  # every trajectory ends at its last snapshot
    t_end = ens.snapshots.groupby("traj")["time"].max().to_numpy()
    alive_mask = t_end[None, :] >= delays[:, None] - 1e-9  # (n_delays, n_traj)
    np.testing.assert_array_equal(m.alive_count, alive_mask.sum(axis=1))
    np.testing.assert_allclose(m.alive, (alive_mask * w[None, :]).sum(axis=1), rtol=1e-12)
    assert np.any(m.alive_count != m.alive)  # weights not all one: the two differ
    frame = m.to_frame(components=False)
    np.testing.assert_array_equal(frame.groupby("delay")["alive_count"].first().to_numpy(),
                                  m.alive_count)


def _with_excitation(ens: Ensemble, *, de: np.ndarray, dipoles=None, strengths=None):
    n_traj = ens.n_trajectories
    exc = np.zeros((n_traj, ens.n_states))
    exc[:, 1] = de
    exc[:, 2] = de + 0.5
    tr = ens.trajectories.copy()
    tr["initial_state"] = 1
    extra = dict(trajectories=tr, excitation_energies=exc)
    if dipoles is not None:
        mu = np.zeros((n_traj, ens.n_states, 3))
        mu[:, 1, 0] = dipoles
        extra["transition_dipoles"] = mu
    if strengths is not None:
        f = np.zeros((n_traj, ens.n_states))
        f[:, 1] = strengths
        extra["oscillator_strengths"] = f
    return _rebuild(ens, np.arange(n_traj), **extra)


def test_doorway_weights_from_oscillator_strengths_match_dipoles():
    # f = (2/3) dE |mu|^2 in atomic units (from memory; doorway-window worked value), so an
    # ensemble given f must weigh trajectories exactly like one given |mu|
    ens = random_ensemble(6, seed=2)
    rng = np.random.default_rng(3)
    de = rng.uniform(3.8, 4.3, 6)  # eV, across the pump spectrum
    mu = rng.uniform(0.3, 1.5, 6)  # e*bohr
    f = (2.0 / 3.0) * (de / HARTREE_EV) * mu**2
    a = compute_trpes(_with_excitation(ens, de=de, dipoles=mu), probe=PROBE, pump=PUMP,
                      weights="doorway", progress=False, **GRID)
    b = compute_trpes(_with_excitation(ens, de=de, strengths=f), probe=PROBE, pump=PUMP,
                      weights="doorway", progress=False, **GRID)
    assert a.params["weights"] == b.params["weights"] == "doorway"
    scale = np.abs(a.intensity).max()
    np.testing.assert_allclose(b.intensity, a.intensity, rtol=0, atol=1e-12 * scale)
    u = compute_trpes(ens, probe=PROBE, pump=PUMP, weights="uniform", progress=False, **GRID)
    assert np.abs(u.intensity - a.intensity).max() > 1e-3 * scale  # the weights matter


def test_doorway_without_excitation_data_uses_the_ensembles_own_weights():
    # documented fallback: no excitation data -> the ensemble is taken as doorway-sampled;
    # params say "ensemble", and unit weights give the uniform map (common practice)
    ens = random_ensemble(6, seed=2)
    a = compute_trpes(ens, probe=PROBE, pump=PUMP, progress=False, **GRID)
    b = compute_trpes(ens, probe=PROBE, pump=PUMP, weights="uniform", progress=False, **GRID)
    assert a.params["weights"] == "ensemble"
    np.testing.assert_array_equal(a.intensity, b.intensity)


def _two_sticks(ekin_ev: tuple[float, float], photon: float = 10.0) -> Ensemble:
    """Two snapshots (one trajectory each), one cation channel, equal Dyson norms."""
    ip = [photon - e for e in ekin_ev]
    return Ensemble.from_arrays(traj=[0, 1], time=[0.0, 0.0], active=[0, 0],
                                geometries=np.zeros((2, 1, 3)), symbols=["H"],
                                energies=[[0.0], [0.0]], cation_energies=[[ip[0]], [ip[1]]],
                                dyson=[[0.7], [0.7]])


def test_hydrogenic_cross_section_reaches_the_sticks_with_stick_energies():
    # hydrogenic plane-wave cross section: sigma(0.01 E_h) / sigma(0.04 E_h) = 0.176137 at zeta =
    # 1 (computed
    # independently (not published)); through compute_trpes the stick weights must carry it
    probe = GaussianPulse(photon_energy=10.0, fwhm=30.0)
    ens = _two_sticks((0.01 * HARTREE_EV, 0.04 * HARTREE_EV))
    model = prepare_sticks(ens, probe=probe, cross_section=HydrogenicPWA(zeta=1.0),
                           weights="uniform", progress=False)
    w = model.sticks.weight[np.argsort(model.sticks.energy)]
    assert w[0] / w[1] == pytest.approx(0.176137, abs=1e-5)
    m = compute_trpes(ens, probe=probe, cross_section=HydrogenicPWA(zeta=1.0), weights="uniform",
                      kinetic_energies=np.linspace(0.0, 1.5, 3001), delays=[0.0], convolve=False,
                      progress=False)
    e = m.kinetic_energies
    lo = np.trapezoid(np.where(e < 0.68, m.intensity[0], 0.0), e)
    hi = np.trapezoid(np.where(e >= 0.68, m.intensity[0], 0.0), e)
    assert lo / hi == pytest.approx(0.176137, rel=1e-4)  # band areas keep the ratio


def test_anion_threshold_law_default_is_p_wave_through_compute_trpes():
    # Wigner threshold law: s-like detachment orbital -> p wave, sigma ~ E^(3/2) (from memory)
    probe = GaussianPulse(photon_energy=10.0, fwhm=30.0)
    ens = _two_sticks((0.5, 2.0))
    model = prepare_sticks(ens, probe=probe, cross_section=AnionThresholdLaw(),
                           weights="uniform", progress=False)
    w = model.sticks.weight[np.argsort(model.sticks.energy)]
    assert w[0] / w[1] == pytest.approx((0.5 / 2.0) ** 1.5, rel=1e-12)
    s_wave = prepare_sticks(ens, probe=probe, cross_section=AnionThresholdLaw(l=0),
                            weights="uniform", progress=False)
    w0 = s_wave.sticks.weight[np.argsort(s_wave.sticks.energy)]
    assert w0[0] / w0[1] == pytest.approx((0.5 / 2.0) ** 0.5, rel=1e-12)


@pytest.mark.parametrize("convolve", [True, False])
def test_diabatic_components_follow_the_squared_adt_of_the_pair_map(convolve):
    # diabatic decomposition by the squared ADT: a stick (i, k) goes to diabatic pair (a, b) with
    # weight
    # U_ia^2 V_kb^2. With one ADT for all snapshots the diabatic components are that mix
    # of the adiabatic pair components (derived and computed independently (not
    # published)); a generic 3 x 3 rotation has a non-symmetric U^2, so a transposed
    # neutral ADT fails (the squares of a 2 x 2 cation ADT are symmetric either way).
    base = random_ensemble(6, seed=9)
    u = special_ortho_group.rvs(3, random_state=4)
    v = np.array([[np.cos(0.4), np.sin(0.4)], [-np.sin(0.4), np.cos(0.4)]])
    assert np.abs(u**2 - (u**2).T).max() > 0.05
    n = base.n_snapshots
    ens = _rebuild(base, np.arange(base.n_trajectories))
    ens = ens.replace(adt=np.broadcast_to(u, (n, 3, 3)).copy(),
                      adt_cation=np.broadcast_to(v, (n, 2, 2)).copy())
    kw = dict(probe=PROBE, pump=PUMP, convolve=convolve, progress=False, **GRID)
    pair = compute_trpes(ens, decompose="pair", **kw)
    dia = compute_trpes(ens, decompose="diabatic", **kw)
    p = np.stack(list(pair.components.values())).reshape(3, 2, *pair.shape)  # (i, k, ...)
    d = np.stack(list(dia.components.values())).reshape(3, 2, *dia.shape)  # (a, b, ...)
    expected = np.einsum("ia,kb,ik...->ab...", u**2, v**2, p)
    scale = np.abs(pair.intensity).max()
    np.testing.assert_allclose(d, expected, rtol=0, atol=1e-11 * scale)
    wrong = np.einsum("ai,kb,ik...->ab...", u**2, v**2, p)  # transposed neutral ADT
    assert np.abs(d - wrong).max() > 1e-3 * scale


@pytest.mark.parametrize(("fwhm", "resolution"), [(45.0, 0.0), (30.0, 0.08), (18.0, 0.03)])
def test_rebroadening_cached_sticks_equals_a_fresh_map(fwhm, resolution):
    # changing only the probe width or the resolution re-uses the sticks (and the moments
    # where their truncation bound allows); the map must equal a fresh computation
    # (computed independently (not published); tolerance: the moment truncation bound,
    # about 3e-5 of the peak)
    ens = random_ensemble(8, seed=6)
    model = prepare_sticks(ens, probe=PROBE, pump=PUMP, progress=False)
    model.broaden(pump=PUMP, **GRID)  # fill the caches with the first width
    probe2 = GaussianPulse(photon_energy=PROBE.photon_energy, fwhm=fwhm)
    again = model.broaden(probe=probe2, pump=PUMP, resolution=resolution, **GRID)
    fresh = compute_trpes(ens, probe=probe2, pump=PUMP, resolution=resolution, progress=False,
                          **GRID)
    scale = np.abs(fresh.intensity).max()
    assert again.params["fwhm_energy"] == pytest.approx(fresh.params["fwhm_energy"], rel=1e-14)
    np.testing.assert_allclose(again.intensity, fresh.intensity, rtol=0, atol=3e-5 * scale)
    first = model.broaden(pump=PUMP, **GRID)
    assert np.abs(first.intensity - fresh.intensity).max() > 1e-3 * scale  # width changed
