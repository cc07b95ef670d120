"""Headless figures for populations, kinetic fits and global analysis; PNG/SVG/PDF export."""

from __future__ import annotations

import importlib.util
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from matplotlib.collections import PolyCollection, QuadMesh

from ensemblelab.compute.kinetics.global_fit import decay_profiles, fit_global
from ensemblelab.compute.kinetics.populations import populations
from ensemblelab.compute.kinetics.rates import fit_kinetics
from ensemblelab.plotting.populations import (
    plot_das,
    plot_global_fit,
    plot_populations,
    plot_residual_map,
    plot_sas,
    savefig,
)
from ensemblelab.testing import make_toy_ensemble

# file signatures (common practice): PNG magic, SVG root element, PDF header
MAGIC = {".png": b"\x89PNG\r\n\x1a\n", ".pdf": b"%PDF-"}


@pytest.fixture(scope="module")
def global_result():
    e = np.linspace(0, 2, 31)
    d = np.arange(-50.0, 400.0, 10.0)
    das = np.vstack([np.exp(-((e - 1.2) / 0.2) ** 2), -np.exp(-((e - 0.6) / 0.2) ** 2),
                     np.exp(-((e - 0.6) / 0.2) ** 2)])
    s = decay_profiles(d, [40.0, 150.0], irf_fwhm=40.0) @ das
    return fit_global(energies=e, delays=d, intensity=s, n_components=2, irf_fwhm=40.0,
                      scheme="sequential")


def test_plot_populations_bands_and_fit(tmp_path):
    ens = make_toy_ensemble(60, seed=2)
    pop = populations(ens)
    fit = fit_kinetics(ens, interval="bootstrap", n_boot=50)
    fig = plot_populations(pop, fit=fit)
    ax = fig.axes[0]
    bands = [c for c in ax.collections if isinstance(c, PolyCollection)]
    assert len(bands) == 3  # one interval band per state
    labels = [ln.get_label() for ln in ax.get_lines()]
    assert labels[:3] == ["S0", "S1", "S2"]
    # the fit is named by its scheme and state; the toy starts every trajectory on S2
    # (make_toy_ensemble's construction), so S2 is the decaying state
    assert fit.states == (2,)
    fit_labels = [lb for lb in labels if lb.startswith("fit:")]
    assert fit_labels == ["fit: single-exponential decay of S2\n"
                          f"(tau = {fit.params['tau']:.3g} fs)"]
    for suffix in (".png", ".svg", ".pdf"):
        out = savefig(fig, tmp_path / f"pop{suffix}")
        head = out.read_bytes()[:200]
        if suffix == ".svg":
            assert b"<svg" in out.read_bytes()
        else:
            assert head.startswith(MAGIC[suffix])
    assert not list(tmp_path.glob(".*.tmp"))  # atomic write leaves no temp file


def test_plot_das_sas_and_residual_map(global_result, tmp_path):
    fig = plot_das(global_result)
    assert len(fig.axes[0].get_lines()) == 3 + 1  # three DAS + zero line
    fig2 = plot_sas(global_result)
    assert [ln.get_label() for ln in fig2.axes[0].get_lines()][:3] == [
        "species A", "species B", "species C"]
    fig3 = plot_residual_map(global_result)
    mesh = [c for c in fig3.axes[0].collections if isinstance(c, QuadMesh)]
    assert len(mesh) == 1
    lo, hi = mesh[0].get_clim()
    assert lo == pytest.approx(-hi)  # symmetric colour scale
    fig4 = plot_global_fit(global_result)
    assert len(fig4.axes) >= 3
    savefig(fig4, tmp_path / "global.png")


def test_savefig_rejects_unknown_suffix(tmp_path):
    fig = plot_populations(populations(make_toy_ensemble(5)))
    with pytest.raises(ValueError, match="suffix"):
        savefig(fig, tmp_path / "x.jpeg")


def test_plotting_does_not_import_pyplot():
    code = ("import sys, ensemblelab.plotting.populations as p; "
            "print('matplotlib.pyplot' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True)
    assert out.stdout.strip() == "False"


@pytest.mark.filterwarnings("ignore::ensemblelab.errors.NumericalWarning")
def test_benchmark_populations_smoke():
    path = Path(__file__).resolve().parents[1] / "benchmarks" / "bench_populations.py"
    spec = importlib.util.spec_from_file_location("bench_populations", path)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    figures = mod.run(n_traj=20, n_steps=30, n_boot=12, n_loop=3)
    assert figures["max_abs_diff"] < 1e-12
    assert figures["ratio_loop_over_vectorised"] > 0
    assert 0 < figures["fit_tau1"] < 1e6
