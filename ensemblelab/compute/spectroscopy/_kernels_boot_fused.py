"""Fused compiled bootstrap: replicate maps straight from ensemble arrays (private).

The stick route of :mod:`.bootstrap` makes every stick as rows of arrays, sorts them by
accumulator cell and deposits them for all resamples; for 10^7 sticks the stick arrays
alone cost many times the map. This module does the bootstrap in one compiled pass
per thread over the grid times, like :mod:`._kernels_fused` does the map:

* each thread takes a range of grid times, in tiles of a few bins (:data:`TILE_BYTES`
  of stick buffer); for each tile it reads every trajectory's snapshots of the tile in
  a row (a cursor per trajectory: the snapshots are grouped by trajectory and sorted by
  time), forms each (snapshot, cation channel) stick as the fused map pass does
  (ionisation energy, threshold, built-in cross section, weight ``w_traj * sigma``,
  linear time split) into one bucket per bin; then, bin by bin, each stick adds its
  ``order`` Taylor moments, times the trajectory's multiplicity in every resample of
  the chunk (``rw[traj, :]``, contiguous vector multiply-adds with flat unsigned
  indices; sticks in fine-bin order, four at a time), to a two-row accumulator
  (bins ``j`` and ``j + 1``, fine bin x moment x resample);
* when bin ``j`` is complete its row is broadened in energy at once for all resamples
  (one BLAS product per banded block of :func:`._kernels_replicate_maps.replicate_blocks`)
  into the replicate rows ``y[j]``, and the accumulator row is reused for ``j + 2``;
* the unit alive profile of each trajectory (share of each snapshot with data for some
  channel at ``j`` and ``j + 1``) is added on the first chunk of resamples.

Nothing of length ``n_sticks`` is allocated, no sort is made, and every number is
that of the stick route for the same fine grid and order (tests compare the two, and
the naive twin :mod:`._reference_bootstrap`). The caller picks the precision (float32
or float64 arrays: the kernel compiles for each) and the fine grid and order of the
replicate moments (:mod:`.bootstrap`).
"""

from __future__ import annotations

import math
import threading
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from typing import Any

import numpy as np

from . import _kernels_fused as KF

__all__ = ["fused_replicates", "available", "L2_BYTES", "LANES"]

#: bytes of the two-row replicate accumulator of a thread (near its second-level cache;
#: 200 resamples in one chunk beat two chunks of 100 that fit it: each chunk reads the
#: ensemble again). The chunk of resamples shrinks to fit.
L2_BYTES = 2 << 20

#: resamples per vector loop (16 float32 in a 512-bit register): the caller pads the
#: resamples to a multiple of it, so that no loop over them ends in scalar steps
LANES = 16

#: bytes of the stick buffer of one tile of grid times. Each tile reads every
#: trajectory's segment for its times, so wider tiles read the ensemble in fewer, longer
#: runs: on the 10^7-stick benchmark (2 threads, 200 resamples) the replicate pass took
#: 0.47 / 0.46 / 0.39 / 0.41 / 0.38 s (best of 4) at 4 / 8 / 16 / 32 / 64 MB; 16 MB per
#: thread keeps most of that gain for a bounded buffer.
TILE_BYTES = 16 << 20

_LOCK = threading.Lock()
_COMPILED: dict[str, Any] = {}


def _add_moments(acc, off, n_rep, order, v, d, rwf, rb, coef):  # pragma: no cover - numba
    """``acc[off + m n_rep + q] += v d^m rwf[rb + q]`` for m < order, q < n_rep.

    Flat unsigned indices (``off``, ``n_rep``, ``rb``: np.uint64): no array views, whose
    reference counting costs more than the adds, and no negative-index test, so the
    loop over the resamples is vectorised. ``coef`` (order,) is scratch of the
    accumulator's dtype (the products stay in it).
    """
    a = v
    for m in range(order):
        coef[m] = a
        a *= d
    if order == 3:
        a0 = coef[0]
        a1 = coef[1]
        a2 = coef[2]
        o1 = off + n_rep
        o2 = o1 + n_rep
        for q in range(n_rep):
            x = rwf[rb + q]
            acc[off + q] += a0 * x
            acc[o1 + q] += a1 * x
            acc[o2 + q] += a2 * x
        return
    if order == 2:
        a0 = coef[0]
        a1 = coef[1]
        o1 = off + n_rep
        for q in range(n_rep):
            x = rwf[rb + q]
            acc[off + q] += a0 * x
            acc[o1 + q] += a1 * x
        return
    o = off
    for m in range(order):
        c = coef[m]
        for q in range(n_rep):
            acc[o + q] += c * rwf[rb + q]
        o += n_rep


