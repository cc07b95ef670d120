"""Array-level kernels of the vectorised fewest-switches surface-hopping engine (private).

Everything here works in Hartree atomic units on arrays over the whole ensemble
(leading axis n_traj); no Python loop runs over trajectories. Inputs are assumed
valid (the driver in :mod:`ensemblelab.compute.dynamics.fssh` checks them).

Scheme of one step of length dt (fewest switches: J. Chem. Phys. 93, 1061 (1990), "Molecular
dynamics with electronic transitions"):

1. velocity Verlet on the active adiabatic surface (Hellmann-Feynman forces
   ``-<a|dV/dq|a>``), with an optional zero-temperature friction step whose
   removed energy is booked in ``e_bath``;
2. electronic amplitudes propagated with the unitary symmetric product
   ``c_d <- exp(-i V(t+dt) dt/2) exp(-i V(t) dt/2) c_d`` (second order), evaluated in
   the adiabatic bases at both ends with the exact state overlaps,
   ``c_a(t+dt) = exp(-i E(t+dt) dt/2) S^T exp(-i E(t) dt/2) c_a(t)``; with
   sub-steps, exact exponentials of the linearly interpolated diabatic matrix at
   the sub-step midpoints. Both are unitary, so the norm is conserved to round-off,
   and neither needs nonadiabatic coupling vectors;
3. adiabatic amplitudes ``c_a = U c_d`` at both ends of the step, time-derivative
   couplings from the overlaps ``S_ab = <a(t)|b(t+dt)>`` as
   ``sigma_ab dt = (S_ab - S_ba) / 2`` (captures couplings that peak inside the
   step), and the fewest-switches probability
   ``g_al = max(0, 2 Re(rho_al sigma_al dt) / rho_aa)`` with rho averaged over the
   two ends of the step;
4. one uniform number per trajectory decides the hop; the momentum is rescaled
   along the nonadiabatic coupling vector ``<a|dV/dq|l>`` (mass-weighted,
   smaller root, J. Chem. Phys. 101, 4657 (1994), from memory); hops without
   enough energy are frustrated (velocity kept, or its component along the
   coupling vector reversed when the target force opposes the motion);
5. optional energy-based decoherence correction, J. Chem. Phys. 126, 134114
   (2007), "Critical appraisal of the fewest switches algorithm for surface
   hopping" (from memory): ``tau_la = hbar / |E_l - E_a| (C + E0 / E_kin)``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = [
    "adiabatic_states",
    "adiabatic_gradients",
    "propagate_diabatic",
    "hop_probabilities",
    "FSSHState",
    "evaluate",
    "fssh_step",
]


def adiabatic_states(
    v: np.ndarray, u_prev: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """Diagonalise diabatic matrices with phase continuity.

    Parameters
    ----------
    v : ndarray, shape (n_traj, n, n)
        Real symmetric diabatic matrices.
    u_prev : ndarray, shape (n_traj, n, n), optional
        Adiabatic-to-diabatic matrices of the previous step; each new adiabatic
        vector gets the sign that makes its overlap with the previous one
        non-negative. Without it the largest component of every vector is made
        positive.

    Returns
    -------
    energies : ndarray, shape (n_traj, n)
        Ascending adiabatic energies.
    u : ndarray, shape (n_traj, n, n)
        ``u[:, a, d]``: adiabatic state a = sum_d u[a, d] diabatic d.
    """
    if v.shape[-1] == 2:
        e, u = _eigh2(v)
    else:
        e, w = np.linalg.eigh(v)
        u = np.swapaxes(w, -1, -2).copy()
    if u_prev is None:
        big = np.argmax(np.abs(u), axis=-1)
        ref = np.take_along_axis(u, big[..., None], axis=-1)[..., 0]
        sign = np.where(ref < 0, -1.0, 1.0)
    else:
        ov = np.einsum("...ad,...ad->...a", u, u_prev)
        sign = np.where(ov < 0, -1.0, 1.0)
    u *= sign[..., None]
    return e, u


def _eigh2(v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Closed-form eigenpairs of real symmetric 2x2 matrices (rows of U = eigenvectors)."""
    a, b, c = v[..., 0, 0], v[..., 0, 1], v[..., 1, 1]
    m = 0.5 * (a + c)
    d = 0.5 * (a - c)
    r = np.hypot(d, b)
    th = 0.5 * np.arctan2(b, d)
    cs, sn = np.cos(th), np.sin(th)
    e = np.stack([m - r, m + r], axis=-1)
    u = np.empty(v.shape)
    u[..., 0, 0], u[..., 0, 1] = -sn, cs
    u[..., 1, 0], u[..., 1, 1] = cs, sn
    return e, u


