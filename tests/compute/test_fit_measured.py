"""fit_measured_map: per-channel ionisation shifts, time zero, cross-correlation, intervals.

The "measured" maps here are made by compute_trpes from a copy of an invented ensemble
(the demo engine, another seed than the shipped demo, shorter trajectories) whose cation
energies carry planted shifts, evaluated at delays moved by a planted time zero, plus
Gaussian noise of known sigma: every planted value is computed independently (not
published) and the fit must find it back.
"""

from __future__ import annotations

import inspect
import json
import math
import warnings

import numpy as np
import pytest

import ensemblelab
from ensemblelab.compute.spectroscopy import fit_measured as fm
from ensemblelab.compute.spectroscopy.maps import compute_trpes
from ensemblelab.compute.spectroscopy.pulses import GaussianPulse, cross_correlation_fwhm
from ensemblelab.data.spectrum import TRPESMap
from ensemblelab.demo import make_ensemble
from ensemblelab.demo.scenario import DEFAULT_SCENARIO as SC
from ensemblelab.errors import SchemaError

PROBE = GaussianPulse(photon_energy=SC.probe_energy, fwhm=SC.probe_fwhm)
PUMP = GaussianPulse(photon_energy=SC.pump_energy, fwhm=SC.pump_fwhm)
ENERGIES = np.linspace(0.0, 3.0, 61)
DELAYS = np.arange(-100.0, 301.0, 8.0)
RESOLUTION = 0.08
# planted values: computed independently (not published), the check values
SHIFTS = np.array([0.20, -0.10, 0.0])  # eV on D0, D1, D2
T0 = 12.0  # fs


@pytest.fixture(scope="module")
def ens():
    # invented ensemble: demo engine, seed 7 (not the shipped demo's), 24 trajectories
    return make_ensemble(24, seed=7, faults=False, t_max=300.0, velocities=False)


def planted_map(ens, shifts=SHIFTS, t0=T0, noise=0.0, seed=3, **kw):
    shifted = ens.replace(cation_energies=ens.cation_energies + np.asarray(shifts)[None, :])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        m = compute_trpes(shifted, probe=PROBE, pump=PUMP, kinetic_energies=ENERGIES,
                          delays=DELAYS - t0, resolution=RESOLUTION, progress=False, **kw)
    sigma = noise * float(m.intensity.max())
    rng = np.random.default_rng(seed)
    inten = m.intensity + sigma * rng.standard_normal(m.shape)
    return TRPESMap(kinetic_energies=ENERGIES, delays=DELAYS, intensity=inten,
                    uncertainty=np.full(m.shape, sigma) if noise else None), sigma


