"""Photoelectron sticks of a block of trajectories: the window of the doorway-window picture.

Each snapshot on active neutral state ``a`` and each cation state ``k`` gives a stick at
the excess energy ``E_kin = n h nu_probe - IP_ak`` with weight ``w_traj * sigma_ak``
(cross-section model, default the squared Dyson norm; J. Chem. Phys. 2004, "Classical
doorway-window approximation for time-resolved pump-probe spectra"). A channel gives a
stick as long as the probe's absorbed-energy spectrum reaches above its ionisation
energy (excess above ``-THRESHOLD_TAIL`` standard deviations): the map keeps the part of
the stick's line above zero kinetic energy, whose area is the open fraction (an erf), so
the map is continuous in the ionisation energy. Channels without data (NaN) give no
stick and leave the alive weight (:mod:`.gaps`); trajectories stopped in the absorbing
state stay in it (:func:`block_alive`). :func:`block_sticks` is the one place these
formulas live: :func:`prepare_sticks` (an in-memory ensemble), the map reduction of
:mod:`.maps` and the contributions of :mod:`.contributions` (every block of a chunked
store) all call it.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
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
from .gaps import TimeFill, time_fill
from .model import TRPESModel
from .pulses import FWHM_TO_SIGMA, GaussianPulse
from .weights import trajectory_weights

__all__ = ["BlockSticks", "BlockAlive", "block_sticks", "block_alive", "absorbed_extension",
           "prepare_sticks", "check_trpes_inputs", "check_shifts", "energy_range",
           "THRESHOLD_TAIL", "ABSORBING_MODES", "check_absorbing"]


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
    alive_channel : ndarray, shape (n_time, n_cation)
        Alive weight of the snapshots with data for each channel.
    counts : dict
        ``n_missing_data`` (snapshots lacking data for some channel), ``n_absorbed``,
        ``n_absorbed_ionisable`` (trajectories stopped in the absorbing state, and those
        among them whose last snapshot the probe can ionise).
    weight_sq : float
        Sum of the squared trajectory weights (for the Kish effective size).
    fill : TimeFill or None
        The missing-data rescaling applied (its ``alive`` is the map's normaliser).
    alive_parts : tuple or None
        What the alive weight is made of, per snapshot and trajectory (for resampling
        it, :mod:`.bootstrap`): snapshots with data for some channel (bool,
        (n_snapshots,)), and the absorbed trajectories' last rows, first grid index
        after the stop and share of it (:class:`BlockAlive`).
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
    alive_channel: np.ndarray | None = None
    counts: dict[str, int] | None = None
    weight_sq: float = 0.0
    fill: TimeFill | None = None
    alive_parts: tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray] | None = None


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


#: channels whose excess energy ``n h nu - IP`` lies above ``-THRESHOLD_TAIL`` standard
#: deviations of the probe's absorbed-energy spectrum give sticks (the open fraction
#: below is < 1e-15: common practice for cutting Gaussian tails)
THRESHOLD_TAIL = 8.0

#: absorbing-state modes: the stopped trajectory's signal is zero after its end (kept
#: in the alive weight), its last sticks are carried forward, or it ends (old behaviour)
ABSORBING_MODES = ("zero", "carry", "end")


def check_shifts(shifts: Any, n_cation: int) -> np.ndarray | None:
    """Per-cation-channel ionisation-energy shifts (eV) as an array of shape (n_cation,).

    `shifts` is None, a sequence of one float per channel, or a mapping channel -> float
    (missing channels 0).
    """
    if shifts is None:
        return None
    out = np.zeros(n_cation)
    if isinstance(shifts, Mapping):
        for k, v in shifts.items():
            if isinstance(k, bool) or not isinstance(k, int | np.integer) or not \
                    0 <= int(k) < n_cation:
                raise SchemaError(f"ionisation_shifts: channel {k!r} is not a cation state "
                                  f"index in [0, {n_cation}).")
            out[int(k)] = float(v)
    else:
        arr = np.asarray(shifts, dtype=float)
        if arr.shape != (n_cation,):
            raise SchemaError(f"ionisation_shifts must hold one shift (eV) per cation channel, "
                              f"shape ({n_cation},); got shape {arr.shape}. Hint: or pass a "
                              "mapping {channel: shift}.")
        out[:] = arr
    if not np.all(np.isfinite(out)):
        raise SchemaError(f"ionisation_shifts must be finite; got {out.tolist()}.")
    return out


def _ionisation(block: Any, total_energy: float, shifts: np.ndarray | None = None
                ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Active-state index, IP (n_snapshots, n_cation) and excess energy of every channel.

    ``shifts`` (eV, per channel) are added to the ionisation energies.
    """
    active = block.snapshots["active"].to_numpy()
    e_neutral = block.energies[np.arange(block.n_snapshots), active]
    ip = block.cation_energies - e_neutral[:, None]
    if shifts is not None:
        ip = ip + shifts[None, :]
    return active, ip, total_energy - ip


