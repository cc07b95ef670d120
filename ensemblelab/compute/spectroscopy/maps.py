"""Time-resolved photoelectron maps in the classical doorway-window picture.

Method (J. Chem. Phys. 2004, "Classical doorway-window approximation for time-resolved
pump-probe spectra"):

* **Window.** The sticks of :mod:`.sticks`: one per snapshot and open cation channel
  at ``E_kin = n h nu_probe - IP``, weight ``w_traj * sigma``.
* **Ensemble average.** Snapshot times are put on a uniform time grid (step = the
  trajectories' median output step, or ``time_step``). Snapshots on grid points go to
  that point; otherwise a snapshot is split linearly between its two neighbouring grid
  points (numerator and alive weight alike).
* **Broadening, normalisation and temporal convolution:** see :mod:`.model`. Delays
  later than ``t_end - 3 sigma_cc`` are reported as edge-affected in
  ``params["edge_delay"]``.
* **Assignment.** Exact additive decompositions by neutral state, cation state,
  (neutral, cation) pair or (neutral diabat, cation diabat) pair whose sum is the
  total map.

:func:`compute_trpes` is one reduction of :mod:`ensemblelab.compute.engine`: each block
of trajectories (the whole in-memory ensemble, or one chunk of a chunked store)
deposits the Taylor moments of its sticks on the common time and fine energy grids
(:func:`trpes_partial`); the moment histograms add up; the sum is broadened once.
"""

from __future__ import annotations

import math
import warnings
from typing import Any, Literal, overload

import numpy as np
import numpy.typing as npt

from ...data.ensemble import Ensemble
from ...data.spectrum import TRPESMap
from ...errors import EnsembleWarning, SchemaError
from ..engine import BlockSource, BlockSpan, add, as_source, reduce, time_statistics
from ._checks import (
    DEFAULT_BINS_PER_FWHM,
    DEFAULT_ORDER,
    check_grid,
    check_nonneg,
    check_time_step,
    component_labels,
    grid_from_range,
)
from .cross_sections import CrossSection, describe_cross_section, resolve_cross_section
from .model import TRPESModel, deposit
from .pulses import GaussianPulse
from .sticks import block_sticks, check_trpes_inputs, energy_range
from .weights import ground_state_ionisation_fraction, trajectory_weights, weights_word

__all__ = ["compute_trpes", "trpes_model", "time_grid", "trpes_partial", "TRPES_FIELDS",
           "excluded_ids"]

#: arrays a TRPES block reads (the diabatic decomposition adds ``adt``, ``adt_cation``)
TRPES_FIELDS = ("energies", "cation_energies", "dyson", "excitation_energies",
                "transition_dipoles", "oscillator_strengths")


def excluded_ids(exclude: npt.ArrayLike | None) -> np.ndarray:
    """Sorted distinct trajectory ids of an ``exclude=`` argument, int64 (empty for None)."""
    if exclude is None:
        return np.zeros(0, dtype=np.int64)
    ids = np.asarray(exclude).reshape(-1)
    if ids.size and not np.issubdtype(ids.dtype, np.integer):
        raise SchemaError("The 'exclude' parameter must hold integer trajectory ids. Got "
                          f"{ids.dtype} values instead.")
    return np.unique(ids.astype(np.int64))


def time_grid(source: BlockSource, time_step: float | None, *, client: Any = None,
              scheduler: Any = None) -> dict[str, Any]:
    """The internal time grid of a source: ``start``, ``dt``, ``n_time``, ``t_known`` (fs)."""
    st = time_statistics(source, client=client, scheduler=scheduler)
    dt = check_time_step(time_step)
    if dt is None:
        dt = st["median_step"] if math.isfinite(st["median_step"]) else 1.0
    start, n_time = grid_from_range(st["t_min"], st["t_max"], dt)
    t_known = float(st["t_max"]) if math.isfinite(st["t_max"]) else 0.0
    return {"start": start, "dt": dt, "n_time": n_time, "t_known": t_known}


