"""Naive reference twins of the scattering kernels (private; for tests only).

One geometry, one atom pair and one q at a time: the Debye formula written out
literally, ``I(q) = sum_a sum_b f_a f_b sinc(q r_ab)`` with ``sinc(0) = 1``.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["debye_intensity_reference"]


def debye_intensity_reference(geom: np.ndarray, factors: np.ndarray, q: np.ndarray
                              ) -> np.ndarray:
    """Full Debye intensity of one geometry.

    Parameters
    ----------
    geom : ndarray, shape (n_atoms, 3)
        Angstrom.
    factors : ndarray, shape (n_atoms, n_q)
        Form factor of each atom on the q grid.
    q : ndarray, shape (n_q,)
        Inverse Angstrom.

    Returns
    -------
    ndarray, shape (n_q,)
    """
    n_atoms = geom.shape[0]
    out = np.zeros(q.size)
    for k in range(q.size):
        total = 0.0
        for a in range(n_atoms):
            for b in range(n_atoms):
                r = math.dist(geom[a], geom[b])
                x = q[k] * r
                total += factors[a, k] * factors[b, k] * (1.0 if x == 0.0 else math.sin(x) / x)
        out[k] = total
    return out
