"""StickCache with exclusions (``exclude=``) and a new pump (``set_pump``), against a fresh
compute_trpes with the same settings.

Reference values: compute_trpes from scratch (computed independently, not published).
Tolerances: same settings 1e-9 of the peak (common practice for floating-point
reassociation); another stick width 3e-5 of the peak (the moment expansion's
REUSE_TOLERANCE, computed independently, not published).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from ensemblelab.compute.spectroscopy import compute_trpes
from ensemblelab.compute.spectroscopy.cache import prepare_map_cache
from ensemblelab.compute.spectroscopy.pulses import GaussianPulse
from ensemblelab.testing import make_toy_ensemble

PROBE = GaussianPulse(photon_energy=5.0, fwhm=30.0)
GRID = {"kinetic_energies": np.linspace(0.0, 2.0, 101), "delays": np.arange(-40.0, 141.0, 8.0)}


def _close(a, b, tol):
    ref = np.asarray(b.intensity)
    np.testing.assert_allclose(a.intensity, ref, rtol=0, atol=tol * np.abs(ref).max())


def _with_excitation(ens, seed=0):
    """Invented doorway data: excitation energies across the pump spectrum, dipoles."""
    rng = np.random.default_rng(seed)
    n = ens.n_trajectories
    exc = np.zeros((n, ens.n_states))
    exc[:, 1] = rng.uniform(3.8, 4.2, n)
    exc[:, 2] = rng.uniform(3.85, 4.15, n)
    mu = np.zeros((n, ens.n_states, 3))
    mu[:, 1:, 0] = rng.uniform(0.5, 1.5, (n, ens.n_states - 1))
    return ens.replace(excitation_energies=exc, transition_dipoles=mu,
                       metadata={**ens.metadata, "sampling": "uniform"})


@pytest.mark.parametrize("seed", [3, 8])
def test_cache_with_exclusions_equals_compute_trpes_exclude(seed):
    ens = make_toy_ensemble(26, seed=seed, t_max=160.0, dt=2.5)
    ids = ens.trajectories["traj"].to_numpy()[[1, 4, 9]].tolist()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cache = prepare_map_cache(ens, probe=PROBE, exclude=ids, photon_energies=(4.8, 5.2))
        for hv, fwhm, tol in ((5.0, 30.0, 1e-9), (4.9, 40.0, 3e-5)):
            a = cache.map(photon_energy=hv, probe_fwhm=fwhm, **GRID)
            b = compute_trpes(ens, probe=GaussianPulse(photon_energy=hv, fwhm=fwhm),
                              exclude=ids, progress=False, **GRID)
            _close(a, b, tol)
            np.testing.assert_allclose(a.alive, b.alive, rtol=1e-12)
            assert a.params["excluded"] == sorted(ids)
        # and it differs from the map with every trajectory (the check can fail)
        c = compute_trpes(ens, probe=PROBE, progress=False, **GRID)
        assert np.abs(np.asarray(c.intensity) - np.asarray(
            cache.map(**GRID).intensity)).max() > 1e-3 * np.abs(c.intensity).max()
    assert cache.rebuilds == 1


def test_set_pump_rebuilds_only_when_the_weights_depend_on_it():
    ens = make_toy_ensemble(20, seed=5, t_max=120.0, dt=2.0)
    pump = GaussianPulse(photon_energy=4.0, fwhm=20.0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        plain = prepare_map_cache(ens, probe=PROBE, pump=pump)
        new = GaussianPulse(photon_energy=4.1, fwhm=45.0)
        plain.set_pump(new)  # ensemble weights: only the cross-correlation changes
        _close(plain.map(**GRID), compute_trpes(ens, probe=PROBE, pump=new, progress=False,
                                                **GRID), 1e-9)
        assert plain.rebuilds == 1
        doorway = _with_excitation(ens)
        cache = prepare_map_cache(doorway, probe=PROBE, pump=pump)  # auto: doorway weights
        cache.set_pump(new)
        _close(cache.map(**GRID), compute_trpes(doorway, probe=PROBE, pump=new, progress=False,
                                                **GRID), 1e-9)
        assert cache.rebuilds == 2
        # the doorway weights do depend on the pump here (the check can fail)
        old = compute_trpes(doorway, probe=PROBE, pump=pump, convolve=False, progress=False,
                            **GRID)
        fresh = compute_trpes(doorway, probe=PROBE, pump=new, convolve=False, progress=False,
                              **GRID)
        assert np.abs(np.asarray(old.intensity) - np.asarray(fresh.intensity)).max() > \
            1e-6 * np.abs(fresh.intensity).max()
