"""Trajectory weights of the doorway-window picture: doorway factors and weights.

The doorway weight of a trajectory is ``|mu_0i|^2 I_pump(n h nu - dE_0i)`` at its initial
excitation (J. Chem. Phys. 2004, "Classical doorway-window approximation for
time-resolved pump-probe spectra"), with ``I_pump`` the peak-normalised spectrum of the
absorbed energy ``n h nu`` (:meth:`GaussianPulse.absorbed_spectral_intensity`: centred
at ``n h nu``, FWHM ``sqrt(n)`` times the one-photon width, for an ``n_photons`` pump).
For a multiphoton pump ``|mu_0i|^2`` stands for the n-photon transition strength the
producer supplied (the ensemble's transition dipoles or oscillator strengths).

The default ``weights="auto"`` never applies the pump twice: it reads how the ensemble
was sampled (``metadata["sampling"]``, see :mod:`.sampling`).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import numpy.typing as npt

from ...errors import SchemaError
from ...units import HARTREE_EV
from .pulses import GaussianPulse
from .sampling import sampling_of

__all__ = ["doorway_factor", "doorway_weights", "trajectory_weights", "weights_word",
           "resolve_weights", "ground_state_ionisation_fraction"]


def doorway_factor(excitation_energy: npt.ArrayLike, *, pump: GaussianPulse,
                   transition_dipole: npt.ArrayLike | None = None,
                   oscillator_strength: npt.ArrayLike | None = None) -> np.ndarray:
    """Doorway weight ``|mu_0i|^2 I_pump(n h nu - dE_0i)`` (the paper in the module docstring).

    Parameters
    ----------
    excitation_energy : array_like, shape (n,)
        ``E_i - E_0`` in eV.
    pump : GaussianPulse
        The pump: the peak-normalised spectrum of its absorbed energy ``n h nu``
        (:meth:`GaussianPulse.absorbed_spectral_intensity`; one-photon: its spectrum).
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
    return mu2 * pump.absorbed_spectral_intensity(de)


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


def _has(source: Any, name: str) -> bool:
    if hasattr(source, "has"):
        return bool(source.has(name))
    return getattr(source, name, None) is not None


def _can_doorway(source: Any, pump: GaussianPulse | None) -> bool:
    return pump is not None and _has(source, "excitation_energies") and (
        _has(source, "transition_dipoles") or _has(source, "oscillator_strengths"))


def resolve_weights(source: Any, *, weights: str = "auto",
                    pump: GaussianPulse | None = None) -> tuple[str, str | None]:
    """The concrete weighting for a source and a note to warn with (None: nothing to say).

    ``"auto"`` reads ``metadata["sampling"]`` (:func:`.sampling.sampling_of`):

    * ``"doorway-selected"`` -> ``"uniform"`` (the pump already chose the trajectories);
    * ``"weighted"`` -> ``"ensemble"`` (``trajectories["weight"]`` holds the pump);
    * ``"uniform"`` -> ``"doorway"`` when a pump and excitation data are there, else
      ``"ensemble"`` (with a note: the map is that of unselected excitation);
    * unknown -> ``"ensemble"``, with a note stating that assumption when a pump
      could have been applied.

    An explicit ``"doorway"`` on a doorway-selected or weighted ensemble is kept, with a
    note that the pump is then applied twice.

    Parameters
    ----------
    source : Ensemble or BlockSource
    weights : {"auto", "doorway", "uniform", "ensemble"} or str
        A string other than these names a column of ``trajectories``.
    pump : GaussianPulse, optional

    Returns
    -------
    kind : str
        ``"doorway"``, ``"ensemble"``, ``"uniform"`` or a column name.
    note : str or None
    """
    sampling = sampling_of(source)
    if weights == "auto":
        if sampling == "doorway-selected":
            return "uniform", None
        if sampling == "weighted":
            return "ensemble", None
        if sampling == "uniform":
            if _can_doorway(source, pump):
                return "doorway", None
            return "ensemble", (
                "the ensemble was not selected by the pump (metadata sampling='uniform') "
                "and the doorway weights cannot be applied (no pump, or no excitation "
                "energies and dipoles): the map is that of an unselected excitation.")
        if _can_doorway(source, pump):
            return "ensemble", (
                "how the ensemble was sampled is unknown (no metadata 'sampling'): assumed "
                "doorway-selected or weighted, so the pump is not applied again (each "
                "trajectory counts with trajectories['weight']). Hint: set "
                "ens.metadata['sampling'] to 'doorway-selected', 'weighted' or 'uniform', "
                "or pass weights='doorway' to weight by the pump.")
        return "ensemble", None
    if weights == "doorway" and sampling in ("doorway-selected", "weighted") and \
            _can_doorway(source, pump):
        return "doorway", (
            f"weights='doorway' on an ensemble whose metadata says sampling={sampling!r}: "
            "the pump is applied twice. Hint: leave weights='auto'.")
    return weights, None


