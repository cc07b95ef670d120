"""The map view's uncertainty toggle: relative-uncertainty layer and interval bands on the cuts.

Check values: the shown map's bootstrap interval is compared with
``compute_trpes(..., interval="bootstrap")`` called directly with the same arguments and
seed, and the cut bands with the percentiles of cuts of explicitly resampled ensembles
(the naive reference twin: every resample built by hand and run through compute_trpes;
computed independently (not published)). The percentile interval of a cut is that of
the replicate cuts (the percentile bootstrap; Stat. Sci. 1986, "Bootstrap methods for
standard errors, confidence intervals, and other measures of statistical accuracy").
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from ensemblelab.compute.spectroscopy import _kernels_bootstrap as KBS
from ensemblelab.compute.spectroscopy import bootstrap_fused as BF
from ensemblelab.compute.spectroscopy import compute_trpes
from ensemblelab.compute.spectroscopy._reference_bootstrap import naive_bootstrap_maps
from ensemblelab.widgets import MapView
from ensemblelab.widgets._small_maps import nice_ticks

GRID = {"kinetic_energies": np.linspace(0.0, 2.5, 51), "delays": np.arange(-60.0, 201.0, 20.0)}
N_BOOT = 16  # small: the naive twin recomputes one map per resample
SEED = 3


@pytest.fixture(autouse=True)
def _exact_replicates(monkeypatch):
    """The widget's numbers equal the direct call's and the naive twin's to rounding with
    exact replicates (the default recentred float32 ones are checked against these in
    tests/compute/test_trpes_bootstrap_fused.py)."""
    monkeypatch.setattr(BF, "DEFAULT_GRID", BF.EXACT)


def _view(model):
    view = MapView(model, debounce=0, **GRID)
    view.uncertainty.n_boot, view.uncertainty.random_state = N_BOOT, SEED
    return view


def _direct(model, trpes, **extra):
    """compute_trpes with the shown map's arguments, called directly."""
    args = _view_args(trpes)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return compute_trpes(model.ens, **args, **extra)


def _view_args(trpes):
    from ensemblelab.compute.spectroscopy.pulses import GaussianPulse

    p = trpes.params
    return {"probe": GaussianPulse(**p["probe"]),
            "pump": None if p["pump"] is None else GaussianPulse(**p["pump"]),
            "weights": "uniform" if p["pump"] is None else "auto",
            "kinetic_energies": trpes.kinetic_energies, "delays": trpes.delays,
            "resolution": p["resolution"], "convolve": p["convolve"],
            "decompose": p["decompose"], "exclude": p["excluded"], "progress": False}


def _same_map(a, b):
    """Equal maps up to the order of floating-point additions (a mask or a reduced copy,
    a stick cache; common practice: 1e-9 relative, 1e-12 of the peak absolute)."""
    peak = float(np.abs(b.intensity).max())
    np.testing.assert_allclose(a.intensity, b.intensity, rtol=1e-9, atol=1e-12 * peak)


def test_toggle_off_by_default_computes_nothing(model):
    view = _view(model)
    unc = view.uncertainty
    assert unc.toggle.value is False and unc.toggle.description == "uncertainty"
    assert unc.interval is None and unc.n_computed == 0
    assert unc.layer.disabled and not unc.delay_band.visible and not unc.energy_band.visible
    assert "shaded" not in view.cut_caption.value
    # the bands sit under the simulated cut line in both cut figures
    assert view.delay_cut.marks[0] is unc.delay_band
    assert view.energy_cut.marks[0] is unc.energy_band


def test_toggle_on_gives_layer_equal_to_rel_se_and_status(model):
    model.excluded = (2, 5)  # exclusions honoured (a mask in the map, left out of resampling)
    view = _view(model)
    unc = view.uncertainty
    unc.toggle.value = True
    assert unc.available and unc.n_computed == 1 and not unc.layer.disabled
    shown = model.trpes_map
    direct = _direct(model, shown, interval="bootstrap", n_boot=N_BOOT, random_state=SEED)
    # same map, same interval as compute_trpes(..., interval="bootstrap") called directly
    _same_map(unc.interval, shown)
    np.testing.assert_allclose(unc.interval.lower, direct.lower, rtol=1e-10, atol=1e-14)
    np.testing.assert_allclose(unc.interval.upper, direct.upper, rtol=1e-10, atol=1e-14)
    assert unc.interval.params["excluded"] == [2, 5]
    med = direct.median_rel_se()
    assert f"{100 * med:.1f} %" in unc.status.value
    # the layer: rel_se in % on the map's grid, exactly where there is signal
    unc.layer.value = "relative uncertainty"
    drawn = np.asarray(view.heatmap.color, float)
    rel = 100.0 * np.asarray(direct.rel_se, float)
    peak = np.abs(direct.intensity).max()
    signal = np.abs(direct.intensity) > 0.05 * peak
    assert signal.sum() > 20
    np.testing.assert_allclose(drawn[signal], rel[signal], rtol=1e-10)
    np.testing.assert_array_equal(view.heatmap.x, shown.kinetic_energies)
    np.testing.assert_array_equal(view.heatmap.y, shown.delays)
    assert view.color_axis.label == "relative standard error / %"
    top = view.c.max
    assert view.c.min == 0.0 and top >= rel[signal].max()
    # round ticks: multiples of 1, 2, 2.5 or 5 x 10^k (common practice), top among them
    ticks = np.asarray(view.color_axis.tick_values, float)
    np.testing.assert_allclose(ticks, nice_ticks(0.0, top, 5))
    assert ticks[-1] == pytest.approx(top)
    # the layer stays when the view draws again (another energy window, a selected band)
    view.energy_axis.value = "full grid"
    model.select_band(energy_range=(1.2, 1.8), delay_range=(0.0, 60.0))
    np.testing.assert_allclose(np.asarray(view.heatmap.color, float)[signal], rel[signal],
                               rtol=1e-10)
    assert view.color_axis.label == "relative standard error / %"
    # back to the map: the intensity again
    unc.layer.value = "map"
    np.testing.assert_allclose(view.heatmap.color, np.nan_to_num(shown.intensity))
    assert view.color_axis.label == "intensity / eV⁻¹"
    assert view.messages.errors == []


