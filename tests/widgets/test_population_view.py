from __future__ import annotations

import numpy as np

from ensemblelab.widgets import PopulationView


def test_populationview_draws_populations_that_sum_to_one(model, toy):
    view = PopulationView(model, fit="none", debounce=0)
    y = np.asarray(view.lines.y)
    assert y.shape[0] == toy.n_states
    np.testing.assert_allclose(y.sum(axis=0), 1.0, atol=1e-12)  # sum rule (common practice)
    assert y[2, 0] == 1.0  # every toy trajectory starts on S2 (ensemblelab.testing)


def test_populationview_fit_recovers_toy_lifetime_roughly(model):
    # the toy lifetime is 100 fs (ensemblelab.testing ground truth); 24 trajectories
    # give a loose estimate
    view = PopulationView(model, fit="single", debounce=0)
    tau = view.fit_result.time_constants["tau"]
    assert 50.0 < tau < 200.0
    assert "tau" in view.fit_label.value and view.fit_lines.visible


def test_populationview_marks_delay_range_and_cursor(model):
    view = PopulationView(model, fit="none", debounce=0)
    assert not view.delay_band.visible
    model.delay_range = (40.0, 90.0)
    assert view.delay_band.visible
    np.testing.assert_allclose(view.delay_band.x, [40.0, 40.0, 90.0, 90.0])
    view.selector.selected = np.array([55.0])  # a click in the plot (IndexSelector)
    assert model.time == 55.0
    assert view.cursor.visible and list(view.cursor.x) == [55.0, 55.0]


def test_populationview_recomputes_after_exclusion(model, toy):
    view = PopulationView(model, fit="none", debounce=0)
    before = view.table.copy()
    n = view.n_computed
    # leave out every trajectory that has hopped by 50 fs: S2 population at 50 fs becomes 1
    hop = toy.trajectories.set_index("traj")["hop_time"]
    model.exclude(hop.index[hop <= 50.0].tolist())
    assert view.n_computed == n + 1
    at = view.table.query("time == 50.0 and state == 2")["population"].iloc[0]
    assert at == 1.0
    assert not before.equals(view.table)


def test_populationview_sequential_fit_states_chosen_in_the_view(model, toy):
    # the browser picks "sequential" in the fit menu: no fit_states were passed
    view = PopulationView(model, fit="none", debounce=0)
    # default roles: S2 (every toy trajectory starts there, ensemblelab.testing), then
    # the others from the top down: S2 -> S1 -> S0
    assert view.fit_states == [2, 1, 0]
    assert view.roles_box.layout.display == "none"
    view.fit.value = "sequential"
    assert view.messages.errors == []
    assert view.roles_box.layout.display == "flex"
    res = view.fit_result
    assert res.scheme == "sequential" and tuple(res.states) == (2, 1, 0)
    label = view.fit_label.value
    assert "tau1 (S2 → S1)" in label and "tau2 (S1 → S0)" in label
    # the toy S2 lifetime is 100 fs (ensemblelab.testing ground truth); 24 trajectories
    assert 50.0 < res.time_constants["tau1"] < 200.0
    # the toy has no S1 -> S0 decay: no finite interval there, said so
    assert "(no interval)" in label
    # a two-state chain: C left empty in the menu
    view.fit_roles[2].value = -1
    assert tuple(view.fit_result.states) == (2, 1)
    # the same state twice: said once in the fit label, no error in the messages
    view.fit_roles[1].value = 2
    assert view.fit_result is None and "different states" in view.fit_label.value
    assert view.messages.errors == []
    view.fit.value = "single"
    assert view.fit_label.value.startswith("single fit: tau (S2 decay)")
    # each time constant carries its interval and says how it was made
    lo, hi = view.fit_result.interval("tau")
    assert np.isfinite(lo) and np.isfinite(hi)
    assert f"[{lo:.1f}, {hi:.1f}]" in view.fit_label.value
    assert "95 % interval, covariance" in view.fit_label.value


def test_populationview_fit_states_by_label(model):
    view = PopulationView(model, fit="sequential", fit_states=["S2", "S1"], debounce=0)
    assert tuple(view.fit_result.states) == (2, 1)
    assert "tau1 (S2 → S1)" in view.fit_label.value
    assert [w.value for w in view.fit_roles] == [2, 1, -1]
