"""Trajectory weights of the doorway-window picture: doorway factors and weights.

The doorway weight of a trajectory is ``|mu_0i|^2 I_pump(h nu - dE_0i)`` at its initial
excitation (J. Chem. Phys. 2004, "Classical doorway-window approximation for
time-resolved pump-probe spectra").
"""

from __future__ import annotations

from typing import Any

import numpy as np
import numpy.typing as npt

from ...errors import SchemaError
from ...units import HARTREE_EV
from .pulses import GaussianPulse

__all__ = ["doorway_factor", "doorway_weights", "trajectory_weights", "weights_word",
           "ground_state_ionisation_fraction"]


def doorway_factor(excitation_energy: npt.ArrayLike, *, pump: GaussianPulse,
                   transition_dipole: npt.ArrayLike | None = None,
                   oscillator_strength: npt.ArrayLike | None = None) -> np.ndarray:
    """Doorway weight ``|mu_0i|^2 I_pump(h nu - dE_0i)`` (the paper in the module docstring).

    Parameters
    ----------
    excitation_energy : array_like, shape (n,)
        ``E_i - E_0`` in eV.
    pump : GaussianPulse
        The pump (its peak-normalised spectral intensity is used).
    transition_dipole : array_like, shape (n, 3) or (n,), optional
        ``mu_0i`` in e*bohr (vectors) or ``|mu_0i|^2`` (scalars).
    oscillator_strength : array_like, shape (n,), optional
        ``f_0i``; converted with ``|mu|^2 = 3 f / (2 dE)`` (atomic units), i.e. the
        weight is proportional to ``f / dE`` (not to ``f``).

    Returns
    -------
    ndarray, shape (n,)
        Weights in e^2 bohr^2 (times the dimensionless spectral factor).

    Examples
    --------
    >>> from ensemblelab.compute.spectroscopy.pulses import GaussianPulse
    >>> w = doorway_factor([4.0, 4.3], pump=GaussianPulse(photon_energy=4.1, fwhm=20.0),
    ...                    transition_dipole=[1.0, 0.5])
    >>> [float(f"{x:.6g}") for x in w]
    [0.0357934, 8.20699e-07]
    """
    de = np.asarray(excitation_energy, dtype=float)
    if transition_dipole is not None:
        mu = np.asarray(transition_dipole, dtype=float)
        mu2 = np.sum(mu * mu, axis=-1) if mu.ndim == de.ndim + 1 else mu
    elif oscillator_strength is not None:
        f = np.asarray(oscillator_strength, dtype=float)
        with np.errstate(divide="ignore", invalid="ignore"):
            mu2 = np.where(de > 0, 1.5 * f / (de / HARTREE_EV), 0.0)
    else:
        raise SchemaError("doorway_factor needs transition_dipole or oscillator_strength.")
    return mu2 * pump.spectral_intensity(de)


def doorway_weights(ens: Any, *, pump: GaussianPulse) -> np.ndarray:
    """Doorway weight of each trajectory from its initial excitation.

    Uses ``ens.excitation_energies`` and ``ens.transition_dipoles`` (preferred) or
    ``ens.oscillator_strengths`` at the trajectory's ``initial_state``; multiplies
    the ensemble's own ``trajectories["weight"]``.

    Parameters
    ----------
    ens : Ensemble
        Or a block of one (see :mod:`ensemblelab.compute.engine`).
    pump : GaussianPulse
        The pump pulse.

    Returns
    -------
    ndarray, shape (n_trajectories,)
    """
    if ens.excitation_energies is None or (
        ens.transition_dipoles is None and ens.oscillator_strengths is None
    ):
        raise SchemaError(
            "doorway weights need ens.excitation_energies and ens.transition_dipoles or "
            "ens.oscillator_strengths. Hint: pass weights='uniform' for a doorway-sampled "
            "ensemble."
        )
    rows = np.arange(ens.n_trajectories)
    init = ens.trajectories["initial_state"].to_numpy().astype(np.int64)
    de = ens.excitation_energies[rows, init]
    if ens.transition_dipoles is not None:
        fac = doorway_factor(de, pump=pump, transition_dipole=ens.transition_dipoles[rows, init])
    else:
        fac = doorway_factor(de, pump=pump,
                             oscillator_strength=ens.oscillator_strengths[rows, init])
    return ens.trajectories["weight"].to_numpy() * fac