def test_cut_bands_equal_the_bootstrap_interval_of_the_cut(model):
    view = _view(model)
    unc = view.uncertainty
    unc.toggle.value = True
    model.select_band(energy_range=(1.2, 1.8), delay_range=(0.0, 60.0))
    assert unc.delay_band.visible and unc.energy_band.visible
    spectrum, trace = view.cuts()
    d_lo, d_hi = np.asarray(unc.delay_band.y, float)
    t_lo, t_hi = np.asarray(unc.energy_band.y, float)
    tol = 1e-12 * max(spectrum.max(), trace.max())
    assert np.all(d_lo <= spectrum + tol) and np.all(spectrum <= d_hi + tol)
    assert np.all(t_lo <= trace + tol) and np.all(trace <= t_hi + tol)
    assert (d_hi - d_lo).max() > 0 and (t_hi - t_lo).max() > 0
    # the naive twin: the same resamples built by hand, each map cut, then percentiles
    shown = model.trpes_map
    counts = KBS.bootstrap_counts(model.ens.n_trajectories, N_BOOT,
                                  np.random.default_rng(SEED))
    args = _view_args(shown)
    args.pop("progress")
    args.pop("exclude")
    reps, _ = naive_bootstrap_maps(model.ens, counts, **args)
    d = np.asarray(shown.delays)
    e = np.asarray(shown.kinetic_energies)
    dm = (d >= 0.0) & (d <= 60.0)
    em = (e >= 1.2) & (e <= 1.8)
    spec_reps = reps[:, dm, :].mean(axis=1)
    trace_reps = reps[:, :, em].mean(axis=2)
    lo, hi = np.quantile(spec_reps, [0.025, 0.975], axis=0)
    np.testing.assert_allclose(d_lo, lo, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(d_hi, hi, rtol=1e-9, atol=1e-12)
    lo, hi = np.quantile(trace_reps, [0.025, 0.975], axis=0)
    np.testing.assert_allclose(t_lo, lo, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(t_hi, hi, rtol=1e-9, atol=1e-12)
    # not the average of the pixels' bounds (the quantile of a mean is not the mean of
    # the quantiles; common practice)
    avg_lo = np.asarray(unc.interval.lower)[dm].mean(axis=0)
    assert not np.allclose(d_lo, avg_lo, rtol=1e-3, atol=0)
    assert "bootstrap interval of each cut" in view.cut_caption.value
    # the band fits on the cut's axis
    assert view.cy.max >= d_hi.max() and view.ty.max >= t_hi.max()
    # off: bands hidden, caption back, layer unavailable
    unc.toggle.value = False
    assert not unc.delay_band.visible and not unc.energy_band.visible
    assert "shaded" not in view.cut_caption.value and unc.layer.disabled
    assert view.messages.errors == []


def test_recompute_invalidates_and_recomputes_when_on(model):
    view = _view(model)
    unc = view.uncertainty
    unc.toggle.value = True
    first = unc.interval
    view.convolve.value = False  # a control: new map, new interval
    assert unc.n_computed == 2 and unc.interval is not first and unc.available
    assert unc.interval.params["convolve"] is False
    _same_map(unc.interval, model.trpes_map)
    view.decomposition.value = "neutral state"  # decomposed map: the interval of its total
    assert unc.n_computed == 3 and model.trpes_map.components
    _same_map(unc.interval, model.trpes_map)
    assert unc.delay_band.visible
    model.excluded = (1,)  # exclusions: new map, new interval without trajectory 1
    assert unc.n_computed == 4 and unc.interval.params["excluded"] == [1]
    direct = _direct(model, model.trpes_map, interval="bootstrap", n_boot=N_BOOT,
                     random_state=SEED)
    np.testing.assert_allclose(unc.interval.upper, direct.upper, rtol=1e-10, atol=1e-14)
    # off: a new map drops the interval and computes none
    unc.toggle.value = False
    view.convolve.value = True
    assert unc.n_computed == 4 and unc.interval is None and not unc.delay_band.visible
    assert view.messages.errors == []
