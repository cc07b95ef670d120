"""Band contributions: exact decomposition of a map region into snapshots."""

from __future__ import annotations

import numpy as np
import pytest
from test_trpes_fixtures import random_ensemble

from ensemblelab.compute.spectroscopy import compute_trpes, contributions
from ensemblelab.compute.spectroscopy.pulses import GaussianPulse
from ensemblelab.errors import SchemaError
from ensemblelab.io.maps import load_map, save_map

PROBE = GaussianPulse(photon_energy=5.0, fwhm=30.0)
PUMP = GaussianPulse(photon_energy=4.0, fwhm=30.0)


@pytest.fixture(scope="module")
def ens_and_map():
    ens = random_ensemble(6, seed=21, n_steps=60, dt=1.0)
    e = np.linspace(0.0, 4.0, 801)
    d = np.arange(-60.0, 80.0, 0.5)
    m = compute_trpes(ens, probe=PROBE, pump=PUMP, kinetic_energies=e, delays=d, progress=False)
    return ens, m


def _region_integral(m, er, dr):
    e, d = m.kinetic_energies, m.delays
    se = (e >= er[0]) & (e <= er[1])
    sd = (d >= dr[0]) & (d <= dr[1])
    sub = m.intensity[np.ix_(sd, se)]
    return np.trapezoid(np.trapezoid(sub, e[se], axis=1), d[sd])


@pytest.mark.parametrize(("er", "dr"), [((0.5, 1.5), (0.0, 30.0)), ((1.0, 3.5), (-40.0, -5.0)),
                                        ((0.0, 4.0), (-60.0, 50.0))])
def test_contributions_total_equals_map_integral(ens_and_map, er, dr):
    ens, m = ens_and_map
    df = contributions(ens, m, energy_range=er, delay_range=dr)
    assert df["share"].sum() == pytest.approx(1.0, abs=1e-12)
    assert df["intensity"].sum() == pytest.approx(df.attrs["total"], rel=1e-12)
    # the region total is the integral of the map (trapezoid on a 5 meV x 0.5 fs grid)
    assert df.attrs["total"] == pytest.approx(_region_integral(m, er, dr), rel=2e-3)
    assert np.all(np.diff(df["intensity"].to_numpy()) <= 0)  # sorted descending
    assert {"snapshot", "traj", "time", "active", "share", "intensity"} <= set(df.columns)


def test_contributions_negative_delays_come_from_early_snapshots(ens_and_map):
    ens, m = ens_and_map
    df = contributions(ens, m, energy_range=(0.0, 4.0), delay_range=(-40.0, -20.0))
    # only the convolution puts signal there: snapshots near t = 0 dominate
    top = df.head(10)
    assert top["time"].max() <= 20.0
    assert df["time"].min() == 0.0


def test_contributions_by_traj_and_column_group_the_snapshots(ens_and_map):
    ens, m = ens_and_map
    kw = dict(energy_range=(0.5, 2.5), delay_range=(10.0, 40.0))
    snap = contributions(ens, m, **kw)
    per_traj = contributions(ens, m, group_by="traj", **kw)
    expected = snap.groupby("traj")["intensity"].sum()
    got = per_traj.set_index("traj")["intensity"]
    np.testing.assert_allclose(got.loc[expected.index], expected, rtol=1e-12)
    by_state = contributions(ens, m, group_by="active", **kw)
    assert by_state["share"].sum() == pytest.approx(1.0, abs=1e-12)


