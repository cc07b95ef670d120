"""The demo scenario: an invented push-pull chromophore with a twistable C=C bond.

Everything here is invented for demonstrations and tests; it models no real
molecule. The electronic structure is a three-state vibronic coupling model with
one large-amplitude torsion (model type of J. Phys. Chem. B 104, 1146 (2000),
"Quantum-mechanical modeling of the femtosecond isomerization in rhodopsin",
from memory; parameters our own):

* diabats G (closed shell, planar), E (twisting pi-pi*, lowest at 90 degrees)
  and B (bright state, weakly twist-dependent);
* three harmonic modes: C=C stretch x_t (tunes B against E), an in-plane mode
  x_c (couples B and E) and the pyramidalisation x_p at the twisted carbon
  (couples E and G, so that G and E meet in a twisted conical intersection);
* small diabatic couplings, so that hops happen near the crossing seams at small
  gaps (mostly below 0.3 eV), as in internal conversion;
* a weak zero-temperature friction on the torsion stands in for energy flow to
  the solvent and the other modes (its work is booked in ``e_tot``);
* three cation diabats (pi hole, pi* / second-pi hole, lone-pair hole) with their
  own twist dependence, and squared Dyson norms between diabats, so photoelectron
  bands follow the diabatic character and shift as the molecule twists.

After excitation of the bright state (S2) the population crosses to S1 within
tens of fs; on S1 the molecule twists and returns to S0 through the twisted
intersection within a few hundred fs, part of it on the other isomer side
(torsion near 180 degrees).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..compute.dynamics._kernels_fssh import adiabatic_states
from ..compute.dynamics.models import TorsionVibronicModel
from ..compute.dynamics.wigner import sample_normal_modes
from ..data.elements import masses_for
from ..units import AMU_ME, AU_TIME_FS, BOHR_ANGSTROM, HARTREE_CM1

__all__ = ["DemoScenario", "DemoMolecule", "DEFAULT_SCENARIO"]


def _t(x: Any) -> tuple:
    return tuple(tuple(r) if isinstance(r, (list, tuple)) else r for r in x)


@dataclass(frozen=True)
class DemoScenario:
    """Parameters of the invented demo chromophore (energies in eV).

    Modes are ordered ``(x_t, x_c, x_p)``; states ``(G, E, B)``; cation states
    ``(C0, C1, C2)``. Use :meth:`perturbed` to build a modified model (for example
    an invented "measured" reference). See :class:`TorsionVibronicModel` for the
    meaning of every field.
    """

    energies: tuple = (0.0, 4.45, 4.75)
    twist: tuple = (2.2, -2.3, 0.6)
    asymmetry: tuple = (0.2, 0.1, 0.1)
    frequencies: tuple = (0.19, 0.12, 0.08)
    kappa: tuple = ((0.0, 0.10, -0.20), (0.0, 0.0, 0.0), (0.0, 0.0, 0.0))
    coupling_ce: float = 0.10  # lam of x_c between E and B
    coupling_pe: float = 0.16  # lam of x_p between G and E
    eta_eb: float = 0.03  # constant E-B coupling
    inertia: float = 30.0  # amu Angstrom^2
    torsion_friction: float = 0.0075  # 1/fs
    cation_energies: tuple = (7.0, 8.2, 9.0)
    cation_twist: tuple = (1.0, -0.6, 0.3)
    cation_asymmetry: tuple = (0.1, 0.1, 0.0)
    cation_kappa: tuple = ((-0.10, 0.10, 0.0), (0.0, 0.0, 0.0), (0.0, 0.0, 0.0))
    cation_eta: tuple = ((0.0, 0.10, 0.0), (0.10, 0.0, 0.05), (0.0, 0.05, 0.0))
    dyson_diabatic: tuple = ((0.92, 0.02, 0.88), (0.85, 0.70, 0.03), (0.15, 0.80, 0.05))
    dipole_ge: float = 0.3  # e*bohr
    dipole_gb: float = 2.0  # e*bohr
    pump_energy: float = 4.75  # eV
    pump_fwhm: float = 25.0  # fs
    probe_energy: float = 5.8  # eV (suggested)
    probe_fwhm: float = 30.0  # fs (suggested)
    temperature: float = 0.0  # K, Wigner sampling
    spectator_seed: int = 20240611
    label: str = "invented push-pull chromophore (demo scenario, invented)"

    def model(self) -> TorsionVibronicModel:
        """The model Hamiltonian of this scenario."""
        lam = np.zeros((3, 3, 3))
        lam[1, 1, 2] = lam[1, 2, 1] = self.coupling_ce
        lam[2, 0, 1] = lam[2, 1, 0] = self.coupling_pe
        eta = np.zeros((3, 3))
        eta[1, 2] = eta[2, 1] = self.eta_eb
        dip = np.zeros((3, 3))
        dip[0, 1] = dip[1, 0] = self.dipole_ge
        dip[0, 2] = dip[2, 0] = self.dipole_gb
        return TorsionVibronicModel(
            energies=self.energies, twist=self.twist, asymmetry=self.asymmetry,
            frequencies=self.frequencies, kappa=np.array(self.kappa), lam=lam, eta=eta,
            inertia=self.inertia, cation_energies=self.cation_energies,
            cation_twist=self.cation_twist, cation_asymmetry=self.cation_asymmetry,
            cation_kappa=np.array(self.cation_kappa), cation_eta=np.array(self.cation_eta),
            dyson_diabatic=np.array(self.dyson_diabatic), dipole_diabatic=dip,
            torsion_friction=self.torsion_friction,
        )

    def perturbed(self, **changes: Any) -> DemoScenario:
        """A copy with some parameters changed (``dataclasses.replace``)."""
        new: dict[str, Any] = {k: _t(v) if isinstance(v, (list, tuple)) else v
                               for k, v in changes.items()}
        return dataclasses.replace(self, **new)

    def as_dict(self) -> dict[str, Any]:
        """Plain-JSON view of the parameters (for metadata)."""
        return {k: (np.asarray(v).tolist() if isinstance(v, tuple) else v)
                for k, v in dataclasses.asdict(self).items()}


DEFAULT_SCENARIO = DemoScenario()

# ---------------------------------------------------------------- molecule geometry
_SYMBOLS = ("C", "C", "H", "C", "O", "H", "N", "H", "H", "C", "N")
# planar reference (Angstrom): C1=C2 along x; C1 carries H and a formyl group, C2 an
# amino and a cyano group (an invented push-pull ethylene)
_REF = np.array([
    [-0.670, 0.000, 0.0],  # C1
    [0.670, 0.000, 0.0],  # C2
    [-1.210, 0.935, 0.0],  # H on C1
    [-1.400, -1.264, 0.0],  # C formyl
    [-2.456, -1.874, 0.0],  # O
    [-0.950, -2.270, 0.0],  # H formyl
    [1.350, 1.178, 0.0],  # N amino
    [2.360, 1.178, 0.0],  # H
    [0.845, 2.053, 0.0],  # H
    [1.385, -1.238, 0.0],  # C cyano
    [1.965, -2.243, 0.0],  # N cyano
])
_SIDE1 = np.array([0, 2, 3, 4, 5])
_SIDE2 = np.array([1, 6, 7, 8, 9, 10])
_ROTOR = np.array([6, 7, 8, 9, 10])  # rotates about the C1=C2 axis
_FORMYL = np.array([3, 4, 5])
#: atom index of the amino hydrogen that leaves in the fragmentation fault
FRAGMENT_ATOM = 7


#: bonded atom pairs of the reference structure (every pair closer than 1.25 times the sum
#: of covalent radii; the spectator vibrations keep their lengths to first order)
_BONDS = ((0, 1), (0, 2), (0, 3), (1, 6), (1, 9), (3, 4), (3, 5), (6, 7), (6, 8), (9, 10))
#: (1/2 pi c) sqrt(1 mdyn/Angstrom / 1 amu) in cm^-1 (CODATA constants; common practice)
_FREQ_CM1 = 1302.79


def _angle_gradients(x: np.ndarray) -> list[np.ndarray]:
    """Gradients (n*3,) of every bond angle a-b-c of the reference, by central differences."""
    nb: dict[int, list[int]] = {}
    for a, c in _BONDS:
        nb.setdefault(a, []).append(c)
        nb.setdefault(c, []).append(a)

    def angle(y: np.ndarray, a: int, b: int, c: int) -> float:
        u, v = y[a] - y[b], y[c] - y[b]
        return float(np.arccos(np.clip(u @ v / np.linalg.norm(u) / np.linalg.norm(v), -1, 1)))

    out = []
    h = 1e-5
    for b, ns in sorted(nb.items()):
        for k, a in enumerate(ns):
            for c in ns[k + 1:]:
                g = np.zeros(x.size)
                for i in range(x.size):
                    d = np.zeros(x.size)
                    d[i] = h
                    g[i] = (angle((x.ravel() + d).reshape(x.shape), a, b, c)
                            - angle((x.ravel() - d).reshape(x.shape), a, b, c)) / (2 * h)
                out.append(g)
    return out


def _spectator_modes(x: np.ndarray, masses: np.ndarray, rng: np.random.Generator
                     ) -> tuple[np.ndarray, np.ndarray]:
    """Bond-preserving spectator normal modes of a simple valence force field.

    Displacements are restricted to the mass-weighted subspace orthogonal to
    translations, rotations and every bond stretch of :data:`_BONDS` (bond lengths are
    held, as with bond constraints in classical MD; common practice). In it the force
    field is angle bending (0.4-0.8 mdyn Angstrom/rad^2) plus a weak isotropic restoring
    term per atom (0.9-1.4 mdyn/Angstrom), our invented choice; light atoms get high
    frequencies and small amplitudes, as in real molecules.

    Returns
    -------
    modes : ndarray, shape (n_spec, 3n)
        Orthonormal mass-weighted patterns.
    frequencies : ndarray, shape (n_spec,)
        Harmonic wavenumbers in cm^-1.
    """
    n = x.shape[0]
    m3 = np.repeat(masses, 3)
    sq = np.sqrt(m3)
    com = (masses[:, None] * x).sum(0) / masses.sum()
    r = x - com
    cons = []
    for k in range(3):
        t = np.zeros((n, 3))
        t[:, k] = 1.0
        cons.append(t.reshape(-1) * sq)
        ax = np.zeros(3)
        ax[k] = 1.0
        cons.append(np.cross(ax, r).reshape(-1) * sq)
    for a, c in _BONDS:
        e = (x[c] - x[a]) / np.linalg.norm(x[c] - x[a])
        b = np.zeros((n, 3))
        b[a], b[c] = -e, e
        cons.append(b.reshape(-1) / sq)  # bond change = b . x = (b / sqrt m) . Q
    q, _ = np.linalg.qr(np.array(cons).T)
    proj = np.eye(3 * n) - q @ q.T
    w, v = np.linalg.eigh(proj)
    allowed = v[:, w > 0.5]  # (3n, n_spec) orthonormal basis of the allowed subspace
    hess = np.diag(np.repeat(rng.uniform(0.9, 1.4, n), 3))
    for g in _angle_gradients(x):
        hess += rng.uniform(0.4, 0.8) * np.outer(g, g)
    hmw = hess / np.outer(sq, sq)
    lam, vec = np.linalg.eigh(allowed.T @ hmw @ allowed)
    modes = (allowed @ vec).T
    return modes, _FREQ_CM1 * np.sqrt(np.clip(lam, 1e-12, None))


@dataclass
class DemoMolecule:
    """Geometry builder: model coordinates -> Cartesian structures of the invented molecule.

    ``phi`` rotates the amino/cyano end about the C=C axis; ``x_t`` stretches the
    C=C bond (0.015 Angstrom per unit on each carbon), ``x_c`` turns the formyl group
    in plane (4 degrees per unit), ``x_p`` pyramidalises the twisted carbon
    (0.06 Angstrom per unit along the normal of its substituents' plane). Uncoupled
    spectator vibrations (17 harmonic bending and out-of-plane modes of a simple valence
    force field that keep every bond length to first order, force constants drawn with
    ``seed``) are added with Wigner-sampled amplitudes, so structures are realistically
    noisy while bonded distances stay within a few per cent of their reference values.
    """

    seed: int = 20240611
    symbols: tuple = _SYMBOLS
    _basis: np.ndarray = field(init=False, repr=False)
    spectator_frequencies: np.ndarray = field(init=False, repr=False)

    def __post_init__(self) -> None:
        self.atom_masses = masses_for(list(self.symbols))
        self._m3 = np.repeat(self.atom_masses * AMU_ME, 3)
        rng = np.random.default_rng(self.seed)
        self._basis, self.spectator_frequencies = _spectator_modes(_REF, self.atom_masses, rng)

    def cartesian(self, q: np.ndarray, displacement: np.ndarray | None = None) -> np.ndarray:
        """Positions (n, 11, 3) in Angstrom from model coordinates q (n, 4).

        `displacement` (n, 11, 3), Angstrom, is added to the planar reference before the
        model motions (torsion, stretch, pyramidalisation), so that spectator vibrations
        move with the rotating groups and keep their bond lengths.
        """
        q = np.asarray(q, dtype=float)
        n = q.shape[0]
        x = np.broadcast_to(_REF, (n,) + _REF.shape).copy()
        if displacement is not None:
            x += displacement
        phi, xt, xc, xp = q[:, 0], q[:, 1], q[:, 2], q[:, 3]
        # in-plane turn of the formyl group about C1
        ang = np.deg2rad(4.0) * xc
        c, s = np.cos(ang)[:, None], np.sin(ang)[:, None]
        rel = x[:, _FORMYL] - x[:, [0]]
        x[:, _FORMYL, 0] = x[:, [0], 0] + c * rel[..., 0] - s * rel[..., 1]
        x[:, _FORMYL, 1] = x[:, [0], 1] + s * rel[..., 0] + c * rel[..., 1]
        # torsion of the rotor about the x axis
        c, s = np.cos(phi)[:, None], np.sin(phi)[:, None]
        y, z = x[:, _ROTOR, 1].copy(), x[:, _ROTOR, 2].copy()
        x[:, _ROTOR, 1] = c * y - s * z
        x[:, _ROTOR, 2] = s * y + c * z
        # pyramidalisation: C2 leaves the plane of its (rotated) substituents along that
        # plane's normal, which keeps its bonds to first order; then the C=C stretch
        x[:, 1, 1] -= 0.06 * xp * s[:, 0]
        x[:, 1, 2] += 0.06 * xp * c[:, 0]
        x[:, _SIDE1, 0] -= 0.015 * xt[:, None]
        x[:, _SIDE2, 0] += 0.015 * xt[:, None]
        return x

    def sample_spectators(self, n: int, *, temperature: float = 0.0,
                          random_state: Any = None) -> tuple[np.ndarray, np.ndarray]:
        """Wigner-sampled (Q0, P0) of the spectator modes, shape (n, n_spec) each."""
        omega = self.spectator_frequencies / HARTREE_CM1
        return sample_normal_modes(omega, n_samples=n, temperature=temperature,
                                   random_state=random_state)

    def spectators(self, q0: np.ndarray, p0: np.ndarray, time_fs: np.ndarray
                   ) -> tuple[np.ndarray, np.ndarray]:
        """Cartesian displacement (Angstrom) and velocity (Angstrom/fs) of the spectators.

        q0, p0 : (n_rows, n_spec) initial mass-weighted amplitudes; time_fs (n_rows,).
        """
        omega = self.spectator_frequencies / HARTREE_CM1
        t = np.asarray(time_fs, float)[:, None] / AU_TIME_FS
        c, s = np.cos(omega * t), np.sin(omega * t)
        qq = q0 * c + p0 / omega * s
        pp = -q0 * omega * s + p0 * c
        inv = 1.0 / np.sqrt(self._m3)
        dx = (qq @ self._basis) * inv * BOHR_ANGSTROM
        dv = (pp @ self._basis) * inv * (BOHR_ANGSTROM / AU_TIME_FS)
        n = dx.shape[0]
        return dx.reshape(n, -1, 3), dv.reshape(n, -1, 3)


def ground_state_modes(model: TorsionVibronicModel, h: float = 1e-3
                       ) -> tuple[np.ndarray, np.ndarray]:
    """Harmonic analysis of the adiabatic ground state at q = 0 in model coordinates.

    Returns angular frequencies (hartree) and mass-weighted modes L (rows) such that
    ``q = M^-1/2 L^T Q``; the Hessian comes from central differences of E_0.
    """
    f = model.n_dof

    def e0(q):
        e, _ = adiabatic_states(model.diabatic(q), None)
        return e[:, 0]

    steps = np.eye(f) * h
    pts = []
    for i in range(f):
        for j in range(f):
            for si, sj in ((1, 1), (1, -1), (-1, 1), (-1, -1)):
                pts.append(si * steps[i] + sj * steps[j])
    vals = e0(np.array(pts)).reshape(f, f, 4)
    hess = (vals[..., 0] - vals[..., 1] - vals[..., 2] + vals[..., 3]) / (4 * h * h)
    minv = 1.0 / np.sqrt(model.masses)
    hmw = 0.5 * (hess + hess.T) * np.outer(minv, minv)
    lam, vec = np.linalg.eigh(hmw)
    return np.sqrt(lam), vec.T
