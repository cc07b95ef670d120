"""Electronic-state populations of an ensemble, with honest intervals.

Three kinds of population:

* ``"active"`` (classical): the weighted fraction of alive trajectories whose
  active state is i, ``P_i(t) = sum_n w_n delta(a_n(t), i) / sum_n w_n``.
* ``"amplitudes"`` (quantum): the weighted mean of ``|c_{n,i}(t)|^2``.
* ``"diabatic"``: the weighted mean of ``U[a_n(t), d]^2``, the diabatic
  character of the active adiabatic state, with the convention of
  :attr:`Ensemble.adt`: ``adiabatic_a = sum_d U[a, d] diabatic_d``.

Alive mask. A trajectory is *alive* at time t when ``t_start <= t <= t_end``
(its first and last snapshot times), it is not in `exclude`, and its weight is
positive. Only alive trajectories enter the average at t; ``n_alive`` and the
Kish effective size ``n_eff = (sum w)^2 / sum w^2`` are reported per time.

Absorbing state. A trajectory whose last snapshot is on the absorbing state
(``ens.absorbing_state``: by default the lowest neutral state, set by
``metadata["absorbing_state"]``; or the `absorbing_state` argument) was stopped
there on purpose, as dynamics codes commonly do once the ground state is reached.
It stays alive after its end, holding its last snapshot's values, up to the end of
the ensemble (the latest ``t_end``). Trajectories that end early on another state
keep the alive handling above and are listed in ``attrs["ended_early"]``.

Time grid. ``time_grid=None`` uses the ensemble's unique snapshot times.
Otherwise each trajectory is sampled at its *nearest previous* step (the last
snapshot with ``time <= t``), which never looks into the future of a trajectory
and keeps the active state piecewise constant as surface hopping defines it.

Intervals. ``interval="wilson"`` uses the Wilson score interval (7.1) with the
weighted fraction and ``n_eff`` (exact for unweighted active-state fractions;
for the fractional kinds ``"amplitudes"``/``"diabatic"`` it is the usual
approximation that treats the mean as a proportion -- prefer the bootstrap
there). ``interval="bootstrap"`` resamples whole trajectories with replacement
(``n_boot`` resamples, seeded by `random_state`) and reports percentiles; the
resampling is done for all resamples at once by matrix products.

:func:`populations` is one reduction of :mod:`ensemblelab.compute.engine`: each block of
whole trajectories (the in-memory ensemble, or one chunk of a chunked store) gives its
weighted sums (:func:`population_partial`), which add up; intervals come last.
"""

from __future__ import annotations

import warnings
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt
import pandas as pd
from scipy.stats import norm

from ...errors import EnsembleWarning, SchemaError
from ..engine import BlockSpan, add, as_source, reduce
from . import _kernels_populations as _k

if TYPE_CHECKING:
    from ...data.blocks import BlockSource
    from ...data.ensemble import Ensemble

__all__ = [
    "populations",
    "population_arrays",
    "population_consistency",
    "PopulationArrays",
    "POPULATION_KINDS",
    "population_partial",
]

#: the kinds of population :func:`populations` computes
POPULATION_KINDS = ("active", "amplitudes", "diabatic")

_BLOCK = 256  # trajectories per block when accumulating (bounds the memory)


@dataclass(frozen=True)
class PopulationArrays:
    """Per-trajectory state values on a common time grid (input of fits and bootstraps).

    Attributes
    ----------
    times : ndarray, shape (n_times,)
        Time grid in fs.
    values : ndarray, shape (n_traj, n_times, n_states)
        Per-trajectory value of each state (indicator, ``|c|^2`` or ``U^2``), 0 where
        not alive.
    alive : ndarray of bool, shape (n_traj, n_times)
    weights : ndarray, shape (n_traj,)
        Trajectory weights (0 for excluded trajectories).
    traj : ndarray of int, shape (n_traj,)
        Trajectory ids, aligned to the first axis.
    labels : tuple of str
        State labels.
    kind : str
        The population kind.
    """

    times: np.ndarray
    values: np.ndarray
    alive: np.ndarray
    weights: np.ndarray
    traj: np.ndarray
    labels: tuple[str, ...]
    kind: str

    def mean(self) -> np.ndarray:
        """Weighted populations, shape (n_times, n_states)."""
        return _k.weighted_populations(self.values, self.alive, self.weights)["population"]

    def bootstrap(self, counts: np.ndarray) -> np.ndarray:
        """Populations of resamples given counts (n_boot, n_traj): (n_boot, n_times, n_states)."""
        return _k.bootstrap_populations(self.values, self.alive, self.weights, counts)


