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
* :func:`deposit_replicates` deposits a block's sticks for a chunk of resamples at once
  (compiled with numba when installed: one pass over the sticks, in time order, each
  stick adding its ``order`` moments for every resample of the chunk; the accumulator
  keeps a time bin's rows of all resamples together so they stay in cache; otherwise
  one :func:`._kernels_deposit.deposit_moments` call per resample).
* :func:`replicate_chunk` says how many resamples fit a memory budget.
* :func:`percentile_summary` turns replicate maps into percentile intervals and the
  relative standard error.

The naive reference twin is :mod:`._reference_bootstrap` (a loop over resampled
ensembles, each through :func:`~.maps.compute_trpes`); tests compare the two.
"""

from __future__ import annotations

from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from typing import Any

import numpy as np

from . import _kernels_deposit as KD

__all__ = ["bootstrap_counts", "unit_alive", "deposit_replicates", "per_resample",
           "time_order",
           "replicate_chunk",
           "percentile_summary", "MEMORY_BUDGET"]

#: bytes the replicate histograms of one chunk may take (the chunk of resamples shrinks
#: to fit; at least one resample per chunk)
MEMORY_BUDGET = 256 * 2**20


def bootstrap_counts(n_traj: int, n_boot: int, rng: np.random.Generator) -> np.ndarray:
    """How often each trajectory is drawn in each resample, shape (n_boot, n_traj).

    Drawing ``n_traj`` trajectories with replacement, equal probabilities: a
    multinomial draw per resample (row b equals ``np.bincount(indices_b)``).
    """
    return rng.multinomial(n_traj, np.full(n_traj, 1.0 / n_traj),
                           size=n_boot).astype(np.float64)


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


def _numba_replicates() -> Callable[..., int] | None:
    if not KD.numba_available():
        return None
    if "kernel" in _COMPILED:
        return _COMPILED["kernel"]
    import numba

    kernel = numba.njit(cache=True, nogil=True, fastmath=True)(_dep_replicates)
    _COMPILED["kernel"] = kernel
    return kernel


_COMPILED: dict[str, Any] = {}


def _dep_replicates(tbin, energy, weight, src_traj, comp, tfrac, ridx, rval, nnz, acc, c0,
                    n_comp, shift, inv_h):  # pragma: no cover - compiled by numba
    """Deposit every stick for every resample of a chunk.

    Trajectory ``n`` appears in the resamples ``ridx[n, :nnz[n]]`` with multiplicities
    ``rval[n, :nnz[n]]`` (the non-zero ones: a third of the pairs are zero);
    ``acc`` has the layout (component, time, resample, fine bin, moment) of
    :func:`deposit_replicates` (the rows of one time bin stay in cache when the sticks
    come in time order); the sticks go to components ``c0 + comp`` (threads take
    disjoint sets of resamples). Returns the number of sticks out of range.
    """
    n_rep = acc.shape[2]
    n_time = acc.shape[1]
    n_fine = acc.shape[3]
    order = acc.shape[4]
    flat = acc.reshape(-1)
    fn = float(n_fine)
    s_rep = np.uint64(n_fine * order)
    s_time = np.uint64(n_rep) * s_rep
    mom = np.empty(order)
    bad = 0
    for i in range(energy.shape[0]):
        p = energy[i] * inv_h + shift
        tb = tbin[i]
        c = 0 if n_comp == 1 else comp[i]
        if not (p >= 0.0 and p < fn and tb >= 0 and tb < n_time and c >= 0 and c < n_comp):
            bad += 1
            continue
        b = np.int64(p)
        d = p - b - 0.5
        v = weight[i]
        for k in range(order):
            mom[k] = v
            v *= d
        n = src_traj[i]
        row = (np.uint64((c0 + c) * n_time + tb) * s_time + np.uint64(b * order))
        f = tfrac[i] if tfrac.shape[0] else 0.0
        if f > 0.0:
            if tb + 1 >= n_time:
                bad += 1
                continue
            f0 = 1.0 - f
            for j in range(nnz[n]):
                r = ridx[n, j]
                cr = rval[n, j]
                if cr != 0.0:
                    a0 = cr * f0
                    a1 = cr * f
                    base = row + np.uint64(r) * s_rep
                    for k in range(order):
                        flat[base + np.uint64(k)] += a0 * mom[k]
                        flat[base + s_time + np.uint64(k)] += a1 * mom[k]
        elif order == 8:  # unrolled: the common case (8 moments, one cache line)
            m0, m1, m2, m3 = mom[0], mom[1], mom[2], mom[3]
            m4, m5, m6, m7 = mom[4], mom[5], mom[6], mom[7]
            for j in range(nnz[n]):
                cr = rval[n, j]
                base = row + np.uint64(ridx[n, j]) * s_rep
                flat[base] += cr * m0
                flat[base + np.uint64(1)] += cr * m1
                flat[base + np.uint64(2)] += cr * m2
                flat[base + np.uint64(3)] += cr * m3
                flat[base + np.uint64(4)] += cr * m4
                flat[base + np.uint64(5)] += cr * m5
                flat[base + np.uint64(6)] += cr * m6
                flat[base + np.uint64(7)] += cr * m7
        else:
            for j in range(nnz[n]):
                r = ridx[n, j]
                cr = rval[n, j]
                if cr != 0.0:
                    base = row + np.uint64(r) * s_rep
                    for k in range(order):
                        flat[base + np.uint64(k)] += cr * mom[k]
    return bad


def _nonzero_resamples(rw: np.ndarray, lo: int, hi: int
                       ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per trajectory, the resamples ``lo <= r < hi`` it appears in (ascending), their
    multiplicities and how many: ``ridx``, ``rval`` (n_traj, hi - lo), ``nnz`` (n_traj,)."""
    sub = rw[:, lo:hi]
    keep = sub != 0
    order = np.argsort(~keep, axis=1, kind="stable")  # non-zero first, in resample order
    ridx = np.ascontiguousarray(order + lo, dtype=np.int64)
    rval = np.ascontiguousarray(np.take_along_axis(sub, order, axis=1))
    return ridx, rval, keep.sum(axis=1).astype(np.int64)


