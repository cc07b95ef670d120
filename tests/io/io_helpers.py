"""Shared fixtures and a random-ensemble generator for the io tests."""

from __future__ import annotations

import numpy as np
import pandas as pd

from ensemblelab import Ensemble


def random_ensemble(
    seed: int,
    *,
    n_traj: int = 3,
    max_len: int = 5,
    n_atoms: int = 2,
    n_states: int = 3,
    n_cation: int = 2,
    optional: frozenset[str] = frozenset(),
    dyson_per_state: bool = False,
    text_column: bool = False,
) -> Ensemble:
    """A random small ensemble with ragged trajectories (values meaningless, invented)."""
    rng = np.random.default_rng(seed)
    ids = np.sort(rng.choice(1000, size=n_traj, replace=False))
    lengths = rng.integers(1, max_len + 1, size=n_traj)
    traj = np.repeat(ids, lengths)
    time = np.concatenate([np.cumsum(rng.uniform(0.1, 2.0, size=k)) - 0.5 for k in lengths])
    n = traj.size
    energies = 2.0 * np.arange(n_states) + rng.normal(size=(n, n_states)) * 0.3
    active = rng.integers(0, n_states, size=n)
    kw = {}
    if "cation" in optional:
        kw["cation_energies"] = rng.normal(size=(n, n_cation)) + 8.0
        if "dyson" in optional:
            shape = (n, n_states, n_cation) if dyson_per_state else (n, n_cation)
            kw["dyson"] = rng.uniform(size=shape)
        if "adt_cation" in optional:
            kw["adt_cation"] = rng.normal(size=(n, n_cation, n_cation))
    if "amplitudes" in optional:
        kw["amplitudes"] = rng.dirichlet(np.ones(n_states), size=n)
    if "adt" in optional:
        kw["adt"] = rng.normal(size=(n, n_states, n_states))
    if "overlaps" in optional:
        kw["overlaps"] = rng.normal(size=(n, n_states, n_states))
    if "velocities" in optional:
        kw["velocities"] = rng.normal(size=(n, n_atoms, 3)) * 1e-3
    trajectories = pd.DataFrame({"traj": ids, "weight": rng.uniform(0.5, 2.0, size=n_traj)})
    if "initial" in optional:
        exc = np.abs(rng.normal(size=(n_traj, n_states))) * 4
        exc[:, 0] = 0.0
        kw["excitation_energies"] = exc
        kw["oscillator_strengths"] = rng.uniform(size=(n_traj, n_states))
        kw["transition_dipoles"] = rng.normal(size=(n_traj, n_states, 3))
        trajectories["family"] = rng.integers(0, 3, size=n_traj)
    columns = {"e_kin": rng.uniform(size=n), "cluster": rng.integers(-1, 4, size=n)}
    if text_column:
        columns["tag"] = np.array(rng.choice(["ok", "odd one", "late"], size=n), dtype=object)
        columns["flag"] = rng.uniform(size=n) < 0.5
    symbols = list(rng.choice(["H", "C", "N", "O"], size=n_atoms))
    return Ensemble.from_arrays(
        traj=traj, time=time, active=active, geometries=rng.normal(size=(n, n_atoms, 3)),
        symbols=symbols, energies=energies, trajectories=trajectories, columns=columns,
        metadata={"producer": "tests (invented)", "seed": seed, "injected_faults": {int(ids[0]):
                                                                                   "nan_step"}},
        **kw,
    )
