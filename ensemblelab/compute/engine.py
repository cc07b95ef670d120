"""One reduction engine for in-memory ensembles and chunked stores.

Every ensemble-wide computation that can be split by trajectories (TRPES maps,
contributions, populations, trajectory flags) is written once, as three functions:

* ``partial(block, span, *args)``: the partial result of one *block* of whole
  trajectories (an array sum, a small table);
* ``combine(a, b)``: merge two partial results (associative; ``add`` for sums);
* ``finish(total)``: turn the combined result into the answer.

:func:`reduce` runs them over a :class:`BlockSource`. An in-memory
:class:`~ensemblelab.Ensemble` is one block (the ensemble itself; no Dask, no copy),
so ``finish(partial(ens, span))`` is what the in-memory path computes. A chunked
store (:class:`ensemblelab.io.lazy.LazyEnsemble`) is many blocks, one per chunk, each
read by its own task; the tasks run under Dask (``client=`` a
``dask.distributed.Client``, or a local ``scheduler``) and their results are
combined in a tree. Differences between the two come only from the order of
floating-point additions.

A block is any object with the attributes of an :class:`~ensemblelab.Ensemble` that a
partial reads: ``snapshots`` (the columns asked for), ``trajectories``,
``n_snapshots``, ``n_trajectories``, ``n_states``, ``traj_index`` and the per-snapshot
or per-trajectory arrays asked for (None when absent, float64). The source hands
out *loaders* (picklable callables returning a block), so on a cluster each task reads
its own chunk and nothing large travels; compute never imports io.
"""

from __future__ import annotations

import math
import sys
from collections.abc import Callable, Iterable, Mapping, Sequence
from typing import Any

import numpy as np

from .._optional import import_optional
from ..data.blocks import BlockSource, BlockSpan
from ..data.ensemble import Ensemble

__all__ = ["BlockSpan", "BlockSource", "EnsembleSource", "as_source", "is_chunked", "reduce",
           "add", "time_statistics", "median_from_counts"]


def _identity(obj: Any) -> Any:
    return obj


class EnsembleSource:
    """An in-memory :class:`~ensemblelab.Ensemble` as a source of one block (itself)."""

    def __init__(self, ens: Ensemble) -> None:
        self.ens = ens
        self.trajectories = ens.trajectories
        self.state_labels = tuple(ens.state_labels)
        self.cation_labels = tuple(ens.cation_labels)
        self.metadata = ens.metadata

    @property
    def n_trajectories(self) -> int:
        return self.ens.n_trajectories

    @property
    def n_snapshots(self) -> int:
        return self.ens.n_snapshots

    @property
    def n_states(self) -> int:
        return self.ens.n_states

    @property
    def n_cation(self) -> int:
        return self.ens.n_cation

    @property
    def columns(self) -> list[str]:
        return list(self.ens.snapshots.columns)

    @property
    def times(self) -> np.ndarray:
        return self.ens.times

    def has(self, name: str) -> bool:
        return getattr(self.ens, name, None) is not None

    def spans(self) -> list[BlockSpan]:
        return [BlockSpan(0, 0, self.ens.n_trajectories, self.ens.n_snapshots)]

    def block_loaders(self, fields: Iterable[str] | None = None,
                      columns: Iterable[str] | None = None) -> list[Callable[[], Any]]:
        import functools

        return [functools.partial(_identity, self.ens)]


def is_chunked(obj: object) -> bool:
    """True for a source of many blocks (a chunked store), False for an Ensemble."""
    return not isinstance(obj, Ensemble) and isinstance(obj, BlockSource)


def as_source(obj: Any, *, what: str = "ens") -> BlockSource:
    """An Ensemble wrapped as a one-block source; a block source as it is."""
    from ..errors import SchemaError

    if isinstance(obj, Ensemble):
        return EnsembleSource(obj)
    if isinstance(obj, BlockSource):
        return obj
    raise SchemaError(f"The {what!r} parameter must be an Ensemble or a lazy (chunked) "
                      f"ensemble. Got {type(obj).__name__} instead.")


# ------------------------------------------------------------------------ combining
def add(a: Any, b: Any) -> Any:
    """Sum of two partial results: arrays add, dicts add key by key, None is zero."""
    if isinstance(a, dict):
        return {k: add(a[k], b[k]) for k in a}
    if a is None:
        return b
    if b is None:
        return a
    return a + b


