"""Initial conditions: Wigner sampling of harmonic normal modes.

Every vibrational mode of frequency omega is a harmonic oscillator whose Wigner
function (the exact Wigner function of the thermal harmonic-oscillator density
matrix, a textbook result, from memory) is a Gaussian in the mass-weighted normal
coordinate Q and its momentum P with

    <Q^2> = hbar / (2 omega) * alpha,   <P^2> = hbar omega / 2 * alpha,
    alpha = coth(hbar omega / (2 k_B T))   (alpha = 1 at T = 0).

Cartesian positions and velocities follow from ``x = x_eq + M^-1/2 L Q`` and
``v = M^-1/2 L P``. Internally Hartree atomic units; positions come out in
Angstrom and velocities in Angstrom/fs.
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import numpy.typing as npt
import pandas as pd

from ...data.elements import masses_for
from ...errors import NumericalWarning, SchemaError
from ...units import (
    AMU_ME,
    AU_TIME_FS,
    BOHR_ANGSTROM,
    HARTREE_CM1,
    HARTREE_EV,
    KB_EV,
)

__all__ = [
    "WignerSample",
    "thermal_factor",
    "sample_normal_modes",
    "sample_wigner",
    "normal_modes_from_hessian",
    "sample_wigner_from_hessian",
]

#: velocity: one bohr per atomic time unit in Angstrom/fs
_AU_VEL = BOHR_ANGSTROM / AU_TIME_FS


def rng_from(random_state: Any) -> np.random.Generator:
    if isinstance(random_state, np.random.Generator):
        return random_state
    return np.random.default_rng(random_state)


def thermal_factor(frequencies: npt.ArrayLike, temperature: float = 0.0) -> np.ndarray:
    """``alpha = coth(hbar omega / (2 k_B T))`` (1 at T = 0).

    Parameters
    ----------
    frequencies : array_like
        Harmonic wavenumbers in cm^-1 (> 0).
    temperature : float
        Temperature in K (>= 0).

    Returns
    -------
    ndarray
        The factor that multiplies both Wigner variances of each mode.

    Examples
    --------
    >>> round(float(thermal_factor([1000.0], 300.0)[0]), 6)
    1.016664
    """
    w = np.asarray(frequencies, dtype=float)
    if temperature < 0:
        raise SchemaError(f"temperature must be >= 0 K; got {temperature}.")
    if temperature == 0:
        return np.ones_like(w)
    x = (w / HARTREE_CM1 * HARTREE_EV) / (2.0 * KB_EV * temperature)
    return 1.0 / np.tanh(x)


def sample_normal_modes(
    omega: npt.ArrayLike,
    *,
    n_samples: int,
    temperature: float = 0.0,
    random_state: Any = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Draw (Q, P) of independent harmonic modes from their Wigner distribution.

    Parameters
    ----------
    omega : array_like, shape (n_modes,)
        Angular frequencies in hartree (hbar = 1).
    n_samples : int
    temperature : float
        Kelvin; the variances carry ``coth(omega / 2 k_B T)``.
    random_state : int or Generator, optional

    Returns
    -------
    Q, P : ndarray, shape (n_samples, n_modes)
        Mass-weighted coordinates and momenta in atomic units
        (``<Q^2> = alpha / (2 omega)``, ``<P^2> = alpha omega / 2``).
    """
    w = np.asarray(omega, dtype=float)
    if np.any(w <= 0):
        raise SchemaError(f"omega must be > 0; got {w[w <= 0][:5]}.")
    alpha = thermal_factor(w * HARTREE_CM1, temperature)
    rng = rng_from(random_state)
    xi = rng.standard_normal((int(n_samples), w.size))
    eta = rng.standard_normal((int(n_samples), w.size))
    return xi * np.sqrt(alpha / (2 * w)), eta * np.sqrt(alpha * w / 2)


