"""Chunk-by-chunk reductions for lazy (chunked-store) ensembles, run with Dask (private).

Each public computation that accepts a :class:`~ensemblelab.io.lazy.LazyEnsemble`
dispatches here. The global quantities the in-memory code derives from the whole
ensemble (time grid, median step, stick energy range) come from the per-chunk
summaries the writer stored in the manifest (time range, time-step counts, IP
range; see :mod:`ensemblelab.io.chunked`), so no pass over the data precedes the
computation; only chunks without a summary (older stores) or, for the energy
range, chunks that the probe opens only partly are read first. Then every chunk
(whole trajectories, read by the task itself from the store, so on a cluster
nothing large travels) is reduced to partial sums, the partial sums are added in
a tree, and the in-memory finishing code turns them into the result. The TRPES
and population tasks read only the snapshot columns and arrays they use
(memory-mapped; never the geometries) without building a validated Ensemble, and
compute the sticks with the formulas of :func:`.spectra.prepare_sticks` and the
same kernels. Differences from the in-memory result come only from the order of
floating-point additions (~1e-15 relative).

* TRPES map: Taylor-moment histograms and alive weights are sums over sticks
  and snapshots, so the map of the ensemble is assembled from the sum of the
  per-chunk histograms (``_kernels_trpes.deposit_moments``) and then broadened
  and normalised once.
* contributions: the time/energy weights of the region are global; each chunk
  gives its per-snapshot (or per-group) intensities.
* populations: weighted counts ``sum w v``, ``sum w alive``, ``sum w^2 alive`` and
  the bootstrap numerators are sums over trajectories; intervals come last.
* flag_trajectories: the rule-based checks are per trajectory (a trajectory
  never straddles chunks), with the global median step, expected end time and
  tolerance passed in; the isolation-forest score is fitted once on the
  per-trajectory features gathered from all chunks, with the mean structure of
  the same random subsample of snapshots as in memory.

Scheduling: ``client`` (a ``dask.distributed.Client``) runs the tasks on its
cluster; otherwise ``scheduler`` (``"threads"``, ``"processes"``,
``"synchronous"``) or Dask's default (the active distributed client if there is
one, else the scheduler set with ``dask.config.set(scheduler=...)``, else the
local threaded scheduler; numpy and the compiled deposit kernel release the GIL,
so its threads run in parallel).
"""

from __future__ import annotations

import dataclasses
import math
import sys
import warnings
from collections.abc import Callable, Mapping, Sequence
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from .._optional import import_optional
from ..errors import EnsembleWarning, SchemaError

if TYPE_CHECKING:
    from ..data.spectrum import TRPESMap
    from ..io.lazy import LazyEnsemble
    from .spectroscopy.pulses import GaussianPulse

__all__ = ["is_lazy", "compute_trpes", "contributions", "populations", "flag_trajectories",
           "median_step"]


def is_lazy(ens: object) -> bool:
    """True when `ens` is a LazyEnsemble (checked without importing the io layer's class)."""
    return type(ens).__name__ == "LazyEnsemble" and hasattr(ens, "iter_chunks")


# ------------------------------------------------------------------------ scheduling
def _dask() -> Any:
    return import_optional("dask", extra="dask", purpose="computations on lazy ensembles")


def _add(a: Any, b: Any) -> Any:
    if isinstance(a, dict):
        return {k: _add(a[k], b[k]) for k in a}
    if a is None:
        return b
    return a + b


def _tree(parts: list[Any], combine: Callable[[Any, Any], Any]) -> Any:
    dask = _dask()
    parts = list(parts)
    while len(parts) > 1:
        nxt = [dask.delayed(combine, pure=True)(parts[i], parts[i + 1])
               for i in range(0, len(parts) - 1, 2)]
        if len(parts) % 2:
            nxt.append(parts[-1])
        parts = nxt
    return parts[0]


def _compute(objs: Sequence[Any], *, client: Any, scheduler: Any, progress: bool,
             desc: str) -> tuple[Any, ...]:
    dask = _dask()
    if client is not None:
        return tuple(dask.compute(*objs, scheduler=client))
    if progress and scheduler != "distributed":
        from dask.callbacks import Callback
        from tqdm.auto import tqdm

        class _Bar(Callback):  # a tqdm bar over finished tasks (local schedulers)
            def _start_state(self, dsk: Any, state: Any) -> None:
                self.bar = tqdm(total=sum(len(state[k]) for k in ("ready", "waiting",
                                                                  "running")),
                                desc=desc, unit="task", leave=False)

            def _posttask(self, key: Any, result: Any, dsk: Any, state: Any, wid: Any) -> None:
                self.bar.update(1)

            def _finish(self, dsk: Any, state: Any, errored: bool) -> None:
                self.bar.close()

        has_client = False
        if "distributed" in sys.modules:  # no client can exist before it is imported
            try:
                from distributed import default_client

                default_client()
                has_client = True
            except (ImportError, ValueError):
                has_client = False
        if not has_client:
            with _Bar():
                return tuple(dask.compute(*objs, scheduler=scheduler))
    return tuple(dask.compute(*objs, scheduler=scheduler))


def _tasks(lz: LazyEnsemble, func: Callable[..., Any], *args: Any, **kw: Any) -> list[Any]:
    dask = _dask()
    path = str(lz.path)
    args = _shared(args)
    return [dask.delayed(func, pure=True)(path, i, *args, **kw) for i in range(lz.n_chunks)]


def _one(manifest: Mapping[str, Any], index: int) -> dict[str, Any]:
    """The part of the manifest a task on chunk `index` needs (its record and the arrays)."""
    return {"arrays": manifest["arrays"], "chunks": [manifest["chunks"][index]]}


