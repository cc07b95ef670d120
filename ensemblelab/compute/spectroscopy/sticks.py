"""Photoelectron sticks of a block of trajectories: the window of the doorway-window picture.

Each snapshot on active neutral state ``a`` and each cation state ``k`` with
``E_kin = n h nu_probe - IP_ak > 0`` gives a stick at ``E_kin`` with weight
``w_traj * sigma_ak`` (cross-section model, default the squared Dyson norm); closed
channels give nothing (J. Chem. Phys. 2004, "Classical doorway-window approximation
for time-resolved pump-probe spectra"). :func:`block_sticks` is the one place these
formulas live: :func:`prepare_sticks` (an in-memory ensemble), the map reduction of
:mod:`.maps` and the contributions of :mod:`.contributions` (every block of a chunked
store) all call it.
"""

from __future__ import annotations

from typing import Any, NamedTuple

import numpy as np

from ...data.ensemble import Ensemble
from ...data.spectrum import StickSpectrum
from ...errors import SchemaError
from ._checks import (
    DEFAULT_BINS_PER_FWHM,
    DEFAULT_ORDER,
    check_decompose,
    check_pulse,
    check_time_step,
    component_labels,
    grid_from_range,
    time_bins,
)
from .cross_sections import CrossSection, describe_cross_section, resolve_cross_section
from .model import TRPESModel
from .pulses import GaussianPulse
from .weights import trajectory_weights

__all__ = ["BlockSticks", "block_sticks", "prepare_sticks", "check_trpes_inputs",
           "energy_range"]


class BlockSticks(NamedTuple):
    """The sticks of one block on a time grid.

    Attributes
    ----------
    sticks : StickSpectrum
        One stick per (snapshot, open channel), snapshot-major.
    tbin : ndarray of int, shape (n_sticks,)
        Time-grid index of each stick.
    tfrac : ndarray, shape (n_sticks,), or None
        Fraction towards the next grid point (None: every snapshot on a grid point).
    comp, comp_src, comp_weight : ndarray or None
        Component of each (expanded) stick, its source stick (None: the sticks
        themselves) and its weight (None: the stick weights); None without a
        decomposition.
    alive, alive_count : ndarray, shape (n_time,)
        Trajectory weight and number of snapshots on the grid (split between
        neighbouring points like the sticks).
    total_weight : float
        Sum of the block's trajectory weights.
    """

    sticks: StickSpectrum
    tbin: np.ndarray
    tfrac: np.ndarray | None
    comp: np.ndarray | None
    comp_src: np.ndarray | None
    comp_weight: np.ndarray | None
    alive: np.ndarray
    alive_count: np.ndarray
    total_weight: float


def check_trpes_inputs(source: Any, *, probe: Any, pump: Any, decompose: Any
                       ) -> tuple[GaussianPulse, GaussianPulse | None, str | None]:
    """Check the pulses, the decomposition and the arrays a map needs; return them."""
    probe = check_pulse(probe, "probe")
    pump = check_pulse(pump, "pump", optional=True)
    decompose = check_decompose(decompose)
    has = source.has if hasattr(source, "has") else (
        lambda name: getattr(source, name, None) is not None)
    if not (has("cation_energies") and has("dyson")):
        raise SchemaError(
            "compute_trpes needs ens.cation_energies and ens.dyson (squared Dyson norms). "
            "Hint: load an ensemble whose snapshots carry cation energies and Dyson norms."
        )
    if decompose == "diabatic" and not has("adt"):
        raise SchemaError(
            "decompose='diabatic' needs ens.adt (adiabatic-to-diabatic matrices). Hint: build "
            "them with ensemblelab.compute.spectroscopy.ensemble_adt (Loewdin, local "
            "diabatisation or Boys) and ens.replace(adt=...)."
        )
    return probe, pump, decompose