@dataclass(frozen=True)
class WignerSample:
    """Wigner-sampled geometries and velocities.

    Attributes
    ----------
    positions : ndarray, shape (n_samples, n_atoms, 3)
        Angstrom.
    velocities : ndarray, shape (n_samples, n_atoms, 3)
        Angstrom/fs.
    symbols : tuple of str
    masses : ndarray, shape (n_atoms,)
        amu.
    frequencies : ndarray, shape (n_modes,)
        Wavenumbers (cm^-1) of the sampled modes.
    Q, P : ndarray, shape (n_samples, n_modes)
        Mass-weighted normal coordinates and momenta (atomic units).
    temperature : float
        K.
    soft_modes : DataFrame
        Modes that were not sampled (``mode``, ``frequency`` in cm^-1 with imaginary
        ones negative, ``reason``).
    """

    positions: np.ndarray
    velocities: np.ndarray
    symbols: tuple[str, ...]
    masses: np.ndarray
    frequencies: np.ndarray
    Q: np.ndarray
    P: np.ndarray
    temperature: float = 0.0
    soft_modes: pd.DataFrame = field(default_factory=lambda: pd.DataFrame(
        {"mode": [], "frequency": [], "reason": []}))

    @property
    def n_samples(self) -> int:
        """Number of samples."""
        return self.positions.shape[0]

    def mode_energies(self) -> np.ndarray:
        """Harmonic energy of every mode and sample in eV, shape (n_samples, n_modes)."""
        w = self.frequencies / HARTREE_CM1
        return 0.5 * (self.P**2 + (w * self.Q) ** 2) * HARTREE_EV

    def to_frame(self) -> pd.DataFrame:
        """One row per sample: ``sample``, ``e_vib`` (eV), ``e_kin`` (eV)."""
        e_kin = 0.5 * np.sum(self.P**2, axis=1) * HARTREE_EV
        return pd.DataFrame({"sample": np.arange(self.n_samples),
                             "e_vib": self.mode_energies().sum(axis=1), "e_kin": e_kin})