def _run(loader: Callable[[], Any], span: BlockSpan, partial: Callable[..., Any],
         *args: Any) -> Any:
    return partial(loader(), span, *args)


def _dask() -> Any:
    return import_optional("dask", extra="dask", purpose="computations on lazy ensembles")


def _tree(parts: list[Any], combine: Callable[[Any, Any], Any]) -> Any:
    dask = _dask()
    while len(parts) > 1:
        nxt = [dask.delayed(combine, pure=True)(parts[i], parts[i + 1])
               for i in range(0, len(parts) - 1, 2)]
        if len(parts) % 2:
            nxt.append(parts[-1])
        parts = nxt
    return parts[0]


def _has_default_client() -> bool:
    if "distributed" not in sys.modules:  # no client can exist before it is imported
        return False
    try:
        from distributed import default_client

        default_client()
    except (ImportError, ValueError):
        return False
    return True


def _compute(objs: Sequence[Any], *, client: Any, scheduler: Any, progress: bool,
             desc: str) -> tuple[Any, ...]:
    dask = _dask()
    if client is not None:
        return tuple(dask.compute(*objs, scheduler=client))
    if progress and scheduler != "distributed" and not _has_default_client():
        from dask.callbacks import Callback
        from tqdm.auto import tqdm

        class _Bar(Callback):  # a tqdm bar over finished tasks (local schedulers)
            def _start_state(self, dsk: Any, state: Any) -> None:
                total = sum(len(state[k]) for k in ("ready", "waiting", "running"))
                self.bar = tqdm(total=total, desc=desc, unit="task", leave=False)

            def _posttask(self, key: Any, result: Any, dsk: Any, state: Any, wid: Any) -> None:
                self.bar.update(1)

            def _finish(self, dsk: Any, state: Any, errored: bool) -> None:
                self.bar.close()

        with _Bar():
            return tuple(dask.compute(*objs, scheduler=scheduler))
    return tuple(dask.compute(*objs, scheduler=scheduler))


def reduce(
    source: BlockSource,
    partial: Callable[..., Any],
    combine: Callable[[Any, Any], Any] | None,
    finish: Callable[[Any], Any] | None = None,
    *,
    args: Sequence[Any] = (),
    fields: Iterable[str] | None = None,
    columns: Iterable[str] | None = None,
    indices: Sequence[int] | None = None,
    client: Any = None,
    scheduler: Any = None,
    progress: bool = False,
    desc: str = "blocks",
) -> Any:
    """Reduce a source block by block: ``finish(combine(partial(b1), partial(b2), ...))``.

    Parameters
    ----------
    source : BlockSource
        The blocks (:func:`as_source` turns an Ensemble into one).
    partial : callable
        ``partial(block, span, *args)`` -> partial result of one block.
    combine : callable or None
        ``combine(a, b)`` -> merged result (associative). None: the partial results
        are returned as a list, in block order.
    finish : callable, optional
        Applied to the combined result (default: none).
    args : sequence
        Extra arguments of `partial`; mappings among them are shipped to a cluster
        once, not once per block.
    fields, columns : iterable of str, optional
        Arrays and extra snapshot columns the partial reads (see
        :meth:`BlockSource.block_loaders`).
    indices : sequence of int, optional
        Reduce only these blocks (default all).
    client : dask.distributed.Client, optional
        Run the block tasks on this cluster.
    scheduler : str, optional
        Dask scheduler (``"threads"``, ``"processes"``, ``"synchronous"``) without a
        client; default Dask's default.
    progress : bool
        A progress bar over the tasks (local schedulers).
    desc : str
        Label of the progress bar.

    Returns
    -------
    object
        What `finish` returns. A single block is reduced in this process without
        Dask; several blocks need Dask (the ``dask`` extra).

    Examples
    --------
    >>> from ensemblelab.testing import make_toy_ensemble
    >>> ens = make_toy_ensemble(5)
    >>> reduce(as_source(ens), lambda b, span: b.n_snapshots, add) == ens.n_snapshots
    True
    """
    spans = source.spans()
    loaders = source.block_loaders(fields, columns)
    idx = list(range(len(spans))) if indices is None else [int(i) for i in indices]
    if len(idx) == 1 and client is None:
        i = idx[0]
        out = partial(loaders[i](), spans[i], *args)
        out = [out] if combine is None else out
        return out if finish is None else finish(out)
    if not idx:
        raise ValueError("reduce() needs at least one block.")
    dask = _dask()
    shared = [dask.delayed(a, traverse=False) if isinstance(a, Mapping) else a for a in args]
    tasks = [dask.delayed(_run, pure=True)(loaders[i], spans[i], partial, *shared) for i in idx]
    if combine is None:
        out = list(_compute(tasks, client=client, scheduler=scheduler, progress=progress,
                            desc=desc))
    else:
        (out,) = _compute([_tree(tasks, combine)], client=client, scheduler=scheduler,
                          progress=progress, desc=desc)
    return out if finish is None else finish(out)