def _stick_energy_range(source: BlockSource, total_energy: float, *, client: Any,
                        scheduler: Any) -> tuple[float, float]:
    """Range of the stick energies ``total_energy - IP`` over open channels (IP < total).

    From each block's ``ip_min`` / ``ip_max`` summary where known: a block whose every
    channel is open gives ``total - ip_max`` and ``total - ip_min`` exactly (float
    subtraction is monotone), a closed block gives nothing; only blocks that are
    partly open at this photon energy (or lack the summary) are read.
    """
    lo, hi = math.inf, -math.inf
    pending = []
    for span in source.spans():
        s = span.summary
        if "ip_min" not in s:
            pending.append(span.index)
        elif s["ip_min"] is None or s["ip_min"] >= total_energy:
            continue  # no finite IP, or every channel closed
        elif s["ip_max"] < total_energy:
            lo, hi = min(lo, total_energy - s["ip_max"]), max(hi, total_energy - s["ip_min"])
        else:
            pending.append(span.index)
    if pending:
        rest = reduce(source, energy_range, _merge_range, args=(total_energy,),
                      fields=["energies", "cation_energies"], indices=pending, client=client,
                      scheduler=scheduler, desc="energy range")
        lo, hi = min(lo, rest["e_min"]), max(hi, rest["e_max"])
    return (lo if math.isfinite(lo) else 0.0), (hi if math.isfinite(hi) else 0.0)


def _merge_range(a: dict[str, float], b: dict[str, float]) -> dict[str, float]:
    return {"e_min": min(a["e_min"], b["e_min"]), "e_max": max(a["e_max"], b["e_max"])}


def trpes_partial(block: Any, span: BlockSpan, opts: dict[str, Any]) -> dict[str, Any]:
    """Moment histograms, alive weights and stick count of one block (a reduction partial).

    ``opts`` holds the settings (``probe``, ``pump``, ``cross_section``, ``weights``,
    ``weights_used``, ``decompose``, ``n_comp``), the time grid (``start``, ``dt``,
    ``n_time``) and the fine energy grid (``e_lo``, ``h``, ``n_fine``, ``order``).
    With ``keep_sticks`` the block's :class:`~.sticks.BlockSticks` come back too.
    """
    w_traj, _ = trajectory_weights(block, weights=opts["weights"], pump=opts["pump"])
    keep = None
    excluded = opts.get("exclude")
    if excluded is not None and len(excluded):  # excluded trajectories: weight 0, not alive
        keep = ~np.isin(block.trajectories["traj"].to_numpy(), excluded)
        w_traj = np.where(keep, w_traj, 0.0)
    bs = block_sticks(block, probe=opts["probe"], cross_section=opts["cross_section"],
                      w_traj=w_traj, keep=keep, weights_used=opts["weights_used"],
                      decompose=opts["decompose"], start=opts["start"], dt=opts["dt"],
                      n_time=opts["n_time"])
    grid = {"n_time": opts["n_time"], "e_lo": opts["e_lo"], "h": opts["h"],
            "n_fine": opts["n_fine"], "order": opts["order"]}
    progress = bool(opts.get("progress", False))
    s = bs.sticks
    hist = deposit(bs.tbin, s.energy, s.weight, tfrac=bs.tfrac, progress=progress, **grid)
    hist_comp = None
    if bs.comp is not None:
        src = bs.comp_src
        tb = bs.tbin if src is None else bs.tbin[src]
        tf = None if bs.tfrac is None else (bs.tfrac if src is None else bs.tfrac[src])
        ww = s.weight if bs.comp_weight is None else bs.comp_weight
        hist_comp = deposit(tb, s.energy if src is None else s.energy[src], ww, comp=bs.comp,
                            n_comp=opts["n_comp"], tfrac=tf, progress=progress, **grid)
    out: dict[str, Any] = {"alive": bs.alive, "alive_count": bs.alive_count, "hist": hist,
           "hist_comp": hist_comp, "n_sticks": np.int64(s.n_sticks),
           "total_weight": np.array(bs.total_weight)}
    if opts.get("keep_sticks"):
        out["sticks"] = bs
    return out