def adiabatic_gradients(u: np.ndarray, g: np.ndarray) -> np.ndarray:
    """``<a|dV/dq_m|b>``: shape (n_traj, n_dof, n, n) from U (n_traj, n, n) and dV/dq."""
    if g.shape[1] == 1:
        return (u @ g[:, 0] @ np.swapaxes(u, -1, -2))[:, None]
    return u[:, None] @ g @ np.swapaxes(u, -1, -2)[:, None]


def _apply(u: np.ndarray, c: np.ndarray) -> np.ndarray:
    """``U c`` for stacks: (n_traj, n, n) real x (n_traj, n) -> (n_traj, n)."""
    if np.iscomplexobj(c):
        return (np.einsum("nad,nd->na", u, c.real)
                + 1j * np.einsum("nad,nd->na", u, c.imag))
    return np.einsum("nad,nd->na", u, c)


def propagate_diabatic(
    c: np.ndarray, v0: np.ndarray, v1: np.ndarray, dt: float, n_sub: int = 1
) -> np.ndarray:
    """Propagate diabatic amplitudes with exact exponentials of the interpolated V.

    Parameters
    ----------
    c : ndarray of complex, shape (n_traj, n)
    v0, v1 : ndarray, shape (n_traj, n, n)
        Diabatic matrices at the start and the end of the step (hartree).
    dt : float
        Step in atomic units of time.
    n_sub : int
        Number of sub-steps; sub-step k uses V at the fraction (k + 1/2) / n_sub.

    Returns
    -------
    ndarray of complex, shape (n_traj, n)
    """
    h = dt / n_sub
    for k in range(n_sub):
        s = (k + 0.5) / n_sub
        vm = v0 + s * (v1 - v0)
        if vm.shape[-1] == 2:
            # exp(-i H h) = exp(-i m h) [cos(r h) 1 - i sin(r h) / r (H - m 1)]
            a, b, cc = vm[:, 0, 0], vm[:, 0, 1], vm[:, 1, 1]
            m = 0.5 * (a + cc)
            d = 0.5 * (a - cc)
            r = np.hypot(d, b)
            cr = np.cos(r * h)
            sr = np.sinc(r * h / np.pi) * h  # sin(r h) / r, finite at r = 0
            ph = np.exp(-1j * m * h)
            c0, c1 = c[:, 0], c[:, 1]
            n0 = cr * c0 - 1j * sr * (d * c0 + b * c1)
            n1 = cr * c1 - 1j * sr * (b * c0 - d * c1)
            c = np.stack([ph * n0, ph * n1], axis=1)
        else:
            e, w = np.linalg.eigh(vm)
            proj = (np.swapaxes(w, 1, 2) @ c[:, :, None])[:, :, 0]
            c = (w @ (np.exp(-1j * h * e) * proj)[:, :, None])[:, :, 0]
    return c


def hop_probabilities(
    ca0: np.ndarray, ca1: np.ndarray, s: np.ndarray, active: np.ndarray
) -> np.ndarray:
    """Fewest-switches hopping probabilities from overlaps.

    Parameters
    ----------
    ca0, ca1 : ndarray of complex, shape (n_traj, n)
        Adiabatic amplitudes at t and t + dt (each in its own, sign-continuous basis).
    s : ndarray, shape (n_traj, n, n)
        Overlaps ``<a(t)|b(t+dt)>``.
    active : ndarray of int, shape (n_traj,)

    Returns
    -------
    ndarray, shape (n_traj, n)
        g_al (zero for l = a), clipped to [0, 1].
    """
    r = np.arange(ca0.shape[0])
    t_dt = 0.5 * (s - np.swapaxes(s, -1, -2))[r, active]  # sigma_al dt, shape (n_traj, n)
    rho = 0.5 * (np.conj(ca0[r, active])[:, None] * ca0 + np.conj(ca1[r, active])[:, None] * ca1)
    pop = np.maximum(rho[r, active].real, 1e-300)
    g = 2.0 * (rho * t_dt).real / pop[:, None]
    g[r, active] = 0.0
    return np.clip(g, 0.0, 1.0)


