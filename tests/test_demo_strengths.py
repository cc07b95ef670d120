"""Invented demo transition strengths: the relation f = (2/3) dE |mu|^2 holds and the
initial strengths are reproduced (checks against the length-gauge relation, from memory,
and the ensemble's own t = 0 data)."""

from __future__ import annotations

import numpy as np
import pytest

from ensemblelab import GaussianPulse, compute_transient_absorption
from ensemblelab.demo import make_ensemble
from ensemblelab.demo.strengths import demo_transition_strengths, with_demo_transition_strengths
from ensemblelab.units import HARTREE_EV


@pytest.fixture(scope="module")
def demo():
    return make_ensemble(n_trajectories=8, t_max=60.0, faults=False)


def test_initial_strengths_are_reproduced_at_t0(demo):
    f = demo_transition_strengths(demo)
    first = np.r_[0, np.flatnonzero(np.diff(demo.snapshots["traj"].to_numpy())) + 1]
    # at the first snapshot f_0i equals the stored t = 0 oscillator strengths when the
    # stored excitation energies are the snapshot's gaps (computed independently here)
    gaps = demo.energies[first] - demo.energies[first, :1]
    same = np.isclose(gaps, demo.excitation_energies, atol=1e-9)
    assert same[:, 1:].any()
    assert np.allclose(f[first, 0, :][same], demo.oscillator_strengths[same], rtol=1e-6)


def test_strengths_follow_the_gaps(demo):
    f = demo_transition_strengths(demo, mu2_excited=0.7)
    e = demo.energies / HARTREE_EV
    # f_12 = (2/3) |E_2 - E_1| |mu_12|^2 (length-gauge relation, from memory)
    assert np.allclose(f[:, 1, 2], (2 / 3) * np.abs(e[:, 2] - e[:, 1]) * 0.7, rtol=1e-12)
    assert np.allclose(f, f.transpose(0, 2, 1))
    assert np.all(f >= 0)


def test_demo_gives_a_transient_absorption_map(demo):
    ens = with_demo_transition_strengths(demo)
    assert "invented" in ens.metadata["transition_strengths"]
    m = compute_transient_absorption(
        ens, probe=GaussianPulse(photon_energy=3.0, fwhm=30.0),
        pump=GaussianPulse(photon_energy=4.75, fwhm=25.0),
        photon_energies=np.linspace(0.5, 6.0, 111), delays=np.arange(-20.0, 61.0, 10.0))
    assert m.components["GSB"].min() < 0 and m.components["SE"].min() < 0
    assert np.allclose(m.component_sum(), m.intensity, atol=1e-14)
