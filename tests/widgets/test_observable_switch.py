"""The explorer's observable switch (photoelectron / absorption / scattering), in the kernel.

What the browser sends is simulated by setting the brush traits. The checks compare the
band the explorer lists with the drawn map itself and with maps computed separately by
the public functions (a box on a map is linear in the map's cells: the band value is the
sum of the drawn cells inside the box; computed independently (not published)).

The toy ensemble is invented (ensemblelab.testing): every trajectory starts on S2 and
hops once to S1; four carbon atoms.
"""

from __future__ import annotations

import numpy as np
import pytest

from ensemblelab.compute.observables import compute_scattering, compute_transient_absorption
from ensemblelab.demo.strengths import with_demo_transition_strengths
from ensemblelab.testing import make_toy_ensemble
from ensemblelab.widgets import Explorer
from ensemblelab.widgets.observable_switch import SWITCH_OPTIONS

MAP = {"photon_energy": 5.0, "probe_fwhm": 30.0, "pump_fwhm": 30.0,
       "kinetic_energies": np.linspace(0.0, 2.5, 126), "delays": np.arange(-60.0, 201.0, 5.0)}


def _app(ens, tmp_path):
    return Explorer(ens, map_kwargs=MAP, debounce=0, data_path=tmp_path / "store",
                    export_folder=tmp_path / "export", restore=False)


def _drawn_box_sum(sw, axis_range, delay_range) -> float:
    """The drawn map's cells inside the box, summed (from the heat map's own arrays)."""
    x, y = np.asarray(sw.heatmap.x, float), np.asarray(sw.heatmap.y, float)
    color = np.asarray(sw.heatmap.color, float)
    xs = (x >= axis_range[0]) & (x <= axis_range[1])
    ys = (y >= delay_range[0]) & (y <= delay_range[1])
    return float(color[np.ix_(ys, xs)].sum())


def _no_errors(app) -> None:
    assert "ensemblelab-msg-error" not in app.messages.widget.value, app.messages.widget.value


@pytest.fixture
def app(toy, tmp_path):
    return _app(toy, tmp_path)


def test_switch_starts_on_the_photoelectron_map(app):
    sw = app.observable_switch
    assert tuple(sw.switch.options) == SWITCH_OPTIONS
    assert sw.observable == "photoelectron"
    assert sw.stack.children == (app.map_view.widget,)
    # the explorer shows the switch where the map view was
    top = app.widget.children[1]
    assert top.children[0] is sw.widget
    _no_errors(app)


def test_scattering_map_is_the_public_function_on_the_same_grids(app, toy):
    sw = app.observable_switch
    m = sw.show("scattering")
    assert sw.stack.children == (sw.panel,)
    probe, pump = app.map_view.pulses()
    delays = app.map_view.grids()[1]
    ref = compute_scattering(toy, q=np.asarray(sw.heatmap.x), delays=delays, pump=pump,
                             probe=probe)
    # the drawn colours are the percent difference of the same map (computed independently
    # (not published): the public function called directly)
    np.testing.assert_allclose(np.asarray(sw.heatmap.color), ref.percent_difference,
                               rtol=1e-10, atol=1e-12)
    assert m.kind == "xray"
    assert "q" in sw.x_axis.label and "%" in sw.color_axis.label
    _no_errors(app)


@pytest.mark.parametrize("ragged,seed", [(False, 7), (True, 3)])
def test_scattering_band_links_table_and_structures(tmp_path, ragged, seed):
    ens = make_toy_ensemble(20, seed=seed, t_max=160.0, dt=2.0, ragged=ragged)
    app = _app(ens, tmp_path)
    sw = app.observable_switch
    sw.show("scattering")
    a_rng, d_rng = (1.0, 3.0), (20.0, 120.0)
    band = sw.brush_band(a_rng, d_rng)
    # the band value is the sum of the drawn cells in the box (computed independently
    # (not published): linearity of the map)
    drawn = _drawn_box_sum(sw, a_rng, d_rng)
    assert band.total == pytest.approx(drawn, rel=1e-8, abs=1e-9)
    assert band.sign == (1 if drawn >= 0 else -1)
    # the selection table lists the band; group shares add up to the whole (common practice)
    summary = app.selection_table.summary.value
    assert "scattering band" in summary and "Å⁻¹" in summary
    for group in ("cluster", "state", "traj"):
        app.model.group_by = group
        table = app.selection_table.table
        assert table is not None and len(table)
        assert table["share"].sum() == pytest.approx(1.0, abs=1e-9)
    # per active state: the same as the by-state components of a separately computed map
    probe, pump = app.map_view.pulses()
    by_state = compute_scattering(ens, q=np.asarray(sw.heatmap.x),
                                  delays=app.map_view.grids()[1], pump=pump, probe=probe,
                                  by="active")
    q, d = np.asarray(by_state.q), np.asarray(by_state.delays)
    cells = np.ix_((d >= d_rng[0]) & (d <= d_rng[1]), (q >= a_rng[0]) & (q <= a_rng[1]))
    app.model.group_by = "state"
    table = app.selection_table.table
    for key, value in zip(table["key"], table["intensity"], strict=True):
        expected = band.sign * by_state.components[str(int(key))][cells].sum()
        assert value == pytest.approx(expected, rel=1e-8, abs=1e-9)
    # the structure view shows the strongest contributing geometries
    shown = app.structure_view.shown_ids
    assert shown and set(shown) <= set(app.model.selected)
    assert app.model.delay_range == d_rng and app.model.energy_range is None
    _no_errors(app)