# ---------------------------------------------------------------- validation helpers
def _resolve_weights(ens: Ensemble | BlockSource, weights: Any) -> tuple[np.ndarray, str]:
    trajs = ens.trajectories
    n = len(trajs)
    w: np.ndarray
    if weights is None:
        return trajs["weight"].to_numpy(np.float64), "weight"
    if isinstance(weights, str):
        if weights == "uniform":
            return np.ones(n), "uniform"
        if weights not in trajs.columns:
            raise SchemaError(
                f"The 'weights' parameter of populations names column {weights!r}, which the "
                f"trajectories table does not have; found {list(trajs.columns)}. Hint: use None "
                "(the 'weight' column), 'uniform', a column name or an array per trajectory."
            )
        w = pd.to_numeric(trajs[weights], errors="coerce").to_numpy(np.float64)
        label = weights
    else:
        w = np.asarray(weights, dtype=np.float64)
        label = "array"
        if w.shape != (n,):
            raise SchemaError(
                f"The 'weights' parameter of populations must have shape (n_trajectories={n},) "
                f"(one weight per row of ens.trajectories); got shape {w.shape}."
            )
    if not np.all(np.isfinite(w)) or np.any(w < 0):
        bad = np.flatnonzero(~np.isfinite(w) | (w < 0))[:5]
        raise SchemaError(
            f"The 'weights' parameter of populations must be finite and >= 0; rows {bad.tolist()} "
            f"have {w[bad].tolist()}."
        )
    return w, label


def _resolve_grid(ens: Ensemble | BlockSource, time_grid: npt.ArrayLike | None) -> np.ndarray:
    if time_grid is None:
        return ens.times
    grid = np.asarray(time_grid, dtype=np.float64).ravel()
    if grid.size == 0 or not np.all(np.isfinite(grid)) or np.any(np.diff(grid) <= 0):
        raise SchemaError(
            "The 'time_grid' parameter of populations must be a non-empty, finite, strictly "
            f"increasing array of times in fs; got {grid[:5]!r} (size {grid.size})."
        )
    return grid


def _check_kind(ens: Any, kind: str) -> None:
    if kind not in POPULATION_KINDS:
        raise SchemaError(
            f"The 'kind' parameter of populations must be one of {POPULATION_KINDS}; got {kind!r}."
        )
    src = as_source(ens)
    if kind == "amplitudes" and not src.has("amplitudes"):
        raise SchemaError(
            "populations(kind='amplitudes') needs ens.amplitudes (|c_i|^2 per snapshot); this "
            "ensemble has none. Hint: use kind='active'."
        )
    if kind == "diabatic" and not src.has("adt"):
        raise SchemaError(
            "populations(kind='diabatic') needs ens.adt (adiabatic-to-diabatic matrices); this "
            "ensemble has none. Hint: compute them first or use kind='active'."
        )


def _excluded_mask(ens: Ensemble | BlockSource,
                   exclude: Iterable[int] | pd.DataFrame | None) -> np.ndarray:
    ids = ens.trajectories["traj"].to_numpy()
    if exclude is None:
        return np.zeros(ids.size, dtype=bool)
    if isinstance(exclude, pd.DataFrame):
        frame = exclude
        if "flagged" in frame.columns:
            frame = frame[frame["flagged"].astype(bool)]
        exclude = frame["traj"].to_numpy()
    ex = np.asarray(list(exclude), dtype=np.int64)
    return np.isin(ids, ex)


def resolve_absorbing(ens: Any, absorbing_state: int | str | None) -> int | None:
    """The absorbing state to use: the ensemble's (``"metadata"``), None or an index."""
    from ...data.ensemble import absorbing_state_of

    n_states = int(ens.n_states)
    if isinstance(absorbing_state, str):
        if absorbing_state != "metadata":
            raise SchemaError(
                f"The 'absorbing_state' parameter must be 'metadata' (the ensemble's "
                f"metadata['absorbing_state'], default 0), None or a state index; got "
                f"{absorbing_state!r}.")
        return absorbing_state_of(ens.metadata, n_states)
    return absorbing_state_of({"absorbing_state": absorbing_state}, n_states)


