"""Time-resolved photoelectron maps in the classical doorway-window picture.

Method (J. Chem. Phys. 2004, "Classical doorway-window approximation for time-resolved
pump-probe spectra"):

* **Window.** The sticks of :mod:`.sticks`: one per snapshot and cation channel the
  probe spectrum reaches, at ``E_kin = n h nu_probe - IP``, weight ``w_traj * sigma``;
  the map keeps each line's part above zero kinetic energy (area: the erf open
  fraction). Missing data and gaps: :mod:`.gaps`; absorbing state: :mod:`.sticks`.
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
from collections.abc import Mapping, Sequence
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
    check_time_step,
    component_labels,
    grid_from_range,
)
from .bootstrap import bootstrap_map, check_interval
from .bootstrap_fused import can_fuse
from .cross_sections import CrossSection, describe_cross_section, resolve_cross_section
from .fused import block_layout, fused_partial, stick_energy_range, use_fused
from .gaps import time_fill
from .model import TRPESModel, deposit
from .pulses import FWHM_TO_SIGMA, GaussianPulse
from .resolution import Resolution, check_resolution, min_stick_fwhm
from .sampling import ESS_WARN_FRACTION, ensemble_absorbing_state, excluded_ids, sampling_of
from .sticks import (
    THRESHOLD_TAIL,
    block_sticks,
    check_absorbing,
    check_shifts,
    check_trpes_inputs,
)
from .weights import (
    ground_state_ionisation_fraction,
    resolve_weights,
    trajectory_weights,
    weights_word,
)

__all__ = ["compute_trpes", "trpes_model", "time_grid", "trpes_partial", "TRPES_FIELDS",
           "excluded_ids"]

#: arrays a TRPES block reads (the diabatic decomposition adds ``adt``, ``adt_cation``)
TRPES_FIELDS = ("energies", "cation_energies", "dyson", "excitation_energies",
                "transition_dipoles", "oscillator_strengths")


def time_grid(source: BlockSource, time_step: float | None, *, client: Any = None,
              scheduler: Any = None, stats: dict[str, Any] | None = None) -> dict[str, Any]:
    """The internal time grid of a source: ``start``, ``dt``, ``n_time``, ``t_known`` (fs).

    ``stats``: the source's :func:`~ensemblelab.compute.engine.time_statistics` when
    already known (e.g. from :func:`.fused.block_layout`)."""
    st = stats or time_statistics(source, client=client, scheduler=scheduler)
    dt = check_time_step(time_step)
    if dt is None:
        dt = st["median_step"] if math.isfinite(st["median_step"]) else 1.0
    start, n_time = grid_from_range(st["t_min"], st["t_max"], dt)
    t_known = float(st["t_max"]) if math.isfinite(st["t_max"]) else 0.0
    return {"start": start, "dt": dt, "n_time": n_time, "t_known": t_known}


#: the counts every map reports (see :class:`.sticks.BlockSticks`)
COUNT_KEYS = ("n_missing_data", "n_absorbed", "n_absorbed_ionisable")


def stick_options(opts: dict[str, Any]) -> dict[str, Any]:
    """The keywords of :func:`.sticks.block_sticks` beyond the grid, from reduction options."""
    return {k: opts.get(k) for k in ("ionisation_shifts", "absorbing_state", "t_end",
                                      "fill")} | {"absorbing": opts.get("absorbing", "zero"),
                                                  "local_fill": opts.get("local_fill", True)}


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
    if opts.get("fused") and keep is None:  # compiled stick preparation + deposit
        return fused_partial(block, opts, w_traj)  # (same numbers; exclusions: numpy path)
    bs = block_sticks(block, probe=opts["probe"], cross_section=opts["cross_section"],
                      w_traj=w_traj, keep=keep, weights_used=opts["weights_used"],
                      decompose=opts["decompose"], start=opts["start"], dt=opts["dt"],
                      n_time=opts["n_time"], **stick_options(opts))
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
    counts = bs.counts or {}
    out: dict[str, Any] = {"alive": bs.alive, "alive_count": bs.alive_count, "hist": hist,
           "hist_comp": hist_comp, "n_sticks": np.int64(s.n_sticks),
           "total_weight": np.array(bs.total_weight), "weight_sq": np.array(bs.weight_sq),
           "alive_channel": bs.alive_channel,
           "counts": {k: np.int64(counts.get(k, 0)) for k in COUNT_KEYS}}
    if opts.get("keep_sticks"):
        out["sticks"] = bs
    return out


def trpes_model(
    ens: Ensemble | BlockSource,
    *,
    probe: GaussianPulse,
    pump: GaussianPulse | None = None,
    resolution: Resolution = 0.0,
    cross_section: str | CrossSection | Any = "dyson",
    weights: str = "auto",
    decompose: str | None = None,
    time_step: float | None = None,
    progress: bool = True,
    client: Any = None,
    scheduler: Any = None,
    ionisation_shifts: Sequence[float] | Mapping[int, float] | None = None,
    absorbing: str = "zero",
    exclude: npt.ArrayLike | None = None,
    keep_sticks: bool | None = None,
) -> TRPESModel:
    """The stick model of an ensemble or chunked store, moments deposited (the reduction).

    Parameters are those of :func:`compute_trpes`. An in-memory ensemble's model keeps
    its sticks too (unless ``keep_sticks=False``); a chunked store's keeps the moments
    only. Without sticks to keep, the compiled fused pass (:mod:`.fused`) replaces the
    numpy stick preparation where it applies. Warns (with the
    reason) when the weights' Kish effective size is below
    :data:`~.sampling.ESS_WARN_FRACTION` of the trajectories, when the sampling had to
    be assumed, and when the probe can ionise the absorbing state.

    Returns
    -------
    TRPESModel
    """
    source = as_source(ens)
    probe, pump, decompose = check_trpes_inputs(source, probe=probe, pump=pump,
                                                decompose=decompose)
    resolution = check_resolution(resolution)
    absorbing = check_absorbing(absorbing)
    shifts = check_shifts(ionisation_shifts, source.n_cation)
    in_memory = isinstance(ens, Ensemble)
    layout = block_layout(ens) if in_memory else None  # one compiled pass (numba), or None
    grid = time_grid(source, time_step, client=client, scheduler=scheduler,
                     stats=None if layout is None else layout.stats)
    cs = resolve_cross_section(cross_section)
    kind, note = resolve_weights(source, weights=weights, pump=pump)
    if note:
        warnings.warn(f"compute_trpes: {note}", EnsembleWarning, stacklevel=3)
    used = weights_word(source, weights=kind, pump=pump)
    fwhm = min_stick_fwhm(probe, resolution)
    h = fwhm / DEFAULT_BINS_PER_FWHM
    tail = THRESHOLD_TAIL * probe.effective_spectral_fwhm * FWHM_TO_SIGMA
    keep = in_memory if keep_sticks is None else bool(keep_sticks) and in_memory
    e_lo, e_hi = stick_energy_range(source, probe.total_energy, tail=tail, shifts=shifts,
                                    client=client, scheduler=scheduler)
    n_fine = int(math.floor((e_hi - e_lo) / h + 0.5)) + 2
    labels = component_labels(source, decompose)
    absorbing_state = ensemble_absorbing_state(ens if in_memory else source)
    excluded = excluded_ids(exclude)
    opts = {"probe": probe, "pump": pump, "cross_section": cs, "weights": kind,
            "exclude": excluded,
            "weights_used": used, "decompose": decompose, "n_comp": len(labels), **grid,
            "e_lo": e_lo, "h": h, "n_fine": n_fine, "order": DEFAULT_ORDER,
            "keep_sticks": keep, "progress": progress and in_memory,
            "ionisation_shifts": shifts, "absorbing_state": absorbing_state,
            "absorbing": absorbing, "t_end": grid["t_known"], "fill": None,
            "local_fill": in_memory, "layout": layout,
            "fused": use_fused(cross_section=cs, decompose=decompose, absorbing=absorbing,
                               keep_sticks=keep)}
    fields = [*TRPES_FIELDS, *(("adt", "adt_cation") if decompose == "diabatic" else ())]
    total = reduce(source, trpes_partial, add, args=(opts,), fields=fields, client=client,
                   scheduler=scheduler, progress=progress, desc="TRPES blocks")
    fill = time_fill(total["alive"], total["alive_channel"], total["alive_count"])
    if fill is not None and not in_memory:  # missing data: a second pass with the whole
        opts["fill"] = fill                  # source's per-channel alive weights
        total = reduce(source, trpes_partial, add, args=(opts,), fields=fields,
                       client=client, scheduler=scheduler, progress=progress,
                       desc="TRPES blocks (missing data)")
    if total["hist_comp"] is None and decompose is not None:
        total["hist_comp"] = np.zeros((DEFAULT_ORDER, len(labels), grid["n_time"], n_fine))
    bs = total.get("sticks")
    n = source.n_snapshots
    counts = {k: int(v) for k, v in total["counts"].items()}
    ess = (float(total["total_weight"]) ** 2 / float(total["weight_sq"])
           if float(total["weight_sq"]) > 0 else 0.0)
    n_used = source.n_trajectories - int(np.isin(source.trajectories["traj"].to_numpy(),
                                                 excluded).sum())
    _warn_map(ess, n_used, counts, n, absorbing_state, absorbing)
    model = TRPESModel(
        sticks=None if bs is None else bs.sticks, probe=probe, decompose=decompose,
        labels=labels, grid_start=grid["start"], time_step=grid["dt"], n_time=grid["n_time"],
        alive=total["alive"] if fill is None else fill.alive,
        alive_count=(total["alive_count"] if fill is None or fill.alive_count is None
                     else fill.alive_count),
        total_weight=float(total["total_weight"]), t_known=grid["t_known"],
        tbin=None if bs is None else bs.tbin, tfrac=None if bs is None else bs.tfrac,
        comp=None if bs is None else bs.comp, comp_src=None if bs is None else bs.comp_src,
        comp_weight=None if bs is None else bs.comp_weight,
        info={"cross_section": describe_cross_section(cs), "weights": used,
              "n_sticks": int(total["n_sticks"]), "n_snapshots": n,
              "n_trajectories": n_used, "excluded": excluded.tolist(),
              "progress": progress and in_memory,
              "n_states": source.n_states, "n_cation": source.n_cation,
              "effective_sample_size": ess, "sampling": sampling_of(source),
              "ionisation_shifts": None if shifts is None else shifts.tolist(),
              "absorbing_state": absorbing_state, "absorbing": absorbing, **counts},
        order=DEFAULT_ORDER, bins_per_fwhm=DEFAULT_BINS_PER_FWHM, n_snapshots=n,
        fill=fill, alive_parts=None if bs is None else bs.alive_parts,
    )
    model.set_moments(e_lo=e_lo, h=h, n_fine=n_fine, hist=total["hist"],
                      hist_comp=total["hist_comp"] if decompose is not None else None)
    return model


def _warn_map(ess: float, n_traj: int, counts: dict[str, int], n_snap: int,
              absorbing_state: int | None, absorbing: str) -> None:
    if n_traj and ess < ESS_WARN_FRACTION * n_traj:
        warnings.warn(
            f"compute_trpes: the trajectory weights have a Kish effective sample size of "
            f"{ess:.1f} for {n_traj} trajectories (below {ESS_WARN_FRACTION:.0%}): a few "
            f"trajectories dominate the map and its noise is that of ~{ess:.0f} "
            "trajectories. Hint: check weights= and ens.metadata['sampling'].",
            EnsembleWarning, stacklevel=4)
    if counts.get("n_missing_data"):
        warnings.warn(
            f"compute_trpes: {counts['n_missing_data']} of {n_snap} snapshots lack electronic "
            "data (NaN cation energy, neutral energy or Dyson norm) for some cation channel; "
            "they are left out of that channel's signal and alive weight "
            "(params['n_missing_data']).", EnsembleWarning, stacklevel=4)
    if counts.get("n_absorbed_ionisable") and absorbing == "zero":
        warnings.warn(
            f"compute_trpes: the probe can ionise the absorbing state {absorbing_state} at the "
            f"last snapshot of {counts['n_absorbed_ionisable']} of the "
            f"{counts['n_absorbed']} trajectories stopped there; after their stop they count "
            "as alive with zero signal, which underestimates the map. Hint: "
            "absorbing='carry' repeats their last signal.", EnsembleWarning, stacklevel=4)


@overload
def compute_trpes(
    ens: Ensemble | BlockSource,
    *,
    probe: GaussianPulse,
    pump: GaussianPulse | None = None,
    kinetic_energies: npt.ArrayLike,
    delays: npt.ArrayLike,
    resolution: Resolution = 0.0,
    convolve: bool = True,
    cross_section: str | CrossSection | Any = "dyson",
    weights: str = "auto",
    normalise: str = "alive",
    decompose: str | None = None,
    progress: bool = True,
    time_step: float | None = None,
    client: Any = None,
    scheduler: Any = None,
    ionisation_shifts: Sequence[float] | Mapping[int, float] | None = None,
    absorbing: str = "zero",
    exclude: npt.ArrayLike | None = None,
    interval: str | None = None,
    ci: float = 0.95,
    n_boot: int = 200,
    random_state: int | np.random.Generator | None = 0,
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
    resolution: Resolution = 0.0,
    convolve: bool = True,
    cross_section: str | CrossSection | Any = "dyson",
    weights: str = "auto",
    normalise: str = "alive",
    decompose: str | None = None,
    progress: bool = True,
    time_step: float | None = None,
    client: Any = None,
    scheduler: Any = None,
    ionisation_shifts: Sequence[float] | Mapping[int, float] | None = None,
    absorbing: str = "zero",
    exclude: npt.ArrayLike | None = None,
    interval: str | None = None,
    ci: float = 0.95,
    n_boot: int = 200,
    random_state: int | np.random.Generator | None = 0,
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
    resolution: Resolution = 0.0,
    convolve: bool = True,
    cross_section: str | CrossSection | Any = "dyson",
    weights: str = "auto",
    normalise: str = "alive",
    decompose: str | None = None,
    progress: bool = True,
    time_step: float | None = None,
    client: Any = None,
    scheduler: Any = None,
    ionisation_shifts: Sequence[float] | Mapping[int, float] | None = None,
    absorbing: str = "zero",
    exclude: npt.ArrayLike | None = None,
    interval: str | None = None,
    ci: float = 0.95,
    n_boot: int = 200,
    random_state: int | np.random.Generator | None = 0,
    return_model: bool = False,
) -> TRPESMap | tuple[TRPESMap, TRPESModel]: ...


def compute_trpes(
    ens: Ensemble | BlockSource,
    *,
    probe: GaussianPulse,
    pump: GaussianPulse | None = None,
    kinetic_energies: npt.ArrayLike,
    delays: npt.ArrayLike,
    resolution: Resolution = 0.0,
    convolve: bool = True,
    cross_section: str | CrossSection | Any = "dyson",
    weights: str = "auto",
    normalise: str = "alive",
    decompose: str | None = None,
    progress: bool = True,
    time_step: float | None = None,
    client: Any = None,
    scheduler: Any = None,
    ionisation_shifts: Sequence[float] | Mapping[int, float] | None = None,
    absorbing: str = "zero",
    exclude: npt.ArrayLike | None = None,
    interval: str | None = None,
    ci: float = 0.95,
    n_boot: int = 200,
    random_state: int | np.random.Generator | None = 0,
    return_model: bool = False,
) -> TRPESMap | tuple[TRPESMap, TRPESModel]:
    """Simulated TRPES map of an ensemble (classical doorway-window).

    Assumptions (also in ``params["assumptions"]``): the molecules are randomly
    oriented and the signal is the isotropic orientational average (no polarisation
    dependence, no magic-angle or photoelectron-anisotropy term); pump and probe are
    transform-limited Gaussian pulses; the instrument resolution is a constant FWHM
    unless an energy-dependent one is given; the classical doorway-window picture
    (sudden vertical excitation and ionisation at frozen nuclei).

    Threshold: a channel's electrons follow the probe's absorbed-energy spectrum shifted
    by ``-IP``, a Gaussian ``G(E; n h nu - IP, Gamma_n)`` of which only ``E >= 0`` exists
    (photons below the ionisation energy do not ionise). So the map holds the part of
    each stick's line above zero kinetic energy, whose area is the open fraction
    ``(1/2)[1 + erf((n h nu - IP) / (sqrt(2) sigma_n))]``
    (:meth:`~.pulses.GaussianPulse.open_fraction`): continuous in the ionisation energy,
    nothing below zero kinetic energy. (With an instrument resolution the cut at zero is
    applied to the broadened line, an approximation within about one resolution width of
    threshold: strictly, the resolution acts on the already truncated distribution.)

    Missing data: a snapshot whose cation energy, active-state energy or Dyson norm of a
    channel is NaN leaves that channel's signal *and* alive weight (not computed is not
    zero signal); ``params["n_missing_data"]`` counts such snapshots.

    Absorbing state (``ens.metadata["absorbing_state"]``, default 0; None: none): a
    trajectory stopped in it before the end of the ensemble stays a member of the
    ensemble: with ``absorbing="zero"`` it keeps counting in the alive weight with no
    signal (a warning says when the probe could ionise it), with ``"carry"`` its last
    sticks are repeated until the end, with ``"end"`` it ends (leaves both).

    Parameters
    ----------
    ens : Ensemble or LazyEnsemble
        With ``energies``, ``cation_energies`` (common zero) and ``dyson``. A lazy
        (chunked) ensemble is reduced chunk by chunk with Dask.
    probe : GaussianPulse
        Probe: photon energy (eV), intensity FWHM (fs), ``n_photons``.
    pump : GaussianPulse, optional
        Pump: sets the doorway weights (an ``n_photons`` pump selects at ``n h nu``
        with a ``sqrt(n)`` wider spectrum) and the cross-correlation. Without it the
        cross-correlation is the probe alone.
    kinetic_energies : array_like, shape (n_energies,)
        Photoelectron kinetic energies in eV (values < 0 get no signal).
    delays : array_like, shape (n_delays,)
        Pump-probe delays in fs.
    resolution : float or ProportionalResolution
        Instrument energy resolution: a constant FWHM (eV), or
        ``ProportionalResolution(c)`` for ``dE = c E`` (each stick broadened with the
        width at its kinetic energy); added in quadrature to the probe bandwidth.
    convolve : bool
        True: convolve with the pump-probe cross-correlation (signal at negative
        delays). False: the pure doorway-window signal.
    cross_section : {"dyson", "hydrogenic", "anion-threshold", "anion-hydrogenic"}, ...
        Cross-section model, a CrossSection or a callable (see
        :mod:`ensemblelab.compute.spectroscopy.cross_sections`).
    weights : {"auto", "doorway", "ensemble", "uniform"} or str
        Trajectory weights. ``"auto"`` (default) never applies the pump twice: it
        reads ``ens.metadata["sampling"]`` (doorway-selected: uniform; weighted: the
        ensemble's weights; uniform: the pump's doorway weights; unknown: the
        ensemble's weights, with a warning). See :func:`~.weights.resolve_weights`.
        ``params["effective_sample_size"]`` holds the Kish effective size of the
        weights; a warning is given below half the number of trajectories.
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
    ionisation_shifts : sequence of float or mapping int -> float, optional
        Per-cation-channel shift (eV) added to that channel's ionisation energies
        before the threshold test (the sticks are recomputed, not the pixels moved).
    absorbing : {"zero", "carry", "end"}
        What a trajectory stopped in the absorbing state contributes after its stop.
    exclude : array_like of int, optional
        Trajectory ids left out (a mask, not a copy): their weight is 0 and they are not
        counted alive, so the map equals that of ``ens.without(exclude)`` (up to the
        order of floating-point additions); recorded in ``params["excluded"]``.
    interval : {None, "bootstrap"}
        ``"bootstrap"``: percentile intervals from ``n_boot`` resamples of whole
        trajectories (:mod:`.bootstrap`), in ``lower`` / ``upper`` (total),
        ``component_lower`` / ``component_upper`` and ``rel_se`` (relative standard
        error per pixel).
    ci : float
        Confidence level of the interval.
    n_boot : int
        Number of bootstrap resamples.
    random_state : int, Generator or None
        Seed of the resampling.
    return_model : bool
        Also return the :class:`~.model.TRPESModel` (for re-broadening and for
        ``contributions(..., model=...)``).

    Returns
    -------
    TRPESMap
        ``intensity`` in eV^-1 (per trajectory weight), ``alive`` weight per delay,
        ``effective_sample_size``, ``n_missing_data`` and ``params`` with everything
        used (``edge_delay``: later delays are affected by the end of the
        trajectories). With ``return_model``: ``(map, model)``.

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
    check_interval(interval, ci, n_boot)
    if interval == "bootstrap" and len(excluded_ids(exclude)):
        # the resampling draws whole trajectories of the ensemble it is given: leave the
        # excluded ones out of it (a copy, small beside the resamples)
        if not isinstance(ens, Ensemble):
            raise SchemaError("compute_trpes(interval='bootstrap') with exclude= needs an "
                              "in-memory ensemble. Hint: ens.without(...) first, or save the "
                              "reduced ensemble as its own store.")
        ens, exclude = ens.without(excluded_ids(exclude).tolist()), None
    model = trpes_model(ens, probe=probe, pump=pump, resolution=resolution,
                        cross_section=cross_section, weights=weights, decompose=decompose,
                        time_step=time_step, progress=progress, client=client,
                        scheduler=scheduler, ionisation_shifts=ionisation_shifts,
                        absorbing=absorbing, exclude=exclude,
                        keep_sticks=return_model or (interval == "bootstrap" and not can_fuse(
                            ens, cross_section=resolve_cross_section(cross_section),
                            decompose=decompose, absorbing=absorbing)))
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
    if interval == "bootstrap":
        m = bootstrap_map(  # type: ignore[assignment]
            ens, model, m, probe=probe, pump=pump, kinetic_energies=kinetic_energies,
            delays=delays, resolution=resolution, convolve=convolve, normalise=normalise,
            cross_section=cross_section, weights=weights,
            ionisation_shifts=ionisation_shifts, absorbing=absorbing,
            fields=[*TRPES_FIELDS, *(("adt", "adt_cation") if decompose == "diabatic"
                                     else ())], ci=ci, n_boot=n_boot,
            random_state=random_state, client=client, scheduler=scheduler,
            progress=progress)
    return (m, model) if return_model else m