def test_absorption_without_strengths_says_what_is_missing(app):
    sw = app.observable_switch
    assert app.model.ens.transition_strengths is None
    assert sw.show("absorption") is None
    assert "transition_strengths" in sw.status.value
    sw.brush_band((1.0, 2.0), (0.0, 100.0))  # nothing to select: no band, no error
    assert app.model.band is None
    _no_errors(app)


def test_absorption_band_with_strengths_lists_the_negative_part(toy, tmp_path):
    ens = with_demo_transition_strengths(toy)
    app = _app(ens, tmp_path)
    sw = app.observable_switch
    m = sw.show("absorption")
    probe, pump = app.map_view.pulses()
    ref = compute_transient_absorption(ens, probe=probe, pump=pump,
                                       photon_energies=m.photon_energies,
                                       delays=app.map_view.grids()[1])
    np.testing.assert_allclose(np.asarray(sw.heatmap.color), ref.intensity, rtol=1e-10,
                               atol=1e-14)
    # a box around the most negative cell (bleach + stimulated emission)
    i, j = np.unravel_index(np.argmin(ref.intensity), ref.intensity.shape)
    e, d = ref.photon_energies, ref.delays
    a_rng = (float(e[max(j - 3, 0)]), float(e[min(j + 3, e.size - 1)]))
    d_rng = (float(d[max(i - 3, 0)]), float(d[min(i + 3, d.size - 1)]))
    band = sw.brush_band(a_rng, d_rng)
    drawn = _drawn_box_sum(sw, a_rng, d_rng)
    assert drawn < 0
    assert band.sign == -1
    assert band.total == pytest.approx(drawn, rel=1e-8)
    listed = app.model.band
    assert len(listed) and (listed["intensity"] > 0).all()  # sign * term: the negative terms
    assert "absorption band" in app.selection_table.summary.value
    assert app.structure_view.shown_ids
    _no_errors(app)


def test_switching_back_clears_the_band_and_the_photoelectron_brush_works(app):
    sw = app.observable_switch
    sw.show("scattering")
    sw.brush_band((1.0, 3.0), (20.0, 120.0))
    assert app.model.band is not None
    sw.show("photoelectron")
    assert app.model.band is None and sw.current_map is None
    assert sw.stack.children == (app.map_view.widget,)
    app.brush((1.2, 1.8), (0.0, 100.0))  # the S2 band at 1.5 eV kinetic energy
    assert "eV" in app.selection_table.summary.value
    assert "scattering" not in app.selection_table.summary.value
    _no_errors(app)


def test_exclusion_recomputes_the_map_and_the_band(app):
    sw = app.observable_switch
    sw.show("scattering")
    a_rng, d_rng = (1.0, 3.0), (20.0, 120.0)
    before = sw.brush_band(a_rng, d_rng)
    n = sw.n_computed
    gone = [int(t) for t in app.model.ens.trajectories["traj"].to_numpy()[:4]]
    app.model.exclude(gone)
    assert sw.n_computed == n + 1
    after = sw.band
    assert after is not before
    assert after.total == pytest.approx(_drawn_box_sum(sw, a_rng, d_rng), rel=1e-8, abs=1e-9)
    assert not set(app.model.band["traj"].tolist()) & set(gone)
    _no_errors(app)


def test_electron_probe_recomputes_with_its_form_factors(app):
    sw = app.observable_switch
    xray = sw.show("scattering")
    sw.kind.value = "electron"
    electron = sw.current_map
    assert electron is not xray and electron.kind == "electron"
    assert not np.allclose(electron.reference, xray.reference)
    _no_errors(app)


def test_colour_scale_is_centred_with_red_for_more_signal(app):
    sw = app.observable_switch
    sw.show("scattering")
    values = np.asarray(sw.heatmap.color, float)
    top = float(np.abs(values).max())
    # a diverging scale centred on zero, red at the positive end (common practice for
    # difference maps; the same as the static figures)
    assert sw.c.mid == 0.0
    colors = [c.lower() for c in sw.c.colors]
    assert colors[0].startswith("#21") and colors[-1].startswith("#b2")  # blue low, red high
    assert sw.c.min == pytest.approx(-top) and sw.c.max == pytest.approx(top)
    assert 0.0 in np.asarray(sw.color_axis.tick_values, float)


def test_demo_maps_weight_trajectories_as_the_photoelectron_map(tmp_path):
    """On the demo (pump excitation data, no sampling metadata) all three maps use the same
    trajectory weights: the pump is not applied again to one map only (common practice:
    maps compared side by side describe the same sample)."""
    import ensemblelab
    from ensemblelab.cli._explore import default_data_path

    ens = with_demo_transition_strengths(
        ensemblelab.load(default_data_path(), nonfinite="keep", progress=False))
    assert ens.excitation_energies is not None  # the doorway weights could be applied
    app = Explorer(ens, debounce=0, clusters=False, data_path=tmp_path / "demo",
                   export_folder=tmp_path / "export", restore=False)
    word = app.model.trpes_map.params["weights"]
    sw = app.observable_switch
    assert sw.show("scattering").params["weights"] == word
    assert sw.show("absorption").params["weights"] == word


def test_switch_works_on_its_own_without_a_map_view(toy):
    from ensemblelab.widgets import ObservableSwitch

    sw = ObservableSwitch(toy)  # its own model; pulses from the metadata or defaults
    m = sw.show("scattering")
    a_rng, d_rng = (1.0, 3.0), (20.0, 120.0)
    band = sw.brush_band(a_rng, d_rng)
    assert band.total == pytest.approx(_drawn_box_sum(sw, a_rng, d_rng), rel=1e-8, abs=1e-9)
    assert sw.model.band is not None and len(sw.model.selected) > 0
    assert m.delays[0] < 0.0 < m.delays[-1]
    with pytest.raises(ValueError, match="observable must be one of"):
        sw.show("fluorescence")
