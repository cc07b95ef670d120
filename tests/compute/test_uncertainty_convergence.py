"""Convergence with the number of trajectories.

Check values: the standard error of a mean of N independent draws is sigma / sqrt(N)
(from memory; the central limit theorem), and a subset drawn without replacement from a
finite population has variance sigma^2 (1/N - 1/N_full) (from memory; the
finite-population correction). Tolerances are computed independently (not published)
from the spread of the estimates.
"""

from __future__ import annotations

import numpy as np
import pytest

import ensemblelab
from ensemblelab.compute.spectroscopy import GaussianPulse, compute_trpes
from ensemblelab.compute.uncertainty import convergence
from ensemblelab.errors import SchemaError
from ensemblelab.plotting.convergence import plot_convergence
from ensemblelab.testing import make_toy_ensemble


@pytest.fixture(scope="module")
def iid_case():
    ens = make_toy_ensemble(400, seed=2, dt=50.0, t_max=100.0)
    vals = np.random.default_rng(0).standard_normal(400)
    ids = ens.trajectories["traj"].to_numpy()

    def mean_value(e):
        return vals[np.isin(ids, e.trajectories["traj"].to_numpy())].mean()

    return ens, vals, mean_value


def test_convergence_of_a_mean_follows_one_over_sqrt_n(iid_case):
    ens, vals, mean_value = iid_case
    r = convergence(ens, mean_value, sizes=[20, 60, 200], n_nestings=150,
                    target=0.05, random_state=1)
    assert r.exponent == pytest.approx(-0.5, abs=0.1)
    sigma = vals.std(ddof=1)
    assert r.amplitude_sqrt == pytest.approx(sigma, rel=0.1)
    # sigma^2 / target^2 trajectories for the target (from memory)
    assert r.n_needed == pytest.approx(sigma**2 / 0.05**2, rel=0.2)
    assert r.error_full == pytest.approx(sigma / np.sqrt(400), rel=0.1)
    assert "large enough" in r.verdict()


def test_convergence_of_populations_map_and_lifetime():
    ens = make_toy_ensemble(160, seed=2, dt=10.0)
    pop = convergence(ens, "populations", target=0.01)
    assert -0.9 < pop.exponent < -0.3
    assert pop.n_needed > 160 and "too small" in pop.verdict()
    m = compute_trpes(ens, probe=GaussianPulse(photon_energy=5.0, fwhm=30.0),
                      kinetic_energies=np.linspace(0, 2, 41),
                      delays=np.arange(-40.0, 301.0, 20.0), progress=False)
    mp = convergence(ens, "map", trpes_map=m, sizes=[20, 40, 80], n_nestings=4)
    assert -0.9 < mp.exponent < -0.3 and mp.target is None and mp.n_needed is None
    life = convergence(ens, "lifetime", sizes=[20, 40, 80], n_nestings=4)
    assert life.table["error"].iloc[0] > life.table["error"].iloc[-1]


def test_convergence_is_exported_and_plotted(tmp_path):
    assert ensemblelab.convergence is convergence
    ens = make_toy_ensemble(60, seed=1, dt=20.0)
    r = convergence(ens, sizes=[10, 20, 40], n_nestings=3, target=0.02)
    fig = plot_convergence(r)
    ax = fig.axes[0]
    assert ax.get_xscale() == "log" and ax.get_yscale() == "log"
    assert len(ax.lines) >= 4  # squares, fit, 1/sqrt(N), this ensemble, target
    from ensemblelab.plotting.populations import savefig

    out = savefig(fig, tmp_path / "conv.png")
    assert out.stat().st_size > 0


def test_convergence_bad_arguments():
    ens = make_toy_ensemble(20, seed=1, dt=20.0)
    with pytest.raises(SchemaError, match="'sizes' parameter"):
        convergence(ens, sizes=[5, 20])
    with pytest.raises(SchemaError, match="'quantity' parameter"):
        convergence(ens, "spectrum")
    with pytest.raises(SchemaError, match="needs the map"):
        convergence(ens, "map")
