"""Loading measured maps and comparing them with simulated ones."""

from __future__ import annotations

import numpy as np
import pytest

from ensemblelab.compute.spectroscopy.compare import compare_maps, resample_map
from ensemblelab.data.spectrum import TRPESMap
from ensemblelab.errors import ParseError
from ensemblelab.io.maps import load_measured_map


def _analytic_map(e, d, *, e0=1.0, t0=0.0, scale=1.0):
    # a Gaussian band decaying with 80 fs after a Gaussian rise (invented test pattern)
    ee, dd = np.meshgrid(e, d)
    rise = 0.5 * (1 + np.tanh((dd - t0) / 20.0))
    return scale * np.exp(-((ee - e0) / 0.2) ** 2) * rise * np.exp(-np.clip(dd - t0, 0, None)
                                                                   / 80.0)


def test_load_measured_csv_grid(tmp_path):
    e = np.array([0.5, 1.0, 1.5])
    d = np.array([-20.0, 0.0, 50.0])
    inten = np.arange(9.0).reshape(3, 3)
    lines = ["# invented test map", "delay_fs;" + ";".join(map(str, e))]
    for di, row in zip(d[::-1], inten[::-1], strict=True):  # unsorted rows are sorted back
        lines.append(f"{di};" + ";".join(map(str, row)))
    path = tmp_path / "m.csv"
    path.write_text("\n".join(lines) + "\n")
    before = path.read_bytes()
    m = load_measured_map(path)
    np.testing.assert_array_equal(m.kinetic_energies, e)
    np.testing.assert_array_equal(m.delays, d)
    np.testing.assert_array_equal(m.intensity, inten)
    assert path.read_bytes() == before  # input not modified
    ps = load_measured_map(path, time_unit="ps")
    np.testing.assert_allclose(ps.delays, d * 1000.0)


def test_load_measured_npz_transposed(tmp_path):
    e, d = np.linspace(0, 2, 4), np.linspace(-10, 30, 5)
    inten = np.random.default_rng(0).uniform(size=(5, 4))
    np.savez(tmp_path / "m.npz", energy=e, delay=d, signal=inten.T)
    m = load_measured_map(tmp_path / "m.npz")
    np.testing.assert_array_equal(m.intensity, inten)


@pytest.mark.parametrize(("text", "match"), [
    ("delay,a,b\n0,1,2\n", "first row must hold the kinetic energies"),
    ("delay,0.5,1.0\n0,1\n", "line 2.*expected 3 cells"),
    ("delay,0.5,1.0\n0,1,x\n", "line 2.*non-numeric"),
    ("# only a comment\n", "no map found"),
])
def test_load_measured_csv_errors(tmp_path, text, match):
    path = tmp_path / "bad.csv"
    path.write_text(text)
    with pytest.raises(ParseError, match=match):
        load_measured_map(path)


def test_compare_recovers_scale_shift_and_time_zero():
    e = np.linspace(0.0, 2.0, 201)
    d = np.arange(-100.0, 300.0, 2.0)
    sim = TRPESMap(kinetic_energies=e, delays=d, intensity=_analytic_map(e, d))
    # measurement: 3x scale, band 0.1 eV higher, time zero 12 fs later, coarser grid
    em = np.linspace(0.1, 1.9, 91)
    dm = np.arange(-80.0, 280.0, 4.0)
    meas = TRPESMap(kinetic_energies=em, delays=dm,
                    intensity=_analytic_map(em, dm, e0=1.1, t0=12.0, scale=3.0))
    res = compare_maps(sim, meas, fit_energy_shift=True, fit_time_zero=True)
    assert res.energy_shift == pytest.approx(0.1, abs=2e-3)
    assert res.time_zero == pytest.approx(12.0, abs=0.3)
    assert res.scale == pytest.approx(3.0, rel=1e-2)
    assert res.r2 > 0.999 and res.cosine > 0.999
    plain = compare_maps(sim, meas)
    assert plain.r2 < res.r2 and plain.energy_shift == 0.0


def test_compare_identical_maps_score_one():
    e = np.linspace(0.0, 2.0, 51)
    d = np.arange(-50.0, 200.0, 5.0)
    sim = TRPESMap(kinetic_energies=e, delays=d, intensity=_analytic_map(e, d))
    res = compare_maps(sim, sim.replace(intensity=2 * sim.intensity))
    assert res.scale == pytest.approx(2.0, rel=1e-12)
    assert res.cosine == pytest.approx(1.0, abs=1e-12)
    assert res.r2 == pytest.approx(1.0, abs=1e-12)
    np.testing.assert_allclose(res.residual.intensity, 0.0, atol=1e-12)


