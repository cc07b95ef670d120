"""Scattering and transient-absorption figures render headless, with labelled axes and a
zero-centred colour scale (checked against the data; no external numbers)."""

from __future__ import annotations

import numpy as np
import pytest

from ensemblelab import (
    Ensemble,
    GaussianPulse,
    compute_scattering,
    compute_transient_absorption,
)
from ensemblelab.plotting.observables import (
    plot_absorption,
    plot_observable_cuts,
    plot_scattering,
)
from ensemblelab.plotting.populations import savefig
from ensemblelab.testing import make_toy_ensemble

PUMP = GaussianPulse(photon_energy=4.0, fwhm=20.0)
PROBE = GaussianPulse(photon_energy=5.0, fwhm=20.0)


@pytest.fixture(scope="module")
def maps():
    pytest.importorskip("xraydb")
    ens = make_toy_ensemble(8, t_max=60.0, seed=1)
    sc = compute_scattering(ens, kind="electron", q=np.linspace(0.5, 10.0, 40),
                            delays=np.arange(-20.0, 61.0, 5.0), pump=PUMP, probe=PROBE)
    ts = np.random.default_rng(2).uniform(0.0, 0.2, (ens.n_snapshots, 3, 3))
    ens2 = Ensemble.from_arrays(traj=ens.snapshots["traj"], time=ens.snapshots["time"],
                                active=ens.snapshots["active"], geometries=ens.geometries,
                                symbols=ens.symbols, energies=ens.energies,
                                transition_strengths=ts)
    ta = compute_transient_absorption(ens2, probe=PROBE, pump=PUMP,
                                      photon_energies=np.linspace(0.5, 6.0, 60),
                                      delays=np.arange(-20.0, 61.0, 5.0))
    return sc, ta


@pytest.mark.parametrize("quantity", ["percent_difference", "delta_sm", "delta_pdf",
                                      "intensity"])
def test_scattering_figures_export(tmp_path, maps, quantity):
    fig = plot_scattering(maps[0], quantity=quantity)
    ax = fig.axes[0]
    assert ax.get_ylabel() == "delay / fs"
    assert ("r" in ax.get_xlabel()) == (quantity == "delta_pdf")
    data = savefig(fig, tmp_path / f"{quantity}.png").read_bytes()
    assert data.startswith(b"\x89PNG")


def test_difference_colour_scale_is_centred_on_zero(maps):
    sc, ta = maps
    for fig, data in ((plot_scattering(sc), sc.percent_difference),
                      (plot_absorption(ta, component="GSB"), ta.components["GSB"])):
        mesh = fig.axes[0].collections[0]
        lim = np.abs(data).max()
        assert mesh.norm.vmin == pytest.approx(-lim) and mesh.norm.vmax == pytest.approx(lim)
        assert mesh.norm.vcenter == 0.0


def test_cuts_draw_total_and_components(maps):
    sc, ta = maps
    fig = plot_observable_cuts(ta, delays=[0.0, 40.0])
    assert len(fig.axes[0].lines) == 2 * (1 + len(ta.components)) + 1  # + zero line
    fig = plot_observable_cuts(sc, delays=[30.0], components=False)
    y = fig.axes[0].lines[0].get_ydata()
    assert np.array_equal(y, sc.percent_difference[np.argmin(np.abs(sc.delays - 30.0))])
