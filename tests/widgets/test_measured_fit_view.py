"""The map view's channel fit: button, numbers with intervals, residual vs the fitted model.

Headless (ipywidgets state, no browser or kernel: the fit runs at once). The "measured" map
is made by compute_trpes from an invented ensemble (the demo engine, seed 11, 12 short
trajectories) whose cation energies carry planted shifts, at delays moved by a planted time
zero, plus Gaussian noise: the planted values are computed independently (not published).
"""

from __future__ import annotations

import re
import warnings

import numpy as np
import pytest

from ensemblelab.compute.spectroscopy import fit_measured as fm
from ensemblelab.compute.spectroscopy.maps import compute_trpes
from ensemblelab.compute.spectroscopy.pulses import GaussianPulse
from ensemblelab.data.spectrum import TRPESMap
from ensemblelab.demo import make_ensemble
from ensemblelab.demo.scenario import DEFAULT_SCENARIO as SC
from ensemblelab.widgets import MapView, SelectionModel

ENERGIES = np.linspace(0.0, 3.0, 41)
DELAYS = np.arange(-100.0, 251.0, 10.0)
RESOLUTION = 0.08
# planted values: computed independently (not published)
SHIFTS = np.array([0.20, -0.10, 0.0])  # eV on D0, D1, D2
T0 = 12.0  # fs


@pytest.fixture(scope="module")
def ens():
    # invented ensemble: demo engine, another seed than the shipped demo, 12 trajectories
    return make_ensemble(12, seed=11, faults=False, t_max=250.0, velocities=False)


@pytest.fixture(scope="module")
def measured(ens):
    probe = GaussianPulse(photon_energy=SC.probe_energy, fwhm=SC.probe_fwhm)
    pump = GaussianPulse(photon_energy=SC.pump_energy, fwhm=SC.pump_fwhm)
    shifted = ens.replace(cation_energies=ens.cation_energies + SHIFTS[None, :])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        m = compute_trpes(shifted, probe=probe, pump=pump, kinetic_energies=ENERGIES,
                          delays=DELAYS - T0, resolution=RESOLUTION, progress=False)
    sigma = 0.01 * float(m.intensity.max())
    noise = sigma * np.random.default_rng(5).standard_normal(m.shape)
    return TRPESMap(kinetic_energies=ENERGIES, delays=DELAYS, intensity=m.intensity + noise,
                    uncertainty=np.full(m.shape, sigma))


def make_view(ens, measured):
    # the pulses of the demo's metadata are the planted map's (SC above)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return MapView(SelectionModel(ens), debounce=0, measured=measured,
                       resolution=RESOLUTION, kinetic_energies=ENERGIES, delays=DELAYS)


def numbers_after(text: str, label: str) -> list[float]:
    """value, lower, upper printed after `label` ("label v unit [lo, hi]")."""
    m = re.search(re.escape(label) + r" (\S+)(?: \S+)? \[(\S+), (\S+)\]", text)
    assert m is not None, (label, text)
    return [float(g) for g in m.groups()]


@pytest.fixture(scope="module")
def fitted(ens, measured):
    view = make_view(ens, measured)
    assert view.fit_panel.widget.layout.display is None  # shown with a measured map
    assert view.fit_panel.result is None and view.fit_panel.residual_choice.disabled
    view.fit_panel.button.click()  # what the browser's click runs
    assert view.fit_panel.jobs.wait(0)
    return view


def test_button_fits_and_shows_shifts_time_zero_and_r2_with_intervals(fitted):
    res = fitted.fit_panel.result
    assert res is not None and res.interval_method.startswith("covariance")
    text = fitted.fit_panel.label.value
    # planted shifts and time zero (computed independently (not published)); a 12-trajectory
    # ensemble is coarse, so 20 meV and 3 fs
    d0 = numbers_after(text, "shift D0")
    d1 = numbers_after(text, "shift D1")
    t0 = numbers_after(text, "time zero")
    assert d0[0] == pytest.approx(0.20, abs=0.02) and d0[1] < d0[0] < d0[2]
    assert d1[0] == pytest.approx(-0.10, abs=0.02) and d1[1] < d1[0] < d1[2]
    assert t0[0] == pytest.approx(T0, abs=3.0) and t0[1] < t0[0] < t0[2]
    # the planted map is compute_trpes of the same trajectories: scale 1 (computed
    # independently (not published)), inside its printed interval
    sc = numbers_after(text, "scale")
    assert sc[1] <= 1.0 <= sc[2]
    for label in ("cross-correlation FWHM", "background"):
        assert label in text
    r2 = float(re.search(r"R² = (\S+) ", text).group(1))
    # 1 % noise on a map the model can make: R^2 close to 1 (computed independently)
    assert 0.95 < r2 <= 1.0 and r2 == pytest.approx(res.r2, abs=5e-4)
    assert not fitted.fit_panel.button.disabled
    assert not fitted.fit_panel.residual_choice.disabled