def deposit_replicates(acc: np.ndarray, tbin: np.ndarray, energy: np.ndarray,
                       weight: np.ndarray, src_traj: np.ndarray, rw: np.ndarray, *,
                       e_lo: float, h: float, comp: np.ndarray | None = None,
                       n_comp: int = 1, c0: int = 0, tfrac: np.ndarray | None = None,
                       backend: str = "auto") -> None:
    """Add the moment histograms of a chunk of resamples to ``acc`` (in place).

    Resample ``r`` adds :func:`._kernels_deposit.deposit_moments` of the sticks with
    weights ``weight * rw[src_traj, r]`` to components ``c0 .. c0 + n_comp - 1``.

    Parameters
    ----------
    acc : ndarray, shape (n_components, n_time, n_rep, n_fine, order)
        Accumulator (see :func:`per_resample` for the layout of
        :func:`._kernels_broadening.assemble`).
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
    backend : {"auto", "numba", "numpy"}
        Compiled kernel (when numba is installed) or a loop of numpy deposits.
    """
    _, n_time, n_rep, n_fine, order = acc.shape
    if not acc.flags.c_contiguous or acc.dtype != np.float64:
        raise ValueError("acc must be a C-contiguous float64 array.")
    kernel = _numba_replicates() if backend in ("auto", "numba") else None
    if kernel is None:
        for r in range(n_rep):
            part = KD.deposit_moments(tbin, energy, weight * rw[src_traj, r], n_time=n_time,
                                      e_lo=e_lo, h=h, n_fine=n_fine, order=order, comp=comp,
                                      n_comp=n_comp, tfrac=tfrac, backend="numpy")
            acc[c0:c0 + n_comp, :, r] += np.moveaxis(part, 0, -1)
        return
    args = (np.ascontiguousarray(tbin, dtype=np.int64),
            np.ascontiguousarray(energy, dtype=np.float64),
            np.ascontiguousarray(weight, dtype=np.float64),
            np.ascontiguousarray(src_traj, dtype=np.int64),
            np.zeros(1, np.int64) if comp is None else np.ascontiguousarray(comp, dtype=np.int64),
            np.zeros(0) if tfrac is None else np.ascontiguousarray(tfrac, np.float64))
    tail = (acc, c0, n_comp, 0.5 - e_lo / h, 1.0 / h)
    n_threads = (1 if energy.size * n_rep < KD.MIN_STICKS_PER_THREAD
                 else max(1, min(KD.usable_cores(), n_rep)))
    edges = np.linspace(0, n_rep, n_threads + 1).astype(int)
    parts = [_nonzero_resamples(np.asarray(rw, dtype=np.float64), edges[t], edges[t + 1])
             for t in range(n_threads)]
    if n_threads == 1:
        bad = kernel(*args, *parts[0], *tail)
    else:  # disjoint resample ranges: no two threads write the same cell
        with ThreadPoolExecutor(n_threads) as pool:
            bad = sum(pool.map(lambda t: kernel(*args, *parts[t], *tail),
                               range(n_threads))) // n_threads
    if bad:
        raise ValueError(f"{bad} sticks fall outside the moment grid (time bin or energy).")


def per_resample(acc: np.ndarray, r: int) -> np.ndarray:
    """Resample r's histograms (order, comp, time, fine) of an accumulator (comp, time,
    resample, fine, moment): a view in the layout :func:`._kernels_broadening.assemble`
    reads without copying (each time row's fine bins and moments are contiguous)."""
    return np.moveaxis(acc[:, :, r], -1, 0)


def time_order(tbin: np.ndarray) -> np.ndarray | None:
    """Stable order of the sticks by time bin (None when they already are)."""
    if tbin.size < 2 or np.all(tbin[1:] >= tbin[:-1]):
        return None
    return np.argsort(tbin, kind="stable")


def percentile_summary(reps: np.ndarray, estimate: np.ndarray, ci: float
                       ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Percentile interval and relative standard error from replicate maps.

    Parameters
    ----------
    reps : ndarray, shape (n_boot, ...)
        Replicate values.
    estimate : ndarray, shape (...)
        The map itself.
    ci : float
        Confidence level.

    Returns
    -------
    lower, upper : ndarray, shape (...)
        The ``(1 - ci) / 2`` and ``(1 + ci) / 2`` quantiles over the replicates.
    rel_se : ndarray, shape (...)
        Bootstrap standard error over ``|estimate|``; NaN where the estimate is 0.
    """
    alpha = (1.0 - ci) / 2.0
    lower, upper = np.quantile(reps, [alpha, 1.0 - alpha], axis=0)
    se = reps.std(axis=0, ddof=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        rel = np.where(estimate != 0, se / np.abs(estimate), np.nan)
    return lower, upper, rel
