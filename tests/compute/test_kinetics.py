"""Tests of the kinetic models, the IRF convolution and fit_kinetics intervals."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.signal import fftconvolve
from scipy.special import erfc

from ensemblelab.compute.kinetics import _kernels_populations as K
from ensemblelab.compute.kinetics import _reference_populations as R
from ensemblelab.compute.kinetics.populations import populations
from ensemblelab.compute.kinetics.rates import KineticsResult, fit_kinetics
from ensemblelab.compute.kinetics.schemes import (
    exp_decay,
    parallel,
    sequential,
    sequential_maximum,
    single_exponential,
)
from ensemblelab.errors import SchemaError
from ensemblelab.testing import TOY_TRUTH, make_toy_ensemble

FWHM_PER_SIGMA = 2 * math.sqrt(2 * math.log(2))  # Gaussian FWHM / sigma, from memory


# ------------------------------------------------------------------ IRF convolution
def test_irf_exp_unit_sigma_tau_at_t0():
    # sigma = tau = 1 at t = t0 -> 0.5 e^0.5 erfc(1/sqrt 2) = 0.2615783 computed
    # independently (not published)
    got = float(K.irf_exp(np.array(0.0), 1.0, 1.0))
    assert got == pytest.approx(0.5 * math.exp(0.5) * erfc(1 / math.sqrt(2)), abs=1e-14)
    assert got == pytest.approx(0.2615783, abs=1e-7)


def test_irf_exp_values_tau100_fwhm50():
    # computed independently (not published): tau = 100 fs, FWHM = 50 fs at t
    # = -50, 0, 50, 200 fs
    got = exp_decay([-50.0, 0.0, 50.0, 200.0], tau=100.0, irf_fwhm=50.0)
    np.testing.assert_allclose(got, [0.008646, 0.425407, 0.610385, 0.138421], atol=1e-6)


def test_irf_exp_against_quadrature_and_discrete_convolution():
    tau, fwhm = 37.0, 25.0
    sigma = fwhm / FWHM_PER_SIGMA
    ts = np.array([-60.0, -10.0, 0.0, 5.0, 40.0, 150.0])
    closed = exp_decay(ts, tau=tau, irf_fwhm=fwhm)
    quad = [R.irf_exp_quad(t, tau, sigma) for t in ts]  # scipy.integrate.quad
    np.testing.assert_allclose(closed, quad, rtol=1e-9, atol=1e-13)
    # scipy.signal.fftconvolve on a fine grid (dt = 0.01 fs): discrete tol 5e-4
    dt = 0.01
    grid = np.arange(-200.0, 400.0 + dt / 2, dt)
    f = np.where(grid >= 0, np.exp(-np.clip(grid, 0, None) / tau), 0.0)
    kt = np.arange(-6 * sigma, 6 * sigma + dt / 2, dt)
    kern = np.exp(-0.5 * (kt / sigma) ** 2)
    kern /= kern.sum()
    conv = fftconvolve(f, kern, mode="same")
    np.testing.assert_allclose(np.interp(ts, grid, conv), closed, atol=5e-4)


def test_irf_exp_no_overflow_for_extreme_arguments():
    # tiny tau, huge t/sigma: no warnings, finite, in [0, 1]
    # overflow/invalid would raise; underflow to 0 (harmless) is allowed
    with np.errstate(over="raise", invalid="raise", divide="raise", under="ignore"):
        vals = K.irf_exp(np.array([-1e6, -50.0, 0.0, 1e3, 1e7]), 1e-6, 0.5)
        vals2 = K.irf_exp(np.array([1e5, 3e5]), 1e5, 1e-3)
    assert np.all(np.isfinite(vals)) and np.all((vals >= 0) & (vals <= 1))
    # very short lifetime: the convolved exponential tends to tau * Gaussian density (derived)
    sigma = 0.5
    g0 = 1e-6 / (sigma * math.sqrt(2 * math.pi))
    assert vals[2] == pytest.approx(g0, rel=1e-4)
    np.testing.assert_allclose(vals2, np.exp(-np.array([1.0, 3.0])), rtol=1e-9)


def test_irf_step_half_at_time_zero():
    # unit step convolved (any sigma) at 0 -> 0.5 derived and computed
    # independently (not published)
    assert float(K.irf_step(np.array(0.0), 7.3)) == pytest.approx(0.5, abs=1e-12)


def test_irf_texp_matches_quadrature():
    from scipy.integrate import quad

    tau, sigma = 30.0, 12.0
    for t in (-20.0, 0.0, 25.0, 120.0):
        ref, _ = quad(lambda s, t=t: s * math.exp(-s / tau) * math.exp(
            -0.5 * ((t - s) / sigma) ** 2) / (sigma * math.sqrt(2 * math.pi)), 0, 800,
            points=[max(t, 0)], epsabs=1e-13, limit=400)
        assert float(K.irf_texp(np.array(t), tau, sigma)) == pytest.approx(ref, rel=1e-8,
                                                                             abs=1e-12)


# ------------------------------------------------------------------ sequential model
def test_sequential_values():
    # computed independently (not published): tau1 = 50, tau2 = 200 fs; t* =
    # 92.41962 fs, B_max = 4^(-1/3)
    tmax, bmax = sequential_maximum(50.0, 200.0)
    assert tmax == pytest.approx(92.41962, abs=1e-5)
    assert bmax == pytest.approx(4 ** (-1 / 3), abs=1e-12)
    abc = sequential([100.0, tmax], tau1=50.0, tau2=200.0)
    np.testing.assert_allclose(abc[0], [0.1353353, 0.6282605, 0.2364042], atol=1e-7)
    assert abc[1, 1] == pytest.approx(bmax, abs=1e-12)
    # t* is the maximum: neighbours are lower
    nb = sequential([tmax - 0.5, tmax + 0.5], tau1=50.0, tau2=200.0)[:, 1]
    assert np.all(nb < bmax)


def test_sequential_equal_rates_and_against_ode():
    # k1 = k2: B = k t e^{-k t}, maximum 1/e at t = tau (from memory)
    t = np.array([0.0, 40.0, 80.0, 200.0])
    abc = sequential(t, tau1=80.0, tau2=80.0)
    np.testing.assert_allclose(abc[:, 1], t / 80.0 * np.exp(-t / 80.0), atol=1e-14)
    assert sequential_maximum(80.0, 80.0) == pytest.approx((80.0, math.exp(-1)))
    # nearly equal rates stay continuous
    near = sequential(t, tau1=80.0, tau2=80.0 * (1 + 1e-7))[:, 1]
    np.testing.assert_allclose(near, abc[:, 1], atol=1e-6)
    # against a small-step ODE integration (computed independently, not published)
    ode = R.sequential_loop(t, 50.0, 120.0, dt=0.01)
    np.testing.assert_allclose(sequential(t, tau1=50.0, tau2=120.0), ode, atol=1e-7)


def test_sequential_with_irf_is_convolution_of_components():
    t = np.linspace(-80, 300, 9)
    abc = sequential(t, tau1=50.0, tau2=200.0, irf_fwhm=40.0)
    k1, k2 = 1 / 50.0, 1 / 200.0
    a = exp_decay(t, tau=50.0, irf_fwhm=40.0)
    b = k1 / (k2 - k1) * (a - exp_decay(t, tau=200.0, irf_fwhm=40.0))
    np.testing.assert_allclose(abc[:, 0], a, atol=1e-15)
    np.testing.assert_allclose(abc[:, 1], b, atol=1e-15)
    np.testing.assert_allclose(abc.sum(axis=1), 0.5 * erfc(-t / (40 / FWHM_PER_SIGMA)
                                                           / math.sqrt(2)), atol=1e-14)


def test_parallel_and_single_models():
    t = np.array([0.0, 30.0, 100.0])
    abc = parallel(t, tau=60.0, branching=0.25)
    np.testing.assert_allclose(abc[:, 0], np.exp(-t / 60.0), atol=1e-15)
    np.testing.assert_allclose(abc[:, 1], 0.25 * (1 - np.exp(-t / 60.0)), atol=1e-15)
    np.testing.assert_allclose(abc.sum(axis=1), 1.0, atol=1e-15)
    a = single_exponential([0.0, 10.0, 20.0, 70.0], tau=50.0, latency=20.0, p_inf=0.2)
    np.testing.assert_allclose(a, [1.0, 1.0, 1.0, 0.2 + 0.8 * math.exp(-1.0)], atol=1e-15)


# ------------------------------------------------------------------ fits
def test_fit_kinetics_recovers_noiseless_curves_exactly():
    t = np.arange(0.0, 600.0, 2.0)
    import pandas as pd

    abc = sequential(t, tau1=50.0, tau2=200.0)
    frame = pd.DataFrame({"time": np.repeat(t, 3), "state": np.tile([2, 1, 0], t.size),
                          "population": abc.ravel()})
    res = fit_kinetics(frame, scheme="sequential", states=(2, 1, 0), interval="covariance")
    assert res.params["tau1"] == pytest.approx(50.0, rel=1e-7)
    assert res.params["tau2"] == pytest.approx(200.0, rel=1e-7)
    assert res.params["t_max_B"] == pytest.approx(92.41962, abs=1e-4)  # computed independently
    assert "covariance" in res.interval_method
    par = parallel(t, tau=80.0, branching=0.3)
    frame2 = frame.assign(population=par.ravel())
    r2 = fit_kinetics(frame2, scheme="parallel", states=(2, 1, 0), interval="covariance")
    assert r2.params["tau"] == pytest.approx(80.0, rel=1e-7)
    assert r2.params["branching"] == pytest.approx(0.3, rel=1e-7)
    assert r2.params["tau_B"] == pytest.approx(80.0 / 0.3, rel=1e-7)
    single = single_exponential(t, tau=70.0, latency=15.0, p_inf=0.1, irf_fwhm=30.0)
    frame3 = pd.DataFrame({"time": t, "state": 0, "population": single})
    r3 = fit_kinetics(frame3, latency=True, offset=True, irf_fwhm=30.0, states=0,
                      interval="covariance")
    assert (r3.params["tau"], r3.params["latency"], r3.params["p_inf"]) == pytest.approx(
        (70.0, 15.0, 0.1), rel=1e-6)


def test_fit_kinetics_parallel_with_one_empty_branch_gives_infinite_partial_lifetime():
    # every decay of A goes to B (branching 1): tau_C = tau / (1 - 1) is infinite, not a
    # ZeroDivisionError (computed independently (not published))
    import pandas as pd

    t = np.arange(0.0, 400.0, 2.0)
    abc = parallel(t, tau=60.0, branching=1.0)
    frame = pd.DataFrame({"time": np.repeat(t, 3), "state": np.tile([2, 1, 0], t.size),
                          "population": abc.ravel()})
    res = fit_kinetics(frame, scheme="parallel", states=(2, 1, 0), interval="covariance")
    assert res.params["branching"] == pytest.approx(1.0, abs=1e-6)
    assert res.params["tau"] == pytest.approx(60.0, rel=1e-6)
    assert not np.isfinite(res.params["tau_C"]) or res.params["tau_C"] > 1e6


def test_fit_kinetics_toy_ensemble_bootstrap_interval():
    ens = make_toy_ensemble(300, seed=21)
    res = fit_kinetics(ens, interval="bootstrap", n_boot=500, random_state=1)
    assert isinstance(res, KineticsResult)
    lo, hi = res.interval("tau")
    assert lo < res.params["tau"] < hi
    assert lo < TOY_TRUTH["tau"] < hi  # known toy lifetime 100 fs (invented ground truth)
    # width ~ 2 * 1.96 * tau / sqrt(N) for an exponential sample (from memory), within 50 %
    assert (hi - lo) == pytest.approx(2 * 1.96 * 100 / math.sqrt(300), rel=0.5)
    assert res.boot_params.shape == (500, 1)
    assert "bootstrap" in res.interval_method
    text = str(res)
    assert "tau" in text and "bootstrap" in text
    assert "<table" in res._repr_html_()
    assert set(res.curves.columns) >= {"time", "state", "population", "fitted", "residual"}
    np.testing.assert_allclose(res.curves["population"] - res.curves["fitted"],
                               res.curves["residual"], atol=1e-15)
    # frame + ens gives the same bootstrap as the ensemble itself
    pop = populations(ens)
    res2 = fit_kinetics(pop, ens=ens, interval="bootstrap", n_boot=500, random_state=1)
    assert res2.interval("tau") == pytest.approx((lo, hi), rel=1e-9)


def test_batched_refit_equals_loop_of_scipy_fits():
    ens = make_toy_ensemble(80, seed=5, t_max=300.0, dt=3.0)
    res = fit_kinetics(ens, scheme="sequential", states=("S2", "S1", "S0"),
                       interval="covariance")
    prob = res._problem
    from ensemblelab.compute.kinetics.populations import population_arrays

    arr = population_arrays(ens)
    counts = K.bootstrap_counts(80, 6, np.random.default_rng(0))
    boot = arr.bootstrap(counts)[:, :, [2, 1]]
    prob2 = type(prob)("sequential", ["tau1", "tau2"], {}, arr.times, 2, 0.0, 0.0)
    y = np.transpose(boot, (0, 2, 1)).reshape(6, -1)
    x0 = np.tile(np.log([100.0, 300.0]), (6, 1))
    fast, _, conv = K.batched_lm(prob2, x0, y)
    slow = R.refit_loop(prob2, x0, y)
    assert conv.all()
    np.testing.assert_allclose(np.exp(fast[:, 0]), np.exp(slow[:, 0]), rtol=1e-5)


def test_fit_kinetics_errors():
    ens = make_toy_ensemble(10)
    with pytest.raises(SchemaError, match="'scheme' parameter"):
        fit_kinetics(ens, scheme="triple")
    with pytest.raises(SchemaError, match="needs 'states'"):
        fit_kinetics(ens, scheme="sequential")
    with pytest.raises(SchemaError, match="unknown state label"):
        fit_kinetics(ens, scheme="sequential", states=("S9", "S1"))
    with pytest.raises(SchemaError, match="columns"):
        import pandas as pd

        fit_kinetics(pd.DataFrame({"t": [1]}))
    with pytest.raises(SchemaError, match="'interval' parameter"):
        fit_kinetics(ens, interval="wald")
    with pytest.raises(SchemaError, match="'n_boot' parameter.*interval=None"):
        fit_kinetics(ens, interval="bootstrap", n_boot=0)
    with pytest.raises(SchemaError, match="needs the ensemble"):
        fit_kinetics(populations(ens), interval="bootstrap")


def test_fit_kinetics_interval_choice_is_explicit():
    ens = make_toy_ensemble(60, seed=4)
    none = fit_kinetics(ens, interval=None)
    cov = fit_kinetics(ens, interval="covariance")
    boot = fit_kinetics(ens, interval="bootstrap", n_boot=40, random_state=0)
    # one point estimate whatever the interval choice (the fit does not depend on it)
    assert none.params["tau"] == cov.params["tau"] == boot.params["tau"]
    assert none.interval_method == "none" and none.boot_params is None
    assert np.isnan(none.interval("tau")).all()
    assert cov.interval_method.startswith("covariance") and cov.boot_params is None
    assert boot.interval_method.startswith("bootstrap") and boot.boot_params.shape == (40, 1)
    for res in (cov, boot):
        lo, hi = res.interval("tau")
        assert lo < res.params["tau"] < hi
    assert none.scheme == "single"


@pytest.mark.slow
def test_fit_kinetics_bootstrap_interval_coverage():
    """200 repeated toy ensembles of 100 trajectories (true tau = 100 fs), 300 resamples each:
    about 95 % of the 95 % bootstrap intervals must contain 100 fs."""
    n_rep, hits = 200, 0
    for r in range(n_rep):
        ens = make_toy_ensemble(100, seed=1000 + r, n_atoms=1, dt=2.0)
        lo, hi = fit_kinetics(ens, interval="bootstrap", n_boot=300, random_state=r).interval("tau")
        hits += lo <= TOY_TRUTH["tau"] <= hi
    # binomial sd at 95 % over 200 repeats is 1.5 %; accept -3.5 / +3 sd
    assert 0.897 <= hits / n_rep <= 0.995