def trajectory_weights(ens: Any, *, weights: str = "doorway",
                       pump: GaussianPulse | None = None) -> tuple[np.ndarray, str]:
    """Weight of each trajectory and a word saying how it was obtained.

    ``"doorway"``: ``doorway_weights`` when a pump is given and the ensemble has
    excitation data; otherwise the ensemble's own ``trajectories["weight"]`` (a
    doorway-sampled ensemble, or one carrying its importance weights), reported
    as ``"ensemble"``.
    ``"uniform"``: 1 for every trajectory. Any other string: that column of
    ``ens.trajectories``.

    Parameters
    ----------
    ens : Ensemble
        Or a block of one (see :mod:`ensemblelab.compute.engine`).
    weights : {"doorway", "uniform"} or str
        How to weight.
    pump : GaussianPulse, optional
        The pump (for doorway weights).

    Returns
    -------
    weights : ndarray, shape (n_trajectories,)
    word : str
        ``"doorway"``, ``"ensemble"``, ``"uniform"`` or ``"column:<name>"``.
    """
    if weights == "uniform":
        return np.ones(ens.n_trajectories), "uniform"
    if weights == "doorway":
        if pump is None:
            return ens.trajectories["weight"].to_numpy().astype(float), "ensemble"
        if ens.excitation_energies is None or (
            ens.transition_dipoles is None and ens.oscillator_strengths is None
        ):
            # no excitation data: the ensemble is taken as doorway-sampled (its own
            # weights); params["weights"] says "ensemble"
            return ens.trajectories["weight"].to_numpy().astype(float), "ensemble"
        return doorway_weights(ens, pump=pump), "doorway"
    if isinstance(weights, str) and weights in ens.trajectories.columns:
        w = ens.trajectories[weights].to_numpy().astype(float)
        if not np.all(np.isfinite(w)) or np.any(w < 0):
            raise SchemaError(f"trajectory column {weights!r} must be finite and >= 0.")
        return w, f"column:{weights}"
    raise SchemaError(
        "The 'weights' parameter must be 'doorway', 'uniform' or a column of ens.trajectories "
        f"{list(ens.trajectories.columns)}. Got {weights!r} instead."
    )


def weights_word(source: Any, *, weights: str = "doorway",
                 pump: GaussianPulse | None = None) -> str:
    """The word :func:`trajectory_weights` returns for a whole source, read from its tables.

    Decided from which arrays the source holds and its trajectory table, without
    reading any block (the same word every block's :func:`trajectory_weights` gives).

    Parameters
    ----------
    source : Ensemble or BlockSource
        Needs ``has(name)`` (or the arrays) and ``trajectories``.
    weights, pump
        As for :func:`trajectory_weights`.

    Returns
    -------
    str
    """
    has = source.has if hasattr(source, "has") else (
        lambda name: getattr(source, name, None) is not None)
    if weights == "doorway" and pump is not None and has("excitation_energies") and (
            has("transition_dipoles") or has("oscillator_strengths")):
        return "doorway"
    if weights == "doorway":
        return "ensemble"
    if weights == "uniform":
        return "uniform"
    trajs = source.trajectories
    if isinstance(weights, str) and weights in trajs.columns:
        w = trajs[weights].to_numpy().astype(float)
        if not np.all(np.isfinite(w)) or np.any(w < 0):
            raise SchemaError(f"trajectory column {weights!r} must be finite and >= 0.")
        return f"column:{weights}"
    raise SchemaError(
        "The 'weights' parameter must be 'doorway', 'uniform' or a column of ens.trajectories "
        f"{list(trajs.columns)}. Got {weights!r} instead."
    )


def ground_state_ionisation_fraction(ens: Any, *, probe: GaussianPulse) -> float:
    """Weighted fraction of initial geometries at which the probe ionises the ground state.

    At the first snapshot of each trajectory (its initial, Wigner-sampled geometry) the
    ground state S0 is ionisable when ``n h-nu > E+_k - E_0`` for some cation state k.
    A non-zero fraction means a pump-on minus pump-off experiment also sees a
    ground-state depletion (bleach) term, absent from the doorway-window map.

    Parameters
    ----------
    ens : Ensemble
        Needs ``cation_energies``; without them the fraction is 0.
    probe : GaussianPulse
        The probe pulse (``n_photons * photon_energy`` is the total energy, eV).

    Returns
    -------
    float
        Fraction in [0, 1], weighted by the trajectory weights.
    """
    if ens.cation_energies is None or ens.n_snapshots == 0:
        return 0.0
    traj = ens.snapshots["traj"].to_numpy()
    first = np.r_[0, np.flatnonzero(traj[1:] != traj[:-1]) + 1]
    ip0 = ens.cation_energies[first] - ens.energies[first, 0][:, None]
    open_ = np.any(probe.total_energy - ip0 > 0, axis=1)
    w = ens.trajectories["weight"].to_numpy()
    total = float(w.sum())
    return float(w[open_].sum() / total) if total > 0 else 0.0
