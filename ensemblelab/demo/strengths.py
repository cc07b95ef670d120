"""Invented transition strengths for the demo ensemble (for transient absorption).

**Invented, for demonstration only.** The demo's trajectories store their initial
excitation data (``excitation_energies``, ``oscillator_strengths`` at t = 0) but no
strengths along the way. This module adds per-snapshot oscillator strengths between the
neutral states from a simple invented model, generated on load (the committed demo files
are not changed):

* Condon approximation per trajectory: the squared transition dipole ``|mu_0i|^2`` of
  each trajectory is the one its initial conditions had, ``3 f_0i / (2 dE_0i)`` (atomic
  units), kept for the whole trajectory;
* between excited states i, j > 0 an invented constant ``|mu_ij|^2`` (default 1.2
  e^2 bohr^2 for S1-S2);
* ``f_ij(t) = (2/3) |E_j(t) - E_i(t)| |mu_ij|^2`` with energies in hartree (the usual
  length-gauge relation, from memory), so the strengths follow the gaps along the
  trajectory.

Ensembles without initial excitation data get the invented constant for every pair.
"""

from __future__ import annotations

import numpy as np

from ..data.ensemble import Ensemble
from ..units import HARTREE_EV

__all__ = ["demo_transition_strengths", "with_demo_transition_strengths", "INVENTED_MU2"]

#: invented |mu_ij|^2 (e^2 bohr^2) between excited states, and the fallback for any pair
INVENTED_MU2 = 1.2


def demo_transition_strengths(ens: Ensemble, *, mu2_excited: float = INVENTED_MU2
                              ) -> np.ndarray:
    """Invented oscillator strengths between neutral states at every snapshot.

    Parameters
    ----------
    ens : Ensemble
        Needs neutral ``energies``; uses ``excitation_energies`` and
        ``oscillator_strengths`` (t = 0) when present.
    mu2_excited : float
        Invented ``|mu_ij|^2`` (e^2 bohr^2) between excited states.

    Returns
    -------
    ndarray, shape (n_snapshots, n_states, n_states)
        Symmetric, zero diagonal, dimensionless.

    Examples
    --------
    >>> from ensemblelab.testing import make_toy_ensemble
    >>> f = demo_transition_strengths(make_toy_ensemble(2, t_max=5.0))
    >>> f.shape, bool(np.allclose(f, f.transpose(0, 2, 1)))
    ((12, 3, 3), True)
    """
    n_states = ens.n_states
    mu2 = np.full((ens.n_trajectories, n_states, n_states), float(mu2_excited))
    exc, osc = ens.excitation_energies, ens.oscillator_strengths
    if exc is not None and osc is not None:
        with np.errstate(divide="ignore", invalid="ignore"):
            m0 = np.where(exc > 0, 1.5 * osc / (exc / HARTREE_EV), 0.0)
        mu2[:, 0, :] = m0
        mu2[:, :, 0] = m0
    mu2_s = mu2[ens.traj_index]  # per snapshot
    e = np.asarray(ens.energies, dtype=float) / HARTREE_EV
    gap = np.abs(e[:, None, :] - e[:, :, None])
    f = (2.0 / 3.0) * gap * mu2_s
    idx = np.arange(n_states)
    f[:, idx, idx] = 0.0
    return f


def with_demo_transition_strengths(ens: Ensemble, *, mu2_excited: float = INVENTED_MU2
                                   ) -> Ensemble:
    """A copy of `ens` with :func:`demo_transition_strengths` added (labelled invented).

    ``metadata["transition_strengths"]`` says where they come from.
    """
    meta = dict(ens.metadata)
    meta["transition_strengths"] = (
        "invented (ensemblelab.demo.strengths): Condon approximation per trajectory from "
        f"the initial oscillator strengths; |mu_ij|^2 = {mu2_excited:g} e^2 bohr^2 between "
        "excited states")
    return ens.replace(transition_strengths=demo_transition_strengths(
        ens, mu2_excited=mu2_excited), metadata=meta)