def trpes_model(
    ens: Ensemble | BlockSource,
    *,
    probe: GaussianPulse,
    pump: GaussianPulse | None = None,
    resolution: float = 0.0,
    cross_section: str | CrossSection | Any = "dyson",
    weights: str = "doorway",
    decompose: str | None = None,
    time_step: float | None = None,
    progress: bool = True,
    client: Any = None,
    scheduler: Any = None,
    exclude: npt.ArrayLike | None = None,
) -> TRPESModel:
    """The stick model of an ensemble or chunked store, moments deposited (the reduction).

    Parameters are those of :func:`compute_trpes`. An in-memory ensemble's model keeps
    its sticks too; a chunked store's keeps the moments only.

    Returns
    -------
    TRPESModel
    """
    source = as_source(ens)
    probe, pump, decompose = check_trpes_inputs(source, probe=probe, pump=pump,
                                                decompose=decompose)
    resolution = check_nonneg(resolution, "resolution")
    grid = time_grid(source, time_step, client=client, scheduler=scheduler)
    cs = resolve_cross_section(cross_section)
    used = weights_word(source, weights=weights, pump=pump)
    fwhm = math.hypot(probe.effective_spectral_fwhm, resolution)
    h = fwhm / DEFAULT_BINS_PER_FWHM
    e_lo, e_hi = _stick_energy_range(source, probe.total_energy, client=client,
                                     scheduler=scheduler)
    n_fine = int(math.floor((e_hi - e_lo) / h + 0.5)) + 2
    labels = component_labels(source, decompose)
    in_memory = isinstance(ens, Ensemble)
    excluded = excluded_ids(exclude)
    opts = {"probe": probe, "pump": pump, "cross_section": cs, "weights": weights,
            "exclude": excluded,
            "weights_used": used, "decompose": decompose, "n_comp": len(labels), **grid,
            "e_lo": e_lo, "h": h, "n_fine": n_fine, "order": DEFAULT_ORDER,
            "keep_sticks": in_memory, "progress": progress and in_memory}
    fields = [*TRPES_FIELDS, *(("adt", "adt_cation") if decompose == "diabatic" else ())]
    total = reduce(source, trpes_partial, add, args=(opts,), fields=fields, client=client,
                   scheduler=scheduler, progress=progress, desc="TRPES blocks")
    if total["hist_comp"] is None and decompose is not None:
        total["hist_comp"] = np.zeros((DEFAULT_ORDER, len(labels), grid["n_time"], n_fine))
    bs = total.get("sticks")
    n = source.n_snapshots
    model = TRPESModel(
        sticks=None if bs is None else bs.sticks, probe=probe, decompose=decompose,
        labels=labels, grid_start=grid["start"], time_step=grid["dt"], n_time=grid["n_time"],
        alive=total["alive"], alive_count=total["alive_count"],
        total_weight=float(total["total_weight"]), t_known=grid["t_known"],
        tbin=None if bs is None else bs.tbin, tfrac=None if bs is None else bs.tfrac,
        comp=None if bs is None else bs.comp, comp_src=None if bs is None else bs.comp_src,
        comp_weight=None if bs is None else bs.comp_weight,
        info={"cross_section": describe_cross_section(cs), "weights": used,
              "n_sticks": int(total["n_sticks"]), "n_snapshots": n,
              "n_trajectories": source.n_trajectories - int(np.isin(
                  source.trajectories["traj"].to_numpy(), excluded).sum()),
              "excluded": excluded.tolist(), "progress": progress and in_memory,
              "n_states": source.n_states, "n_cation": source.n_cation},
        order=DEFAULT_ORDER, bins_per_fwhm=DEFAULT_BINS_PER_FWHM, n_snapshots=n,
    )
    model.set_moments(e_lo=e_lo, h=h, n_fine=n_fine, hist=total["hist"],
                      hist_comp=total["hist_comp"] if decompose is not None else None)
    return model