def fit(ens, meas, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return fm.fit_measured_map(ens, meas, probe=PROBE, pump=PUMP, resolution=RESOLUTION,
                                   progress=False, **kw)


def test_recovers_planted_channel_shifts_and_time_zero_with_covering_intervals(ens):
    meas, sigma = planted_map(ens, noise=0.02)
    res = fit(ens, meas)
    # the check: shifts to 10 meV, time zero to 2 fs (planted values above)
    assert res.ionisation_shifts[0] == pytest.approx(0.20, abs=0.010)
    assert res.ionisation_shifts[1] == pytest.approx(-0.10, abs=0.010)
    assert res.time_zero == pytest.approx(T0, abs=2.0)
    # intervals cover the planted values (computed independently (not published))
    c0, c1 = res.channels[:2]
    for name, true in ((f"shift_{c0}", 0.20), (f"shift_{c1}", -0.10), ("time_zero", T0),
                       ("scale", 1.0)):
        lo, hi = res.interval(name)
        assert lo <= true <= hi, (name, lo, hi)
        assert hi - lo > 0
    # the pulses' cross-correlation, sqrt(30^2 + 25^2) fs (common practice: Gaussian widths
    # add in quadrature), within 3 fs
    assert res.xcorr_fwhm == pytest.approx(math.hypot(SC.pump_fwhm, SC.probe_fwhm), abs=3.0)
    # noise of known sigma: reduced chi-square near 1 (common practice), R^2 below 1
    assert res.chi2_red == pytest.approx(1.0, abs=0.1)
    assert 0.9 < res.r2 < 1.0
    np.testing.assert_allclose(res.residual.intensity,
                               res.measured.intensity - res.model.intensity)
    np.testing.assert_allclose(sum(res.model.components.values()) + res.background,
                               res.model.intensity, rtol=1e-12, atol=1e-12)
    assert len(res.channels) == ens.n_cation == 3


def test_fast_convolution_path_equals_compute_trpes(ens):
    # noiseless, no shift: the fit's model (pure channel maps convolved on the time grid)
    # must reproduce compute_trpes at the planted time zero (computed independently)
    meas, _ = planted_map(ens, shifts=np.zeros(3), t0=T0)
    res = fit(ens, meas, fit_shifts=False, fit_xcorr=False, fit_background=False)
    assert res.time_zero == pytest.approx(T0, abs=1e-3)
    assert res.scale == pytest.approx(1.0, abs=1e-5)
    peak = float(np.abs(meas.intensity).max())
    assert np.nanmax(np.abs(res.residual.intensity)) < 1e-6 * peak
    assert res.xcorr_fwhm == cross_correlation_fwhm(PUMP, PROBE)
    assert res.parameters.set_index("parameter").loc[f"shift_{res.channels[0]}", "fixed"]


def test_uncertainty_weights_the_residuals(ens):
    meas, _ = planted_map(ens, shifts=np.zeros(3), t0=T0)
    bad = meas.intensity.copy()
    blob = (slice(20, 30), slice(30, 45))
    bad[blob] += 5.0 * float(meas.intensity.max())  # an artefact the model cannot make
    unc = np.ones(meas.shape)
    unc[blob] = 1e6  # ... but its pixels are declared useless
    weighted = fit(ens, TRPESMap(kinetic_energies=ENERGIES, delays=DELAYS, intensity=bad,
                                 uncertainty=unc), fit_shifts=False)
    plain = fit(ens, TRPESMap(kinetic_energies=ENERGIES, delays=DELAYS, intensity=bad),
                fit_shifts=False)
    # planted scale 1 and time zero (computed independently (not published))
    assert weighted.scale == pytest.approx(1.0, abs=1e-3)
    assert weighted.time_zero == pytest.approx(T0, abs=0.05)
    assert abs(plain.scale - 1.0) > 0.05 or abs(plain.time_zero - T0) > 1.0
    assert math.isnan(plain.chi2_red) and math.isfinite(weighted.chi2_red)
    # NaN or 0 uncertainty leaves a pixel out
    unc2 = np.ones(meas.shape)
    unc2[0, :5] = np.nan
    unc2[1, :3] = 0.0
    res = fit(ens, meas, uncertainty=unc2, fit_shifts=False, interval=None)
    assert res.n_points == meas.intensity.size - 8
    assert np.isnan(res.residual.intensity[0, :5]).all()


def test_bootstrap_over_trajectories_reports_both_intervals():
    small = make_ensemble(12, seed=11, faults=False, t_max=200.0, velocities=False)
    meas, _ = planted_map(small, noise=0.02)
    res = fit(small, meas, interval="bootstrap", n_boot=4, random_state=1)
    t = res.parameters.set_index("parameter")
    assert res.bootstrap_samples is not None and res.bootstrap_samples.shape == (4, 7)
    free = t[~t["fixed"]]
    assert np.all(np.isfinite(free[["cov_lower", "boot_lower", "boot_upper"]].to_numpy()))
    # resampling trajectories changes the simulated map, so the refits differ
    assert np.ptp(res.bootstrap_samples[:, 0]) > 0
    # headline = envelope of both
    assert np.all(free["lower"] <= np.minimum(free["cov_lower"], free["boot_lower"]) + 1e-12)
    assert np.all(free["upper"] >= np.maximum(free["cov_upper"], free["boot_upper"]) - 1e-12)
    d = res.as_dict()
    json.dumps(d)  # a widget can print it
    c0 = f"shift_{res.channels[0]}"
    assert {p["name"] for p in d["parameters"]} >= {c0, "time_zero", "scale"}
    text = res.summary()
    assert "bootstrap" in text and c0 in text and "R^2" in text


def test_uses_the_ionisation_shifts_keyword_when_available(ens, monkeypatch):
    calls = []
    real = fm.compute_trpes

    def with_keyword(target, *, ionisation_shifts=None, **kw):
        calls.append((target is ens, np.array(ionisation_shifts)))
        shifted = target.replace(cation_energies=target.cation_energies + ionisation_shifts)
        return real(shifted, **kw)

    assert "ionisation_shifts" in inspect.signature(with_keyword).parameters
    monkeypatch.setattr(fm, "compute_trpes", with_keyword)
    model = fm._simulate_channels(ens, np.array([0.1, 0.0, -0.2]), {
        "probe": PROBE, "pump": PUMP, "weights": "uniform", "resolution": 0.0,
        "cross_section": "dyson", "time_step": None, "kinetic_energies": ENERGIES})
    assert calls and calls[0][0]  # the ensemble itself, shifts passed on
    np.testing.assert_array_equal(calls[0][1], [0.1, 0.0, -0.2])
    assert len(model.labels) == 3


def test_errors_and_top_level_export(ens):
    meas, _ = planted_map(ens)
    assert ensemblelab.fit_measured_map is fm.fit_measured_map
    with pytest.raises(SchemaError, match="interval"):
        fit(ens, meas, interval="jackknife")
    with pytest.raises(SchemaError, match="kinetic_energies"):
        fit(ens, object())
    with pytest.raises(SchemaError, match="shift_bounds"):
        fit(ens, meas, shift_bounds=(0.5, -0.5))
    with pytest.raises(SchemaError, match="usable pixels"):
        fit(ens, meas, energy_range=(0.0, 0.02))


def test_measured_delays_after_the_simulation_are_left_out(ens):
    meas, _ = planted_map(ens, shifts=np.zeros(3), t0=T0)
    late = np.arange(DELAYS[-1] + 8.0, 700.0, 8.0)  # simulation ends at 300 fs
    inten = np.vstack([meas.intensity, np.full((late.size, ENERGIES.size), 7.0)])
    long = TRPESMap(kinetic_energies=ENERGIES, delays=np.r_[DELAYS, late], intensity=inten)
    res = fit(ens, long, fit_shifts=False, fit_xcorr=False, fit_background=False)
    # planted time zero and scale (computed independently (not published))
    assert res.time_zero == pytest.approx(T0, abs=1e-3)
    assert res.scale == pytest.approx(1.0, abs=1e-5)
    assert any("after the end of the simulation" in n for n in res.notes)
    assert np.isnan(res.residual.intensity[-late.size:]).all()


def test_jacobian_matches_one_parameter_at_a_time_differences(ens):
    # the fit perturbs every channel's shift at once (a channel's map depends on its own
    # shift only); the naive twin perturbs one parameter at a time (common practice)
    meas, sigma = planted_map(ens, noise=0.02)
    cm = fm.ChannelMaps(ens, ENERGIES, {"probe": PROBE, "pump": PUMP, "weights": "doorway",
                                        "resolution": RESOLUTION, "cross_section": "dyson",
                                        "time_step": None})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cm(np.zeros(3))
        w = np.full(meas.shape, 1.0 / sigma)
        prob = fm._Problem(cm, DELAYS, meas.intensity, w, np.ones(7, bool), np.zeros(7))
        x = np.array([0.15, -0.05, 0.02, 10.0, 40.0, 0.9, 0.01])
        jac = prob.jac(x)
        steps = [2e-3, 2e-3, 2e-3, 0.1, 0.1, 1e-4, 1e-4]
        naive = np.column_stack([
            (prob.resid(x + h * np.eye(7)[j]) - prob.resid(x - h * np.eye(7)[j])) / (2 * h)
            for j, h in enumerate(steps)])
    scale = np.abs(naive).max(axis=0)
    np.testing.assert_allclose(jac / scale, naive / scale, atol=2e-3)


def test_a_parameter_at_its_search_bound_is_flagged(ens):
    from ensemblelab.errors import NumericalWarning

    meas, _ = planted_map(ens, shifts=np.zeros(3), t0=T0)
    # planted t0 = 12 fs lies outside the allowed range (computed independently (not published))
    with pytest.warns(NumericalWarning, match="time_zero.*search bound"):
        res = fm.fit_measured_map(ens, meas, probe=PROBE, pump=PUMP, resolution=RESOLUTION,
                                  fit_shifts=False, time_zero_bounds=(-20.0, 5.0),
                                  progress=False)
    assert res.time_zero == pytest.approx(5.0, abs=1e-3)
    assert any("search bound" in n for n in res.notes)