def _view_tasks(lz: LazyEnsemble, func: Callable[..., Any], *args: Any,
                indices: Sequence[int] | None = None) -> list[Any]:
    """One delayed ``func(path, sub_manifest, *args)`` per chunk (or per chunk of `indices`)."""
    dask = _dask()
    path = str(lz.path)
    m = lz._manifest
    idx = range(lz.n_chunks) if indices is None else indices
    args = _shared(args)
    return [dask.delayed(func, pure=True)(path, _one(m, i), *args) for i in idx]


def _shared(args: Sequence[Any]) -> list[Any]:
    """Mappings among `args` as one graph node each (hashed and shipped once, not per task)."""
    dask = _dask()
    return [dask.delayed(a, traverse=False) if isinstance(a, Mapping) else a for a in args]


class _ChunkView:
    """A few fields of one chunk, read without building a validated Ensemble.

    Has the attributes of :class:`~ensemblelab.Ensemble` that the per-chunk
    reductions use (``snapshots`` with the columns read, ``trajectories``,
    ``n_snapshots``, ``n_trajectories``, ``n_states``, ``traj_index`` and the arrays
    read, float64 as in an Ensemble; memory-mapped where stored as float64).
    Geometries are never read.
    """

    _ARRAYS = ("energies", "cation_energies", "dyson", "amplitudes", "adt", "adt_cation",
               "overlaps", "velocities", "excitation_energies", "oscillator_strengths",
               "transition_dipoles")

    def __init__(self, path: str, sub: Mapping[str, Any], names: Sequence[str]) -> None:
        from ..io.chunked import read_chunk_fields

        frame, trajs, arrays = read_chunk_fields(path, sub, 0, names)
        self.snapshots = frame
        self.trajectories = trajs
        self.n_snapshots = len(frame)
        self.n_trajectories = len(trajs)
        self.n_states = int(next(e for e in sub["arrays"] if e["name"] == "energies")["tail"][0])
        for name in self._ARRAYS:
            arr = arrays.get(name)
            if arr is not None and arr.dtype != np.float64:
                arr = arr.astype(np.float64)
            setattr(self, name, arr)
        self.traj_index = np.searchsorted(trajs["traj"].to_numpy(), frame["traj"].to_numpy())
        if "active" in frame.columns and self.n_snapshots:
            active = frame["active"].to_numpy()
            if active.min() < 0 or active.max() >= self.n_states:
                from ..errors import StoreError

                raise StoreError(f"{path}: chunk {sub['chunks'][0]['dir']} has active states "
                                 f"outside [0, {self.n_states - 1}]. Hint: the store is "
                                 "corrupt; convert the original files again.")

    def active_dyson(self) -> np.ndarray | None:
        """As :meth:`Ensemble.active_dyson`."""
        if self.dyson is None or self.dyson.ndim == 2:
            return self.dyson
        active = self.snapshots["active"].to_numpy()
        return self.dyson[np.arange(self.n_snapshots), active]


# ------------------------------------------------------------------------ time statistics
def _merge_counts(a: tuple[np.ndarray, np.ndarray], b: tuple[np.ndarray, np.ndarray]
                  ) -> tuple[np.ndarray, np.ndarray]:
    v = np.concatenate([a[0], b[0]])
    c = np.concatenate([a[1], b[1]])
    u, inv = np.unique(v, return_inverse=True)
    return u, np.bincount(inv, c, minlength=u.size).astype(np.int64)