def _grid_pos(t, start, dt):  # pragma: no cover - compiled by numba
    """Grid bin and split of time ``t`` (the rounding of the map's pass)."""
    pos = (t - start) / dt
    jj = np.int64(math.floor(pos + 1e-9))
    f = pos - jj
    if abs(f) < 1e-9:
        f = 0.0
    return jj, f


def _deposit_bucket(sb, sd, sv, sf, sr, s0, s1, acc, cur, nxt, row_len, n_rep, order, rw,
                    coef, n_time, j):  # pragma: no cover - compiled by numba
    """Add the buffered sticks ``s0:s1`` of bin ``j`` to rows ``cur`` (first share) and
    ``nxt`` (second share) of the flat two-row accumulator (``row_len`` values per
    row), for every resample."""
    nr = np.uint64(n_rep)
    nro = np.uint64(n_rep * order)  # accumulator values per fine bin
    c0 = np.uint64(cur * row_len)
    c1 = np.uint64(nxt * row_len)
    for q in range(s0, s1):
        f = sf[q]
        rb = np.uint64(sr[q]) * nr
        off = np.uint64(sb[q]) * nro
        if f >= 0.0:
            _add_moments(acc, c0 + off, nr, order, sv[q] * (1.0 - f), sd[q], rw, rb, coef)
        else:
            f = -f
        if f > 0.0 and j + 1 < n_time:
            _add_moments(acc, c1 + off, nr, order, sv[q] * f, sd[q], rw, rb, coef)



def _add4(acc, off, n_rep, order, c4, rb0, rb1, rb2, rb3, rwf):  # pragma: no cover - numba
    """Four sticks of one fine bin: ``acc[off + m n_rep + q] += sum_u c4[4 m + u]
    rwf[rb_u + q]`` for m < order, q < n_rep.

    One load and store of each accumulator value for four sticks (the adds of one
    stick at a time are bound by the stores). ``c4`` (4 order,): ``v_u d_u^m``.
    """
    o = off
    for m in range(order):
        a = c4[4 * m]
        b = c4[4 * m + 1]
        c = c4[4 * m + 2]
        e = c4[4 * m + 3]
        for q in range(n_rep):
            acc[o + q] += a * rwf[rb0 + q] + b * rwf[rb1 + q] + c * rwf[rb2 + q] + e * rwf[rb3 + q]
        o += n_rep


def _coef4(c4, order, u, v, d):  # pragma: no cover - compiled by numba
    """``c4[4 m + u] = v d^m`` for m < order."""
    for m in range(order):
        c4[4 * m + u] = v
        v *= d