@overload
def compute_trpes(
    ens: Ensemble | BlockSource,
    *,
    probe: GaussianPulse,
    pump: GaussianPulse | None = None,
    kinetic_energies: npt.ArrayLike,
    delays: npt.ArrayLike,
    resolution: float = 0.0,
    convolve: bool = True,
    cross_section: str | CrossSection | Any = "dyson",
    weights: str = "doorway",
    normalise: str = "alive",
    decompose: str | None = None,
    progress: bool = True,
    time_step: float | None = None,
    client: Any = None,
    scheduler: Any = None,
    exclude: npt.ArrayLike | None = None,
    return_model: Literal[False] = False,
) -> TRPESMap: ...


@overload
def compute_trpes(
    ens: Ensemble | BlockSource,
    *,
    probe: GaussianPulse,
    pump: GaussianPulse | None = None,
    kinetic_energies: npt.ArrayLike,
    delays: npt.ArrayLike,
    resolution: float = 0.0,
    convolve: bool = True,
    cross_section: str | CrossSection | Any = "dyson",
    weights: str = "doorway",
    normalise: str = "alive",
    decompose: str | None = None,
    progress: bool = True,
    time_step: float | None = None,
    client: Any = None,
    scheduler: Any = None,
    exclude: npt.ArrayLike | None = None,
    return_model: Literal[True],
) -> tuple[TRPESMap, TRPESModel]: ...


@overload
def compute_trpes(
    ens: Ensemble | BlockSource,
    *,
    probe: GaussianPulse,
    pump: GaussianPulse | None = None,
    kinetic_energies: npt.ArrayLike,
    delays: npt.ArrayLike,
    resolution: float = 0.0,
    convolve: bool = True,
    cross_section: str | CrossSection | Any = "dyson",
    weights: str = "doorway",
    normalise: str = "alive",
    decompose: str | None = None,
    progress: bool = True,
    time_step: float | None = None,
    client: Any = None,
    scheduler: Any = None,
    exclude: npt.ArrayLike | None = None,
    return_model: bool = False,
) -> TRPESMap | tuple[TRPESMap, TRPESModel]: ...


