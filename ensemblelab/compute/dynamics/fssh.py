"""Vectorised fewest-switches surface hopping (FSSH) on model Hamiltonians.

The driver :func:`run_fssh` advances a whole ensemble at once with the array
kernels of :mod:`ensemblelab.compute.dynamics._kernels_fssh` (scheme described there):
velocity Verlet on the active adiabatic surface, unitary electronic propagation
(second-order product of exact exponentials of the diabatic matrix),
fewest-switches hops from state overlaps, momentum rescaling along the
nonadiabatic coupling vector, frustrated hops, and the optional
energy-based decoherence correction. Method: J. Chem. Phys. 93, 1061 (1990),
"Molecular dynamics with electronic transitions".

Units: the engine works in Hartree atomic units on the model's own coordinates
(velocities in coordinate units per atomic time unit). At the edge, times are in
fs and :meth:`FSSHResult.to_ensemble` returns an :class:`~ensemblelab.Ensemble` in
fs / eV / Angstrom / amu.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import numpy.typing as npt

from ...data.ensemble import Ensemble
from ...errors import SchemaError
from ...units import AU_TIME_FS, HARTREE_EV
from . import _kernels_fssh as K
from .models import check_model

__all__ = ["run_fssh", "FSSHResult"]


@dataclass
class FSSHResult:
    """Saved output of :func:`run_fssh` (time-major arrays over the ensemble).

    Attributes
    ----------
    time : ndarray, shape (n_saved,)
        Save times in fs.
    alive : ndarray of bool, shape (n_saved, n_traj)
        Whether trajectory n was still running at save time k.
    q, v : ndarray, shape (n_saved, n_traj, n_dof)
        Model coordinates and velocities (model units, velocities per atomic time unit).
    active : ndarray of int, shape (n_saved, n_traj)
    energies : ndarray, shape (n_saved, n_traj, n_states)
        Adiabatic energies in eV.
    populations : ndarray, shape (n_saved, n_traj, n_states)
        ``|c_a|^2`` of the adiabatic amplitudes.
    adt, overlaps : ndarray, shape (n_saved, n_traj, n_states, n_states)
        Exact ADT matrices (adiabatic_a = sum_d U[a, d] diabatic_d) and overlaps
        ``<a(t_prev)|b(t)>`` with the previous saved step (identity at t = 0).
    e_kin, e_pot, e_tot, e_bath : ndarray, shape (n_saved, n_traj)
        Energies in eV; ``e_tot = e_pot + e_kin + e_bath`` where ``e_bath`` is the
        energy removed by friction (zero without friction), so e_tot is conserved.
    cation_energies, dyson, adt_cation : ndarray or None
        ``(n_saved, n_traj, n_cation)`` eV, ``(n_saved, n_traj, n_states, n_cation)``,
        ``(n_saved, n_traj, n_cation, n_cation)`` when the model has a cation part.
    final_time, final_q, final_v, final_active, final_populations
        State of every trajectory when it stopped (or at t_max).
    n_hops, n_frustrated : ndarray of int, shape (n_traj,)
    excitation_energies, oscillator_strengths : ndarray, shape (n_traj, n_states)
        ``E_a - E_0`` (eV) and ``f_0a`` at t = 0 (f only when the model has dipoles).
    transition_dipoles : ndarray, shape (n_traj, n_states, 3) or None
        ``mu_0a`` at t = 0 in e*bohr.
    settings : dict
        The run parameters.
    """

    time: np.ndarray
    alive: np.ndarray
    q: np.ndarray
    v: np.ndarray
    active: np.ndarray
    energies: np.ndarray
    populations: np.ndarray
    adt: np.ndarray
    overlaps: np.ndarray
    e_kin: np.ndarray
    e_pot: np.ndarray
    e_tot: np.ndarray
    e_bath: np.ndarray
    final_time: np.ndarray
    final_q: np.ndarray
    final_v: np.ndarray
    final_active: np.ndarray
    final_populations: np.ndarray
    n_hops: np.ndarray
    n_frustrated: np.ndarray
    excitation_energies: np.ndarray
    oscillator_strengths: np.ndarray | None = None
    transition_dipoles: np.ndarray | None = None
    cation_energies: np.ndarray | None = None
    dyson: np.ndarray | None = None
    adt_cation: np.ndarray | None = None
    settings: dict = field(default_factory=dict)

    @property
    def n_trajectories(self) -> int:
        """Number of trajectories."""
        return self.alive.shape[1]

    def to_ensemble(
        self,
        model: Any = None,
        *,
        geometry: Callable[..., tuple[np.ndarray, np.ndarray | None]] | None = None,
        symbols: Sequence[str] | None = None,
        atom_masses: npt.ArrayLike | None = None,
        traj_ids: npt.ArrayLike | None = None,
        trajectories: Any = None,
        state_labels: Sequence[str] | None = None,
        cation_labels: Sequence[str] | None = None,
        metadata: Mapping[str, Any] | None = None,
        columns: Mapping[str, np.ndarray] | None = None,
        velocities: bool = True,
    ) -> Ensemble:
        """Convert the saved steps into an Ensemble (fs, eV, Angstrom, amu).

        Parameters
        ----------
        model : DiabaticModel, optional
            Supplies ``cartesian(q)``, ``symbols`` and ``atom_masses`` when
            `geometry` is not given.
        geometry : callable, optional
            ``geometry(q, v, time, traj) -> (positions, velocities or None)`` with
            q, v of shape (n_rows, n_dof) (model units), time (n_rows,) fs, traj
            (n_rows,) trajectory index, returning Angstrom and Angstrom/fs arrays of
            shape (n_rows, n_atoms, 3).
        symbols, atom_masses : optional
            Element symbols and masses (amu) of the atoms.
        traj_ids : array_like of int, shape (n_traj,), optional
            Ids of the trajectories (default 0 .. n_traj-1).
        trajectories : DataFrame, optional
            Per-trajectory table passed on to :meth:`Ensemble.from_arrays`.
        state_labels, cation_labels : sequence of str, optional
        metadata : mapping, optional
            Merged over the engine's own record of its settings.
        columns : mapping of str to ndarray (n_saved, n_traj), optional
            Extra per-snapshot columns in the time-major layout of this result.
        velocities : bool
            Store Cartesian velocities.

        Returns
        -------
        Ensemble
            A new Ensemble, one snapshot per saved step of every running trajectory.
        """
        n_saved, n_traj = self.alive.shape
        mask_t = self.alive.T  # (n_traj, n_saved): rows in traj-major order
        tr, kk = np.nonzero(mask_t)

        def rows(a: np.ndarray) -> np.ndarray:
            return np.swapaxes(a, 0, 1)[tr, kk]

        q, v = rows(self.q), rows(self.v)
        time = self.time[kk]
        if geometry is None:
            if model is None or not hasattr(model, "cartesian"):
                raise SchemaError(
                    "to_ensemble needs a geometry builder: pass geometry=... or a model with "
                    "cartesian(q)."
                )

            def geometry(q, v, time, traj):  # noqa: ARG001 - documented signature
                pos = model.cartesian(q)
                if not velocities:
                    return pos, None
                eps = 1e-3
                vel = (model.cartesian(q + eps * v) - model.cartesian(q - eps * v)) / (2 * eps)
                return pos, vel / AU_TIME_FS

            symbols = symbols if symbols is not None else getattr(model, "symbols", None)
            if atom_masses is None:
                atom_masses = getattr(model, "atom_masses", None)
        pos, vel = geometry(q, v, time, tr)
        if symbols is None:
            raise SchemaError("to_ensemble needs the element symbols of the atoms (symbols=).")
        ids = np.arange(n_traj) if traj_ids is None else np.asarray(traj_ids, dtype=np.int64)
        if ids.shape != (n_traj,):
            raise SchemaError(f"traj_ids must have shape (n_traj={n_traj},); got {ids.shape}.")
        cols = {
            "e_kin": rows(self.e_kin),
            "e_pot": rows(self.e_pot),
            "e_tot": rows(self.e_tot),
        }
        for name, arr in (columns or {}).items():
            cols[name] = rows(np.asarray(arr))
        meta = {"producer": "ensemblelab.compute.dynamics.run_fssh", "fssh": dict(self.settings)}
        meta.update(dict(metadata or {}))
        return Ensemble.from_arrays(
            traj=ids[tr],
            time=time,
            active=rows(self.active),
            geometries=pos,
            symbols=symbols,
            masses=atom_masses,
            energies=rows(self.energies),
            cation_energies=None if self.cation_energies is None else rows(self.cation_energies),
            dyson=None if self.dyson is None else rows(self.dyson),
            amplitudes=rows(self.populations),
            adt=rows(self.adt),
            adt_cation=None if self.adt_cation is None else rows(self.adt_cation),
            overlaps=rows(self.overlaps),
            velocities=vel if velocities else None,
            excitation_energies=self.excitation_energies,
            oscillator_strengths=self.oscillator_strengths,
            transition_dipoles=None if self.transition_dipoles is None
            else self.transition_dipoles,
            trajectories=trajectories,
            state_labels=state_labels,
            cation_labels=cation_labels,
            metadata=meta,
            columns=cols,
            copy=False,
        )


def _initial_optics(model: Any, st: K.FSSHState) -> tuple[np.ndarray, Any, Any]:
    exc = (st.e - st.e[:, :1]) * HARTREE_EV
    if not hasattr(model, "dipoles"):
        return exc, None, None
    mu_d = np.asarray(model.dipoles(st.q), dtype=float)  # (n, 3, n_s, n_s)
    mu = np.einsum("nd,nxde,nae->nax", st.u[:, 0], mu_d, st.u)
    f = (2.0 / 3.0) * (exc / HARTREE_EV) * np.sum(mu * mu, axis=2)
    f[:, 0] = 0.0
    mu[:, 0] = 0.0
    return exc, f, mu


def run_fssh(
    model: Any,
    *,
    q0: npt.ArrayLike,
    v0: npt.ArrayLike,
    initial_state: int | npt.ArrayLike,
    t_max: float,
    dt: float = 0.25,
    save_every: int = 1,
    decoherence: str | None = None,
    edc_c: float = 1.0,
    edc_e0: float = 0.1,
    frustrated: str = "keep",
    n_substeps: int = 1,
    stop: Callable[[np.ndarray, np.ndarray, np.ndarray], np.ndarray] | None = None,
    random_state: int | np.random.Generator | None = None,
    progress: bool = False,
) -> FSSHResult:
    """Run fewest-switches surface hopping for a whole ensemble at once.

    Parameters
    ----------
    model : DiabaticModel
        Any object following the model protocol of
        :mod:`ensemblelab.compute.dynamics.models` (n_states, n_dof, masses,
        diabatic(q), gradient(q), optional cation part, dipoles, friction).
    q0, v0 : array_like, shape (n_traj, n_dof)
        Initial coordinates and velocities (model units; velocities per atomic
        time unit).
    initial_state : int or array_like of int, shape (n_traj,)
        Initial active adiabatic state (0-based); all population starts there.
    t_max : float
        Length of the run in fs.
    dt : float
        Nuclear time step in fs (default 0.25 fs).
    save_every : int
        Save every this many steps (t = 0 is always saved).
    decoherence : {None, "edc"}
        Energy-based decoherence correction, J. Chem. Phys. 126, 134114 (2007).
    edc_c, edc_e0 : float
        Its parameters C (dimensionless, default 1) and E0 (hartree, default 0.1).
    frustrated : {"keep", "reverse"}
        After a frustrated hop keep the velocity, or reverse its component along
        the coupling vector when the target-state force opposes the motion.
    n_substeps : int
        Electronic sub-steps per nuclear step.
    stop : callable, optional
        ``stop(q, v, active) -> bool array (n_running,)`` evaluated after every step
        (atomic units); a trajectory that stops is recorded in the ``final_*``
        arrays and no longer saved.
    random_state : int or numpy Generator, optional
        One uniform number per trajectory is drawn every step (also for stopped
        ones), so results are reproducible for a seed.
    progress : bool
        Show a tqdm progress bar.

    Returns
    -------
    FSSHResult

    Examples
    --------
    >>> import numpy as np
    >>> from ensemblelab.compute.dynamics import SingleAvoidedCrossing
    >>> m = SingleAvoidedCrossing()
    >>> res = run_fssh(m, q0=np.full((4, 1), -5.0), v0=np.full((4, 1), 20 / 2000),
    ...                initial_state=0, t_max=10.0, dt=0.05, random_state=1)
    >>> res.populations.shape
    (201, 4, 2)
    """
    check_model(model)
    q0a = np.array(q0, dtype=float, ndmin=2)
    v0a = np.array(v0, dtype=float, ndmin=2)
    n_traj, n_dof = q0a.shape
    if n_dof != model.n_dof or v0a.shape != q0a.shape:
        raise SchemaError(
            f"q0 and v0 must have shape (n_traj, n_dof={model.n_dof}); got {q0a.shape} and "
            f"{v0a.shape}."
        )
    if not (np.all(np.isfinite(q0a)) and np.all(np.isfinite(v0a))):
        raise SchemaError("q0 and v0 must be finite.")
    state0 = np.broadcast_to(np.asarray(initial_state, dtype=np.int64), (n_traj,)).copy()
    if state0.min() < 0 or state0.max() >= model.n_states:
        raise SchemaError(
            f"initial_state must be in [0, {model.n_states - 1}]; got {np.unique(state0)}."
        )
    for name, value in (("t_max", t_max), ("dt", dt)):
        if not (np.isfinite(value) and value > 0):
            raise SchemaError(f"The {name!r} parameter of run_fssh must be > 0 fs; got {value}.")
    if decoherence not in (None, "edc"):
        raise SchemaError(f"decoherence must be None or 'edc'; got {decoherence!r}.")
    if frustrated not in ("keep", "reverse"):
        raise SchemaError(f"frustrated must be 'keep' or 'reverse'; got {frustrated!r}.")
    if int(save_every) < 1 or int(n_substeps) < 1:
        raise SchemaError("save_every and n_substeps must be integers >= 1.")
    save_every = int(save_every)
    rng = random_state if isinstance(random_state, np.random.Generator) else \
        np.random.default_rng(random_state)
    masses = np.asarray(model.masses, dtype=float)
    friction = getattr(model, "friction", None)
    friction = None if friction is None else np.asarray(friction, dtype=float)
    dt_au = dt / AU_TIME_FS
    n_steps = int(round(t_max / dt))
    n_saved = n_steps // save_every + 1
    n_s = model.n_states
    has_cat = hasattr(model, "cation_diabatic") and bool(getattr(model, "n_cation", 0))
    n_c = int(model.n_cation) if has_cat else 0
    dyson_d = np.asarray(model.dyson_diabatic, float) if has_cat and getattr(
        model, "dyson_diabatic", None) is not None else None

    def empty(*shape, fill=np.nan, dtype=float):
        return np.full((n_saved, n_traj) + shape, fill, dtype=dtype)

    out: dict[str, Any] = {
        "alive": np.zeros((n_saved, n_traj), dtype=bool),
        "q": empty(n_dof), "v": empty(n_dof),
        "active": np.full((n_saved, n_traj), -1, dtype=np.int64),
        "energies": empty(n_s), "populations": empty(n_s),
        "adt": empty(n_s, n_s), "overlaps": empty(n_s, n_s),
        "e_kin": empty(), "e_pot": empty(), "e_tot": empty(), "e_bath": empty(),
    }
    if has_cat:
        out["cation_energies"] = empty(n_c)
        out["adt_cation"] = empty(n_c, n_c)
        if dyson_d is not None:
            out["dyson"] = empty(n_s, n_c)
    u_saved = np.zeros((n_traj, n_s, n_s))
    uc_saved: np.ndarray | None = None

    def record(k: int, st: K.FSSHState, w: np.ndarray) -> None:
        nonlocal uc_saved
        ca = st.adiabatic_amplitudes()
        r = np.arange(w.size)
        e_kin = st.kinetic(masses)
        e_pot = st.e[r, st.active]
        out["alive"][k, w] = True
        out["q"][k, w] = st.q
        out["v"][k, w] = st.v
        out["active"][k, w] = st.active
        out["energies"][k, w] = st.e * HARTREE_EV
        out["populations"][k, w] = np.abs(ca) ** 2
        out["adt"][k, w] = st.u
        if k == 0:
            out["overlaps"][k, w] = np.eye(n_s)
        else:
            out["overlaps"][k, w] = np.einsum("nad,nbd->nab", u_saved[w], st.u)
        u_saved[w] = st.u
        out["e_kin"][k, w] = e_kin * HARTREE_EV
        out["e_pot"][k, w] = e_pot * HARTREE_EV
        out["e_bath"][k, w] = st.e_bath * HARTREE_EV
        out["e_tot"][k, w] = (e_pot + e_kin + st.e_bath) * HARTREE_EV
        if has_cat:
            vc = np.asarray(model.cation_diabatic(st.q), dtype=float)
            if k == 0:
                ec, uc = K.adiabatic_states(vc, None)
                uc_saved = np.zeros((n_traj, n_c, n_c))
            else:
                assert uc_saved is not None
                ec, uc = K.adiabatic_states(vc, uc_saved[w])
            uc_saved[w] = uc
            out["cation_energies"][k, w] = ec * HARTREE_EV
            out["adt_cation"][k, w] = uc
            if dyson_d is not None:
                out["dyson"][k, w] = np.einsum("nad,de,nke->nak", st.u**2, dyson_d, uc**2)

    st = K.initial_state(model, q0a, v0a, state0)
    exc, osc, mu = _initial_optics(model, st)
    w = np.arange(n_traj)
    final = {
        "final_time": np.full(n_traj, np.nan), "final_q": np.full((n_traj, n_dof), np.nan),
        "final_v": np.full((n_traj, n_dof), np.nan),
        "final_active": np.full(n_traj, -1, dtype=np.int64),
        "final_populations": np.full((n_traj, n_s), np.nan),
        "n_hops": np.zeros(n_traj, dtype=np.int64),
        "n_frustrated": np.zeros(n_traj, dtype=np.int64),
    }

    def finish(st: K.FSSHState, w: np.ndarray, t: float) -> None:
        final["final_time"][w] = t
        final["final_q"][w] = st.q
        final["final_v"][w] = st.v
        final["final_active"][w] = st.active
        final["final_populations"][w] = np.abs(st.adiabatic_amplitudes()) ** 2
        final["n_hops"][w] = st.n_hops
        final["n_frustrated"][w] = st.n_frustrated

    record(0, st, w)
    steps = range(1, n_steps + 1)
    if progress:
        from tqdm.auto import tqdm

        steps = tqdm(steps, desc="fssh", unit="step")
    kwargs: dict[str, Any] = dict(
        masses=masses, friction=friction, decoherence=decoherence == "edc", edc_c=float(edc_c),
        edc_e0=float(edc_e0), reverse_frustrated=frustrated == "reverse", n_sub=int(n_substeps))
    last_step = 0
    for step in steps:
        zeta = rng.random(n_traj)
        st = K.fssh_step(model, st, dt_au, zeta[w], **kwargs)
        last_step = step
        if stop is not None:
            done = np.asarray(stop(st.q, st.v, st.active), dtype=bool)
            if done.any():
                finish(st.take(done), w[done], step * dt)
                keep = ~done
                st, w = st.take(keep), w[keep]
                if w.size == 0:
                    break
        if step % save_every == 0:
            record(step // save_every, st, w)
    if w.size:
        finish(st, w, last_step * dt)
    settings = {
        "dt_fs": float(dt), "t_max_fs": float(t_max), "save_every": save_every,
        "decoherence": decoherence, "edc_c": float(edc_c), "edc_e0_hartree": float(edc_e0),
        "frustrated": frustrated, "n_substeps": int(n_substeps),
        "electronic_propagation": "unitary product exp(-iV(t+dt)dt/2) exp(-iV(t)dt/2)"
                                  if int(n_substeps) == 1 else
                                  "exact exponentials of the interpolated diabatic V",
        "hopping": "fewest switches, couplings from adiabatic-state overlaps",
        "rescaling": "along the nonadiabatic coupling vector",
        "model": type(model).__name__,
    }
    return FSSHResult(
        time=np.arange(n_saved) * save_every * dt,
        **out, **final,
        excitation_energies=exc, oscillator_strengths=osc, transition_dipoles=mu,
        settings=settings,
    )
