"""compute_trpes(exclude=): exclusions as a mask (weight 0, not alive) equal the map of a copy.

Check values: the map of ``ens.without(ids)`` computed by the same public function
(computed independently (not published)): leaving a trajectory out by weight 0 and by
removing its rows must give the same normalised average, the doorway-window ensemble
average being a weighted mean over trajectories (J. Chem. Phys. 2004, "Classical
doorway-window approximation for time-resolved pump-probe spectra").
"""

from __future__ import annotations

import numpy as np
import pytest

from ensemblelab.compute.spectroscopy import compute_trpes
from ensemblelab.compute.spectroscopy.pulses import GaussianPulse
from ensemblelab.errors import SchemaError
from ensemblelab.testing import make_toy_ensemble

KW = {"probe": GaussianPulse(photon_energy=5.0, fwhm=30.0), "progress": False,
      "kinetic_energies": np.linspace(0.0, 2.5, 101), "delays": np.arange(-50.0, 301.0, 10.0)}


@pytest.mark.parametrize("seed,ragged,excluded", [(3, True, [0, 5, 6, 17]),
                                                  (11, False, [29]), (4, True, [])])
def test_exclude_mask_equals_the_map_of_the_copy(seed, ragged, excluded):
    ens = make_toy_ensemble(30, seed=seed, ragged=ragged)
    pump = GaussianPulse(photon_energy=5.0, fwhm=25.0)
    a = compute_trpes(ens, exclude=excluded, pump=pump, decompose="neutral", weights="uniform",
                      **KW)
    b = compute_trpes(ens.without(excluded), pump=pump, decompose="neutral",
                      weights="uniform", **KW)
    scale = np.abs(b.intensity).max()
    # same sums in another order: agreement to rounding (common practice: 1e-12 relative)
    np.testing.assert_allclose(a.intensity, b.intensity, rtol=0, atol=1e-12 * scale)
    for k in b.components:
        np.testing.assert_allclose(a.components[k], b.components[k], rtol=0,
                                   atol=1e-12 * scale)
    np.testing.assert_allclose(a.alive, b.alive, atol=1e-12)
    np.testing.assert_allclose(a.alive_count, b.alive_count, atol=1e-12)
    assert a.params["n_trajectories"] == 30 - len(excluded)
    assert a.params["excluded"] == sorted(excluded)


def test_exclude_changes_the_map_and_refuses_non_integers():
    ens = make_toy_ensemble(12, seed=2)
    full = compute_trpes(ens, weights="uniform", **KW)
    ids = ens.trajectories["traj"].to_numpy()[:6].tolist()
    part = compute_trpes(ens, exclude=ids, weights="uniform", **KW)
    assert not np.allclose(full.intensity, part.intensity)  # a mask that does something
    with pytest.raises(SchemaError, match="integer trajectory ids"):
        compute_trpes(ens, exclude=[1.5], weights="uniform", **KW)