def test_residual_layer_shows_measured_minus_fitted_model_on_request(fitted):
    res = fitted.fit_panel.result
    fitted.layer.value = "residual"
    quick = fitted.comparison().residual
    assert np.array_equal(np.asarray(fitted.heatmap.color),
                          np.nan_to_num(np.asarray(quick.intensity, float)))
    fitted.fit_panel.residual_choice.value = "channel fit"
    shown = np.asarray(fitted.heatmap.color)
    # measured - model of the channel fit (the result's own maps: common practice)
    expected = np.asarray(res.measured.intensity, float) - np.asarray(res.model.intensity,
                                                                        float)
    np.testing.assert_allclose(shown, np.nan_to_num(expected), rtol=0, atol=1e-12)
    # the channel fit's shifts move the bands: its residual is smaller than the quick one
    # (planted per-channel shifts a rigid comparison cannot follow; computed independently)
    assert np.nanstd(expected) < np.nanstd(np.asarray(quick.intensity, float))
    fitted.fit_panel.residual_choice.value = "quick comparison"
    fitted.layer.value = "simulated"


def test_fit_leaves_out_excluded_trajectories_and_goes_stale(ens, measured, monkeypatch):
    view = make_view(ens, measured)
    seen = {}
    real = fm.fit_measured_map

    def spy(e, m, **kw):
        seen.update(trajs=set(e.snapshots["traj"].unique()), kw=kw)
        return real(e, m, **kw)

    monkeypatch.setattr(fm, "fit_measured_map", spy)
    drop = tuple(int(t) for t in sorted(set(ens.snapshots["traj"].unique()))[:3])
    view.model.excluded = drop
    view.flush()
    view.fit_panel.button.click()
    assert seen["trajs"].isdisjoint(drop) and len(seen["trajs"]) == 9
    assert seen["kw"]["resolution"] == RESOLUTION and seen["kw"]["interval"] == "covariance"
    assert seen["kw"]["probe"].photon_energy == SC.probe_energy
    assert seen["kw"]["pump"].fwhm == SC.pump_fwhm
    assert view.fit_panel.current()
    # new exclusions: a new map; the old fit says so and the residual falls back
    view.fit_panel.residual_choice.value = "channel fit"
    view.model.excluded = drop[:1]
    view.flush()
    assert not view.fit_panel.current() and view.fit_panel.residual() is None
    assert "fit again" in view.fit_panel.label.value


def test_panel_hidden_without_a_measured_map(ens):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        view = MapView(SelectionModel(ens), debounce=0, compute=False)
    assert view.fit_panel.widget.layout.display == "none"
    view.fit_panel.run()  # nothing to fit: no error, no result
    assert view.fit_panel.result is None


def test_fit_runs_in_a_worker_thread_inside_a_kernel_loop(ens, measured):
    """Inside a running event loop (as in a kernel) the click returns at once with a status
    line; the numbers arrive from the worker thread (common practice for long UI work)."""
    import asyncio

    async def main():
        view = make_view(ens, measured)
        panel = view.fit_panel
        panel.button.click()
        state = (panel.jobs.background, panel.result is None, panel.button.disabled,
                 "fitting per-channel shifts" in panel.jobs.status.value,
                 "fitting" in panel.label.value)
        for _ in range(1200):
            if panel.jobs.done.is_set():
                break
            await asyncio.sleep(0.05)
        return view, state

    view, state = asyncio.run(main())
    assert state == (True, True, True, True, True)
    panel = view.fit_panel
    assert panel.jobs.done.is_set() and panel.jobs.status.value == ""
    assert panel.result is not None and not panel.button.disabled
    assert "shift D0" in panel.label.value and view.messages.errors == []


def test_a_failed_fit_is_reported_and_the_button_comes_back(ens, measured, monkeypatch):
    view = make_view(ens, measured)

    def broken(*args, **kwargs):
        raise ValueError("invented failure")

    monkeypatch.setattr(fm, "fit_measured_map", broken)
    view.fit_panel.button.click()
    assert view.fit_panel.result is None and not view.fit_panel.button.disabled
    assert "failed" in view.fit_panel.label.value
    assert any("invented failure" in m["text"] for m in view.messages.errors)