@dataclass
class FSSHState:
    """The ensemble state between steps (atomic units; arrays over n_traj)."""

    q: np.ndarray  # (n_traj, n_dof)
    v: np.ndarray  # (n_traj, n_dof)
    c: np.ndarray  # (n_traj, n) complex, diabatic amplitudes
    active: np.ndarray  # (n_traj,) int
    vd: np.ndarray  # (n_traj, n, n) diabatic matrix at q
    e: np.ndarray  # (n_traj, n) adiabatic energies
    u: np.ndarray  # (n_traj, n, n) ADT matrices
    g: np.ndarray  # (n_traj, n_dof, n, n) diabatic gradient matrices dV/dq
    e_bath: np.ndarray  # (n_traj,) energy removed by friction
    n_hops: np.ndarray  # (n_traj,) int
    n_frustrated: np.ndarray  # (n_traj,) int

    def take(self, idx: np.ndarray) -> FSSHState:
        """The sub-ensemble of trajectories `idx`."""
        return FSSHState(**{k: getattr(self, k)[idx] for k in self.__dataclass_fields__})

    def adiabatic_amplitudes(self) -> np.ndarray:
        """``c_a = U c_d``, shape (n_traj, n)."""
        return _apply(self.u, self.c)

    def kinetic(self, masses: np.ndarray) -> np.ndarray:
        """Nuclear kinetic energy (hartree), shape (n_traj,)."""
        return 0.5 * (self.v * self.v) @ masses


def evaluate(model, q: np.ndarray, u_prev: np.ndarray | None):
    """Diabatic matrix, adiabatic energies, ADT and diabatic gradients at q."""
    vd = np.asarray(model.diabatic(q), dtype=float)
    g = np.asarray(model.gradient(q), dtype=float)
    e, u = adiabatic_states(vd, u_prev)
    return vd, e, u, g