def _deposit_sorted(sb, sd, sv, sf, sr, s0, s1, perm, cnt, acc, cur, nxt, row_len, n_rep,
                    order, rw, coef, c4, n_time, j):  # pragma: no cover - compiled by numba
    """:func:`_deposit_bucket` with the sticks taken in fine-bin order (a counting sort,
    ``perm`` and ``cnt`` (n_fine + 1,) scratch), four at a time where four share a bin
    (:func:`_add4`): the bin's accumulator values stay in the first-level cache."""
    n_b = cnt.shape[0] - 1
    for q in range(n_b + 1):
        cnt[q] = 0
    for q in range(s0, s1):
        cnt[sb[q] + 1] += 1
    for q in range(n_b):
        cnt[q + 1] += cnt[q]
    for q in range(s0, s1):
        b = sb[q]
        perm[cnt[b]] = q
        cnt[b] += 1
    n = s1 - s0
    nr = np.uint64(n_rep)
    nro = np.uint64(n_rep * order)
    c0 = np.uint64(cur * row_len)
    c1 = np.uint64(nxt * row_len)
    has_next = j + 1 < n_time
    p = 0
    while p < n:
        q = perm[p]
        off = np.uint64(sb[q]) * nro
        if p + 3 < n and sb[perm[p + 3]] == sb[q]:  # sorted: all four in one bin
            r0 = np.uint64(sr[q]) * nr
            r1 = np.uint64(sr[perm[p + 1]]) * nr
            r2 = np.uint64(sr[perm[p + 2]]) * nr
            r3 = np.uint64(sr[perm[p + 3]]) * nr
            split = False
            for u in range(4):  # first shares (at j)
                qu = perm[p + u]
                _coef4(c4, order, u, sv[qu] * (1.0 - sf[qu]), sd[qu])
                split = split or sf[qu] > 0.0
            _add4(acc, c0 + off, nr, order, c4, r0, r1, r2, r3, rw)
            if split and has_next:  # second shares (at j + 1)
                for u in range(4):
                    qu = perm[p + u]
                    _coef4(c4, order, u, sv[qu] * sf[qu], sd[qu])
                _add4(acc, c1 + off, nr, order, c4, r0, r1, r2, r3, rw)
            p += 4
            continue
        f = sf[q]
        rb = np.uint64(sr[q]) * nr
        _add_moments(acc, c0 + off, nr, order, sv[q] * (1.0 - f), sd[q], rw, rb, coef)
        if f > 0.0 and has_next:
            _add_moments(acc, c1 + off, nr, order, sv[q] * f, sd[q], rw, rb, coef)
        p += 1