def test_contributions_single_snapshot_analytic():
    from ensemblelab.data.ensemble import Ensemble

    ens = Ensemble.from_arrays(traj=[0, 0], time=[0.0, 1.0], active=[1, 1],
                               geometries=np.zeros((2, 1, 3)), symbols=["H"],
                               energies=[[0.0, 0.0], [0.0, 0.0]], cation_energies=[[4.0], [9.0]],
                               dyson=[[1.0], [1.0]])
    m = compute_trpes(ens, probe=PROBE, kinetic_energies=np.linspace(0, 2, 11), delays=[0.0, 1.0],
                      convolve=False, progress=False)
    df = contributions(ens, m, energy_range=(0.0, 2.0), delay_range=(0.0, 1.0))
    # only snapshot 0 has an open channel; its hat over [0, 1] integrates to 1/2 fs and its
    # Gaussian (centre 1 eV, FWHM 0.0608 eV) lies entirely inside [0, 2] eV (analytic)
    assert list(df["snapshot"]) == [0]
    assert df["intensity"].iloc[0] == pytest.approx(0.5, rel=1e-12)


def test_contributions_reject_bad_ranges(ens_and_map):
    ens, m = ens_and_map
    with pytest.raises(SchemaError, match="low < high"):
        contributions(ens, m, energy_range=(2.0, 1.0), delay_range=(0.0, 10.0))
    with pytest.raises(SchemaError, match="'group_by' parameter"):
        contributions(ens, m, energy_range=(1.0, 2.0), delay_range=(0.0, 10.0), group_by="nope")


def test_contributions_rebuilds_from_params(ens_and_map):
    ens, m = ens_and_map
    fresh = type(m)(kinetic_energies=m.kinetic_energies, delays=m.delays, intensity=m.intensity,
                    alive=m.alive, params=m.params)  # no cached model
    kw = dict(energy_range=(0.5, 2.5), delay_range=(10.0, 40.0))
    a = contributions(ens, m, **kw)
    b = contributions(ens, fresh, **kw)
    np.testing.assert_allclose(a["intensity"].to_numpy(), b["intensity"].to_numpy(), rtol=1e-12)


@pytest.mark.parametrize("which", ["hydrogenic-zeta", "anion-s-wave", "table-per-channel",
                                   "table-all"])
def test_contributions_rebuild_keeps_cross_section_parameters(ens_and_map, which, tmp_path):
    # a map saved to disk and loaded back has no cached model; the rebuilt sticks must use
    # the same cross section *with its parameters* (a default exponent or partial wave gives
    # other numbers: computed independently (not published), e.g. zeta = 2 vs sqrt(2 IP))
    from ensemblelab.compute.spectroscopy.cross_sections import (
        AnionThresholdLaw,
        DysonTimes,
        HydrogenicPWA,
    )

    ens, _ = ens_and_map
    cs = {"hydrogenic-zeta": HydrogenicPWA(zeta=2.0),
          "anion-s-wave": AnionThresholdLaw(l=0),
          "table-per-channel": DysonTimes({k: ([0.0, 1.0, 4.0], [0.2 + k, 1.0, 0.5])
                                           for k in range(3)}),
          "table-all": DysonTimes(([0.0, 4.0], [1.0, 0.1]))}[which]
    m = compute_trpes(ens, probe=PROBE, pump=PUMP, kinetic_energies=np.linspace(0.0, 4.0, 201),
                      delays=np.arange(-20.0, 60.0, 1.0), cross_section=cs, progress=False)
    save_map(m, tmp_path / "m.npz")
    loaded = load_map(tmp_path / "m.npz")
    kw = dict(energy_range=(0.3, 2.5), delay_range=(0.0, 40.0))
    a = contributions(ens, m, **kw)
    b = contributions(ens, loaded, **kw)
    assert a.attrs["total"] > 0
    assert b.attrs["total"] == pytest.approx(a.attrs["total"], rel=1e-12)
    np.testing.assert_allclose(b["intensity"].to_numpy(), a["intensity"].to_numpy(),
                               rtol=1e-12, atol=0)