def _tail(probe: GaussianPulse) -> float:
    return THRESHOLD_TAIL * probe.effective_spectral_fwhm * FWHM_TO_SIGMA


def energy_range(block: Any, span: Any, total_energy: float, tail: float = 0.0,
                 shifts: np.ndarray | None = None) -> dict[str, float]:
    """Smallest and largest stick energy of a block (eV; +-inf if none).

    Sticks are the channels with excess energy above ``-tail`` (eV). A partial of the
    reduction engine (``span`` unused).
    """
    if block.cation_energies is None:
        return {"e_min": np.inf, "e_max": -np.inf}
    ekin = _ionisation(block, total_energy, shifts)[2]
    e = ekin[ekin > -tail]
    return {"e_min": float(e.min()) if e.size else np.inf,
            "e_max": float(e.max()) if e.size else -np.inf}


def _last_rows(block: Any, time: np.ndarray) -> np.ndarray:
    """Row of the last snapshot of each trajectory of a block, shape (n_trajectories,)."""
    tix = block.traj_index
    out = np.full(block.n_trajectories, -1, dtype=np.int64)
    if time.size and np.all(tix[1:] >= tix[:-1]):  # trajectory-major (the usual case)
        same = tix[1:] == tix[:-1]
        if np.all(time[1:][same] >= time[:-1][same]):  # ... and in time order: no sort
            rows = np.flatnonzero(np.r_[~same, True])
            out[tix[rows]] = rows
            return out
    if time.size:
        order = np.lexsort((time, tix))
        ends = np.r_[tix[order][1:] != tix[order][:-1], True]
        out[tix[order][ends]] = order[ends]
    return out


class BlockAlive(NamedTuple):
    """Alive weights of a block (see :func:`block_alive`)."""

    alive: np.ndarray  # (n_time,) weight of snapshots with data (+ absorbed extension)
    alive_count: np.ndarray  # (n_time,) the same, counts
    alive_channel: np.ndarray  # (n_time, n_cation) alive weight with data per channel
    has_data: np.ndarray  # (n_snapshots, n_cation) bool
    ekin: np.ndarray  # (n_snapshots, n_cation) excess energies (NaN where missing)
    ip: np.ndarray
    active: np.ndarray
    absorbed: np.ndarray  # (n_absorbed,) last rows of the trajectories stopped in it
    ext_bin: np.ndarray  # (n_absorbed,) first grid index after the stop
    ext_first: np.ndarray  # (n_absorbed,) share of that first grid point (1 - frac)
    counts: dict[str, int]  # n_missing_data, n_absorbed, n_absorbed_ionisable


class Extension(NamedTuple):
    """Alive-weight extension of the trajectories stopped in the absorbing state."""

    rows: np.ndarray  # (n_absorbed,) their last rows
    ext_bin: np.ndarray  # (n_absorbed,) first grid index after the stop
    ext_first: np.ndarray  # (n_absorbed,) share of that first grid point (1 - frac)
    ext: np.ndarray  # (n_time,) added alive weight
    ext_n: np.ndarray  # (n_time,) added alive count
    counts: dict[str, int]  # n_absorbed, n_absorbed_ionisable