def _run(time, active, starts, w_traj, energies, cat, dyson, by_state, shifts, kind, p1,
         p2, total, tail, start, dt, n_time, shift_e, inv_h, n_fine, order, rw, j_lo, j_hi,
         tile, cursor, blk, mats, acc, y, do_unit, unit, counts):  # pragma: no cover - numba
    """Replicate rows ``y[j - j_lo]`` (energy-broadened, before the normaliser) of grid
    bins ``j_lo <= j < j_hi`` (see the module doc).

    Tiles of ``tile`` bins: each trajectory's snapshots of the tile are read in a row
    (contiguous memory) and their sticks put into one bucket per bin (a buffer of
    (fine bin, delta, weight, split, trajectory)); then bin by bin the bucket is added
    to the two-row accumulator and the finished row broadened. ``blk`` (n_blocks, 5):
    ``j0, j1, lo, hi, offset`` of each banded block, its matrix ``mats[offset:]`` of
    shape ``(j1 - j0, (hi - lo) * order)``. ``acc`` (2, n_fine * order, n_rep) is
    scratch. ``counts`` (int64, 2): sticks outside the grid, invalid cross sections.
    """
    n_traj = starts.shape[0] - 1
    n_cat = cat.shape[1]
    fn = float(n_fine)
    coef = np.empty(order, dtype=acc.dtype)
    c4 = np.empty(4 * order, dtype=acc.dtype)
    cnt = np.empty(n_fine + 1, np.int64)
    n_rep = rw.shape[1]
    row_len = n_fine * order * n_rep
    accf = acc.reshape(2 * row_len)
    rwf = rw.reshape(rw.size)
    acc[:] = 0.0
    cur = 0
    cap = 1024
    sb = np.empty(cap, np.int32)
    sd = np.empty(cap, acc.dtype)
    sv = np.empty(cap, acc.dtype)
    sf = np.empty(cap, acc.dtype)
    sr = np.empty(cap, np.int32)
    bstart = np.zeros(tile + 2, np.int64)
    perm = np.empty(cap, np.int32)
    for r in range(n_traj):  # each trajectory's first snapshot at bin >= j_lo - 1
        lo = starts[r]
        hi = starts[r + 1]
        if j_lo > 0:
            lo = KF._first_at(time, lo, hi, start, dt, j_lo - 1)
        cursor[r] = lo
    n_blk = blk.shape[0]
    for t0 in range(j_lo, j_hi, tile):
        t1 = min(t0 + tile, j_hi)
        # bucket 0: bin t0 - 1 (second shares, first tile only); bucket 1 + (j - t0)
        bstart[:] = 0
        for r in range(n_traj):
            i = cursor[r]
            hi = starts[r + 1]
            while i < hi:
                jj, f = _grid_pos(time[i], start, dt)
                if jj >= t1:
                    break
                kb = jj - t0 + 1
                if kb < 0:
                    kb = 0
                bstart[kb + 1] += n_cat
                i += 1
        for q in range(tile + 1):
            bstart[q + 1] += bstart[q]
        need = bstart[tile + 1]
        if need > cap:
            cap = max(need, 2 * cap)
            sb = np.empty(cap, np.int32)
            sd = np.empty(cap, acc.dtype)
            sv = np.empty(cap, acc.dtype)
            sf = np.empty(cap, acc.dtype)
            sr = np.empty(cap, np.int32)
        fill = bstart[:tile + 1].copy()
        for r in range(n_traj):
            i = cursor[r]
            hi = starts[r + 1]
            w = w_traj[r]
            while i < hi:
                jj, f = _grid_pos(time[i], start, dt)
                if jj >= t1:
                    break
                if jj < t0 - 1 or (jj == t0 - 1 and t0 != j_lo):
                    if jj < 0:
                        counts[0] += 1  # before the grid
                    i += 1
                    continue
                kb = jj - t0 + 1
                first = jj >= t0
                if not first and not f > 0.0:  # before the range, no second share
                    i += 1
                    continue
                # the snapshot's sticks (as the fused map pass forms them)
                pos = fill[kb]
                ac = active[i]
                en = energies[i, ac]
                st = ac if by_state else 0
                n_has = 0
                for k in range(n_cat):
                    ip = cat[i, k] - en + shifts[k]
                    d = dyson[i, st, k]
                    if not (math.isfinite(ip) and math.isfinite(d)):
                        continue
                    n_has += 1
                    e = total - ip
                    if not e > -tail:
                        continue
                    sig = KF._sigma(kind, p1, p2, d, e if e > 0.0 else 0.0, ip, total)
                    if not (math.isfinite(sig) and sig >= 0.0):
                        if first:
                            counts[1] += 1
                        continue
                    p = e * inv_h + shift_e
                    if not (p >= 0.0 and p < fn):
                        if first:
                            counts[0] += 1
                        continue
                    bb = np.int64(p)
                    if first and f > 0.0 and jj + 1 >= n_time:
                        counts[0] += 1
                    sb[pos] = bb  # fine bin (no division by the order when sorting)
                    sd[pos] = p - bb - 0.5
                    sv[pos] = w * sig
                    sf[pos] = f if first else -f
                    sr[pos] = r
                    pos += 1
                fill[kb] = pos
                if do_unit and n_has > 0:
                    if first and jj >= j_lo:
                        unit[r, jj] += 1.0 - f
                    if f > 0.0 and jj + 1 < n_time and jj + 1 >= j_lo and jj + 1 < j_hi:
                        unit[r, jj + 1] += f
                i += 1
            cursor[r] = i
        if t0 == j_lo and j_lo > 0:  # second shares of the bin before the range
            _deposit_bucket(sb, sd, sv, sf, sr, bstart[0], fill[0], accf, 1 - cur, cur,
                            row_len, n_rep, order, rwf, coef, n_time, j_lo - 1)
        for j in range(t0, t1):
            nxt = 1 - cur
            kb = j - t0 + 1
            if perm.shape[0] < cap:
                perm = np.empty(cap, np.int32)
            _deposit_sorted(sb, sd, sv, sf, sr, bstart[kb], fill[kb], perm, cnt, accf, cur,
                            nxt, row_len, n_rep, order, rwf, coef, c4, n_time, j)
            row = acc[cur]
            out = y[j - j_lo]
            for q in range(n_blk):
                j0, j1, lo, hi, off = blk[q, 0], blk[q, 1], blk[q, 2], blk[q, 3], blk[q, 4]
                m = mats[off:off + (j1 - j0) * (hi - lo) * order].reshape(
                    (j1 - j0, (hi - lo) * order))
                out[j0:j1] = np.dot(m, row[lo * order:hi * order])
            row[:] = 0.0
            cur = nxt
    if j_hi == n_time:  # snapshots after the grid
        for r in range(n_traj):
            counts[0] += starts[r + 1] - cursor[r]


