"""Naive per-trajectory twin of the vectorised FSSH engine (private; for tests and benchmarks).

The same algorithm as :mod:`ensemblelab.compute.dynamics._kernels_fssh`, written as a
plain Python loop over trajectories and steps with ``numpy.linalg.eigh`` on one
matrix at a time. Random numbers are drawn exactly as the vectorised driver
draws them (one row of ``n_traj`` uniforms per step), so both give the same
trajectories for the same seed.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from ...units import AU_TIME_FS, HARTREE_EV

__all__ = ["run_fssh_reference"]


def _adiabatic(v: np.ndarray, u_prev: np.ndarray | None) -> tuple[np.ndarray, np.ndarray]:
    e, w = np.linalg.eigh(v)
    u = w.T.copy()
    for a in range(u.shape[0]):
        if u_prev is None:
            ref = u[a, np.argmax(np.abs(u[a]))]
            if ref < 0:
                u[a] = -u[a]
        elif np.dot(u[a], u_prev[a]) < 0:
            u[a] = -u[a]
    return e, u


def _save(out, k, j, q, v, a, e, ca, e_bath, masses) -> None:
    out["q"][k, j] = q
    out["v"][k, j] = v
    out["active"][k, j] = a
    out["energies"][k, j] = e * HARTREE_EV
    out["populations"][k, j] = np.abs(ca) ** 2
    e_kin = 0.5 * np.sum(masses * v * v)
    out["e_tot"][k, j] = (e[a] + e_kin + e_bath) * HARTREE_EV


def run_fssh_reference(
    model: Any,
    *,
    q0: np.ndarray,
    v0: np.ndarray,
    initial_state: int | np.ndarray,
    t_max: float,
    dt: float = 0.25,
    save_every: int = 1,
    decoherence: str | None = None,
    edc_c: float = 1.0,
    edc_e0: float = 0.1,
    frustrated: str = "keep",
    random_state: int | None = None,
    trajectories: np.ndarray | None = None,
) -> dict[str, np.ndarray]:
    """Run FSSH one trajectory at a time (same parameters as :func:`run_fssh`).

    Parameters
    ----------
    trajectories : array_like of int, optional
        Run only these trajectories of the ensemble (random numbers still
        follow the full ensemble), e.g. a subset for timing.

    Returns
    -------
    dict
        ``time`` (n_saved,) fs and, for the trajectories run, ``q``, ``v``
        (n_saved, n_run, n_dof), ``active`` (n_saved, n_run), ``energies``,
        ``populations`` (n_saved, n_run, n_states) and ``e_tot`` (n_saved, n_run) in eV.
    """
    q0 = np.array(q0, dtype=float, ndmin=2)
    v0 = np.array(v0, dtype=float, ndmin=2)
    n_traj, n_dof = q0.shape
    state0 = np.broadcast_to(np.asarray(initial_state, dtype=np.int64), (n_traj,))
    rng = np.random.default_rng(random_state)
    dt_au = dt / AU_TIME_FS
    n_steps = int(round(t_max / dt))
    zeta_all = rng.random((n_steps, n_traj))
    masses = np.asarray(model.masses, dtype=float)
    friction = getattr(model, "friction", None)
    run = np.arange(n_traj) if trajectories is None else np.asarray(trajectories)
    n_s = model.n_states
    n_saved = n_steps // save_every + 1
    out = {
        "time": np.arange(n_saved) * save_every * dt,
        "q": np.zeros((n_saved, run.size, n_dof)),
        "v": np.zeros((n_saved, run.size, n_dof)),
        "active": np.zeros((n_saved, run.size), dtype=np.int64),
        "energies": np.zeros((n_saved, run.size, n_s)),
        "populations": np.zeros((n_saved, run.size, n_s)),
        "e_tot": np.zeros((n_saved, run.size)),
    }
    for j, n in enumerate(run):
        q = q0[n].copy()
        v = v0[n].copy()
        a = int(state0[n])
        vd = model.diabatic(q[None])[0]
        g = model.gradient(q[None])[0]
        e, u = _adiabatic(vd, None)
        gad = np.array([u @ g[m] @ u.T for m in range(n_dof)])
        ca = np.zeros(n_s, dtype=complex)
        ca[a] = 1.0
        e_bath = 0.0

        _save(out, 0, j, q, v, a, e, ca, e_bath, masses)
        for step in range(1, n_steps + 1):
            force = -gad[:, a, a]
            v_half = v + 0.5 * dt_au * force / masses
            q = q + dt_au * v_half
            vd1 = model.diabatic(q[None])[0]
            g1 = model.gradient(q[None])[0]
            e1, u1 = _adiabatic(vd1, u)
            gad1 = np.array([u1 @ g1[m] @ u1.T for m in range(n_dof)])
            v = v_half + 0.5 * dt_au * (-gad1[:, a, a]) / masses
            if friction is not None:
                for m in range(n_dof):
                    vm = v[m] * np.exp(-friction[m] * dt_au)
                    e_bath += 0.5 * masses[m] * (v[m] ** 2 - vm**2)
                    v[m] = vm
            s = u @ u1.T
            ca_new = np.exp(-0.5j * dt_au * e1) * (s.T @ (np.exp(-0.5j * dt_au * e) * ca))
            # hopping probabilities
            zeta = zeta_all[step - 1, n]
            cum = 0.0
            target = -1
            for lvl in range(n_s):
                if lvl == a:
                    continue
                rho = 0.5 * (np.conj(ca[a]) * ca[lvl] + np.conj(ca_new[a]) * ca_new[lvl])
                pop = 0.5 * (abs(ca[a]) ** 2 + abs(ca_new[a]) ** 2)
                t_dt = 0.5 * (s[a, lvl] - s[lvl, a])
                gl = min(max(2.0 * (rho * t_dt).real / max(pop, 1e-300), 0.0), 1.0)
                cum += gl
                if target < 0 and zeta < cum:
                    target = lvl
            if target >= 0:
                d = gad1[:, a, target].copy()
                if np.sqrt(np.sum(d * d)) <= 1e-300:
                    d = v.copy()
                d = d / max(np.sqrt(np.sum(d * d)), 1e-300)
                aa = 0.5 * np.sum(d * d / masses)
                bb = np.sum(v * d)
                du = e1[target] - e1[a]
                disc = bb * bb - 4 * aa * du
                if disc >= 0:
                    sgn = -1.0 if bb < 0 else 1.0
                    gamma = (bb - sgn * np.sqrt(disc)) / (2 * aa)
                    v = v - gamma * d / masses
                    a = target
                elif frustrated == "reverse":
                    ft = -gad1[:, target, target]
                    if np.sum(ft * d) * bb < 0:
                        v = v - (bb / aa) * d / masses
            if decoherence == "edc":
                e_kin = 0.5 * np.sum(masses * v * v)
                rest = 0.0
                for lvl in range(n_s):
                    if lvl == a:
                        continue
                    if e_kin > 0:
                        tau = (edc_c + edc_e0 / e_kin) / abs(e1[lvl] - e1[a])
                        ca_new[lvl] *= np.exp(-dt_au / tau)
                    rest += abs(ca_new[lvl]) ** 2
                ca_new[a] *= np.sqrt(max(1.0 - rest, 0.0) / max(abs(ca_new[a]) ** 2, 1e-300))
            ca, e, u, gad = ca_new, e1, u1, gad1
            if step % save_every == 0:
                _save(out, step // save_every, j, q, v, a, e, ca, e_bath, masses)
    return out
