"""Flag broken and unusual trajectories.

:func:`flag_trajectories` runs rule-based checks (energy conservation, hops at large
gaps, electronic norm, non-finite values, missing steps, early ends, bond-topology
changes) and a multivariate outlier score (isolation forest on per-trajectory
features). The hop-gap, drift and jump limits are relative to the ensemble (robust
statistics, :mod:`._robust_limits`) within absolute floors and ceilings; every flag
says how far past its limit the trajectory is. Nothing is deleted: drop the flagged
trajectories with ``ens.without(table[table.flagged])``, which returns a new Ensemble.
"""

from __future__ import annotations

import dataclasses
import warnings
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd
from scipy import constants as _sc

from ...errors import EnsembleWarning, SchemaError
from ..engine import BlockSpan, as_source, reduce, time_statistics
from ..kinetics.populations import resolve_absorbing
from ._flag_events import FlagEvents as _Flags
from ._flag_events import first_per_traj as _first_per_traj
from ._flag_events import fmt as _fmt
from ._flag_events import topology_flags as _topology
from ._outlier_score import multivariate_score
from ._robust_limits import ensemble_limits, measure_partial

if TYPE_CHECKING:
    from ...data.ensemble import Ensemble

__all__ = ["OutlierThresholds", "BROKEN_KINDS", "WARNING_KINDS", "flag_trajectories",
           "kinetic_energy", "flags_partial"]

#: flag kinds that mark a trajectory as broken (``flagged=True``) by default
BROKEN_KINDS = ("nonfinite", "missing_steps", "early_end", "energy_drift", "energy_jump",
                "large_gap_hop", "norm_error", "topology_change", "small_s1s0_gap")
#: flag kinds reported but not counted as broken by default
WARNING_KINDS = ("energy_drift_warning", "bond_formed", "unusual")

#: (1/2) m v^2 with m in amu and v in Angstrom/fs, expressed in eV
_AMU_A2_FS2_EV = _sc.physical_constants["atomic mass constant"][0] * 1e10 / _sc.e


