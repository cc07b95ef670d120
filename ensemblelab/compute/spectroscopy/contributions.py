"""Share of snapshots (or groups of them) in a region of a TRPES map.

The region intensity is the integral of the map over ``energy_range x delay_range``
(eV x fs), decomposed exactly into sticks: a stick at time u and energy x with weight w
contributes ``w / A(u) * int_E G(E - x) dE * int_tau K(tau - u) dtau`` where ``A`` is
the normalisation (alive weight) and ``K`` the cross-correlation (or the linear
interpolation hat when the map was not convolved). :func:`contributions` is one
reduction of :mod:`ensemblelab.compute.engine` (:func:`contributions_partial` per block
of trajectories), so an in-memory ensemble and a chunked store give the same table.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd
from scipy.special import ndtr

from ...data.ensemble import Ensemble
from ...data.spectrum import TRPESMap
from ...errors import SchemaError
from ..engine import BlockSource, BlockSpan, add, as_source, reduce
from ._checks import check_ranges, settings_from_params, stick_settings_from_params
from .cross_sections import resolve_cross_section
from .gaps import time_fill
from .maps import TRPES_FIELDS, time_grid
from .model import TRPESModel
from .pulses import FWHM_TO_SIGMA
from .resolution import ProportionalResolution, resolution_from_params, stick_fwhm
from .sampling import ensemble_absorbing_state
from .sticks import block_alive, block_sticks, check_shifts, prepare_sticks
from .weights import trajectory_weights

__all__ = ["contributions", "region_intensity", "contributions_partial", "model_for_map",
           "delay_window_weights"]


def _alive_partial(block: Any, span: BlockSpan, opts: dict[str, Any]) -> dict[str, Any]:
    """Alive weight on the time grid and total trajectory weight of one block."""
    w_traj, _ = trajectory_weights(block, weights=opts["weights"], pump=opts["pump"])
    al = block_alive(block, w_traj=w_traj, probe=opts["probe"], start=opts["start"],
                     dt=opts["dt"], n_time=opts["n_time"],
                     ionisation_shifts=opts["ionisation_shifts"],
                     absorbing_state=opts["absorbing_state"], absorbing=opts["absorbing"],
                     t_end=opts["t_end"])
    return {"alive": al.alive, "alive_channel": al.alive_channel,
            "alive_count": al.alive_count, "total_weight": np.array(float(w_traj.sum()))}


def _model_for(ens: Ensemble | BlockSource, trpes_map: TRPESMap, model: TRPESModel | None,
               *, client: Any, scheduler: Any) -> TRPESModel:
    """The given model (checked), or one rebuilt from the map's params."""
    source = as_source(ens)
    if model is not None:
        if not isinstance(model, TRPESModel):
            raise SchemaError(f"The 'model' parameter must be a TRPESModel (from "
                              f"compute_trpes(..., return_model=True)). Got "
                              f"{type(model).__name__} instead.")
        if model.n_snapshots != source.n_snapshots:
            raise SchemaError(
                f"The 'model' parameter was made from an ensemble of {model.n_snapshots} "
                f"snapshots; this one has {source.n_snapshots}. Hint: pass the model made "
                "from this ensemble, or none (it is rebuilt from the map's params).")
        return model
    probe, pump, cs, weights = settings_from_params(trpes_map.params)
    extra = stick_settings_from_params(trpes_map.params)
    time_step = trpes_map.params.get("time_step")
    if isinstance(ens, Ensemble):
        return prepare_sticks(ens, probe=probe, pump=pump, cross_section=cs, weights=weights,
                              time_step=time_step, progress=False, **extra)
    grid = time_grid(source, time_step, client=client, scheduler=scheduler)
    opts = {"weights": weights, "pump": pump, "probe": probe, **grid,
            "ionisation_shifts": check_shifts(extra["ionisation_shifts"], source.n_cation),
            "absorbing_state": ensemble_absorbing_state(source), "absorbing": extra["absorbing"],
            "t_end": grid["t_known"]}
    tot = reduce(source, _alive_partial, add, args=(opts,), fields=TRPES_FIELDS,
                 client=client, scheduler=scheduler, desc="alive weights")
    fill = time_fill(tot["alive"], tot["alive_channel"], tot["alive_count"])
    return TRPESModel(sticks=None, probe=probe, decompose=None, labels=[],
                      grid_start=grid["start"], time_step=grid["dt"], n_time=grid["n_time"],
                      alive=tot["alive"] if fill is None else fill.alive,
                      total_weight=float(tot["total_weight"]), t_known=grid["t_known"],
                      tbin=None, tfrac=None, n_snapshots=source.n_snapshots, fill=fill)


