"""The map view redraws from cached sticks on a probe width, resolution or photon-energy
change (headless), with maps equal to a fresh compute_trpes.

Reference values: compute_trpes called from scratch with the same settings (computed
independently, not published). Tolerance: the moment expansion at another stick width is
exact to 3e-5 of the map's peak (REUSE_TOLERANCE of the package's moment broadening,
computed independently, not published); same settings agree to 1e-9 (common practice for
floating-point reassociation).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from ensemblelab.compute.spectroscopy import compute_trpes
from ensemblelab.widgets import MapView, SelectionModel

GRID = {"kinetic_energies": np.linspace(0.0, 2.5, 101), "delays": np.arange(-60.0, 201.0, 10.0)}
MOMENTS = 3e-5  # of the peak: see the module docstring


def _fresh(view: MapView, model: SelectionModel, **kw):
    """compute_trpes from scratch with the view's current controls."""
    probe, pump = view.pulses()
    kwargs = {"weights": "uniform"} if pump is None else {}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return compute_trpes(model.ens, probe=probe, pump=pump, resolution=float(
            view.resolution.value), convolve=bool(view.convolve.value), progress=False,
            exclude=list(model.excluded), **GRID, **kwargs, **kw)


def _close(a, b, tol=MOMENTS):
    ref = np.asarray(b.intensity)
    np.testing.assert_allclose(a.intensity, ref, rtol=0, atol=tol * np.abs(ref).max())
    np.testing.assert_allclose(a.alive, b.alive, rtol=1e-12)


def test_width_change_redraws_from_the_cache_and_equals_a_fresh_map(model):
    view = MapView(model, debounce=0, **GRID)
    cache = view.live.cache
    assert cache is not None and cache.rebuilds == 1
    for fwhm in (40.0, 25.0):
        view.probe_fwhm.value = fwhm
        assert view.live.cache is cache and cache.rebuilds == 1  # no pass over the ensemble
        assert model.trpes_map.params["probe"]["fwhm"] == fwhm
        _close(model.trpes_map, _fresh(view, model))
    assert view.messages.errors == []


def test_resolution_and_width_changes_keep_the_band_sticks(model):
    view = MapView(model, debounce=0, **GRID)
    view.brush.brushing = True
    view.brush.selected_x, view.brush.selected_y = np.array([1.3, 1.7]), np.array([0.0, 50.0])
    view.brush.brushing = False  # the first brush makes the band's sticks
    sticks = view.live.band
    assert sticks is not None and view.live.n_band_builds == 1
    view.resolution.value = 0.04
    assert view.live.band is sticks and view.live.cache.rebuilds == 1
    _close(model.trpes_map, _fresh(view, model))
    # the band follows the new map and equals the band of a fresh map with fresh sticks
    fresh_map, fresh_sticks = _fresh(view, model, return_model=True)
    other = SelectionModel(model.ens)
    other.trpes_map = fresh_map
    other.remember_stick_model(fresh_map, fresh_sticks)
    band = other.select_band(energy_range=(1.3, 1.7), delay_range=(0.0, 50.0))
    assert model.analysis.total == pytest.approx(other.analysis.total, rel=1e-9)
    assert list(model.band["snapshot"][:10]) == list(band["snapshot"][:10])
    view.probe_fwhm.value = 45.0  # the same sticks serve the new width
    assert view.live.band is sticks and view.live.n_band_builds == 1
    assert model.known_stick_model() is None and view.live.cache.rebuilds == 1


def test_photon_energy_change_shifts_the_cached_sticks(model):
    view = MapView(model, debounce=0, **GRID)
    cache = view.live.cache
    hv = float(view.photon_energy.value)
    for new in (hv - 0.2, hv + 0.3):
        view.photon_energy.value = new
        assert view.live.cache is cache and cache.rebuilds == 1
        assert model.trpes_map.params["probe"]["photon_energy"] == pytest.approx(new)
        _close(model.trpes_map, _fresh(view, model))


def test_exclusions_weights_and_photon_count_make_a_new_cache(model, toy):
    view = MapView(model, debounce=0, **GRID)
    first = view.live.cache
    ids = toy.trajectories["traj"].to_numpy()[:5].tolist()
    model.excluded = tuple(ids)
    assert view.live.cache is not first and view.live.n_caches == 2
    assert model.trpes_map.params["excluded"] == sorted(ids)
    _close(model.trpes_map, _fresh(view, model), tol=1e-9)
    view.probe_fwhm.value = 50.0  # exclusions kept in the cached redraw
    assert view.live.n_caches == 2
    _close(model.trpes_map, _fresh(view, model))
    view.n_photons.value = 2
    assert view.live.n_caches == 3


def test_pump_change_redraws_and_equals_a_fresh_map(model):
    view = MapView(model, debounce=0, **GRID)
    view.pump_fwhm.value = 60.0  # the toy's weights do not depend on the pump
    assert model.trpes_map.params["pump"]["fwhm"] == 60.0
    _close(model.trpes_map, _fresh(view, model), tol=1e-9)


def test_decomposition_uses_the_full_path(model):
    view = MapView(model, debounce=0, **GRID)
    view.decomposition.value = "neutral state"
    assert view.live.n_full == 1 and model.trpes_map.components
    assert model.known_stick_model() is not None  # sticks of the full call kept
    ref = _fresh(view, model, decompose="neutral")
    _close(model.trpes_map, ref, tol=1e-9)


def test_other_seed_truncated_strided_ensemble():
    # an ensemble of another seed, strided and truncated (invented toy of ensemblelab.testing)
    from ensemblelab.testing import make_toy_ensemble

    ens = make_toy_ensemble(31, seed=19, t_max=150.0, dt=3.0)
    model = SelectionModel(ens)
    view = MapView(model, debounce=0, **GRID)
    view.probe_fwhm.value = 36.0
    view.resolution.value = 0.03
    view.photon_energy.value = float(view.photon_energy.value) + 0.1
    assert view.live.cache.rebuilds == 1
    _close(model.trpes_map, _fresh(view, model))