@dataclass(frozen=True)
class OutlierThresholds:
    """User-tunable thresholds of :func:`flag_trajectories`.

    Every default is common practice, not a law; tune
    them to your electronic-structure method and time step.

    Attributes
    ----------
    drift_warn : float
        Total-energy drift |E_tot(t) - E_tot(0)| (eV) reported as a warning, and the
        floor of the ensemble-relative drift limit. Default 0.2 eV (common practice).
    drift_reject : float
        Ceiling of the drift limit: a larger drift is broken whatever the ensemble.
        Default 0.5 eV (common practice).
    jump : float
        Floor of the limit on a total-energy change within one step without a hop
        (eV). Default 0.1 eV (common practice).
    jump_ceiling : float
        Ceiling of the jump limit (eV). Default 0.5 eV (common practice).
    hop_gap : float
        Floor of the limit on |E_from - E_to| at a hop (eV). Default 0.5 eV (common
        practice; internal conversion normally hops at <~ 0.1-0.3 eV).
    hop_gap_ceiling : float
        Ceiling of the hop-gap limit (eV). Default 1.5 eV (common practice).
    robust_z : float
        Robust z-score (median/MAD of log values over the ensemble) above which a
        hop gap, a trajectory's largest drift or largest jump is unusual; the limit is
        kept between the floor and the ceiling above. Default 5 (common practice uses
        3.5 for a single test; higher here because an ensemble holds hundreds of hops).
    relative : bool
        Use ensemble-relative limits (default True); False uses the fixed limits
        hop_gap, drift_reject and jump.
    norm : float
        |sum_i |c_i|^2 - 1| above which the electronic norm is broken. Default 1e-3
        (common practice).
    s1s0_gap : float or None
        Flag an S1/S0 gap below this value (eV) while on S1, for methods that cannot
        describe S1/S0 crossings (common practice: 0.1 eV). Default None (off).
    bond_scale : float
        Atoms are bonded when r < bond_scale (r_cov,A + r_cov,B). Default 1.25
        (common practice).
    bond_margin : float
        Hysteresis: a t = 0 bond counts as broken above bond_scale (1 + margin)
        sum r_cov and a new bond as formed below bond_scale (1 - margin) sum r_cov,
        so vibrations near the threshold (and hot initial geometries) do not flip.
        Default 0.2 (common practice).
    bond_stretch : float
        A t = 0 bond longer than bond_stretch times its t = 0 length is broken.
        Default 2.0 (common practice).
    bond_persist_steps : int
        A bond change counts only when it lasts this many consecutive steps (or
        until the trajectory ends), so a single wide vibration is not a
        fragmentation. Default 3 (common practice).
    step_gap_factor : float
        A time step longer than this multiple of the median step means missing
        steps. Default 1.5 (common practice).
    expected_t_end : float or None
        Time (fs) every trajectory should reach; default: the longest trajectory.
    end_tolerance : float or None
        Slack (fs) on `expected_t_end`; default 1.5 median time steps.
    end_ok_states : tuple of int
        Active states, besides the ensemble's absorbing state
        (``ens.absorbing_state``: by default S0, set by ``metadata["absorbing_state"]``),
        on which stopping early is normal. Default ().
    contamination : float
        Expected fraction of unusual trajectories for the isolation forest.
        Default 0.05 (common practice).
    broken_kinds : tuple of str
        Flag kinds that set ``flagged``; add "unusual" or "energy_drift_warning"
        to count those too.
    """

    drift_warn: float = 0.2
    drift_reject: float = 0.5
    jump: float = 0.1
    jump_ceiling: float = 0.5
    hop_gap: float = 0.5
    hop_gap_ceiling: float = 1.5
    robust_z: float = 5.0
    relative: bool = True
    norm: float = 1e-3
    s1s0_gap: float | None = None
    bond_scale: float = 1.25
    bond_margin: float = 0.2
    bond_stretch: float = 2.0
    bond_persist_steps: int = 3
    step_gap_factor: float = 1.5
    expected_t_end: float | None = None
    end_tolerance: float | None = None
    end_ok_states: tuple[int, ...] = ()
    contamination: float = 0.05
    broken_kinds: tuple[str, ...] = field(default=BROKEN_KINDS)


def kinetic_energy(velocities: np.ndarray, masses: np.ndarray) -> np.ndarray:
    """Nuclear kinetic energy (eV) from velocities (Angstrom/fs) and masses (amu).

    Parameters
    ----------
    velocities : ndarray, shape (n_snapshots, n_atoms, 3)
    masses : ndarray, shape (n_atoms,)

    Returns
    -------
    ndarray, shape (n_snapshots,)
    """
    return 0.5 * _AMU_A2_FS2_EV * np.einsum("nak,nak,a->n", velocities, velocities, masses)


def _total_energy(ens: Ensemble) -> tuple[np.ndarray | None, str]:
    cols = ens.snapshots.columns
    if "e_tot" in cols:
        return ens.snapshots["e_tot"].to_numpy(dtype=np.float64), "column e_tot"
    active = ens.snapshots["active"].to_numpy()
    e_pot = ens.energies[np.arange(ens.n_snapshots), active]
    if "e_kin" in cols:
        return e_pot + ens.snapshots["e_kin"].to_numpy(dtype=np.float64), "E_active + e_kin"
    if ens.velocities is not None:
        return e_pot + kinetic_energy(ens.velocities, ens.masses), "E_active + velocities"
    return None, "no total energy (energy checks skipped)"