def _hat_integrals(times: np.ndarray, lo: float, hi: float, t_known: float) -> np.ndarray:
    """Integral over [lo, hi] of the linear-interpolation hat of each grid point."""
    dt = times[1] - times[0]
    out = np.zeros(times.size)

    def prim(x: np.ndarray) -> np.ndarray:  # integral of hat centred at 0 from -inf to x
        x = np.clip(x, -1.0, 1.0)
        return np.where(x < 0, 0.5 * (1 + x) ** 2, 1.0 - 0.5 * (1 - x) ** 2)

    hi = min(hi, t_known)
    if hi <= lo:
        return out
    out = dt * (prim((hi - times) / dt) - prim((lo - times) / dt))
    return out


def model_for_map(ens: Ensemble | BlockSource, trpes_map: TRPESMap, *, client: Any = None,
                  scheduler: Any = None) -> TRPESModel:
    """The stick model of a map, rebuilt from its ``params`` (what made it).

    For an in-memory ensemble the model holds the sticks (hold it and pass it as
    ``model=`` to :func:`contributions` / :func:`region_intensity` to skip recomputing
    them); for a lazy ensemble it holds the time grid and alive weights.

    Parameters
    ----------
    ens : Ensemble or LazyEnsemble
        The ensemble the map was computed from.
    trpes_map : TRPESMap
        A map from :func:`~.maps.compute_trpes`.
    client, scheduler
        For a lazy ensemble (see :func:`contributions`).

    Returns
    -------
    TRPESModel
    """
    return _model_for(ens, trpes_map, None, client=client, scheduler=scheduler)


def _delay_weights(model: TRPESModel, p: dict[str, Any], t1: float, t2: float) -> np.ndarray:
    """Normalised delay-window weight of every time-grid point, shape (n_time,)."""
    norm = model._norm(p.get("normalise", "alive"))
    sigma = p.get("sigma_cc")
    if sigma:
        # integral over the delay window of the (edge-renormalised) kernel matrix,
        # by 8-point Gauss-Legendre on sub-intervals no longer than sigma_cc
        n_sub = max(1, int(math.ceil((t2 - t1) / sigma)))
        x, wq = np.polynomial.legendre.leggauss(8)
        edges = np.linspace(t1, t2, n_sub + 1)
        half = 0.5 * np.diff(edges)
        nodes = (edges[:-1, None] + half[:, None] * (x[None, :] + 1.0)).ravel()
        wts = (half[:, None] * wq[None, :]).ravel()
        tw = wts @ model.time_weights(nodes, sigma=sigma)
    else:
        tw = _hat_integrals(model.times, t1, t2, model.t_known)
    return tw * norm


def delay_window_weights(model: TRPESModel, params: dict[str, Any], delay_range: Sequence[float]
                         ) -> np.ndarray:
    """Normalised weight of every internal grid time in a delay window, shape (n_time,).

    The same weights :func:`region_intensity` applies to the sticks of a snapshot on grid
    time ``u``: the integral over ``delay_range`` (fs) of the map's time kernel (the
    cross-correlation, or the interpolation hat), times the normaliser (1 / alive weight
    or 1 / initial weight, as ``params["normalise"]`` says).

    Parameters
    ----------
    model : TRPESModel
        The map's model (``model_for_map``).
    params : dict
        ``trpes_map.params``.
    delay_range : (float, float)
        Delay window in fs.

    Returns
    -------
    ndarray, shape (n_time,)
    """
    t1, t2 = (float(x) for x in delay_range)
    return _delay_weights(model, params, t1, t2)


def _per_snapshot(block: Any, opts: dict[str, Any]) -> np.ndarray:
    """Region intensity of every snapshot row of a block, shape (n_snapshots,)."""
    model = opts.get("model")
    if model is not None and model.sticks is not None:  # in memory: the model's sticks
        sticks, cache = model, model._cache
    else:
        w_traj, used = trajectory_weights(block, weights=opts["weights"], pump=opts["pump"])
        sticks = block_sticks(block, probe=opts["probe"], cross_section=opts["cross_section"],
                              w_traj=w_traj, weights_used=used, decompose=None,
                              start=opts["start"], dt=opts["dt"], n_time=opts["n_time"],
                              **opts["stick_options"])
        cache = {}
    return _region_per_snapshot(sticks, cache, opts["tw"], opts["lo_e"], opts["hi_e"],
                                opts["s_e"], block.n_snapshots)


