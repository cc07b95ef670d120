"""TRPES figures render headless and export to PNG, SVG and PDF."""

from __future__ import annotations

import numpy as np
import pytest

from ensemblelab.compute.spectroscopy import compute_trpes
from ensemblelab.compute.spectroscopy.compare import compare_maps
from ensemblelab.compute.spectroscopy.pulses import GaussianPulse
from ensemblelab.plotting.spectra import (
    plot_components,
    plot_cuts,
    plot_map,
    plot_residual,
    savefig,
)
from ensemblelab.testing import make_toy_ensemble


@pytest.fixture(scope="module")
def toy_map():
    ens = make_toy_ensemble(20, seed=2, t_max=200.0, dt=2.0)
    return compute_trpes(ens, probe=GaussianPulse(photon_energy=5.0, fwhm=30.0),
                         pump=GaussianPulse(photon_energy=4.0, fwhm=30.0),
                         kinetic_energies=np.linspace(0, 2, 81), delays=np.arange(-50, 200, 5.0),
                         decompose="neutral", progress=False)


@pytest.mark.parametrize("suffix", [".png", ".svg", ".pdf"])
def test_plot_map_exports(tmp_path, toy_map, suffix):
    fig = plot_map(toy_map)
    path = savefig(fig, tmp_path / f"map{suffix}")
    data = path.read_bytes()
    magic = {".png": b"\x89PNG", ".svg": b"<?xml", ".pdf": b"%PDF"}[suffix]
    assert data.startswith(magic) and len(data) > 1000


def test_plot_components_share_one_colour_scale(toy_map):
    fig = plot_components(toy_map)
    from matplotlib.collections import QuadMesh

    meshes = [c for ax in fig.axes if ax.get_title() for c in ax.collections
              if isinstance(c, QuadMesh)]  # panels only (the colour bar has no title)
    assert len(meshes) == 1 + len(toy_map.components)
    assert len({(m.norm.vmin, m.norm.vmax) for m in meshes}) == 1
    assert meshes[0].norm.vmax == pytest.approx(float(toy_map.intensity.max()))


def test_plot_cuts_and_residual(tmp_path, toy_map):
    fig = plot_cuts(toy_map, delays=[0, 100], energies=[0.5, 1.5], components=True)
    line = fig.axes[0].lines[0]
    np.testing.assert_allclose(line.get_ydata(), toy_map.intensity[10])  # delay 0 fs
    res = compare_maps(toy_map, toy_map.replace(intensity=1.5 * toy_map.intensity))
    fig2 = plot_residual(res.measured, res.model, res.residual)
    savefig(fig2, tmp_path / "res.png")
    with pytest.raises(ValueError, match="at least one delay"):
        plot_cuts(toy_map)
