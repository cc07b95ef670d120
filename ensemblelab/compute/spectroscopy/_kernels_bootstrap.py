"""Array-level kernels of the trajectory bootstrap of TRPES maps (private).

A bootstrap resample draws the ensemble's trajectories with replacement; trajectory
``n`` appears ``c_bn`` times in resample ``b`` (a multinomial draw, as in
:func:`ensemblelab.compute.kinetics.populations`). Everything a map is made of is
linear in the trajectory weights *before* the normalisation, so resample ``b`` needs
no new sticks: its moment histograms are those of the ensemble's sticks with weights
``c_bn w_s`` (``n`` the stick's trajectory) and its alive weight is
``A_b(t) = sum_n c_bn w_n a_n(t)`` with ``a_n`` the unit alive profile of trajectory
``n`` (:func:`unit_alive`). The ratio ``numerator / alive`` is formed per resample,
numerator and denominator from the same draw.

* :func:`bootstrap_counts` draws the multiplicities, shape (n_boot, n_trajectories).
* :func:`unit_alive` gives the per-trajectory alive profiles of a block.
* :func:`sort_cells` orders a block's sticks by accumulator cell (time bin,
  component, fine bin; a compiled counting sort, made once and reused).
* :func:`deposit_replicates` deposits them for a chunk of resamples and a window of
  time bins at once into an accumulator (component, time, fine bin, moment, resample):
  the resamples innermost, so a stick adds ``moment_k * c[n, :]`` as one contiguous
  vector multiply-add per moment over every resample of the chunk (zeros included;
  the multiplicities as int8 when small integers), four sticks of a cell at a time
  while the cell's rows sit in the first-level cache; threads take disjoint time
  ranges. Compiled with numba when installed (compute-bound: a few times fewer
  cycles per stick and resample than touching one cache line per resample, see
  ``benchmarks/bench_trpes_bootstrap.py``); otherwise one
  :func:`._kernels_deposit.deposit_moments` call per resample.
* :func:`chunk_plan` / :func:`stream_plan` size the chunks of resamples and windows
  of time bins to a memory budget (:func:`replicate_chunk`: resamples per chunk).
* :func:`percentile_summary` turns replicate maps into percentile intervals (those of
  ``np.quantile``) and the relative standard error (:mod:`._kernels_quantiles`: a
  compiled selection of the few order statistics needed, numpy fallback).

:mod:`._kernels_replicate_maps` turns the histograms into maps, all resamples at once.
The naive reference twin is :mod:`._reference_bootstrap` (a loop over resampled
ensembles, each through :func:`~.maps.compute_trpes`); tests compare the two.
"""

from __future__ import annotations

from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from typing import Any, NamedTuple

import numpy as np

from . import _kernels_deposit as KD
from ._kernels_quantiles import percentile_summary

__all__ = ["bootstrap_counts", "unit_alive", "CellSticks", "sort_cells",
           "deposit_replicates", "compact_counts", "per_resample", "replicate_chunk",
           "chunk_plan", "stream_plan", "percentile_summary", "MEMORY_BUDGET",
           "WINDOW_BYTES"]

#: bytes the replicate histograms of one chunk may take (the chunk of resamples shrinks
#: to fit; at least one resample per chunk)
MEMORY_BUDGET = 256 * 2**20


def bootstrap_counts(n_traj: int, n_boot: int, rng: np.random.Generator) -> np.ndarray:
    """How often each trajectory is drawn in each resample, shape (n_boot, n_traj).

    Drawing ``n_traj`` trajectories with replacement, equal probabilities: a
    multinomial draw per resample (row b equals ``np.bincount(indices_b)``).
    """
    out = np.empty((n_boot, n_traj))
    for b in range(n_boot):  # n_traj uniform draws per resample (a multinomial sample;
        # several times faster than rng.multinomial for thousands of trajectories)
        out[b] = np.bincount(rng.integers(0, n_traj, n_traj), minlength=n_traj)
    return out