def _coupling(g: np.ndarray, u: np.ndarray, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """``<a|dV/dq|b>`` for one pair of adiabatic states per trajectory, shape (n_traj, n_dof)."""
    r = np.arange(g.shape[0])
    ua, ub = u[r, a], u[r, b]
    return np.einsum("nmd,nd->nm", np.einsum("nmde,ne->nmd", g, ub), ua)


def _active_force(g: np.ndarray, u: np.ndarray, active: np.ndarray) -> np.ndarray:
    """Hellmann-Feynman force ``-<a|dV/dq|a>`` on the active state, shape (n_traj, n_dof)."""
    return -_coupling(g, u, active, active)


def initial_state(model, q: np.ndarray, v: np.ndarray, state: np.ndarray) -> FSSHState:
    """Build the state at t = 0 with all population on adiabatic `state`."""
    vd, e, u, g = evaluate(model, q, None)
    n_traj, n = e.shape
    ca = np.zeros((n_traj, n), dtype=complex)
    ca[np.arange(n_traj), state] = 1.0
    c = _apply(np.swapaxes(u, 1, 2), ca)
    z = np.zeros(n_traj, dtype=np.int64)
    return FSSHState(q=q.copy(), v=v.copy(), c=c, active=state.astype(np.int64).copy(), vd=vd,
                     e=e, u=u, g=g, e_bath=np.zeros(n_traj), n_hops=z, n_frustrated=z.copy())


def fssh_step(
    model,
    st: FSSHState,
    dt: float,
    zeta: np.ndarray,
    *,
    masses: np.ndarray,
    friction: np.ndarray | None = None,
    decoherence: bool = False,
    edc_c: float = 1.0,
    edc_e0: float = 0.1,
    reverse_frustrated: bool = False,
    n_sub: int = 1,
) -> FSSHState:
    """Advance every trajectory by one step (atomic units); returns the new state.

    Parameters
    ----------
    model : DiabaticModel
    st : FSSHState
    dt : float
        Time step (atomic units).
    zeta : ndarray, shape (n_traj,)
        Uniform random numbers in [0, 1), one per trajectory.
    masses : ndarray, shape (n_dof,)
    friction : ndarray, shape (n_dof,), optional
        Damping rates (1 / atomic time).
    decoherence : bool
        Apply the energy-based decoherence correction with `edc_c` and `edc_e0` (hartree).
    reverse_frustrated : bool
        Reverse the velocity component along the coupling vector after a
        frustrated hop when the target-state force opposes it.
    n_sub : int
        Electronic sub-steps.
    """
    n_traj = st.q.shape[0]
    r = np.arange(n_traj)
    inv_m = 1.0 / masses
    f0 = _active_force(st.g, st.u, st.active)
    v_half = st.v + (0.5 * dt) * f0 * inv_m
    q1 = st.q + dt * v_half
    vd1, e1, u1, g1 = evaluate(model, q1, st.u)
    active = st.active.copy()
    f1 = _active_force(g1, u1, active)
    v1 = v_half + (0.5 * dt) * f1 * inv_m
    e_bath = st.e_bath.copy()
    if friction is not None:
        damp = np.exp(-friction * dt)
        v_d = v1 * damp
        e_bath += 0.5 * (v1 * v1 - v_d * v_d) @ masses
        v1 = v_d
    # electronic propagation (unitary); s[a, b] = <a(t)|b(t+dt)>
    s = st.u @ np.swapaxes(u1, 1, 2)
    ca0 = _apply(st.u, st.c)
    if n_sub == 1:
        # exp(-i V(t+dt) dt/2) exp(-i V(t) dt/2) written in the two adiabatic bases
        half = np.exp(-0.5j * dt * st.e) * ca0
        ca1 = np.exp(-0.5j * dt * e1) * _apply(np.swapaxes(s, 1, 2), half)
        c1 = _apply(np.swapaxes(u1, 1, 2), ca1)
    else:
        c1 = propagate_diabatic(st.c, st.vd, vd1, dt, n_sub)
        ca1 = _apply(u1, c1)
    g = hop_probabilities(ca0, ca1, s, active)
    cum = np.cumsum(g, axis=1)
    will = zeta < cum[:, -1]
    n_hops = st.n_hops.copy()
    n_frus = st.n_frustrated.copy()
    if np.any(will):
        idx = np.flatnonzero(will)
        target = np.argmax(zeta[idx, None] < cum[idx], axis=1)
        a = active[idx]
        # direction of the nonadiabatic coupling vector <a|dV/dq|l> / (E_l - E_a)
        d = _coupling(g1[idx], u1[idx], a, target)
        vv = v1[idx]
        dn = np.sqrt(np.sum(d * d, axis=1))
        no_d = dn <= 1e-300
        if np.any(no_d):  # coupling vector unavailable: rescale along v (common practice)
            d[no_d] = vv[no_d]
            dn[no_d] = np.sqrt(np.sum(vv[no_d] ** 2, axis=1))
        d = d / np.maximum(dn, 1e-300)[:, None]
        aa = 0.5 * np.sum(d * d * inv_m, axis=1)
        bb = np.sum(vv * d, axis=1)
        du = e1[idx, target] - e1[idx, a]
        disc = bb * bb - 4.0 * aa * du
        ok = disc >= 0.0
        sgn = np.where(bb < 0, -1.0, 1.0)
        gamma = np.where(ok, (bb - sgn * np.sqrt(np.where(ok, disc, 0.0))) / (2.0 * aa), 0.0)
        vv = vv - gamma[:, None] * d * inv_m
        if reverse_frustrated:
            ft = -_coupling(g1[idx], u1[idx], target, target)
            rev = ~ok & (np.sum(ft * d, axis=1) * bb < 0)
            vv = np.where(rev[:, None], vv - (bb / aa)[:, None] * d * inv_m, vv)
        v1[idx] = vv
        active[idx[ok]] = target[ok]
        n_hops[idx[ok]] += 1
        n_frus[idx[~ok]] += 1
    if decoherence:
        e_kin = 0.5 * (v1 * v1) @ masses
        de = np.abs(e1 - e1[r, active][:, None])
        with np.errstate(divide="ignore", invalid="ignore"):
            rate = de / (edc_c + edc_e0 / e_kin)[:, None]
        rate = np.where(np.isfinite(rate), rate, 0.0)
        fac = np.exp(-dt * rate)
        fac[r, active] = 1.0
        ca1 = ca1 * fac
        p = np.abs(ca1) ** 2
        rest = p.sum(axis=1) - p[r, active]
        pa = np.maximum(p[r, active], 1e-300)
        ca1[r, active] *= np.sqrt(np.maximum(1.0 - rest, 0.0) / pa)
        c1 = _apply(np.swapaxes(u1, 1, 2), ca1)
    return FSSHState(q=q1, v=v1, c=c1, active=active, vd=vd1, e=e1, u=u1, g=g1,
                     e_bath=e_bath, n_hops=n_hops, n_frustrated=n_frus)
