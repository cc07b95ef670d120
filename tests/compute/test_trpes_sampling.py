"""TRPES weights that never apply the pump twice, their effective size, the multiphoton pump,
per-channel ionisation shifts and the absorbing state.

Check values: Kish effective size (Kish 1965, survey sampling design effect; from memory),
Gaussian pulse spectra (derived from the Gaussian Fourier transform; from memory) and maps
of ensembles rebuilt by hand (computed independently (not published)).
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pandas as pd
import pytest

from ensemblelab import load, save
from ensemblelab.compute.dynamics.initial import doorway_table, select_initial_conditions
from ensemblelab.compute.spectroscopy import compute_trpes, doorway_factor
from ensemblelab.compute.spectroscopy.pulses import GaussianPulse
from ensemblelab.compute.spectroscopy.sampling import ensemble_absorbing_state, kish_effective_size
from ensemblelab.errors import EnsembleWarning, SchemaError
from ensemblelab.io._xyz_write import write_extxyz
from ensemblelab.testing import make_toy_ensemble

PROBE = GaussianPulse(photon_energy=5.0, fwhm=30.0)
PUMP = GaussianPulse(photon_energy=4.0, fwhm=20.0)
GRID = {"kinetic_energies": np.linspace(0.0, 2.0, 101), "delays": np.arange(-20.0, 101.0, 10.0),
        "progress": False}


def _with_excitation(ens, *, seed=0, sampling=None):
    """A toy ensemble given excitation energies across the pump spectrum (doorway data)."""
    rng = np.random.default_rng(seed)
    n = ens.n_trajectories
    exc = np.zeros((n, ens.n_states))
    exc[:, 1] = rng.uniform(3.8, 4.2, n)
    exc[:, 2] = rng.uniform(3.85, 4.15, n)
    mu = np.zeros((n, ens.n_states, 3))
    mu[:, 1:, 0] = rng.uniform(0.5, 1.5, (n, ens.n_states - 1))
    meta = dict(ens.metadata)
    if sampling is not None:
        meta["sampling"] = sampling
    return ens.replace(excitation_energies=exc, transition_dipoles=mu, metadata=meta)


def _quiet(f, *a, **k):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return f(*a, **k)


# ------------------------------------------------------------------ 1. sampling, ESS
def test_doorway_selected_ensemble_is_not_weighted_by_the_pump_again():
    # a doorway-selected ensemble (like the demo) with excitation data and a pump: the
    # default must count each trajectory once (old default weighted it by the pump again)
    ens = _with_excitation(make_toy_ensemble(30, seed=4, t_max=100.0),
                           sampling="doorway-selected")
    auto = compute_trpes(ens, probe=PROBE, pump=PUMP, **GRID)
    uniform = compute_trpes(ens, probe=PROBE, pump=PUMP, weights="uniform", **GRID)
    with pytest.warns(EnsembleWarning, match="applied twice"):
        twice = compute_trpes(ens, probe=PROBE, pump=PUMP, weights="doorway", **GRID)
    assert auto.params["weights"] == "uniform"
    np.testing.assert_array_equal(auto.intensity, uniform.intensity)
    assert np.abs(twice.intensity - auto.intensity).max() > 1e-3 * auto.intensity.max()
    # every trajectory counts once: the effective size is the trajectory count (Kish)
    assert auto.effective_sample_size == pytest.approx(30.0, rel=1e-12)
    assert "effective sample size 30.0 of 30" in repr(auto)


def test_demo_recorded_as_doorway_selected_gets_uniform_weights_by_default():
    # the invented demo is selected by doorway rejection: recorded as such, the default map
    # counts each trajectory once (Kish size = 80); weighting it by the pump again lowers the
    # Kish size and moves the map by a few % of its peak (computed independently (not
    # published): 68.0 and 3.7 %)
    demo = pytest.importorskip("ensemblelab.demo")
    ens = _quiet(demo.make_ensemble)
    ens = ens.replace(metadata={**ens.metadata, "sampling": "doorway-selected"})
    kw = dict(probe=GaussianPulse(**ens.metadata["suggested_probe"]),
              pump=GaussianPulse(**ens.metadata["suggested_pump"]),
              kinetic_energies=np.linspace(0.0, 3.0, 151), delays=np.arange(-100.0, 500.0, 5.0),
              progress=False)
    auto = _quiet(compute_trpes, ens, **kw)
    twice = _quiet(compute_trpes, ens, weights="doorway", **kw)
    assert auto.params["weights"] == "uniform"
    assert auto.effective_sample_size == pytest.approx(ens.n_trajectories, rel=1e-12)
    assert twice.effective_sample_size < 0.9 * ens.n_trajectories
    assert np.abs(auto.intensity - twice.intensity).max() > 0.01 * auto.intensity.max()


def test_uniform_and_weighted_sampling_and_unknown_sampling_warns():
    base = make_toy_ensemble(20, seed=5, t_max=80.0)
    uni = _with_excitation(base, sampling="uniform")
    m = compute_trpes(uni, probe=PROBE, pump=PUMP, **GRID)
    assert m.params["weights"] == "doorway"  # not selected by the pump: apply it
    w = doorway_factor(uni.excitation_energies[:, 2], pump=PUMP,
                       transition_dipole=uni.transition_dipoles[:, 2])
    # Kish size of the doorway weights (from memory: (sum w)^2 / sum w^2)
    assert m.effective_sample_size == pytest.approx(w.sum() ** 2 / (w * w).sum(), rel=1e-12)
    tr = base.trajectories.assign(weight=np.linspace(0.5, 1.5, 20))
    wtd = _with_excitation(base.replace(trajectories=tr), sampling="weighted")
    mw = compute_trpes(wtd, probe=PROBE, pump=PUMP, **GRID)
    assert mw.params["weights"] == "ensemble"
    with pytest.warns(EnsembleWarning, match="unknown"):
        mu = compute_trpes(_with_excitation(base), probe=PROBE, pump=PUMP, **GRID)
    assert mu.params["weights"] == "ensemble"
    with pytest.raises(SchemaError, match="sampling"):
        compute_trpes(base.replace(metadata={"sampling": "doorway"}), probe=PROBE, **GRID)


def test_low_effective_sample_size_warns():
    ens = make_toy_ensemble(20, seed=6, t_max=60.0)
    w = np.full(20, 0.01)
    w[0] = 1.0  # one trajectory dominates: Kish size (sum w)^2 / sum w^2 = 1.19^2 / 1.0019
    tr = ens.trajectories.assign(weight=w)
    with pytest.warns(EnsembleWarning, match="effective sample size"):
        m = compute_trpes(ens.replace(trajectories=tr, metadata={"sampling": "weighted"}),
                          probe=PROBE, **GRID)
    assert m.effective_sample_size == pytest.approx(1.19**2 / 1.0019, rel=1e-12)
    assert kish_effective_size(w) == pytest.approx(1.19**2 / 1.0019, rel=1e-12)


def test_sampling_and_absorbing_state_round_trip_through_open_formats(tmp_path):
    ens = make_toy_ensemble(3, seed=1, t_max=10.0)
    ens = ens.replace(metadata={**ens.metadata, "sampling": "doorway-selected",
                                "absorbing_state": None})
    back = load(save(ens, tmp_path / "a.ens"))
    assert back.metadata["sampling"] == "doorway-selected"
    assert ensemble_absorbing_state(back) is None
    back2 = load(write_extxyz(ens, tmp_path / "xyz"))
    assert back2.metadata["sampling"] == "doorway-selected"
    assert "absorbing_state" in back2.metadata and back2.metadata["absorbing_state"] is None


def test_lazy_auto_weights_match_in_memory(tmp_path):
    pytest.importorskip("dask")
    from ensemblelab.io.chunked import save_chunked

    ens = _with_excitation(make_toy_ensemble(12, seed=8, t_max=60.0, ragged=True),
                           sampling="uniform")
    lazy = load(save_chunked(ens, tmp_path / "c.ens", chunk_size=5), lazy=True)
    a = compute_trpes(ens, probe=PROBE, pump=PUMP, **GRID)
    b = compute_trpes(lazy, probe=PROBE, pump=PUMP, **GRID)
    assert a.params["weights"] == b.params["weights"] == "doorway"
    np.testing.assert_allclose(b.intensity, a.intensity, rtol=1e-12,
                               atol=1e-12 * a.intensity.max())
    assert b.effective_sample_size == pytest.approx(a.effective_sample_size, rel=1e-12)


# ------------------------------------------------------------------ 2. multiphoton pump
def test_two_photon_pump_selects_at_twice_the_photon_energy():
    # a 2 x 2.4 eV pump selects a 4.8 eV state (weight |mu|^2 = 1) and not a 2.4 eV state;
    # n-photon spectrum: centre n h nu, FWHM sqrt(n) Gamma (derived: Gaussian I^n; from memory)
    pump = GaussianPulse(photon_energy=2.4, fwhm=20.0, n_photons=2)
    w = doorway_factor([4.8, 2.4], pump=pump, transition_dipole=[1.0, 1.0])
    assert w[0] == pytest.approx(1.0, abs=1e-12)
    assert w[1] < 1e-100
    # half maximum at a detuning of sqrt(2) Gamma / 2 (two-photon width)
    half = 4.8 + math.sqrt(2.0) * pump.spectral_fwhm / 2.0
    assert doorway_factor([half], pump=pump, transition_dipole=[1.0])[0] == pytest.approx(
        0.5, rel=1e-12)
    # the same in the initial-condition selection, from a pulse or from plain numbers
    table = pd.DataFrame({"sample": [0, 0], "state": [1, 2],
                          "excitation_energy": [2.4, 4.8], "mu2": [1.0, 1.0]})
    for kw in ({"pump": pump}, {"photon_energy": 2.4, "fwhm": 20.0, "n_photons": 2}):
        t = doorway_table(table, **kw)
        assert t["weight"].tolist() == pytest.approx([0.0, 1.0], abs=1e-12)
        sel = select_initial_conditions(table, random_state=0, **kw)
        assert sel["state"].tolist() == [2]
        assert sel.attrs["sampling"] == "doorway-selected"


# ------------------------------------------------------------------ 7. ionisation shifts
def test_ionisation_shifts_equal_shifted_cation_energies():
    # shifting channel k's ionisation energies by s equals adding s to its cation energies
    # (computed independently (not published): the same map from an edited ensemble)
    ens = make_toy_ensemble(15, seed=9, t_max=80.0)
    two = ens.replace(cation_energies=np.c_[ens.cation_energies, ens.cation_energies + 0.7],
                      dyson=np.concatenate([ens.dyson, 0.5 * ens.dyson], axis=-1),
                      cation_labels=("D0", "D1"))
    shifts = [0.2, -0.1]
    edited = two.replace(cation_energies=two.cation_energies + np.array(shifts)[None, :])
    kw = dict(probe=PROBE, decompose="cation", **GRID)
    a = compute_trpes(two, ionisation_shifts=shifts, **kw)
    b = compute_trpes(edited, **kw)
    c = compute_trpes(two, ionisation_shifts={0: 0.2, 1: -0.1}, **kw)
    np.testing.assert_allclose(a.intensity, b.intensity, rtol=1e-12, atol=1e-12)
    np.testing.assert_array_equal(a.intensity, c.intensity)
    assert a.params["ionisation_shifts"] == shifts
    assert np.abs(a.intensity - compute_trpes(two, **kw).intensity).max() > 0.1
    with pytest.raises(SchemaError, match="one shift"):
        compute_trpes(two, ionisation_shifts=[0.1], **kw)
    with pytest.raises(SchemaError, match="channel"):
        compute_trpes(two, ionisation_shifts={5: 0.1}, **kw)


# ------------------------------------------------------------------ 8. absorbing state
def _cut_after_ground_state(ens, after: float):
    fr = ens.snapshots
    keep = np.ones(len(fr), dtype=bool)
    for _, g in fr.groupby("traj"):
        s0 = g.index[g["active"].to_numpy() == 0]
        if len(s0):
            keep[g.index[g["time"].to_numpy() > g.loc[s0[0], "time"] + after]] = False
    return ens._take(np.flatnonzero(keep))


def test_stopped_trajectories_stay_in_the_alive_weight():
    # invented demo scenario: trajectories stopped 10 fs after reaching S0 (as many dynamics
    # runs do) must give about the full run's signal at 300 fs, not the signal of the
    # trajectories still excited (computed independently (not published): full 0.154,
    # counted as ended 1.25, eight times larger)
    demo = pytest.importorskip("ensemblelab.demo")
    ens = _quiet(demo.make_ensemble, faults=False)
    meta = ens.metadata
    kw = dict(probe=GaussianPulse(**meta["suggested_probe"]),
              pump=GaussianPulse(**meta["suggested_pump"]),
              kinetic_energies=np.linspace(0.0, 3.0, 301), delays=np.array([300.0]),
              progress=False)
    cut = _cut_after_ground_state(ens, 10.0)
    e = kw["kinetic_energies"]
    full = np.trapezoid(_quiet(compute_trpes, ens, **kw).intensity[0], e)
    m = _quiet(compute_trpes, cut, **kw)
    stopped = np.trapezoid(m.intensity[0], e)
    ended = np.trapezoid(_quiet(compute_trpes, cut, absorbing="end", **kw).intensity[0], e)
    assert m.params["n_absorbed"] > 0
    assert stopped == pytest.approx(full, rel=0.25)
    assert ended > 4 * full  # the old behaviour, kept as an option
    # alive at 300 fs: every trajectory still running or stopped in S0 (counted directly;
    # one that hopped back up within the 10 fs stops as an ordinary ended trajectory)
    last = cut.snapshots.sort_values("time").groupby("traj").last()
    expected = int(((last["time"] >= 300.0) | (last["active"] == 0)).sum())
    assert m.alive[0] == pytest.approx(expected, rel=1e-12)
    assert expected > ens.n_trajectories // 2


def _stopping_ensemble():
    """Two trajectories on S1 then S0; one stops at 20 fs in S0, the other runs to 40 fs."""
    from ensemblelab.data.ensemble import Ensemble

    t = np.arange(0.0, 41.0, 2.0)
    t_stop = t[t <= 20.0]
    traj = np.r_[np.zeros(t.size, int), np.ones(t_stop.size, int)]
    time = np.r_[t, t_stop]
    active = np.where(time < 10.0, 1, 0)
    n = time.size
    energies = np.c_[np.zeros(n), np.full(n, 1.0)]
    cation = np.full((n, 1), 4.6)  # IP(S0) = 4.6 eV: the 5 eV probe ionises S0
    cation[active == 1] = 4.0
    return Ensemble.from_arrays(traj=traj, time=time, active=active,
                                geometries=np.zeros((n, 1, 3)), symbols=["H"],
                                energies=energies, cation_energies=cation,
                                dyson=np.full((n, 1), 0.9))


def test_absorbing_modes_and_warning():
    ens = _stopping_ensemble()
    kw = dict(probe=PROBE, kinetic_energies=np.linspace(0.0, 1.0, 201),
              delays=np.array([30.0]), convolve=False, progress=False)
    with pytest.warns(EnsembleWarning, match="absorbing state 0"):
        zero = compute_trpes(ens, **kw)
    carry = compute_trpes(ens, absorbing="carry", **kw)
    end = compute_trpes(ens, absorbing="end", **kw)
    # at 30 fs: both on S0 with the same sticks; "zero": one with signal over two alive;
    # "carry": the stopped one repeats its last (identical) sticks; "end": one alive
    assert zero.alive[0] == 2.0 and carry.alive[0] == 2.0 and end.alive[0] == 1.0
    np.testing.assert_allclose(zero.intensity, 0.5 * end.intensity, rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(carry.intensity, end.intensity, rtol=1e-12, atol=1e-12)
    # no absorbing state: the metadata switch
    none = compute_trpes(ens.replace(metadata={"absorbing_state": None}), **kw)
    np.testing.assert_array_equal(none.intensity, end.intensity)
