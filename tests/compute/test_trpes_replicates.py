"""Replicate maps of the map bootstrap and the percentile intervals of cuts.

Check values: ``compute_trpes(..., interval="bootstrap")`` called directly (same seed),
maps of explicitly resampled ensembles (the naive reference twin; computed independently
(not published)) and the percentile bootstrap (Stat. Sci. 1986, "Bootstrap methods for
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
from ensemblelab.compute.spectroscopy.pulses import GaussianPulse
from ensemblelab.compute.spectroscopy.replicates import cut_interval, trpes_with_replicates
from ensemblelab.errors import SchemaError
from ensemblelab.testing import make_toy_ensemble

KW = {"kinetic_energies": np.linspace(0.0, 2.0, 41), "delays": np.arange(-40.0, 161.0, 20.0),
      "probe": GaussianPulse(photon_energy=5.0, fwhm=30.0),
      "pump": GaussianPulse(photon_energy=4.0, fwhm=30.0), "progress": False}


@pytest.fixture(scope="module")
def ens():
    return make_toy_ensemble(16, seed=11, t_max=160.0, dt=2.0)


def _quiet(fn, *a, **k):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return fn(*a, **k)


def test_same_map_and_interval_as_compute_trpes_with_exclusions(ens):
    direct = _quiet(compute_trpes, ens, interval="bootstrap", n_boot=12, random_state=5,
                    exclude=[0, 3], decompose="neutral", **KW)
    boot, reps = _quiet(trpes_with_replicates, ens, n_boot=12, random_state=5, exclude=[0, 3],
                        decompose="neutral", **KW)
    assert reps.shape == (12, *direct.shape)
    np.testing.assert_allclose(boot.intensity, direct.intensity, rtol=1e-12, atol=0)
    np.testing.assert_allclose(boot.lower, direct.lower, rtol=1e-12, atol=0)
    np.testing.assert_allclose(boot.upper, direct.upper, rtol=1e-12, atol=0)
    # the interval is the replicates' percentiles (percentile bootstrap, Stat. Sci. 1986)
    lo, hi = np.quantile(reps, [0.025, 0.975], axis=0)
    np.testing.assert_allclose(lo, direct.lower, rtol=1e-10, atol=1e-14)
    np.testing.assert_allclose(hi, direct.upper, rtol=1e-10, atol=1e-14)
    assert boot.params["excluded"] == [0, 3]


def test_replicates_and_cut_interval_equal_the_naive_twin(ens, monkeypatch):
    # the map's own moments in float64 (to rounding; the default recentred float32
    # replicates are checked against these in test_trpes_bootstrap_fused.py)
    monkeypatch.setattr(BF, "DEFAULT_GRID", BF.EXACT)
    _, reps = _quiet(trpes_with_replicates, ens, n_boot=8, random_state=2, ci=0.9, **KW)
    counts = KBS.bootstrap_counts(ens.n_trajectories, 8, np.random.default_rng(2))
    kw = {k: v for k, v in KW.items() if k != "progress"}
    naive, _ = naive_bootstrap_maps(ens, counts, **kw)
    np.testing.assert_allclose(reps, naive, rtol=1e-9, atol=1e-12)
    d = KW["delays"]
    mask = (d >= 0.0) & (d <= 80.0)
    lo, hi = cut_interval(reps, mask, axis="delay", ci=0.9)
    ref = np.quantile(naive[:, mask, :].mean(axis=1), [0.05, 0.95], axis=0)
    np.testing.assert_allclose(lo, ref[0], rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(hi, ref[1], rtol=1e-9, atol=1e-12)
    e = KW["kinetic_energies"]
    emask = (e > 1.0) & (e < 1.6)
    lo, hi = cut_interval(reps, emask, axis="energy", ci=0.9)
    ref = np.quantile(naive[:, :, emask].mean(axis=2), [0.05, 0.95], axis=0)
    np.testing.assert_allclose(lo, ref[0], rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(hi, ref[1], rtol=1e-9, atol=1e-12)


def test_bad_arguments_raise_clear_errors(ens):
    with pytest.raises(SchemaError, match="axis"):
        cut_interval(np.zeros((4, 3, 2)), np.ones(3, bool), axis="time")
    with pytest.raises(SchemaError, match="shape"):
        cut_interval(np.zeros((4, 3)), np.ones(3, bool), axis="delay")
    with pytest.raises(SchemaError, match="interval"):
        trpes_with_replicates(ens, interval="bootstrap", **KW)
    with pytest.raises(SchemaError, match="in-memory"):
        trpes_with_replicates(object(), **KW)  # type: ignore[arg-type]
