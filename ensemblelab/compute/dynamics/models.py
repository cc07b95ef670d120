"""Model Hamiltonians for the surface-hopping engine (diabatic representation, atomic units).

A model is any object with

``n_states`` : int
    Number of neutral electronic states.
``n_dof`` : int
    Number of nuclear degrees of freedom (generalised coordinates ``q``).
``masses`` : ndarray, shape (n_dof,)
    Mass (or moment of inertia) of each coordinate in atomic units, such that the
    kinetic energy is ``0.5 * sum(masses * v**2)`` hartree with ``v = dq/dt`` per
    atomic unit of time.
``diabatic(q)`` : (n_traj, n_dof) -> (n_traj, n_states, n_states)
    Real symmetric diabatic potential matrix V(q) in hartree.
``gradient(q)`` : (n_traj, n_dof) -> (n_traj, n_dof, n_states, n_states)
    dV/dq_m in hartree per coordinate unit.

and optionally

``n_cation``, ``cation_diabatic(q)`` -> (n_traj, n_cation, n_cation)
    Cation diabatic potential matrix (hartree, same zero as the neutral).
``dyson_diabatic`` : ndarray, shape (n_states, n_cation)
    Squared Dyson norms between neutral and cation *diabatic* states; the engine
    maps them to adiabatic pairs by diabatic character,
    ``dyson[a, k] = sum_{d, e} U[a, d]**2 * dyson_diabatic[d, e] * Uc[k, e]**2``.
``dipoles(q)`` -> (n_traj, 3, n_states, n_states)
    Diabatic (transition) dipole matrices in e*bohr.
``friction`` : ndarray, shape (n_dof,)
    Friction rates (1 / atomic time unit) of a zero-temperature damping step;
    the engine books the removed energy so that ``e_tot`` stays conserved.
``cartesian(q)`` -> (n_traj, n_atoms, 3) Angstrom, with ``symbols`` and ``atom_masses`` (amu)
    A geometry builder; without one the engine writes one pseudo-atom per
    trajectory at ``(q_0 * bohr, 0, 0)``.

Adiabatic states are the eigenvectors of V(q), ordered by energy; the engine keeps
their signs continuous along each trajectory. The adiabatic-to-diabatic matrix
``U`` follows the package convention ``adiabatic_a = sum_d U[a, d] diabatic_d``.

The three one-dimensional two-state models are those of J. Chem. Phys. 93, 1061
(1990), "Molecular dynamics with electronic transitions" (parameters from memory).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Protocol, runtime_checkable

import numpy as np
import numpy.typing as npt

from ...errors import SchemaError
from ...units import AMU_ME, AU_TIME_FS, BOHR_ANGSTROM, HARTREE_EV

__all__ = [
    "DiabaticModel",
    "SingleAvoidedCrossing",
    "DualAvoidedCrossing",
    "ExtendedCoupling",
    "LinearVibronicModel",
    "TorsionVibronicModel",
    "check_model",
]


@runtime_checkable
class DiabaticModel(Protocol):
    """The protocol every model follows (see the module docstring for optional parts)."""

    n_states: int
    n_dof: int
    masses: np.ndarray

    def diabatic(self, q: np.ndarray) -> np.ndarray:  # pragma: no cover - protocol
        """Diabatic potential matrix, (n_traj, n_states, n_states) hartree."""
        ...

    def gradient(self, q: np.ndarray) -> np.ndarray:  # pragma: no cover - protocol
        """dV/dq, (n_traj, n_dof, n_states, n_states) hartree per coordinate unit."""
        ...


def check_model(model: Any) -> None:
    """Validate a user model against the protocol with a two-point probe.

    Parameters
    ----------
    model : object
        Candidate model.

    Raises
    ------
    SchemaError
        Naming the missing attribute or the wrong shape, with a hint.
    """
    for name in ("n_states", "n_dof", "masses", "diabatic", "gradient"):
        if not hasattr(model, name):
            raise SchemaError(
                f"model {type(model).__name__} lacks {name!r}; a model needs n_states, n_dof, "
                "masses, diabatic(q) and gradient(q) (see ensemblelab.compute.dynamics.models)."
            )
    n, f = int(model.n_states), int(model.n_dof)
    m = np.asarray(model.masses, dtype=float)
    if m.shape != (f,) or not np.all(m > 0):
        raise SchemaError(f"model.masses must be positive with shape (n_dof={f},); got {m!r}.")
    q = np.zeros((2, f))
    v = np.asarray(model.diabatic(q))
    g = np.asarray(model.gradient(q))
    if v.shape != (2, n, n):
        raise SchemaError(
            f"model.diabatic(q) must return shape (n_traj, n_states, n_states) = (2, {n}, {n}) "
            f"for q of shape (2, {f}); got {v.shape}."
        )
    if g.shape != (2, f, n, n):
        raise SchemaError(
            f"model.gradient(q) must return shape (n_traj, n_dof, n_states, n_states) = "
            f"(2, {f}, {n}, {n}); got {g.shape}."
        )
    if not np.allclose(v, np.swapaxes(v, 1, 2)):
        raise SchemaError("model.diabatic(q) must be symmetric in its last two axes.")


class _OneDimensional:
    """Shared parts of the 1-D two-state models (x in bohr, mass 2000 m_e)."""

    n_states = 2
    n_dof = 1
    symbols = ("H",)

    def __init__(self, mass: float = 2000.0) -> None:
        self.masses = np.array([float(mass)])
        self.atom_masses = self.masses / AMU_ME

    def cartesian(self, q: np.ndarray) -> np.ndarray:
        """One pseudo-atom at (x, 0, 0) in Angstrom, shape (n_traj, 1, 3)."""
        out = np.zeros(q.shape[:-1] + (1, 3))
        out[..., 0, 0] = q[..., 0] * BOHR_ANGSTROM
        return out

    def _pack(self, v11, v22, v12):
        v = np.empty(v11.shape + (2, 2))
        v[..., 0, 0] = v11
        v[..., 1, 1] = v22
        v[..., 0, 1] = v[..., 1, 0] = v12
        return v


@dataclass
class SingleAvoidedCrossing(_OneDimensional):
    """Simple avoided crossing (model I of J. Chem. Phys. 93, 1061 (1990)).

    ``V11 = A (1 - exp(-B x))`` for x > 0, ``-A (1 - exp(B x))`` for x < 0,
    ``V22 = -V11``, ``V12 = C exp(-D x^2)``; atomic units.

    Examples
    --------
    >>> m = SingleAvoidedCrossing()
    >>> round(float(m.diabatic(np.zeros((1, 1)))[0, 0, 1]), 6)
    0.005
    """

    A: float = 0.01
    B: float = 1.6
    C: float = 0.005
    D: float = 1.0
    mass: float = 2000.0

    def __post_init__(self) -> None:
        _OneDimensional.__init__(self, self.mass)

    def diabatic(self, q: np.ndarray) -> np.ndarray:
        x = np.asarray(q, float)[..., 0]
        v11 = np.sign(x) * self.A * (1.0 - np.exp(-self.B * np.abs(x)))
        return self._pack(v11, -v11, self.C * np.exp(-self.D * x**2))

    def gradient(self, q: np.ndarray) -> np.ndarray:
        x = np.asarray(q, float)[..., 0]
        d11 = self.A * self.B * np.exp(-self.B * np.abs(x))
        d12 = -2.0 * self.D * x * self.C * np.exp(-self.D * x**2)
        return self._pack(d11, -d11, d12)[..., None, :, :]


@dataclass
class DualAvoidedCrossing(_OneDimensional):
    """Dual avoided crossing (model II of J. Chem. Phys. 93, 1061 (1990)).

    ``V11 = 0``, ``V22 = -A exp(-B x^2) + E0``, ``V12 = C exp(-D x^2)``; atomic units.
    """

    A: float = 0.10
    B: float = 0.28
    E0: float = 0.05
    C: float = 0.015
    D: float = 0.06
    mass: float = 2000.0

    def __post_init__(self) -> None:
        _OneDimensional.__init__(self, self.mass)

    def diabatic(self, q: np.ndarray) -> np.ndarray:
        x = np.asarray(q, float)[..., 0]
        return self._pack(np.zeros_like(x), -self.A * np.exp(-self.B * x**2) + self.E0,
                          self.C * np.exp(-self.D * x**2))

    def gradient(self, q: np.ndarray) -> np.ndarray:
        x = np.asarray(q, float)[..., 0]
        d22 = 2.0 * self.A * self.B * x * np.exp(-self.B * x**2)
        d12 = -2.0 * self.C * self.D * x * np.exp(-self.D * x**2)
        return self._pack(np.zeros_like(x), d22, d12)[..., None, :, :]


@dataclass
class ExtendedCoupling(_OneDimensional):
    """Extended coupling with reflection (model III of J. Chem. Phys. 93, 1061 (1990)).

    ``V11 = A``, ``V22 = -A``, ``V12 = B exp(C x)`` for x < 0 and
    ``B (2 - exp(-C x))`` for x > 0; atomic units.
    """

    A: float = 6e-4
    B: float = 0.10
    C: float = 0.90
    mass: float = 2000.0

    def __post_init__(self) -> None:
        _OneDimensional.__init__(self, self.mass)

    def diabatic(self, q: np.ndarray) -> np.ndarray:
        x = np.asarray(q, float)[..., 0]
        e = np.exp(-self.C * np.abs(x))
        v12 = np.where(x < 0, self.B * e, self.B * (2.0 - e))
        return self._pack(np.full_like(x, self.A), np.full_like(x, -self.A), v12)

    def gradient(self, q: np.ndarray) -> np.ndarray:
        x = np.asarray(q, float)[..., 0]
        d12 = self.B * self.C * np.exp(-self.C * np.abs(x))
        z = np.zeros_like(x)
        return self._pack(z, z, d12)[..., None, :, :]


def _as_matrix(a: npt.ArrayLike | None, shape: tuple[int, ...], name: str) -> np.ndarray:
    if a is None:
        return np.zeros(shape)
    arr = np.asarray(a, dtype=float)
    if arr.shape != shape:
        raise SchemaError(f"{name} must have shape {shape}; got {arr.shape}.")
    return arr


class LinearVibronicModel:
    """Linear vibronic coupling model in dimensionless normal coordinates.

    ``H = sum_m (omega_m / 2)(p_m^2 + q_m^2) 1 + W(q)`` with
    ``W_ii = E_i + sum_m kappa[m, i] q_m`` and ``W_ij = eta_ij + sum_m lam[m, i, j] q_m``.
    Parameters are in eV; internally the model works in hartree with masses
    ``1 / omega_m`` so that ``hbar dq/dt = omega p`` (dimensionless normal coordinates).

    Parameters
    ----------
    energies : array_like, shape (n_states,)
        Vertical diabatic energies E_i at q = 0 (eV).
    frequencies : array_like, shape (n_modes,)
        Mode energies hbar omega_m (eV).
    kappa : array_like, shape (n_modes, n_states), optional
        Intrastate (tuning) gradients (eV).
    lam : array_like, shape (n_modes, n_states, n_states), optional
        Interstate couplings (eV); symmetrised.
    eta : array_like, shape (n_states, n_states), optional
        Constant diabatic couplings (eV); symmetrised, diagonal ignored.

    Examples
    --------
    >>> m = LinearVibronicModel(energies=[0.0], frequencies=[0.1], kappa=[[0.05]])
    >>> m.n_states, m.n_dof
    (1, 1)
    """

    def __init__(
        self,
        *,
        energies: npt.ArrayLike,
        frequencies: npt.ArrayLike,
        kappa: npt.ArrayLike | None = None,
        lam: npt.ArrayLike | None = None,
        eta: npt.ArrayLike | None = None,
    ) -> None:
        e = np.atleast_1d(np.asarray(energies, dtype=float))
        w = np.atleast_1d(np.asarray(frequencies, dtype=float))
        if np.any(w <= 0):
            raise SchemaError(f"frequencies must be > 0 eV; got {w!r}.")
        n, f = e.size, w.size
        self.n_states, self.n_dof = n, f
        self.energies_ev = e
        self.frequencies_ev = w
        self.kappa_ev = _as_matrix(kappa, (f, n), "kappa")
        lam_a = _as_matrix(lam, (f, n, n), "lam")
        self.lam_ev = 0.5 * (lam_a + np.swapaxes(lam_a, 1, 2))
        eta_a = _as_matrix(eta, (n, n), "eta")
        eta_a = 0.5 * (eta_a + eta_a.T)
        np.fill_diagonal(eta_a, 0.0)
        self.eta_ev = eta_a
        self._omega = w / HARTREE_EV
        self.masses = 1.0 / self._omega
        # constant and linear parts of W in hartree
        self._w0 = (np.diag(e) + eta_a) / HARTREE_EV
        lin = self.lam_ev.copy()
        for m in range(f):
            lin[m] = lin[m] - np.diag(np.diag(lin[m])) + np.diag(self.kappa_ev[m])
        self._w1 = lin / HARTREE_EV  # (n_dof, n, n)

    def diabatic(self, q: np.ndarray) -> np.ndarray:
        q = np.asarray(q, float)
        harm = 0.5 * np.einsum("m,nm->n", self._omega, q * q)
        v = self._w0 + np.einsum("nm,mij->nij", q, self._w1)
        v += harm[:, None, None] * np.eye(self.n_states)
        return v

    def gradient(self, q: np.ndarray) -> np.ndarray:
        q = np.asarray(q, float)
        g = np.broadcast_to(self._w1, (q.shape[0],) + self._w1.shape).copy()
        idx = np.arange(self.n_states)
        g[:, :, idx, idx] += (self._omega * q)[:, :, None]
        return g


@dataclass
class TorsionVibronicModel:
    """Vibronic coupling model with one large-amplitude torsion and harmonic modes.

    Models of this type (a torsion with cosine diabatic potentials plus linearly
    coupled harmonic modes) are used for photoisomerisation, e.g. J. Phys. Chem. B
    104, 1146 (2000), "Quantum-mechanical modeling of the femtosecond isomerization
    in rhodopsin" (from memory). Coordinates ``q = (phi, x_1, ..., x_M)``: phi is the
    torsion angle in radians (moment of inertia `inertia`), x_m dimensionless
    normal coordinates. Diabatic energies (eV)::

        V_d = E_d + W_d/2 (1 - cos 2 phi) + A_d/2 (1 - cos phi)
              + sum_m kappa[m, d] x_m + sum_m omega_m x_m^2 / 2
        V_de = eta_de + sum_m lam[m, d, e] x_m

    so W_d > 0 gives a state that is planar (phi = 0 or pi) and W_d < 0 one that
    is twisted (phi = pi / 2), and A_d makes the two planar isomers inequivalent.
    Cation states use the same form (``cation_*`` parameters, no couplings to
    the neutral). Units: eV for energies, amu Angstrom^2 for `inertia`.

    Parameters
    ----------
    energies, twist, asymmetry : array_like, shape (n_states,)
        E_d, W_d and A_d of the neutral diabats (eV).
    frequencies : array_like, shape (n_modes,)
        hbar omega_m of the harmonic modes (eV).
    kappa : array_like, shape (n_modes, n_states)
    lam : array_like, shape (n_modes, n_states, n_states)
    eta : array_like, shape (n_states, n_states)
    inertia : float
        Moment of inertia of the torsion in amu Angstrom^2.
    cation_energies, cation_twist, cation_asymmetry : array_like, shape (n_cation,)
    cation_kappa : array_like, shape (n_modes, n_cation)
    cation_eta : array_like, shape (n_cation, n_cation)
    dyson_diabatic : array_like, shape (n_states, n_cation)
        Squared Dyson norms between diabats.
    dipole_diabatic : array_like, shape (n_states, n_states)
        Diabatic transition dipoles along the molecular x axis (e*bohr).
    torsion_friction : float
        Zero-temperature friction rate on the torsion in 1/fs (0: none).
    """

    energies: Any
    twist: Any
    asymmetry: Any
    frequencies: Any
    kappa: Any
    lam: Any
    eta: Any
    inertia: float
    cation_energies: Any = None
    cation_twist: Any = None
    cation_asymmetry: Any = None
    cation_kappa: Any = None
    cation_eta: Any = None
    dyson_diabatic: Any = None
    dipole_diabatic: Any = None
    torsion_friction: float = 0.0

    def __post_init__(self) -> None:
        e = np.atleast_1d(np.asarray(self.energies, float))
        w = np.atleast_1d(np.asarray(self.frequencies, float))
        n, f = e.size, w.size
        self.n_states = n
        self.n_dof = f + 1
        self.n_modes = f
        h = 1.0 / HARTREE_EV
        self._e = e * h
        self._W = _as_matrix(self.twist, (n,), "twist") * h
        self._A = _as_matrix(self.asymmetry, (n,), "asymmetry") * h
        self._omega = w * h
        self._kappa = _as_matrix(self.kappa, (f, n), "kappa") * h
        lam = _as_matrix(self.lam, (f, n, n), "lam")
        lam = 0.5 * (lam + np.swapaxes(lam, 1, 2))
        idx = np.arange(n)
        lam[:, idx, idx] = 0.0
        self._lam = lam * h
        eta = _as_matrix(self.eta, (n, n), "eta")
        eta = 0.5 * (eta + eta.T)
        np.fill_diagonal(eta, 0.0)
        self._eta = eta * h
        inertia_au = float(self.inertia) * AMU_ME / BOHR_ANGSTROM**2
        self.masses = np.concatenate([[inertia_au], 1.0 / self._omega])
        fr = np.zeros(self.n_dof)
        fr[0] = float(self.torsion_friction) * AU_TIME_FS
        self.friction = fr if fr[0] > 0 else None
        if self.cation_energies is not None:
            ce = np.atleast_1d(np.asarray(self.cation_energies, float))
            k = ce.size
            self.n_cation = k
            self._ce = ce * h
            self._cW = _as_matrix(self.cation_twist, (k,), "cation_twist") * h
            self._cA = _as_matrix(self.cation_asymmetry, (k,), "cation_asymmetry") * h
            self._ckappa = _as_matrix(self.cation_kappa, (f, k), "cation_kappa") * h
            ceta = _as_matrix(self.cation_eta, (k, k), "cation_eta")
            ceta = 0.5 * (ceta + ceta.T)
            np.fill_diagonal(ceta, 0.0)
            self._ceta = ceta * h
            self.dyson_diabatic = _as_matrix(self.dyson_diabatic, (n, k), "dyson_diabatic")
        if self.dipole_diabatic is not None:
            self.dipole_diabatic = _as_matrix(self.dipole_diabatic, (n, n), "dipole_diabatic")

    # -- neutral
    def _diag(self, q, e, W, A, kappa):
        phi, x = q[:, 0], q[:, 1:]
        d = (e + 0.5 * W * (1.0 - np.cos(2.0 * phi))[:, None]
             + 0.5 * A * (1.0 - np.cos(phi))[:, None] + x @ kappa)
        d += (0.5 * (x * x) @ self._omega)[:, None]
        return d

    def diabatic(self, q: np.ndarray) -> np.ndarray:
        q = np.asarray(q, float)
        v = self._eta + np.einsum("nm,mij->nij", q[:, 1:], self._lam)
        idx = np.arange(self.n_states)
        v[:, idx, idx] = self._diag(q, self._e, self._W, self._A, self._kappa)
        return v

    def gradient(self, q: np.ndarray) -> np.ndarray:
        q = np.asarray(q, float)
        nt = q.shape[0]
        g = np.zeros((nt, self.n_dof, self.n_states, self.n_states))
        g[:, 1:] = self._lam
        idx = np.arange(self.n_states)
        phi = q[:, 0]
        g[:, 0, idx, idx] = (self._W * np.sin(2.0 * phi)[:, None]
                             + 0.5 * self._A * np.sin(phi)[:, None])
        g[:, 1:, idx, idx] = self._kappa + (self._omega * q[:, 1:])[:, :, None]
        return g

    # -- cation
    def cation_diabatic(self, q: np.ndarray) -> np.ndarray:
        """Cation diabatic matrix, (n_traj, n_cation, n_cation) hartree."""
        q = np.asarray(q, float)
        v = np.broadcast_to(self._ceta, (q.shape[0],) + self._ceta.shape).copy()
        idx = np.arange(self.n_cation)
        v[:, idx, idx] = self._diag(q, self._ce, self._cW, self._cA, self._ckappa)
        return v

    def dipoles(self, q: np.ndarray) -> np.ndarray:
        """Diabatic dipole matrices along x, (n_traj, 3, n_states, n_states) e*bohr."""
        q = np.asarray(q, float)
        out = np.zeros((q.shape[0], 3, self.n_states, self.n_states))
        if self.dipole_diabatic is not None:
            out[:, 0] = self.dipole_diabatic
        return out
