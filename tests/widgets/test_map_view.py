from __future__ import annotations

import numpy as np
import pytest

from ensemblelab.widgets import MapView

GRID = {"kinetic_energies": np.linspace(0.0, 2.5, 101), "delays": np.arange(-60.0, 201.0, 10.0)}


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
    assert GRID["kinetic_energies"][np.argmax(spectrum)] == pytest.approx(1.5, abs=0.03)
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


def _live_widgets() -> int:
    import warnings

    import ipywidgets

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DeprecationWarning)
        return len(ipywidgets.Widget.widgets)


def test_mapview_decomposition_grid_reuses_its_figures(model):
    view = MapView(model, debounce=0, decomposition="neutral state", **GRID)
    figs = tuple(view.grid.children)
    assert len(figs) >= 2
    counts = []
    for i in range(50):  # 50 redraws of the grid after a control change
        view.probe_fwhm.value = 30.0 + (i % 2)
        counts.append(_live_widgets())
    print(f"\nlive widgets over 50 decomposition redraws: {counts[0]} -> {counts[-1]}")
    assert counts[-1] == counts[0]  # flat: the small maps are updated, not made anew
    assert tuple(view.grid.children) == figs
    # their data follow the map (probe FWHM 31 fs after an odd count of changes)
    comps = model.trpes_map.components
    name = view.grid.children[0].title
    np.testing.assert_allclose(view.grid.children[0].marks[0].color,
                               np.nan_to_num(np.asarray(comps[name], float)))
    assert not view.figure.display_toolbar  # no toolbar over the map's corner


def test_mapview_layers_keep_one_set_of_axes_and_move_the_brush(model):
    first = MapView(model, debounce=0, **GRID)
    sim = model.trpes_map
    keep = np.asarray(sim.delays) <= 100.0  # a measured map that stops at 100 fs
    measured = sim.replace(delays=np.asarray(sim.delays)[keep],
                           intensity=np.asarray(sim.intensity)[keep], components={},
                           alive=None, alive_count=None)
    view = MapView(model, debounce=0, measured=measured, **GRID)
    axes = (view.x.min, view.x.max, view.y.min, view.y.max)
    assert axes == (0.0, 2.5, -60.0, 200.0)  # the simulated grid (GRID above)
    model.select_band(energy_range=(1.3, 1.7), delay_range=(20.0, 60.0))
    for layer in ("measured", "residual", "simulated"):
        view.layer.value = layer
        assert (view.x.min, view.x.max, view.y.min, view.y.max) == axes, layer
        assert tuple(view.brush.selected_x) == (1.3, 1.7)
        assert tuple(view.brush.selected_y) == (20.0, 60.0)
    # inside the measured grid: simulated and measured cuts
    assert len(view.delay_cut_line.y) == 2 and len(view.energy_cut_line.y) == 2
    # later than the measured map: its delay cut shows nothing (not its 100 fs edge)
    model.select_band(energy_range=(1.3, 1.7), delay_range=(150.0, 190.0))
    assert np.atleast_2d(view.delay_cut_line.y).shape[0] == 1  # the simulated cut only
    assert len(view.energy_cut_line.y) == 2  # the energy range is still measured
    model.clear_band()
    assert view.brush.selected_x is None and len(view.box.x) == 0
    assert first.messages.errors == [] and view.messages.errors == []