def absorbed_extension(last: np.ndarray, active_last: np.ndarray, time_last: np.ndarray,
                       w_last: np.ndarray, ekin_last: np.ndarray, *, probe: GaussianPulse,
                       absorbing_state: int, t_end: float, start: float, dt: float,
                       n_time: int) -> Extension:
    """The alive weight a trajectory stopped in the absorbing state keeps after its stop.

    Parameters
    ----------
    last : ndarray of int, shape (n_traj,)
        Row of each trajectory's last snapshot.
    active_last, time_last, w_last : ndarray, shape (n_traj,)
        Its active state, time (fs) and trajectory weight.
    ekin_last : ndarray, shape (n_traj, n_cation)
        Its excess energies (eV; -inf where data are missing).
    probe, absorbing_state, t_end, start, dt, n_time
        As for :func:`block_alive`.
    """
    tbin, tfrac = time_bins(time_last, start, dt)
    stop = (active_last == absorbing_state) & (time_last < t_end - 1e-9 * dt)
    f = np.zeros(int(stop.sum())) if tfrac is None else tfrac[stop]
    ext_bin = tbin[stop] + 1
    ext_first = 1.0 - f
    ok = ext_bin < n_time
    rows, ext_bin, ext_first = last[stop][ok], ext_bin[ok], ext_first[ok]
    wa, ek = w_last[stop][ok], ekin_last[stop][ok]
    ext = np.zeros(n_time)
    ext_n = np.zeros(n_time)
    np.add.at(ext, ext_bin, -wa * (1.0 - ext_first))  # first point: the unsplit share
    np.add.at(ext_n, ext_bin, -(1.0 - ext_first))
    ext += np.cumsum(np.bincount(ext_bin, wa, minlength=n_time + 1)[:n_time])
    ext_n += np.cumsum(np.bincount(ext_bin, minlength=n_time + 1)[:n_time].astype(float))
    opened = probe.open_fraction(ek)
    return Extension(rows=rows, ext_bin=ext_bin, ext_first=ext_first, ext=ext, ext_n=ext_n,
                     counts={"n_absorbed": int(rows.size), "n_absorbed_ionisable": int(
                         np.count_nonzero((opened > 1e-3).any(axis=1)))})