# ------------------------------------------------------------------------ time statistics
def median_from_counts(values: np.ndarray, counts: np.ndarray) -> float:
    """``np.median`` of the multiset {values[i] repeated counts[i] times}, exactly.

    Parameters
    ----------
    values : ndarray, shape (n,)
        Sorted distinct values.
    counts : ndarray of int, shape (n,)
        How often each occurs.

    Returns
    -------
    float
        The median (NaN for an empty multiset).
    """
    n = int(counts.sum())
    if n == 0:
        return math.nan
    cum = np.cumsum(counts)
    if n % 2:
        return float(values[np.searchsorted(cum, n // 2, side="right")])
    a = values[np.searchsorted(cum, n // 2 - 1, side="right")]
    b = values[np.searchsorted(cum, n // 2, side="right")]
    return float(np.mean(np.array([a, b])))


def _merge_counts(a: tuple[np.ndarray, np.ndarray], b: tuple[np.ndarray, np.ndarray]
                  ) -> tuple[np.ndarray, np.ndarray]:
    v = np.concatenate([a[0], b[0]])
    c = np.concatenate([a[1], b[1]])
    u, inv = np.unique(v, return_inverse=True)
    return u, np.bincount(inv, c, minlength=u.size).astype(np.int64)


def _merge_time_stats(a: dict[str, Any], b: dict[str, Any]) -> dict[str, Any]:
    return {"t_min": min(a["t_min"], b["t_min"]), "t_max": max(a["t_max"], b["t_max"]),
            "dt": _merge_counts(a["dt"], b["dt"])}


def _time_stats_partial(block: Any, span: BlockSpan) -> dict[str, Any]:
    time = block.snapshots["time"].to_numpy()
    traj = block.snapshots["traj"].to_numpy()
    dt = np.diff(time)[traj[1:] == traj[:-1]]
    if dt.size and dt.min() == dt.max():  # one step everywhere: no sort needed
        u, c = dt[:1].copy(), np.array([dt.size], dtype=np.int64)
    else:
        u, c = np.unique(dt, return_counts=True)
    return {"t_min": float(time.min()) if time.size else math.inf,
            "t_max": float(time.max()) if time.size else -math.inf, "dt": (u, c)}


def time_statistics(source: BlockSource, *, client: Any = None, scheduler: Any = None
                    ) -> dict[str, Any]:
    """Time range and time-step counts of a source (from block summaries where known).

    Returns
    -------
    dict
        ``t_min``, ``t_max`` (fs; +-inf when empty), ``dt`` (distinct time steps within
        trajectories and their counts) and ``median_step`` (fs; NaN when unknown).
    """
    total: dict[str, Any] = {"t_min": math.inf, "t_max": -math.inf,
                             "dt": (np.zeros(0), np.zeros(0, dtype=np.int64))}
    pending = []
    for span in source.spans():
        s = span.summary
        if "dt_values" not in s:
            pending.append(span.index)
        elif span.n_snapshots:
            total = _merge_time_stats(total, {
                "t_min": float(s["t_min"]), "t_max": float(s["t_max"]),
                "dt": (np.asarray(s["dt_values"], dtype=np.float64),
                       np.asarray(s["dt_counts"], dtype=np.int64))})
    if pending:
        rest = reduce(source, _time_stats_partial, _merge_time_stats, fields=[],
                      indices=pending, client=client, scheduler=scheduler, desc="time grid")
        total = _merge_time_stats(total, rest)
    total["median_step"] = median_from_counts(*total["dt"])
    return total