def trajectory_weights(ens: Any, *, weights: str = "auto",
                       pump: GaussianPulse | None = None) -> tuple[np.ndarray, str]:
    """Weight of each trajectory and a word saying how it was obtained.

    ``"auto"``: resolved by :func:`resolve_weights` from ``metadata["sampling"]``.
    ``"doorway"``: ``doorway_weights`` when a pump is given and the ensemble has
    excitation data; otherwise the ensemble's own ``trajectories["weight"]`` (a
    doorway-sampled ensemble, or one carrying its importance weights), reported
    as ``"ensemble"``. ``"ensemble"``: ``trajectories["weight"]``.
    ``"uniform"``: 1 for every trajectory. Any other string: that column of
    ``ens.trajectories``.

    Parameters
    ----------
    ens : Ensemble
        Or a block of one (see :mod:`ensemblelab.compute.engine`).
    weights : {"auto", "doorway", "ensemble", "uniform"} or str
        How to weight.
    pump : GaussianPulse, optional
        The pump (for doorway weights).

    Returns
    -------
    weights : ndarray, shape (n_trajectories,)
    word : str
        ``"doorway"``, ``"ensemble"``, ``"uniform"`` or ``"column:<name>"``.
    """
    if weights == "auto":
        weights = resolve_weights(ens, weights=weights, pump=pump)[0]
    if weights == "uniform":
        return np.ones(ens.n_trajectories), "uniform"
    if weights == "ensemble":
        return ens.trajectories["weight"].to_numpy().astype(float), "ensemble"
    if weights == "doorway":
        if not _can_doorway(ens, pump):
            # no pump or no excitation data: the ensemble is taken as doorway-sampled
            # (its own weights); params["weights"] says "ensemble"
            return ens.trajectories["weight"].to_numpy().astype(float), "ensemble"
        assert pump is not None  # _can_doorway
        return doorway_weights(ens, pump=pump), "doorway"
    if isinstance(weights, str) and weights in ens.trajectories.columns:
        w = ens.trajectories[weights].to_numpy().astype(float)
        if not np.all(np.isfinite(w)) or np.any(w < 0):
            raise SchemaError(f"trajectory column {weights!r} must be finite and >= 0.")
        return w, f"column:{weights}"
    raise SchemaError(
        "The 'weights' parameter must be 'auto', 'doorway', 'ensemble', 'uniform' or a column "
        f"of ens.trajectories {list(ens.trajectories.columns)}. Got {weights!r} instead."
    )


def weights_word(source: Any, *, weights: str = "auto",
                 pump: GaussianPulse | None = None) -> str:
    """The word :func:`trajectory_weights` returns for a whole source, read from its tables.

    Decided from which arrays the source holds, its metadata and its trajectory table,
    without reading any block (the same word every block's :func:`trajectory_weights`
    gives for the resolved weighting).

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
    if weights == "auto":
        weights = resolve_weights(source, weights=weights, pump=pump)[0]
    if weights == "doorway":
        return "doorway" if _can_doorway(source, pump) else "ensemble"
    if weights in ("ensemble", "uniform"):
        return weights
    trajs = source.trajectories
    if isinstance(weights, str) and weights in trajs.columns:
        w = trajs[weights].to_numpy().astype(float)
        if not np.all(np.isfinite(w)) or np.any(w < 0):
            raise SchemaError(f"trajectory column {weights!r} must be finite and >= 0.")
        return f"column:{weights}"
    raise SchemaError(
        "The 'weights' parameter must be 'auto', 'doorway', 'ensemble', 'uniform' or a column "
        f"of ens.trajectories {list(trajs.columns)}. Got {weights!r} instead."
    )


def ground_state_ionisation_fraction(ens: Any, *, probe: GaussianPulse) -> float:
    """Weighted fraction of initial geometries at which the probe ionises the ground state.

    At the first snapshot of each trajectory (its initial, Wigner-sampled geometry) the
    ground state S0 is ionisable when ``n h-nu >= E+_k - E_0`` for some cation state k
    (at least half of the probe spectrum above the ionisation energy).
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
    with np.errstate(invalid="ignore"):  # NaN (missing data) is not ionisable
        # open: at least half of the probe's absorbed-energy spectrum lies above the IP
        open_ = np.any(probe.open_fraction(probe.total_energy - ip0) >= 0.5, axis=1)
    w = ens.trajectories["weight"].to_numpy()
    total = float(w.sum())
    return float(w[open_].sum() / total) if total > 0 else 0.0