def resolve_thresholds(thresholds: OutlierThresholds | Mapping[str, float] | None,
                       ) -> OutlierThresholds:
    """The defaults, an OutlierThresholds as given, or the defaults with some fields replaced.

    Raises
    ------
    SchemaError
        For an unknown field name or another type.
    """
    if thresholds is None:
        return OutlierThresholds()
    if isinstance(thresholds, OutlierThresholds):
        return thresholds
    if isinstance(thresholds, Mapping):
        names = {f.name for f in dataclasses.fields(OutlierThresholds)}
        unknown = set(thresholds) - names
        if unknown:
            raise SchemaError(f"thresholds has unknown field(s) {sorted(unknown)}; known: "
                              f"{sorted(names)}.")
        fields_: dict[str, Any] = dict(thresholds)  # values of several field types
        return dataclasses.replace(OutlierThresholds(), **fields_)
    raise SchemaError(f"thresholds must be an OutlierThresholds or a mapping; got "
                      f"{type(thresholds).__name__}.")


def flag_trajectories(
    ens: Ensemble,
    *,
    thresholds: OutlierThresholds | Mapping[str, Any] | None = None,
    multivariate: bool = True,
    random_state: int = 0,
    chunk_size: int = 65536,
    client: Any = None,
    scheduler: Any = None,
    progress: bool = False,
    absorbing_state: int | str | None = "metadata",
) -> pd.DataFrame:
    """Flag broken and unusual trajectories, with a readable reason for every flag.

    Checks (thresholds in :class:`OutlierThresholds`, all common practice):

    * ``nonfinite``: NaN/Inf in geometries, energies, total energy or amplitudes;
    * ``missing_steps``: a step-index jump or a time step > step_gap_factor x median;
    * ``early_end``: the trajectory stops before `expected_t_end`, not on the
      ensemble's absorbing state (``ens.absorbing_state``, default S0: dynamics
      commonly stop there) nor on an `end_ok_states` state;
    * ``energy_drift`` / ``energy_drift_warning``: |E_tot(t) - E_tot(0)| above the
      ensemble-relative limit / above drift_warn;
    * ``energy_jump``: |Delta E_tot| in one step without a hop, above the
      ensemble-relative limit;
    * ``large_gap_hop``: a hop with |E_from - E_to| above the ensemble-relative limit;
    * ``norm_error``: |sum |c|^2 - 1| > norm;
    * ``topology_change``: a bond of t = 0 breaks (fragmentation; covalent radii);
    * ``bond_formed``: a new bond forms (e.g. hydrogen transfer; chemistry rather than a
      failure, so reported but not counted as broken by default);
    * ``small_s1s0_gap``: (optional) S1/S0 gap below s1s0_gap on S1;
    * ``unusual``: isolation-forest outlier on per-trajectory features (drift, jumps,
      hops, gaps, length, RMSD to the mean structure, mean active energy); reported,
      not counted as broken by default.

    The total energy is the ``e_tot`` column, else the active-state energy plus
    ``e_kin``, else plus the kinetic energy from velocities; without any, the energy
    checks are skipped.

    :func:`flag_trajectories` is one reduction of :mod:`ensemblelab.compute.engine`: the
    rule-based checks are per trajectory (a trajectory never straddles blocks), run
    per block (:func:`flags_partial`) with the ensemble-wide median step, expected end
    time and tolerance; the isolation forest is fitted once on the per-trajectory
    features of all blocks. One caveat for a chunked store: the missing-steps rule uses
    the median step of each chunk's own trajectories; when that differs from the
    ensemble median an EnsembleWarning says so (regular time steps give equal medians).

    Parameters
    ----------
    ens : Ensemble or LazyEnsemble
    thresholds : OutlierThresholds or mapping, optional
        Overrides of the defaults (a mapping updates only the named fields).
    multivariate : bool
        Compute the isolation-forest score (needs >= 8 trajectories).
    random_state : int
        Seed of the isolation forest.
    chunk_size : int
        Snapshots per chunk for the distance checks (memory bound).
    client : dask.distributed.Client, optional
        For a lazy ensemble (``load(path, lazy=True)``): run the per-chunk checks on
        this cluster (default: Dask's default scheduler).
    scheduler : str, optional
        For a lazy ensemble without a client: the Dask scheduler.
    progress : bool
        Progress bar over the chunks of a lazy ensemble.
    absorbing_state : "metadata", int or None
        Early ends on this state are not flagged; "metadata" (default) uses
        ``metadata["absorbing_state"]`` (default 0, the ground state), None none.

    Returns
    -------
    DataFrame
        One row per trajectory (order of ``ens.trajectories``): ``traj``,
        ``flagged`` (bool: any flag in ``broken_kinds``), ``flags`` (";"-joined
        kinds), ``reason`` (";"-joined readable reasons, one per flag, same order),
        ``first_bad_time`` (fs, earliest broken flag; NaN if none), ``score``
        (multivariate outlier score, higher = more unusual; NaN when not computed),
        ``unusual`` (bool), ``n_flags``, ``excess`` (";"-joined, per flag in the order
        of ``flags``: the measured value over its limit, > 1 means past it; inf for
        non-finite values), ``max_excess`` (largest excess of the broken flags, NaN
        if none), and the measured ``max_drift``, ``max_jump``, ``max_hop_gap``,
        ``max_norm_error`` (NaN when not available), ``t_end``. ``attrs["limits"]``
        holds the limits used (``hop_gap``, ``drift``, ``jump``: limit, robust value,
        median, number of values) and ``attrs["absorbing_state"]`` the absorbing state.

    Examples
    --------
    >>> from ensemblelab.testing import make_toy_ensemble
    >>> ens = make_toy_ensemble(12, t_max=50.0, ragged=True)
    >>> table = flag_trajectories(ens, thresholds={"hop_gap": 2.0, "drift_reject": 2.0})
    >>> "early_end" in table.loc[2, "flags"]
    True
    >>> clean = ens.without(table[table.flagged])
    """
    source = as_source(ens)
    th = resolve_thresholds(thresholds)
    dt_med = time_statistics(source, client=client, scheduler=scheduler)["median_step"]
    t_end_all = source.trajectories["t_end"].to_numpy(dtype=np.float64)
    t_ref = th.expected_t_end if th.expected_t_end is not None else (
        float(t_end_all.max()) if source.n_trajectories else 0.0)
    tol = th.end_tolerance if th.end_tolerance is not None else (
        1.5 * dt_med if np.isfinite(dt_med) else 0.0)
    measured = reduce(source, measure_partial, None, args=({"total_energy": _total_energy},),
                      fields=None, client=client, scheduler=scheduler, progress=progress,
                      desc="measure blocks")
    limits = ensemble_limits(measured, th)
    opts = {"th": dataclasses.replace(th, expected_t_end=t_ref, end_tolerance=tol),
            "chunk_size": chunk_size, "limits": {k: v["limit"] for k, v in limits.items()},
            "absorbing": resolve_absorbing(source, absorbing_state)}
    parts = reduce(source, flags_partial, None, args=(opts,), fields=None, client=client,
                   scheduler=scheduler, progress=progress, desc="flag blocks")
    meds = np.array([p["local_median"] for p in parts])
    differs = np.isfinite(meds) & np.isfinite(dt_med) & (meds != dt_med)
    if np.any(differs):
        warnings.warn(
            f"flag_trajectories: the median time step of {int(differs.sum())} chunk(s) differs "
            f"from the ensemble median ({dt_med:.6g} fs); their missing-steps check used the "
            "chunk's own median.", EnsembleWarning, stacklevel=2)
    table = pd.concat([p["table"] for p in parts], ignore_index=True)
    table.attrs.update(limits=limits, absorbing_state=opts["absorbing"])
    n_traj = len(table)
    if multivariate and n_traj >= 8:
        score, unusual = multivariate_score(source, parts, table, th.contamination,
                                            random_state, client=client, scheduler=scheduler)
        table["score"], table["unusual"] = score, unusual
        flags, reason = table["flags"].tolist(), table["reason"].tolist()
        excess = table["excess"].tolist()
        flagged = table["flagged"].to_numpy().copy()
        n_flags = table["n_flags"].to_numpy().copy()
        max_ex = table["max_excess"].to_numpy().copy()
        # the score of the least atypical unusual trajectory is the effective limit
        cut = float(np.min(score[unusual])) if np.any(unusual) else np.nan
        for r in np.flatnonzero(unusual):
            text = (f"unusual trajectory (isolation-forest score {score[r]:.3g}, among the "
                    f"{th.contamination:.0%} most atypical)")
            ex = f"{score[r] / cut:.3g}"
            flags[r] = f"{flags[r]};unusual" if flags[r] else "unusual"
            reason[r] = f"{reason[r]}; {text}" if reason[r] else text
            excess[r] = f"{excess[r]};{ex}" if excess[r] else ex
            n_flags[r] += 1
            if "unusual" in th.broken_kinds:
                flagged[r] = True
                max_ex[r] = np.nanmax([max_ex[r], score[r] / cut])
        table["flags"], table["reason"], table["excess"] = flags, reason, excess
        table["flagged"], table["n_flags"], table["max_excess"] = flagged, n_flags, max_ex
    return table