def contributions_partial(block: Any, span: BlockSpan, opts: dict[str, Any]) -> dict[str, Any]:
    """The region intensities of one block, grouped as asked (a reduction partial).

    Returns ``total`` (the block's region total) and, for ``group == "snapshot"``, the
    key columns and intensities of its contributing rows (at most ``top`` of them);
    otherwise the group keys with their intensity and contributing-snapshot count.
    """
    per_snap = _per_snapshot(block, opts)
    frame = block.snapshots
    group, top = opts["group"], opts.get("top")
    out: dict[str, Any] = {"total": float(per_snap.sum())}
    if group == "snapshot":
        keep = np.flatnonzero(per_snap > 0)
        if top is not None and top < keep.size:
            keep = keep[np.argpartition(-per_snap[keep], top - 1)[:top]]
        out["rows"] = {c: frame[c].to_numpy()[keep]
                       for c in ("snapshot", "traj", "time", "active")}
        out["rows"]["intensity"] = per_snap[keep]
        return out
    codes, uniques = pd.factorize(frame[group].to_numpy(), sort=True)
    grp = np.bincount(codes, per_snap, minlength=len(uniques))
    cnt = np.bincount(codes[per_snap > 0], minlength=len(uniques))
    keep = np.flatnonzero(grp > 0)
    out["rows"] = {group: np.asarray(uniques)[keep], "intensity": grp[keep],
                   "n_snapshots": cnt[keep]}
    return out


def _merge(a: dict[str, Any], b: dict[str, Any]) -> dict[str, Any]:
    return {"total": a["total"] + b["total"],
            "rows": {k: np.concatenate([a["rows"][k], b["rows"][k]]) for k in a["rows"]}}


def _finish(parts: dict[str, Any], *, group: str, top: int | None,
            ranges: tuple[tuple[float, float], tuple[float, float]]) -> pd.DataFrame:
    rows, total = parts["rows"], parts["total"]
    if group == "snapshot":
        inten = rows["intensity"]
        sel = np.arange(inten.size)
        if top is not None and top < sel.size:
            sel = np.argpartition(-inten, top - 1)[:top]
        order = sel[np.argsort(-inten[sel], kind="stable")]
        out = pd.DataFrame({c: rows[c][order] for c in rows})
    else:
        codes, uniques = pd.factorize(rows[group], sort=True)
        grp = np.bincount(codes, rows["intensity"], minlength=len(uniques))
        cnt = np.bincount(codes, rows["n_snapshots"], minlength=len(uniques)).astype(np.int64)
        order = np.argsort(-grp, kind="stable")
        out = pd.DataFrame({group: np.asarray(uniques)[order], "intensity": grp[order],
                            "n_snapshots": cnt[order]})
    out["share"] = out["intensity"] / total if total > 0 else 0.0
    out.attrs["total"] = total
    out.attrs["energy_range"], out.attrs["delay_range"] = ranges
    return out


def _setup(ens: Ensemble | BlockSource, trpes_map: TRPESMap, model: TRPESModel | None,
           energy_range: Sequence[float], delay_range: Sequence[float], *, client: Any,
           scheduler: Any) -> tuple[dict[str, Any], tuple[Any, Any]]:
    (e1, e2), (t1, t2) = check_ranges(energy_range, delay_range)
    model = _model_for(ens, trpes_map, model, client=client, scheduler=scheduler)
    p = trpes_map.params
    probe, pump, cs, weights = settings_from_params(p)
    extra = stick_settings_from_params(p)
    res = resolution_from_params(p.get("resolution", 0.0))
    s_e: Any = float(p["fwhm_energy"]) * FWHM_TO_SIGMA
    if isinstance(res, ProportionalResolution):  # per-stick width, from the stick energy
        def s_e(x: np.ndarray) -> np.ndarray:
            return np.asarray(stick_fwhm(probe, res, x)) * FWHM_TO_SIGMA
    source = as_source(ens)
    opts = {"probe": probe, "pump": pump, "cross_section": resolve_cross_section(cs),
            "weights": weights, "start": model.grid_start, "dt": model.time_step,
            "n_time": model.n_time, "tw": _delay_weights(model, p, t1, t2),
            "lo_e": max(e1, 0.0), "hi_e": e2, "s_e": s_e,
            "model": model if model.sticks is not None else None,
            "stick_options": {
                "ionisation_shifts": check_shifts(extra["ionisation_shifts"],
                                                  source.n_cation),
                "absorbing_state": ensemble_absorbing_state(
                    ens if isinstance(ens, Ensemble) else source),
                "absorbing": extra["absorbing"], "t_end": model.t_known,
                "fill": model.fill, "local_fill": isinstance(ens, Ensemble)}}
    return opts, ((e1, e2), (t1, t2))


