"""Gaussian pulses: widths, cross-correlation, n-photon rules."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import constants as sc
from scipy.integrate import quad

from ensemblelab.compute.spectroscopy.pulses import (
    GaussianPulse,
    cross_correlation,
    cross_correlation_fwhm,
    cross_correlation_sigma,
    gaussian,
)
from ensemblelab.errors import SchemaError


@pytest.mark.parametrize(
    ("fwhm", "gamma"),
    # computed independently (not published)
    [(10, 0.182495), (20, 0.091248), (30, 0.060832), (50, 0.036499), (100, 0.018250)],
)
def test_pulse_spectral_fwhm_table(fwhm, gamma):
    assert GaussianPulse(photon_energy=5.0, fwhm=fwhm).spectral_fwhm == pytest.approx(
        gamma, abs=1e-6)


def test_pulse_time_bandwidth_constants():
    hbar = sc.physical_constants["reduced Planck constant in eV s"][0] * 1e15  # CODATA via scipy
    p = GaussianPulse(photon_energy=1.0, fwhm=1.0)
    assert p.spectral_fwhm == pytest.approx(4 * math.log(2) * hbar, rel=1e-12)
    # 1.8249510 eV fs and TBP 0.4412712: computed independently (not published)
    assert p.spectral_fwhm == pytest.approx(1.8249510, abs=1e-7)
    assert 2 * math.log(2) / math.pi == pytest.approx(0.4412712, abs=1e-7)


def test_pulse_spectral_intensity_is_fourier_transform_of_envelope():
    # numerical Fourier transform of the field envelope sqrt(I(t)) (independent check)
    p = GaussianPulse(photon_energy=3.0, fwhm=25.0)
    hbar = sc.physical_constants["reduced Planck constant in eV s"][0] * 1e15
    t = np.linspace(-400, 400, 40001)
    field = np.sqrt(p.envelope(t))

    def spec(de):
        return abs(np.trapezoid(field * np.exp(1j * de / hbar * t), t)) ** 2

    ratio = spec(0.5 * p.spectral_fwhm) / spec(0.0)
    assert ratio == pytest.approx(0.5, rel=1e-9)  # half maximum at FWHM/2 (definition)
    assert p.spectral_intensity(3.0 + 0.5 * p.spectral_fwhm) == pytest.approx(0.5, rel=1e-12)


def test_pulse_cross_correlation_30_40():
    # T_cc = 50 fs, sigma_cc = 21.23305 fs: derived and computed independently
    # (not published)
    pu, pr = GaussianPulse(photon_energy=4, fwhm=30), GaussianPulse(photon_energy=5, fwhm=40)
    assert cross_correlation_fwhm(pu, pr) == pytest.approx(50.0, abs=1e-9)
    assert cross_correlation_sigma(pu, pr) == pytest.approx(21.23305, abs=1e-5)
    # the cross-correlation integral of the two envelopes is a Gaussian of that width
    # (independent numerical check by quadrature)
    taus = [0.0, 25.0]
    c = [quad(lambda t, tau=tau: pu.envelope(t) * pr.envelope(t - tau), -400, 400)[0]
         for tau in taus]
    assert c[1] / c[0] == pytest.approx(float(cross_correlation(pu, pr, 25.0)
                                              / cross_correlation(pu, pr, 0.0)), rel=1e-9)
    assert quad(lambda x: float(cross_correlation(pu, pr, x)), -500, 500)[0] == pytest.approx(1)


def test_pulse_two_photon_probe():
    # effective T = 21.2132 fs, Gamma^(2) = 0.086029 eV: derived and computed
    # independently (not published)
    p = GaussianPulse(photon_energy=2.5, fwhm=30.0, n_photons=2)
    assert p.effective_fwhm == pytest.approx(21.2132, abs=1e-4)
    assert p.effective_spectral_fwhm == pytest.approx(0.086029, abs=1e-6)
    assert p.total_energy == 5.0
    # I^2 has half maximum at the effective FWHM / 2 (definition)
    assert p.effective_envelope(p.effective_fwhm / 2) == pytest.approx(0.5, rel=1e-12)


def test_pulse_line_shape_area_and_peak():
    p = GaussianPulse(photon_energy=5.0, fwhm=30.0)
    e = np.linspace(4.5, 5.5, 20001)
    assert np.trapezoid(p.line_shape(e), e) == pytest.approx(1.0, rel=1e-9)
    # peak height 15.4432 eV^-1: computed independently (not published)
    assert float(gaussian(1.0, 1.0, p.spectral_fwhm)) == pytest.approx(15.4432, rel=1e-5)


@pytest.mark.parametrize("bad", [0.0, -1.0, float("nan"), "30"])
def test_pulse_rejects_bad_fwhm(bad):
    with pytest.raises(SchemaError, match="'fwhm' parameter of GaussianPulse"):
        GaussianPulse(photon_energy=5.0, fwhm=bad)


def test_pulse_rejects_bad_n_photons():
    with pytest.raises(SchemaError, match="n_photons"):
        GaussianPulse(photon_energy=5.0, fwhm=30.0, n_photons=0)


def test_cross_correlation_with_a_two_photon_probe():
    # an n-photon probe acts with intensity^n: its temporal FWHM shrinks by sqrt(n), so
    # T_cc = sqrt(T_pu^2 + T_pr^2 / n) = sqrt(30^2 + 40^2 / 2) = 41.231056 fs
    # (derived and computed independently (not published))
    pump = GaussianPulse(photon_energy=4.0, fwhm=30.0)
    probe = GaussianPulse(photon_energy=2.5, fwhm=40.0, n_photons=2)
    assert cross_correlation_fwhm(pump, probe) == pytest.approx(41.231056, abs=1e-6)
    one = GaussianPulse(photon_energy=5.0, fwhm=40.0)
    assert cross_correlation_fwhm(pump, one) == pytest.approx(50.0, abs=1e-12)
    d = np.linspace(-300.0, 300.0, 60001)
    g = cross_correlation(pump, probe, d)
    assert np.trapezoid(g, d) == pytest.approx(1.0, abs=1e-9)
    half = d[g >= g.max() / 2]
    assert half[-1] - half[0] == pytest.approx(41.231056, abs=0.02)