def flags_partial(block: Any, span: BlockSpan, opts: Mapping[str, Any]) -> dict[str, Any]:
    """Rule-based flags and the per-trajectory features of one block (a reduction partial).

    ``opts`` holds the thresholds ``th`` (with the ensemble-wide ``expected_t_end`` and
    ``end_tolerance`` filled in), ``chunk_size``, the ensemble's ``limits`` (``hop_gap``,
    ``drift``, ``jump`` in eV; default the fixed thresholds) and its ``absorbing`` state;
    ``block`` is a whole Ensemble.
    """
    ens, th = block, opts["th"]
    lim = {"hop_gap": th.hop_gap, "drift": th.drift_reject, "jump": th.jump,
           **opts.get("limits", {})}
    snaps = ens.snapshots
    n = ens.n_snapshots
    trajs = ens.trajectories
    n_traj = len(trajs)
    tix = ens.traj_index
    time = snaps["time"].to_numpy()
    step = snaps["step"].to_numpy()
    active = snaps["active"].to_numpy()
    labels = ens.state_labels
    flags = _Flags(n_traj)
    starts = np.flatnonzero(np.r_[True, tix[1:] != tix[:-1]]) if n else np.zeros(0, int)
    same = np.r_[False, tix[1:] == tix[:-1]] if n else np.zeros(0, bool)  # row i vs i-1
    dt_all = np.diff(time)[same[1:]] if n > 1 else np.zeros(0)
    dt_med = float(np.median(dt_all)) if dt_all.size else np.nan

    # ---- non-finite values
    e_tot, _source = _total_energy(ens)
    checks: list[tuple[str, np.ndarray]] = [
        ("geometries", ~np.isfinite(ens.geometries).all(axis=(1, 2))),
        ("energies", ~np.isfinite(ens.energies).all(axis=1)),
    ]
    if e_tot is not None:
        checks.append(("total energy", ~np.isfinite(e_tot)))
    if ens.amplitudes is not None:
        checks.append(("amplitudes", ~np.isfinite(ens.amplitudes).all(axis=1)))
    for what, bad in checks:
        for r, i in zip(*_first_per_traj(bad, tix), strict=True):
            flags.add(r, "nonfinite", time[i], f"non-finite values (NaN/Inf) in {what} at "
                                               f"{_fmt(time[i])} fs", np.inf)

    # ---- missing steps
    if n > 1:
        dstep = np.r_[1, np.diff(step)]
        dtime = np.r_[0.0, np.diff(time)]
        gap = same & ((dstep > 1) | (np.isfinite(dt_med) & (dtime > th.step_gap_factor * dt_med)))
        ratio = np.maximum(dstep.astype(np.float64),
                           dtime / (th.step_gap_factor * dt_med) if np.isfinite(dt_med) else 0.0)
        for r, i in zip(*_first_per_traj(gap, tix), strict=True):
            flags.add(r, "missing_steps", time[i - 1] + dt_med,
                      f"missing steps between {_fmt(time[i - 1])} and {_fmt(time[i])} fs "
                      f"(median step {_fmt(dt_med)} fs)", float(ratio[i]))

    # ---- early end
    t_end = trajs["t_end"].to_numpy(dtype=np.float64)
    t_ref = th.expected_t_end if th.expected_t_end is not None else (
        float(t_end.max()) if n_traj else 0.0)
    tol = th.end_tolerance if th.end_tolerance is not None else (
        1.5 * dt_med if np.isfinite(dt_med) else 0.0)
    last = np.r_[starts[1:] - 1, n - 1] if n else np.zeros(0, int)
    ok_states = set(th.end_ok_states) | ({opts["absorbing"]} if opts.get("absorbing")
                                         is not None else set())
    for r in np.flatnonzero(t_end < t_ref - tol):
        if int(active[last[r]]) in ok_states:
            continue
        flags.add(r, "early_end", t_end[r],
                  f"ended at {_fmt(t_end[r])} fs on {labels[int(active[last[r]])]}, before "
                  f"the expected {_fmt(t_ref)} fs", (t_ref - t_end[r]) / max(tol, 1e-12))

    # ---- energies
    max_drift: np.ndarray = np.full(n_traj, np.nan)
    max_jump: np.ndarray = np.full(n_traj, np.nan)
    if e_tot is not None and n:
        finite = np.isfinite(e_tot)
        # reference: first finite total energy of each trajectory
        ref_pos = np.full(n_traj, -1)
        rows_f, first_f = _first_per_traj(finite, tix)
        ref_pos[rows_f] = first_f
        e0 = np.where(ref_pos[tix] >= 0, e_tot[np.maximum(ref_pos[tix], 0)], np.nan)
        drift = np.abs(e_tot - e0)
        d_filled = np.where(np.isfinite(drift), drift, -np.inf)
        max_drift = np.maximum.reduceat(d_filled, starts)
        max_drift[~np.isfinite(max_drift)] = np.nan
        for kind, limit, word in (("energy_drift", lim["drift"], "ensemble limit"),
                                  ("energy_drift_warning", th.drift_warn, "warning level")):
            for r, i in zip(*_first_per_traj(np.nan_to_num(drift, nan=0.0) > limit, tix),
                            strict=True):
                flags.add(r, kind, time[i], f"total energy drifted by {_fmt(drift[i])} eV "
                                            f"(> {_fmt(limit)} eV, {word}) at {_fmt(time[i])} fs",
                          max_drift[r] / limit)
        jump = np.zeros(n)
        jump[1:] = np.abs(np.diff(e_tot))
        no_hop = same & np.r_[False, active[1:] == active[:-1]]
        jump = np.where(no_hop & np.isfinite(jump), jump, 0.0)
        max_jump = np.maximum.reduceat(jump, starts)
        for r, i in zip(*_first_per_traj(jump > lim["jump"], tix), strict=True):
            flags.add(r, "energy_jump", time[i],
                      f"total energy jumped by {_fmt(jump[i])} eV in one step without a hop "
                      f"at {_fmt(time[i])} fs (> {_fmt(lim['jump'])} eV, ensemble limit)",
                      max_jump[r] / lim["jump"])

    # ---- hops at large gaps
    hops = ens.hops()
    max_hop_gap = np.zeros(n_traj)
    n_hops = np.zeros(n_traj)
    if len(hops):
        hrow = np.searchsorted(trajs["traj"].to_numpy(), hops["traj"].to_numpy())
        gaps = hops["gap"].to_numpy()
        np.maximum.at(max_hop_gap, hrow, np.nan_to_num(gaps, nan=0.0))
        np.add.at(n_hops, hrow, 1.0)
        for r, g, t, a, b in zip(hrow, gaps, hops["time"].to_numpy(), hops["from"].to_numpy(),
                                 hops["to"].to_numpy(), strict=True):
            if g > lim["hop_gap"]:
                flags.add(int(r), "large_gap_hop", t,
                          f"hop {labels[a]}->{labels[b]} at {_fmt(t)} fs with a gap of "
                          f"{_fmt(g)} eV (> {_fmt(lim['hop_gap'])} eV, ensemble limit)",
                          g / lim["hop_gap"])

    # ---- electronic norm
    max_norm: np.ndarray = np.full(n_traj, np.nan)
    if ens.amplitudes is not None and n:
        err = np.abs(ens.amplitudes.sum(axis=1) - 1.0)
        err_f = np.where(np.isfinite(err), err, 0.0)
        max_norm = np.maximum.reduceat(err_f, starts)
        for r, i in zip(*_first_per_traj(err_f > th.norm, tix), strict=True):
            flags.add(r, "norm_error", time[i], f"electronic populations sum to "
                                                f"{1.0 + (ens.amplitudes[i].sum() - 1.0):.6g} "
                                                f"(|error| {err[i]:.2g} > {th.norm:.2g}) at "
                                                f"{_fmt(time[i])} fs", max_norm[r] / th.norm)

    # ---- small S1/S0 gap
    if th.s1s0_gap is not None and ens.n_states > 1 and n:
        g10 = ens.energies[:, 1] - ens.energies[:, 0]
        bad = (active == 1) & (np.nan_to_num(g10, nan=np.inf) < th.s1s0_gap)
        for r, i in zip(*_first_per_traj(bad, tix), strict=True):
            flags.add(r, "small_s1s0_gap", time[i], f"S1/S0 gap {_fmt(g10[i])} eV on S1 at "
                                                    f"{_fmt(time[i])} fs (< {th.s1s0_gap} eV)",
                      th.s1s0_gap / max(float(g10[i]), 1e-12))

    # ---- bond topology (covalent radii), chunked over snapshots
    if ens.n_atoms > 1 and n:
        _topology(ens, th, tix, time, flags, opts["chunk_size"])

    score = np.full(n_traj, np.nan)
    unusual = np.zeros(n_traj, dtype=bool)

    # ---- assemble
    order = {k: i for i, k in enumerate(BROKEN_KINDS + WARNING_KINDS)}
    out_flags, out_reason, first_bad, flagged, n_flags = [], [], [], [], []
    out_excess: list[str] = []
    max_excess: list[float] = []
    for r in range(n_traj):
        ev = flags.events[r]
        kinds = sorted(ev, key=lambda k: (order.get(k, 99), k))
        out_flags.append(";".join(kinds))
        out_reason.append("; ".join(ev[k][1] for k in kinds))
        out_excess.append(";".join(f"{ev[k][2]:.3g}" for k in kinds))
        broken = [k for k in kinds if k in th.broken_kinds]
        max_excess.append(max((ev[k][2] for k in broken), default=np.nan))
        times = [ev[k][0] for k in broken if np.isfinite(ev[k][0])]
        first_bad.append(min(times) if times else np.nan)
        flagged.append(bool(broken))
        n_flags.append(len(kinds))
    table = pd.DataFrame({
        "traj": trajs["traj"].to_numpy(),
        "flagged": np.asarray(flagged, dtype=bool),
        "flags": out_flags,
        "reason": out_reason,
        "first_bad_time": np.asarray(first_bad, dtype=np.float64),
        "score": score,
        "unusual": unusual,
        "n_flags": np.asarray(n_flags, dtype=np.int64),
        "excess": out_excess,
        "max_excess": np.asarray(max_excess, dtype=np.float64),
        "max_drift": max_drift,
        "max_jump": max_jump,
        "max_hop_gap": max_hop_gap,
        "max_norm_error": max_norm,
        "t_end": t_end,
    })
    e_act = ens.energies[np.arange(n), active]
    e_act = np.where(np.isfinite(e_act), e_act, np.nan)
    e_mean = pd.Series(e_act).groupby(tix).mean().reindex(range(n_traj)).to_numpy()
    return {"table": table, "n_hops": n_hops,
            "n_finite": int(np.isfinite(ens.geometries).all(axis=(1, 2)).sum()),
            "e_mean": e_mean, "local_median": dt_med}
