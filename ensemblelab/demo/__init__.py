"""The demo ensemble: surface hopping of an invented chromophore (our own invented scenario).

>>> from ensemblelab.demo import make_ensemble
>>> ens = make_ensemble(n_trajectories=6, t_max=20.0, faults=False)
>>> ens.n_states, ens.n_cation, ens.n_atoms
(3, 3, 11)

The scenario (parameters in :class:`DemoScenario`) is described in
:mod:`ensemblelab.demo.scenario`. :func:`make_ensemble` Wigner-samples the ground
state, selects initial conditions for the pump by doorway rejection sampling,
runs the vectorised surface-hopping engine, builds Cartesian structures and
optionally injects faults whose ground truth is stored only in
``ens.metadata["injected_faults"]`` (trajectory id -> fault kind).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from ..compute.dynamics._kernels_fssh import adiabatic_states
from ..compute.dynamics.fssh import run_fssh
from ..compute.dynamics.initial import select_initial_conditions
from ..compute.dynamics.wigner import sample_normal_modes
from ..data.ensemble import Ensemble
from ..errors import SchemaError
from ..units import HARTREE_EV
from .scenario import (
    DEFAULT_SCENARIO,
    FRAGMENT_ATOM,
    DemoMolecule,
    DemoScenario,
    ground_state_modes,
)

__all__ = ["make_ensemble", "DemoScenario", "DemoMolecule", "DEFAULT_SCENARIO", "FAULT_KINDS",
           "DEFAULT_SEED", "DEMO_PRECISION"]

#: fault kinds injected by ``make_ensemble(faults=True)``, in this order
FAULT_KINDS = ("energy_jump", "energy_drift", "fragmentation", "nan_step", "truncated",
               "large_gap_hop")
#: seed of the committed demo data
DEFAULT_SEED = 7
#: significant digits of the committed demo files
DEMO_PRECISION = 6


def _sample_initial(sc: DemoScenario, model, n_traj: int, rng: np.random.Generator,
                    n_pool: int) -> tuple[np.ndarray, np.ndarray, pd.DataFrame]:
    omega, lmat = ground_state_modes(model)
    qq, pp = sample_normal_modes(omega, n_samples=n_pool, temperature=sc.temperature,
                                 random_state=rng)
    minv = 1.0 / np.sqrt(model.masses)
    q = (qq @ lmat) * minv
    v = (pp @ lmat) * minv
    e, u = adiabatic_states(model.diabatic(q), None)
    mu = np.einsum("nd,nxde,nae->nax", u[:, 0], model.dipoles(q), u)
    mu2 = np.sum(mu * mu, axis=2)
    exc = (e - e[:, :1]) * HARTREE_EV
    states = np.arange(1, model.n_states)
    table = pd.DataFrame({
        "sample": np.repeat(np.arange(n_pool), states.size),
        "state": np.tile(states, n_pool),
        "excitation_energy": exc[:, 1:].reshape(-1),
        "mu2": mu2[:, 1:].reshape(-1),
    })
    sel = select_initial_conditions(table, photon_energy=sc.pump_energy, fwhm=sc.pump_fwhm,
                                    method="rejection", n_select=n_traj, random_state=rng)
    return q, v, sel


def _inject_faults(cols: dict[str, Any], rows: dict[str, np.ndarray], ids: np.ndarray,
                   rng: np.random.Generator, t_max: float) -> tuple[dict, dict, np.ndarray]:
    """Modify the flat per-snapshot arrays in place; return labels, times and a keep mask."""
    traj = rows["traj"]
    time = rows["time"]
    n_f = min(len(FAULT_KINDS), ids.size)
    chosen = rng.choice(ids, size=n_f, replace=False)
    labels: dict[int, str] = {}
    when: dict[int, float] = {}
    keep = np.ones(traj.size, dtype=bool)
    e, ep, et, ek = rows["energies"], cols["e_pot"], cols["e_tot"], cols["e_kin"]
    for tid, kind in zip(chosen, FAULT_KINDS[:n_f], strict=True):
        tid = int(tid)
        sel = traj == tid
        t_sel = time[sel]
        t_end = float(t_sel.max())
        t0 = float(np.round(rng.uniform(0.3, 0.6) * t_end, 6))
        later = sel & (time >= t0)
        if kind == "energy_jump":
            jump = 0.8
            e[later] += jump
            ep[later] += jump
            et[later] += jump
        elif kind == "energy_drift":
            t0 = 0.0
            shift = 2.0e-3 * time[sel]  # eV per fs
            e[sel] += shift[:, None]
            ep[sel] += shift
            et[sel] += shift
        elif kind == "fragmentation":
            geo, vel = rows["geometries"], rows.get("velocities")
            first = np.flatnonzero(later)[0]
            bond = geo[first, FRAGMENT_ATOM] - geo[first, 6]
            direction = bond / np.linalg.norm(bond)
            speed = 0.08  # Angstrom/fs
            dt = (time[later] - t0)[:, None]
            geo[later, FRAGMENT_ATOM] += speed * dt * direction
            if vel is not None:
                vel[later, FRAGMENT_ATOM] += speed * direction
        elif kind == "nan_step":
            # a failed step: the energy bookkeeping holds NaN (kept out of the required
            # energies so that loaders with nonfinite="raise" still read the demo)
            idx = np.flatnonzero(later)[0]
            t0 = float(time[idx])
            ep[idx] = np.nan
            et[idx] = np.nan
            ek[idx] = np.nan
        elif kind == "truncated":
            # a crash while excited (a stop on the ground state would be ordinary: the
            # ground state is absorbing); the cut falls on the last excited snapshot
            # at or before t0, else on the first excited one
            exc = np.flatnonzero(sel & (rows["active"] > 0) & (time >= 10.0))
            if exc.size:
                before = exc[time[exc] <= t0]
                t0 = float(time[before[-1]] if before.size else time[exc[0]])
            keep &= ~(sel & (time > t0))
        elif kind == "large_gap_hop":
            act = rows["active"]
            cand = np.flatnonzero(sel & (act == 1) & (e[:, 1] - e[:, 0] > 2.5) & (time > 10.0))
            if cand.size == 0:
                cand = np.flatnonzero(sel & (act >= 1) & (time > 10.0))
            if cand.size == 0:
                cand = np.flatnonzero(sel)[1:2]
            idx = int(cand[0])
            t0 = float(time[idx])
            rest = sel & (time >= t0)
            # the hop "conserves" energy by dumping the gap into kinetic energy
            etot = et[rest].copy()
            act[rest] = 0
            ep[rest] = e[rest, 0]
            ek[rest] = etot - ep[rest]
        labels[tid] = kind
        when[tid] = float(t0)
    return labels, when, keep


def make_ensemble(
    n_trajectories: int = 80,
    *,
    seed: int = DEFAULT_SEED,
    faults: bool = True,
    t_max: float = 500.0,
    dt: float = 0.25,
    save_dt: float = 2.0,
    scenario: DemoScenario | None = None,
    decoherence: str | None = "edc",
    velocities: bool = True,
    progress: bool = False,
) -> Ensemble:
    """Build the invented demo ensemble by running the surface-hopping engine.

    Parameters
    ----------
    n_trajectories : int
        Number of trajectories (default 80).
    seed : int
        Seed of everything random (sampling, hops, fault choice); the result is
        deterministic for a seed on a given platform.
    faults : bool
        Inject one trajectory each with an energy jump, a slow energy drift, a
        fragmenting atom, a NaN step, a truncated end and a large-gap hop
        (labels in ``metadata["injected_faults"]`` only).
    t_max : float
        Length of every trajectory in fs (default 500).
    dt : float
        Nuclear time step in fs.
    save_dt : float
        Interval between saved snapshots in fs (a multiple of `dt`).
    scenario : DemoScenario, optional
        Model parameters (default :data:`DEFAULT_SCENARIO`).
    decoherence : {"edc", None}
        Decoherence correction of the engine.
    velocities : bool
        Store Cartesian velocities.
    progress : bool
        Show a progress bar.

    Returns
    -------
    Ensemble
        Three neutral states (S0-S2), three cation states (D0-D2), per-state Dyson
        norms, amplitudes, exact ADT matrices (neutral and cation), overlaps,
        velocities, ``e_kin``/``e_pot``/``e_tot``/``torsion`` columns and initial
        excitation energies and oscillator strengths.
    """
    if int(n_trajectories) < 1:
        raise SchemaError(f"n_trajectories must be >= 1; got {n_trajectories}.")
    ratio = save_dt / dt
    if abs(ratio - round(ratio)) > 1e-9 or round(ratio) < 1:
        raise SchemaError(f"save_dt must be a positive multiple of dt={dt} fs; got {save_dt}.")
    n_traj = int(n_trajectories)
    sc = scenario or DEFAULT_SCENARIO
    model = sc.model()
    mol = DemoMolecule(seed=sc.spectator_seed)
    seq = np.random.SeedSequence(seed)
    r_init, r_hop, r_spec, r_fault = (np.random.default_rng(s) for s in seq.spawn(4))
    q, v, sel = _sample_initial(sc, model, n_traj, r_init, n_pool=max(40 * n_traj, 400))
    if len(sel) < n_traj:
        raise SchemaError(f"only {len(sel)} initial conditions accepted; raise the pool.")
    samples = sel["sample"].to_numpy()
    res = run_fssh(model, q0=q[samples], v0=v[samples], initial_state=sel["state"].to_numpy(),
                   t_max=t_max, dt=dt, save_every=int(round(ratio)), decoherence=decoherence,
                   random_state=r_hop, progress=progress)
    sq0, sp0 = mol.sample_spectators(n_traj, temperature=sc.temperature, random_state=r_spec)

    def geometry(qr, vr, time, tr):
        from ..units import AU_TIME_FS

        # spectator vibrations are displacements of the planar reference, carried along
        # by the model motions (a central difference in both gives the velocities)
        dx, dv = mol.spectators(sq0[tr], sp0[tr], time)
        dv_au = dv * AU_TIME_FS
        eps = 1e-3
        pos = mol.cartesian(qr, dx)
        vel = (mol.cartesian(qr + eps * vr, dx + eps * dv_au)
               - mol.cartesian(qr - eps * vr, dx - eps * dv_au)) / (2 * eps)
        return pos, vel / AU_TIME_FS

    ids = np.arange(n_traj)
    trajectories = pd.DataFrame({"traj": ids, "weight": 1.0, "sample": samples,
                                 "doorway": sel["doorway"].to_numpy()})
    meta = {
        "producer": "ensemblelab.demo.make_ensemble",
        "scenario": "invented",
        "description": sc.label,
        "seed": int(seed),
        "n_trajectories": n_traj,
        "t_max_fs": float(t_max),
        "dt_fs": float(dt),
        "save_dt_fs": float(save_dt),
        "decoherence": decoherence,
        "absorbing_state": 0,  # trajectories may stop on S0 (none does in the demo)
        "sampling": "doorway-selected",  # initial conditions drawn by doorway rejection
        "parameters": sc.as_dict(),
        "suggested_pump": {"photon_energy": sc.pump_energy, "fwhm": sc.pump_fwhm},
        "suggested_probe": {"photon_energy": sc.probe_energy, "fwhm": sc.probe_fwhm},
        "diabatic_labels": ["G (closed shell)", "E (twisting pi-pi*)", "B (bright)"],
        "cation_diabatic_labels": ["C0 (pi hole)", "C1 (second hole)", "C2 (lone-pair hole)"],
    }
    ens = res.to_ensemble(
        geometry=geometry, symbols=mol.symbols, atom_masses=mol.atom_masses,
        trajectories=trajectories, metadata=meta, velocities=velocities,
        columns={"torsion": np.rad2deg(res.q[..., 0])},
    )
    if not faults:
        meta_f = dict(ens.metadata)
        meta_f["injected_faults"] = {}
        return ens.replace(metadata=meta_f)
    return _apply_faults(ens, r_fault, t_max)


def _apply_faults(ens: Ensemble, rng: np.random.Generator, t_max: float) -> Ensemble:
    frame = ens.snapshots
    rows: dict[str, Any] = {
        "traj": frame["traj"].to_numpy(),
        "time": frame["time"].to_numpy(),
        "active": frame["active"].to_numpy().copy(),
        "energies": ens.energies.copy(),
        "geometries": ens.geometries.copy(),
    }
    if ens.velocities is not None:
        rows["velocities"] = ens.velocities.copy()
    cols = {c: frame[c].to_numpy().copy() for c in ("e_kin", "e_pot", "e_tot")}
    labels, when, keep = _inject_faults(cols, rows, ens.trajectories["traj"].to_numpy(), rng,
                                        t_max)
    new_frame = frame.copy()
    new_frame["active"] = rows["active"]
    for c, vals in cols.items():
        new_frame[c] = vals
    meta = dict(ens.metadata)
    meta["injected_faults"] = {int(k): v for k, v in sorted(labels.items())}
    meta["injected_fault_times"] = {int(k): v for k, v in sorted(when.items())}
    out = ens.replace(snapshots=new_frame, energies=rows["energies"],
                      geometries=rows["geometries"], velocities=rows.get("velocities"),
                      metadata=meta)
    if not keep.all():
        out = out.select(keep)
        fr = out.snapshots.copy()
        fr["snapshot"] = np.arange(len(fr), dtype=np.int64)
        out = out.replace(snapshots=fr)
    return out
