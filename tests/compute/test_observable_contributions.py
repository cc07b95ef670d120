"""Per-snapshot terms of a band of a scattering or absorption map add up to the band.

The check is the map itself (an exact additive decomposition, derived); no external
numbers.
"""

from __future__ import annotations

import numpy as np
import pytest

from ensemblelab import (
    Ensemble,
    GaussianPulse,
    compute_scattering,
    compute_transient_absorption,
    observable_contributions,
)
from ensemblelab.errors import SchemaError
from ensemblelab.testing import make_toy_ensemble

PUMP = GaussianPulse(photon_energy=4.0, fwhm=20.0)
PROBE = GaussianPulse(photon_energy=5.0, fwhm=25.0)


def _region(m, axis, a_rng, d_rng, data):
    a = (axis >= a_rng[0]) & (axis <= a_rng[1])
    d = (m.delays >= d_rng[0]) & (m.delays <= d_rng[1])
    return data[np.ix_(d, a)].sum()


@pytest.mark.parametrize("convolve", [True, False])
def test_scattering_terms_add_up_to_the_band(convolve):
    pytest.importorskip("xraydb")
    ens = make_toy_ensemble(10, t_max=80.0, ragged=True, seed=4)
    m = compute_scattering(ens, q=np.linspace(0.5, 8.0, 31), delays=np.arange(-20.0, 81.0, 5.0),
                           pump=PUMP, probe=PROBE, convolve=convolve, excitation_fraction=0.3)
    kw = {"axis_range": (2.0, 5.0), "delay_range": (10.0, 50.0)}
    table = observable_contributions(ens, m, **kw)
    want = _region(m, m.q, (2.0, 5.0), (10.0, 50.0), m.percent_difference)
    assert table["value"].sum() == pytest.approx(want, rel=1e-9)
    assert table.attrs["total"] == pytest.approx(want, rel=1e-9)
    assert table["share"].sum() == pytest.approx(1.0)
    by_traj = observable_contributions(ens, m, group_by="traj", **kw)
    assert by_traj["value"].sum() == pytest.approx(want, rel=1e-9)
    by_state = observable_contributions(ens, m, group_by="active", **kw)
    for _, row in by_state.iterrows():
        comp = m.components[ens.state_labels[int(row["group"])]]
        assert row["value"] == pytest.approx(_region(m, m.q, (2.0, 5.0), (10.0, 50.0), comp),
                                             rel=1e-8, abs=1e-12)


def test_absorption_terms_add_up_to_the_band():
    ens = make_toy_ensemble(10, t_max=80.0, ragged=True, seed=4)
    ts = np.random.default_rng(1).uniform(0.0, 0.3, (ens.n_snapshots, 3, 3))
    ens = Ensemble.from_arrays(traj=ens.snapshots["traj"], time=ens.snapshots["time"],
                               active=ens.snapshots["active"], geometries=ens.geometries,
                               symbols=ens.symbols, energies=ens.energies,
                               transition_strengths=ts)
    m = compute_transient_absorption(ens, probe=PROBE, pump=PUMP,
                                     photon_energies=np.linspace(0.5, 5.0, 46),
                                     delays=np.arange(-20.0, 81.0, 5.0))
    kw = {"axis_range": (1.0, 4.0), "delay_range": (-10.0, 60.0)}
    table = observable_contributions(ens, m, **kw)
    want = _region(m, m.photon_energies, (1.0, 4.0), (-10.0, 60.0), m.intensity)
    assert table["value"].sum() == pytest.approx(want, rel=1e-9)
    gsb = _region(m, m.photon_energies, (1.0, 4.0), (-10.0, 60.0), m.components["GSB"])
    assert table["bleach"].sum() == pytest.approx(gsb, rel=1e-9)
    with pytest.raises(SchemaError, match="no grid point"):
        observable_contributions(ens, m, axis_range=(10.0, 11.0), delay_range=(0.0, 10.0))
