"""An invented parent population of trajectories for coverage checks (no real system).

Each trajectory starts on state 2 and hops to state 1 at a time drawn from an
exponential law; every snapshot contributes to a band an amount that depends on its
state, its time and the trajectory's weight. Per-snapshot arrays only: fast enough to
draw hundreds of replicate ensembles.
"""

from __future__ import annotations

import numpy as np


def parent_band(n_traj: int = 4000, *, n_steps: int = 40, dt: float = 5.0, tau: float = 60.0,
                seed: int = 0) -> dict[str, np.ndarray]:
    """Per-snapshot ``traj``, ``state``, ``time``, ``value`` of an invented parent."""
    rng = np.random.default_rng(seed)
    hop = rng.exponential(tau, size=n_traj)
    weight = rng.uniform(0.3, 1.0, size=n_traj)  # invented doorway-like weights
    traj = np.repeat(np.arange(n_traj), n_steps)
    time = np.tile(np.arange(n_steps) * dt, n_traj)
    state = np.where(time < hop[traj], 2, 1)
    # state 2 ionises strongly early on, state 1 weakly; a little snapshot noise
    base = np.where(state == 2, 0.9, 0.35) * np.exp(-time / 150.0)
    value = weight[traj] * base * rng.uniform(0.5, 1.5, size=traj.size)
    return {"traj": traj, "state": state, "time": time, "value": value}


def replicate_rows(parent: dict[str, np.ndarray], n_traj: int, rng: np.random.Generator,
                   ) -> dict[str, np.ndarray]:
    """The snapshots of `n_traj` trajectories drawn from the parent without replacement."""
    n_parent = int(parent["traj"].max()) + 1
    chosen = rng.choice(n_parent, size=n_traj, replace=False)
    rows = np.isin(parent["traj"], chosen)
    return {k: v[rows] for k, v in parent.items()}