def _ionisation(block: Any, total_energy: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Active-state index, IP (n_snapshots, n_cation) and kinetic energy of every channel."""
    active = block.snapshots["active"].to_numpy()
    e_neutral = block.energies[np.arange(block.n_snapshots), active]
    ip = block.cation_energies - e_neutral[:, None]
    return active, ip, total_energy - ip


def energy_range(block: Any, span: Any, total_energy: float) -> dict[str, float]:
    """Smallest and largest open-channel kinetic energy of a block (eV; +-inf if none).

    A partial of the reduction engine (``span`` unused).
    """
    if block.cation_energies is None:
        return {"e_min": np.inf, "e_max": -np.inf}
    ekin = _ionisation(block, total_energy)[2]
    e = ekin[ekin > 0]
    return {"e_min": float(e.min()) if e.size else np.inf,
            "e_max": float(e.max()) if e.size else -np.inf}


def block_sticks(block: Any, *, probe: GaussianPulse, cross_section: CrossSection,
                 w_traj: np.ndarray, weights_used: str, decompose: str | None,
                 start: float, dt: float, n_time: int,
                 keep: np.ndarray | None = None) -> BlockSticks:
    """The sticks of a block (an Ensemble or a chunk of one) on the time grid.

    Parameters
    ----------
    block : Ensemble or block
        Needs ``energies``, ``cation_energies``, ``dyson`` (and ``adt``,
        ``adt_cation`` for the diabatic decomposition).
    probe : GaussianPulse
        The probe (``total_energy`` in eV).
    cross_section : CrossSection
        A resolved cross-section model.
    w_traj : ndarray, shape (n_trajectories,)
        Trajectory weights of the block.
    weights_used : str
        How they were obtained (recorded in the sticks' ``info``).
    decompose : {None, "neutral", "cation", "pair", "diabatic"}
        Decomposition to prepare.
    start, dt : float
        Time grid ``start + j * dt`` (fs).
    n_time : int
        Size of the time grid.
    keep : ndarray of bool, shape (n_trajectories,), optional
        Trajectories counted alive (excluded ones: False, with weight 0 in `w_traj`).

    Returns
    -------
    BlockSticks
    """
    from ._kernels_deposit import deposit_counts

    n = block.n_snapshots
    w_snap = w_traj[block.traj_index]
    time = block.snapshots["time"].to_numpy()
    tbin_snap, tfrac_snap = time_bins(time, start, dt)
    alive = deposit_counts(tbin_snap, w_snap, n_time=n_time, tfrac=tfrac_snap)
    ones = np.ones(n) if keep is None else keep[block.traj_index].astype(float)
    alive_count = deposit_counts(tbin_snap, ones, n_time=n_time, tfrac=tfrac_snap)
    total_energy = probe.total_energy
    active, ip, ekin = _ionisation(block, total_energy)
    snap, chan = np.nonzero(ekin > 0)
    dyson = block.active_dyson()
    sigma = np.asarray(cross_section(dyson[snap, chan], ekin[snap, chan], ip[snap, chan], chan,
                                     total_energy), dtype=float)
    if sigma.shape != snap.shape or not np.all(np.isfinite(sigma)) or np.any(sigma < 0):
        raise SchemaError("the cross-section model must return finite values >= 0, one per "
                          "stick.")
    columns = {"snapshot": snap, "traj": block.snapshots["traj"].to_numpy()[snap],
               "time": time[snap], "state": active[snap], "channel": chan,
               "energy": ekin[snap, chan], "weight": w_snap[snap] * sigma}
    for name, arr in columns.items():  # made here, owned by nobody else: hand over
        if arr.dtype == (np.float64 if name in ("time", "energy", "weight") else np.int64):
            arr.setflags(write=False)
    sticks = StickSpectrum(**columns, info={"photon_energy": probe.photon_energy,
                                            "n_photons": probe.n_photons,
                                            "cross_section": describe_cross_section(
                                                cross_section), "weights": weights_used})
    n_cat = block.cation_energies.shape[1]
    comp = comp_src = comp_weight = None
    if decompose == "neutral":
        comp = sticks.state
    elif decompose == "cation":
        comp = sticks.channel
    elif decompose == "pair":
        comp = sticks.state * n_cat + sticks.channel
    elif decompose == "diabatic":
        fa = block.adt[sticks.snapshot, sticks.state, :] ** 2  # (n_sticks, n_states)
        if block.adt_cation is not None:
            fb = block.adt_cation[sticks.snapshot, sticks.channel, :] ** 2
        else:
            fb = np.zeros((sticks.n_sticks, n_cat))
            fb[np.arange(sticks.n_sticks), sticks.channel] = 1.0
        frac = (fa[:, :, None] * fb[:, None, :]).reshape(sticks.n_sticks, -1)
        comp_src, comp = np.nonzero(frac > 0)
        comp_weight = sticks.weight[comp_src] * frac[comp_src, comp]
    return BlockSticks(sticks=sticks, tbin=tbin_snap[snap],
                       tfrac=None if tfrac_snap is None else tfrac_snap[snap], comp=comp,
                       comp_src=comp_src, comp_weight=comp_weight, alive=alive,
                       alive_count=alive_count, total_weight=float(w_traj.sum()))


def prepare_sticks(
    ens: Ensemble,
    *,
    probe: GaussianPulse,
    pump: GaussianPulse | None = None,
    cross_section: str | CrossSection | Any = "dyson",
    weights: str = "doorway",
    decompose: str | None = None,
    time_step: float | None = None,
    order: int = DEFAULT_ORDER,
    bins_per_fwhm: float = DEFAULT_BINS_PER_FWHM,
    progress: bool = True,
) -> TRPESModel:
    """Compute the raw sticks of an ensemble for a probe and keep them for broadening.

    Parameters
    ----------
    ens : Ensemble
        Needs ``energies``, ``cation_energies`` and ``dyson``.
    probe : GaussianPulse
        Probe pulse (photon energy, n_photons, width).
    pump : GaussianPulse, optional
        Used for doorway weights.
    cross_section : str, CrossSection or callable
        See :func:`ensemblelab.compute.spectroscopy.cross_sections.resolve_cross_section`.
    weights : {"doorway", "uniform"} or str
        See :func:`~ensemblelab.compute.spectroscopy.weights.trajectory_weights`.
    decompose : {None, "neutral", "cation", "pair", "diabatic"}
        Decomposition to prepare.
    time_step : float, optional
        Internal time grid step in fs; default the median trajectory step.
    order, bins_per_fwhm : int, float
        Accuracy knobs of the fast kernel (see :mod:`._kernels_deposit`).
    progress : bool
        Show a progress bar for large ensembles.

    Returns
    -------
    TRPESModel
        Holding the sticks; :meth:`TRPESModel.broaden` makes maps.
    """
    from ..engine import as_source, time_statistics

    if not isinstance(ens, Ensemble):
        raise SchemaError(f"ens must be an Ensemble; got {type(ens).__name__}.")
    probe, pump, decompose = check_trpes_inputs(ens, probe=probe, pump=pump,
                                                decompose=decompose)
    if not isinstance(order, int) or order < 1:
        raise SchemaError(f"The 'order' parameter must be an int >= 1. Got {order!r} instead.")
    dt = check_time_step(time_step)
    cs = resolve_cross_section(cross_section)
    w_traj, weights_used = trajectory_weights(ens, weights=weights, pump=pump)
    st = time_statistics(as_source(ens))
    if dt is None:
        dt = st["median_step"] if np.isfinite(st["median_step"]) else 1.0
    start, n_time = grid_from_range(st["t_min"], st["t_max"], dt)
    labels = component_labels(ens, decompose)
    bs = block_sticks(ens, probe=probe, cross_section=cs, w_traj=w_traj,
                      weights_used=weights_used, decompose=decompose, start=start, dt=dt,
                      n_time=n_time)
    n = ens.n_snapshots
    return TRPESModel(
        sticks=bs.sticks, probe=probe, decompose=decompose, labels=labels, grid_start=start,
        time_step=dt, n_time=n_time, alive=bs.alive, alive_count=bs.alive_count,
        total_weight=bs.total_weight, t_known=float(st["t_max"]) if n else 0.0,
        tbin=bs.tbin, tfrac=bs.tfrac, comp=bs.comp, comp_src=bs.comp_src,
        comp_weight=bs.comp_weight,
        info={"cross_section": describe_cross_section(cs), "weights": weights_used,
              "n_sticks": bs.sticks.n_sticks, "n_snapshots": n,
              "n_trajectories": ens.n_trajectories, "progress": progress,
              "n_states": ens.n_states, "n_cation": ens.n_cation},
        order=order, bins_per_fwhm=float(bins_per_fwhm), n_snapshots=n,
    )