def sample_wigner(
    *,
    frequencies: npt.ArrayLike,
    normal_modes: npt.ArrayLike,
    equilibrium: npt.ArrayLike,
    n_samples: int,
    symbols: Sequence[str] | None = None,
    masses: npt.ArrayLike | None = None,
    temperature: float = 0.0,
    mode_kind: str = "mass-weighted",
    random_state: Any = None,
) -> WignerSample:
    """Wigner-sample Cartesian geometries and velocities from harmonic normal modes.

    Parameters
    ----------
    frequencies : array_like, shape (n_modes,)
        Harmonic wavenumbers in cm^-1 (> 0; drop soft/imaginary modes first, or use
        :func:`sample_wigner_from_hessian`).
    normal_modes : array_like, shape (n_modes, n_atoms, 3)
        Mass-weighted orthonormal normal modes L (``mode_kind="mass-weighted"``), or
        Cartesian displacement vectors (``mode_kind="cartesian"``), which are turned
        into mass-weighted ones by ``L ~ M^1/2 x`` and renormalised.
    equilibrium : array_like, shape (n_atoms, 3)
        Reference geometry in Angstrom.
    n_samples : int
    symbols : sequence of str, optional
        Element symbols (masses default from them).
    masses : array_like, shape (n_atoms,), optional
        Masses in amu.
    temperature : float
        Kelvin (0: ground state).
    mode_kind : {"mass-weighted", "cartesian"}
    random_state : int or Generator, optional

    Returns
    -------
    WignerSample

    Examples
    --------
    >>> s = sample_wigner(frequencies=[1000.0], normal_modes=[[[1.0, 0, 0]]],
    ...                   equilibrium=[[0.0, 0, 0]], masses=[1.0], symbols=["H"],
    ...                   n_samples=3, random_state=0)
    >>> s.positions.shape
    (3, 1, 3)
    """
    w = np.atleast_1d(np.asarray(frequencies, dtype=float))
    modes = np.asarray(normal_modes, dtype=float)
    x_eq = np.asarray(equilibrium, dtype=float)
    if x_eq.ndim != 2 or x_eq.shape[1] != 3:
        raise SchemaError(f"equilibrium must have shape (n_atoms, 3); got {x_eq.shape}.")
    n_atoms = x_eq.shape[0]
    if modes.shape != (w.size, n_atoms, 3):
        raise SchemaError(
            f"normal_modes must have shape (n_modes={w.size}, n_atoms={n_atoms}, 3); got "
            f"{modes.shape}."
        )
    if np.any(~np.isfinite(w)) or np.any(w <= 0):
        raise SchemaError(
            f"frequencies must be finite and > 0 cm^-1; got {w[~(w > 0)][:5]}. Hint: drop "
            "imaginary or soft modes, or use sample_wigner_from_hessian."
        )
    if symbols is None and masses is None:
        raise SchemaError("pass symbols or masses (amu) of the atoms.")
    m_amu = masses_for(list(symbols or ())) if masses is None else np.asarray(masses, dtype=float)
    if m_amu.shape != (n_atoms,):
        raise SchemaError(f"masses must have shape (n_atoms={n_atoms},); got {m_amu.shape}.")
    symbols_t = tuple(symbols) if symbols is not None else tuple("X" * n_atoms)
    m3 = np.repeat(m_amu * AMU_ME, 3)  # electron masses per Cartesian component
    lmat = modes.reshape(w.size, -1)
    if mode_kind == "cartesian":
        lmat = lmat * np.sqrt(m3)
        lmat /= np.linalg.norm(lmat, axis=1, keepdims=True)
    elif mode_kind != "mass-weighted":
        raise SchemaError(f"mode_kind must be 'mass-weighted' or 'cartesian'; got {mode_kind!r}.")
    gram = lmat @ lmat.T
    if not np.allclose(gram, np.eye(w.size), atol=1e-6):
        raise SchemaError(
            "mass-weighted normal_modes must be orthonormal (L L^T = 1); largest deviation "
            f"{np.abs(gram - np.eye(w.size)).max():.3g}. Hint: pass mode_kind='cartesian' for "
            "Cartesian displacement vectors."
        )
    omega = w / HARTREE_CM1
    qq, pp = sample_normal_modes(omega, n_samples=n_samples, temperature=temperature,
                                 random_state=random_state)
    dx = (qq @ lmat) / np.sqrt(m3) * BOHR_ANGSTROM
    dv = (pp @ lmat) / np.sqrt(m3) * _AU_VEL
    return WignerSample(
        positions=x_eq[None] + dx.reshape(-1, n_atoms, 3),
        velocities=dv.reshape(-1, n_atoms, 3),
        symbols=symbols_t,
        masses=m_amu,
        frequencies=w,
        Q=qq,
        P=pp,
        temperature=float(temperature),
    )


def _rigid_basis(x_bohr: np.ndarray, m3: np.ndarray) -> np.ndarray:
    """Orthonormal mass-weighted basis of translations and rotations (columns)."""
    n = x_bohr.shape[0]
    mass = m3[::3]
    com = (mass[:, None] * x_bohr).sum(0) / mass.sum()
    r = x_bohr - com
    vecs = []
    for k in range(3):
        t = np.zeros((n, 3))
        t[:, k] = 1.0
        vecs.append(t)
    for k in range(3):
        axis = np.zeros(3)
        axis[k] = 1.0
        vecs.append(np.cross(axis, r))
    b = np.array([v.reshape(-1) * np.sqrt(m3) for v in vecs]).T  # (3n, 6)
    uu, ss, _ = np.linalg.svd(b, full_matrices=False)
    rank = int(np.sum(ss > 1e-6 * ss.max()))
    return uu[:, :rank]


