"""TRPES near threshold, with missing electronic data, energy-dependent resolution and the
cross-section models' threshold behaviour.

Check values: open fractions of a 30 fs, 5.0 eV transform-limited Gaussian probe
(computed independently (not published) with scipy.special.erf and hbar from
scipy.constants), the hydrogen 1s photoionisation cross section at threshold, 6.30e-18
cm^2 (from memory; the textbook Coulomb-wave result), and maps rebuilt by hand or by the
naive reference twin (computed independently (not published)).
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
from scipy.constants import hbar, physical_constants
from scipy.special import erf
from test_trpes_fixtures import random_ensemble

from ensemblelab.compute.spectroscopy import _reference_trpes as R
from ensemblelab.compute.spectroscopy import compute_trpes, prepare_sticks
from ensemblelab.compute.spectroscopy.cross_sections import (
    HydrogenicCoulomb,
    HydrogenicPWA,
    hydrogenic_coulomb_cross_section,
    resolve_cross_section,
)
from ensemblelab.compute.spectroscopy.pulses import GaussianPulse
from ensemblelab.compute.spectroscopy.resolution import ProportionalResolution
from ensemblelab.data.ensemble import Ensemble
from ensemblelab.errors import EnsembleWarning, SchemaError
from ensemblelab.testing import make_toy_ensemble
from ensemblelab.units import HARTREE_EV

PROBE = GaussianPulse(photon_energy=5.0, fwhm=30.0)


def _one_snapshot(ip: float, dyson: float = 1.0) -> Ensemble:
    return Ensemble.from_arrays(traj=[0], time=[0.0], active=[1],
                                geometries=np.zeros((1, 1, 3)), symbols=["H"],
                                energies=[[0.0, 0.0]], cation_energies=[[ip]], dyson=[[dyson]],
                                metadata={"absorbing_state": None})


def _quiet(f, *a, **k):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return f(*a, **k)


# ------------------------------------------------------------------ 3. threshold
def test_open_fraction_check_values():
    # Gamma = 4 ln2 hbar / T with hbar from scipy.constants (CODATA), sigma = Gamma / 2.3548
    hbar_ev_fs = hbar / physical_constants["electron volt"][0] * 1e15
    gamma = 4 * math.log(2) * hbar_ev_fs / 30.0
    sigma = gamma / (2 * math.sqrt(2 * math.log(2)))
    assert PROBE.spectral_fwhm == pytest.approx(0.060832, abs=1e-6)
    assert sigma == pytest.approx(0.025833, abs=1e-6)
    # computed independently (not published): 0.51544/0.48456 at +-1 meV, 0.65066/0.34934
    # at +-10 meV; also against scipy's erf directly
    x = np.array([0.001, -0.001, 0.010, -0.010])
    got = PROBE.open_fraction(x)
    np.testing.assert_allclose(got, [0.51544, 0.48456, 0.65066, 0.34934], atol=5e-6)
    np.testing.assert_allclose(got, 0.5 * (1 + erf(x / (math.sqrt(2) * sigma))), rtol=1e-12)


@pytest.mark.parametrize(("excess", "fraction"), [(0.001, 0.51544), (-0.001, 0.48456),
                                                  (0.010, 0.65066), (-0.010, 0.34934)])
def test_map_area_at_threshold_is_the_open_fraction(excess, fraction):
    # a single stick just above or below threshold: the map's area over E >= 0 is the open
    # fraction (computed independently (not published), values above); the old stick-centre
    # test gave 0 below threshold and the full half-Gaussian above
    e = np.arange(0.0, 0.4, 0.0002)
    m = compute_trpes(_one_snapshot(ip=5.0 - excess), probe=PROBE, kinetic_energies=e,
                      delays=[0.0], convolve=False, progress=False)
    assert np.trapezoid(m.intensity[0], e) == pytest.approx(fraction, abs=2e-4)


def test_map_is_continuous_in_the_ionisation_energy_and_zero_below_zero():
    e = np.linspace(-0.2, 0.4, 301)
    ips = np.linspace(4.95, 5.05, 101)  # 1 meV steps through threshold
    areas = []
    for ip in ips:
        m = compute_trpes(_one_snapshot(ip=ip), probe=PROBE, kinetic_energies=e,
                          delays=[0.0], convolve=False, progress=False)
        assert np.all(m.intensity[0, e < 0] == 0.0)
        areas.append(np.trapezoid(m.intensity[0, e >= 0], e[e >= 0]))
    jumps = np.abs(np.diff(areas))
    # largest change per meV: the Gaussian density at threshold, 1 meV * 15.44 / eV = 0.0154
    # (derived: d(open fraction)/d(IP) = G(0; 0, Gamma); computed independently)
    assert jumps.max() < 0.017
    assert areas[0] > 0.97 and areas[-1] < 0.03


# ------------------------------------------------------------------ 4. missing data
def _nan_every_second_step(ens, *, channel=None):
    ce = ens.cation_energies.copy()
    odd = ens.snapshots["step"].to_numpy() % 2 == 1
    if channel is None:
        ce[odd] = np.nan
    else:
        ce[odd, channel] = np.nan
    return ens.replace(cation_energies=ce)


def test_missing_electronic_data_is_not_zero_signal():
    # a smooth ensemble with electronic data at every second step only: the map must be
    # that of the full data (the old open-channel test halved it: ratio 0.500)
    ens = make_toy_ensemble(40, seed=3, t_max=200.0)
    kw = dict(probe=PROBE, kinetic_energies=np.linspace(0.0, 2.0, 101),
              delays=np.arange(0.0, 181.0, 20.0), progress=False)
    full = compute_trpes(ens, **kw)
    with pytest.warns(EnsembleWarning, match="lack electronic data"):
        half = compute_trpes(_nan_every_second_step(ens), **kw)
    ratio = half.intensity.sum() / full.intensity.sum()
    assert ratio == pytest.approx(1.0, abs=0.02)
    assert half.n_missing_data == int((ens.snapshots["step"] % 2 == 1).sum())
    assert full.n_missing_data == 0
    assert "snapshots without data" in repr(half)


def test_missing_data_in_one_channel_only_in_memory_and_lazy(tmp_path):
    # channel 1 lacks data at odd steps, channel 0 is complete: channel 1 is averaged over
    # its own snapshots (equal to the full data's channel 1 on this smooth ensemble), and a
    # chunked store gives the same map (computed independently (not published))
    pytest.importorskip("dask")
    from ensemblelab import load
    from ensemblelab.io.chunked import save_chunked

    base = make_toy_ensemble(24, seed=5, t_max=120.0, ragged=True)
    two = base.replace(cation_energies=np.c_[base.cation_energies, base.cation_energies + 0.4],
                       dyson=np.concatenate([base.dyson, 0.5 * base.dyson], axis=-1),
                       cation_labels=("D0", "D1"))
    holes = _nan_every_second_step(two, channel=1)
    kw = dict(probe=PROBE, kinetic_energies=np.linspace(0.0, 2.0, 81),
              delays=np.arange(-20.0, 121.0, 10.0), decompose="cation", progress=False)
    full = _quiet(compute_trpes, two, **kw)
    got = _quiet(compute_trpes, holes, **kw)
    scale = full.intensity.max()
    np.testing.assert_allclose(got.components["D0"], full.components["D0"], rtol=0,
                               atol=1e-10 * scale)
    assert np.abs(got.components["D1"] - full.components["D1"]).max() < 0.05 * scale
    lazy = load(save_chunked(holes, tmp_path / "h.ens", chunk_size=5), lazy=True)
    lz = _quiet(compute_trpes, lazy, **kw)
    np.testing.assert_allclose(lz.intensity, got.intensity, rtol=1e-12, atol=1e-12 * scale)
    assert lz.n_missing_data == got.n_missing_data > 0


# ------------------------------------------------------------------ 5. cross sections
def test_hydrogenic_model_is_finite_at_threshold_and_anion_models_vanish():
    # hydrogen 1s at threshold: 6.30e-18 cm^2 = 6.30 Mb (from memory)
    i_h = 0.5 * HARTREE_EV
    assert float(hydrogenic_coulomb_cross_section(0.0, i_h)) == pytest.approx(6.30, abs=0.01)
    e = np.array([1e-6, 1e-3, 0.01])
    cs = HydrogenicCoulomb()(np.ones(3), e, np.full(3, 9.0), np.zeros(3, int), 10.0)
    assert np.all(cs > 0) and cs[0] / cs[2] == pytest.approx(1.0, rel=0.01)  # continuous
    # the anion models vanish as E^(3/2) (Wigner law, l = 1; from memory)
    pwa = HydrogenicPWA()(np.ones(2), np.array([1e-4, 4e-4]), np.full(2, 9.0),
                          np.zeros(2, int), 9.0004)
    assert pwa[1] / pwa[0] == pytest.approx(8.0, rel=1e-3)
    # far above threshold both fall as E^(-7/2) (derived from both closed forms): their
    # ratio tends to a constant (the Coulomb correction is of order sqrt(IP/E) < 0.3 % here)
    big = np.array([1e6, 4e6])
    c = hydrogenic_coulomb_cross_section(big, 10.0)
    p = HydrogenicPWA()(np.ones(2), big, np.full(2, 10.0), np.zeros(2, int), None)
    assert (c[0] / p[0]) / (c[1] / p[1]) == pytest.approx(1.0, rel=0.01)
    assert isinstance(resolve_cross_section("hydrogenic"), HydrogenicCoulomb)
    assert isinstance(resolve_cross_section("anion-hydrogenic"), HydrogenicPWA)
    with pytest.raises(SchemaError, match="anion"):
        resolve_cross_section("hydrogenic-pwa")


def test_cation_labels_get_the_diabatic_prefix_only_with_a_cation_adt():
    ens = random_ensemble(4, seed=2)
    kw = dict(probe=PROBE, kinetic_energies=np.linspace(0, 3, 31), delays=[0.0, 10.0],
              decompose="diabatic", progress=False)
    without = _quiet(compute_trpes, ens.replace(adt_cation=None), **kw)
    assert all(lab.split("->")[1] in ens.cation_labels for lab in without.components)
    assert all(lab.startswith("d") for lab in without.components)
    n_cat = ens.n_cation
    rot = np.broadcast_to(np.eye(n_cat), (ens.n_snapshots, n_cat, n_cat)).copy()
    with_ = _quiet(compute_trpes, ens.replace(adt_cation=rot), **kw)
    assert all(lab.split("->")[1] == "d" + c for lab, c in
               zip(with_.components, list(ens.cation_labels) * ens.n_states, strict=True))


# ------------------------------------------------------------------ 6. resolution
def test_proportional_resolution_matches_per_stick_gaussians():
    # dE = 5 % of E: each stick broadened with sqrt(Gamma_probe^2 + (0.05 E)^2) at its own
    # energy; the naive twin evaluates each stick's Gaussian directly
    ens = random_ensemble(5, seed=4)
    res = ProportionalResolution(0.05)
    model = _quiet(prepare_sticks, ens, probe=PROBE, progress=False, time_step=2.0)
    energies = np.linspace(0.0, 4.0, 161)
    delays = np.arange(0.0, 60.0, 4.0)
    fast = model.broaden(kinetic_energies=energies, delays=delays, resolution=res,
                         convolve=False)

    def width(x):
        return math.hypot(PROBE.spectral_fwhm, 0.05 * max(x, 0.0))

    naive = R.trpes_naive(model, energies=energies, delays=delays, fwhm=width, sigma=None)
    scale = naive.max()
    # a stick takes the width of its fine bin's centre (h = Gamma/4): relative width error
    # below h / (2 E), about 1 % of the peak here (computed independently (not published))
    np.testing.assert_allclose(fast.intensity, naive, rtol=0, atol=1e-2 * scale)
    const = model.broaden(kinetic_energies=energies, delays=delays, convolve=False)
    assert np.abs(const.intensity - naive).max() > 5e-2 * scale  # the option matters
    assert fast.params["resolution"] == {"model": "proportional", "fraction": 0.05,
                                         "floor": 0.0}
    with pytest.raises(SchemaError, match="resolution"):
        model.broaden(kinetic_energies=energies, delays=delays, resolution=-1.0)


def test_kernel_equals_naive_with_missing_data_and_carried_sticks():
    # the moment kernel and its naive twin agree on sticks with per-channel alive ratios and
    # carried absorbing-state sticks (moment bound 2.8e-7 of the peak; module docstring)
    ens = random_ensemble(6, seed=7, offset=0.7)
    ce = ens.cation_energies.copy()
    ce[::3, 1] = np.nan
    ens = ens.replace(cation_energies=ce)
    model = _quiet(prepare_sticks, ens, probe=PROBE, progress=False, time_step=2.0,
                   absorbing="carry")
    energies = np.linspace(0.0, 4.0, 81)
    delays = np.arange(0.0, 80.0, 3.0)
    fast = model.broaden(kinetic_energies=energies, delays=delays, convolve=False)
    naive = R.trpes_naive(model, energies=energies, delays=delays, fwhm=model.fwhm(),
                          sigma=None)
    np.testing.assert_allclose(fast.intensity, naive, rtol=0, atol=3e-7 * naive.max())


@pytest.mark.parametrize("lazy", [False, True])
def test_contributions_follow_missing_data_shifts_carry_and_resolution(lazy, tmp_path):
    # the region total of contributions is the map's integral over the region (trapezoid on
    # a 5 meV x 0.5 fs grid, 2e-3; computed independently (not published)) also with gaps
    # in the data, ionisation shifts, carried absorbing-state sticks and dE = 4 % of E
    from ensemblelab.compute.spectroscopy import contributions

    ens = random_ensemble(6, seed=21, n_steps=60, dt=1.0)
    ce = ens.cation_energies.copy()
    ce[ens.snapshots["step"].to_numpy() % 2 == 1, 1] = np.nan
    ens = ens.replace(cation_energies=ce)
    e = np.linspace(0.0, 4.0, 801)
    d = np.arange(-60.0, 80.0, 0.5)
    kw = dict(probe=PROBE, pump=GaussianPulse(photon_energy=4.0, fwhm=30.0),
              kinetic_energies=e, delays=d, progress=False, ionisation_shifts=[0.1, -0.2],
              absorbing="carry", resolution=ProportionalResolution(0.04))
    src = ens
    if lazy:
        pytest.importorskip("dask")
        from ensemblelab import load
        from ensemblelab.io.chunked import save_chunked

        src = load(save_chunked(ens, tmp_path / "c.ens", chunk_size=2), lazy=True)
    m = _quiet(compute_trpes, src, **kw)
    er, dr = (0.5, 3.0), (0.0, 40.0)
    df = _quiet(contributions, src, m, energy_range=er, delay_range=dr, group_by="traj")
    se, sd = (e >= er[0]) & (e <= er[1]), (d >= dr[0]) & (d <= dr[1])
    region = np.trapezoid(np.trapezoid(m.intensity[np.ix_(sd, se)], e[se], axis=1), d[sd])
    assert df.attrs["total"] == pytest.approx(region, rel=2e-3)