def _kernels() -> dict[str, Callable[..., Any]] | None:
    """The compiled kernel, or None without numba."""
    if "run" not in _COMPILED:
        with _LOCK:
            if "run" not in _COMPILED:
                if KF._kernels() is None:  # numba missing; also compiles the helpers
                    _COMPILED["run"] = None
                else:
                    import numba

                    inl = numba.njit(nogil=True, boundscheck=False, fastmath=True,
                                     inline="always")
                    g = globals()
                    g["_add_moments"] = inl(_add_moments)
                    g["_grid_pos"] = numba.njit(nogil=True, inline="always")(_grid_pos)
                    g["_add4"] = inl(_add4)
                    g["_coef4"] = inl(_coef4)
                    g["_deposit_sorted"] = numba.njit(nogil=True, boundscheck=False,
                                                      fastmath=True)(_deposit_sorted)
                    g["_deposit_bucket"] = numba.njit(nogil=True, boundscheck=False,
                                                      fastmath=True)(_deposit_bucket)
                    _COMPILED["run"] = numba.njit(cache=True, nogil=True,
                                                  boundscheck=False)(_run)
    return None if _COMPILED["run"] is None else _COMPILED


def available() -> bool:
    """True when the compiled fused bootstrap can run (numba installed)."""
    return _kernels() is not None


def _pack_blocks(blocks: Any, dtype: Any) -> tuple[np.ndarray, np.ndarray]:
    """Banded blocks ``(j0, j1, lo, hi, mat_t)`` as one index table and one flat array."""
    blk = np.zeros((len(blocks), 5), dtype=np.int64)
    parts, off = [], 0
    for q, (j0, j1, lo, hi, mat_t) in enumerate(blocks):
        blk[q] = (j0, j1, lo, hi, off)
        parts.append(np.ascontiguousarray(mat_t, dtype=dtype).ravel())
        off += parts[-1].size
    mats = np.concatenate(parts) if parts else np.zeros(0, dtype=dtype)
    return blk, mats