def normal_modes_from_hessian(
    hessian: npt.ArrayLike,
    *,
    equilibrium: npt.ArrayLike,
    symbols: Sequence[str] | None = None,
    masses: npt.ArrayLike | None = None,
) -> tuple[np.ndarray, np.ndarray, int]:
    """Harmonic frequencies and mass-weighted normal modes from a Cartesian Hessian.

    Translations and rotations (6, or 5 for a linear molecule, found from the
    geometry) are projected out exactly before diagonalising.

    Parameters
    ----------
    hessian : array_like, shape (3 n_atoms, 3 n_atoms)
        Cartesian Hessian in hartree / bohr^2.
    equilibrium : array_like, shape (n_atoms, 3)
        Geometry in Angstrom.
    symbols, masses : optional
        Element symbols or masses (amu).

    Returns
    -------
    frequencies : ndarray, shape (n_vib,)
        Wavenumbers in cm^-1, ascending; imaginary modes are returned negative.
    modes : ndarray, shape (n_vib, n_atoms, 3)
        Mass-weighted orthonormal normal modes.
    n_rigid : int
        Number of projected translations and rotations (6 or 5).
    """
    x_eq = np.asarray(equilibrium, dtype=float)
    n_atoms = x_eq.shape[0]
    h = np.asarray(hessian, dtype=float)
    if h.shape != (3 * n_atoms, 3 * n_atoms):
        raise SchemaError(
            f"hessian must have shape (3 n_atoms, 3 n_atoms) = {(3 * n_atoms,) * 2}; got {h.shape}."
        )
    if symbols is None and masses is None:
        raise SchemaError("pass symbols or masses (amu) of the atoms.")
    m_amu = masses_for(list(symbols or ())) if masses is None else np.asarray(masses, dtype=float)
    m3 = np.repeat(m_amu * AMU_ME, 3)
    hmw = 0.5 * (h + h.T) / np.sqrt(np.outer(m3, m3))
    rigid = _rigid_basis(x_eq / BOHR_ANGSTROM, m3)
    # orthonormal complement of the rigid-body space
    full, _, _ = np.linalg.svd(np.eye(3 * n_atoms) - rigid @ rigid.T)
    comp = full[:, : 3 * n_atoms - rigid.shape[1]]
    lam, vec = np.linalg.eigh(comp.T @ hmw @ comp)
    lmat = (comp @ vec).T  # (n_vib, 3n)
    freq = np.sign(lam) * np.sqrt(np.abs(lam)) * HARTREE_CM1
    return freq, lmat.reshape(-1, n_atoms, 3), int(rigid.shape[1])


def sample_wigner_from_hessian(
    hessian: npt.ArrayLike,
    *,
    equilibrium: npt.ArrayLike,
    n_samples: int,
    symbols: Sequence[str] | None = None,
    masses: npt.ArrayLike | None = None,
    temperature: float = 0.0,
    soft_threshold: float = 50.0,
    random_state: Any = None,
) -> WignerSample:
    """Wigner-sample from a Cartesian Hessian (translations/rotations removed).

    Imaginary modes and modes softer than `soft_threshold` are not sampled; they
    are listed in ``WignerSample.soft_modes`` and reported by a NumericalWarning
    (common practice: exclude them).

    Parameters
    ----------
    hessian : array_like, shape (3 n_atoms, 3 n_atoms)
        Hartree / bohr^2.
    equilibrium : array_like, shape (n_atoms, 3)
        Angstrom.
    n_samples : int
    symbols, masses : optional
    temperature : float
        Kelvin.
    soft_threshold : float
        cm^-1; default 50.
    random_state : int or Generator, optional

    Returns
    -------
    WignerSample
    """
    freq, modes, _ = normal_modes_from_hessian(hessian, equilibrium=equilibrium,
                                               symbols=symbols, masses=masses)
    keep = freq >= soft_threshold
    if not np.all(keep):
        bad = np.flatnonzero(~keep)
        reason = np.where(freq[bad] < 0, "imaginary", "soft")
        warnings.warn(
            f"{bad.size} mode(s) not sampled: {', '.join(f'{f:.1f}' for f in freq[bad])} cm^-1 "
            f"(imaginary shown negative; threshold {soft_threshold} cm^-1). See "
            "WignerSample.soft_modes.",
            NumericalWarning,
            stacklevel=2,
        )
    else:
        bad = np.zeros(0, dtype=int)
        reason = np.zeros(0, dtype=str)
    sample = sample_wigner(frequencies=freq[keep], normal_modes=modes[keep],
                           equilibrium=equilibrium, n_samples=n_samples, symbols=symbols,
                           masses=masses, temperature=temperature, random_state=random_state)
    soft = pd.DataFrame({"mode": bad, "frequency": freq[bad], "reason": reason})
    return WignerSample(**{**sample.__dict__, "soft_modes": soft})