def unit_alive(traj_index: np.ndarray, tbin: np.ndarray, tfrac: np.ndarray | None,
               has_any: np.ndarray, n_traj: int, n_time: int, *,
               absorbed_traj: np.ndarray, ext_bin: np.ndarray,
               ext_first: np.ndarray) -> np.ndarray:
    """Alive profile of each trajectory of a block for unit weight, shape (n_traj, n_time).

    Each snapshot with data for some channel adds 1 at its grid time (split linearly
    between two grid points like the sticks); a trajectory stopped in the absorbing
    state adds ``ext_first`` at its first grid point after the stop and 1 at every
    later one (as :func:`.sticks.block_alive`). ``sum_n w_n a_n(t)`` is the block's
    alive weight.
    """
    out = np.zeros(n_traj * n_time + 1)
    w = has_any.astype(np.float64)
    ok = (tbin >= 0) & (tbin < n_time)
    key = traj_index * n_time + tbin
    if tfrac is None:
        np.add.at(out, key[ok], w[ok])
    else:
        np.add.at(out, key[ok], (w * (1.0 - tfrac))[ok])
        later = ok & (tfrac > 0) & (tbin + 1 < n_time)
        np.add.at(out, key[later] + 1, (w * tfrac)[later])
    prof = out[:-1].reshape(n_traj, n_time)
    for n, b0, f in zip(absorbed_traj, ext_bin, ext_first, strict=True):
        prof[n, b0] += f
        prof[n, b0 + 1:] += 1.0
    return prof