def fused_replicates(block: Any, *, layout: Any, w_traj: np.ndarray, rw: np.ndarray,
                     cross_section: Any, total_energy: float, tail: float, start: float,
                     dt: float, n_time: int, e_lo: float, h: float, n_fine: int, order: int,
                     shifts: np.ndarray | None, blocks: Any, n_energies: int,
                     unit: np.ndarray | None = None, dtype: Any = None,
                     n_threads: int | None = None,
                     jobs_per_thread: int = 4, tick: Callable[[], None] | None = None
                     ) -> np.ndarray:
    """Energy-broadened replicate rows of every grid time, all resamples of a chunk.

    Parameters
    ----------
    block : Ensemble
        Grouped by trajectory and sorted by time (``layout.sorted``).
    layout : Layout
        Its :func:`._kernels_layout.block_layout`.
    w_traj : ndarray, shape (n_trajectories,)
        Trajectory weights.
    rw : ndarray, shape (n_trajectories, n_rep)
        Multiplicity of each trajectory in each resample: float32 or float64 (then
        also the precision of the accumulator and the output), or uint8 (small
        counts: a quarter of the bytes that every stick reads for every resample)
        with ``dtype`` set.
    cross_section : CrossSection
        A built-in model (:func:`._kernels_fused.cross_section_code` not None).
    total_energy, tail : float
        ``n h nu`` of the probe and the threshold tail (eV).
    start, dt, n_time : float, float, int
        Time grid (fs).
    e_lo, h, n_fine, order : float, float, int, int
        Fine energy grid (first centre, spacing in eV, bins) and moments.
    shifts : ndarray, shape (n_cation,), optional
        Ionisation-energy shifts (eV).
    blocks : ReplicateBlocks
        :func:`._kernels_replicate_maps.replicate_blocks` for this fine grid and order.
    n_energies : int
        Output kinetic energies.
    unit : ndarray, shape (n_trajectories, n_time), optional
        Zeroed float64 array to receive each trajectory's unit alive profile (without
        the absorbed extension).
    dtype : {float32, float64}, optional
        Precision of the accumulator and the output (default: that of ``rw``; needed
        when ``rw`` is uint8).
    n_threads, jobs_per_thread : int
        Threads (default the usable cores) and time ranges per thread, taken in turn.
    tick : callable, optional
        Called after each time range (progress).

    Returns
    -------
    ndarray, shape (n_time, n_energies, n_rep)
        Replicate rows, eV^-1 before the normaliser, of ``dtype``.

    Raises
    ------
    ValueError
        A stick outside the grids or an invalid cross section.
    """
    from ._kernels_broadening import single_thread_blas
    from ._kernels_deposit import usable_cores
    from ._kernels_fused import block_arrays, cross_section_code, time_cuts

    k = _kernels()
    assert k is not None and layout is not None and layout.sorted
    code = cross_section_code(cross_section)
    assert code is not None
    dtype = np.dtype(rw.dtype if dtype is None else dtype)
    if dtype not in (np.float32, np.float64) or rw.dtype not in (np.uint8, dtype):
        raise TypeError(f"fused_replicates: multiplicities of dtype {rw.dtype} with "
                        f"accumulator dtype {dtype}; expected uint8 or the accumulator's "
                        "dtype, and float32 or float64 for the accumulator.")
    a = block_arrays(block, shifts)
    time = np.ascontiguousarray(block.snapshots["time"].to_numpy(), dtype=np.float64)
    w_traj = np.ascontiguousarray(w_traj, dtype=np.float64)
    rw = np.ascontiguousarray(rw)
    n_rep = rw.shape[1]
    blk, mats = _pack_blocks(blocks, dtype)
    n_threads = max(1, min(usable_cores() if n_threads is None else int(n_threads), n_time))
    cuts = time_cuts(time, layout.starts, start, dt, n_time,
                      max(1, n_threads * jobs_per_thread))
    y = np.empty((n_time, n_energies, n_rep), dtype=dtype)
    y[:] = 0.0
    do_unit = unit is not None
    unit_arr = unit if unit is not None else np.zeros((1, 1))
    kind, p1, p2 = code
    inv_h = 1.0 / h
    shift_e = 0.5 - e_lo * inv_h
    local = threading.local()
    per_bin = 40 * a["cat"].shape[1] * max(1.0, block.n_snapshots / max(n_time, 1))
    tile = int(min(64, max(1, TILE_BYTES // per_bin)))

    def run(q: int) -> np.ndarray:
        if not hasattr(local, "acc"):
            local.acc = np.empty((2, n_fine * order, n_rep), dtype=dtype)
            local.cursor = np.empty(layout.starts.size - 1, dtype=np.int64)
        counts = np.zeros(3, dtype=np.int64)
        j_lo, j_hi = cuts[q], cuts[q + 1]
        k["run"](time, a["active"], layout.starts, w_traj, a["energies"], a["cat"],
                 a["dyson"], a["by_state"], a["shifts"], kind, p1, p2, float(total_energy),
                 float(tail), float(start), float(dt), int(n_time), shift_e, inv_h,
                 int(n_fine), int(order), rw, int(j_lo), int(j_hi), tile, local.cursor, blk,
                 mats,
                 local.acc, y[j_lo:j_hi], do_unit, unit_arr, counts)
        if tick is not None:
            tick()
        return counts

    with single_thread_blas():
        if n_threads == 1:
            parts = [run(q) for q in range(len(cuts) - 1)]
        else:
            with ThreadPoolExecutor(n_threads) as pool:
                parts = list(pool.map(run, range(len(cuts) - 1)))
    counts = np.sum(parts, axis=0)
    if counts[1]:
        raise ValueError("the cross-section model must return finite values >= 0, one per "
                         "stick.")
    if counts[0]:
        raise ValueError(f"fused bootstrap pass: {int(counts[0])} stick(s) or snapshot(s) "
                         "outside the time or fine energy grid. Hint: size the grids from "
                         "the data.")
    return y


def replicate_rows_bytes(n_fine: int, order: int, itemsize: int) -> int:
    """Bytes of one resample's share of the two-row accumulator."""
    return 2 * n_fine * order * itemsize


def reps_per_chunk(n_boot: int, n_fine: int, order: int, itemsize: int,
                   budget: int = L2_BYTES) -> int:
    """Resamples per chunk so that the two-row accumulator fits ``budget`` bytes (>=
    :data:`LANES`, a multiple of it unless all fit)."""
    per = replicate_rows_bytes(n_fine, order, itemsize)
    n = int(max(LANES, budget // max(per, 1)))
    if n >= n_boot:
        return n_boot
    return (n // LANES) * LANES