def compute_trpes(
    ens: Ensemble | BlockSource,
    *,
    probe: GaussianPulse,
    pump: GaussianPulse | None = None,
    kinetic_energies: npt.ArrayLike,
    delays: npt.ArrayLike,
    resolution: float = 0.0,
    convolve: bool = True,
    cross_section: str | CrossSection | Any = "dyson",
    weights: str = "doorway",
    normalise: str = "alive",
    decompose: str | None = None,
    progress: bool = True,
    time_step: float | None = None,
    client: Any = None,
    scheduler: Any = None,
    exclude: npt.ArrayLike | None = None,
    return_model: bool = False,
) -> TRPESMap | tuple[TRPESMap, TRPESModel]:
    """Simulated TRPES map of an ensemble (classical doorway-window).

    Parameters
    ----------
    ens : Ensemble or LazyEnsemble
        With ``energies``, ``cation_energies`` (common zero) and ``dyson``. A lazy
        (chunked) ensemble is reduced chunk by chunk with Dask.
    probe : GaussianPulse
        Probe: photon energy (eV), intensity FWHM (fs), ``n_photons``.
    pump : GaussianPulse, optional
        Pump: sets the doorway weights (with ``weights="doorway"``) and the
        cross-correlation. Without it the cross-correlation is the probe alone.
    kinetic_energies : array_like, shape (n_energies,)
        Photoelectron kinetic energies in eV (values < 0 get no signal).
    delays : array_like, shape (n_delays,)
        Pump-probe delays in fs.
    resolution : float
        Instrument energy resolution (FWHM, eV), added in quadrature to the probe
        bandwidth.
    convolve : bool
        True: convolve with the pump-probe cross-correlation (signal at negative
        delays). False: the pure doorway-window signal.
    cross_section : {"dyson", "hydrogenic", "anion-threshold"}, CrossSection or callable
        Cross-section model (see :mod:`ensemblelab.compute.spectroscopy.cross_sections`).
    weights : {"doorway", "uniform"} or str
        Trajectory weights (see :func:`~.weights.trajectory_weights`).
    normalise : {"alive", "initial"}
        Divide by the alive weight at each time or by the weight at t = 0.
    decompose : {None, "neutral", "cation", "pair", "diabatic"}
        Additive decomposition stored in ``components``.
    progress : bool
        Progress bar for large ensembles.
    time_step : float, optional
        Internal time grid step (fs); default the median trajectory step.
    client : dask.distributed.Client, optional
        For a lazy ensemble: run the per-chunk reduction on this cluster.
    scheduler : str, optional
        For a lazy ensemble without a client: the Dask scheduler.
    exclude : array_like of int, optional
        Trajectory ids left out (a mask, not a copy): their weight is 0 and they are not
        counted alive, so the map equals that of ``ens.without(exclude)`` (up to the
        order of floating-point additions); recorded in ``params["excluded"]``.
    return_model : bool
        Also return the :class:`~.model.TRPESModel` (for re-broadening and for
        ``contributions(..., model=...)``).

    Returns
    -------
    TRPESMap
        ``intensity`` in eV^-1 (per trajectory weight), ``alive`` weight per delay,
        ``params`` with everything used (``edge_delay``: later delays are affected by
        the end of the trajectories). With ``return_model``: ``(map, model)``.

    Examples
    --------
    >>> import numpy as np
    >>> from ensemblelab.testing import make_toy_ensemble
    >>> from ensemblelab.compute.spectroscopy.pulses import GaussianPulse
    >>> ens = make_toy_ensemble(20, seed=1)
    >>> m = compute_trpes(ens, probe=GaussianPulse(photon_energy=5.0, fwhm=30.0),
    ...                   kinetic_energies=np.linspace(0, 2, 201),
    ...                   delays=np.arange(-50, 201, 10.0), decompose="neutral",
    ...                   progress=False)
    >>> m.shape, sorted(m.components)
    ((26, 201), ['S0', 'S1', 'S2'])
    """
    kinetic_energies = check_grid(kinetic_energies, "kinetic_energies")
    delays = check_grid(delays, "delays")
    if normalise not in ("alive", "initial"):
        raise SchemaError(f"The 'normalise' parameter must be 'alive' or 'initial'. Got "
                          f"{normalise!r} instead.")
    model = trpes_model(ens, probe=probe, pump=pump, resolution=resolution,
                        cross_section=cross_section, weights=weights, decompose=decompose,
                        time_step=time_step, progress=progress, client=client,
                        scheduler=scheduler, exclude=exclude)
    if isinstance(ens, Ensemble):
        fraction = ground_state_ionisation_fraction(ens, probe=probe)
        if fraction > 0:
            warnings.warn(
                f"compute_trpes: the probe ({probe.n_photons} x {probe.photon_energy} eV) can "
                f"ionise the ground state at {100 * fraction:.1f} % of the initial geometries, "
                "so a measured pump-on minus pump-off map would also hold a negative "
                "ground-state depletion term, which this map does not include. Hint: compare "
                "with measured maps only above the ground-state band, or lower the probe "
                "photon energy.", EnsembleWarning, stacklevel=2)
    m = model.broaden(kinetic_energies=kinetic_energies, delays=delays, pump=pump,
                      resolution=resolution, convolve=convolve, normalise=normalise)
    return (m, model) if return_model else m