def region_intensity(
    ens: Ensemble,
    trpes_map: TRPESMap,
    *,
    energy_range: Sequence[float],
    delay_range: Sequence[float],
    model: TRPESModel | None = None,
) -> np.ndarray:
    """Region intensity of every snapshot, unsorted, in the ensemble's row order.

    The array :func:`contributions` sorts and groups: entry ``i`` is the integral
    over ``energy_range x delay_range`` of the part of the map made by snapshot row
    ``i`` of ``ens.snapshots`` (zero where it does not contribute). Its sum is the
    region total (``contributions(...).attrs["total"]``). No sort and no table: for
    interactive use, where a caller groups it (``np.bincount``) or picks the
    strongest rows (``np.argpartition``) itself.

    Parameters
    ----------
    ens : Ensemble
        The in-memory ensemble the map was computed from.
    trpes_map : TRPESMap
        A map from :func:`~.maps.compute_trpes`.
    energy_range : (float, float)
        Kinetic energy window in eV.
    delay_range : (float, float)
        Delay window in fs.
    model : TRPESModel, optional
        The model of the map (``compute_trpes(..., return_model=True)``); without it
        the sticks are computed again from the map's params. Hold it for repeated
        calls (it caches the sorted sticks).

    Returns
    -------
    ndarray of float, shape (n_snapshots,)
        Region intensity per snapshot row in fs (eV^-1 eV fs), all >= 0.
    """
    if not isinstance(ens, Ensemble):
        raise SchemaError("region_intensity needs an in-memory ensemble; for a lazy "
                          "(chunked) ensemble use contributions(..., group_by=...) instead.")
    opts, _ = _setup(ens, trpes_map, model, energy_range, delay_range, client=None,
                     scheduler=None)
    return _per_snapshot(ens, opts)


def contributions(
    ens: Ensemble | BlockSource,
    trpes_map: TRPESMap,
    *,
    energy_range: Sequence[float],
    delay_range: Sequence[float],
    group_by: str = "snapshot",
    top: int | None = None,
    model: TRPESModel | None = None,
    client: Any = None,
    scheduler: Any = None,
    progress: bool = False,
) -> pd.DataFrame:
    """Share of each snapshot (or group) in a region of a TRPES map.

    The region intensity is decomposed exactly into sticks (see the module
    docstring). Energies below 0 count as no signal. The kernel is the one the map
    used (renormalised near the trajectories' end, see
    :func:`~.maps.compute_trpes`); the delay integral is done by Gauss-Legendre
    quadrature, the energy integral with error functions.

    Parameters
    ----------
    ens : Ensemble or LazyEnsemble
        The ensemble the map was computed from (a lazy one is reduced chunk by chunk).
    trpes_map : TRPESMap
        A map from :func:`~.maps.compute_trpes` (its params say how it was made).
    energy_range : (float, float)
        Kinetic energy window in eV.
    delay_range : (float, float)
        Delay window in fs.
    group_by : {"snapshot", "traj"} or str
        Group by snapshot, trajectory, or any column of ``ens.snapshots``.
    top : int, optional
        With ``group_by="snapshot"``: return only the `top` strongest snapshots
        (shares stay fractions of the whole region, ``attrs["total"]``).
    model : TRPESModel, optional
        The map's model (``compute_trpes(..., return_model=True)``); without it the
        sticks (in memory) or the alive weights (lazy) are computed again.
    client : dask.distributed.Client, optional
        For a lazy ensemble: run the per-chunk work on this cluster.
    scheduler : str, optional
        For a lazy ensemble without a client: the Dask scheduler.
    progress : bool
        Progress bar over the chunks of a lazy ensemble.

    Returns
    -------
    DataFrame
        Sorted by ``intensity`` descending, rows with zero intensity dropped. For
        ``group_by="snapshot"``: ``snapshot``, ``traj``, ``time``, ``active``,
        ``intensity`` (eV^-1 eV fs = fs), ``share`` (fraction of the region total).
        Otherwise the group key column, ``intensity``, ``n_snapshots`` and ``share``.
        ``attrs["total"]`` holds the region total.
    """
    source = as_source(ens)
    if group_by not in ("snapshot", "traj") and group_by not in source.columns:
        raise SchemaError(f"The 'group_by' parameter must be 'snapshot', 'traj' or a column of "
                          f"ens.snapshots {source.columns}. Got {group_by!r} instead.")
    opts, ranges = _setup(ens, trpes_map, model, energy_range, delay_range, client=client,
                          scheduler=scheduler)
    opts.update(group=group_by, top=top)
    columns = ["snapshot"] if group_by == "snapshot" else [group_by]
    parts = reduce(source, contributions_partial, _merge, args=(opts,), fields=TRPES_FIELDS,
                   columns=columns, client=client, scheduler=scheduler, progress=progress,
                   desc="contributions")
    return _finish(parts, group=group_by, top=top, ranges=ranges)