def replicate_chunk(n_boot: int, per_replicate_bytes: int,
                    budget: int = MEMORY_BUDGET) -> int:
    """Resamples per chunk so that their histograms fit ``budget`` bytes (>= 1)."""
    return int(max(1, min(n_boot, budget // max(per_replicate_bytes, 1))))


def chunk_plan(n_boot: int, n_time: int, per_bin_bytes: int, budget: int = MEMORY_BUDGET
               ) -> list[tuple[int, int]]:
    """Chunks ``(r0, r1)`` of resamples whose histograms over the whole time grid fit
    ``budget`` bytes (``per_bin_bytes``: one resample's histograms of one time bin); a
    chunked store is read once per chunk."""
    n_rep = replicate_chunk(n_boot, per_bin_bytes * n_time, budget)
    return [(r0, min(r0 + n_rep, n_boot)) for r0 in range(0, n_boot, n_rep)]


#: bytes of replicate histograms deposited and broadened in one go when the sticks are at
#: hand (:func:`stream_plan`): small enough to stay in the last-level cache
WINDOW_BYTES = 16 * 2**20


def stream_plan(n_boot: int, n_time: int, per_bin_bytes: int, y_bin_bytes: int,
                budget: int = MEMORY_BUDGET) -> tuple[int, int, int]:
    """Resamples per chunk, time bins per histogram window and per broadened window.

    For an in-memory ensemble (its sorted sticks at hand): the histograms of a few
    time bins (``per_bin_bytes`` each per resample, at most :data:`WINDOW_BYTES` and a
    quarter of ``budget``) are deposited and broadened in energy at once, into a window
    of broadened rows (``y_bin_bytes`` per bin and resample, at most half of
    ``budget``) that then gets the normaliser and the time matrix.
    """
    n_rep = int(max(1, min(n_boot, budget // max(8 * per_bin_bytes, 1))))
    one = per_bin_bytes * n_rep
    n_sub = int(max(1, min(n_time, WINDOW_BYTES // one, (budget // 4) // one)))
    n_big = int(max(n_sub, min(n_time, (budget // 2) // max(y_bin_bytes * n_rep, 1))))
    return n_rep, n_sub, (n_big // n_sub) * n_sub


class CellSticks(NamedTuple):
    """Sticks sorted by accumulator cell (time bin, component, fine bin): see
    :func:`sort_cells`. ``start[k]:start[k + 1]`` are the sticks of cell ``k = (t *
    n_comp + c) * n_fine + b``; ``delta`` their offset from the bin centre over ``h``
    (in [-1/2, 1/2)), ``weight``, ``src`` (block-local trajectory) and ``tfrac`` (share
    going to the next time bin; empty: none)."""

    start: np.ndarray
    delta: np.ndarray
    weight: np.ndarray
    src: np.ndarray
    tfrac: np.ndarray
    n_comp: int
    n_fine: int
    n_bad: int


def _cell_keys(tbin, energy, comp, tfrac, n_time, n_comp, n_fine, shift, inv_h, key, delta
               ):  # pragma: no cover - compiled by numba
    """Cell of every stick (-1 out of range) and its offset; returns the cell counts."""
    counts = np.zeros(n_time * n_comp * n_fine + 1, np.int64)
    fn = float(n_fine)
    for i in range(energy.shape[0]):
        p = energy[i] * inv_h + shift
        tb = tbin[i]
        c = comp[i] if comp.shape[0] else 0
        ok = p >= 0.0 and p < fn and tb >= 0 and tb < n_time and c >= 0 and c < n_comp
        if ok and tfrac.shape[0] and tfrac[i] > 0.0 and tb + 1 >= n_time:
            ok = False
        if not ok:
            key[i] = -1
            continue
        b = np.int64(p)  # p >= 0: truncation = floor = nearest bin centre
        k = (tb * n_comp + c) * n_fine + b
        key[i] = k
        delta[i] = p - b - 0.5
        counts[k + 1] += 1
    return counts


def _cell_scatter(key, start, delta, weight, src, tfrac, o_delta, o_weight, o_src, o_tfrac
                  ):  # pragma: no cover - compiled by numba
    """Counting sort: stick ``i`` goes to the next free slot of its cell."""
    nxt = start[:-1].copy()
    for i in range(key.shape[0]):
        k = key[i]
        if k < 0:
            continue
        j = nxt[k]
        nxt[k] = j + 1
        o_delta[j] = delta[i]
        o_weight[j] = weight[i]
        o_src[j] = src[i]
        if tfrac.shape[0]:
            o_tfrac[j] = tfrac[i]


def _dep_cells(start, delta, weight, src, tfrac, rw, acc, t0, t_lo, t_hi, n_comp, c0
               ):  # pragma: no cover - compiled by numba
    """Deposit the sticks of :func:`sort_cells` for every resample of a chunk.

    ``acc`` (component, time - t0, fine bin, moment, resample) gets the contributions
    landing in time bins ``t_lo <= t < t_hi`` (a stick of bin t adds ``1 - tfrac`` of
    itself to t and ``tfrac`` to t + 1; threads take disjoint time ranges). The sticks
    of one cell come one after another, so the cell's rows (moment, resample) stay in
    the first-level cache; they are added four sticks at a time, each moment's row
    getting ``sum_j moment_jk * rw[src_j, :]`` as contiguous vector multiply-adds over
    the resamples (zeros included): four multiply-adds per load and store of the row.
    ``rw`` (n_traj, n_rep) may hold small integers (int8: a smaller table in cache).
    """
    n_fine = acc.shape[2]
    order = acc.shape[3]
    n_rep = acc.shape[4]
    per_t = n_comp * n_fine
    split = tfrac.shape[0] > 0
    mom = np.zeros((2, 4, order))  # (share to t / to t + 1, stick of the group, moment)
    wb = np.zeros((4, n_rep))  # the group's multiplicities as float64
    for cell in range(max(t_lo - 1, 0) * per_t, t_hi * per_t):
        s0 = start[cell]
        s1 = start[cell + 1]
        if s0 == s1:
            continue
        t = cell // per_t
        rem = cell - t * per_t
        c = rem // n_fine
        b = rem - c * n_fine
        in0 = t >= t_lo
        in1 = split and t + 1 >= t_lo and t + 1 < t_hi
        for g0 in range(s0, s1, 4):
            n_g = min(4, s1 - g0)
            any1 = False
            for j in range(4):
                if j < n_g:
                    s = g0 + j
                    f = tfrac[s] if split else 0.0
                    any1 = any1 or f > 0.0
                    d = delta[s]
                    v = weight[s]
                    for k in range(order):
                        mom[0, j, k] = v * (1.0 - f)
                        mom[1, j, k] = v * f
                        v *= d
                    w = rw[src[s]]
                    for r in range(n_rep):
                        wb[j, r] = w[r]
                else:
                    for k in range(order):
                        mom[0, j, k] = 0.0
                        mom[1, j, k] = 0.0
                    for r in range(n_rep):
                        wb[j, r] = 0.0
            for side in range(2):
                if side == 0 and not in0:
                    continue
                if side == 1 and not (in1 and any1):
                    continue
                blk = acc[c0 + c, t + side - t0, b]
                if order == 8:  # unrolled: the common case
                    m = mom[side]
                    m00, m01, m02, m03 = m[0, 0], m[0, 1], m[0, 2], m[0, 3]
                    m04, m05, m06, m07 = m[0, 4], m[0, 5], m[0, 6], m[0, 7]
                    m10, m11, m12, m13 = m[1, 0], m[1, 1], m[1, 2], m[1, 3]
                    m14, m15, m16, m17 = m[1, 4], m[1, 5], m[1, 6], m[1, 7]
                    m20, m21, m22, m23 = m[2, 0], m[2, 1], m[2, 2], m[2, 3]
                    m24, m25, m26, m27 = m[2, 4], m[2, 5], m[2, 6], m[2, 7]
                    m30, m31, m32, m33 = m[3, 0], m[3, 1], m[3, 2], m[3, 3]
                    m34, m35, m36, m37 = m[3, 4], m[3, 5], m[3, 6], m[3, 7]
                    for r in range(n_rep):
                        x0 = wb[0, r]
                        x1 = wb[1, r]
                        x2 = wb[2, r]
                        x3 = wb[3, r]
                        blk[0, r] += m00 * x0 + m10 * x1 + m20 * x2 + m30 * x3
                        blk[1, r] += m01 * x0 + m11 * x1 + m21 * x2 + m31 * x3
                        blk[2, r] += m02 * x0 + m12 * x1 + m22 * x2 + m32 * x3
                        blk[3, r] += m03 * x0 + m13 * x1 + m23 * x2 + m33 * x3
                        blk[4, r] += m04 * x0 + m14 * x1 + m24 * x2 + m34 * x3
                        blk[5, r] += m05 * x0 + m15 * x1 + m25 * x2 + m35 * x3
                        blk[6, r] += m06 * x0 + m16 * x1 + m26 * x2 + m36 * x3
                        blk[7, r] += m07 * x0 + m17 * x1 + m27 * x2 + m37 * x3
                else:
                    for k in range(order):
                        a0 = mom[side, 0, k]
                        a1 = mom[side, 1, k]
                        a2 = mom[side, 2, k]
                        a3 = mom[side, 3, k]
                        row = blk[k]
                        for r in range(n_rep):
                            row[r] += (a0 * wb[0, r] + a1 * wb[1, r] + a2 * wb[2, r]
                                       + a3 * wb[3, r])


_COMPILED: dict[str, Any] = {}


def _compiled(name: str) -> Callable[..., Any] | None:
    """The numba-compiled kernel ``name`` (None without numba)."""
    if not KD.numba_available():
        return None
    if name not in _COMPILED:
        import numba

        jit = numba.njit(cache=True, nogil=True, fastmath=True, boundscheck=False)
        fn = {"keys": _cell_keys, "scatter": _cell_scatter, "deposit": _dep_cells}[name]
        _COMPILED[name] = jit(fn)
    return _COMPILED[name]


def sort_cells(tbin: np.ndarray, energy: np.ndarray, weight: np.ndarray,
               src_traj: np.ndarray, *, n_time: int, e_lo: float, h: float, n_fine: int,
               comp: np.ndarray | None = None, n_comp: int = 1,
               tfrac: np.ndarray | None = None) -> CellSticks | None:
    """Sticks ordered by accumulator cell, for :func:`deposit_replicates` (compiled
    counting sort, O(n_sticks + n_cells); None without numba).

    Parameters are those of :func:`deposit_replicates`; ``n_time`` the size of the
    whole time grid. Sticks outside the grid (energy, time bin, component, or a time
    split past the last bin) are left out and counted in ``n_bad``.
    """
    keys_fn, scatter_fn = _compiled("keys"), _compiled("scatter")
    if keys_fn is None or scatter_fn is None:
        return None
    n = energy.shape[0]
    i64 = np.int64
    tf = np.zeros(0) if tfrac is None else np.ascontiguousarray(tfrac, np.float64)
    key = np.empty(n, i64)
    delta = np.empty(n)
    counts = keys_fn(_int_array(tbin), np.ascontiguousarray(energy, np.float64),
                     np.zeros(0, i64) if comp is None else _int_array(comp),
                     tf, n_time, n_comp, n_fine, 0.5 - e_lo / h, 1.0 / h, key, delta)
    start = np.cumsum(counts)
    m = int(start[-1])
    out = CellSticks(start=start, delta=np.empty(m), weight=np.empty(m),
                     src=np.empty(m, np.int32), tfrac=np.empty(m if tf.size else 0),
                     n_comp=n_comp, n_fine=n_fine, n_bad=n - m)
    scatter_fn(key, start, delta, np.ascontiguousarray(weight, np.float64),
               _int_array(src_traj), tf, out.delta, out.weight, out.src, out.tfrac)
    return out


def _int_array(a: np.ndarray) -> np.ndarray:
    """Contiguous 32- or 64-bit integers (no copy when already so)."""
    a = np.asarray(a)
    return np.ascontiguousarray(a if a.dtype in (np.int32, np.int64) else a.astype(np.int64))


def compact_counts(rw: np.ndarray) -> np.ndarray:
    """Multiplicities (n_traj, n_rep) as int8 when they are small integers (exact; an
    eighth of the cache footprint of :func:`deposit_replicates`), else contiguous
    float64; convert once per chunk of resamples."""
    if rw.dtype == np.int8 and rw.flags.c_contiguous:
        return rw
    rw = np.asarray(rw, dtype=np.float64)
    if rw.size and rw.min() >= 0 and rw.max() <= 127 and np.all(rw == np.floor(rw)):
        return np.ascontiguousarray(rw, dtype=np.int8)
    return np.ascontiguousarray(rw)


def _time_split(start: np.ndarray, per_t: int, t0: int, t1: int, n_threads: int) -> list[int]:
    """Edges splitting time bins t0..t1 into ``n_threads`` ranges of similar stick counts."""
    at = start[np.arange(t0, t1 + 1) * per_t].astype(float)
    goal = np.linspace(at[0], at[-1], n_threads + 1)
    edges = t0 + np.searchsorted(at, goal[1:-1])
    return [t0, *np.clip(edges, t0, t1).tolist(), t1]


def deposit_replicates(acc: np.ndarray, tbin: np.ndarray, energy: np.ndarray,
                       weight: np.ndarray, src_traj: np.ndarray, rw: np.ndarray, *,
                       e_lo: float, h: float, comp: np.ndarray | None = None,
                       n_comp: int = 1, c0: int = 0, tfrac: np.ndarray | None = None,
                       t0: int = 0, n_time: int | None = None, backend: str = "auto",
                       cells: CellSticks | None = None) -> None:
    """Add the moment histograms of a chunk of resamples to ``acc`` (in place).

    Resample ``r`` adds :func:`._kernels_deposit.deposit_moments` of the sticks with
    weights ``weight * rw[src_traj, r]`` to components ``c0 .. c0 + n_comp - 1``, time
    bins ``t0 .. t0 + acc.shape[1] - 1`` of the grid.

    Parameters
    ----------
    acc : ndarray, shape (n_components, n_window, n_fine, order, n_rep)
        Accumulator: the resamples innermost (a stick adds one contiguous row of
        resamples per moment); :func:`per_resample` gives one resample's histograms in
        the layout of :func:`._kernels_broadening.assemble`.
    tbin : ndarray of int, shape (n_sticks,)
        Time-grid index of each stick.
    energy, weight : ndarray, shape (n_sticks,)
        Stick energies (eV) and weights.
    src_traj : ndarray of int, shape (n_sticks,)
        Block-local trajectory of each stick.
    rw : ndarray, shape (n_traj, n_rep)
        Multiplicity of each trajectory in each resample of the chunk.
    e_lo, h : float
        First fine-bin centre and spacing (eV).
    comp, n_comp, c0 : optional
        Component of each stick (None: all 0), how many, and the first component of
        ``acc`` they go to.
    tfrac : ndarray, shape (n_sticks,), optional
        Share of each stick going to the next time bin.
    t0, n_time : int
        First time bin held by ``acc`` and size of the whole grid (default
        ``t0 + acc.shape[1]``).
    backend : {"auto", "numba", "numpy"}
        Compiled kernel (when numba is installed) or a loop of numpy deposits.
    cells : CellSticks, optional
        :func:`sort_cells` of these sticks, made once and reused for every chunk.
    """
    _, n_win, n_fine, order, n_rep = acc.shape
    n_time = t0 + n_win if n_time is None else n_time
    if not acc.flags.c_contiguous or acc.dtype != np.float64:
        raise ValueError("acc must be a C-contiguous float64 array.")
    kernel = _compiled("deposit") if backend in ("auto", "numba") else None
    if kernel is not None and cells is None:
        cells = sort_cells(tbin, energy, weight, src_traj, n_time=n_time, e_lo=e_lo, h=h,
                           n_fine=n_fine, comp=comp, n_comp=n_comp, tfrac=tfrac)
    if kernel is None or cells is None:
        for r in range(n_rep):
            part = KD.deposit_moments(tbin, energy, weight * rw[src_traj, r], n_time=n_time,
                                      e_lo=e_lo, h=h, n_fine=n_fine, order=order, comp=comp,
                                      n_comp=n_comp, tfrac=tfrac, backend="numpy")
            acc[c0:c0 + n_comp, :, :, :, r] += np.moveaxis(part, 0, -1)[:, t0:t0 + n_win]
        return
    if cells.n_bad:
        raise ValueError(f"{cells.n_bad} sticks fall outside the moment grid (time bin or "
                         "energy).")
    rw = compact_counts(rw)
    per_t = cells.n_comp * cells.n_fine
    n_here = int(cells.start[(t0 + n_win) * per_t] - cells.start[max(t0 - 1, 0) * per_t])
    n_threads = (1 if n_here * n_rep < KD.MIN_STICKS_PER_THREAD or n_win < 2
                 else max(1, min(KD.usable_cores(), n_win)))
    edges = _time_split(cells.start, per_t, t0, t0 + n_win, n_threads)
    args = (cells.start, cells.delta, cells.weight, cells.src, cells.tfrac, rw, acc, t0)

    def run(t: int) -> None:
        kernel(*args, edges[t], edges[t + 1], cells.n_comp, c0)

    if n_threads == 1:
        run(0)
    else:  # disjoint time ranges: no two threads write the same cell
        with ThreadPoolExecutor(n_threads) as pool:
            list(pool.map(run, range(n_threads)))


def per_resample(acc: np.ndarray, r: int) -> np.ndarray:
    """Resample r's histograms (order, comp, time, fine) of an accumulator (comp, time,
    fine, moment, resample): a strided view."""
    return np.moveaxis(acc[..., r], -1, 0)
