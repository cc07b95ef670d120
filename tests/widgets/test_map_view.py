from __future__ import annotations

import numpy as np
import pytest

from ensemblelab.widgets import MapView

GRID = {"energies": np.linspace(0.0, 2.5, 101), "delays": np.arange(-60.0, 201.0, 10.0)}


def test_mapview_brush_selects_band_only_when_released(model):
    view = MapView(model, debounce=0, **GRID)
    view.brush.brushing = True
    view.brush.selected_x = np.array([1.3, 1.7])
    view.brush.selected_y = np.array([0.0, 50.0])
    assert model.band is None  # still dragging
    view.brush.brushing = False
    assert model.energy_range == (1.3, 1.7) and model.delay_range == (0.0, 50.0)
    assert model.band is not None and len(model.selected) > 0
    # cuts: the spectrum over the selected delays peaks at the S2 band, 1.5 eV
    # (5.0 eV probe - 3.5 eV IP; the invented toy of ensemblelab.testing, computed
    # independently (not published))
    spectrum, trace = view.cuts()
    assert GRID["energies"][np.argmax(spectrum)] == pytest.approx(1.5, abs=0.03)
    assert trace.shape == GRID["delays"].shape


def test_mapview_degenerate_brush_is_ignored(model):
    view = MapView(model, debounce=0, **GRID)
    view.brush.brushing = True
    view.brush.selected_x = np.array([1.3, 1.3])
    view.brush.selected_y = np.array([0.0, 50.0])
    view.brush.brushing = False
    assert model.band is None and view.messages.errors == []


def test_mapview_measured_overlay_and_residual(model, toy):
    first = MapView(model, debounce=0, **GRID)
    sim = model.trpes_map
    measured = sim.replace(intensity=2.0 * np.asarray(sim.intensity), components={})
    view = MapView(model, debounce=0, measured=measured, **GRID)
    result = view.comparison()
    assert result.scale == pytest.approx(2.0, rel=1e-6)  # measured = 2 x simulated, by design
    view.layer.value = "measured"
    np.testing.assert_allclose(view.heatmap.color, 2.0 * np.asarray(sim.intensity), rtol=1e-6,
                               atol=1e-9)
    view.layer.value = "residual"
    assert np.abs(view.heatmap.color).max() < 1e-6 * np.abs(sim.intensity).max()
    assert len(view.delay_cut_line.y) == 2  # simulated and measured cuts
    assert first.messages.errors == [] and view.messages.errors == []


def test_mapview_controls_recompute_debounced_in_tests(model):
    view = MapView(model, debounce=0, **GRID)
    n = view.n_computed
    view.convolve.value = False
    assert view.n_computed == n + 1
    assert model.trpes_map.params["convolve"] is False
