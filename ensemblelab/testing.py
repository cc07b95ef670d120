"""Public testing helpers: a toy ensemble with a known ground truth, and an equality assertion."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from .data.ensemble import SNAPSHOT_ARRAYS, TRAJECTORY_ARRAYS, Ensemble

__all__ = ["make_toy_ensemble", "assert_ensemble_equal", "TOY_TRUTH"]

#: ground truth of :func:`make_toy_ensemble` (a scenario of our own, invented)
TOY_TRUTH: dict[str, Any] = {
    "tau": 100.0,  # fs, exponential S2 -> S1 hop time
    "ip": {2: 3.5, 1: 4.5, 0: 8.0},  # eV, vertical IP to D0 from each neutral state
    "dyson": {2: 0.9, 1: 0.8, 0: 0.95},  # squared Dyson norms to D0
    "initial_state": 2,
}


def make_toy_ensemble(
    n_trajectories: int = 40,
    *,
    seed: int = 0,
    t_max: float = 300.0,
    dt: float = 1.0,
    n_atoms: int = 4,
    tau: float = TOY_TRUTH["tau"],
    ragged: bool = False,
) -> Ensemble:
    """An invented three-state ensemble with a known lifetime, for tests and examples.

    Every trajectory starts on S2 at t = 0 and hops once to S1 at a time drawn
    from an exponential distribution with lifetime `tau`; it stays on S1. There
    is one cation state D0 with vertical ionisation energies IP(S2) = 3.5 eV,
    IP(S1) = 4.5 eV and squared Dyson norms 0.9 (S2) and 0.8 (S1), the
    end-to-end check of the doorway-window map (analytic in the limit of many trajectories).

    Parameters
    ----------
    n_trajectories : int
        Number of trajectories.
    seed : int
        Seed of the random generator (hop times and geometry noise).
    t_max, dt : float
        Length and step of each trajectory in fs.
    n_atoms : int
        Atoms of the (meaningless) toy molecule.
    tau : float
        Lifetime of S2 in fs.
    ragged : bool
        If True, every third trajectory ends early at a random time.

    Returns
    -------
    Ensemble
        With energies, cation energies, per-state Dyson norms, amplitudes,
        identity ADT matrices, ``e_kin``/``e_tot`` columns and hop times in
        ``trajectories["hop_time"]``.
    """
    rng = np.random.default_rng(seed)
    n_steps = int(round(t_max / dt)) + 1
    t = np.arange(n_steps) * dt
    hop_time = rng.exponential(tau, size=n_trajectories)
    ends = np.full(n_trajectories, n_steps)
    if ragged:
        cut = np.arange(n_trajectories) % 3 == 2
        ends[cut] = rng.integers(n_steps // 4, n_steps, size=int(cut.sum()))
    traj = np.concatenate([np.full(e, i) for i, e in enumerate(ends)])
    time = np.concatenate([t[:e] for e in ends])
    active = np.where(time < hop_time[traj], 2, 1)
    n = time.size
    e_s = np.array([0.0, 3.0, 4.0])
    energies = np.broadcast_to(e_s, (n, 3)).copy()
    energies += 0.01 * np.sin(0.05 * time)[:, None] * np.array([0.0, 1.0, 1.0])
    ip = TOY_TRUTH["ip"]
    # cation energy chosen so that IP from S2 is 3.5 eV and from S1 is 4.5 eV at every step
    cation = energies[:, [2]] + ip[2]
    energies[:, 1] = cation[:, 0] - ip[1]
    energies[:, 0] = cation[:, 0] - ip[0]
    dy = TOY_TRUTH["dyson"]
    dyson = np.broadcast_to(np.array([dy[0], dy[1], dy[2]])[:, None], (n, 3, 1)).copy()
    amplitudes = np.zeros((n, 3))
    amplitudes[np.arange(n), active] = 1.0
    base = np.zeros((n_atoms, 3))
    base[:, 0] = 1.4 * np.arange(n_atoms)
    geoms = base + 0.05 * rng.standard_normal((n, n_atoms, 3))
    e_kin = 0.2 + 0.01 * rng.standard_normal(n)
    e_tot = energies[np.arange(n), active] + e_kin
    symbols = ["C"] * n_atoms
    trajectories = pd.DataFrame({"traj": np.arange(n_trajectories), "hop_time": hop_time})
    return Ensemble.from_arrays(
        traj=traj,
        time=time,
        active=active,
        geometries=geoms,
        symbols=symbols,
        energies=energies,
        cation_energies=cation,
        dyson=dyson,
        amplitudes=amplitudes,
        adt=np.broadcast_to(np.eye(3), (n, 3, 3)),
        trajectories=trajectories,
        columns={"e_kin": e_kin, "e_tot": e_tot},
        metadata={"producer": "ensemblelab.testing.make_toy_ensemble (invented scenario)",
                  "seed": seed},
        copy=False,
    )


def assert_ensemble_equal(a: Ensemble, b: Ensemble, *, check_metadata: bool = False,
                          rtol: float = 0.0, atol: float = 0.0) -> None:
    """Assert that two ensembles hold the same data (exactly, by default).

    Parameters
    ----------
    a, b : Ensemble
    check_metadata : bool
        Also compare the metadata dictionaries (minus ``sources``).
    rtol, atol : float
        Tolerances for floating-point arrays.

    Raises
    ------
    AssertionError
        Naming the first field that differs.
    """
    pd.testing.assert_frame_equal(a.snapshots, b.snapshots, check_exact=rtol == atol == 0,
                                  rtol=rtol or 1e-5, atol=atol or 1e-8)
    pd.testing.assert_frame_equal(a.trajectories, b.trajectories)
    assert a.symbols == b.symbols, f"symbols differ: {a.symbols} != {b.symbols}"
    assert a.state_labels == b.state_labels, "state_labels differ"
    assert a.cation_labels == b.cation_labels, "cation_labels differ"
    np.testing.assert_allclose(a.masses, b.masses, rtol=rtol, atol=atol, err_msg="masses")
    for name in ("geometries", "energies", *SNAPSHOT_ARRAYS, *TRAJECTORY_ARRAYS):
        x, y = getattr(a, name), getattr(b, name)
        if x is None or y is None:
            assert x is None and y is None, f"{name}: present in one ensemble only"
            continue
        np.testing.assert_allclose(x, y, rtol=rtol, atol=atol, err_msg=name)
    if check_metadata:
        ma = {k: v for k, v in a.metadata.items() if k != "sources"}
        mb = {k: v for k, v in b.metadata.items() if k != "sources"}
        assert ma == mb, f"metadata differ: {ma} != {mb}"