def _region_per_snapshot(model: Any, c: dict[str, Any], tw: np.ndarray, lo_e: float,
                         hi_e: float, s_e: Any, n_snapshots: int) -> np.ndarray:
    """Region intensity of every snapshot row, shape (n_snapshots,).

    ``tw`` (n_time,) holds the normalised delay-window weight of each time-grid point.
    Sticks are kept sorted by energy (contiguous slices, no gathers); sticks further
    than 9 sigma inside the energy window have an energy weight of exactly 1.0 in
    double precision, so only the two edge slices need error functions (one each when
    the window is wider than 18 sigma: the far edge's term is then 1 or 0). The time
    weight is applied per stick (a stick carried past its snapshot has its own time).
    ``model`` has ``sticks``, ``tbin`` and ``tfrac``; ``c`` caches the sorted sticks.
    ``s_e`` is the energy standard deviation (eV), or a function of the stick energy.
    """
    sticks = model.sticks
    if "e_sorted" not in c:
        order = np.argsort(sticks.energy, kind="stable")
        c["e_sorted"] = sticks.energy[order]
        c["w_sorted"] = sticks.weight[order]
        c["s_sorted"] = sticks.snapshot[order]
        c["tb_sorted"] = np.asarray(model.tbin)[order]
        c["tf_sorted"] = None if model.tfrac is None else np.asarray(model.tfrac)[order]
    e_sorted, w_sorted, s_sorted = c["e_sorted"], c["w_sorted"], c["s_sorted"]
    tb, tf = c["tb_sorted"], c["tf_sorted"]
    dw = tw[tb] if tf is None else (1.0 - tf) * tw[tb] + tf * tw[np.minimum(tb + 1,
                                                                           tw.size - 1)]
    per_snap = np.zeros(n_snapshots)
    if callable(s_e):  # energy-dependent width: one error-function pair per stick
        sig = s_e(e_sorted)
        ew = ndtr((hi_e - e_sorted) / sig) - ndtr((lo_e - e_sorted) / sig)
        return np.bincount(s_sorted, w_sorted * ew * dw, minlength=n_snapshots)
    span = 9.0 * s_e
    a, a2, b2, b = np.searchsorted(e_sorted, [lo_e - span, lo_e + span, hi_e - span,
                                              hi_e + span])
    wide = hi_e - lo_e >= 2.0 * span  # each edge slice is >= 9 sigma from the other edge
    if a2 < b2:  # interior: erf weight is 1.0 to double precision
        per_snap += np.bincount(s_sorted[a2:b2], w_sorted[a2:b2] * dw[a2:b2],
                                minlength=n_snapshots)
        edges = [(a, a2, "low"), (b2, b, "high")]
    else:
        edges = [(a, b, "both")]
    for i, j, side in edges:
        if j <= i:
            continue
        x = e_sorted[i:j]
        if wide and side == "low":  # ndtr((hi - x) / s) is 1.0 in double precision here
            ew = ndtr((x - lo_e) / s_e)
        elif wide and side == "high":  # ndtr((lo - x) / s) < 1.2e-19 here
            ew = ndtr((hi_e - x) / s_e)
        else:
            ew = ndtr((hi_e - x) / s_e) - ndtr((lo_e - x) / s_e)
        per_snap += np.bincount(s_sorted[i:j], w_sorted[i:j] * ew * dw[i:j],
                                minlength=n_snapshots)
    return per_snap