def block_alive(block: Any, *, w_traj: np.ndarray, probe: GaussianPulse, start: float,
                dt: float, n_time: int, ionisation_shifts: np.ndarray | None = None,
                absorbing_state: int | None = None, absorbing: str = "zero",
                t_end: float | None = None, keep: np.ndarray | None = None) -> BlockAlive:
    """Alive weight of a block on the time grid, with missing data and absorbing states.

    A snapshot counts in the alive weight of a cation channel only if its ionisation
    energy and Dyson norm for that channel are known (not NaN); one without data for
    any channel does not count at all ("not computed" is not "no signal"). A
    trajectory whose last snapshot is in ``absorbing_state`` and that stops before
    ``t_end`` stays in the alive weight (every channel) after its stop, unless
    ``absorbing == "end"``. Trajectories with ``keep`` False (shape
    (n_trajectories,); excluded, weight 0 in `w_traj`) are not counted alive.
    """
    from ._kernels_deposit import deposit_counts

    n = block.n_snapshots
    n_cat = block.cation_energies.shape[1]
    w_snap = w_traj[block.traj_index]
    time = block.snapshots["time"].to_numpy()
    tbin, tfrac = time_bins(time, start, dt)
    active, ip, ekin = _ionisation(block, probe.total_energy, ionisation_shifts)
    dyson = block.active_dyson()
    has = np.isfinite(ip) & np.isfinite(dyson)
    any_data = has.any(axis=1)
    wk = np.where(any_data, w_snap, 0.0)
    alive = deposit_counts(tbin, wk, n_time=n_time, tfrac=tfrac)
    kept = any_data if keep is None else any_data & keep[block.traj_index]
    alive_count = deposit_counts(tbin, kept.astype(float), n_time=n_time, tfrac=tfrac)
    partial = bool(np.any(has != any_data[:, None]))
    alive_channel = (np.stack([deposit_counts(tbin, np.where(has[:, k], w_snap, 0.0),
                                              n_time=n_time, tfrac=tfrac)
                               for k in range(n_cat)], axis=1)
                     if partial else np.repeat(alive[:, None], n_cat, axis=1))
    counts = {"n_missing_data": int(np.count_nonzero(~has.all(axis=1))),
              "n_absorbed": 0, "n_absorbed_ionisable": 0}
    absorbed = ext_bin = np.zeros(0, dtype=np.int64)
    ext_first: np.ndarray = np.zeros(0)
    if absorbing_state is not None and absorbing != "end" and t_end is not None and n:
        last = _last_rows(block, time)
        last = last[last >= 0]
        if keep is not None:  # excluded trajectories do not stay alive either
            last = last[keep[block.traj_index[last]]]
        x = absorbed_extension(last, active[last], time[last], w_snap[last],
                               np.where(has[last], ekin[last], -np.inf), probe=probe,
                               absorbing_state=absorbing_state, t_end=t_end, start=start,
                               dt=dt, n_time=n_time)
        absorbed, ext_bin, ext_first = x.rows, x.ext_bin, x.ext_first
        alive = alive + x.ext
        alive_count = alive_count + x.ext_n
        alive_channel = alive_channel + x.ext[:, None]
        counts.update(x.counts)
    return BlockAlive(alive=alive, alive_count=alive_count, alive_channel=alive_channel,
                      has_data=has, ekin=ekin, ip=ip, active=active, absorbed=absorbed,
                      ext_bin=ext_bin, ext_first=ext_first, counts=counts)