def held_trajectories(block: Any, absorbing: int | None) -> np.ndarray:
    """Which trajectories of a block end on the absorbing state, shape (n_traj,) bool."""
    n_traj = block.n_trajectories
    if absorbing is None or block.n_snapshots == 0:
        return np.zeros(n_traj, dtype=bool)
    tix = block.traj_index
    last = np.r_[np.flatnonzero(tix[1:] != tix[:-1]), tix.size - 1]
    out = np.zeros(n_traj, dtype=bool)
    out[tix[last]] = block.snapshots["active"].to_numpy()[last] == absorbing
    return out


def _ensemble_end(ens: Any) -> float:
    t_end = ens.trajectories["t_end"].to_numpy(dtype=np.float64)
    return float(t_end.max()) if t_end.size else -np.inf


def _values_block(ens: Ensemble, kind: str, idx: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Values (nb, n_times, n_states) and alive (nb, n_times) for sampled rows idx."""
    alive = idx >= 0
    safe = np.where(alive, idx, 0)
    n_states = ens.n_states
    active = ens.snapshots["active"].to_numpy()
    if kind == "active":
        vals = (active[safe][..., None] == np.arange(n_states)).astype(np.float64)
    elif kind == "amplitudes":
        vals = np.asarray(ens.amplitudes, dtype=np.float64)[safe]
    else:
        adt = ens.adt
        assert adt is not None  # checked by _check_kind
        vals = adt[safe, active[safe], :] ** 2
    vals *= alive[..., None]
    return vals, alive


def population_arrays(
    ens: Ensemble,
    *,
    kind: str = "active",
    weights: str | npt.ArrayLike | None = None,
    time_grid: npt.ArrayLike | None = None,
    exclude: Iterable[int] | pd.DataFrame | None = None,
    absorbing_state: int | str | None = "metadata",
) -> PopulationArrays:
    """Per-trajectory state values and alive mask on a time grid.

    Parameters
    ----------
    ens : Ensemble
    kind : {"active", "amplitudes", "diabatic"}
        See the module docstring.
    weights : None, "uniform", str or array_like, shape (n_trajectories,)
        None uses ``ens.trajectories["weight"]``; a string names a column of
        ``ens.trajectories``.
    time_grid : array_like, optional
        Times in fs (increasing); default the ensemble's unique times.
    exclude : iterable of int or DataFrame, optional
        Trajectory ids treated as not alive (a flags frame with ``traj`` and
        ``flagged`` columns works too).
    absorbing_state : "metadata", int or None
        Trajectories ending on this state count in it until the ensemble's end
        (module docstring); "metadata" uses ``ens.absorbing_state``, None none.

    Returns
    -------
    PopulationArrays
        Dense arrays of shape (n_traj, n_times, n_states); for very large
        ensembles prefer :func:`populations`, which works block by block.
    """
    _check_kind(ens, kind)
    w, _ = _resolve_weights(ens, weights)
    grid = _resolve_grid(ens, time_grid)
    w = np.where(_excluded_mask(ens, exclude), 0.0, w)
    absorbing = resolve_absorbing(ens, absorbing_state)
    idx = _k.sample_on_grid(ens.traj_index, ens.snapshots["time"].to_numpy(),
                            ens.n_trajectories, grid, hold=held_trajectories(ens, absorbing),
                            hold_until=_ensemble_end(ens))
    idx[w <= 0] = -1
    vals, alive = _values_block(ens, kind, idx)
    return PopulationArrays(times=grid, values=vals, alive=alive, weights=w,
                            traj=ens.trajectories["traj"].to_numpy(),
                            labels=tuple(ens.state_labels), kind=kind)


def populations(
    ens: Ensemble,
    *,
    kind: str = "active",
    weights: str | npt.ArrayLike | None = None,
    ci: float = 0.95,
    interval: str = "wilson",
    time_grid: npt.ArrayLike | None = None,
    n_boot: int = 1000,
    random_state: int | np.random.Generator | None = 0,
    exclude: Iterable[int] | pd.DataFrame | None = None,
    states: Sequence[int] | None = None,
    client: Any = None,
    scheduler: Any = None,
    progress: bool = False,
    absorbing_state: int | str | None = "metadata",
) -> pd.DataFrame:
    """Populations of the electronic states against time, with intervals.

    Parameters
    ----------
    ens : Ensemble or LazyEnsemble
        A lazy (chunked) ensemble is reduced chunk by chunk with Dask.
    kind : {"active", "amplitudes", "diabatic"}
        Classical (active-state) fractions, mean ``|c_i|^2``, or mean diabatic
        character ``U[a, d]^2`` of the active state (see the module docstring).
    weights : None, "uniform", str or array_like, shape (n_trajectories,)
        Trajectory weights: None uses ``ens.trajectories["weight"]``; a string
        names a column of ``ens.trajectories``; an array is aligned to its rows.
    ci : float in (0, 1)
        Confidence level of the interval.
    interval : {"wilson", "bootstrap"}
        Wilson score interval with the Kish effective size, or percentile
        bootstrap over whole trajectories.
    time_grid : array_like, optional
        Times in fs (strictly increasing). Default: the ensemble's unique
        snapshot times. Trajectories are sampled at their nearest previous step.
    n_boot : int
        Number of bootstrap resamples (``interval="bootstrap"``).
    random_state : int, Generator or None
        Seed of the bootstrap.
    exclude : iterable of int or DataFrame, optional
        Trajectory ids to leave out (treated as not alive at every time).
    states : sequence of int, optional
        Only report these states (0-based); populations are still normalised
        over all states.
    client : dask.distributed.Client, optional
        For a lazy ensemble (``load(path, lazy=True)``): run the per-chunk sums on
        this cluster (default: Dask's default scheduler).
    scheduler : str, optional
        For a lazy ensemble without a client: the Dask scheduler.
    progress : bool
        Progress bar over the chunks of a lazy ensemble.
    absorbing_state : "metadata", int or None
        Trajectories whose last snapshot is on this state count in it (holding their
        last values) until the ensemble's end; "metadata" (default) uses
        ``metadata["absorbing_state"]`` (default 0, the lowest neutral state), None
        switches this off (every trajectory leaves the average at its end).

    Returns
    -------
    DataFrame
        Tidy, one row per (time, state): ``time`` (fs), ``state`` (0-based int),
        ``label``, ``population``, ``lower``, ``upper``, ``n_alive`` (alive
        trajectories with positive weight), ``n_eff`` (Kish effective size;
        equals ``n_alive`` for equal weights). Where nothing is alive the
        population and interval are NaN. ``frame.attrs`` records ``kind``,
        ``interval``, ``ci``, ``weights``, ``n_boot``, ``excluded`` (ids),
        ``absorbing_state``, ``absorbed`` (ids of trajectories that ended early on
        the absorbing state and are held there) and ``ended_early`` (ids of the other
        trajectories ending before the last time: they leave the average).

    Examples
    --------
    >>> from ensemblelab.testing import make_toy_ensemble
    >>> ens = make_toy_ensemble(20, seed=1)
    >>> pop = populations(ens, time_grid=[0.0, 100.0])
    >>> pop.loc[pop["time"] == 0.0, "population"].tolist()
    [0.0, 0.0, 1.0]
    >>> bool((pop.groupby("time")["population"].sum() - 1).abs().max() < 1e-12)
    True
    """
    source = as_source(ens)
    _check_arguments(source, kind=kind, interval=interval, ci=ci, n_boot=n_boot)
    w, wlabel = _resolve_weights(source, weights)
    grid = _resolve_grid(source, time_grid)
    excluded = _excluded_mask(source, exclude)
    w = np.where(excluded, 0.0, w)
    n_traj, n_states, n_times = source.n_trajectories, source.n_states, grid.size
    opts: dict[str, Any] = {"kind": kind, "grid": grid, "w": w, "n_states": n_states,
                            "absorbing": resolve_absorbing(source, absorbing_state),
                            "hold_until": _ensemble_end(source)}
    if interval == "bootstrap":
        rng = np.random.default_rng(random_state)
        opts["counts"] = _k.bootstrap_counts(n_traj, int(n_boot), rng)
    fields = {"active": [], "amplitudes": ["amplitudes"], "diabatic": ["adt"]}[kind]
    sums = reduce(source, population_partial, add, args=(opts,), fields=fields, client=client,
                  scheduler=scheduler, progress=progress, desc="population blocks")
    boot = None
    if interval == "bootstrap":
        with np.errstate(divide="ignore", invalid="ignore"):
            boot = sums["boot_num"].reshape(-1, n_times, n_states) / sums["boot_den"][:, :, None]
    return _finish(source, grid=grid, num=sums["num"], w_alive=sums["w_alive"], w2=sums["w2"],
                   n_alive=sums["n_alive"], boot=boot, states=states, kind=kind,
                   interval=interval, ci=ci, wlabel=wlabel, n_boot=n_boot, excluded=excluded,
                   held=sums["held"] > 0, absorbing=opts["absorbing"])


def population_partial(block: Any, span: BlockSpan, opts: dict[str, Any]) -> dict[str, Any]:
    """Weighted sums of one block of whole trajectories (a reduction partial).

    ``opts`` holds ``kind``, the time ``grid``, the weights ``w`` of all trajectories
    (the block's are ``w[span.traj_start:...]``), ``n_states`` and, for the bootstrap,
    the resample ``counts`` (n_boot, n_trajectories).
    """
    lo, n_traj = span.traj_start, block.n_trajectories
    grid = opts["grid"]
    w = opts["w"][lo:lo + n_traj]
    held = held_trajectories(block, opts.get("absorbing"))
    idx = _k.sample_on_grid(block.traj_index, block.snapshots["time"].to_numpy(), n_traj, grid,
                            hold=held, hold_until=opts.get("hold_until", -np.inf))
    idx[w <= 0] = -1
    counts = opts.get("counts")
    if counts is not None:
        counts = counts[:, lo:lo + n_traj]
    out = _weighted_sums(block, opts["kind"], idx, w, counts, n_times=grid.size,
                         n_states=opts["n_states"])
    held_all = np.zeros(opts["w"].size)
    held_all[lo:lo + n_traj] = held
    out["held"] = held_all
    return out


def _weighted_sums(ens: Any, kind: str, idx_all: np.ndarray, w: np.ndarray,
                   counts: np.ndarray | None, *, n_times: int, n_states: int) -> dict[str, Any]:
    """Sums over trajectories of weight x value, weight, weight^2 and alive counts.

    ``idx_all`` (n_traj, n_times) holds the snapshot row of each trajectory at each grid
    time (-1: not alive); ``counts`` (n_boot, n_traj) the bootstrap multiplicities or
    None. Blocks of trajectories keep memory bounded.
    """
    n_traj = idx_all.shape[0]
    if counts is not None:
        boot_num = np.zeros((counts.shape[0], n_times * n_states))
        boot_den = np.zeros((counts.shape[0], n_times))
    num = np.zeros((n_times, n_states))
    w_alive = np.zeros(n_times)
    w2 = np.zeros(n_times)
    n_alive = np.zeros(n_times, dtype=np.int64)
    for s in range(0, n_traj, _BLOCK):
        sl = slice(s, s + _BLOCK)
        vals, alive = _values_block(ens, kind, idx_all[sl])
        wb = w[sl]
        a = alive.astype(np.float64)
        num += np.tensordot(wb, vals, axes=(0, 0))
        w_alive += wb @ a
        w2 += (wb * wb) @ a
        n_alive += alive.sum(axis=0)
        if counts is not None:
            cw = counts[:, sl] * wb[None, :]
            boot_num += cw @ vals.reshape(vals.shape[0], -1)
            boot_den += cw @ a
    out = {"num": num, "w_alive": w_alive, "w2": w2, "n_alive": n_alive}
    if counts is not None:
        out.update(boot_num=boot_num, boot_den=boot_den)
    return out


def _check_arguments(ens: Any, *, kind: str, interval: str, ci: Any, n_boot: Any) -> None:
    """Validate the arguments of populations()."""
    _check_kind(ens, kind)
    if interval not in ("wilson", "bootstrap"):
        raise SchemaError(
            f"The 'interval' parameter of populations must be 'wilson' or 'bootstrap'; got "
            f"{interval!r}."
        )
    if not (isinstance(ci, float | int) and 0.0 < float(ci) < 1.0):
        raise SchemaError(f"The 'ci' parameter of populations must be in (0, 1); got {ci!r}.")
    if interval == "bootstrap" and (int(n_boot) != n_boot or n_boot < 2):
        raise SchemaError(f"The 'n_boot' parameter of populations must be an int >= 2; got "
                          f"{n_boot!r}.")


def _finish(ens: Any, *, grid: np.ndarray, num: np.ndarray, w_alive: np.ndarray,
            w2: np.ndarray, n_alive: np.ndarray, boot: np.ndarray | None, states: Any,
            kind: str, interval: str, ci: float, wlabel: str, n_boot: int,
            excluded: np.ndarray, held: np.ndarray | None = None, absorbing: int | None = None,
            stacklevel: int = 3) -> pd.DataFrame:
    """Fractions, intervals and the tidy frame from the weighted sums over trajectories.

    ``num`` (n_times, n_states) and ``w_alive``/``w2``/``n_alive`` (n_times,) are sums of
    weight x value, weight, weight^2 and alive counts; ``boot`` (n_boot, n_times,
    n_states) holds the bootstrap replicas of the fractions, or None for Wilson.
    """
    n_times, n_states = num.shape
    with np.errstate(divide="ignore", invalid="ignore"):
        pop = num / w_alive[:, None]
        n_eff = np.where(w2 > 0, w_alive * w_alive / w2, 0.0)
    if boot is None:
        z = float(norm.ppf(0.5 + 0.5 * float(ci)))
        lo, hi = _k.wilson_interval(pop, np.broadcast_to(n_eff[:, None], pop.shape), z)
    else:
        alpha = 0.5 * (1.0 - float(ci))
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            lo, hi = np.nanquantile(boot, [alpha, 1.0 - alpha], axis=0)
        dead = w_alive <= 0
        lo[dead], hi[dead] = np.nan, np.nan

    if np.any(n_alive == 0):
        warnings.warn(
            f"populations: no trajectory is alive at {int(np.sum(n_alive == 0))} of {n_times} "
            "grid times; their populations are NaN.", EnsembleWarning, stacklevel=stacklevel)
    keep = np.arange(n_states) if states is None else np.asarray(list(states), dtype=np.int64)
    if keep.size and (keep.min() < 0 or keep.max() >= n_states):
        raise SchemaError(f"The 'states' parameter of populations must hold indices in "
                          f"[0, {n_states - 1}]; got {keep.tolist()}.")
    labels = np.asarray(ens.state_labels, dtype=object)
    frame = pd.DataFrame(
        {
            "time": np.repeat(grid, keep.size),
            "state": np.tile(keep, n_times),
            "label": np.tile(labels[keep], n_times),
            "population": pop[:, keep].ravel(),
            "lower": lo[:, keep].ravel(),
            "upper": hi[:, keep].ravel(),
            "n_alive": np.repeat(n_alive, keep.size),
            "n_eff": np.repeat(n_eff, keep.size),
        }
    )
    t_end = ens.trajectories["t_end"].to_numpy()
    ids = ens.trajectories["traj"].to_numpy()
    if held is None:
        held = np.zeros(ids.size, dtype=bool)
    early = (t_end < grid[-1]) & ~excluded
    frame.attrs.update(
        kind=kind, interval=interval, ci=float(ci), weights=wlabel,
        n_boot=int(n_boot) if interval == "bootstrap" else 0,
        excluded=ids[excluded].tolist(),
        absorbing_state=absorbing,
        absorbed=ids[early & held].tolist(),
        ended_early=ids[early & ~held].tolist(),
    )
    return frame


def population_consistency(ens: Ensemble) -> pd.DataFrame:
    """Per-trajectory gap between the active state and the electronic amplitudes.

    At each snapshot the gap is the total-variation distance
    ``(1/2) sum_i | delta(a, i) - |c_i|^2 |`` (0 when the trajectory sits on the
    state that carries all the amplitude, up to 1). In fewest-switches surface
    hopping the *ensemble* fractions of active states should track the mean
    amplitudes (a consistency diagnostic; J. Chem. Phys. 1990, "Molecular dynamics with
    electronic transitions"); trajectories whose
    gap stays large for long are the ones that break it (frustrated hops,
    decoherence problems).

    Parameters
    ----------
    ens : Ensemble
        Needs ``ens.amplitudes``.

    Returns
    -------
    DataFrame
        One row per trajectory: ``traj``, ``max_gap``, ``mean_gap`` (mean over
        the trajectory's snapshots), ``time_of_max`` (fs), sorted by ``traj``.

    Examples
    --------
    >>> from ensemblelab.testing import make_toy_ensemble
    >>> gaps = population_consistency(make_toy_ensemble(5))
    >>> float(gaps["max_gap"].max())
    0.0
    """
    if ens.amplitudes is None:
        raise SchemaError(
            "population_consistency needs ens.amplitudes (|c_i|^2 per snapshot); this ensemble "
            "has none."
        )
    active = ens.snapshots["active"].to_numpy()
    onehot = active[:, None] == np.arange(ens.n_states)
    gap = 0.5 * np.abs(onehot - np.asarray(ens.amplitudes, dtype=np.float64)).sum(axis=1)
    frame = pd.DataFrame({"traj": ens.snapshots["traj"].to_numpy(), "gap": gap,
                          "time": ens.snapshots["time"].to_numpy()})
    grouped = frame.groupby("traj", sort=True)["gap"]
    at_max = frame.loc[grouped.idxmax().to_numpy(), ["traj", "time"]].set_index("traj")["time"]
    out = pd.DataFrame({"max_gap": grouped.max(), "mean_gap": grouped.mean(),
                        "time_of_max": at_max}).reset_index()
    return out