def test_contributions_rebuild_refuses_a_user_function(ens_and_map):
    ens, _ = ens_and_map
    m = compute_trpes(ens, probe=PROBE, pump=PUMP, kinetic_energies=np.linspace(0.0, 4.0, 101),
                      delays=np.arange(-20.0, 60.0, 2.0), progress=False,
                      cross_section=lambda e, ch: 1.0 + 0.0 * e)
    fresh = type(m)(kinetic_energies=m.kinetic_energies, delays=m.delays, intensity=m.intensity,
                    alive=m.alive, params=m.params)
    with pytest.raises(SchemaError, match="cannot be rebuilt"):
        contributions(ens, fresh, energy_range=(0.5, 2.0), delay_range=(0.0, 30.0))


def test_contributions_top_keeps_strongest_rows_and_region_total():
    # the top-N view must be the head of the full sorted table (computed independently
    # from the full table, not published)
    from ensemblelab import GaussianPulse, compute_trpes, contributions
    from ensemblelab.testing import make_toy_ensemble

    ens = make_toy_ensemble(30, seed=4, t_max=200.0)
    m = compute_trpes(ens, probe=GaussianPulse(photon_energy=5.0, fwhm=30.0),
                      kinetic_energies=np.linspace(0.0, 2.0, 81),
                      delays=np.arange(-40.0, 201.0, 5.0),
                      progress=False)
    full = contributions(ens, m, energy_range=(0.3, 1.7), delay_range=(20.0, 120.0))
    head = contributions(ens, m, energy_range=(0.3, 1.7), delay_range=(20.0, 120.0), top=25)
    assert len(head) == 25
    np.testing.assert_allclose(head["intensity"].to_numpy(), full["intensity"].to_numpy()[:25],
                               rtol=1e-12)
    assert head.attrs["total"] == pytest.approx(full.attrs["total"], rel=1e-12)
    assert head["share"].sum() < 1.0


def test_region_intensity_is_the_unsorted_contributions_column(ens_and_map):
    from ensemblelab.compute.spectroscopy import region_intensity

    ens, m = ens_and_map
    kw = dict(energy_range=(0.5, 2.5), delay_range=(10.0, 40.0))
    x = region_intensity(ens, m, **kw)
    full = contributions(ens, m, **kw)  # computed independently (not published)
    assert x.shape == (ens.n_snapshots,) and np.all(x >= 0)
    rows = np.flatnonzero(np.isin(ens.snapshots["snapshot"], full["snapshot"]))
    expect = np.zeros(ens.n_snapshots)
    order = np.argsort(ens.snapshots["snapshot"].to_numpy()[rows])
    expect[rows[order]] = full.sort_values("snapshot")["intensity"].to_numpy()
    np.testing.assert_allclose(x, expect, rtol=1e-12, atol=0.0)
    assert x.sum() == pytest.approx(full.attrs["total"], rel=1e-12)
    with pytest.raises(SchemaError, match="low < high"):
        region_intensity(ens, m, energy_range=(2.0, 1.0), delay_range=(0.0, 1.0))


@pytest.mark.parametrize("split", [0.52, 1.7, 3.3])
def test_region_intensity_adds_over_adjacent_windows(ens_and_map, split):
    # integrals over adjacent windows add up (analytic); a narrow and a wide window
    # take different error-function paths (one or two terms per edge)
    from ensemblelab.compute.spectroscopy import region_intensity

    ens, m = ens_and_map
    whole = region_intensity(ens, m, energy_range=(0.5, 3.5), delay_range=(-20.0, 50.0))
    parts = (region_intensity(ens, m, energy_range=(0.5, split), delay_range=(-20.0, 50.0))
             + region_intensity(ens, m, energy_range=(split, 3.5), delay_range=(-20.0, 50.0)))
    np.testing.assert_allclose(parts, whole, rtol=1e-11, atol=1e-14 * whole.max())
    later = (region_intensity(ens, m, energy_range=(0.5, 3.5), delay_range=(-20.0, 10.0))
             + region_intensity(ens, m, energy_range=(0.5, 3.5), delay_range=(10.0, 50.0)))
    np.testing.assert_allclose(later, whole, rtol=1e-11, atol=1e-14 * whole.max())