def test_resample_map_is_exact_for_bilinear_data():
    e = np.linspace(0, 1, 11)
    d = np.linspace(0, 10, 6)
    m = TRPESMap(kinetic_energies=e, delays=d, intensity=np.add.outer(2 * d, 3 * e))
    out = resample_map(m, kinetic_energies=np.array([0.25, 0.55]), delays=np.array([1.0, 7.5]))
    np.testing.assert_allclose(out, np.add.outer(2 * np.array([1.0, 7.5]),
                                                 3 * np.array([0.25, 0.55])), rtol=1e-12)


def test_demo_measured_map_regenerates_identically_and_is_found():
    # the committed invented map is reproduced bit for bit from the demo scenario
    from pathlib import Path

    from ensemblelab.compute.spectroscopy import compute_trpes
    from ensemblelab.compute.spectroscopy.pulses import GaussianPulse
    from ensemblelab.demo import make_ensemble
    from ensemblelab.demo.measured import (
        DEFAULT_PATH,
        MEASURED_SETTINGS,
        make_measured_map,
        measured_map_text,
    )
    from ensemblelab.demo.scenario import DEFAULT_SCENARIO as sc

    committed = Path(DEFAULT_PATH)
    assert committed.is_file()
    made = make_measured_map()
    regenerated = measured_map_text(made)
    assert regenerated == committed.read_text()
    # labelled as invented in the file itself and in the generated map's parameters
    assert committed.read_text().startswith("# INVENTED demo data, not a measurement")
    assert made.params["invented"] is True
    meas = load_measured_map(committed)
    # the unperturbed demo model, compared with the invented measurement: the fit finds the
    # injected time zero (+8 fs) and the 0.1 eV lower band positions (computed
    # independently here, not published; tolerances reflect noise and the rate change)
    ens = make_ensemble(MEASURED_SETTINGS["n_trajectories"], seed=MEASURED_SETTINGS["seed"],
                        faults=False, velocities=False)
    sim = compute_trpes(ens, probe=GaussianPulse(photon_energy=sc.probe_energy,
                                                 fwhm=sc.probe_fwhm),
                        pump=GaussianPulse(photon_energy=sc.pump_energy, fwhm=sc.pump_fwhm),
                        kinetic_energies=np.linspace(0, 3, 121),
                        delays=np.arange(-120.0, 420.0, 5.0),
                        resolution=MEASURED_SETTINGS["resolution"], progress=False)
    res = compare_maps(sim, meas, fit_energy_shift=True, fit_time_zero=True)
    assert res.energy_shift == pytest.approx(-0.1, abs=0.03)
    assert res.time_zero == pytest.approx(8.0, abs=6.0)
    assert res.r2 > compare_maps(sim, meas).r2
    assert res.cosine > 0.9


def test_compare_reports_intervals_that_cover_the_planted_values():
    e = np.linspace(0.0, 2.0, 201)
    d = np.arange(-100.0, 300.0, 2.0)
    sim = TRPESMap(kinetic_energies=e, delays=d, intensity=_analytic_map(e, d))
    em = np.linspace(0.1, 1.9, 91)
    dm = np.arange(-80.0, 280.0, 4.0)
    # planted: scale 3, shift 0.1 eV, time zero 12 fs (computed independently (not
    # published)); Gaussian noise 0.3 of known sigma (large against the bilinear-resampling
    # error of the model, which these intervals do not see)
    clean = _analytic_map(em, dm, e0=1.1, t0=12.0, scale=3.0)
    noisy = clean + 0.3 * np.random.default_rng(4).standard_normal(clean.shape)
    meas = TRPESMap(kinetic_energies=em, delays=dm, intensity=noisy)
    res = compare_maps(sim, meas, fit_energy_shift=True, fit_time_zero=True)
    for name, true in (("scale", 3.0), ("energy_shift", 0.1), ("time_zero", 12.0)):
        lo, hi = res.intervals[name]
        assert lo < getattr(res, name) < hi
        assert lo <= true <= hi, (name, lo, hi)
    assert set(compare_maps(sim, meas).intervals) == {"scale"}
    assert res.model.params["intervals"]["time_zero"] == list(res.intervals["time_zero"])
