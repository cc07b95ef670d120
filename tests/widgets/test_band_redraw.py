"""With a band selected, a width, resolution or photon-energy change redraws the band from
the sticks already made (headless): no new sticks, and the band table, the grouped
shares with their bootstrap intervals and the selection equal a fresh band analysis.

Reference values: a fresh ``compute_trpes(..., return_model=True)`` at the new settings
and the band analysis of a new selection model from that model's sticks (computed
independently, not published). Tolerance 1e-9 relative (common practice for the same
sums in another order).
"""

from __future__ import annotations

import importlib
import warnings

import numpy as np
import pytest

from ensemblelab.compute.spectroscopy import compute_trpes
from ensemblelab.compute.uncertainty import band_share_table
from ensemblelab.widgets import MapView, SelectionModel, SelectionTable

GRID = {"kinetic_energies": np.linspace(0.0, 2.5, 101), "delays": np.arange(-60.0, 201.0, 10.0)}
BAND = {"energy_range": (0.3, 1.7), "delay_range": (0.0, 90.0)}
TOL = 1e-9


@pytest.fixture
def ragged():
    """The invented toy of another seed, ragged, strided, with missing cation data."""
    from ensemblelab.testing import make_toy_ensemble

    ens = make_toy_ensemble(30, seed=41, t_max=180.0, dt=1.5, ragged=True)
    cat = np.array(ens.cation_energies, dtype=float)
    cat[np.random.default_rng(2).random(cat.shape[0]) < 0.03] = np.nan
    return ens.replace(cation_energies=cat)


@pytest.fixture
def passes(monkeypatch):
    """Count every making of sticks (numpy stick path and compiled fused pass)."""
    calls: list[str] = []

    def spy(name, real):
        def wrapped(*a, **k):
            calls.append(name)
            return real(*a, **k)
        return wrapped

    pkg = "ensemblelab.compute.spectroscopy."
    for name in ("sticks", "maps", "contributions"):
        module = importlib.import_module(pkg + name)
        monkeypatch.setattr(module, "block_sticks", spy("block_sticks", module.block_sticks))
    maps = importlib.import_module(pkg + "maps")
    monkeypatch.setattr(maps, "fused_partial", spy("fused_partial", maps.fused_partial))
    return calls


def _fresh_band(view: MapView, model: SelectionModel) -> SelectionModel:
    """A new selection model with a fresh map and fresh sticks, the same band selected."""
    probe, pump = view.pulses()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        trpes, sticks = compute_trpes(
            model.ens, probe=probe, pump=pump, resolution=float(view.resolution.value),
            convolve=bool(view.convolve.value), progress=False, exclude=list(model.excluded),
            return_model=True, **GRID)
    other = SelectionModel(model.ens, excluded=model.excluded)
    other.trpes_map = trpes
    other.remember_stick_model(trpes, sticks)
    other.select_band(energy_range=model.energy_range, delay_range=model.delay_range)
    return other


def _assert_same_band(model: SelectionModel, other: SelectionModel) -> None:
    a, b = model.analysis, other.analysis
    assert a is not None and b is not None
    scale = float(b.intensity.max())
    np.testing.assert_allclose(a.intensity, b.intensity, rtol=0, atol=TOL * scale)
    assert a.n_snapshots == b.n_snapshots and a.n_trajectories == b.n_trajectories
    ta, tb = model.band, other.band
    assert len(ta) == len(tb)
    np.testing.assert_allclose(ta["intensity"], tb["intensity"], rtol=TOL)
    np.testing.assert_allclose(ta["share"], tb["share"], rtol=TOL)
    assert ta.attrs["no_signal"] == tb.attrs["no_signal"]
    for by in ("state", "traj", "cluster"):
        ga, gb = model.group_table(by), other.group_table(by)
        assert ga["key"].tolist() == gb["key"].tolist()
        np.testing.assert_allclose(ga["share"], gb["share"], rtol=0, atol=TOL)
        assert ga["n_snapshots"].tolist() == gb["n_snapshots"].tolist()
        ia, ib = band_share_table(a, by, n_boot=200), band_share_table(b, by, n_boot=200)
        np.testing.assert_allclose(ia[["lower", "upper"]].to_numpy(),
                                   ib[["lower", "upper"]].to_numpy(), rtol=0, atol=TOL)


def test_width_and_photon_energy_changes_with_a_band_make_no_new_sticks(ragged, passes):
    model = SelectionModel(ragged)
    model.excluded = tuple(ragged.trajectories["traj"].to_numpy()[[1, 4, 9]].tolist())
    view = MapView(model, debounce=0, **GRID)
    table = SelectionTable(model)
    model.select_band(**BAND)  # the first brush makes the band's sticks
    assert view.live.n_band_builds == 1 and table.table is not None
    cache = view.live.cache
    hv = float(view.photon_energy.value)
    passes.clear()
    for control, value in ((view.probe_fwhm, 40.0), (view.photon_energy, hv - 0.3),
                           (view.resolution, 0.04), (view.probe_fwhm, 24.0),
                           (view.photon_energy, hv + 0.2)):
        before = model.band
        control.value = value
        assert model.band is not before  # the band followed the new map
        assert passes == [], (control.description, value)  # no sticks made at all
        assert view.live.n_band_builds == 1 and view.live.cache is cache
        assert cache.rebuilds == 1
        assert model.known_stick_model() is None  # no full stick model either
        other = _fresh_band(view, model)  # (makes sticks: counted, then forgotten)
        passes.clear()
        _assert_same_band(model, other)
        assert model.selected == other.selected
        shown = table.table
        assert shown is not None and "lower" in shown  # shares with intervals drawn
    # excluded trajectories never contribute
    hit = np.isin(model.analysis.groups.traj, model.excluded)
    assert np.all(model.analysis.intensity[hit] == 0)
    assert view.messages.errors == []


def test_new_exclusions_make_new_band_sticks_once(ragged):
    model = SelectionModel(ragged)
    view = MapView(model, debounce=0, **GRID)
    model.select_band(**BAND)
    assert view.live.n_band_builds == 1
    top = int(model.band["traj"].iloc[0])  # the strongest trajectory goes
    model.exclude([top])
    assert view.live.n_band_builds == 2
    assert top not in set(model.band["traj"].tolist())
    _assert_same_band(model, _fresh_band(view, model))
    view.probe_fwhm.value = 38.0
    assert view.live.n_band_builds == 2
    _assert_same_band(model, _fresh_band(view, model))


def test_decomposed_maps_use_the_full_stick_model(ragged):
    model = SelectionModel(ragged)
    view = MapView(model, debounce=0, decomposition="neutral state", **GRID)
    model.select_band(**BAND)
    assert view.live.n_band_builds == 0 and model.known_stick_model() is not None
    _assert_same_band(model, _fresh_band(view, model))