def _median_from_counts(values: np.ndarray, counts: np.ndarray) -> float:
    """``np.median`` of the multiset {values[i] repeated counts[i] times}, exactly."""
    n = int(counts.sum())
    if n == 0:
        return math.nan
    cum = np.cumsum(counts)
    if n % 2:
        return float(values[np.searchsorted(cum, n // 2, side="right")])
    a = values[np.searchsorted(cum, n // 2 - 1, side="right")]
    b = values[np.searchsorted(cum, n // 2, side="right")]
    return float(np.mean(np.array([a, b])))


def _time_stats_chunk(path: str, index: int) -> dict[str, Any]:
    from ..io.chunked import read_chunk_table

    frame = read_chunk_table(path, index, "snapshots", ["traj", "time"])
    time = frame["time"].to_numpy()
    traj = frame["traj"].to_numpy()
    dt = np.diff(time)[traj[1:] == traj[:-1]]
    u, c = np.unique(dt, return_counts=True)
    return {"t_min": float(time.min()) if time.size else math.inf,
            "t_max": float(time.max()) if time.size else -math.inf, "dt": (u, c)}


def _merge_time_stats(a: dict[str, Any], b: dict[str, Any]) -> dict[str, Any]:
    return {"t_min": min(a["t_min"], b["t_min"]), "t_max": max(a["t_max"], b["t_max"]),
            "dt": _merge_counts(a["dt"], b["dt"])}


def _time_stats(lz: LazyEnsemble, *, client: Any, scheduler: Any) -> dict[str, Any]:
    """Time range and time-step counts: from the manifest, reading only chunks without them."""
    cache = lz._cache
    if "time_stats" not in cache:
        total: dict[str, Any] = {"t_min": math.inf, "t_max": -math.inf,
                                 "dt": (np.zeros(0), np.zeros(0, dtype=np.int64))}
        pending = []
        for i, c in enumerate(lz._manifest["chunks"]):
            if "dt_values" not in c:
                pending.append(i)
            elif c["n_snapshots"]:
                total = _merge_time_stats(total, {
                    "t_min": float(c["t_min"]), "t_max": float(c["t_max"]),
                    "dt": (np.asarray(c["dt_values"], dtype=np.float64),
                           np.asarray(c["dt_counts"], dtype=np.int64))})
        if pending:
            tasks = [_dask().delayed(_time_stats_chunk, pure=True)(str(lz.path), i)
                     for i in pending]
            (rest,) = _compute([_tree(tasks, _merge_time_stats)], client=client,
                               scheduler=scheduler, progress=False, desc="time grid")
            total = _merge_time_stats(total, rest)
        cache["time_stats"] = total
    return cache["time_stats"]


def median_step(lz: LazyEnsemble, *, client: Any = None, scheduler: Any = None) -> float:
    """Median time step (fs) within trajectories over the whole lazy ensemble (exact)."""
    st = _time_stats(lz, client=client, scheduler=scheduler)
    return _median_from_counts(*st["dt"])


def _grid(t_min: float, t_max: float, dt: float) -> tuple[float, int]:
    """Start and size of the internal TRPES time grid (as ``spectra._time_grid``)."""
    start = math.floor(t_min / dt + 1e-9) * dt if math.isfinite(t_min) else 0.0
    start = min(start, 0.0)
    j_max = int(np.floor((t_max - start) / dt + 1e-9)) if math.isfinite(t_max) else 0
    return start, j_max + 2


def _bins(time: np.ndarray, start: float, dt: float) -> tuple[np.ndarray, np.ndarray | None]:
    pos = (time - start) / dt
    j = np.floor(pos + 1e-9).astype(np.int64)
    frac = pos - j
    frac[np.abs(frac) < 1e-9] = 0.0
    return j, (frac if np.any(frac > 0) else None)


# ------------------------------------------------------------------------ TRPES
def _trpes_fields(by: str | None) -> list[str]:
    fields = ["cation_energies", "dyson", "excitation_energies", "transition_dipoles",
              "oscillator_strengths"]
    if by == "diabatic":
        fields += ["adt", "adt_cation"]
    return fields


def _energy_range_chunk(path: str, sub: Mapping[str, Any], total_energy: float
                        ) -> dict[str, Any]:
    """Smallest and largest open-channel kinetic energy of one chunk (read from its arrays)."""
    view = _ChunkView(path, sub, ["energies", "cation_energies"])
    if view.cation_energies is None:
        return {"e_min": math.inf, "e_max": -math.inf}
    active = view.snapshots["active"].to_numpy()
    e_neutral = view.energies[np.arange(view.n_snapshots), active]
    ekin = total_energy - (view.cation_energies - e_neutral[:, None])
    e = ekin[ekin > 0]
    return {"e_min": float(e.min()) if e.size else math.inf,
            "e_max": float(e.max()) if e.size else -math.inf}


def _energy_range(lz: LazyEnsemble, total_energy: float, *, client: Any, scheduler: Any
                  ) -> dict[str, float]:
    """Range of the stick energies ``total_energy - IP`` over open channels (IP < total).

    From each chunk's ``ip_min`` / ``ip_max`` in the manifest: a chunk whose every
    channel is open gives ``total - ip_max`` and ``total - ip_min`` exactly (float
    subtraction is monotone), a closed chunk gives nothing; only chunks that are
    partly open at this photon energy (or lack the summary) are read.
    """
    E = total_energy
    out = {"e_min": math.inf, "e_max": -math.inf}
    pending = []
    for i, c in enumerate(lz._manifest["chunks"]):
        if "ip_min" not in c:
            pending.append(i)
            continue
        lo, hi = c["ip_min"], c["ip_max"]
        if lo is None or lo >= E:  # no finite IP, or every channel closed
            continue
        if hi < E:
            out = _merge_range(out, {"e_min": E - hi, "e_max": E - lo})
        else:
            pending.append(i)
    if pending:
        tasks = _view_tasks(lz, _energy_range_chunk, E, indices=pending)
        (rest,) = _compute([_tree(tasks, _merge_range)], client=client, scheduler=scheduler,
                           progress=False, desc="energy range")
        out = _merge_range(out, rest)
    return out


def _merge_range(a: dict[str, float], b: dict[str, float]) -> dict[str, float]:
    return {"e_min": min(a["e_min"], b["e_min"]), "e_max": max(a["e_max"], b["e_max"])}


def _chunk_sticks(path: str, index: int, opts: Mapping[str, Any]) -> tuple[Any, Any, np.ndarray]:
    """(chunk ensemble, its TRPESModel, weight of each trajectory of the chunk)."""
    from ..io.chunked import load_chunk
    from .spectroscopy.spectra import prepare_sticks, trajectory_weights

    ens = load_chunk(path, index, fields=_trpes_fields(opts["by"]))
    model = prepare_sticks(ens, probe=opts["probe"], pump=opts["pump"],
                           cross_section=opts["cross_section"], weights=opts["weights"],
                           by=opts["by"], time_step=opts["dt"], order=opts["order"],
                           bins_per_fwhm=opts["bins_per_fwhm"], progress=False)
    w_traj, _ = trajectory_weights(ens, weights=opts["weights"], pump=opts["pump"])
    return ens, model, w_traj


def _trpes_chunk(path: str, index: int, opts: Mapping[str, Any]) -> dict[str, Any]:
    from .spectroscopy import _kernels_trpes as K

    ens, model, w_traj = _chunk_sticks(path, index, opts)
    start, dt, n_time = opts["start"], opts["dt"], opts["n_time"]
    j, frac = _bins(ens.snapshots["time"].to_numpy(), start, dt)
    alive = K.deposit_counts(j, w_traj[ens.traj_index], n_time=n_time, tfrac=frac)
    count = K.deposit_counts(j, np.ones(j.size), n_time=n_time, tfrac=frac)
    sticks = model.sticks
    tb = j[sticks.snapshot]
    tf = None if frac is None else frac[sticks.snapshot]
    grid = {"n_time": n_time, "e_lo": opts["e_lo"], "h": opts["h"], "n_fine": opts["n_fine"],
            "order": opts["order"]}
    hist = K.deposit_moments(tb, sticks.energy, sticks.weight, tfrac=tf, **grid)
    hist_comp = None
    if model.comp is not None:
        src = model.comp_src
        ww = sticks.weight if model.comp_weight is None else model.comp_weight
        hist_comp = K.deposit_moments(
            tb if src is None else tb[src], sticks.energy if src is None else sticks.energy[src],
            ww, comp=model.comp, n_comp=len(model.labels),
            tfrac=None if tf is None else (tf if src is None else tf[src]), **grid)
    return {"alive": alive, "alive_count": count, "hist": hist, "hist_comp": hist_comp,
            "n_sticks": np.int64(sticks.n_sticks), "total_weight": np.array(float(w_traj.sum()))}


def _trpes_chunk_fast(path: str, sub: Mapping[str, Any], opts: Mapping[str, Any]
                      ) -> dict[str, Any]:
    """Moment histograms of one chunk straight from its arrays (no Ensemble, no geometries).

    The sticks are those of :func:`.spectra.prepare_sticks` (same formulas and
    order of operations, so the same floating-point values): one per snapshot and
    open cation channel, energy ``E_probe - (E_cation - E_active)``, weight
    ``w_traj * sigma``. Used for ``by`` in (None, "neutral", "cation", "pair").
    """
    from .spectroscopy import _kernels_trpes as K
    from .spectroscopy.cross_sections import resolve_cross_section
    from .spectroscopy.spectra import trajectory_weights

    names = ["energies", "cation_energies", "dyson"]
    if opts["weights"] == "doorway" and opts["pump"] is not None:
        names += ["excitation_energies", "transition_dipoles", "oscillator_strengths"]
    view = _ChunkView(path, sub, names)
    cs = resolve_cross_section(opts["cross_section"])
    w_traj, _ = trajectory_weights(view, weights=opts["weights"], pump=opts["pump"])
    w_snap = w_traj[view.traj_index]
    start, dt, n_time = opts["start"], opts["dt"], opts["n_time"]
    j, frac = _bins(view.snapshots["time"].to_numpy(), start, dt)
    alive = K.deposit_counts(j, w_snap, n_time=n_time, tfrac=frac)
    count = K.deposit_counts(j, np.ones(j.size), n_time=n_time, tfrac=frac)
    active = view.snapshots["active"].to_numpy()
    e_neutral = view.energies[np.arange(view.n_snapshots), active]
    ip = view.cation_energies - e_neutral[:, None]
    total_energy = opts["probe"].total_energy
    ekin = total_energy - ip
    snap, chan = np.nonzero(ekin > 0)
    dyson = view.active_dyson()
    sigma = np.asarray(cs(dyson[snap, chan], ekin[snap, chan], ip[snap, chan], chan,
                          total_energy), dtype=float)
    if sigma.shape != snap.shape or not np.all(np.isfinite(sigma)) or np.any(sigma < 0):
        raise SchemaError("the cross-section model must return finite values >= 0, one per "
                          "stick.")
    energy = ekin[snap, chan]
    weight = w_snap[snap] * sigma
    tb = j[snap]
    tf = None if frac is None else frac[snap]
    grid = {"n_time": n_time, "e_lo": opts["e_lo"], "h": opts["h"], "n_fine": opts["n_fine"],
            "order": opts["order"], "tfrac": tf}
    hist = K.deposit_moments(tb, energy, weight, **grid)
    hist_comp = None
    by = opts["by"]
    if by is not None:
        n_cat = view.cation_energies.shape[1]
        comp = {"neutral": lambda: active[snap], "cation": lambda: chan,
                "pair": lambda: active[snap] * n_cat + chan}[by]()
        hist_comp = K.deposit_moments(tb, energy, weight, comp=comp, n_comp=opts["n_comp"],
                                      **grid)
    return {"alive": alive, "alive_count": count, "hist": hist, "hist_comp": hist_comp,
            "n_sticks": np.int64(snap.size), "total_weight": np.array(float(w_traj.sum()))}


def _weights_word(lz: LazyEnsemble, weights: str, pump: Any) -> str:
    """``params["weights"]`` of the map (as ``trajectory_weights`` names it), from the manifest."""
    import types

    from .spectroscopy.spectra import trajectory_weights

    if weights == "doorway" and pump is not None and lz.has("excitation_energies") and (
            lz.has("transition_dipoles") or lz.has("oscillator_strengths")):
        return "doorway"
    # every other case looks at the trajectory table only
    table = types.SimpleNamespace(trajectories=lz.trajectories,
                                  n_trajectories=lz.n_trajectories, excitation_energies=None,
                                  transition_dipoles=None, oscillator_strengths=None)
    return trajectory_weights(table, weights=weights, pump=pump)[1]


def _trpes_setup(lz: LazyEnsemble, *, probe: Any, pump: Any, cross_section: Any, weights: str,
                 by: str | None, time_step: float | None, client: Any, scheduler: Any
                 ) -> dict[str, Any]:
    from .spectroscopy.spectra import _BY, _check_nonneg, _check_pulse

    probe = _check_pulse(probe, "probe")
    pump = _check_pulse(pump, "pump", optional=True)
    if by not in _BY:
        raise SchemaError(f"The 'by' parameter must be one of {list(_BY)}. Got {by!r} instead.")
    if not (lz.has("cation_energies") and lz.has("dyson")):
        raise SchemaError(
            "compute_trpes needs ens.cation_energies and ens.dyson (squared Dyson norms). "
            "Hint: load an ensemble whose snapshots carry cation energies and Dyson norms."
        )
    if by == "diabatic" and not lz.has("adt"):
        raise SchemaError("by='diabatic' needs ens.adt (adiabatic-to-diabatic matrices).")
    st = _time_stats(lz, client=client, scheduler=scheduler)
    if time_step is None:
        dt = _median_from_counts(*st["dt"])
        dt = 1.0 if not math.isfinite(dt) else dt
    else:
        dt = _check_nonneg(time_step, "time_step")
        if dt == 0:
            raise SchemaError("The 'time_step' parameter must be > 0.")
    start, n_time = _grid(st["t_min"], st["t_max"], dt)
    return {"probe": probe, "pump": pump, "cross_section": cross_section, "weights": weights,
            "by": by, "dt": dt, "start": start, "n_time": n_time, "t_known": st["t_max"]}


def _weights_chunk(path: str, index: int, opts: Mapping[str, Any]) -> dict[str, Any]:
    """Alive weight on the grid and total trajectory weight of one chunk."""
    from ..io.chunked import load_chunk
    from .spectroscopy import _kernels_trpes as K
    from .spectroscopy.spectra import trajectory_weights

    ens = load_chunk(path, index, fields=["excitation_energies", "transition_dipoles",
                                          "oscillator_strengths"])
    w_traj, used = trajectory_weights(ens, weights=opts["weights"], pump=opts["pump"])
    j, frac = _bins(ens.snapshots["time"].to_numpy(), opts["start"], opts["dt"])
    return {"alive": K.deposit_counts(j, w_traj[ens.traj_index], n_time=opts["n_time"],
                                      tfrac=frac),
            "total_weight": np.array(float(w_traj.sum()))}


def compute_trpes(
    lz: LazyEnsemble,
    *,
    probe: GaussianPulse,
    pump: GaussianPulse | None = None,
    energies: Any,
    delays: Any,
    resolution: float = 0.0,
    convolve: bool = True,
    cross_section: Any = "dyson",
    weights: str = "doorway",
    normalise: str = "alive",
    by: str | None = None,
    progress: bool = True,
    time_step: float | None = None,
    client: Any = None,
    scheduler: Any = None,
) -> TRPESMap:
    """:func:`~ensemblelab.compute_trpes` for a lazy ensemble (see there)."""
    from ..data.spectrum import StickSpectrum
    from .spectroscopy.cross_sections import _describe, resolve_cross_section
    from .spectroscopy.spectra import (
        DEFAULT_BINS_PER_FWHM,
        DEFAULT_ORDER,
        TRPESModel,
        _check_grid,
        _check_nonneg,
    )

    energies = _check_grid(energies, "energies")
    delays = _check_grid(delays, "delays")
    resolution = _check_nonneg(resolution, "resolution")
    if normalise not in ("alive", "initial"):
        raise SchemaError(f"The 'normalise' parameter must be 'alive' or 'initial'. Got "
                          f"{normalise!r} instead.")
    opts = _trpes_setup(lz, probe=probe, pump=pump, cross_section=cross_section,
                        weights=weights, by=by, time_step=time_step, client=client,
                        scheduler=scheduler)
    probe, pump = opts["probe"], opts["pump"]
    cs = resolve_cross_section(cross_section)
    # the word params["weights"] uses, from the manifest and the trajectory table
    weights_used = _weights_word(lz, weights, pump)
    fwhm = math.hypot(probe.effective_spectral_fwhm, resolution)
    h = fwhm / DEFAULT_BINS_PER_FWHM
    erange = _energy_range(lz, probe.total_energy, client=client, scheduler=scheduler)
    e_lo = erange["e_min"] if math.isfinite(erange["e_min"]) else 0.0
    e_hi = erange["e_max"] if math.isfinite(erange["e_max"]) else 0.0
    n_fine = int(math.floor((e_hi - e_lo) / h + 0.5)) + 2
    labels = _labels(lz, by)
    opts.update(e_lo=e_lo, h=h, n_fine=n_fine, order=DEFAULT_ORDER,
                bins_per_fwhm=DEFAULT_BINS_PER_FWHM, n_comp=len(labels))
    if by == "diabatic":  # needs the ADT matrices: the validated-Ensemble path
        tasks = _tasks(lz, _trpes_chunk, opts)
    else:
        tasks = _view_tasks(lz, _trpes_chunk_fast, opts)
    (total,) = _compute([_tree(tasks, _add)], client=client, scheduler=scheduler,
                        progress=progress, desc="TRPES chunks")
    wsum = total
    if total["hist_comp"] is None and by is not None:
        total["hist_comp"] = np.zeros((DEFAULT_ORDER, len(labels), opts["n_time"], n_fine))
    empty = np.zeros(0)
    sticks = StickSpectrum(snapshot=empty.astype(np.int64), traj=empty.astype(np.int64),
                           time=empty, state=empty.astype(np.int64),
                           channel=empty.astype(np.int64), energy=empty, weight=empty)
    n_sticks = int(total["n_sticks"])
    model = TRPESModel(
        sticks=sticks, probe=probe, by=by, labels=labels, grid_start=opts["start"],
        time_step=opts["dt"], n_time=opts["n_time"], alive=wsum["alive"],
        alive_count=wsum.get("alive_count"), total_weight=float(wsum["total_weight"]),
        t_known=float(opts["t_known"]),
        tbin=empty.astype(np.int64), tfrac=None,
        info={"cross_section": _describe(cs), "weights": weights_used, "n_sticks": n_sticks,
              "n_snapshots": lz.n_snapshots, "n_trajectories": lz.n_trajectories,
              "progress": False, "n_states": lz.n_states, "n_cation": lz.n_cation},
        order=DEFAULT_ORDER, bins_per_fwhm=DEFAULT_BINS_PER_FWHM, n_snapshots=lz.n_snapshots,
    )
    model._cache.update(h=h, e_lo=e_lo, n_fine=n_fine, hist=total["hist"],
                        hist_comp=total["hist_comp"] if by is not None else None)
    m = model.broaden(energies=energies, delays=delays, pump=pump, resolution=resolution,
                      convolve=convolve, normalise=normalise)
    object.__setattr__(m, "_model", None)  # the moments live in the chunks, not here
    object.__setattr__(m, "_lazy_grid", {
        "path": str(lz.path), "start": opts["start"], "dt": opts["dt"],
        "n_time": opts["n_time"], "alive": wsum["alive"],
        "total_weight": float(wsum["total_weight"]), "t_known": float(opts["t_known"])})
    return m


def _labels(lz: LazyEnsemble, by: str | None) -> list[str]:
    if by is None:
        return []
    if by == "neutral":
        return list(lz.state_labels)
    if by == "cation":
        return list(lz.cation_labels)
    if by == "pair":
        return [f"{a}->{b}" for a in lz.state_labels for b in lz.cation_labels]
    meta = lz.metadata
    dl = list(meta.get("diabatic_labels") or [f"d{lab}" for lab in lz.state_labels])
    cl = list(meta.get("cation_diabatic_labels") or [f"d{lab}" for lab in lz.cation_labels])
    return [f"{a}->{b}" for a in dl for b in cl]


# ------------------------------------------------------------------------ contributions
def _contrib_chunk(path: str, index: int, opts: Mapping[str, Any]) -> pd.DataFrame:
    """The in-memory ``contributions`` of one chunk, on the ensemble's time grid."""
    import types

    from .spectroscopy.spectra import contributions as contributions_in_memory

    ens, model, _ = _chunk_sticks(path, index, opts)
    j, frac = _bins(ens.snapshots["time"].to_numpy(), opts["start"], opts["dt"])
    snap = model.sticks.snapshot
    model = dataclasses.replace(
        model, grid_start=opts["start"], time_step=opts["dt"], n_time=opts["n_time"],
        alive=opts["alive"], total_weight=opts["total_weight"], t_known=opts["t_known"],
        tbin=j[snap], tfrac=None if frac is None else frac[snap], ens_id=id(ens),
        n_snapshots=ens.n_snapshots, _cache={})
    fake_map = types.SimpleNamespace(params=opts["params"], _model=model)
    out = contributions_in_memory(ens, fake_map, energy_range=opts["energy_range"],
                                  delay_range=opts["delay_range"], by=opts["group"])
    return out.drop(columns=["share"])


def _concat(a: pd.DataFrame, b: pd.DataFrame) -> pd.DataFrame:
    return pd.concat([a, b], ignore_index=True)


def contributions(
    lz: LazyEnsemble,
    trpes_map: TRPESMap,
    *,
    energy_range: Sequence[float],
    delay_range: Sequence[float],
    by: str = "snapshot",
    client: Any = None,
    scheduler: Any = None,
    progress: bool = True,
) -> pd.DataFrame:
    """:func:`~ensemblelab.contributions` for a lazy ensemble (see there)."""

    e1, e2 = (float(x) for x in energy_range)
    t1, t2 = (float(x) for x in delay_range)
    if not (e2 > e1 and t2 > t1):
        raise SchemaError(f"energy_range and delay_range must be (low, high) with low < high; "
                          f"got {energy_range!r}, {delay_range!r}.")
    if by not in ("snapshot", "traj") and by not in lz.columns:
        raise SchemaError(f"The 'by' parameter must be 'snapshot', 'traj' or a column of "
                          f"ens.snapshots {lz.columns}. Got {by!r} instead.")
    from .spectroscopy.spectra import _settings_from_params

    p = trpes_map.params
    probe, pump, cs, weights = _settings_from_params(p)
    grid = getattr(trpes_map, "_lazy_grid", None)
    if not (isinstance(grid, dict) and grid.get("path") == str(lz.path)):
        opts = _trpes_setup(lz, probe=probe, pump=pump, cross_section=cs, weights=weights,
                            by=None, time_step=p.get("time_step"), client=client,
                            scheduler=scheduler)
        (wsum,) = _compute([_tree(_tasks(lz, _weights_chunk, opts), _add)], client=client,
                           scheduler=scheduler, progress=False, desc="alive weights")
        grid = {"start": opts["start"], "dt": opts["dt"], "n_time": opts["n_time"],
                "alive": wsum["alive"], "total_weight": float(wsum["total_weight"]),
                "t_known": float(opts["t_known"])}
    opts = {"probe": probe, "pump": pump, "cross_section": cs, "weights": weights, "by": None,
            "order": 1, "bins_per_fwhm": 8.0, "params": dict(p), "group": by,
            "energy_range": (e1, e2), "delay_range": (t1, t2), **grid}
    opts.pop("path", None)
    (out,) = _compute([_tree(_tasks(lz, _contrib_chunk, opts), _concat)], client=client,
                      scheduler=scheduler, progress=progress, desc="contributions")
    if by == "snapshot":
        total = float(out["intensity"].sum())
    else:
        out = out.groupby(by, sort=True, as_index=False)[["intensity", "n_snapshots"]].sum()
        total = float(out["intensity"].sum())
        out = out[out["intensity"] > 0]
        out["n_snapshots"] = out["n_snapshots"].astype(np.int64)
    order = np.argsort(-out["intensity"].to_numpy(), kind="stable")
    out = out.iloc[order].reset_index(drop=True)
    out["share"] = out["intensity"] / total if total > 0 else 0.0
    out.attrs["total"] = total
    out.attrs["energy_range"] = (e1, e2)
    out.attrs["delay_range"] = (t1, t2)
    return out


# ------------------------------------------------------------------------ populations
def _pop_chunk(path: str, sub: Mapping[str, Any], opts: Mapping[str, Any]) -> dict[str, Any]:
    from .kinetics import _kernels_populations as _k
    from .kinetics.populations import _weighted_sums

    kind = opts["kind"]
    fields = {"active": [], "amplitudes": ["amplitudes"], "diabatic": ["adt"]}[kind]
    ens = _ChunkView(path, sub, fields)
    grid = opts["grid"]
    lo = sub["chunks"][0]["traj_row_start"]
    w = opts["w"][lo:lo + ens.n_trajectories]
    n_traj, n_states, n_times = ens.n_trajectories, ens.n_states, grid.size
    idx_all = _k.sample_on_grid(ens.traj_index, ens.snapshots["time"].to_numpy(), n_traj, grid)
    idx_all[w <= 0] = -1
    counts = opts.get("counts")
    if counts is not None:
        counts = counts[:, lo:lo + n_traj]
    return _weighted_sums(ens, kind, idx_all, w, counts, n_times=n_times, n_states=n_states)


def populations(
    lz: LazyEnsemble,
    *,
    kind: str = "active",
    weights: Any = None,
    ci: float = 0.95,
    method: str = "wilson",
    time_grid: Any = None,
    n_boot: int = 1000,
    random_state: Any = 0,
    exclude: Any = None,
    states: Sequence[int] | None = None,
    client: Any = None,
    scheduler: Any = None,
    progress: bool = True,
) -> pd.DataFrame:
    """:func:`~ensemblelab.populations` for a lazy ensemble (see there)."""

    from .kinetics import _kernels_populations as _k
    from .kinetics.populations import (
        _check_arguments,
        _excluded_mask,
        _finish,
        _resolve_grid,
        _resolve_weights,
    )

    _check_arguments(lz, kind=kind, method=method, ci=ci, n_boot=n_boot)
    w, wlabel = _resolve_weights(lz, weights)
    grid = _resolve_grid(lz, time_grid)
    excluded = _excluded_mask(lz, exclude)
    w = np.where(excluded, 0.0, w)
    n_traj, n_states, n_times = lz.n_trajectories, lz.n_states, grid.size
    opts: dict[str, Any] = {"kind": kind, "grid": grid, "w": w}
    if method == "bootstrap":
        rng = np.random.default_rng(random_state)
        opts["counts"] = _k.bootstrap_counts(n_traj, int(n_boot), rng)
    (tot,) = _compute([_tree(_view_tasks(lz, _pop_chunk, opts), _add)], client=client,
                      scheduler=scheduler, progress=progress, desc="population chunks")
    num, w_alive, w2, n_alive = tot["num"], tot["w_alive"], tot["w2"], tot["n_alive"]
    boot = None
    if method == "bootstrap":
        with np.errstate(divide="ignore", invalid="ignore"):
            boot = tot["boot_num"].reshape(-1, n_times, n_states) / tot["boot_den"][:, :, None]
    return _finish(lz, grid=grid, num=num, w_alive=w_alive, w2=w2, n_alive=n_alive, boot=boot,
                   states=states, kind=kind, method=method, ci=ci, wlabel=wlabel, n_boot=n_boot,
                   excluded=excluded, stacklevel=4)


# ------------------------------------------------------------------------ trajectory flags
def _flags_chunk(path: str, index: int, opts: Mapping[str, Any]) -> dict[str, Any]:
    from ..io.chunked import load_chunk
    from .structures.outliers import flag_trajectories as flag_in_memory

    ens = load_chunk(path, index)
    table = flag_in_memory(ens, thresholds=opts["th"], multivariate=False,
                           chunk_size=opts["chunk_size"])
    tix = ens.traj_index
    time = ens.snapshots["time"].to_numpy()
    same = np.r_[False, tix[1:] == tix[:-1]]
    dt_all = np.diff(time)[same[1:]] if ens.n_snapshots > 1 else np.zeros(0)
    local_med = float(np.median(dt_all)) if dt_all.size else math.nan
    hops = ens.hops()
    n_hops = np.bincount(np.searchsorted(ens.trajectories["traj"].to_numpy(),
                                         hops["traj"].to_numpy()),
                         minlength=ens.n_trajectories).astype(np.float64)
    finite = np.isfinite(ens.geometries).all(axis=(1, 2))
    e_act = ens.energies[np.arange(ens.n_snapshots), ens.snapshots["active"].to_numpy()]
    e_act = np.where(np.isfinite(e_act), e_act, np.nan)
    e_mean = pd.Series(e_act).groupby(tix).mean().reindex(
        range(ens.n_trajectories)).to_numpy()
    return {"table": table, "n_hops": n_hops, "n_finite": int(finite.sum()),
            "e_mean": e_mean, "local_median": local_med}


def _gather_chunk(path: str, index: int, positions: np.ndarray) -> np.ndarray:
    """Geometries (float64) of the finite rows number `positions` (within the chunk)."""
    from ..io.chunked import load_chunk_array

    geoms = load_chunk_array(path, index, "geometries", mmap=True)
    finite = np.isfinite(geoms).all(axis=(1, 2))
    rows = np.flatnonzero(finite)[positions]
    return np.asarray(geoms[rows], dtype=np.float64)


def _rmsd_chunk(path: str, index: int, ref: np.ndarray) -> dict[str, np.ndarray]:
    from ..io.chunked import load_chunk
    from .structures.geometry import rmsd

    ens = load_chunk(path, index, fields=["geometries"])
    finite = np.isfinite(ens.geometries).all(axis=(1, 2))
    fin_rows = np.flatnonzero(finite)
    rm = np.full(ens.n_snapshots, np.nan)
    if fin_rows.size:
        rm[fin_rows] = rmsd(ens.geometries[fin_rows], ref)
    g = pd.DataFrame({"t": ens.traj_index, "r": rm}).groupby("t")["r"]
    rng = range(ens.n_trajectories)
    return {"mean": g.mean().reindex(rng).to_numpy(), "max": g.max().reindex(rng).to_numpy()}


def _thresholds(thresholds: Any) -> Any:
    from .structures.outliers import resolve_thresholds

    return resolve_thresholds(thresholds)


def flag_trajectories(
    lz: LazyEnsemble,
    *,
    thresholds: Any = None,
    multivariate: bool = True,
    random_state: int = 0,
    chunk_size: int = 65536,
    client: Any = None,
    scheduler: Any = None,
    progress: bool = True,
) -> pd.DataFrame:
    """:func:`~ensemblelab.flag_trajectories` for a lazy ensemble (see there).

    The rule-based checks run per chunk with the ensemble-wide expected end time
    and tolerance. One caveat: the missing-steps rule uses the median step of
    each chunk's own trajectories; when that differs from the ensemble median an
    EnsembleWarning says so (regular time steps, the normal case, give equal medians).
    """
    th = _thresholds(thresholds)
    dt_med = median_step(lz, client=client, scheduler=scheduler)
    t_end_all = lz.trajectories["t_end"].to_numpy(dtype=np.float64)
    t_ref = th.expected_t_end if th.expected_t_end is not None else (
        float(t_end_all.max()) if lz.n_trajectories else 0.0)
    tol = th.end_tolerance if th.end_tolerance is not None else (
        1.5 * dt_med if np.isfinite(dt_med) else 0.0)
    th_chunk = dataclasses.replace(th, expected_t_end=t_ref, end_tolerance=tol)
    opts = {"th": th_chunk, "chunk_size": chunk_size}
    parts = _compute(_tasks(lz, _flags_chunk, opts), client=client, scheduler=scheduler,
                     progress=progress, desc="flag chunks")
    meds = np.array([p["local_median"] for p in parts])
    differs = np.isfinite(meds) & np.isfinite(dt_med) & (meds != dt_med)
    if np.any(differs):
        warnings.warn(
            f"flag_trajectories: the median time step of {int(differs.sum())} chunk(s) differs "
            f"from the ensemble median ({dt_med:.6g} fs); their missing-steps check used the "
            "chunk's own median.", EnsembleWarning, stacklevel=3)
    table = pd.concat([p["table"] for p in parts], ignore_index=True)
    n_traj = len(table)
    if multivariate and n_traj >= 8:
        score, unusual = _multivariate_lazy(lz, parts, table, th, random_state,
                                            client=client, scheduler=scheduler)
        table["score"] = score
        table["unusual"] = unusual
        text = [f"unusual trajectory (isolation-forest score {score[r]:.3g}, among the "
                f"{th.contamination:.0%} most atypical)" for r in range(n_traj)]
        flags = table["flags"].tolist()
        reason = table["reason"].tolist()
        flagged = table["flagged"].to_numpy().copy()
        n_flags = table["n_flags"].to_numpy().copy()
        for r in np.flatnonzero(unusual):
            flags[r] = f"{flags[r]};unusual" if flags[r] else "unusual"
            reason[r] = f"{reason[r]}; {text[r]}" if reason[r] else text[r]
            n_flags[r] += 1
            if "unusual" in th.broken_kinds:
                flagged[r] = True
        table["flags"], table["reason"] = flags, reason
        table["flagged"], table["n_flags"] = flagged, n_flags
    return table


def _multivariate_lazy(lz: LazyEnsemble, parts: Sequence[Mapping[str, Any]],
                       table: pd.DataFrame, th: Any, random_state: int, *, client: Any,
                       scheduler: Any) -> tuple[np.ndarray, np.ndarray]:
    """The isolation-forest score of ``outliers._multivariate``, assembled from chunks."""
    from sklearn.ensemble import IsolationForest
    from sklearn.preprocessing import RobustScaler

    from .structures.geometry import mean_structure

    dask = _dask()
    n_fin = np.array([p["n_finite"] for p in parts], dtype=np.int64)
    total_fin = int(n_fin.sum())
    rng = np.random.default_rng(random_state)
    if total_fin <= 5000:
        pos = np.arange(total_fin)
    else:  # rng.choice(fin_rows, k) == fin_rows[rng.choice(len(fin_rows), k)]
        pos = np.sort(rng.choice(total_fin, 5000, False))
    feats = [table[c].to_numpy(np.float64) for c in ("max_drift", "max_jump")]
    feats.append(np.concatenate([p["n_hops"] for p in parts]))
    feats += [table[c].to_numpy(np.float64) for c in ("max_hop_gap", "t_end")]
    if pos.size:
        offsets = np.r_[0, np.cumsum(n_fin)]
        gathers = []
        path = str(lz.path)
        for i in range(len(parts)):
            sel = pos[(pos >= offsets[i]) & (pos < offsets[i + 1])] - offsets[i]
            if sel.size:
                gathers.append(dask.delayed(_gather_chunk, pure=True)(path, i, sel))
        geoms = _compute(gathers, client=client, scheduler=scheduler, progress=False,
                         desc="subsample")
        ref, _ = mean_structure(np.concatenate(geoms), max_iter=10, tol=1e-6)
        rms = _compute(_tasks(lz, _rmsd_chunk, ref), client=client, scheduler=scheduler,
                       progress=False, desc="rmsd")
        feats += [np.concatenate([r["mean"] for r in rms]),
                  np.concatenate([r["max"] for r in rms])]
    feats.append(np.concatenate([p["e_mean"] for p in parts]))
    F = np.column_stack(feats).astype(np.float64)
    n = F.shape[0]
    keep = np.isfinite(F).any(axis=0) & (np.nanstd(F, axis=0) > 0)
    F = F[:, keep]
    if F.shape[1] == 0:
        return np.full(n, np.nan), np.zeros(n, bool)
    med = np.nanmedian(F, axis=0)
    F = np.where(np.isfinite(F), F, med)
    F = RobustScaler().fit_transform(F)
    forest = IsolationForest(n_estimators=200, contamination=th.contamination,
                             random_state=random_state).fit(F)
    return -forest.score_samples(F), forest.predict(F) == -1
