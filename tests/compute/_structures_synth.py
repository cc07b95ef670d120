"""Synthetic ensembles with planted structure and injected faults (invented, for tests).

A bent four-atom chain (C-C-O-H) vibrates around a reference geometry; energies are
built so that the total energy is conserved to ~1e-3 eV and hops happen at small gaps.
Faults are injected one kind per trajectory with a known first bad time.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ensemblelab.data.ensemble import Ensemble

SYMBOLS = ("C", "C", "O", "H")
BASE = np.array([[0.0, 0.0, 0.0], [1.45, 0.0, 0.0], [2.1, 1.1, 0.0], [3.05, 1.15, 0.0]])
FAULT_KINDS = ("energy_drift", "energy_jump", "large_gap_hop", "norm_error", "nonfinite",
               "missing_steps", "early_end", "topology_change")


def make_clean(n_traj=30, *, n_steps=81, dt=0.5, seed=0, groups=None, spread=0.02):
    """Clean ensemble; `groups` (n_traj,) picks one of several planted shapes per traj."""
    rng = np.random.default_rng(seed)
    t = np.arange(n_steps) * dt
    traj, time, active, geoms, energies, amps, ekin, etot = [], [], [], [], [], [], [], []
    shapes = [BASE]
    if groups is not None:
        shapes = []
        for g in range(int(np.max(groups)) + 1):
            s = BASE.copy()
            s[3, 1] += 0.8 * g          # move the H around (planted structural groups)
            s[2, 2] += 0.8 * (g % 2)
            shapes.append(s)
    for k in range(n_traj):
        shape = shapes[0 if groups is None else int(groups[k])]
        hop_step = rng.integers(20, n_steps - 10)
        act = np.where(np.arange(n_steps) < hop_step, 2, 1)
        # rotate every frame randomly: structure must not depend on orientation
        q = rng.normal(size=4)
        q /= np.linalg.norm(q)
        a, b, c, d = q
        R = np.array([[a*a+b*b-c*c-d*d, 2*(b*c-a*d), 2*(b*d+a*c)],
                      [2*(b*c+a*d), a*a-b*b+c*c-d*d, 2*(c*d-a*b)],
                      [2*(b*d-a*c), 2*(c*d+a*b), a*a-b*b-c*c+d*d]])
        X = shape + spread * rng.standard_normal((n_steps, 4, 3))
        X = X @ R.T + rng.normal(size=3)
        e = np.zeros((n_steps, 3))
        e[:, 1] = 3.0 + 0.3 * np.sin(0.1 * t + k)
        e[:, 2] = e[:, 1] + 0.05 + 0.2 * (1 - np.exp(-t / 20))  # small gap near the hop
        e_pot = e[np.arange(n_steps), act]
        kin = 2.0 - e_pot + 1e-4 * rng.standard_normal(n_steps)  # E_tot = 2 eV conserved
        pop = np.zeros((n_steps, 3))
        pop[:, 2] = np.where(act == 2, 0.7, 0.2)
        pop[:, 1] = 1 - pop[:, 2]
        for lst, val in ((traj, np.full(n_steps, k)), (time, t), (active, act), (geoms, X),
                         (energies, e), (amps, pop), (ekin, kin), (etot, e_pot + kin)):
            lst.append(val)
    return dict(traj=np.concatenate(traj), time=np.concatenate(time),
                active=np.concatenate(active), geometries=np.concatenate(geoms),
                energies=np.concatenate(energies), amplitudes=np.concatenate(amps),
                e_kin=np.concatenate(ekin), e_tot=np.concatenate(etot), dt=dt)


def build(d):
    keep = d.get("keep", np.ones(len(d["traj"]), bool))
    return Ensemble.from_arrays(
        traj=d["traj"][keep], time=d["time"][keep], active=d["active"][keep],
        geometries=d["geometries"][keep], symbols=SYMBOLS, energies=d["energies"][keep],
        amplitudes=d["amplitudes"][keep],
        columns={"e_kin": d["e_kin"][keep], "e_tot": d["e_tot"][keep]},
        trajectories=pd.DataFrame({"traj": np.unique(d["traj"])}),
        metadata={"producer": "tests synthetic (invented)"},
    )


def inject(d, traj_id, kind, step):
    """Inject one fault into trajectory `traj_id` from `step` on; returns its first bad time."""
    rows = np.flatnonzero(d["traj"] == traj_id)
    r = rows[step]
    t_bad = float(d["time"][r])
    if kind == "energy_drift":   # steady heating, 0.048 eV/fs (0.024 eV per step: no jump)
        ramp = np.clip(d["time"][rows] - t_bad, 0, None) * 0.048
        d["e_tot"][rows] += ramp
        # the ensemble's other drifts are noise (1e-4 eV), so the drift limit is its floor,
        # drift_warn = 0.2 eV (common practice): 0.192 eV after 4 fs, 0.216 eV after 4.5 fs,
        # first above 0.2 eV at +4.5 fs (computed independently, not published)
        return t_bad + 4.5
    if kind == "energy_jump":
        d["e_tot"][rows[step:]] += 0.4
        return t_bad
    if kind == "large_gap_hop":
        act = d["active"][rows]
        h = np.flatnonzero(np.diff(act) != 0)[0] + 1
        d["energies"][rows[h - 1], 2] = d["energies"][rows[h - 1], 1] + 1.2
        return float(d["time"][rows[h]])
    if kind == "norm_error":
        d["amplitudes"][rows[step:], 1] += 0.01
        return t_bad
    if kind == "nonfinite":
        d["energies"][r, 0] = np.nan
        return t_bad
    if kind == "missing_steps":
        keep = d.setdefault("keep", np.ones(len(d["traj"]), bool))
        keep[rows[step:step + 3]] = False
        return t_bad
    if kind == "early_end":
        keep = d.setdefault("keep", np.ones(len(d["traj"]), bool))
        keep[rows[step + 1:]] = False
        return t_bad
    if kind == "topology_change":  # the H flies away along its bond
        X = d["geometries"]
        v = X[rows[0], 3] - X[rows[0], 2]
        v /= np.linalg.norm(v)
        shift = np.clip(d["time"][rows] - t_bad, 0, None)[:, None] * 0.2 * v
        X[rows, 3] += shift
        # O-H broken above 1.25 * 0.97 * 1.2 = 1.455 A; O-H starts at ~0.95 A
        return None
    raise ValueError(kind)
