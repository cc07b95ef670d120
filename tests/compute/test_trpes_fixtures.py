"""Small synthetic ensembles for the TRPES tests (invented; not physical)."""

from __future__ import annotations

import numpy as np
from scipy.stats import special_ortho_group

from ensemblelab.data.ensemble import Ensemble


def stratified_decay(n: int, *, dt: float = 1.0, t_max: float = 500.0, tau: float = 100.0):
    """Exponential-decay scenario with hop times on exponential quantiles (no sampling noise)."""
    hop = -tau * np.log1p(-(np.arange(n) + 0.5) / n)
    t = np.arange(0.0, t_max + dt / 2, dt)
    traj = np.repeat(np.arange(n), t.size)
    time = np.tile(t, n)
    active = np.where(time < hop[traj], 2, 1)
    m = time.size
    en = np.zeros((m, 3))
    en[:, 2], en[:, 1], en[:, 0] = 4.0, 3.0, -0.5
    cat = np.full((m, 1), 7.5)  # IP(S2) = 3.5 eV, IP(S1) = 4.5 eV
    dy = np.zeros((m, 3, 1))
    dy[:, 2, 0], dy[:, 1, 0], dy[:, 0, 0] = 0.9, 0.8, 0.95
    return Ensemble.from_arrays(traj=traj, time=time, active=active,
                                geometries=np.zeros((m, 1, 3)), symbols=["H"], energies=en,
                                cation_energies=cat, dyson=dy, copy=False)


def random_ensemble(n_traj: int = 6, *, n_steps: int = 40, dt: float = 2.0, seed: int = 0,
                    ragged: bool = True, offset: float = 0.0):
    """3 neutral states, 2 cation states, random energies, Dyson norms and ADT rotations."""
    rng = np.random.default_rng(seed)
    rows = []
    for i in range(n_traj):
        n = n_steps - (rng.integers(0, n_steps // 2) if ragged and i % 2 else 0)
        rows.append((np.full(n, i), offset + dt * np.arange(n)))
    traj = np.concatenate([r[0] for r in rows])
    time = np.concatenate([r[1] for r in rows])
    m = time.size
    active = rng.integers(0, 3, m)
    en = np.sort(rng.uniform(0.0, 4.0, (m, 3)), axis=1)
    cat = 4.5 + np.sort(rng.uniform(0.0, 3.0, (m, 2)), axis=1)
    dy = rng.uniform(0.0, 1.0, (m, 3, 2))
    adt = special_ortho_group.rvs(3, size=m, random_state=seed)
    adt_c = special_ortho_group.rvs(2, size=m, random_state=seed + 1)
    return Ensemble.from_arrays(traj=traj, time=time, active=active,
                                geometries=rng.normal(size=(m, 2, 3)), symbols=["H", "H"],
                                energies=en, cation_energies=cat, dyson=dy, adt=adt,
                                adt_cation=adt_c, copy=False)
