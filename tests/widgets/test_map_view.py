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
    # simulated and measured cuts, each with its legend entry (beside the plots)
    assert view.delay_cut_measured.visible
    assert "simulated" in view.cut_legend.value and "measured" in view.cut_legend.value
    assert "measured" not in first.cut_legend.value  # no measured map, no such entry
    assert view.delay_cut_line.labels == ["simulated"]
    assert view.delay_cut_measured.labels == ["measured"]
    # the residual's sign and the comparison's numbers are stated
    text = view.comparison_label.value
    assert "residual = measured − model" in text
    assert "scale 2" in text and "R² = 1.000" in text  # measured = 2 x simulated, exact fit
    assert view.color_axis.label == "residual / arb. u."  # its sign stated beside the map
    view.layer.value = "simulated"
    assert view.color_axis.label == "intensity / eV⁻¹" and view.comparison_label.value == ""
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
    assert view.delay_cut_measured.visible and view.energy_cut_measured.visible
    # the energy cut spans the simulated map's delays (to 200 fs), the measured one its own
    assert view.energy_cut_line.x[-1] == 200.0 and view.energy_cut_measured.x[-1] == 100.0
    assert (view.tx.min, view.tx.max) == (-60.0, 200.0)
    assert "mean over 20–60 fs" in view.cut_caption.value
    assert "mean over 1.30–1.70 eV" in view.cut_caption.value
    # later than the measured map: its delay cut shows nothing (not its 100 fs edge)
    model.select_band(energy_range=(1.3, 1.7), delay_range=(150.0, 190.0))
    assert not view.delay_cut_measured.visible  # the simulated cut only
    assert view.energy_cut_measured.visible  # the energy range is still measured
    model.clear_band()
    assert view.brush.selected_x is None and len(view.box.x) == 0
    assert first.messages.errors == [] and view.messages.errors == []


def test_nice_ticks_match_matplotlib_round_steps():
    """Round ticks: the step rule of matplotlib's MaxNLocator (reference library) with steps
    1, 2, 2.5, 5, 10, restricted to the range."""
    from matplotlib.ticker import MaxNLocator

    from ensemblelab.widgets._small_maps import nice_ticks, tick_format

    for lo, hi, n in [(0.0, 1.86e-3, 5), (-60.0, 500.0, 5), (0.0, 3.8, 6), (-59.0, 500.0, 3),
                      (0.61, 1.84, 4), (-2.5e-4, 2.5e-4, 5), (0.0, 6.2, 6)]:
        ref = MaxNLocator(nbins=n, steps=[1, 2, 2.5, 5, 10]).tick_values(lo, hi)
        ref = ref[(ref >= lo - 1e-12) & (ref <= hi + 1e-12)]
        np.testing.assert_allclose(nice_ticks(lo, hi, n), ref, atol=1e-12 * (hi - lo))
    # from memory: the odd ticks become round ones
    assert nice_ticks(-59.0, 500.0, 3).tolist() == [0.0, 200.0, 400.0]
    assert tick_format(nice_ticks(0.0, 1.86, 4)) == ".1f"  # 0.0, 0.5, 1.0, 1.5
    assert tick_format(nice_ticks(0.0, 0.6, 5)) == ".1f"


def test_mapview_colour_bar_label_round_ticks_and_signal_window(model, toy):
    view = MapView(model, debounce=0, photon_energy=5.0)  # default grid: 0 - 5 eV
    assert view.color_axis.label == "intensity / eV⁻¹"
    ticks = np.asarray(view.color_axis.tick_values)
    step = np.diff(ticks)
    mant = step[0] / 10.0 ** np.floor(np.log10(step[0]))
    assert np.allclose(step, step[0]) and round(mant, 9) in (1.0, 2.0, 2.5, 5.0)
    assert np.allclose(ticks / step[0], np.round(ticks / step[0]))
    # the toy's signal ends near 1.5 eV + broadening (5.0 eV probe - 3.5 eV IP; invented toy
    # of ensemblelab.testing, computed independently (not published)): the axis stops
    # there, not at h nu = 5 eV
    assert view.energy_axis.value == "with signal"
    assert 1.5 < view.x.max < 3.0 and view.x.min >= 0.0
    view.energy_axis.value = "full grid"
    assert view.x.max == 5.0
    fixed = MapView(model, debounce=0, energy_window=(0.2, 2.0), **GRID)
    assert (fixed.x.min, fixed.x.max) == (0.2, 2.0)
    with pytest.raises(ValueError, match="energy_window"):
        MapView(model, debounce=0, energy_window="everything", **GRID)
    assert view.messages.errors == []


def test_mapview_small_multiples_share_a_labelled_colour_bar(model):
    view = MapView(model, debounce=0, decomposition="neutral state", **GRID)
    sm = view.small_maps
    n = len(sm.grid.children)
    assert n == 3  # S0, S1, S2 of the toy
    assert sm.color_axis.label == "intensity / eV⁻¹"
    assert all(fig.marks[0].scales["color"] is sm.scale for fig in sm.grid.children)
    labels = [(fig.axes[0].label, fig.axes[1].label) for fig in sm.grid.children]
    assert labels[0] == ("kinetic energy / eV", "delay / fs")  # one row: outer on both
    assert labels[1] == ("kinetic energy / eV", "")  # inner column: no repeated y label
    for fig in sm.grid.children:
        ticks = np.asarray(fig.axes[1].tick_values)
        assert ticks.size >= 2 and np.allclose(ticks % 50, 0)  # round delays: 0, 100, 200
    from ensemblelab.widgets._small_maps import short_title

    assert short_title("G (closed shell)->D0 (doublet)") == "G->D0"
    sm.draw(["G (closed shell)->D0 (doublet)"], np.ones((1, 2, 2)), np.array([0.0, 1.0]),
            np.array([0.0, 10.0]), (0.0, 1.0))
    fig = sm.grid.children[0]
    assert fig.title == "G->D0"  # the full label in the key below the grid
    assert "G (closed shell)-&gt;D0 (doublet)" in sm.key.value  # escaped HTML


def test_mapview_band_outside_the_energies_shown_has_no_clipped_box(model):
    view = MapView(model, debounce=0, energy_window=(0.0, 2.0), **GRID)
    model.select_band(energy_range=(1.3, 1.7), delay_range=(20.0, 60.0))
    assert tuple(view.brush.selected_x) == (1.3, 1.7) and len(view.box.x) == 5
    model.select_band(energy_range=(2.2, 2.4), delay_range=(20.0, 60.0))  # beyond 2.0 eV
    assert view.brush.selected_x is None and len(view.box.x) == 0
    assert "outside the energies shown" in view.band_label.value
    view.energy_axis.value = "full grid"  # widen: the box comes back with the data
    assert tuple(view.brush.selected_x) == (2.2, 2.4)
    assert view.messages.errors == []