def block_sticks(block: Any, *, probe: GaussianPulse, cross_section: CrossSection,
                 w_traj: np.ndarray, weights_used: str, decompose: str | None,
                 start: float, dt: float, n_time: int,
                 ionisation_shifts: np.ndarray | None = None,
                 absorbing_state: int | None = None, absorbing: str = "zero",
                 t_end: float | None = None, fill: TimeFill | None = None,
                 local_fill: bool = True,
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
        A resolved cross-section model (evaluated at the stick energy, clipped at 0).
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
    ionisation_shifts : ndarray, shape (n_cation,), optional
        Added to each channel's ionisation energies (eV) before the threshold test.
    absorbing_state, absorbing, t_end
        See :func:`block_alive`; with ``absorbing == "carry"`` the last snapshot's
        sticks of a trajectory stopped in the absorbing state are repeated at every
        later grid time.
    fill : TimeFill, optional
        :func:`.gaps.time_fill` of the whole source (per-channel alive weights and
        gaps in the data); without it, that of this block when `local_fill` (an
        in-memory ensemble is one block), else none.
    keep : ndarray of bool, shape (n_trajectories,), optional
        Trajectories counted alive (excluded ones: False, with weight 0 in `w_traj`).

    Returns
    -------
    BlockSticks
    """
    al = block_alive(block, w_traj=w_traj, probe=probe, start=start, dt=dt, n_time=n_time,
                     ionisation_shifts=ionisation_shifts, absorbing_state=absorbing_state,
                     absorbing=absorbing, t_end=t_end, keep=keep)
    w_snap = w_traj[block.traj_index]
    time = block.snapshots["time"].to_numpy()
    tbin_snap, tfrac_snap = time_bins(time, start, dt)
    total_energy = probe.total_energy
    active, ip, ekin = al.active, al.ip, al.ekin
    with np.errstate(invalid="ignore"):
        snap, chan = np.nonzero(al.has_data & (ekin > -_tail(probe)))
    tbin = tbin_snap[snap]
    tfrac = None if tfrac_snap is None else tfrac_snap[snap].copy()
    ctime = time[snap]
    if absorbing == "carry" and al.absorbed.size:
        # repeat the stopped trajectories' last sticks at every later grid point
        is_last = np.zeros(block.n_snapshots, dtype=bool)
        is_last[al.absorbed] = True
        where = np.full(block.n_snapshots, -1, dtype=np.int64)
        where[al.absorbed] = np.arange(al.absorbed.size)
        src = np.flatnonzero(is_last[snap])
        a_idx = where[snap[src]]
        reps = n_time - al.ext_bin[a_idx]
        rep_src = np.repeat(src, reps)
        offs = np.arange(rep_src.size) - np.repeat(np.cumsum(reps) - reps, reps)
        rep_bin = np.repeat(al.ext_bin[a_idx], reps) + offs
        share = np.where(offs == 0, np.repeat(al.ext_first[a_idx], reps), 1.0)
        share_all = np.r_[np.ones(snap.size), share]
        snap = np.r_[snap, snap[rep_src]]
        chan = np.r_[chan, chan[rep_src]]
        ctime = np.r_[ctime, start + dt * rep_bin]
        tbin = np.r_[tbin, rep_bin]
        tfrac = (None if tfrac is None else np.r_[tfrac, np.zeros(rep_src.size)])
    else:
        share_all = None
    dyson = block.active_dyson()
    e = ekin[snap, chan]
    sigma = np.asarray(cross_section(dyson[snap, chan], np.maximum(e, 0.0), ip[snap, chan],
                                     chan, total_energy), dtype=float)
    if sigma.shape != snap.shape or not np.all(np.isfinite(sigma)) or np.any(sigma < 0):
        raise SchemaError("the cross-section model must return finite values >= 0, one per "
                          "stick.")
    weight = w_snap[snap] * sigma
    if share_all is not None:
        weight = weight * share_all
    if fill is None and local_fill:
        fill = time_fill(al.alive, al.alive_channel, al.alive_count)
    if fill is not None:  # per-channel alive weights and gaps (missing data)
        src, tbin, factor = fill.expand(tbin, tfrac, chan)
        snap, chan, e, ctime = snap[src], chan[src], e[src], ctime[src]
        weight = weight[src] * factor
        tfrac = None
    columns = {"snapshot": snap, "traj": block.snapshots["traj"].to_numpy()[snap],
               "time": ctime, "state": active[snap], "channel": chan,
               "energy": e, "weight": weight}
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
    return BlockSticks(sticks=sticks, tbin=tbin, tfrac=tfrac, comp=comp,
                       comp_src=comp_src, comp_weight=comp_weight, alive=al.alive,
                       alive_count=al.alive_count, total_weight=float(w_traj.sum()),
                       alive_channel=al.alive_channel, counts=al.counts,
                       weight_sq=float(np.sum(w_traj * w_traj)), fill=fill,
                       alive_parts=(np.asarray(al.has_data.any(axis=1)), al.absorbed,
                                    al.ext_bin, al.ext_first))


def prepare_sticks(
    ens: Ensemble,
    *,
    probe: GaussianPulse,
    pump: GaussianPulse | None = None,
    cross_section: str | CrossSection | Any = "dyson",
    weights: str = "auto",
    decompose: str | None = None,
    time_step: float | None = None,
    order: int = DEFAULT_ORDER,
    bins_per_fwhm: float = DEFAULT_BINS_PER_FWHM,
    progress: bool = True,
    ionisation_shifts: Sequence[float] | Mapping[int, float] | None = None,
    absorbing: str = "zero",
    exclude: Any = None,
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
    weights : {"auto", "doorway", "ensemble", "uniform"} or str
        See :func:`~ensemblelab.compute.spectroscopy.weights.trajectory_weights`.
    decompose : {None, "neutral", "cation", "pair", "diabatic"}
        Decomposition to prepare.
    time_step : float, optional
        Internal time grid step in fs; default the median trajectory step.
    order, bins_per_fwhm : int, float
        Accuracy knobs of the fast kernel (see :mod:`._kernels_deposit`).
    progress : bool
        Show a progress bar for large ensembles.
    ionisation_shifts, absorbing, exclude
        As for :func:`~ensemblelab.compute.spectroscopy.maps.compute_trpes` (``exclude``:
        trajectory ids given weight 0 and not counted alive).

    Returns
    -------
    TRPESModel
        Holding the sticks; :meth:`TRPESModel.broaden` makes maps.
    """
    from ..engine import as_source, time_statistics
    from .sampling import ensemble_absorbing_state, excluded_ids, kish_effective_size

    if not isinstance(ens, Ensemble):
        raise SchemaError(f"ens must be an Ensemble; got {type(ens).__name__}.")
    probe, pump, decompose = check_trpes_inputs(ens, probe=probe, pump=pump,
                                                decompose=decompose)
    if not isinstance(order, int) or order < 1:
        raise SchemaError(f"The 'order' parameter must be an int >= 1. Got {order!r} instead.")
    absorbing = check_absorbing(absorbing)
    shifts = check_shifts(ionisation_shifts, ens.n_cation)
    dt = check_time_step(time_step)
    cs = resolve_cross_section(cross_section)
    w_traj, weights_used = trajectory_weights(ens, weights=weights, pump=pump)
    keep = None
    if exclude is not None and len(excluded_ids(exclude)):  # weight 0, not counted alive
        keep = ~np.isin(ens.trajectories["traj"].to_numpy(), excluded_ids(exclude))
        w_traj = np.where(keep, w_traj, 0.0)
    st = time_statistics(as_source(ens))
    if dt is None:
        dt = st["median_step"] if np.isfinite(st["median_step"]) else 1.0
    start, n_time = grid_from_range(st["t_min"], st["t_max"], dt)
    labels = component_labels(ens, decompose)
    t_end = float(st["t_max"]) if ens.n_snapshots else 0.0
    bs = block_sticks(ens, probe=probe, cross_section=cs, w_traj=w_traj,
                      weights_used=weights_used, decompose=decompose, start=start, dt=dt,
                      n_time=n_time, ionisation_shifts=shifts,
                      absorbing_state=ensemble_absorbing_state(ens), absorbing=absorbing,
                      t_end=t_end, keep=keep)
    n = ens.n_snapshots
    return TRPESModel(
        sticks=bs.sticks, probe=probe, decompose=decompose, labels=labels, grid_start=start,
        time_step=dt, n_time=n_time, alive=bs.alive if bs.fill is None else bs.fill.alive,
        alive_count=(bs.alive_count if bs.fill is None or bs.fill.alive_count is None
                     else bs.fill.alive_count),
        total_weight=bs.total_weight, t_known=t_end,
        tbin=bs.tbin, tfrac=bs.tfrac, comp=bs.comp, comp_src=bs.comp_src,
        comp_weight=bs.comp_weight,
        info={"cross_section": describe_cross_section(cs), "weights": weights_used,
              "n_sticks": bs.sticks.n_sticks, "n_snapshots": n,
              "n_trajectories": ens.n_trajectories, "progress": progress,
              "n_states": ens.n_states, "n_cation": ens.n_cation,
              "effective_sample_size": kish_effective_size(w_traj),
              "ionisation_shifts": None if shifts is None else shifts.tolist(),
              "absorbing_state": ensemble_absorbing_state(ens), "absorbing": absorbing,
              **(bs.counts or {})},
        order=order, bins_per_fwhm=float(bins_per_fwhm), n_snapshots=n,
    )


def check_absorbing(absorbing: Any) -> str:
    """Check the ``absorbing`` mode (one of :data:`ABSORBING_MODES`)."""
    if absorbing not in ABSORBING_MODES:
        raise SchemaError(f"The 'absorbing' parameter must be one of {list(ABSORBING_MODES)}. "
                          f"Got {absorbing!r} instead.")
    return str(absorbing)
