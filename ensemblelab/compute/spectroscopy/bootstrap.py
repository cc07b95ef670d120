"""Bootstrap intervals of TRPES maps: resampling whole trajectories.

``compute_trpes(..., interval="bootstrap", ci=0.95, n_boot=200, random_state=0)``
resamples the ensemble's trajectories with replacement ``n_boot`` times (each
resample as large as the ensemble; the trajectory weights go with their trajectory,
so a few heavy trajectories give a wide interval, as the Kish effective sample size
says) and recomputes the map of each resample on the same grids. The map is a ratio
(signal over alive weight, or over the total weight): numerator and denominator come
from the same resample. The interval is the percentile interval of the replicate maps
(pixel by pixel), for the total and every component; ``rel_se`` is the replicate
standard deviation over the map (the percentile bootstrap; Stat. Sci. 1986, "Bootstrap
methods for standard errors, confidence intervals, and other measures of statistical
accuracy").

The fast route (:mod:`.bootstrap_fused`: in memory, numba, a built-in cross section, no
decomposition) makes no stick arrays at all: one compiled pass forms the sticks per grid
time and adds them to every resample (replicates with fewer moments in float32,
recentred on the map; ``bootstrap_fused.EXACT`` for the numbers below to rounding).
Otherwise (the stick route) no sticks are made again: the sticks are linear in the
trajectory weights, so each resample's moment histograms are deposited from the same
sticks with the resample's multiplicities (:mod:`._kernels_bootstrap`, all resamples of
a chunk in one pass, the sticks sorted by cell once), and broadened into maps for all
resamples at once (:mod:`._kernels_replicate_maps`). An in-memory ensemble reuses the
map's own sticks and alive inputs and streams over windows of time bins (histograms of a
few bins at a time, broadened while in cache; :func:`_stream`); a chunked store is read
once per chunk of resamples (:func:`bootstrap_partial`, histograms over the whole time
grid).
Memory: within :data:`._kernels_bootstrap.MEMORY_BUDGET` for the histograms and
broadened rows, plus the replicate maps (``(1 + n_components) x n_delays x n_energies
x n_boot`` floats, for the percentiles) and, in memory, the sorted sticks (28 bytes
each).

Snapshots without data for every channel leave numerator and alive weight in each
resample as in the map. Not covered: data missing for some cation channels only, or
grid times without data (the per-channel rescaling of :mod:`.gaps` depends on the
resample; a clear error says so).
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

from ...data.ensemble import Ensemble
from ...data.spectrum import TRPESMap
from ...errors import SchemaError
from ..engine import BlockSpan, add, as_source, reduce
from . import _kernels_bootstrap as KBS
from . import _kernels_broadening as KB
from . import _kernels_replicate_maps as KRM
from . import bootstrap_fused as BF
from ._checks import time_bins
from .cross_sections import resolve_cross_section
from .model import TRPESModel
from .pulses import GaussianPulse, cross_correlation_sigma
from .resolution import ProportionalResolution, Resolution, check_resolution, stick_fwhm
from .sticks import block_alive, block_sticks, check_shifts
from .weights import resolve_weights, trajectory_weights

__all__ = ["bootstrap_map", "bootstrap_partial", "block_resampling_inputs", "check_interval",
           "INTERVALS"]

#: accepted values of ``interval`` for maps
INTERVALS = (None, "bootstrap")


def check_interval(interval: Any, ci: Any, n_boot: Any) -> None:
    """Raise :class:`SchemaError` for a bad ``interval`` / ``ci`` / ``n_boot``."""
    if interval not in INTERVALS:
        raise SchemaError(f"The 'interval' parameter of compute_trpes must be None or "
                          f"'bootstrap'; got {interval!r}.")
    if interval is None:
        return
    if not (isinstance(ci, float | int) and not isinstance(ci, bool) and 0.0 < ci < 1.0):
        raise SchemaError(f"The 'ci' parameter must be a number in (0, 1); got {ci!r}.")
    if isinstance(n_boot, bool) or not isinstance(n_boot, int | np.integer) or n_boot < 2:
        raise SchemaError(f"The 'n_boot' parameter must be an int >= 2 with "
                          f"interval='bootstrap'; got {n_boot!r}. Hint: 200 or more for "
                          "95% intervals.")


def block_resampling_inputs(block: Any, opts: dict[str, Any],
                            model: TRPESModel | None = None) -> dict[str, Any]:
    """What a block's resamples are made of: its sticks (total and components) with the
    block-local trajectory of each, sorted by accumulator cell when compiled
    (:func:`._kernels_bootstrap.sort_cells`), trajectory weights and unit alive
    profiles (:func:`._kernels_bootstrap.unit_alive`). With ``model`` (made from this
    block, an in-memory ensemble) its sticks are used instead of being made again."""
    w_traj, _ = trajectory_weights(block, weights=opts["weights"], pump=opts["pump"])
    grid = {"start": opts["start"], "dt": opts["dt"], "n_time": opts["n_time"]}
    extra = {"ionisation_shifts": opts["ionisation_shifts"],
             "absorbing_state": opts["absorbing_state"], "absorbing": opts["absorbing"],
             "t_end": opts["t_end"]}
    if model is not None and model.alive_parts is not None:  # kept by the map
        has_any, absorbed, ext_bin, ext_first = model.alive_parts
    else:
        al = block_alive(block, w_traj=w_traj, probe=opts["probe"], **grid, **extra)
        has_any, absorbed, ext_bin, ext_first = (al.has_data.any(axis=1), al.absorbed,
                                                 al.ext_bin, al.ext_first)
    bs: Any = model
    if model is None or model.sticks is None or model.tbin is None:
        bs = block_sticks(block, probe=opts["probe"], cross_section=opts["cross_section"],
                          w_traj=w_traj, weights_used=opts["weights_used"],
                          decompose=opts["decompose"], fill=None, local_fill=False, **grid,
                          **extra)
    tix = block.traj_index
    tbin_s, tfrac_s = time_bins(block.snapshots["time"].to_numpy(), opts["start"], opts["dt"])
    unit = KBS.unit_alive(tix, tbin_s, tfrac_s, np.asarray(has_any), block.n_trajectories,
                          opts["n_time"], absorbed_traj=tix[absorbed], ext_bin=ext_bin,
                          ext_first=ext_first)
    s = bs.sticks
    src = tix[s.snapshot].astype(np.int32)
    fine = {"n_time": opts["n_time"], "e_lo": opts["e_lo"], "h": opts["h"],
            "n_fine": opts["n_fine"]}
    compiled = opts["backend"] in ("auto", "numba")
    out: dict[str, Any] = {"w_traj": w_traj, "unit": unit}
    out["total"] = {"tbin": bs.tbin, "energy": s.energy, "weight": s.weight,
                    "src_traj": src, "tfrac": bs.tfrac}
    if bs.comp is not None:
        cs = bs.comp_src
        out["comp"] = {"tbin": bs.tbin if cs is None else bs.tbin[cs],
                       "energy": s.energy if cs is None else s.energy[cs],
                       "weight": s.weight if bs.comp_weight is None else bs.comp_weight,
                       "src_traj": src if cs is None else src[cs], "comp": bs.comp,
                       "n_comp": opts["n_comp"],
                       "tfrac": None if bs.tfrac is None else (
                           bs.tfrac if cs is None else bs.tfrac[cs])}
    for part in ("total", "comp"):  # stick arrays (and cells) as deposit_replicates takes
        if part in out:
            out[part]["cells"] = KBS.sort_cells(**out[part], **fine) if compiled else None
    return out


def bootstrap_partial(block: Any, span: BlockSpan, opts: dict[str, Any]) -> dict[str, Any]:
    """Replicate moment histograms and alive weights of one block (a reduction partial).

    ``opts["counts"]`` (n_rep, n_trajectories of the source) are the multiplicities of
    the chunk of resamples and ``opts["t0"]``, ``opts["t1"]`` the time bins it covers;
    the other keys are those of :func:`.maps.trpes_partial` (with ``opts["cache"]``, a
    dict, the block's sorted sticks are kept there for the next chunk: in-memory
    ensembles). Returns ``hist`` (1 + n_comp, t1 - t0, n_fine, order, n_rep) (the
    total, then each component; see :func:`._kernels_bootstrap.deposit_replicates`),
    ``alive`` (n_rep, t1 - t0) and ``total`` (n_rep,) (the resamples' total trajectory
    weight).
    """
    counts = opts["counts"][:, span.traj_start:span.traj_start + block.n_trajectories]
    t0, t1 = opts.get("t0", 0), opts.get("t1", opts["n_time"])
    cache = opts.get("cache")
    inp = None if cache is None else cache.get(span.index)
    if inp is None:
        inp = block_resampling_inputs(block, opts)
        if cache is not None:
            cache[span.index] = inp
    rw = np.ascontiguousarray(counts.T)
    n_lab = opts["n_comp"] if opts["decompose"] is not None else 0
    acc = np.zeros((1 + n_lab, t1 - t0, opts["n_fine"], opts["order"], counts.shape[0]))
    fine = {"e_lo": opts["e_lo"], "h": opts["h"], "backend": opts["backend"], "t0": t0,
            "n_time": opts["n_time"]}
    KBS.deposit_replicates(acc, rw=rw, **inp["total"], **fine)
    if "comp" in inp:
        KBS.deposit_replicates(acc, rw=rw, c0=1, **inp["comp"], **fine)
    w_traj = inp["w_traj"]
    return {"hist": acc, "alive": (counts * w_traj) @ inp["unit"][:, t0:t1],
            "total": counts @ w_traj}


def _stream(inp: dict[str, Any], counts: np.ndarray, opts: dict[str, Any], bmat: Any,
            cmat: np.ndarray, normalise: str, reps: np.ndarray, *, budget: int,
            progress: bool) -> None:
    """Replicate maps of an in-memory ensemble (one block, its sorted sticks in ``inp``),
    added to ``reps`` (1 + n_comp, n_delays, n_energies, n_boot).

    Per chunk of resamples (:func:`._kernels_bootstrap.stream_plan`): the histograms of
    a few time bins at a time are deposited into one reused buffer and broadened in
    energy while in cache, then each window of broadened rows gets its normaliser and
    its share of the time matrix.
    """
    n_boot = counts.shape[0]
    n_c, n_time = reps.shape[0], opts["n_time"]
    n_e = reps.shape[2]
    n_rep, n_sub, n_big = KBS.stream_plan(n_boot, n_time,
                                          8 * opts["order"] * n_c * opts["n_fine"],
                                          8 * n_c * n_e, budget)
    buf = np.zeros(n_c * n_sub * opts["n_fine"] * opts["order"] * n_rep)
    fine = {"e_lo": opts["e_lo"], "h": opts["h"], "backend": opts["backend"],
            "n_time": n_time}
    w_traj, size = inp["w_traj"], opts["n_fine"] * opts["order"]
    bar = None
    if progress:
        from tqdm.auto import tqdm
        bar = tqdm(total=-(-n_boot // n_rep) * -(-n_time // n_big), desc="bootstrap windows",
                   unit="window")
    for r0 in range(0, n_boot, n_rep):
        sub = counts[r0:r0 + n_rep]
        r1 = r0 + sub.shape[0]
        rw = KBS.compact_counts(sub.T)
        norm = _normalise({"alive": (sub * w_traj) @ inp["unit"], "total": sub @ w_traj},
                          normalise)
        for big0 in range(0, n_time, n_big):
            big1 = min(big0 + n_big, n_time)
            y = np.empty((n_c, big1 - big0, n_e, r1 - r0))
            for t0 in range(big0, big1, n_sub):
                t1 = min(t0 + n_sub, big1)
                acc = buf[:n_c * (t1 - t0) * size * (r1 - r0)].reshape(
                    n_c, t1 - t0, opts["n_fine"], opts["order"], r1 - r0)
                acc[...] = 0.0
                KBS.deposit_replicates(acc, rw=rw, t0=t0, **inp["total"], **fine)
                if "comp" in inp:
                    KBS.deposit_replicates(acc, rw=rw, c0=1, t0=t0, **inp["comp"], **fine)
                KRM.broaden_energy(acc, bmat, y[:, t0 - big0:t1 - big0])
            KRM.apply_time(y, cmat[:, big0:big1], norm[:, big0:big1], reps[..., r0:r1])
            if bar is not None:
                bar.update()
    if bar is not None:
        bar.close()


def _normalise(res: dict[str, Any], normalise: str) -> np.ndarray:
    """1 / normaliser per resample and grid time, shape (n_rep, n_time)."""
    den = res["alive"] if normalise == "alive" else np.repeat(
        res["total"][:, None], res["alive"].shape[1], axis=1)
    with np.errstate(divide="ignore"):
        return np.where(den > 0, 1.0 / np.where(den > 0, den, 1.0), 0.0)


def _operators(model: TRPESModel, kinetic_energies: np.ndarray, delays: np.ndarray, *,
               probe: GaussianPulse, pump: GaussianPulse | None, resolution: Resolution,
               convolve: bool, e_lo: float, h: float, n_fine: int, order: int | None = None,
               **banded: Any) -> tuple[Any, np.ndarray]:
    """Energy broadening blocks and time matrix (without normaliser) of
    :meth:`.model.TRPESModel.broaden` for these grids (``order``: moments, default the
    model's; ``banded``: ``block`` and ``cutoff`` of
    :func:`._kernels_broadening.broadening_blocks`)."""
    resolution = check_resolution(resolution)
    probe = probe or model.probe
    sigma = None
    if convolve:
        sigma = (cross_correlation_sigma(pump, probe) if pump is not None
                 else probe.effective_sigma)
    cmat = model.time_weights(delays, sigma=sigma)
    fwhm_of = None
    if isinstance(resolution, ProportionalResolution):
        res = resolution

        def fwhm_of(c: np.ndarray) -> np.ndarray:
            return np.asarray(stick_fwhm(probe, res, c))
    bmat = KB.broadening_blocks(kinetic_energies, e_lo=e_lo, h=h, n_fine=n_fine,
                                fwhm=model.fwhm(probe, resolution),
                                order=model.order if order is None else order,
                                fwhm_of=fwhm_of, **banded)
    return KRM.replicate_blocks(bmat), cmat


def bootstrap_map(
    ens: Any,
    model: TRPESModel,
    trpes_map: TRPESMap,
    *,
    probe: GaussianPulse,
    pump: GaussianPulse | None,
    kinetic_energies: np.ndarray,
    delays: np.ndarray,
    resolution: Resolution,
    convolve: bool,
    normalise: str,
    cross_section: Any,
    weights: str,
    ionisation_shifts: Any,
    absorbing: str,
    fields: Sequence[str],
    ci: float = 0.95,
    n_boot: int = 200,
    random_state: int | np.random.Generator | None = 0,
    client: Any = None,
    scheduler: Any = None,
    progress: bool = False,
    backend: str = "auto",
    budget: int | None = None,
    return_replicates: bool = False,
    replicates: BF.ReplicateGrid | str | None = "default",
) -> TRPESMap | tuple[TRPESMap, np.ndarray, np.ndarray | None]:
    """The map with percentile bootstrap intervals over whole trajectories.

    Parameters are those of :func:`.maps.compute_trpes` (``model`` and ``trpes_map``
    are its stick model and map); ``fields`` the arrays a block reads; ``budget`` the
    bytes of replicate histograms (and, in memory, broadened rows) per chunk (default
    :data:`._kernels_bootstrap.MEMORY_BUDGET`; see
    :func:`._kernels_bootstrap.stream_plan` and :func:`._kernels_bootstrap.chunk_plan`);
    ``backend`` that of :func:`._kernels_bootstrap.deposit_replicates` (``"numpy"``:
    the loop of numpy deposits, whole time grid per chunk of resamples);
    ``replicates`` the precision of the fused route (:mod:`.bootstrap_fused`;
    ``"default"``: :data:`.bootstrap_fused.DEFAULT_GRID`, read at call time; None: the
    stick route always).

    Returns
    -------
    TRPESMap
        ``trpes_map`` with ``lower``, ``upper`` and ``rel_se`` (shape of
        ``intensity``), ``component_lower`` / ``component_upper`` (one array per
        component) and ``params["interval"]``, ``["ci"]``, ``["n_boot"]``,
        ``["random_state"]``, ``["interval_method"]``. With ``return_replicates``
        also the replicate maps, shape (n_boot, n_delays, n_energies), and those of the
        components (n_boot, n_components, n_delays, n_energies) or None.
    """
    check_interval("bootstrap", ci, n_boot)
    if model.fill is not None:
        raise SchemaError(
            "compute_trpes(interval='bootstrap') does not yet handle missing electronic "
            "data for some cation channels only, or grid times without data (their "
            "per-channel rescaling depends on the resample). Hint: pass time_step= equal "
            "to the output step, or drop the trajectories with NaN data "
            "(ens.without(...)).")
    source = as_source(ens)
    n_traj = source.n_trajectories
    kind, _ = resolve_weights(source, weights=weights, pump=pump)
    e_lo, h, n_fine = model.moment_grid(model.fwhm(probe, resolution))
    labels = list(model.labels) if model.decompose is not None else []
    n_lab, order, n_time = len(labels), model.order, model.n_time
    opts: dict[str, Any] = {
        "probe": model.probe, "pump": pump, "cross_section": resolve_cross_section(
            cross_section), "weights": kind, "weights_used": model.info.get("weights"),
        "decompose": model.decompose, "n_comp": n_lab, "start": model.grid_start,
        "dt": model.time_step, "n_time": n_time, "e_lo": e_lo, "h": h, "n_fine": n_fine,
        "order": order, "ionisation_shifts": check_shifts(ionisation_shifts,
                                                          source.n_cation),
        "absorbing_state": model.info.get("absorbing_state"), "absorbing": absorbing,
        "t_end": model.t_known, "backend": backend,
        "cache": {} if isinstance(ens, Ensemble) else None}
    rng = random_state if isinstance(random_state, np.random.Generator) else \
        np.random.default_rng(random_state)
    counts = KBS.bootstrap_counts(n_traj, int(n_boot), rng)
    ops: dict[str, Any] = {"probe": probe, "pump": pump, "resolution": resolution,
                           "convolve": convolve}
    bmat, cmat = _operators(model, kinetic_energies, delays, e_lo=e_lo, h=h, n_fine=n_fine,
                            **ops)
    budget = KBS.MEMORY_BUDGET if budget is None else budget
    fused = None
    if isinstance(replicates, str):
        if replicates != "default":
            raise SchemaError(f"replicates must be a ReplicateGrid, 'default' or None; got "
                              f"{replicates!r}.")
        replicates = BF.DEFAULT_GRID
    if replicates is not None and backend in ("auto", "numba") and BF.can_fuse(
            ens, cross_section=opts["cross_section"], decompose=model.decompose,
            absorbing=absorbing):
        fused = BF.fused_bootstrap_maps(
            ens, model, counts, intensity=trpes_map.intensity, probe=model.probe,
            fwhm=model.fwhm(probe, resolution), kinetic_energies=kinetic_energies,
            w_traj=trajectory_weights(ens, weights=kind, pump=pump)[0],
            cross_section=opts["cross_section"], ionisation_shifts=ionisation_shifts,
            cmat=cmat, grid=replicates, budget=budget, progress=progress,
            blocks_of=lambda e0, h0, n0, k0, **banded: _operators(
                model, kinetic_energies, delays, e_lo=e0, h=h0, n_fine=n0, order=k0,
                **banded, **ops)[0],
            normalise_of=lambda al, tot: _normalise({"alive": al, "total": tot},
                                                    normalise))
    if fused is None and isinstance(ens, Ensemble):  # one block: the model's own sticks
        opts["cache"][0] = block_resampling_inputs(ens, opts, model)
    # replicate maps, the resamples last (contiguous for the percentiles)
    reps = np.zeros((1 + n_lab, *trpes_map.shape, int(n_boot))) if fused is None else \
        fused[None]
    per_bin = 8 * order * (1 + n_lab) * n_fine
    if fused is None and isinstance(ens, Ensemble) and \
            opts["cache"][0]["total"]["cells"] is not None:
        _stream(opts["cache"][0], counts, opts, bmat, cmat, normalise, reps, budget=budget,
                progress=progress)
    elif fused is None:
        steps: Any = KBS.chunk_plan(int(n_boot), n_time, per_bin, budget)
        if progress:
            from tqdm.auto import tqdm
            steps = tqdm(steps, desc="bootstrap chunks", unit="chunk")
        for r0, r1 in steps:
            opts["counts"] = counts[r0:r1]
            res = reduce(source, bootstrap_partial, add, args=(opts,), fields=list(fields),
                         client=client, scheduler=scheduler, progress=False,
                         desc="bootstrap blocks")
            KRM.assemble_replicates(res.pop("hist"), bmat, cmat, _normalise(res, normalise),
                                    reps[..., r0:r1])
            del res
    lower, upper, rel = KBS.percentile_summary(reps[0], trpes_map.intensity, ci, axis=-1)
    c_lo: dict[str, np.ndarray] = {}
    c_hi: dict[str, np.ndarray] = {}
    for i, lab in enumerate(labels):
        c_lo[lab], c_hi[lab], _ = KBS.percentile_summary(reps[1 + i],
                                                         trpes_map.components[lab], ci,
                                                         axis=-1)
    seed = random_state if isinstance(random_state, int | None) else "generator"
    params = dict(trpes_map.params) | {
        "interval": "bootstrap", "ci": float(ci), "n_boot": int(n_boot),
        "random_state": seed,
        "interval_method": (f"percentile bootstrap over whole trajectories ({int(n_boot)} "
                            "resamples with replacement; weights kept with their "
                            "trajectory; numerator and normaliser resampled together" + (
                                "" if fused is None or replicates is None else
                                f"; replicates by the fused pass with {replicates.order or order}"
                                f" moments, {replicates.dtype}, recentred on the map") + ")")}
    out_map = trpes_map.replace(lower=lower, upper=upper, rel_se=rel, component_lower=c_lo,
                                component_upper=c_hi, params=params)
    if not return_replicates:
        return out_map
    return (out_map, np.moveaxis(reps[0], -1, 0),
            np.moveaxis(reps[1:], -1, 0) if n_lab else None)
